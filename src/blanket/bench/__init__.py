"""Benchmark: active inference against classical and RL baselines, same loop, same seeds.

- :mod:`blanket.bench.conditions` -- the nominal task and its seeded perturbations
- :mod:`blanket.bench.policies` -- built-in policies (active inference, classical, RL)
- :mod:`blanket.bench.evaluate` -- the episode loop that drives any policy
- :mod:`blanket.bench.metrics` -- per-episode metrics and bootstrap intervals
- :mod:`blanket.bench.suite` -- :func:`run_benchmark`
- :mod:`blanket.bench.report` -- Markdown tables and charts
- :mod:`blanket.bench.rl` -- SAC / PPO training and the SB3 policy adapter
"""

from __future__ import annotations

from blanket.bench.conditions import CONDITIONS, Condition, resolve_conditions
from blanket.bench.evaluate import EpisodeTrace, PolicyDriver, run_policy_episode
from blanket.bench.policies import POLICIES, ClassicalReach, JointKalmanFilter, resolve_policy
from blanket.bench.suite import BenchSettings, run_benchmark

__all__ = [
    "CONDITIONS",
    "Condition",
    "resolve_conditions",
    "POLICIES",
    "ClassicalReach",
    "JointKalmanFilter",
    "resolve_policy",
    "EpisodeTrace",
    "PolicyDriver",
    "run_policy_episode",
    "BenchSettings",
    "run_benchmark",
]
