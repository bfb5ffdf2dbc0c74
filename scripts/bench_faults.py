"""False alarms of the arm agent's fault tests on fault-free reaching, per channel-hour.

Runs the planar arm (``blanket/planar-2link-v0``, velocity control, its nominal noise)
episode after episode with ``fault_detection=True`` for a given number of simulated hours,
spread over worker processes, and counts flag onsets (a flag going from clear to set) per
channel and joint. Prints the count, the rate per channel-hour and the one-sided 95 % upper
Poisson bound of the rate (Garwood 1936, Biometrika 28, chi-square form), and the loop's
speed in simulated steps per wall second.

    python scripts/bench_faults.py --hours 2 --workers 2 [--goal reference]
"""

from __future__ import annotations

import argparse
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np
from scipy.stats import chi2


def _worker(args: tuple[float, int, str, float]) -> dict:
    hours, seed0, goal, episode_s = args
    import gymnasium

    import blanket  # noqa: F401  (registers the envs)
    from blanket.agent import ArmAgent

    env = gymnasium.make("blanket/planar-2link-v0", episode_s=episode_s).unwrapped
    agent = ArmAgent.from_env(env, goal=goal, fault_detection=True)
    steps_total = int(round(hours * 3600.0 * env.description.control_hz))
    onsets: dict[str, np.ndarray] = {}
    flagged_steps: dict[str, np.ndarray] = {}
    steps, seed, failures = 0, seed0, 0
    t0 = time.perf_counter()
    while steps < steps_total:
        obs, info = env.reset(seed=seed)
        agent.reset()
        seed += 1
        before = None
        success = False
        while True:
            obs, _r, terminated, truncated, info = env.step(agent.act(obs))
            steps += 1
            success = success or bool(info["success"])
            fault = agent.diagnostics()["fault"]
            if before is None:
                before = {k: np.zeros_like(v) for k, v in fault.items()}
            for k, v in fault.items():
                onsets.setdefault(k, np.zeros(v.shape, dtype=int))
                flagged_steps.setdefault(k, np.zeros(v.shape, dtype=int))
                onsets[k] += v & ~before[k]
                flagged_steps[k] += v
                before[k] = v.copy()
            if terminated or truncated:
                break
        failures += not success
    env.close()
    return {
        "steps": steps,
        "wall_s": time.perf_counter() - t0,
        "onsets": onsets,
        "flagged_steps": flagged_steps,
        "episodes": seed - seed0,
        "failures": failures,
        "control_hz": float(env.description.control_hz),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--hours", type=float, default=1.0, help="simulated hours in total")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--goal", choices=("prior", "reference"), default="prior")
    parser.add_argument("--episode-s", type=float, default=4.0)
    args = parser.parse_args()
    if args.hours <= 0 or args.workers < 1:
        raise SystemExit("--hours must be > 0 and --workers >= 1")
    share = args.hours / args.workers
    jobs = [(share, 1_000_000 * (i + 1), args.goal, args.episode_s) for i in range(args.workers)]
    t0 = time.perf_counter()
    with ProcessPoolExecutor(args.workers) as pool:
        results = list(pool.map(_worker, jobs))
    wall = time.perf_counter() - t0
    steps = sum(r["steps"] for r in results)
    hz = results[0]["control_hz"]
    hours = steps / hz / 3600.0
    episodes = sum(r["episodes"] for r in results)
    failures = sum(r["failures"] for r in results)
    print(
        f"goal={args.goal}: {hours:.2f} simulated h, {episodes} episodes "
        f"({failures} without success), {steps / wall:.0f} steps/s over {args.workers} workers"
    )
    print(f"{'channel':<16}{'index':>6}{'onsets':>8}{'per h':>9}{'95% upper per h':>17}")
    worst = 0.0
    for name in results[0]["onsets"]:
        count = sum(r["onsets"][name] for r in results)
        for i, c in enumerate(count):
            upper = chi2.ppf(0.95, 2 * (int(c) + 1)) / 2.0 / hours
            worst = max(worst, c / hours)
            print(f"{name:<16}{i:>6}{int(c):>8}{c / hours:>9.3f}{upper:>17.3f}")
    print(f"worst channel: {worst:.3f} false alarms per channel-hour (target < 1)")


if __name__ == "__main__":
    main()
