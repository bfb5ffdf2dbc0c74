"""The full reaching benchmark table (every built-in policy x every condition) in one command.

    python scripts/bench_full.py --out /work/bench-full --episodes 20
    python scripts/bench_full.py --out /work/bench-full --episodes 20 --train-hours 1.0

Runs ``blanket bench`` with its default grid: every built-in policy (the active-inference
variants, the classical controllers, and the goal-conditioned RL baselines whose weights exist:
``sac-her`` from ``models/``, ``ppo-vec`` from ``models/`` or ``--rl-models``) on every named
condition, into OUT/results (results.json, report.md with the tables and the training cost of
every row, and the charts, among them rl_learning_curves.png with the agent as a flat line).
``--resume`` continues an interrupted run cell by cell.

``--train-hours H`` first trains the RL baselines with ``scripts/train_baselines.py`` (SAC +
HER seeds 0, 1, 2 in turn, then PPO on 4 vector envs; each run niced and bounded by H hours,
resuming what exists in OUT/rl-train) and ships the best SAC + HER seed into ``models/`` (PPO
into OUT/rl-models, passed to the bench as ``--rl-models``). That takes hours on 2 cores; the
table alone takes about a minute per policy-condition cell at 20 episodes.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _call(cmd: list[str], env: dict[str, str]) -> int:
    print("running:", " ".join(cmd), flush=True)
    return subprocess.call(cmd, env=env)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", default="bench-full", help="output folder (default ./bench-full)")
    p.add_argument("--episodes", type=int, default=20, help="episodes per cell (default 20)")
    p.add_argument("--seed", type=int, default=0, help="first bench seed (default 0)")
    p.add_argument("--rl-models", metavar="DIR", help="extra RL weights (ppo-vec, sac/ppo zips)")
    p.add_argument("--workers", type=int, default=1, help="cells in parallel (default 1)")
    p.add_argument("--resume", action="store_true", help="continue OUT/results cell by cell")
    p.add_argument("--train-hours", type=float, help="train the RL baselines first (hours/run)")
    args = p.parse_args()

    out = Path(args.out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    env = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1", MPLBACKEND="Agg")
    start = time.perf_counter()
    rl_models = args.rl_models
    if args.train_hours:
        train = [sys.executable, str(ROOT / "scripts" / "train_baselines.py")]
        hours = ["--out", str(out / "rl-train"), "--hours", str(args.train_hours)]
        sac = [*train, *hours, "--algo", "sac-her", "--ship", str(ROOT / "models")]
        rl_models = rl_models or str(out / "rl-models")
        ppo = [*train, *hours, "--algo", "ppo-vec", "--seeds", "0", "--ship", rl_models]
        for cmd in (sac, ppo):
            if _call(cmd, env) != 0:
                return 1
    bench = [
        sys.executable,
        "-m",
        "blanket.cli",
        "bench",
        "--episodes",
        str(args.episodes),
        "--seed",
        str(args.seed),
        "--workers",
        str(args.workers),
        "--out",
        str(out / "results"),
        "--resume" if args.resume else "--overwrite",
    ]
    if rl_models:
        bench += ["--rl-models", rl_models]
    code = _call(bench, env)
    table = out / "results" / "report.md"
    print(f"total wall time {time.perf_counter() - start:.0f} s; table: {table}")
    return code


if __name__ == "__main__":
    sys.exit(main())
