"""Holding a pose against random forcing (``blanket/arm-hold-v0``): measured tables.

Three parts (pick with ``--part``; default all):

- ``compare``: the active-inference agent against the classical baseline (both under torque
  control, the env's default) on the same seeds -- the same cells and the same forcing draws
  (checked: every episode's forcing digest is equal across the policies). Prints the time
  within tolerance (mean and lowest episode), the median recovery time after a shove, the
  shoves recovered and the tip's standard deviations.
- ``lyapunov``: without shoves, the empirical stationary tip covariance against the one the
  continuous Lyapunov equation predicts from the linearised closed loop (rigid arm at the start
  posture, the policy's velocity loop ``q'' = k_v (f(q) - q') + M^-1 (J' u - d)`` with the
  attractor's Jacobian ``F = df/dq``, the agent's disturbance belief ``d' = (J' u - d) / t_d``,
  the OU force ``u`` as a state). Belief and filter lags, sensor noise and the 240 Hz
  sampling are left out of the prediction, so the ratio shows how far they matter.
- ``precision``: the agent with its goal as a prior (``goal = "prior"``) at several goal
  precisions: how the precision of its preferred density trades control effort (the torque's
  standard deviation about its episode mean, RMS over joints) against spread (tip sd).
- ``gain``: the default agent (``goal = "reference"``) at several attractor gains, without
  shoves: effort and spread, and the tip sd the Lyapunov equation predicts for each.

Usage: ``python scripts/bench_hold.py [--part compare|lyapunov|precision|gain]
[--episodes 20]``.
Everything runs through :func:`blanket.rollout.rollout` with the runner's
:class:`~blanket.runner.HoldRecord` (the one loop and the measures ``summary.json`` reports).
"""

from __future__ import annotations

import argparse
import hashlib
import time
from typing import Any

import gymnasium as gym
import numpy as np

import blanket  # noqa: F401  (registers the env ids)
from blanket.bench.metrics import lyapunov_covariance
from blanket.bench.policies import POLICIES
from blanket.rollout import Observer, StepView, rollout
from blanket.runner import HoldRecord, summarize, with_safety

HOLD = "blanket/arm-hold-v0"
COMPARED = ("active-inference-torque", "classical-torque")


class Forcing(Observer):
    """A digest of every episode's forcing (to show the policies met the same draws) and the
    torque's fluctuation (effort)."""

    def __init__(self) -> None:
        self.digests: list[str] = []
        self.effort: list[float] = []

    def on_episode_start(self, start: Any) -> None:
        self._hash = hashlib.sha1()
        self._tau: list[np.ndarray] = []

    def on_step(self, step: StepView) -> None:
        ext = step.info["external"]
        for key in ("disturbance_force_n", "disturbance_shove_n"):
            self._hash.update(np.asarray(ext[key], dtype=float).tobytes())
        self._tau.append(np.asarray(step.action, dtype=float))

    def on_episode_end(self, result: Any) -> None:
        self.digests.append(self._hash.hexdigest()[:12])
        tau = np.asarray(self._tau)
        self.effort.append(float(np.sqrt(np.mean(np.var(tau[len(tau) // 16 :], axis=0)))))


def run(policy: Any, env: Any, episodes: int, seed: int) -> tuple[dict[str, Any], Forcing]:
    """Episodes through the runner's loop; the summary (with the hold measures) and forcing."""
    forcing = Forcing()
    results = rollout(env, policy, episodes, seed=seed, observers=[HoldRecord(), forcing])
    return summarize(results), forcing


def make(**options: Any) -> Any:
    return with_safety(gym.make(HOLD, **options))


def compare(episodes: int, seed: int) -> None:
    print(f"## agent against the classical baseline: iiwa, default forcing, {episodes} episodes")
    print(
        "| policy | within tolerance, mean | lowest episode | recovery after a shove, median "
        "| shoves recovered | tip sd x / y / z, mm | effort, N m | wall s |"
    )
    print("| --- | --- | --- | --- | --- | --- | --- | --- |")
    digests = {}
    for name in COMPARED:
        env = make()
        try:
            policy = POLICIES[name].build(env, {}, {})
            t0 = time.perf_counter()
            s, forcing = run(policy, env, episodes, seed)
            wall = time.perf_counter() - t0
        finally:
            env.close()
        digests[name] = forcing.digests
        sd = " / ".join(f"{v * 1000:.1f}" for v in s["tip_sd_m"])
        rec = s["recovery_time_s"]
        print(
            f"| {name} | {s['time_within_tolerance'] * 100:.1f} % | "
            f"{s['time_within_tolerance_min'] * 100:.1f} % | "
            f"{'-' if rec is None else f'{rec:.2f} s'} | {s['shoves_recovered']}/{s['shoves']} "
            f"| {sd} | {np.mean(forcing.effort):.2f} | {wall:.0f} |"
        )
    same = len({tuple(d) for d in digests.values()}) == 1
    print(f"\nsame forcing draws for every policy (per-episode digests equal): {same}")


def closed_loop(
    env: Any, agent_like: bool, attractor_gain_1_s: float | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(A, Q, C)`` of the linearised closed loop at the env's current (start) posture: state
    ``[q - q0, q', d, u]`` (``d`` only for the agent), tip deviation ``C x``."""
    from blanket.agent.attractor import damped_least_squares_attractor
    from blanket.agent.generative_model import AgentOptions

    u_env = env.unwrapped
    world = u_env.world
    q0 = world.joint_state()[0]
    n = q0.size
    J = world.tip_jacobian(q0)
    M = world.mass_matrix(q0)
    opts = AgentOptions.defaults  # the classical baseline has the same gains by default
    params = np.array(
        [
            attractor_gain_1_s or opts["attractor_gain_1_s"],
            opts["max_tip_speed_m_s"],
            opts["damping_m"] ** 2,
            opts["posture_gain_1_s"],
            0.0,
        ]
    )
    f, F = np.empty(n), np.empty((n, n))
    tip = world.tip_position()
    ones = np.ones(n)
    damped_least_squares_attractor(
        np.ascontiguousarray(J), tip, tip, np.zeros(3), q0, q0, ones, ones, params, f, F
    )
    kv = opts["velocity_gain_1_s"]
    td = opts["disturbance_time_constant_s"]
    tau, sd = u_env.force_correlation_s, u_env.force_sd_n
    Minv = np.linalg.inv(M)
    size = 3 * n + 3 if agent_like else 2 * n + 3
    A = np.zeros((size, size))
    iq, iv, iu = slice(0, n), slice(n, 2 * n), slice(size - 3, size)
    A[iq, iv] = np.eye(n)
    A[iv, iq] = kv * F
    A[iv, iv] = -kv * np.eye(n)
    A[iv, iu] = Minv @ J.T
    if agent_like:
        i_d = slice(2 * n, 3 * n)
        A[iv, i_d] = -Minv
        A[i_d, iu] = J.T / td
        A[i_d, i_d] = -np.eye(n) / td
    A[iu, iu] = -np.eye(3) / tau
    Q = np.zeros((size, size))
    Q[iu, iu] = np.eye(3) * 2.0 * sd**2 / tau
    C = np.zeros((3, size))
    C[:, iq] = J
    return A, Q, C


def lyapunov(episodes: int, seed: int, episode_s: float) -> None:
    print(
        f"## tip covariance: Lyapunov prediction against simulation (no shoves, {episodes} x "
        f"{episode_s:g} s)"
    )
    print(
        "| policy | tip sd x / y / z, mm, simulated | predicted | ratio sim/pred of the "
        "covariance's trace |"
    )
    print("| --- | --- | --- | --- |")
    for name in COMPARED:
        env = make(shove_rate_hz=0.0, episode_s=episode_s)
        try:
            policy = POLICIES[name].build(env, {}, {})
            predicted = []
            for k in range(episodes):
                env.reset(seed=seed + k)
                A, Q, C = closed_loop(env, agent_like=name.startswith("active"))
                predicted.append(C @ lyapunov_covariance(A, Q) @ C.T)
            s, _ = run(policy, env, episodes, seed)
        finally:
            env.close()
        P = np.mean(predicted, axis=0)
        sim = np.asarray(s["tip_covariance_m2"])
        fmt = lambda c: " / ".join(f"{v * 1000:.2f}" for v in np.sqrt(np.diag(c)))  # noqa: E731
        print(f"| {name} | {fmt(sim)} | {fmt(P)} | {np.trace(sim) / np.trace(P):.2f} |")


def precision(episodes: int, seed: int, values: list[float]) -> None:
    from blanket.agent import ArmAgent

    print(f"## goal precision: effort against spread (goal = prior, torque, {episodes} episodes)")
    print("| goal precision | within tolerance | tip sd x / y / z, mm | effort, N m |")
    print("| --- | --- | --- | --- |")
    env = make()
    try:
        for g in values:
            agent = ArmAgent.from_env(env, goal="prior", goal_precision=g)
            s, forcing = run(agent, env, episodes, seed)
            sd = " / ".join(f"{v * 1000:.1f}" for v in s["tip_sd_m"])
            print(
                f"| {g:g} | {s['time_within_tolerance'] * 100:.1f} % | {sd} | "
                f"{np.mean(forcing.effort):.2f} |"
            )
    finally:
        env.close()


def gain(episodes: int, seed: int, episode_s: float, values: list[float]) -> None:
    from blanket.agent import ArmAgent

    print(
        f"## the default agent's attractor gain: effort against spread, and the Lyapunov "
        f"prediction (no shoves, {episodes} x {episode_s:g} s)"
    )
    print(
        "| attractor gain, 1/s | within tolerance | tip sd x / y / z, mm | predicted | "
        "effort, N m |"
    )
    print("| --- | --- | --- | --- | --- |")
    env = make(shove_rate_hz=0.0, episode_s=episode_s)
    try:
        for k_goal in values:
            agent = ArmAgent.from_env(env, attractor_gain_1_s=k_goal)
            predicted = []
            for k in range(episodes):
                env.reset(seed=seed + k)
                A, Q, C = closed_loop(env, agent_like=True, attractor_gain_1_s=k_goal)
                predicted.append(C @ lyapunov_covariance(A, Q) @ C.T)
            s, forcing = run(agent, env, episodes, seed)
            fmt = lambda c: " / ".join(f"{v * 1000:.1f}" for v in np.sqrt(np.diag(c)))  # noqa: E731
            print(
                f"| {k_goal:g} | {s['time_within_tolerance'] * 100:.1f} % | "
                f"{fmt(np.asarray(s['tip_covariance_m2']))} | "
                f"{fmt(np.mean(predicted, axis=0))} | {np.mean(forcing.effort):.2f} |"
            )
    finally:
        env.close()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument(
        "--part", choices=("compare", "lyapunov", "precision", "gain", "all"), default="all"
    )
    parser.add_argument("--episodes", type=int, default=20)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--lyapunov-episodes", type=int, default=5)
    parser.add_argument("--lyapunov-episode-s", type=float, default=16.0)
    parser.add_argument("--precision-episodes", type=int, default=5)
    parser.add_argument("--precisions", default="1,10,30,100,300,1000,10000")
    parser.add_argument("--gains", default="1,2,4,8")
    args = parser.parse_args()
    if args.part in ("compare", "all"):
        compare(args.episodes, args.seed)
    if args.part in ("lyapunov", "all"):
        lyapunov(args.lyapunov_episodes, args.seed, args.lyapunov_episode_s)
    if args.part in ("precision", "all"):
        precision(
            args.precision_episodes, args.seed, [float(v) for v in args.precisions.split(",")]
        )
    if args.part in ("gain", "all"):
        gain(
            args.lyapunov_episodes,
            args.seed,
            args.lyapunov_episode_s,
            [float(v) for v in args.gains.split(",")],
        )


if __name__ == "__main__":
    main()
