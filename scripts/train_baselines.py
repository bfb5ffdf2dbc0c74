"""Train the shipped RL baselines (goal-conditioned SAC + HER, and PPO on vector envs).

    python scripts/train_baselines.py --out /work/rl-train --hours 1.5
    python scripts/train_baselines.py --out /work/rl-train --summary --ship models

Runs ``blanket train-rl`` for each seed in turn (niced, one torch thread, each run bounded by
``--hours``), resuming a seed's run from its checkpoint when one exists, so a budget larger
than one sitting accumulates over several calls. Each run writes OUT/<algo>-seed<S>/ (the
Parquet curve, progress.log, checkpoint/, best/ and last/) and its console output to
OUT/<algo>-seed<S>.log.

``--summary`` prints, per seed, the budget (decisions, control steps, training hours), the
1 cm share of the last three evaluations, the best evaluation, and whether the curve had
flattened (the 1 cm share of the last three evaluations within ``--flat`` of each other).
``--ship DIR`` copies the best weights of the seed whose best held-out evaluation ranks
first (share within 1 cm, then 5 cm, then median error) into DIR as ``<algo>.npz`` and
``<algo>.json``. Evaluations use held-out seeds (from 100000), never the bench's.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path


def _run(out: Path, algo: str, seed: int, steps: int, hours: float, extra: list[str]) -> int:
    run = out / f"{algo}-seed{seed}"
    cmd = [
        "nice",
        "-n",
        "10",
        "timeout",
        str(int(hours * 3600)),
        sys.executable,
        "-m",
        "blanket.cli",
        "train-rl",
        "--algo",
        algo,
        "--steps",
        str(steps),
        "--seed",
        str(seed),
        "--out",
        str(run),
        *extra,
    ]
    if (run / "checkpoint" / "model.zip").is_file():
        cmd.append("--resume")
    env = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1", MPLBACKEND="Agg")
    print(" ".join(cmd), flush=True)
    with (out / f"{algo}-seed{seed}.log").open("a") as log:
        return subprocess.call(cmd, stdout=log, stderr=subprocess.STDOUT, env=env)


def _rank(row: dict) -> tuple[float, float, float]:
    return (row["success_1cm"], row["success_5cm"], -row["final_error_m"])


def summary(out: Path, algo: str, flat: float) -> list[tuple[tuple, Path]]:
    ranked = []
    for run in sorted(out.glob(f"{algo}-seed*")):
        state = run / "state.json"
        if not run.is_dir() or not state.is_file():
            continue
        curve = json.loads(state.read_text())["curve"]
        if not curve:
            continue
        last = curve[-1]
        tail = [r["success_1cm"] for r in curve[-3:]]
        best = max(curve, key=_rank)
        flattened = len(tail) == 3 and max(tail) - min(tail) <= flat
        print(
            f"{run.name}: {last['policy_steps']} decisions, {last['control_steps']} control "
            f"steps, {last['wall_s'] / 3600:.2f} h; last three 1 cm "
            f"{', '.join(f'{x:.0%}' for x in tail)} ({'flat' if flattened else 'not flat'}); "
            f"best at {best['policy_steps']}: 1 cm {best['success_1cm']:.0%}, 5 cm "
            f"{best['success_5cm']:.0%}, median {best['final_error_m'] * 100:.2f} cm"
        )
        ranked.append((_rank(best), run, last["wall_s"]))
    return sorted(ranked, reverse=True)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", default="rl-train", help="training folder (outside the git tree)")
    p.add_argument("--algo", default="sac-her", help="sac-her or ppo-vec")
    p.add_argument("--seeds", default="0,1,2")
    p.add_argument(
        "--steps",
        type=int,
        help="total decisions per seed (default: sac-her 50000, ppo-vec 1000000)",
    )
    p.add_argument("--hours", type=float, default=1.5, help="wall-time bound of each run")
    p.add_argument("--summary", action="store_true", help="only summarise the runs in --out")
    p.add_argument("--ship", metavar="DIR", help="copy the best seed's weights into DIR")
    p.add_argument("--flat", type=float, default=0.1, help="flatness band of the 1 cm share")
    args, extra = p.parse_known_args()
    steps = args.steps or (50_000 if args.algo == "sac-her" else 1_000_000)
    out = Path(args.out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    if not args.summary:
        for seed in [int(s) for s in args.seeds.split(",") if s]:
            _run(out, args.algo, seed, steps, args.hours, extra)
    ranked = summary(out, args.algo, args.flat)
    if len(ranked) > 1:
        tails = []
        for _r, run, _w in ranked:
            curve = json.loads((run / "state.json").read_text())["curve"]
            tails.append(sum(r["success_1cm"] for r in curve[-3:]) / len(curve[-3:]))
        print(
            f"spread over {len(ranked)} seeds of the mean 1 cm share of the last three "
            f"evaluations: {min(tails):.0%} to {max(tails):.0%}"
        )
    if args.ship and ranked:
        best = ranked[0][1] / "best"
        dest = Path(args.ship)
        dest.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(best / f"{args.algo}.npz", dest / f"{args.algo}.npz")
        # the JSON's hash covers the arrays; the record gains the seeds behind the choice
        doc = json.loads((best / f"{args.algo}.json").read_text())
        doc["seeds_trained"] = sorted(int(run.name.rsplit("seed", 1)[1]) for _r, run, _w in ranked)
        doc["seeds_wall_time_s"] = round(sum(w for _r, _run, w in ranked), 1)
        (dest / f"{args.algo}.json").write_text(json.dumps(doc, indent=1) + "\n")
        print(f"shipped {best} -> {dest} (seeds {doc['seeds_trained']})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
