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
from blanket.bench.policies import POLICIES, PolicySpec, resolve_policy
from blanket.conditions import PRESETS, Condition, resolve_conditions
from blanket.errors import ConfigError

__all__ = ["BenchSettings", "run_benchmark", "DEFAULT_POLICIES", "QUICK_POLICIES", "ROBOTS"]

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
    ) -> BenchSettings:
        """Defaults of ``blanket bench`` (and ``--quick``), checked; one-line errors."""
        if robot not in ROBOTS:
            raise ConfigError(f"--robot must be one of {', '.join(ROBOTS)}, got {robot!r}")
        from blanket.bench.rl import sb3_available

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
                policies = [p for p in DEFAULT_POLICIES if POLICIES[p].rl_algo is None] + have
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
        )


def _available_rl(folder: str | None) -> list[str]:
    if folder is None:
        return []
    return [a for a in ("sac", "ppo") if (Path(folder) / f"{a}.zip").is_file()]


def _make_env(settings: BenchSettings, control: str, condition: Condition) -> Any:
    """The env of one condition: perturbations inside, the safety wrapper outermost."""
    from blanket.bench.rl import make_bench_env

    return make_bench_env(
        settings.robot, control, settings.episode_s, conditions=condition.parameters
    )


def _note(spec: PolicySpec, condition: Condition) -> str:
    if condition.model_options and not spec.model_based:
        return "no body model: this condition does not change this policy"
    return ""


def run_benchmark(
    settings: BenchSettings, out_dir: str | Path, progress: bool = True
) -> dict[str, Any]:
    """Run the suite; write ``results.json``, ``report.md`` and charts into ``out_dir``.

    Episode ``i`` of every (policy, condition) uses seed ``settings.seed + i``: the same
    targets, start postures, sensor noise and perturbations for every policy.
    """
    from blanket.bench.report import write_report

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    start = time.perf_counter()
    context: dict[str, Any] = {"rl_models": settings.rl_models, "rl_meta": {}}
    if progress:
        for line in settings.left_out:
            print(f"  left out {line}", flush=True)
    if settings.smoke_rl:
        from blanket.bench.rl import TrainSettings, train

        smoke_dir = out / "rl-smoke"
        if progress:
            print(
                f"  training a SAC smoke model ({SMOKE_RL_STEPS} steps; not a result)", flush=True
            )
        train(
            TrainSettings(
                algo="sac",
                steps=SMOKE_RL_STEPS,
                robot=settings.robot,
                episode_s=settings.episode_s,
                eval_every=10 * SMOKE_RL_STEPS,
                eval_episodes=1,
            ),
            smoke_dir,
        )
        context["rl_models"] = str(smoke_dir)
    specs = [resolve_policy(p) for p in settings.policies]
    for spec in specs:
        if spec.rl_algo is not None:
            meta_path = Path(context["rl_models"] or ".") / f"{spec.rl_algo}.json"
            if meta_path.is_file():
                context["rl_meta"][spec.rl_algo] = json.loads(meta_path.read_text())
    conditions = resolve_conditions(settings.conditions)
    records: list[dict[str, Any]] = []
    for condition in conditions:
        for control in sorted({s.control for s in specs}):
            env = _make_env(settings, control, condition)
            try:
                for spec in (s for s in specs if s.control == control):
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
                    meta = context["rl_meta"].get(spec.rl_algo or "")
                    if meta:
                        record["training_steps"] = meta.get("control_steps")
                        record["training_policy_steps"] = meta.get("policy_steps")
                        record["training_wall_s"] = meta.get("wall_time_s")
                        if settings.smoke_rl:
                            record["note"] = "smoke model, a few hundred steps: not a result"
                    record["per_episode"] = rows
                    records.append(record)
                    if progress:
                        print(
                            f"  {condition.name:<22} {spec.name:<28} reached 1 cm "
                            f"{record['success_1cm'] * 100:3.0f} %  5 cm "
                            f"{record['success_5cm'] * 100:3.0f} %  final error "
                            f"{(record['final_error_m'] or 0) * 100:6.2f} cm",
                            flush=True,
                        )
            finally:
                env.close()
    p_rank = {s.name: i for i, s in enumerate(specs)}
    c_rank = {c.name: i for i, c in enumerate(conditions)}
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
