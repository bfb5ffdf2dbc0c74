"""Benchmark conditions: the nominal task and seeded perturbations of it.

A condition is a set of env options, a chain of perturbation wrappers and options for the
body model of the model-based policies. Every random draw comes from the env's or a
wrapper's generator, seeded at ``reset(seed)``, so every policy meets the same perturbations.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import gymnasium as gym

from blanket.errors import ConfigError, did_you_mean
from blanket.wrappers.perturbations import (
    CameraDelay,
    CameraDropout,
    MovingTarget,
    Payload,
    RandomPushes,
    SensorNoiseScale,
)

__all__ = ["Condition", "CONDITIONS", "QUICK_CONDITIONS", "resolve_conditions"]


@dataclass(frozen=True)
class Condition:
    """One benchmark condition.

    Attributes
    ----------
    name : str
        Built-in name.
    summary : str
        One line for ``--list`` and the report.
    env_options : mapping
        Extra env constructor keywords (e.g. ``control_hz``).
    wrappers : sequence of callables ``env -> env``
        Perturbation wrappers applied in order.
    model_options : mapping
        Options for the body model of model-based policies (``length_scale``); a policy
        without a body model ignores them (the report notes it).
    """

    name: str
    summary: str
    env_options: Mapping[str, Any] = field(default_factory=dict)
    wrappers: Sequence[Callable[[gym.Env], gym.Env]] = ()
    model_options: Mapping[str, Any] = field(default_factory=dict)

    def wrap(self, env: gym.Env) -> gym.Env:
        for make in self.wrappers:
            env = make(env)
        return env


CONDITIONS: dict[str, Condition] = {
    c.name: c
    for c in (
        Condition("nominal", "the task as specified"),
        Condition(
            "sensor-noise-x3",
            "encoder and pixel noise std x3 (agents assume nominal)",
            wrappers=(lambda e: SensorNoiseScale(e, factor=3.0),),
        ),
        Condition(
            "camera-dropout-30",
            "30 % of camera frames dropped",
            wrappers=(lambda e: CameraDropout(e, probability=0.3),),
        ),
        Condition(
            "camera-delay-2",
            "camera frames delivered 2 frames (67 ms at 30 Hz) late",
            wrappers=(lambda e: CameraDelay(e, frames=2),),
        ),
        Condition(
            "payload-1.5kg",
            "unmodelled 1.5 kg payload at the tool tip",
            wrappers=(lambda e: Payload(e, mass_kg=1.5),),
        ),
        Condition(
            "miscalibrated-lengths",
            "body model's link lengths +3 % (model-based policies)",
            model_options={"length_scale": 1.03},
        ),
        Condition(
            "random-pushes",
            "20 N horizontal pushes at the tip, 0.2 s, 0.5 per second",
            wrappers=(lambda e: RandomPushes(e, force_n=20.0, rate_hz=0.5, duration_s=0.2),),
        ),
        Condition(
            "control-120hz",
            "control and encoders at 120 Hz instead of 240 Hz",
            env_options={"control_hz": 120.0},
        ),
        Condition(
            "moving-target",
            "target cell moves along the bench (+y) at 5 cm/s",
            wrappers=(lambda e: MovingTarget(e, speed_m_s=0.05),),
        ),
    )
}

#: Conditions of ``blanket bench --quick``.
QUICK_CONDITIONS = tuple(CONDITIONS)


def resolve_conditions(names: Sequence[str] | None) -> list[Condition]:
    """Conditions by name (all when None); an unknown name raises a one-line ConfigError."""
    if names is None:
        return list(CONDITIONS.values())
    out = []
    for name in names:
        if name not in CONDITIONS:
            hint = did_you_mean(name, CONDITIONS, n=1, list_valid=True)
            raise ConfigError(f"--conditions: unknown condition {name!r}; {hint}")
        out.append(CONDITIONS[name])
    return out
