"""Precision-tuning sweeps: vary scenario keys, run trials over seeds, keep the best.

Typical use::

    from blanket.scenario import load_scenario
    from blanket.tune import parse_vary, run_sweep

    result = run_sweep(
        load_scenario("bench.toml"),
        [parse_vary("agent.camera_precision=log:0.01..100:5"),
         parse_vary("agent.goal_precision=log:0.1..10:5")],
        seeds=range(5), objective="min:time_to_success_s", out_dir="sweep-camera",
    )
    result.table          # one row per trial (trials.parquet)
    result.best_scenario  # the scenario written to best.toml

The ``blanket tune`` command wraps :func:`run_sweep`.
"""

from __future__ import annotations

from blanket.tune.search import (
    METRICS,
    SEARCHES,
    Objective,
    SweepResult,
    grid_trials,
    parse_objective,
    random_trials,
    run_sweep,
    trial_key,
)
from blanket.tune.space import ParameterSpec, apply_overrides, check_names, parse_spec, parse_vary

__all__ = [
    "METRICS",
    "SEARCHES",
    "Objective",
    "ParameterSpec",
    "SweepResult",
    "apply_overrides",
    "check_names",
    "grid_trials",
    "parse_objective",
    "parse_spec",
    "parse_vary",
    "random_trials",
    "run_sweep",
    "trial_key",
]
