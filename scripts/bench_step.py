"""Agent step cost against pybullet's step + sensor read, measured in the same run.

For each robot, control mode and embedding order, run a few reaching episodes and time, step
by step, (a) the agent's ``act`` and (b) the env's own ``sim_step_us`` (command, pybullet
``stepSimulation`` and the encoder and camera reads, without the agent). Prints medians and
their ratio; a ratio below 1 means the agent is cheaper than the simulation it controls.

    python scripts/bench_step.py                       # iiwa, panda, xarm6; both modes; orders 1-3
    python scripts/bench_step.py --robots iiwa --orders 2 --episodes 5
"""

from __future__ import annotations

import argparse
import time

import gymnasium
import numpy as np

import blanket  # noqa: F401  (registers the envs)
from blanket.agent import ArmAgent


def measure(robot: str, control: str, order: int, episodes: int, seed: int) -> dict:
    env = gymnasium.make("blanket/arm-reach-v0", robot=robot, control=control)
    agent = ArmAgent.from_env(env, order=order)
    agent_us: list[float] = []
    sim_us: list[float] = []
    reached = 0
    try:
        for ep in range(episodes):
            obs, _ = env.reset(seed=seed + ep)
            agent.reset()
            agent.act(obs)  # the first call initialises the belief (and compiles once)
            done = False
            while not done:
                t0 = time.perf_counter_ns()
                action = agent.act(obs)
                agent_us.append((time.perf_counter_ns() - t0) / 1e3)
                obs, _, term, trunc, info = env.step(action)
                sim_us.append(float(info["sim_step_us"]))
                done = term or trunc
            reached += bool(info["success"])
    finally:
        env.close()
    a, s = float(np.median(agent_us)), float(np.median(sim_us))
    return {
        "robot": robot,
        "control": control,
        "order": order,
        "agent_us": a,
        "agent_p90_us": float(np.percentile(agent_us, 90)),
        "sim_us": s,
        "ratio": a / s,
        "reached": f"{reached}/{episodes}",
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--robots", default="iiwa,panda,xarm6")
    parser.add_argument("--controls", default="velocity,torque")
    parser.add_argument("--orders", default="1,2,3")
    parser.add_argument("--episodes", type=int, default=3)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    rows = []
    for robot in args.robots.split(","):
        for control in args.controls.split(","):
            for order in (int(o) for o in args.orders.split(",")):
                rows.append(measure(robot, control, order, args.episodes, args.seed))
                r = rows[-1]
                print(
                    f"{r['robot']:6s} {r['control']:8s} order {r['order']}  "
                    f"agent {r['agent_us']:6.1f} us (p90 {r['agent_p90_us']:6.1f})  "
                    f"sim+sensors {r['sim_us']:6.1f} us  ratio {r['ratio']:.2f}  "
                    f"reached {r['reached']}",
                    flush=True,
                )
    worst = max(rows, key=lambda r: r["ratio"])
    print(
        f"\nworst ratio {worst['ratio']:.2f} ({worst['robot']}, {worst['control']}, "
        f"order {worst['order']}); median ratio {np.median([r['ratio'] for r in rows]):.2f}"
    )


if __name__ == "__main__":
    main()
