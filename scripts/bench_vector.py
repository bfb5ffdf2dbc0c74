"""Env steps per second through gymnasium's vector envs, against one plain env, in one run.

``gymnasium.make_vec`` over ``blanket/arm-reach-v0`` (iiwa, velocity control, the safety
wrapper on every sub-env, a fixed zero command) with 1, 2 and 4 sub-envs, ``sync`` (one
process) and ``async`` (one process per sub-env, forkserver). Prints env steps per second (all
sub-envs together, wall clock: the point is parallel work) and the ratio to a single plain env
stepped in this process, with the machine's core count beside it: async can gain at most about
the number of free cores.

    python scripts/bench_vector.py
    python scripts/bench_vector.py --envs 1,2 --seconds 3
"""

from __future__ import annotations

import argparse
import os
import time

import gymnasium as gym
import numpy as np

import blanket  # noqa: F401  (registers the envs)
from blanket.wrappers import SafetyLimits

ENV_ID = "blanket/arm-reach-v0"


def rate(step, n_envs: int, seconds: float) -> float:
    """Env steps per second of ``step()`` (each call steps ``n_envs`` envs)."""
    for _ in range(20):  # warm-up
        step()
    calls = 0
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < seconds:
        for _ in range(20):
            step()
        calls += 20
    return calls * n_envs / (time.perf_counter() - t0)


def single(seconds: float) -> float:
    env = SafetyLimits(gym.make(ENV_ID, robot="iiwa"))
    env.reset(seed=0)
    zero = np.zeros(env.action_space.shape)

    def step() -> None:
        if env.step(zero)[3]:
            env.reset()

    try:
        return rate(step, 1, seconds)
    finally:
        env.close()


def vector(mode: str, n_envs: int, seconds: float) -> float:
    kwargs = {"vector_kwargs": {"context": "forkserver"}} if mode == "async" else {}
    vec = gym.make_vec(
        ENV_ID, num_envs=n_envs, vectorization_mode=mode, wrappers=[SafetyLimits], **kwargs
    )
    vec.reset(seed=0)
    zero = np.zeros(vec.action_space.shape)
    try:
        return rate(lambda: vec.step(zero), n_envs, seconds)
    finally:
        vec.close()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--envs", default="1,2,4")
    parser.add_argument("--seconds", type=float, default=5.0, help="per measurement")
    args = parser.parse_args()
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    base = single(args.seconds)
    print(f"{cores} cores; one plain env (with safety): {base:8.0f} steps/s")
    print(f"{'mode':6s} {'envs':>4s} {'steps/s':>9s} {'x plain':>8s}")
    for mode in ("sync", "async"):
        for n in (int(k) for k in args.envs.split(",")):
            r = vector(mode, n, args.seconds)
            print(f"{mode:6s} {n:4d} {r:9.0f} {r / base:8.2f}", flush=True)


if __name__ == "__main__":
    main()
