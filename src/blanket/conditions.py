"""Conditions: one vocabulary of perturbation parameters for scenarios, the benchmark and sweeps.

A *condition* is a mapping of the parameters below to values. A scenario file's
``[conditions]`` table, the benchmark's named conditions (:data:`PRESETS`, e.g.
``payload-1.5kg``) and ``blanket tune --condition`` all use these names:

==============================  ======  ============  ==================================
parameter                       unit    allowed       drives (wrapper in blanket.wrappers)
==============================  ======  ============  ==================================
``payload_kg``                  kg      [0, 50]       ``Payload``
``sensor_noise_scale``          --      [1, 100]      ``SensorNoiseScale``
``camera_dropout_probability``  --      [0, 1]        ``CameraDropout``
``camera_delay_frames``         frames  0 .. 30       ``CameraDelay``
``push_magnitude_n``            N       [0, 500]      ``RandomPushes``
``push_rate_hz``                Hz      (0, 10]       same (with ``push_magnitude_n``)
``push_duration_s``             s       (0, 5]        same (with ``push_magnitude_n``)
``target_speed_m_s``            m/s     [0, 1]        ``MovingTarget`` (+y)
``control_hz``                  Hz      [10, 2000]    the env option ``control_hz``
``model_length_scale``          --      [0.5, 2]      body model option ``length_scale``
==============================  ======  ============  ==================================

The upper bounds keep a run finite and the physics meaningful (common practice, no source).
World-side parameters become wrappers around the env (:func:`apply_conditions`); ``control_hz``
is an env constructor keyword (:func:`condition_env_options`, given to the env when it is
made); ``model_length_scale`` is an option of model-based agents' body models (returned by
:func:`apply_conditions` as ``length_scale``; a policy without a body model ignores it).

Every applied value appears in ``info["external"]`` under its parameter name (the perturbation
wrappers write their own; ``control_hz`` and ``model_length_scale`` are written by a small
recording wrapper), so the trajectory logs carry ``external.payload_kg`` and so on.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import gymnasium as gym
import numpy as np

from blanket.errors import ConfigError, did_you_mean, shorten
from blanket.wrappers.perturbations import (
    CameraDelay,
    CameraDropout,
    MovingTarget,
    Payload,
    RandomPushes,
    SensorNoiseScale,
    number_in_range,
)

__all__ = [
    "ConditionParameter",
    "PARAMETERS",
    "Condition",
    "PRESETS",
    "check_conditions",
    "condition_env_options",
    "condition_model_options",
    "apply_conditions",
    "resolve_conditions",
    "parse_condition",
]


@dataclass(frozen=True)
class ConditionParameter:
    """One perturbation parameter: its name, unit, allowed range and what it drives.

    Attributes
    ----------
    name : str
        Key in a ``[conditions]`` table and in ``info["external"]``.
    summary : str
        One line for help texts.
    low, high : float
        Allowed range (``low`` excluded when ``low_open``).
    low_open : bool
        Whether ``low`` itself is refused.
    whole : bool
        Whether only whole numbers are allowed.
    drives : str
        The wrapper, env option or body-model option the parameter sets.
    """

    name: str
    summary: str
    low: float
    high: float
    low_open: bool = False
    whole: bool = False
    drives: str = ""

    def check(self, value: Any, where: str = "conditions") -> float | int:
        """``value`` as a float (an int when ``whole``); ConfigError naming the range."""
        label = f"{where}.{self.name}"
        if self.whole:
            if (
                not isinstance(value, int | np.integer)
                or isinstance(value, bool)
                or not self.low <= value <= self.high
            ):
                raise ConfigError(
                    f"{label}: must be a whole number in {self.low:g}..{self.high:g}, "
                    f"got {shorten(value)}"
                )
            return int(value)
        return number_in_range(label, value, self.low, self.high, low_open=self.low_open)


def _parameters(*items: ConditionParameter) -> dict[str, ConditionParameter]:
    return {p.name: p for p in items}


#: The condition vocabulary (see the module docstring).
PARAMETERS: dict[str, ConditionParameter] = _parameters(
    ConditionParameter(
        "payload_kg", "unmodelled mass at the tool tip, kg", 0.0, 50.0, drives="Payload"
    ),
    ConditionParameter(
        "sensor_noise_scale",
        "sensor noise std / nominal std (agents assume nominal)",
        1.0,
        100.0,
        drives="SensorNoiseScale",
    ),
    ConditionParameter(
        "camera_dropout_probability",
        "share of camera frames dropped",
        0.0,
        1.0,
        drives="CameraDropout",
    ),
    ConditionParameter(
        "camera_delay_frames",
        "camera frames delivered this many frames late",
        0,
        30,
        whole=True,
        drives="CameraDelay",
    ),
    ConditionParameter(
        "push_magnitude_n",
        "horizontal pushes at the tool tip, N",
        0.0,
        500.0,
        drives="RandomPushes",
    ),
    ConditionParameter(
        "push_rate_hz",
        "mean pushes per second (default 0.5)",
        0.0,
        10.0,
        low_open=True,
        drives="RandomPushes",
    ),
    ConditionParameter(
        "push_duration_s",
        "length of each push, s (default 0.2)",
        0.0,
        5.0,
        low_open=True,
        drives="RandomPushes",
    ),
    ConditionParameter(
        "target_speed_m_s",
        "target cell moves along the bench (+y), m/s",
        0.0,
        1.0,
        drives="MovingTarget",
    ),
    ConditionParameter(
        "control_hz",
        "control and encoder rate, Hz (the env option)",
        10.0,
        2000.0,
        drives="env option control_hz",
    ),
    ConditionParameter(
        "model_length_scale",
        "factor on the body model's link lengths (model-based policies)",
        0.5,
        2.0,
        drives="body model option length_scale",
    ),
)

#: Push parameters that only mean something with ``push_magnitude_n``: RandomPushes keywords
#: (RandomPushes' own defaults when not given).
_PUSH_DETAILS = {"push_rate_hz": "rate_hz", "push_duration_s": "duration_s"}
#: Parameters that are not env wrappers: where they go instead.
_ENV_OPTIONS = {"control_hz": "control_hz"}
_MODEL_OPTIONS = {"model_length_scale": "length_scale"}


def check_conditions(values: Mapping[str, Any] | None, where: str = "conditions") -> dict[str, Any]:
    """Validated copy of a condition mapping (parameter order of :data:`PARAMETERS`).

    Raises
    ------
    ConfigError
        One line: an unknown name (with the closest valid names), a value out of its range,
        or push details without ``push_magnitude_n``.
    """
    if values is None:
        return {}
    if not isinstance(values, Mapping):
        raise ConfigError(f"{where}: must be a table of parameter = value, got {shorten(values)}")
    for name in values:
        if name not in PARAMETERS:
            raise ConfigError(
                f"{where}: unknown condition {shorten(name)}; {did_you_mean(str(name), PARAMETERS)}"
            )
    out = {name: p.check(values[name], where) for name, p in PARAMETERS.items() if name in values}
    for name in _PUSH_DETAILS:
        if name in out and "push_magnitude_n" not in out:
            raise ConfigError(f"{where}.{name}: only together with push_magnitude_n")
    return out


def condition_env_options(values: Mapping[str, Any] | None) -> dict[str, Any]:
    """Env constructor keywords a condition sets (``control_hz``): give them to the env."""
    checked = check_conditions(values)
    return {option: checked[name] for name, option in _ENV_OPTIONS.items() if name in checked}


def condition_model_options(values: Mapping[str, Any] | None) -> dict[str, Any]:
    """Body-model options a condition sets (``length_scale``) for model-based agents."""
    checked = check_conditions(values)
    return {option: checked[name] for name, option in _MODEL_OPTIONS.items() if name in checked}


class _RecordValues(gym.Wrapper):
    """Writes condition values that no perturbation wrapper holds into ``info["external"]``."""

    def __init__(self, env: gym.Env, values: Mapping[str, Any]) -> None:
        super().__init__(env)
        self.values = dict(values)

    def _record(self, info: dict[str, Any]) -> dict[str, Any]:
        info = dict(info)
        info["external"] = {**info.get("external", {}), **self.values}
        return info

    def reset(self, **kwargs: Any) -> tuple[Any, dict[str, Any]]:
        obs, info = self.env.reset(**kwargs)
        return obs, self._record(info)

    def step(self, action: Any) -> tuple[Any, Any, bool, bool, dict[str, Any]]:
        obs, reward, terminated, truncated, info = self.env.step(action)
        return obs, reward, terminated, truncated, self._record(info)


def apply_conditions(
    env: gym.Env, values: Mapping[str, Any] | None
) -> tuple[gym.Env, dict[str, Any]]:
    """Wrap ``env`` in the perturbation wrappers of a condition.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env (or a wrapper of one) made with :func:`condition_env_options` among its
        keywords. Apply the safety wrapper *after* this (outermost, directly under the policy).
    values : mapping
        Condition parameters (see :data:`PARAMETERS`); empty or None changes nothing.

    Returns
    -------
    env : gymnasium.Env
        The wrapped env: world perturbations (payload, pushes, moving target) innermost, then
        sensor perturbations (noise, delay, dropout).
    model_options : dict
        Body-model options for model-based agents (``length_scale``).

    Raises
    ------
    ConfigError
        A bad mapping (see :func:`check_conditions`), or an env made with another
        ``control_hz`` than the condition's.
    """
    checked = check_conditions(values)
    for name, option in _ENV_OPTIONS.items():
        if name in checked:
            made = float(getattr(env.unwrapped.description, option))
            if made != float(checked[name]):
                raise ConfigError(
                    f"conditions.{name}: the env was made with {option} = {made:g}, the "
                    f"condition asks for {checked[name]:g} (pass condition_env_options to the env)"
                )
    if "payload_kg" in checked:
        env = Payload(env, mass_kg=checked["payload_kg"])
    if "push_magnitude_n" in checked:
        details = {arg: checked[k] for k, arg in _PUSH_DETAILS.items() if k in checked}
        env = RandomPushes(env, force_n=checked["push_magnitude_n"], **details)
    if "target_speed_m_s" in checked:
        env = MovingTarget(env, speed_m_s=checked["target_speed_m_s"])
    if "sensor_noise_scale" in checked:
        env = SensorNoiseScale(env, factor=checked["sensor_noise_scale"])
    if "camera_delay_frames" in checked:
        env = CameraDelay(env, frames=checked["camera_delay_frames"])
    if "camera_dropout_probability" in checked:
        env = CameraDropout(env, probability=checked["camera_dropout_probability"])
    recorded = {k: checked[k] for k in (*_ENV_OPTIONS, *_MODEL_OPTIONS) if k in checked}
    if recorded:
        env = _RecordValues(env, recorded)
    return env, condition_model_options(checked)


@dataclass(frozen=True)
class Condition:
    """A named condition: a preset mapping of :data:`PARAMETERS`.

    Attributes
    ----------
    name : str
        Preset name (``blanket bench --conditions``, ``blanket tune --condition``).
    summary : str
        One line for ``--list`` and the report.
    parameters : mapping
        The condition's parameter values (checked when the preset is made).
    """

    name: str
    summary: str
    parameters: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "parameters", check_conditions(self.parameters, self.name))

    @property
    def env_options(self) -> dict[str, Any]:
        """Env constructor keywords of this condition (``control_hz``)."""
        return condition_env_options(self.parameters)

    @property
    def model_options(self) -> dict[str, Any]:
        """Body-model options of this condition (``length_scale``)."""
        return condition_model_options(self.parameters)

    def wrap(self, env: gym.Env) -> gym.Env:
        """``env`` in this condition's perturbation wrappers (:func:`apply_conditions`)."""
        return apply_conditions(env, self.parameters)[0]


#: The benchmark's named conditions.
PRESETS: dict[str, Condition] = {
    c.name: c
    for c in (
        Condition("nominal", "the task as specified"),
        Condition(
            "sensor-noise-x3",
            "encoder and pixel noise std x3 (agents assume nominal)",
            {"sensor_noise_scale": 3.0},
        ),
        Condition(
            "camera-dropout-30",
            "30 % of camera frames dropped",
            {"camera_dropout_probability": 0.3},
        ),
        Condition(
            "camera-delay-2",
            "camera frames delivered 2 frames (67 ms at 30 Hz) late",
            {"camera_delay_frames": 2},
        ),
        Condition(
            "payload-1.5kg", "unmodelled 1.5 kg payload at the tool tip", {"payload_kg": 1.5}
        ),
        Condition(
            "miscalibrated-lengths",
            "body model's link lengths +3 % (model-based policies)",
            {"model_length_scale": 1.03},
        ),
        Condition(
            "random-pushes",
            "20 N horizontal pushes at the tip, 0.2 s, 0.5 per second",
            {"push_magnitude_n": 20.0, "push_rate_hz": 0.5, "push_duration_s": 0.2},
        ),
        Condition(
            "control-120hz",
            "control and encoders at 120 Hz instead of 240 Hz",
            {"control_hz": 120.0},
        ),
        Condition(
            "moving-target",
            "target cell moves along the bench (+y) at 5 cm/s",
            {"target_speed_m_s": 0.05},
        ),
    )
}


def resolve_conditions(
    names: Sequence[str] | None, option: str = "--conditions"
) -> list[Condition]:
    """Presets by name (all when None); an unknown name raises a one-line ConfigError."""
    if names is None:
        return list(PRESETS.values())
    out = []
    for name in names:
        if name not in PRESETS:
            raise ConfigError(
                f"{option}: unknown condition {shorten(name)}; {did_you_mean(name, PRESETS)}"
            )
        out.append(PRESETS[name])
    return out


def parse_condition(text: str | None, option: str = "--condition") -> Condition:
    """A preset name, or ``NAME=VALUE[,NAME=VALUE...]`` in the parameter vocabulary.

    ``None`` is the nominal condition. Values are numbers (``camera_delay_frames`` whole).
    """
    if text is None:
        return PRESETS["nominal"]
    if "=" not in text:
        return resolve_conditions([text], option)[0]
    values: dict[str, Any] = {}
    for item in text.split(","):
        name, sep, raw = item.partition("=")
        name, raw = name.strip(), raw.strip()
        if not sep or not name or not raw:
            raise ConfigError(
                f"{option}: expected a condition name or NAME=VALUE[,NAME=VALUE...], "
                f"got {shorten(text)}"
            )
        try:
            number: Any = int(raw)
        except ValueError:
            try:
                number = float(raw)
            except ValueError:
                raise ConfigError(
                    f"{option}: {name} must be a number, got {shorten(raw)}"
                ) from None
        values[name] = number
    return Condition(text, "from the command line", check_conditions(values, option))
