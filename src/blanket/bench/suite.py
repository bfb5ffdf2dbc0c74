"""Run a benchmark: every policy over every condition, same seeds; write results and report."""

from __future__ import annotations

import json
import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from blanket.bench.evaluate import run_policy_episodes
from blanket.bench.metrics import aggregate, episode_metrics
from blanket.bench.policies import POLICIES, PolicySpec, resolve_policy, rl_meta_path
from blanket.conditions import PRESETS, Condition, resolve_conditions
from blanket.errors import ConfigError

__all__ = [
    "BenchSettings",
    "run_benchmark",
    "evaluate_cell",
    "without_timing",
    "DEFAULT_POLICIES",
    "QUICK_POLICIES",
    "ROBOTS",
]

ROBOTS = ("iiwa", "panda", "xarm6", "planar")
DEFAULT_POLICIES = tuple(POLICIES)
QUICK_POLICIES = ("active-inference", "active-inference-torque", "classical", "classical-torque")
#: SB3 training steps of the quick RL smoke model (a check that the path works, not a result).
SMOKE_RL_STEPS = 300


@dataclass
class BenchSettings:
    """What a benchmark run covers (saved in ``results.json`` beside the records)."""

    policies: list[str] = field(default_factory=lambda: list(DEFAULT_POLICIES))
    conditions: list[str] = field(default_factory=lambda: list(PRESETS))
    episodes: int = 20
    seed: int = 0
    robot: str = "iiwa"
    episode_s: float = 4.0
    rl_models: str | None = None
    quick: bool = False
    smoke_rl: bool = False
    #: Policies the defaults left out, each with the reason (printed and kept in bench.json).
    left_out: list[str] = field(default_factory=list)
    #: ``reach`` or ``hold`` (:data:`blanket.bench.rl.BENCH_TASKS`).
    task: str = "reach"

    @classmethod
    def from_cli(
        cls,
        quick: bool = False,
        policies: Sequence[str] | None = None,
        conditions: Sequence[str] | None = None,
        episodes: int | None = None,
        seed: int = 0,
        robot: str = "iiwa",
        episode_s: float | None = None,
        rl_models: str | None = None,
        task: str = "reach",
    ) -> BenchSettings:
        """Defaults of ``blanket bench`` (and ``--quick``), checked; one-line errors."""
        if robot not in ROBOTS:
            raise ConfigError(f"--robot must be one of {', '.join(ROBOTS)}, got {robot!r}")
        from blanket.bench.rl import check_task, sb3_available

        check_task(task, robot)

        smoke = False
        have = _available_rl(rl_models)
        left_out: list[str] = []
        if policies is None:
            rl = [p for p in DEFAULT_POLICIES if POLICIES[p].rl_algo is not None]
            if quick:
                policies = list(QUICK_POLICIES)
                if have:
                    policies += have
                elif sb3_available():
                    policies.append("sac")
                    smoke = True
                    left_out.append("ppo: --quick trains a SAC smoke model only")
                else:
                    left_out += [
                        f"{p}: stable-baselines3 is not installed (pip install -e '.[rl]')"
                        for p in rl
                    ]
            else:
                from blanket.bench.rl_goal import GOAL_ALGORITHMS, goal_weights_path

                goal = [p for p in DEFAULT_POLICIES if p in GOAL_ALGORITHMS]
                policies = [
                    p for p in DEFAULT_POLICIES if POLICIES[p].rl_algo is None and p not in goal
                ] + have
                for name in goal:  # the goal-conditioned weights fit the iiwa reach only
                    weights = goal_weights_path(name, rl_models)
                    if robot != "iiwa" or task != "reach":
                        left_out.append(f"{name}: the shipped weights are for the iiwa reach")
                    elif not weights.is_file():
                        left_out.append(
                            f"{name}: no {weights.name} in models/ or --rl-models (docs/rl.md)"
                        )
                    else:
                        policies.append(name)
            if not quick:
                left_out += [
                    f"{p}: no {p}.zip in --rl-models (train one with blanket train-rl)"
                    for p in rl
                    if p not in have
                ]
        for name in policies:
            spec = resolve_policy(name)  # fail early on a bad name
            if spec.rl_algo is not None and not smoke and spec.rl_algo not in have:
                from blanket.bench.policies import rl_model_path

                rl_model_path(spec.rl_algo, {"rl_models": rl_models})
        names = [c.name for c in resolve_conditions(conditions)]
        return cls(
            policies=list(policies),
            conditions=names,
            episodes=episodes or (2 if quick else 20),
            seed=seed,
            robot=robot,
            episode_s=episode_s or (3.0 if quick else 4.0),
            rl_models=rl_models,
            quick=quick,
            smoke_rl=smoke,
            left_out=left_out,
            task=task,
        )


def _available_rl(folder: str | None) -> list[str]:
    if folder is None:
        return []
    return [a for a in ("sac", "ppo") if (Path(folder) / f"{a}.zip").is_file()]


def _make_env(settings: BenchSettings, control: str, condition: Condition) -> Any:
    """The env of one condition: perturbations inside, the safety wrapper outermost."""
    from blanket.bench.rl import make_bench_env

    return make_bench_env(
        settings.robot,
        control,
        settings.episode_s,
        conditions=condition.parameters,
        task=settings.task,
    )


def _note(spec: PolicySpec, condition: Condition) -> str:
    if condition.model_options and not spec.model_based:
        return "no body model: this condition does not change this policy"
    return ""


#: The resume journal of a benchmark folder: one JSON line per finished cell (fsynced).
CELLS = "cells.jsonl"
#: What the folder's cells were run for: a resumed run must ask for the same.
GRID = "bench-grid.json"
#: Record fields measured on the clock (not reproducible; everything else is).
TIMING_FIELDS = ("wall_s", "policy_step_us")


def without_timing(value: Any) -> Any:
    """``results.json`` content (records, or any part) without :data:`TIMING_FIELDS`: the part
    every run of the same settings reproduces, whatever the engine."""
    if isinstance(value, dict):
        return {k: without_timing(v) for k, v in value.items() if k not in TIMING_FIELDS}
    if isinstance(value, list):
        return [without_timing(v) for v in value]
    return value


def cell_key(policy: str, condition: str) -> str:
    """The journal key of one (policy, condition) cell."""
    return f"{policy} | {condition}"


def evaluate_cell(payload: dict[str, Any]) -> dict[str, Any]:
    """One cell of the grid: a policy's episodes under one condition (a pure function of the
    payload, so any engine gives the same numbers).

    Parameters
    ----------
    payload : dict
        ``index``, ``policy``, ``condition`` (names), ``settings`` (a :class:`BenchSettings`
        as a dict) and ``context`` (``rl_models``, ``rl_meta``).

    Returns
    -------
    dict
        ``index``, ``key`` and ``record`` (one ``results.json`` record).
    """
    from blanket.tune.engines import cached_env

    settings = BenchSettings(**payload["settings"])
    context = payload["context"]
    spec = resolve_policy(payload["policy"])
    condition = resolve_conditions([payload["condition"]])[0]
    control = spec.control
    # one env per (condition, control) and worker, shared by the policies it runs in turn
    env = cached_env(
        ["bench", settings.task, settings.robot, control, settings.episode_s, condition.name],
        lambda: _make_env(settings, control, condition),
    )
    model_options = dict(condition.model_options) if spec.model_based else {}
    policy = spec.build(env, model_options, context)
    t0 = time.perf_counter()
    seeds = [settings.seed + i for i in range(settings.episodes)]
    rows = [episode_metrics(t) for t in run_policy_episodes(env, policy, seeds)]
    record: dict[str, Any] = {
        "policy": spec.name,
        "condition": condition.name,
        "control": control,
        "robot": settings.robot,
        **aggregate(rows, seed=settings.seed),
        "training_steps": None,
        "training_wall_s": None,
        "note": _note(spec, condition),
        "wall_s": time.perf_counter() - t0,
    }
    meta = context["rl_meta"].get(spec.rl_algo or spec.name)
    if meta:
        record["training_steps"] = meta.get("control_steps")
        record["training_policy_steps"] = meta.get("policy_steps")
        record["training_wall_s"] = meta.get("wall_time_s")
        if settings.smoke_rl:
            record["note"] = "smoke model, a few hundred steps: not a result"
    record["per_episode"] = rows
    record = json.loads(json.dumps(record, default=_json))  # plain JSON types, as journaled
    return {
        "index": payload["index"],
        "key": cell_key(spec.name, condition.name),
        "record": record,
    }


def open_bench_dir(out: Path, settings: BenchSettings, resume: bool) -> list[dict[str, Any]]:
    """Prepare ``out`` for the grid of ``settings``; the records of finished cells (resume).

    Without ``resume`` any earlier journal is discarded. With it, a folder whose grid differs
    is refused (one-line :class:`~blanket.errors.ConfigError`).
    """
    from blanket.tune.results import Journal, _differences

    grid = json.loads(json.dumps(asdict(settings), default=_json))
    grid_path = out / GRID
    journal = Journal(out / CELLS, required=("key", "record"))
    if resume and grid_path.is_file():
        old = json.loads(grid_path.read_text(encoding="utf-8"))
        diff = _differences(old, grid)
        if diff:
            raise ConfigError(
                f"--resume: {str(out)!r} holds a different benchmark (differs in: "
                f"{', '.join(diff)}); drop --resume and pass --overwrite to start over"
            )
        return journal.read()
    journal.path.unlink(missing_ok=True)
    tmp = out / f".{GRID}.tmp"
    tmp.write_text(json.dumps(grid, indent=1, sort_keys=True) + "\n", encoding="utf-8")
    tmp.replace(grid_path)
    return []


def run_benchmark(
    settings: BenchSettings,
    out_dir: str | Path,
    progress: bool = True,
    engine: str = "local",
    workers: int | None = 1,
    address: str | None = None,
    resume: bool = False,
) -> dict[str, Any]:
    """Run the suite; write ``results.json``, ``report.md`` and charts into ``out_dir``.

    Episode ``i`` of every (policy, condition) uses seed ``settings.seed + i``: the same
    targets, start postures, sensor noise and perturbations for every policy.

    The (policy, condition) cells run on an engine of :mod:`blanket.tune.engines` (``local``
    with ``workers`` processes -- 1 runs in this process -- or ``ray``, on a cluster at
    ``address``): each cell is :func:`evaluate_cell`, so the records are the same on every
    engine (only their :data:`TIMING_FIELDS` are measured). Each finished cell is journaled
    (``cells.jsonl``); with ``resume`` a rerun into the same folder skips the finished cells.
    """
    from blanket.bench.report import write_report
    from blanket.tune.engines import make_engine
    from blanket.tune.results import Journal

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    start = time.perf_counter()
    context: dict[str, Any] = {"rl_models": settings.rl_models, "rl_meta": {}}
    finished = {r["key"]: r["record"] for r in open_bench_dir(out, settings, resume)}
    journal = Journal(out / CELLS, required=("key", "record"))
    if progress:
        for line in settings.left_out:
            print(f"  left out {line}", flush=True)
    if settings.smoke_rl:
        from blanket.bench.rl import TrainSettings, train

        smoke_dir = out / "rl-smoke"
        if not (resume and (smoke_dir / "sac.zip").is_file()):
            if progress:
                print(
                    f"  training a SAC smoke model ({SMOKE_RL_STEPS} steps; not a result)",
                    flush=True,
                )
            train(
                TrainSettings(
                    algo="sac",
                    steps=SMOKE_RL_STEPS,
                    robot=settings.robot,
                    episode_s=settings.episode_s,
                    eval_every=10 * SMOKE_RL_STEPS,
                    eval_episodes=1,
                    task=settings.task,
                ),
                smoke_dir,
            )
        context["rl_models"] = str(smoke_dir)
    specs = [resolve_policy(p) for p in settings.policies]
    for spec in specs:
        meta_path = rl_meta_path(spec, context["rl_models"])
        if meta_path is not None and meta_path.is_file():
            context["rl_meta"][spec.rl_algo or spec.name] = json.loads(meta_path.read_text())
    conditions = resolve_conditions(settings.conditions)
    plain = asdict(settings)
    payloads = []
    # cells in the order of the in-process loop: condition, control, policy
    for condition in conditions:
        for control in sorted({s.control for s in specs}):
            for spec in (s for s in specs if s.control == control):
                if cell_key(spec.name, condition.name) in finished:
                    continue
                payloads.append(
                    {
                        "index": len(payloads),
                        "policy": spec.name,
                        "condition": condition.name,
                        "settings": plain,
                        "context": context,
                    }
                )
    if progress and finished:
        print(f"  resumed: {len(finished)} cells from {CELLS}, {len(payloads)} to run", flush=True)
    with make_engine(engine, workers, address) as eng:
        for result in eng.imap(payloads, evaluate_cell):
            record = result["record"]
            journal.append(result)
            finished[result["key"]] = record
            if progress:
                print(
                    f"  {record['condition']:<22} {record['policy']:<28} reached 1 cm "
                    f"{record['success_1cm'] * 100:3.0f} %  5 cm "
                    f"{record['success_5cm'] * 100:3.0f} %  final error "
                    f"{(record['final_error_m'] or 0) * 100:6.2f} cm",
                    flush=True,
                )
    keys = [cell_key(s.name, c.name) for c in conditions for s in specs]
    p_rank = {s.name: i for i, s in enumerate(specs)}
    c_rank = {c.name: i for i, c in enumerate(conditions)}
    records = [finished[k] for k in keys]
    records.sort(key=lambda r: (c_rank[r["condition"]], p_rank[r["policy"]]))
    wall = time.perf_counter() - start
    (out / "results.json").write_text(json.dumps(records, indent=1, default=_json) + "\n")
    run_info = {"settings": asdict(settings), "wall_s": wall, "rl_training": context["rl_meta"]}
    (out / "bench.json").write_text(json.dumps(run_info, indent=1, default=_json) + "\n")
    write_report(records, out, settings=asdict(settings), rl_meta=context["rl_meta"], wall_s=wall)
    return {"records": records, "wall_s": wall}


def _json(v: Any) -> Any:
    import numpy as np

    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, np.ndarray):
        return v.tolist()
    raise TypeError(f"not JSON serialisable: {type(v).__name__}")
