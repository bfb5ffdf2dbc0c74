"""Overhead of trajectory logging on the planar bench-arm loop.

Runs ``blanket/planar-2link-v0`` for N control steps with a proportional task-space
controller (joint velocity = gain * J(q)^T (target - tip(q)), analytic planar kinematics,
clipped to the action bounds), once without logging and once with
``RunWriter.record`` on every step plus ``end_episode`` at every episode end (the Parquet
writes are inside the timed region). The two are alternated over several rounds and the
fastest round of each is compared, so other load on the machine affects both alike.

Acceptance: logging adds at most 10 % to the loop's time.

Usage::

    python scripts/bench_logging.py [--steps 4800] [--rounds 5]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import gymnasium as gym
import numpy as np

import blanket  # noqa: F401  (registers the env ids)
from blanket.logs import RunWriter, read_run

L1_M, L2_M = 0.4, 0.3  # link lengths of planar_2link.urdf
GAIN = 6.0


def policy(obs: dict, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Jacobian-transpose step toward the target, from the sensed joint angles only."""
    q1, q2 = obs["joint_angle_rad"]
    s1, c1 = np.sin(q1), np.cos(q1)
    s12, c12 = np.sin(q1 + q2), np.cos(q1 + q2)
    tip = np.array([L1_M * c1 + L2_M * c12, L1_M * s1 + L2_M * s12])
    jacobian = np.array(
        [[-L1_M * s1 - L2_M * s12, -L2_M * s12], [L1_M * c1 + L2_M * c12, L2_M * c12]]
    )
    error = obs["target_position_m"][:2] - tip
    return np.clip(GAIN * jacobian.T @ error, low, high)


def run_loop(env: gym.Env, steps: int, writer: RunWriter | None, seed: int) -> tuple[float, float]:
    """Seconds for ``steps`` control steps, and the part spent in ``end_episode``."""
    writing = 0.0
    low, high = env.action_space.low, env.action_space.high
    obs, info = env.reset(seed=seed)
    episode = 0
    step = 0
    if writer is not None:
        writer.begin_episode(episode, max_steps=1024)
    start = time.perf_counter()
    for _ in range(steps):
        action = policy(obs, low, high)
        if writer is not None:
            external = {
                **info["external"],
                "distance_m": info["distance_m"],
                "success": info["success"],
            }
            writer.record(
                step,
                info["time_s"],
                external=external,
                sensory=obs,
                active={"joint_velocity_rad_s": action},
            )
        obs, _reward, terminated, truncated, info = env.step(action)
        step += 1
        if terminated or truncated:
            if writer is not None:
                tick = time.perf_counter()
                writer.end_episode({"seed": seed})
                writing += time.perf_counter() - tick
            episode += 1
            step = 0
            obs, info = env.reset()
            if writer is not None:
                writer.begin_episode(episode, max_steps=1024)
    if writer is not None:
        tick = time.perf_counter()
        writer.end_episode({"seed": seed})
        writing += time.perf_counter() - tick
    return time.perf_counter() - start, writing


def runner_loop(rounds: int, episodes: int) -> None:
    """The loop ``blanket demo`` runs (iiwa, ArmAgent, safety wrapper), with and without
    recording all four groups; rounds alternate and the fastest of each is kept."""
    from blanket.runner import _run_metadata, run_episodes, with_safety
    from blanket.scenario import Scenario, make_env

    scenario = Scenario(
        env="blanket/arm-reach-v0", env_options={"robot": "iiwa"}, name="bench-logging-runner"
    )
    env = with_safety(make_env(scenario.env, scenario.env_options))
    from blanket.agent import ArmAgent

    agent = ArmAgent.from_env(env)
    meta = _run_metadata(scenario, env, 0)
    plain, logged = [], []
    with tempfile.TemporaryDirectory() as tmp:
        with RunWriter(Path(tmp) / "warm-up", meta) as writer:
            run_episodes(env, agent, 1, 0, writer=writer, progress=False)
        for r in range(rounds):
            t0 = time.perf_counter()
            run_episodes(env, agent, episodes, r, progress=False)
            plain.append(time.perf_counter() - t0)
            with RunWriter(Path(tmp) / f"run-{r}", meta) as writer:
                t0 = time.perf_counter()
                run_episodes(env, agent, episodes, r, writer=writer, progress=False)
                logged.append(time.perf_counter() - t0)
        columns = read_run(Path(tmp) / "run-0").shape[1]
    env.close()
    t_plain, t_logged = min(plain), min(logged)
    steps = episodes * 960
    print(f"runner loop (iiwa, agent, safety): {steps} steps per round, {rounds} rounds")
    print(f"loop without logging      {t_plain:.3f} s  ({t_plain / steps * 1e6:.1f} us/step)")
    print(f"loop with logging         {t_logged:.3f} s  ({t_logged / steps * 1e6:.1f} us/step)")
    print(f"columns logged            {columns}")
    overhead = t_logged / t_plain - 1.0
    print(f"overhead ratio            {overhead * 100:.1f} %  (acceptance: <= 10 %)")
    print("PASS" if overhead <= 0.10 else "FAIL")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=4800)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument(
        "--loop",
        choices=("planar", "runner", "both"),
        default="both",
        help="planar: a bare env loop; runner: the loop blanket demo runs",
    )
    parser.add_argument("--episodes", type=int, default=3, help="episodes per runner round")
    args = parser.parse_args()
    if args.loop in ("runner", "both"):
        runner_loop(args.rounds, args.episodes)
        if args.loop == "runner":
            return
        print()
    env = gym.make("blanket/planar-2link-v0")
    metadata = {
        "scenario": "bench-logging",
        "seed": 0,
        "robot": "planar_2link",
        "joint_names": list(env.unwrapped.description.joint_names),
    }
    plain: list[float] = []
    logged: list[tuple[float, float]] = []
    with tempfile.TemporaryDirectory() as tmp:
        # Warm-up of both paths (the first Parquet write initialises pyarrow's writer).
        run_loop(env, 1000, None, seed=0)
        with RunWriter(Path(tmp) / "warm-up", metadata) as writer:
            run_loop(env, 1000, writer, seed=0)
        for r in range(args.rounds):
            plain.append(run_loop(env, args.steps, None, seed=r)[0])
            with RunWriter(Path(tmp) / f"run-{r}", metadata) as writer:
                logged.append(run_loop(env, args.steps, writer, seed=r))
        frame = read_run(Path(tmp) / "run-0")
        n_files = len(list((Path(tmp) / "run-0" / "episodes").glob("*.parquet")))
    env.close()
    t_plain = min(plain)
    t_logged, t_files = min(logged)
    overhead = t_logged / t_plain - 1.0
    per_step_us = (t_logged - t_plain) / args.steps * 1e6
    print(f"steps per round           {args.steps}  ({args.rounds} rounds, fastest kept)")
    print(f"loop without logging      {t_plain:.3f} s  ({t_plain / args.steps * 1e6:.1f} us/step)")
    print(
        f"loop with logging         {t_logged:.3f} s  ({t_logged / args.steps * 1e6:.1f} us/step)"
    )
    print(
        f"logging cost              {per_step_us:.1f} us/step "
        f"(of which file writes {t_files / args.steps * 1e6:.1f} us/step)"
    )
    print(f"overhead ratio            {overhead * 100:.1f} %  (acceptance: <= 10 %)")
    print(f"log check                 {len(frame)} rows, {frame.shape[1]} columns, {n_files} files")
    print("PASS" if overhead <= 0.10 else "FAIL")


if __name__ == "__main__":
    main()
