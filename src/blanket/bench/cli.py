"""``blanket bench`` and ``blanket train-rl``: wired into the main command by blanket.cli."""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

from blanket.cli_types import positive_int as _positive_int
from blanket.cli_types import seed as _seed
from blanket.errors import ConfigError

__all__ = ["add_bench_parser", "run_bench", "add_train_parser", "run_train"]


def _positive_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number > 0, got {text!r}") from None
    if not v > 0:
        raise argparse.ArgumentTypeError(f"must be a number > 0, got {text!r}")
    return v


def _names(text: str | None) -> list[str] | None:
    if text is None:
        return None
    names = [t.strip() for t in text.split(",") if t.strip()]
    return names or None


def add_bench_parser(sub: Any) -> argparse.ArgumentParser:
    """The ``bench`` sub-command."""
    p = sub.add_parser(
        "bench",
        help="benchmark policies (active inference, classical, RL) over perturbed conditions",
        description="Run every policy over every condition of the reaching task with the same "
        "seeds (episode i uses seed S + i, so targets and perturbations match across "
        "policies); write results.json, report.md and charts.",
    )
    p.add_argument(
        "--quick",
        action="store_true",
        help="small suite that runs in minutes (2 episodes of 3 s; a tiny RL smoke "
        "model is trained when stable-baselines3 is installed and --rl-models has none)",
    )
    p.add_argument(
        "--policies",
        metavar="A,B",
        help="policies: built-in names (see --list) or import paths 'package.module:Name'",
    )
    p.add_argument("--conditions", metavar="C,D", help="named conditions (see --list)")
    p.add_argument(
        "--episodes",
        type=_positive_int,
        metavar="N",
        help="episodes per policy and condition (default 20, quick 2)",
    )
    p.add_argument("--seed", type=_seed, default=0, metavar="S", help="first seed (default 0)")
    p.add_argument(
        "--robot",
        default="iiwa",
        metavar="NAME",
        help="iiwa, panda, xarm6 or planar (default iiwa)",
    )
    p.add_argument(
        "--episode-s",
        type=_positive_float,
        metavar="T",
        help="episode length in seconds (default 4, quick 3)",
    )
    p.add_argument(
        "--rl-models", metavar="DIR", help="folder with sac.zip / ppo.zip from 'blanket train-rl'"
    )
    p.add_argument(
        "--task",
        default="reach",
        metavar="NAME",
        help="reach (blanket/arm-reach-v0) or hold (blanket/arm-hold-v0: hold the tip against "
        "random forcing; adds time within tolerance, shove recovery, tip covariance)",
    )
    p.add_argument(
        "--out",
        metavar="DIR",
        help="output folder (default: a new one under "
        "./blanket-runs/); a non-empty folder is refused unless --overwrite",
    )
    p.add_argument("--overwrite", action="store_true", help="reuse a non-empty --out folder")
    p.add_argument(
        "--resume",
        action="store_true",
        help="continue an interrupted run in --out (same settings): finished (policy, "
        "condition) cells are read from its cells.jsonl, not run again",
    )
    from blanket.tune.engines import add_engine_arguments

    add_engine_arguments(
        p,
        1,
        "(policy, condition) cells in parallel (default 1: in this process); the results "
        "do not depend on it",
    )
    p.add_argument("--list", action="store_true", help="print built-in policies and conditions")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    return p


def run_bench(args: argparse.Namespace) -> int:
    from blanket.bench.policies import POLICIES
    from blanket.bench.suite import BenchSettings, run_benchmark
    from blanket.conditions import PARAMETERS, PRESETS

    if args.list:
        print("policies:")
        for name, spec in POLICIES.items():
            print(f"  {name:<28} {spec.summary}")
        print("conditions:")
        for name, cond in PRESETS.items():
            values = ", ".join(f"{k} = {v:g}" for k, v in cond.parameters.items())
            print(f"  {name:<28} {cond.summary}" + (f" ({values})" if values else ""))
        print("condition parameters (scenario [conditions], blanket tune --condition):")
        for name, p in PARAMETERS.items():
            bracket = "(" if p.low_open else "["
            print(
                f"  {name:<28} {p.summary}; allowed {bracket}{p.low:g}, {p.high:g}]; "
                f"sets {p.drives}"
            )
        return 0
    from blanket.runner import prepare_out_dir

    if args.address is not None and args.engine != "ray":
        raise ConfigError("--address applies to --engine ray only")
    if args.resume and args.out is None:
        raise ConfigError("--resume needs --out DIR (the folder of the interrupted run)")
    settings = BenchSettings.from_cli(
        quick=args.quick,
        policies=_names(args.policies),
        conditions=_names(args.conditions),
        episodes=args.episodes,
        seed=args.seed,
        robot=args.robot,
        episode_s=args.episode_s,
        rl_models=args.rl_models,
        task=args.task,
    )
    out = prepare_out_dir(args.out, args.overwrite or args.resume, prefix="bench")
    summary = run_benchmark(
        settings,
        out,
        progress=not args.quiet,
        engine=args.engine,
        workers=args.workers,
        address=args.address,
        resume=args.resume,
    )
    print(f"\n  {len(summary['records'])} records in {summary['wall_s']:.0f} s")
    if args.quiet:  # a notice, not progress: printed at the start unless --quiet
        for line in settings.left_out:
            print(f"  left out {line}")
    print(f"  results: {out / 'results.json'}")
    print(f"  report:  {out / 'report.md'}")
    return 0


def add_train_parser(sub: Any) -> argparse.ArgumentParser:
    """The ``train-rl`` sub-command."""
    p = sub.add_parser(
        "train-rl",
        help="train an RL baseline (SAC or PPO, stable-baselines3) on the reaching env",
        description="Train SAC or PPO on the benchmark's reaching env (same observation, flat "
        "and normalised); save DIR/<algo>.zip and DIR/<algo>.json (settings, steps, wall time, "
        "learning curve). Needs the rl extra: pip install torch==2.13.0, then "
        "stable-baselines3.",
    )
    p.add_argument(
        "--algo",
        required=True,
        metavar="NAME",
        help="sac-her (goal-conditioned SAC with hindsight relabelling), ppo-vec (PPO on "
        "--n-envs goal-conditioned envs), or the flat-observation sac / ppo",
    )
    p.add_argument(
        "--steps",
        type=_positive_int,
        required=True,
        metavar="N",
        help="policy decisions to train (control steps = N x --action-repeat)",
    )
    p.add_argument("--out", required=True, metavar="DIR", help="output folder")
    p.add_argument("--seed", type=_seed, default=0, metavar="S")
    p.add_argument(
        "--robot",
        default="iiwa",
        metavar="NAME",
        help="iiwa, panda, xarm6 or planar (default iiwa)",
    )
    p.add_argument("--episode-s", type=_positive_float, default=4.0, metavar="T")
    p.add_argument("--task", default="reach", metavar="NAME", help="reach (default) or hold")
    p.add_argument(
        "--action-repeat",
        type=_positive_int,
        default=8,
        metavar="K",
        help="hold each decision for K control steps (default 8: 30 Hz at 240 Hz; sac-her and "
        "ppo-vec take 1, 2, 4 or 8)",
    )
    p.add_argument(
        "--eval-every",
        type=_positive_int,
        metavar="N",
        help="policy steps between learning-curve evaluations (default 10000; sac-her and "
        "ppo-vec 5000)",
    )
    p.add_argument(
        "--eval-episodes",
        type=_positive_int,
        metavar="N",
        help="held-out evaluation episodes (seeds from 100000; default 10, sac-her and ppo-vec 30)",
    )
    p.add_argument(
        "--n-envs",
        type=_positive_int,
        default=4,
        metavar="N",
        help="ppo-vec: environments stepped together (default 4)",
    )
    p.add_argument(
        "--resume",
        action="store_true",
        help="sac-her / ppo-vec: continue the run in --out from its checkpoint up to --steps "
        "(same settings; the checkpoint is SB3's own format: resume only your own runs)",
    )
    p.add_argument("--distance-scale-m", type=_positive_float, default=0.1, metavar="M")
    p.add_argument("--tolerance-bonus", type=float, default=1.0, metavar="R")
    p.add_argument(
        "--near-bonus",
        type=float,
        default=0.0,
        metavar="R",
        help="sac-her / ppo-vec: reward term R * exp(-d / tolerance), sharper near the goal",
    )
    p.add_argument("--effort-weight", type=float, default=0.01, metavar="W")
    p.add_argument(
        "--hyper",
        metavar="JSON",
        default="{}",
        help="extra SB3 keyword arguments as JSON, e.g. '{\"learning_rate\": 1e-3}'",
    )
    p.add_argument("--quiet", action="store_true")
    return p


def run_train(args: argparse.Namespace) -> int:
    from blanket.bench.rl import ALGORITHMS, TrainSettings, train
    from blanket.bench.rl_goal import GOAL_ALGORITHMS, GoalTrainSettings, train_goal

    try:
        hyper = json.loads(args.hyper)
    except json.JSONDecodeError:
        raise ConfigError(f"--hyper must be a JSON object, got {args.hyper!r}") from None
    if not isinstance(hyper, dict):
        raise ConfigError(f"--hyper must be a JSON object, got {args.hyper!r}")
    common = {
        "algo": args.algo,
        "steps": args.steps,
        "seed": args.seed,
        "robot": args.robot,
        "episode_s": args.episode_s,
        "action_repeat": args.action_repeat,
        "distance_scale_m": args.distance_scale_m,
        "tolerance_bonus": args.tolerance_bonus,
        "hyperparameters": hyper,
    }
    if args.algo in GOAL_ALGORITHMS:
        if getattr(args, "task", "reach") != "reach":
            raise ConfigError(f"--task: {args.algo} trains the reach task only; got {args.task!r}")
        goal = GoalTrainSettings(
            **common,
            eval_every=args.eval_every or 5_000,
            eval_episodes=args.eval_episodes or 30,
            n_envs=args.n_envs,
            near_bonus=args.near_bonus,
        )
        meta = train_goal(goal, Path(args.out), resume=args.resume, progress=not args.quiet)
        best = Path(args.out) / "best" / f"{args.algo}.json"
        print(
            f"  trained {meta['policy_steps']} decisions ({meta['control_steps']} control "
            f"steps) in {meta['wall_time_s']:.0f} s; best weights {best}"
        )
        return 0
    if args.algo not in ALGORITHMS:
        from blanket.errors import did_you_mean

        hint = did_you_mean(args.algo, ALGORITHMS + GOAL_ALGORITHMS, n=1, list_valid=True)
        raise ConfigError(f"--algo: unknown algorithm {args.algo!r}; {hint}")
    if args.resume:
        raise ConfigError("--resume applies to --algo sac-her and ppo-vec only")
    settings = TrainSettings(
        **common,
        eval_every=args.eval_every or 10_000,
        eval_episodes=args.eval_episodes or 10,
        effort_weight=args.effort_weight,
        task=args.task,
    )
    meta = train(settings, Path(args.out), progress=not args.quiet)
    print(
        f"  trained {meta['policy_steps']} policy steps ({meta['control_steps']} control "
        f"steps) in {meta['wall_time_s']:.0f} s; model {Path(args.out) / meta['model']}"
    )
    return 0
