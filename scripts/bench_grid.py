"""``blanket bench``'s grid in this process against the engines, in one run: wall time, speed-up
and whether results.json is the same (fields measured on the clock left out).

    python scripts/bench_grid.py                      # in-process, then local with 2 workers
    python scripts/bench_grid.py --workers 2 --ray    # and a local Ray instance
    python scripts/bench_grid.py --episodes 2 --conditions nominal,random-pushes
"""

from __future__ import annotations

import argparse
import json
import os
import tempfile
import time
from pathlib import Path

from blanket.bench.suite import BenchSettings, run_benchmark, without_timing


def reproducible(path: Path) -> str:
    """results.json without the fields measured on the clock."""
    return json.dumps(without_timing(json.loads(path.read_text())), sort_keys=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--policies", default="active-inference,active-inference-torque,classical,classical-torque"
    )
    parser.add_argument("--conditions", default="nominal,payload-1.5kg,random-pushes")
    parser.add_argument("--episodes", type=int, default=4)
    parser.add_argument("--episode-s", type=float, default=2.0)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--ray", action="store_true", help="also a local Ray instance")
    args = parser.parse_args()
    settings = BenchSettings.from_cli(
        policies=args.policies.split(","),
        conditions=args.conditions.split(","),
        episodes=args.episodes,
        episode_s=args.episode_s,
    )
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    cells = len(settings.policies) * len(settings.conditions)
    print(f"{cells} cells x {args.episodes} episodes of {args.episode_s:g} s; {cores} cores")
    runs = [("in-process", "local", 1)]
    runs.append((f"local, {args.workers} workers", "local", args.workers))
    if args.ray:
        runs.append((f"ray, {args.workers} workers", "ray", args.workers))
    with tempfile.TemporaryDirectory() as tmp:
        base_wall = base_text = None
        for name, engine, workers in runs:
            out = Path(tmp) / name.replace(" ", "_").replace(",", "")
            t0 = time.perf_counter()
            run_benchmark(settings, out, progress=False, engine=engine, workers=workers)
            wall = time.perf_counter() - t0
            text = reproducible(out / "results.json")
            if base_wall is None:
                base_wall, base_text = wall, text
            same = "same results" if text == base_text else "DIFFERENT results"
            print(f"  {name:<22} {wall:7.1f} s  speed-up {base_wall / wall:5.2f}  {same}")


if __name__ == "__main__":
    main()
