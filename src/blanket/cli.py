"""The ``blanket`` command.

Sub-commands: ``demo`` (the built-in greenhouse scenario), ``run`` (a scenario file),
``scenarios`` (list the built-in scenario files, copy one to edit),
``plot`` and ``inspect`` (run folders), ``bench`` (benchmark against baselines), ``tune``
(precision sweeps), ``train-rl`` (RL baselines). Bad input prints one line and exits 2.
"""

from __future__ import annotations

import argparse
import importlib
import json
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from blanket.cli_types import positive_int as _positive_int
from blanket.cli_types import seed as _seed
from blanket.errors import ConfigError, shorten

__all__ = ["main", "SAFETY_NOTE"]

SAFETY_NOTE = (
    "Safety: blanket drives simulated robots only. Before commanding real hardware, apply the "
    "robot maker's limits, a risk assessment and local codes (ISO 10218-1/-2 for industrial "
    "robots, ISO/TS 15066 for collaborative operation), and have qualified people sign off."
)

ARM_ROBOTS = ("iiwa", "panda", "xarm6")
BASE_ROBOTS = ("rover", "husky")

# Sub-commands implemented beside the code they drive: (module, add-parser, run) names.
_EXTERNAL = {
    "plot": ("blanket.logs.cli", "add_plot_parser", "run_plot"),
    "inspect": ("blanket.logs.cli", "add_inspect_parser", "run_inspect"),
    "logs": ("blanket.logs.cli", "add_logs_parser", "run_logs"),
    "bench": ("blanket.bench.cli", "add_bench_parser", "run_bench"),
    "train-rl": ("blanket.bench.cli", "add_train_parser", "run_train"),
    "tune": ("blanket.tune.cli", "add_tune_parser", "run_tune"),
}


def _add_run_options(p: argparse.ArgumentParser, episodes_default: int | None) -> None:
    p.add_argument(
        "--out",
        metavar="DIR",
        help="run folder (default: a new one under "
        "./blanket-runs/); a non-empty folder is refused unless --overwrite",
    )
    p.add_argument("--overwrite", action="store_true", help="reuse a non-empty --out folder")
    p.add_argument(
        "--episodes",
        type=_positive_int,
        default=episodes_default,
        metavar="N",
        help="number of episodes" + (f" (default {episodes_default})" if episodes_default else ""),
    )
    p.add_argument(
        "--seed",
        type=_seed,
        default=None,
        metavar="S",
        help="seed of the first episode; episode i uses S + i (default 0)",
    )
    p.add_argument("--no-log", action="store_true", help="do not write trajectory logs")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="blanket",
        description="Test active-inference controllers on simulated arms and mobile bases.",
        epilog=SAFETY_NOTE,
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    demo = sub.add_parser(
        "demo",
        help="run the built-in greenhouse potting-bench scenario",
        description="Reach seedling-tray cells on the potting bench (arms) or drive to the "
        "charging dock between bench rows (rover, husky) with the active-inference agent.",
        epilog=SAFETY_NOTE,
    )
    demo.add_argument(
        "--robot",
        default="iiwa",
        metavar="NAME",
        help=f"one of {', '.join(ARM_ROBOTS + BASE_ROBOTS)} (default iiwa)",
    )
    demo.add_argument(
        "--control",
        default=None,
        metavar="MODE",
        help="velocity or torque (arms only; default velocity)",
    )
    demo.add_argument(
        "--camera",
        default=None,
        metavar="MODE",
        help="projected (marker centres projected, default) or rendered (frames rendered and "
        "the markers detected in the pixels; arms only)",
    )
    _add_run_options(demo, episodes_default=5)

    run = sub.add_parser(
        "run",
        help="run a scenario file",
        epilog=SAFETY_NOTE,
        description="Run the env and agent a scenario TOML file names (to start from a "
        "built-in one: blanket scenarios copy NAME my_scenario.toml).",
    )
    run.add_argument("scenario", metavar="SCENARIO.toml")
    _add_run_options(run, episodes_default=None)

    scenarios = sub.add_parser(
        "scenarios",
        help="list the built-in scenario files; copy one to edit",
        description="Without arguments: list the scenario files that come with blanket. "
        "'copy NAME [DEST]' writes one (and the URDF it names, beside it) to DEST: a folder "
        "(default: the current one) or a file name ending in .toml; then "
        "'blanket run DEST' runs it as it is.",
        epilog=SAFETY_NOTE,
    )
    scenarios.add_argument("action", nargs="?", choices=("list", "copy"), default="list")
    scenarios.add_argument("name", nargs="?", metavar="NAME", help="a built-in scenario")
    scenarios.add_argument("dest", nargs="?", default=".", metavar="DEST", help="folder or .toml")
    scenarios.add_argument("--overwrite", action="store_true", help="replace existing files")

    for module, add_name, _run_name in _EXTERNAL.values():
        try:
            mod = importlib.import_module(module)
        except ImportError:
            continue
        getattr(mod, add_name)(sub)
    return parser


def _demo_scenario(args: argparse.Namespace) -> Any:
    from blanket.scenario import Scenario

    robot = args.robot
    if robot in ARM_ROBOTS:
        control = args.control or "velocity"
        if control not in ("velocity", "torque"):
            raise ConfigError(f"--control must be velocity or torque, got {shorten(control)}")
        camera = args.camera or "projected"
        if camera not in ("projected", "rendered"):
            raise ConfigError(f"--camera must be projected or rendered, got {shorten(camera)}")
        suffix = "-rendered" if camera == "rendered" else ""
        return Scenario(
            env="blanket/arm-reach-v0",
            env_options={"robot": robot, "control": control}
            | ({"camera": camera} if args.camera else {}),
            name=f"greenhouse-bench-{robot}-{control}{suffix}",
        )
    if robot in BASE_ROBOTS:
        if args.camera is not None:
            raise ConfigError(f"--camera applies to the arms ({', '.join(ARM_ROBOTS)})")
        if args.control is not None:
            raise ConfigError(
                f"--control applies to the arms ({', '.join(ARM_ROBOTS)}); the {robot} takes "
                "wheel speeds: leave --control out"
            )
        return Scenario(
            env="blanket/base-goto-v0",
            env_options={"robot": robot},
            name=f"greenhouse-rows-{robot}",
        )
    raise ConfigError(
        f"--robot must be one of {', '.join(ARM_ROBOTS + BASE_ROBOTS)}, got {robot!r}"
    )


def _print_summary(summary: dict[str, Any], out_dir: Path) -> None:
    from blanket.success import HOLD_S

    def fmt(v: Any, unit: str = "", scale: float = 1.0, digits: int = 2) -> str:
        if v is None:
            return "-"
        return f"{v * scale:.{digits}f}{unit}"

    rows = [
        ("episodes", str(summary["episodes"])),
        (f"reached (held {HOLD_S:g} s)", f"{summary['success_rate'] * 100:.0f} %"),
        ("final error, median", fmt(summary["final_error_m"], " cm", 100.0)),
        ("time to reach, median", fmt(summary["time_to_success_s"], " s")),
        ("free energy, median (settled level)", fmt(summary.get("median_free_energy"))),
        ("agent step, median", fmt(summary["agent_step_us"], " us", digits=1)),
        # timed by the rollout loop around env.step: simulation, sensors and wrappers
        ("env step (sim, sensors, wrappers), median", fmt(summary["sim_step_us"], " us", digits=1)),
    ]
    if "final_heading_error_rad" in summary:
        rows.insert(
            3,
            (
                "final heading error, median",
                fmt(summary["final_heading_error_rad"], " deg", 57.29577951308232),
            ),
        )
    if summary.get("contact_rate"):
        rows.append(("episodes with contact", f"{summary['contact_rate'] * 100:.0f} %"))
    if "time_within_tolerance" in summary:  # the hold task
        rows[1:4] = [
            ("time within tolerance, mean", fmt(summary["time_within_tolerance"], " %", 100, 1)),
            ("recovery after a shove, median", fmt(summary["recovery_time_s"], " s")),
            ("shoves recovered", f"{summary['shoves_recovered']}/{summary['shoves']}"),
            (
                "tip sd x / y / z",
                " / ".join(fmt(v, "", 1000, 1) for v in summary["tip_sd_m"]) + " mm",
            ),
        ]
    width = max(len(r[0]) for r in rows)
    print(f"\n  {'measure':<{width}}  value")
    print(f"  {'-' * width}  {'-' * 10}")
    for k, v in rows:
        print(f"  {k:<{width}}  {v}")
    print(f"\n  run folder: {out_dir}")
    figure = out_dir / "figures" / "reach.png"
    if figure.is_file():
        print(f"  figure:     {figure}")
    if (out_dir / "episodes").is_dir():
        print(f"  next:       blanket inspect {out_dir}    blanket plot {out_dir}")


def _run(args: argparse.Namespace) -> int:
    from blanket.runner import prepare_out_dir, run_scenario
    from blanket.scenario import load_scenario

    if args.command == "demo":
        scenario = _demo_scenario(args)
        episodes = args.episodes
    else:
        scenario = load_scenario(args.scenario)
        episodes = args.episodes or scenario.episodes or 5
    seed = args.seed if args.seed is not None else (scenario.seed or 0)
    out_dir = prepare_out_dir(args.out, args.overwrite, prefix=scenario.name, create=False)
    summary = run_scenario(
        scenario,
        episodes=episodes,
        seed=seed,
        out_dir=out_dir,
        progress=not args.quiet,
        record=not args.no_log,
    )
    _print_summary(summary, out_dir)
    return 0


def _scenarios(args: argparse.Namespace) -> int:
    from blanket.scenario import builtin_scenarios, copy_scenario, scenario_summary

    found = builtin_scenarios()
    if args.action == "list":
        if args.name is not None:
            raise ConfigError("blanket scenarios list takes no NAME; to copy: scenarios copy NAME")
        for name, path in found.items():
            print(f"  {name}\n      {scenario_summary(path)}")
        print("\n  copy one here to edit and run: blanket scenarios copy NAME [DEST]")
        return 0
    if args.name is None:
        raise ConfigError(f"scenarios copy needs a NAME, one of {', '.join(found)}")
    target = copy_scenario(args.name, args.dest, overwrite=args.overwrite)
    print(f"  wrote {target} (and the files it names, beside it)")
    print(f"  run it: blanket run {target}")
    return 0


def _out_of_resources(exc: BaseException) -> bool:
    """Memory or capacity exhausted (e.g. a 10 MB name in the metadata of every file)."""
    pa = sys.modules.get("pyarrow")  # not imported: the error is not pyarrow's
    kinds: tuple[type[BaseException], ...] = (MemoryError,)
    if pa is not None:
        kinds += (pa.ArrowCapacityError, pa.ArrowMemoryError)
    return isinstance(exc, kinds)


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        if args.command in ("demo", "run"):
            return _run(args)
        if args.command == "scenarios":
            return _scenarios(args)
        module, _add, run_name = _EXTERNAL[args.command]
        return int(getattr(importlib.import_module(module), run_name)(args) or 0)
    except KeyboardInterrupt:
        print("blanket: interrupted; finished episodes are kept", file=sys.stderr)
        return 130
    except (ConfigError, ValueError, FileNotFoundError, json.JSONDecodeError) as exc:
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        if len(msg) > 300:  # a huge value inside a message: cut, with its length shown
            msg = f"{msg[:299]}... ({len(msg)} characters)"
        print(f"blanket: error: {msg}", file=sys.stderr)
        return 2
    except Exception as exc:
        if not _out_of_resources(exc):
            raise
        what = shorten(str(exc).strip().splitlines()[0] if str(exc).strip() else "", 120)
        print(
            f"blanket: error: out of resources ({type(exc).__name__}: {what}); check the "
            "input for oversized values (names, metadata)",
            file=sys.stderr,
        )
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
