"""Mobile-base acceptance bench for ``blanket/base-goto-v0`` (rover and husky).

Prints, for each base:
- the skid-steer calibration (spin in place: measured yaw rate against r (w_R - w_L) / track);
- docking over N seeded starts: success rate (within 10 cm and 10 degrees, held 0.25 s),
  no-contact rate, median time to success;
- a 60 s patrol (goals cycling round the aisles): position RMSE of the agent's belief and of
  odometry-only dead reckoning (from the true start pose, same run), and their ratio;
- with ``--dark-aisle``: on ``layout="dark-aisle"`` with an uncertain start, the ``direct`` and
  ``efe`` planners over the same seeded starts: docked share, no-contact share, median final
  distance to the dock, and which aisle the EFE planner chose.

Usage: ``python scripts/bench_base.py [--starts 50] [--robots rover husky] [--skip-docking]
[--dark-aisle 20] [--start-sd 0.15]``.
"""

from __future__ import annotations

import argparse
import time

import gymnasium as gym
import numpy as np

import blanket  # noqa: F401  (registers the env ids)
from blanket.agent.mobile_base import BaseAgent, run_base_episode
from blanket.rollout import Observer, rollout
from blanket.sensors.wheel_odometry import dead_reckoning
from blanket_envs.base_goto import calibrate_effective_track

PATROL_GOALS = [
    (4.3, 1.3, 0.0),
    (4.3, -1.3, -np.pi / 2),
    (-4.3, -1.3, np.pi),
    (-4.4, 1.3, np.pi),
]


def docking(
    robot: str, starts: int, env_kwargs: dict | None = None, **agent_options
) -> dict[str, float]:
    """Success and contact rates over seeded starts (seeds 0 .. starts-1)."""
    env = gym.make("blanket/base-goto-v0", robot=robot, **(env_kwargs or {}))
    agent = BaseAgent.from_env(env, **agent_options)
    results, aisles = [], []
    for s in range(starts):
        results.append(run_base_episode(env, agent, seed=s))
        if agent.routes:  # the EFE planner's choice: the aisle its route runs along
            mid = agent.routes[agent.route_index].means
            mid = mid[np.abs(mid[:, 0]) < 2.5]
            aisles.append("north" if len(mid) and mid[:, 1].mean() > 0 else "south")
    env.close()
    times = [r["time_to_success_s"] for r in results if r["success"]]
    return {
        "success_rate": float(np.mean([r["success"] for r in results])),
        "no_contact_rate": float(np.mean([not r["contact"] for r in results])),
        "median_time_s": float(np.median(times)) if times else float("nan"),
        "median_error_m": float(np.median([r["final_error_m"] for r in results])),
        "contact_seeds": [s for s, r in enumerate(results) if r["contact"]],
        "failed_seeds": [s for s, r in enumerate(results) if not r["success"]],
        "aisles": aisles,
    }


class Patrol:
    """The base agent as a patrol policy: its goal moves on to the next post once it believes
    it has arrived (aligning within 10 cm of the goal)."""

    def __init__(self, agent: BaseAgent) -> None:
        self.agent = agent
        self.goal_k = 0

    def reset(self) -> None:
        self.agent.reset()
        self.goal_k = 0
        self.agent.set_goal(PATROL_GOALS[0])

    def act(self, obs: dict) -> np.ndarray:
        action = self.agent.act(obs)
        goal = PATROL_GOALS[self.goal_k % len(PATROL_GOALS)]
        if self.agent.stage == "align" and np.hypot(*(self.agent.mu[0, :2] - goal[:2])) < 0.1:
            self.goal_k += 1
            self.agent.set_goal(PATROL_GOALS[self.goal_k % len(PATROL_GOALS)])
        return action


class PatrolTrace(Observer):
    """Wheel speeds, gyro, true pose and the agent's belief, step by step."""

    def __init__(self, agent: BaseAgent, use_gyro: bool) -> None:
        self.agent = agent
        self.use_gyro = use_gyro
        self.wheels: list[np.ndarray] = []
        self.gyro: list[float] = []
        self.truth: list[np.ndarray] = []
        self.belief: list[np.ndarray] = []
        self.localised: list[bool] = []

    def on_episode_start(self, start) -> None:
        self.start = start.info["external"]["base_pose"].copy()

    def on_step(self, step) -> None:
        self.wheels.append(np.asarray(step.next_obs["wheel_speed_rad_s"], dtype=float))
        if self.use_gyro:
            self.gyro.append(float(step.next_obs["yaw_rate_rad_s"][0]))
        self.truth.append(step.info["external"]["base_pose"].copy())
        self.belief.append(self.agent.mu[0].copy())
        self.localised.append(self.agent.localised)


def patrol_rmse(robot: str, seed: int = 0, duration_s: float = 60.0) -> dict[str, float]:
    """Belief and dead-reckoning position RMSE over a patrol of ``duration_s`` seconds."""
    env = gym.make(
        "blanket/base-goto-v0", robot=robot, episode_s=duration_s, terminate_on_success=False
    )
    desc = env.unwrapped.description
    agent = BaseAgent.from_env(env)
    patrol = Patrol(agent)
    trace = PatrolTrace(agent, desc.use_gyro)
    rollout(env, patrol, seeds=[seed], observers=[trace])
    start, wheels, gyro, localised = trace.start, trace.wheels, trace.gyro, trace.localised
    truth, belief, goal_k = trace.truth, trace.belief, patrol.goal_k
    env.close()
    truth = np.array(truth)
    belief = np.array(belief)
    track = dead_reckoning(
        start,
        np.array(wheels),
        desc.control_dt,
        desc.wheel_radius_m,
        desc.effective_track_m,
        yaw_rate_rad_s=np.array(gyro) if gyro else None,
    )[1:]
    mask = np.array(localised)
    # the belief of step k is formed from the observation of step k-1: compare with truth[k-1]
    err_b = np.hypot(*(belief[1:][mask[1:]] - truth[:-1][mask[1:]])[:, :2].T)
    err_d = np.hypot(*(track[mask] - truth[mask])[:, :2].T)
    rmse_b = float(np.sqrt(np.mean(err_b**2)))
    rmse_d = float(np.sqrt(np.mean(err_d**2)))
    return {
        "belief_rmse_m": rmse_b,
        "dead_reckoning_rmse_m": rmse_d,
        "ratio": rmse_b / rmse_d,
        "goals_reached": goal_k,
        "path_m": float(np.sum(np.hypot(*np.diff(truth[:, :2], axis=0).T))),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--starts", type=int, default=50)
    parser.add_argument("--robots", nargs="+", default=["rover", "husky"])
    parser.add_argument("--skip-docking", action="store_true", help="only the dark-aisle part")
    parser.add_argument("--dark-aisle", type=int, default=0, help="starts on dark-aisle (0: off)")
    parser.add_argument("--start-sd", type=float, default=0.15, help="dark-aisle start sd")
    args = parser.parse_args()
    for robot in args.robots if args.dark_aisle else []:
        sd = args.start_sd
        env_kwargs = {"layout": "dark-aisle", "start_pose_sd": [sd, sd, sd]}
        print(f"== {robot} dark-aisle, start sd {sd} (m, m, rad), {args.dark_aisle} starts")
        for planner in ("direct", "efe"):
            r = docking(robot, args.dark_aisle, env_kwargs, planner=planner)
            chosen = (
                f"; aisles {r['aisles'].count('north')} north / {r['aisles'].count('south')} south"
                if r["aisles"]
                else ""
            )
            print(
                f"  {planner:6s}: docked {r['success_rate']:.0%}, no contact "
                f"{r['no_contact_rate']:.0%}, median final distance {100 * r['median_error_m']:.1f}"
                f" cm, median time {r['median_time_s']:.1f} s{chosen}"
            )
    for robot in [] if args.skip_docking else args.robots:
        print(f"== {robot}")
        cal = [calibrate_effective_track(robot, w) for w in (1.0, 2.0, 3.0, 4.0)]
        factors = [c["factor"] for c in cal]
        print(
            "  spin-in-place calibration: effective-track factor "
            + ", ".join(f"{f:.2f}" for f in factors)
            + f" at 1/2/3/4 rad/s (mean {np.mean(factors):.2f}); ICR offset "
            f"{np.mean([c['icr_offset_m'] for c in cal]):+.3f} m"
        )
        t0 = time.perf_counter()
        dock = docking(robot, args.starts)
        print(
            f"  docking over {args.starts} starts: success {dock['success_rate']:.0%}, "
            f"no contact {dock['no_contact_rate']:.0%}, median time {dock['median_time_s']:.1f} s "
            f"(failed seeds {dock['failed_seeds']}, contact seeds {dock['contact_seeds']}; "
            f"{time.perf_counter() - t0:.0f} s wall)"
        )
        pat = patrol_rmse(robot)
        print(
            f"  60 s patrol ({pat['path_m']:.1f} m, {pat['goals_reached']} goals): belief RMSE "
            f"{pat['belief_rmse_m']:.3f} m, dead reckoning RMSE "
            f"{pat['dead_reckoning_rmse_m']:.3f} m, "
            f"ratio {pat['ratio']:.3f} (acceptance <= 0.333)"
        )


if __name__ == "__main__":
    main()
