"""The RL learning-curve chart: held-out success within 1 cm and 5 cm against control steps.

    python scripts/plot_rl_curves.py --runs /work/rl-train3/sac-her-seed0 \\
        --bench /work/bench-rl3/results.json --out docs/img/rl-curves.png

Each ``--runs`` folder is a ``blanket train-rl`` run (its ``curve.parquet``); ``--bench`` is a
``blanket bench`` results file whose ``active-inference`` row on the ``nominal`` condition is
drawn as a flat line (the agent needs no training). Without ``--bench`` only the curves.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import pyarrow.parquet as pq

from blanket.bench.report import plot_learning_curves, reference_success


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--runs", nargs="+", required=True, help="train-rl output folders")
    p.add_argument("--bench", help="results.json of a blanket bench run (the flat line)")
    p.add_argument("--policy", default="active-inference", help="the flat line's policy")
    p.add_argument("--out", default="docs/img/rl-curves.png")
    args = p.parse_args()
    curves = {}
    for run in map(Path, args.runs):
        rows = pq.read_table(run / "curve.parquet").to_pylist()
        curves[run.name] = {"learning_curve": rows}
        last = rows[-1]
        print(
            f"{run.name}: {len(rows)} evaluations, last at {last['control_steps']} control steps "
            f"({last['wall_s'] / 3600:.2f} h): 1 cm {last['success_1cm']:.0%}, 5 cm "
            f"{last['success_5cm']:.0%}"
        )
    reference = {}
    if args.bench:
        reference = reference_success(json.loads(Path(args.bench).read_text()), args.policy)
        print(f"flat line: {reference or 'no ' + args.policy + ' nominal row in ' + args.bench}")
    path = plot_learning_curves(curves, Path(args.out), reference)
    print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
