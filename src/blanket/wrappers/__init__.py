"""Generic gymnasium wrappers (one import line per wrapper)."""

from __future__ import annotations

from blanket.wrappers.perturbations import (
    CameraDelay,
    CameraDropout,
    EncoderBias,
    FrozenEncoder,
    MovingTarget,
    NoiseBurst,
    Payload,
    RandomPushes,
    SensorNoiseScale,
)
from blanket.wrappers.recorder import Recorder
from blanket.wrappers.safety_limits import SafetyLimits

__all__ = [
    "CameraDelay",
    "CameraDropout",
    "EncoderBias",
    "FrozenEncoder",
    "MovingTarget",
    "NoiseBurst",
    "Payload",
    "RandomPushes",
    "Recorder",
    "SafetyLimits",
    "SensorNoiseScale",
]
