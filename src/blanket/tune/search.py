"""Which trials a sweep runs: the objective, grid and random search, adaptive search (optuna).

A trial is a mapping from dotted scenario keys to values. Grid and random searches make their
whole trial list up front (random: from ``search_seed``, so the list is the same on every run
and a longer ``--trials`` extends a shorter one). The adaptive search asks optuna's TPE sampler
(Bergstra et al. 2011, "Algorithms for hyper-parameter optimization", NeurIPS) for batches of
trials and tells it the objective of each.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from blanket.errors import ConfigError, did_you_mean
from blanket.tune.space import ParameterSpec

__all__ = [
    "METRICS",
    "OBJECTIVE_ALIASES",
    "SEARCHES",
    "Objective",
    "parse_objective",
    "grid_trials",
    "random_trials",
    "trial_key",
    "optuna_available",
    "AdaptiveSearch",
    "SweepResult",
    "sweep_definition",
    "run_sweep",
]

# Metrics of blanket.runner.summarize a sweep can optimise (timings are kept out: they are not
# reproducible), plus the median over episodes of each episode's median free energy (the
# settled level; an episode's mean is dominated by its first steps' transient).
METRICS = (
    "success_rate",
    "final_error_m",
    "time_to_success_s",
    "contact_rate",
    "safe_stops",
    "final_heading_error_rad",
    "median_free_energy",
)
#: Old objective names still accepted, and the metric they now stand for (with the reason).
OBJECTIVE_ALIASES = {
    "mean_free_energy": (
        "median_free_energy",
        "the per-episode mean of the free energy was dominated by the first steps' transient",
    ),
}
SEARCHES = ("grid", "random", "optuna")


@dataclass(frozen=True)
class Objective:
    """A metric and its direction, written ``max:METRIC`` or ``min:METRIC``."""

    direction: str
    metric: str

    @property
    def text(self) -> str:
        return f"{self.direction}:{self.metric}"

    def score(self, metrics: Mapping[str, Any]) -> float:
        """The metric as a number to minimise; a missing value (no success) scores worst."""
        v = metrics.get(self.metric)
        if v is None or not isinstance(v, int | float) or math.isnan(float(v)):
            return math.inf
        return -float(v) if self.direction == "max" else float(v)

    def sort_key(self, metrics: Mapping[str, Any], index: int) -> tuple[float, float, float, int]:
        """Order trials: objective first, then higher success rate, lower final error, index."""
        sr = metrics.get("success_rate")
        fe = metrics.get("final_error_m")
        return (
            self.score(metrics),
            -(float(sr) if sr is not None else 0.0),
            float(fe) if fe is not None and not math.isnan(float(fe)) else math.inf,
            index,
        )


def parse_objective(text: str) -> Objective:
    """Parse ``--objective``, e.g. ``max:success_rate`` or ``min:time_to_success_s``.

    A name of :data:`OBJECTIVE_ALIASES` (``mean_free_energy``) gives the metric it now stands
    for (``median_free_energy``); ``blanket tune`` prints a note when it does.
    """
    direction, sep, metric = text.strip().partition(":")
    if not sep or direction not in ("max", "min"):
        raise ConfigError(
            f"--objective must be max:METRIC or min:METRIC (e.g. min:time_to_success_s), "
            f"got {text!r}"
        )
    if metric in OBJECTIVE_ALIASES:
        metric = OBJECTIVE_ALIASES[metric][0]
    if metric not in METRICS:
        hint = did_you_mean(metric, METRICS, n=2)
        raise ConfigError(f"--objective metric {metric!r} is unknown; {hint}")
    return Objective(direction, metric)


def grid_trials(specs: Sequence[ParameterSpec]) -> list[dict[str, Any]]:
    """Every combination of the specs' values, the last spec varying fastest."""
    names = [s.name for s in specs]
    return [
        dict(zip(names, combo, strict=True))
        for combo in itertools.product(*(s.values for s in specs))
    ]


def random_trials(specs: Sequence[ParameterSpec], count: int, seed: int) -> list[dict[str, Any]]:
    """``count`` trials drawn independently from ``numpy.random.default_rng(seed)``.

    Draws are made trial by trial, spec by spec, so the first ``k`` trials of a longer list are
    the trials of a shorter one.
    """
    if count < 1:
        raise ConfigError(f"--trials must be >= 1, got {count}")
    rng = np.random.default_rng(seed)
    return [{s.name: s.sample(rng) for s in specs} for _ in range(count)]


def trial_key(overrides: Mapping[str, Any]) -> str:
    """A short stable identifier of a trial's values (the resume journal matches on it)."""
    text = json.dumps({k: overrides[k] for k in sorted(overrides)}, sort_keys=True)
    return hashlib.sha1(text.encode()).hexdigest()[:12]


def optuna_available() -> bool:
    """True when optuna can be imported."""
    try:
        import optuna  # noqa: F401
    except ImportError:
        return False
    return True


class AdaptiveSearch:
    """Batches of trials from optuna's TPE sampler, told the objective of finished trials.

    Parameters
    ----------
    specs : sequence of ParameterSpec
        Ranges become float (or int) distributions (log for ``log:``); lists become choices.
    objective : Objective
        What to optimise.
    seed : int
        Sampler seed; the same seed, batch size and results give the same trials.
    """

    def __init__(self, specs: Sequence[ParameterSpec], objective: Objective, seed: int) -> None:
        if not optuna_available():
            raise ConfigError(
                "--search optuna needs optuna (pip install optuna); use --search grid or random"
            )
        import optuna

        optuna.logging.set_verbosity(optuna.logging.WARNING)
        self.specs = list(specs)
        self.objective = objective
        self._optuna = optuna
        self.distributions: dict[str, Any] = {}
        for s in self.specs:
            if s.scale == "list":
                self.distributions[s.name] = optuna.distributions.CategoricalDistribution(
                    list(s.values)
                )
            elif s.integer:
                self.distributions[s.name] = optuna.distributions.IntDistribution(
                    int(s.low), int(s.high), log=s.scale == "log"
                )
            else:
                self.distributions[s.name] = optuna.distributions.FloatDistribution(
                    float(s.low), float(s.high), log=s.scale == "log"
                )
        sampler = optuna.samplers.TPESampler(seed=seed)
        self.study = optuna.create_study(direction="minimize", sampler=sampler)
        self._pending: dict[str, Any] = {}

    def add_finished(self, overrides: Mapping[str, Any], metrics: Mapping[str, Any]) -> None:
        """Record a trial finished earlier (from the resume journal)."""
        params = {k: overrides[k] for k in self.distributions if k in overrides}
        if len(params) != len(self.distributions):
            return
        value = self.objective.score(metrics)
        trial = self._optuna.trial.create_trial(
            params=params,
            distributions=self.distributions,
            value=value if math.isfinite(value) else 1e300,
        )
        self.study.add_trial(trial)

    def ask(self, count: int) -> list[dict[str, Any]]:
        """The next ``count`` trials."""
        out = []
        for _ in range(count):
            trial = self.study.ask(self.distributions)
            overrides = {k: _plain(trial.params[k]) for k in self.distributions}
            self._pending[trial_key(overrides)] = trial
            out.append(overrides)
        return out

    def tell(self, overrides: Mapping[str, Any], metrics: Mapping[str, Any]) -> None:
        """Report the metrics of a trial given by :meth:`ask`."""
        trial = self._pending.pop(trial_key(overrides), None)
        if trial is None:
            return
        value = self.objective.score(metrics)
        self.study.tell(trial, value if math.isfinite(value) else 1e300)


def _plain(v: Any) -> Any:
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, np.floating):
        return float(v)
    return v


# -- the sweep loop ------------------------------------------------------------------------


@dataclass
class SweepResult:
    """What :func:`run_sweep` leaves: the folder, the trials table and the best trial."""

    out_dir: Any
    table: Any
    best: Mapping[str, Any] | None
    best_scenario: Any
    ran: int
    resumed: int
    files: dict[str, Any]


def sweep_definition(
    scenario: Any,
    specs: Sequence[ParameterSpec],
    seeds: Sequence[int],
    condition: str | None,
    search: str,
    search_seed: int,
    objective: Objective,
) -> dict[str, Any]:
    """The record in ``sweep.json`` a resumed sweep must match (``--trials`` may grow)."""
    definition: dict[str, Any] = {
        "scenario": {
            "name": scenario.name,
            "env": scenario.env,
            "env_options": dict(scenario.env_options),
            "agent": dict(scenario.agent),
            **({"conditions": dict(scenario.conditions)} if scenario.conditions else {}),
        },
        "vary": [s.to_dict() for s in specs],
        "seeds": [int(s) for s in seeds],
        "condition": condition or "nominal",
        "search": search,
    }
    if search != "grid":
        definition["search_seed"] = int(search_seed)
    if search == "optuna":
        definition["objective"] = objective.text
    return definition


def run_sweep(
    scenario: Any,
    specs: Sequence[ParameterSpec],
    *,
    seeds: Sequence[int],
    objective: Objective | str = "max:success_rate",
    search: str = "grid",
    trials: int | None = None,
    search_seed: int = 0,
    engine: str = "local",
    workers: int | None = None,
    address: str | None = None,
    condition: str | None = None,
    out_dir: Any = None,
    overwrite: bool = False,
    progress: bool = True,
    plots: bool = True,
) -> SweepResult:
    """Run a precision sweep over a scenario and write its folder (see ``blanket.tune.results``).

    Parameters
    ----------
    scenario : blanket.scenario.Scenario
        The base scenario; each trial sets the varied dotted keys on a copy.
    specs : sequence of ParameterSpec
        What to vary (:func:`blanket.tune.space.parse_vary`).
    seeds : sequence of int
        Every trial runs one episode per seed.
    objective : Objective or str
        ``max:METRIC`` / ``min:METRIC``; picks ``best.toml`` and drives ``optuna``.
    search : str
        ``grid`` (every combination), ``random`` (``trials`` draws) or ``optuna`` (``trials``
        adaptive trials, asked in batches of the engine's worker count).
    trials : int or None
        Trial count for random/optuna (default 20); ignored by grid.
    search_seed : int
        Seed of the random draws / the optuna sampler.
    engine, workers, address : str, int or None, str or None
        See :func:`blanket.tune.engines.make_engine`.
    condition : str or None
        Perturbation condition (``nominal`` when None).
    out_dir : path
        The sweep folder; a rerun with the same definition resumes, skipping finished trials.
    overwrite : bool
        Clear a folder that holds another sweep (or other files) first.
    progress, plots : bool
        Show a progress bar; write the objective plot.

    Returns
    -------
    SweepResult
    """
    from pathlib import Path

    from blanket.tune import results as res
    from blanket.tune.engines import condition_parts, make_engine
    from blanket.tune.space import check_names

    if isinstance(objective, str):
        objective = parse_objective(objective)
    if search not in SEARCHES:
        raise ConfigError(f"--search must be one of {', '.join(SEARCHES)}, got {search!r}")
    if not specs:
        raise ConfigError("give at least one --vary NAME=SPEC")
    seeds = [int(s) for s in seeds]
    if not seeds or any(s < 0 for s in seeds):
        raise ConfigError(f"seeds must be one or more whole numbers >= 0, got {seeds}")
    check_names(specs, scenario.env, scenario.agent)
    _extra_env, _wrap, model_options = condition_parts(condition, scenario.conditions)
    for s in specs:
        table, key = s.name.split(".", 1)
        if (table == "agent" and key in model_options) or (
            table == "env_options" and key in _extra_env
        ):
            raise ConfigError(
                f"--vary {s.name}: the condition {condition} sets this key itself; "
                "vary another key or use another condition"
            )
    if search == "optuna" and not optuna_available():
        raise ConfigError(
            "--search optuna needs optuna (pip install optuna); use --search grid or random"
        )
    if trials is not None and trials < 1:
        raise ConfigError(f"--trials must be >= 1, got {trials}")
    n_trials = trials or 20
    if out_dir is None:
        import time

        out_dir = Path("blanket-runs") / f"{scenario.name}-sweep-{time.strftime('%Y%m%d-%H%M%S')}"
    definition = sweep_definition(scenario, specs, seeds, condition, search, search_seed, objective)
    out = res.open_sweep_dir(out_dir, definition, overwrite)
    journal = res.Journal(out / res.JOURNAL)
    finished = {r["key"]: r for r in journal.read()}
    names = [s.name for s in specs]
    base = {
        "env": scenario.env,
        "env_options": dict(scenario.env_options),
        "agent": dict(scenario.agent),
        "name": scenario.name,
        "conditions": dict(scenario.conditions),
    }

    def payload(index: int, overrides: Mapping[str, Any]) -> dict[str, Any]:
        return {
            "index": index,
            "key": trial_key(overrides),
            "overrides": dict(overrides),
            "scenario": base,
            "seeds": seeds,
            "condition": condition,
        }

    def record(result: Mapping[str, Any]) -> dict[str, Any]:
        if result.get("error"):
            shown = ", ".join(f"{k}={v!r}" for k, v in result["overrides"].items())
            raise ConfigError(f"trial {result['index']} ({shown}): {result['error']}")
        rec = dict(result)
        rec["condition"] = condition or "nominal"
        journal.append(rec)
        finished[rec["key"]] = rec
        return rec

    if search == "grid":
        wanted = grid_trials(specs)
    elif search == "random":
        wanted = random_trials(specs, n_trials, search_seed)
    else:
        wanted = []
    bar = None
    total = len({trial_key(w) for w in wanted}) if search != "optuna" else n_trials
    resumed = (
        sum(1 for w in wanted if trial_key(w) in finished)
        if search != "optuna"
        else min(len(finished), n_trials)
    )
    if progress:
        from tqdm import tqdm

        bar = tqdm(
            total=total,
            initial=resumed,
            desc=f"{scenario.name} {search}",
            unit="trial",
            dynamic_ncols=True,
            leave=True,
        )
    ran = 0
    best_score = math.inf
    for rec in finished.values():
        best_score = min(best_score, objective.score(rec["metrics"]))

    def tick(rec: Mapping[str, Any]) -> None:
        nonlocal ran, best_score
        ran += 1
        best_score = min(best_score, objective.score(rec["metrics"]))
        if bar is not None:
            bar.update(1)
            if math.isfinite(best_score):
                shown = -best_score if objective.direction == "max" else best_score
                bar.set_postfix_str(f"best {objective.metric} {shown:.4g}")

    eng = make_engine(engine, workers, address)
    try:
        if search != "optuna":
            todo, seen = [], set(finished)
            for i, w in enumerate(wanted):
                k = trial_key(w)
                if k not in seen:
                    seen.add(k)
                    todo.append(payload(i, w))
            for result in eng.imap(todo):
                tick(record(result))
        else:
            adaptive = AdaptiveSearch(specs, objective, search_seed)
            for rec in sorted(finished.values(), key=lambda r: r["index"]):
                adaptive.add_finished(rec["overrides"], rec["metrics"])
            batch = max(1, int(getattr(eng, "workers", None) or 1))
            index = max((int(r["index"]) for r in finished.values()), default=-1) + 1
            stale = 0
            while len(finished) < n_trials:
                asked = adaptive.ask(min(batch, n_trials - len(finished)))
                todo = []
                for overrides in asked:
                    k = trial_key(overrides)
                    if k in finished:  # the sampler repeated itself: reuse the numbers
                        adaptive.tell(overrides, finished[k]["metrics"])
                        continue
                    todo.append(payload(index, overrides))
                    index += 1
                stale = 0 if todo else stale + 1
                if stale >= 20:  # the sampler keeps proposing finished points (a small space)
                    break
                for result in eng.imap(todo):
                    rec = record(result)
                    adaptive.tell(rec["overrides"], rec["metrics"])
                    tick(rec)
    finally:
        eng.close()
        if bar is not None:
            bar.close()

    if search == "optuna":
        kept = list(finished.values())
    else:
        keys = {trial_key(w) for w in wanted}
        kept = [r for r in finished.values() if r["key"] in keys]
    frame = res.records_table(kept, names)
    files: dict[str, Any] = {
        "journal": journal.path,
        "table": res.write_table(frame, out / res.TABLE, definition),
    }
    best = res.best_record(kept, objective)
    best_scenario = None
    if best is not None:
        from blanket.tune.space import apply_overrides

        files["best"] = res.write_best(out, scenario, best, objective, seeds, condition)
        best_scenario = apply_overrides(scenario, best["overrides"], suffix="tuned")
    if plots and kept:
        from blanket.tune.plots import plot_objective

        files["plot"] = plot_objective(
            frame, specs, objective, out / "objective.png", grid=search == "grid"
        )
    return SweepResult(
        out_dir=out,
        table=frame,
        best=best,
        best_scenario=best_scenario,
        ran=ran,
        resumed=resumed,
        files=files,
    )
