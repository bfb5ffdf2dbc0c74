"""``blanket tune``: precision sweeps from the command line."""

from __future__ import annotations

import argparse
import math
import sys
from typing import Any

from blanket.cli_types import positive_int as _positive_int
from blanket.cli_types import seed as _seed
from blanket.errors import ConfigError
from blanket.tune.engines import add_engine_arguments, condition_names

__all__ = ["add_tune_parser", "run_tune"]

_DESCRIPTION = """\
Sweep scenario keys (precisions, gains, env noise) over a grid, random draws or an adaptive
search; every trial runs one episode per seed, and the best trial is written as best.toml.

NAME=SPEC (repeat --vary for several names):
  NAME  a dotted scenario key: agent.<option> (e.g. agent.camera_precision,
        agent.goal_precision, agent.order) or env_options.<keyword> (e.g.
        env_options.camera_noise_px)
  SPEC  log:LOW..HIGH:COUNT   COUNT values log-spaced from LOW to HIGH (LOW > 0)
        lin:LOW..HIGH:COUNT   COUNT values evenly spaced (whole ends -> whole numbers)
        V1,V2,...             listed values (numbers, true/false or words)
  random/optuna searches draw from [LOW, HIGH] (log-uniform for log:) and pick among lists.

Output folder (--out): trials.jsonl (journal, one line per finished trial), trials.parquet
(one row per trial: param.*, metric.*, per-seed lists seed.*, timing.*), best.toml,
objective.png. Running again with the same --out resumes: finished trials are not rerun.
"""

_EPILOG = """\
examples (bench.toml: any scenario file; 'blanket scenarios copy potting-arm-3dof bench.toml'
writes one to start from):
  blanket tune bench.toml --vary agent.camera_precision=log:0.01..100:5 \\
      --vary agent.goal_precision=log:0.1..10:5 --seeds 5 --objective min:time_to_success_s
  blanket tune bench.toml --vary agent.order=1,2,3 --vary agent.attractor_gain_1_s=lin:1..8:8
  blanket tune bench.toml --vary agent.camera_precision=log:0.001..10:1 \\
      --vary env_options.camera_noise_px=1,4 --search random --trials 40 --out sweep-camera
  blanket tune bench.toml --vary agent.motor_precision=log:0.1..100:5 \\
      --engine ray --address auto        # a running Ray cluster (pip install 'blanket[cluster]')
"""


def add_tune_parser(sub: Any) -> argparse.ArgumentParser:
    """Add the ``tune`` sub-command to the ``blanket`` parser's sub-parsers."""
    p = sub.add_parser(
        "tune",
        help="precision-tuning sweeps over a scenario's keys",
        description=_DESCRIPTION,
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("scenario", metavar="SCENARIO.toml")
    p.add_argument(
        "--vary",
        action="append",
        required=True,
        metavar="NAME=SPEC",
        help="a scenario key and the values to try (see above); repeatable",
    )
    p.add_argument(
        "--seeds",
        type=_positive_int,
        default=5,
        metavar="N",
        help="episodes per trial, seeds S .. S+N-1 (default 5)",
    )
    p.add_argument(
        "--seed",
        type=_seed,
        default=None,
        metavar="S",
        help="first seed (default: the scenario's seed, else 0)",
    )
    p.add_argument(
        "--condition",
        default=None,
        metavar="C",
        help="perturbation condition every episode runs under: a named condition ("
        + ", ".join(condition_names())
        + "; default nominal) or NAME=VALUE[,NAME=VALUE...] of condition parameters "
        "(see 'blanket bench --list'), e.g. payload_kg=0.3",
    )
    p.add_argument(
        "--objective",
        default="max:success_rate",
        metavar="DIR:METRIC",
        help="max:METRIC or min:METRIC, METRIC one of success_rate, final_error_m, "
        "time_to_success_s, contact_rate, safe_stops, final_heading_error_rad, "
        "median_free_energy (the settled level; the old name mean_free_energy is "
        "read as it) (default max:success_rate; ties go to the higher success "
        "rate, then the lower final error)",
    )
    p.add_argument(
        "--search",
        default="grid",
        choices=("grid", "random", "optuna"),
        help="grid: every combination; random: --trials draws; optuna: --trials "
        "adaptive trials (needs optuna) (default grid)",
    )
    p.add_argument(
        "--trials",
        type=_positive_int,
        default=None,
        metavar="K",
        help="trials of a random or optuna search (default 20)",
    )
    p.add_argument(
        "--search-seed",
        type=_seed,
        default=0,
        metavar="S",
        help="seed of the random draws / optuna sampler (default 0)",
    )
    add_engine_arguments(p, None, "parallel trials (default: all cores; 1 runs in this process)")
    p.add_argument(
        "--out",
        metavar="DIR",
        default=None,
        help="sweep folder (default a new one under ./blanket-runs/); the same folder resumes",
    )
    p.add_argument(
        "--overwrite",
        action="store_true",
        help="clear --out first when it holds another sweep or other files",
    )
    p.add_argument("--no-plot", action="store_true", help="do not write objective.png")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    return p


def _fmt(v: Any) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "-"
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def run_tune(args: argparse.Namespace) -> int:
    """Run the sweep ``args`` describe and print the best trials."""
    from blanket.scenario import load_scenario
    from blanket.tune.search import OBJECTIVE_ALIASES, parse_objective, run_sweep
    from blanket.tune.space import parse_vary

    specs = [parse_vary(v) for v in args.vary]
    objective = parse_objective(args.objective)
    old_name = args.objective.strip().partition(":")[2]
    if old_name in OBJECTIVE_ALIASES:
        new_name, why = OBJECTIVE_ALIASES[old_name]
        print(f"blanket tune: note: {old_name} is read as {new_name} ({why})", file=sys.stderr)
    if args.search == "grid" and args.trials is not None:
        raise ConfigError("--trials applies to --search random or optuna; a grid runs every point")
    if args.address is not None and args.engine != "ray":
        raise ConfigError("--address applies to --engine ray only")
    scenario = load_scenario(args.scenario)
    first = args.seed if args.seed is not None else (scenario.seed or 0)
    seeds = list(range(first, first + args.seeds))
    result = run_sweep(
        scenario,
        specs,
        seeds=seeds,
        objective=objective,
        search=args.search,
        trials=args.trials,
        search_seed=args.search_seed,
        engine=args.engine,
        workers=args.workers,
        address=args.address,
        condition=args.condition,
        out_dir=args.out,
        overwrite=args.overwrite,
        progress=not args.quiet,
        plots=not args.no_plot,
    )
    frame = result.table
    metric = f"metric.{objective.metric}"
    order = sorted(
        range(len(frame)),
        key=lambda i: objective.sort_key(
            {
                m.removeprefix("metric."): (
                    None
                    if isinstance(frame[m].iloc[i], float) and math.isnan(frame[m].iloc[i])
                    else frame[m].iloc[i]
                )
                for m in frame.columns
                if m.startswith("metric.")
            },
            int(frame["trial"].iloc[i]),
        ),
    )
    cols = ["trial"] + [f"param.{s.name}" for s in specs] + [metric]
    if metric != "metric.success_rate":
        cols.append("metric.success_rate")
    heads = [c.removeprefix("param.").removeprefix("metric.") for c in cols]
    rows = [[_fmt(frame[c].iloc[i]) for c in cols] for i in order[:5]]
    widths = [
        max(len(h), *(len(r[k]) for r in rows)) if rows else len(h) for k, h in enumerate(heads)
    ]
    print(
        f"\n  {len(frame)} trials x {len(seeds)} seeds ({result.ran} run now, "
        f"{result.resumed} from the journal); best by {objective.text}:"
    )
    print("  " + "  ".join(h.ljust(w) for h, w in zip(heads, widths, strict=True)))
    print("  " + "  ".join("-" * w for w in widths))
    for r in rows:
        print("  " + "  ".join(v.ljust(w) for v, w in zip(r, widths, strict=True)))
    print(f"\n  sweep folder: {result.out_dir}")
    if "best" in result.files:
        print(f"  best scenario: {result.files['best']}  (blanket run {result.files['best']})")
    return 0
