"""Agent step cost against pybullet's step + sensor read, measured in the same run.

For each robot, control mode and embedding order, run a few reaching episodes and time, step
by step, (a) the agent's ``act`` and (b) the bare env's ``step`` (command, pybullet
``stepSimulation`` and the encoder and camera reads, without the agent). Prints medians and
their ratio; a ratio below 1 means the agent is cheaper than the simulation it controls.

Then the cost of a user term: the whole loop (env step + agent step, iiwa, velocity control,
order 2) with one extra :class:`~blanket.model.ModelTerm` that contributes zero, against the
same loop without it, episodes interleaved in one run; the ratio of median loop times is
printed (acceptance: at most 1.5). The same loop on the numpy reference backend is printed
beside it for scale (where user terms ran before they joined the compiled path).

    python scripts/bench_step.py                       # iiwa, panda, xarm6; both modes; orders 1-3
    python scripts/bench_step.py --robots iiwa --orders 2 --episodes 5
    python scripts/bench_step.py --robots none --term-episodes 6   # only the user-term loop
"""

from __future__ import annotations

import argparse
import time

import gymnasium
import numpy as np

import blanket  # noqa: F401  (registers the envs)
from blanket.agent import ArmAgent
from blanket.model import Term


class ZeroTerm:
    """A user term that contributes nothing: zero error, zero Jacobian, precision 1."""

    name = "zero"
    size = 1

    def evaluate(self, obs, belief, body):
        return Term(np.zeros(1), np.zeros((1, belief.size)), np.ones(1))


def measure(robot: str, control: str, order: int, episodes: int, seed: int) -> dict:
    env = gymnasium.make("blanket/arm-reach-v0", robot=robot, control=control)
    agent = ArmAgent.from_env(env, order=order)
    agent_us: list[float] = []
    sim_us: list[float] = []
    reached = 0
    # the bare env's step (simulation, sensors, task; no gymnasium wrappers), timed here: the
    # env reports no wall-clock time
    bare_step = env.unwrapped.step
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
                t0 = time.perf_counter_ns()
                obs, _, term, trunc, info = bare_step(action)
                sim_us.append((time.perf_counter_ns() - t0) / 1e3)
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


def measure_user_term(episodes: int, seed: int) -> dict:
    """Median loop time per step (env + agent) without and with a zero user term."""
    env = gymnasium.make("blanket/arm-reach-v0", robot="iiwa", control="velocity")
    agents = {
        "plain": ArmAgent.from_env(env, order=2),
        "zero term": ArmAgent.from_env(env, extra_terms=[ZeroTerm()], order=2),
        "zero term, numpy": ArmAgent.from_env(env, extra_terms=[ZeroTerm()], order=2),
    }
    agents["zero term, numpy"].backend = "numpy"
    loop_us: dict[str, list[float]] = {k: [] for k in agents}
    agent_us: dict[str, list[float]] = {k: [] for k in agents}
    try:
        for ep in range(episodes):
            for name, agent in agents.items():  # interleaved: the machine's drift hits all
                obs, _ = env.reset(seed=seed + ep)
                agent.reset()
                agent.act(obs)
                done = False
                while not done:
                    t0 = time.perf_counter_ns()
                    action = agent.act(obs)
                    t1 = time.perf_counter_ns()
                    obs, _, term, trunc, _ = env.step(action)
                    t2 = time.perf_counter_ns()
                    agent_us[name].append((t1 - t0) / 1e3)
                    loop_us[name].append((t2 - t0) / 1e3)
                    done = term or trunc
    finally:
        env.close()
    return {k: (float(np.median(loop_us[k])), float(np.median(agent_us[k]))) for k in agents}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--robots", default="iiwa,panda,xarm6")
    parser.add_argument("--controls", default="velocity,torque")
    parser.add_argument("--orders", default="1,2,3")
    parser.add_argument("--episodes", type=int, default=3)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--term-episodes", type=int, default=4)
    args = parser.parse_args()
    rows = []
    for robot in [r for r in args.robots.split(",") if r != "none"]:
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
    if rows:
        worst = max(rows, key=lambda r: r["ratio"])
        print(
            f"\nworst ratio {worst['ratio']:.2f} ({worst['robot']}, {worst['control']}, "
            f"order {worst['order']}); median ratio {np.median([r['ratio'] for r in rows]):.2f}"
        )
    if args.term_episodes > 0:
        t = measure_user_term(args.term_episodes, args.seed)
        base_loop, base_agent = t["plain"]
        print("\nuser term (iiwa, velocity, order 2; loop = env step + agent step, medians):")
        for name, (loop, agent) in t.items():
            print(
                f"  {name:17s} loop {loop:6.1f} us  agent {agent:6.1f} us  "
                f"loop ratio {loop / base_loop:.2f}  agent ratio {agent / base_agent:.2f}"
            )
        print(f"zero user term: loop ratio {t['zero term'][0] / base_loop:.2f} (acceptance <= 1.5)")


if __name__ == "__main__":
    main()
