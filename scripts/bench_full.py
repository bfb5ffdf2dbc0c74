"""The full reaching benchmark in one command (hours on 2 cores; not part of CI).

    python scripts/bench_full.py --out /work/bench-full

1. Trains the RL baselines (SAC and PPO, 200k policy decisions each = 1.6M control steps at
   the default action repeat of 8) with ``blanket train-rl`` into OUT/models, unless a
   finished model is already there (``--retrain`` forces it). Each run is niced and uses one
   torch thread; its log goes to OUT/train-<algo>.log and its learning curve to
   OUT/models/<algo>-progress.jsonl.
2. Runs ``blanket bench`` with every built-in policy and condition, 20 episodes each,
   into OUT/results (results.json, report.md, charts).

Needs the rl extra: ``pip install torch==2.13.0`` (the CPU wheel) first, then
``pip install stable-baselines3``.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path


def _finished(models: Path, algo: str, steps: int) -> bool:
    meta = models / f"{algo}.json"
    if not meta.is_file():
        return False
    data = json.loads(meta.read_text())
    return bool(data.get("finished")) and int(data.get("policy_steps", 0)) >= steps


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", default="bench-full", help="output folder (default ./bench-full)")
    p.add_argument("--steps", type=int, default=200_000, help="RL policy steps per algorithm")
    p.add_argument("--episodes", type=int, default=20)
    p.add_argument("--robot", default="iiwa")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--algos", default="sac,ppo")
    p.add_argument("--retrain", action="store_true")
    p.add_argument("--parallel", action="store_true", help="train the algorithms side by side")
    args = p.parse_args()

    out = Path(args.out).resolve()
    models = out / "models"
    models.mkdir(parents=True, exist_ok=True)
    env = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1", MPLBACKEND="Agg")
    start = time.perf_counter()
    jobs = []
    for algo in [a for a in args.algos.split(",") if a]:
        if not args.retrain and _finished(models, algo, args.steps):
            print(f"{algo}: finished model found, not retraining")
            continue
        eval_every = 10_000 if algo == "sac" else 20_480
        cmd = [
            "nice",
            "-n",
            "10",
            sys.executable,
            "-m",
            "blanket.cli",
            "train-rl",
            "--algo",
            algo,
            "--steps",
            str(args.steps),
            "--out",
            str(models),
            "--seed",
            str(args.seed),
            "--robot",
            args.robot,
            "--eval-every",
            str(eval_every),
        ]
        log = (out / f"train-{algo}.log").open("w")
        print("running:", " ".join(cmd), flush=True)
        proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, env=env)
        if args.parallel:
            jobs.append(proc)
        elif proc.wait() != 0:
            print(f"{algo} training failed; see {log.name}")
            return 1
    for proc in jobs:
        if proc.wait() != 0:
            print("RL training failed; see the train-*.log files")
            return 1
    cmd = [
        sys.executable,
        "-m",
        "blanket.cli",
        "bench",
        "--episodes",
        str(args.episodes),
        "--seed",
        str(args.seed),
        "--robot",
        args.robot,
        "--rl-models",
        str(models),
        "--out",
        str(out / "results"),
        "--overwrite",
    ]
    print("running:", " ".join(cmd), flush=True)
    code = subprocess.call(cmd, env=env)
    print(f"total wall time {time.perf_counter() - start:.0f} s")
    return code


if __name__ == "__main__":
    sys.exit(main())
