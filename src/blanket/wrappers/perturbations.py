"""Perturbation and fault wrappers for the arm envs: noise, camera faults, loads, pushes.

Each wrapper changes what the world does (payload, pushes, a moving target) or what the
sensors report (extra noise, dropped or late camera frames, frozen or biased encoders) and
writes what it injected into ``info["external"]`` as ground truth for logs and scoring:

==================  ==========================================  ==============================
wrapper             ``info["external"]`` key                    value
==================  ==========================================  ==============================
SensorNoiseScale    ``disturbance_noise_factor``                float (total / nominal std)
CameraDropout       ``fault_camera_dropout``                    bool (a fresh frame dropped)
CameraDelay         ``fault_camera_delay_frames``               int (frames late)
Payload             ``disturbance_payload_kg``                  float
RandomPushes        ``disturbance_push_n``                      (3,) world-frame force, N
MovingTarget        ``disturbance_target_velocity_m_s``         (3,) m/s
FrozenEncoder       ``fault_frozen_joint``                      int joint index, -1 when none
EncoderBias         ``fault_encoder_bias_rad``                  (n,) bias added to the angles
NoiseBurst          ``fault_noise_burst_<channel>``             bool (burst under way)
==================  ==========================================  ==============================

The key is present at every step (and at reset) with a neutral value when nothing is
injected, so a log column never has holes.

The wrappers that a condition (:mod:`blanket.conditions`) drives also write their settings
under the condition's parameter names, at every step: ``sensor_noise_scale``,
``camera_dropout_probability``, ``camera_delay_frames``, ``payload_kg``, ``push_magnitude_n``,
``push_rate_hz``, ``push_duration_s`` and ``target_speed_m_s``
(``_PerturbationWrapper.condition_values``).

Random draws come from each wrapper's own generator, seeded at ``reset(seed=s)`` from
``(s, wrapper name)``; the number of draws per step never depends on the state or the
actions, so every policy sees identical perturbations for a given seed. The static
description the agent reads (``env.unwrapped.description``) is never changed: an agent keeps
assuming the nominal noise, rate and body.
"""

from __future__ import annotations

import zlib
from collections import deque
from collections.abc import Sequence
from typing import Any, SupportsFloat

import gymnasium as gym
import numpy as np
from gymnasium.utils import RecordConstructorArgs

from blanket.errors import ConfigError
from blanket.sensors.clip import clip_values

__all__ = [
    "SensorNoiseScale",
    "CameraDropout",
    "CameraDelay",
    "Payload",
    "RandomPushes",
    "MovingTarget",
    "FrozenEncoder",
    "EncoderBias",
    "NoiseBurst",
    "NOISE_CHANNELS",
    "number_in_range",
]

#: Sensor channels a noise wrapper can act on.
NOISE_CHANNELS = ("joint_angle", "joint_velocity", "camera")

_ANGLE = "joint_angle_rad"
_VELOCITY = "joint_velocity_rad_s"
_FRESH = "camera_fresh"


def number_in_range(
    name: str, value: Any, low: float, high: float = np.inf, low_open: bool = False
) -> float:
    """``value`` as a float when it is a finite number in range, else a one-line ConfigError."""
    ok = isinstance(value, int | float | np.number) and not isinstance(value, bool)
    if ok:
        v = float(value)
        ok = np.isfinite(v) and (v > low if low_open else v >= low) and v <= high
    if not ok:
        bracket = "(" if low_open else "["
        upper = "inf)" if not np.isfinite(high) else f"{high:g}]"
        raise ConfigError(f"{name}: must be a number in {bracket}{low:g}, {upper}, got {value!r}")
    return float(value)


def _camera_points(space: gym.spaces.Dict) -> tuple[str, ...]:
    """Names of the camera points of an observation space (``<name>_pixel_px`` keys)."""
    return tuple(
        k[: -len("_pixel_px")]
        for k in space.spaces
        if k.endswith("_pixel_px") and f"{k[: -len('_pixel_px')]}_visible" in space.spaces
    )


class _PerturbationWrapper(gym.Wrapper, RecordConstructorArgs):
    """Common machinery: own seeded generator, step clock, truth keys, observation clipping."""

    #: Keys this wrapper writes into ``info["external"]``.
    truth_keys: tuple[str, ...] = ()
    #: Its settings under the names of :data:`blanket.conditions.PARAMETERS`, written into
    #: ``info["external"]`` at every reset and step (``external.payload_kg`` and so on).
    condition_values: dict[str, Any]

    def __init__(self, env: gym.Env, **recorded: Any) -> None:
        RecordConstructorArgs.__init__(self, **recorded)
        gym.Wrapper.__init__(self, env)
        if not isinstance(env.observation_space, gym.spaces.Dict) or not {
            _ANGLE,
            _VELOCITY,
        } <= set(env.observation_space.spaces):
            raise ConfigError(
                f"{type(self).__name__}: needs an arm env with a Dict observation holding "
                f"{_ANGLE} and {_VELOCITY} (such as blanket/arm-reach-v0)"
            )
        description = getattr(env.unwrapped, "description", None)
        if description is None or not hasattr(description, "control_hz"):
            raise ConfigError(
                f"{type(self).__name__}: env has no description with control_hz "
                "(needs an arm env such as blanket/arm-reach-v0)"
            )
        self._control_hz = float(description.control_hz)
        self._n = int(env.observation_space[_ANGLE].shape[0])
        self._points = _camera_points(env.observation_space)
        self._tag = zlib.crc32(type(self).__name__.encode())
        self._rng: np.random.Generator | None = None
        self._steps = 0
        self.condition_values = {}
        self._box_bounds: list[tuple[str, Any, np.ndarray, np.ndarray]] | None = None

    # -- clock and randomness -----------------------------------------------------------
    @property
    def time_s(self) -> float:
        """Time of the latest observation since reset (s)."""
        return self._steps / self._control_hz

    @property
    def rng(self) -> np.random.Generator:
        if self._rng is None:  # used before any reset: unseeded
            self._rng = np.random.default_rng()
        return self._rng

    def _reseed(self, seed: int | None) -> None:
        if seed is not None:
            self._rng = np.random.default_rng(np.random.SeedSequence([int(seed), self._tag]))
        elif self._rng is None:
            self._rng = np.random.default_rng()

    # -- gym API --------------------------------------------------------------------------
    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[dict[str, Any], dict[str, Any]]:
        obs, info = self.env.reset(seed=seed, options=options)
        self._reseed(seed)
        self._steps = 0
        obs, info = dict(obs), self._with_external(info)
        self._on_reset(obs, info)
        info["external"].update(self.condition_values)
        return self._clip(obs), info

    def step(self, action: Any) -> tuple[dict[str, Any], SupportsFloat, bool, bool, dict[str, Any]]:
        self._before_step()
        obs, reward, terminated, truncated, info = self.env.step(action)
        self._steps += 1
        obs, info = dict(obs), self._with_external(info)
        self._on_step(obs, info)
        info["external"].update(self.condition_values)
        return self._clip(obs), reward, terminated, truncated, info

    # -- hooks --------------------------------------------------------------------------
    def _on_reset(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        self._on_step(obs, info)

    def _before_step(self) -> None:
        pass

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:  # pragma: no cover
        raise NotImplementedError

    # -- helpers ------------------------------------------------------------------------
    @staticmethod
    def _with_external(info: dict[str, Any]) -> dict[str, Any]:
        info = dict(info)
        info["external"] = dict(info.get("external", {}))
        return info

    def _clip(self, obs: dict[str, Any]) -> dict[str, Any]:
        bounds = self._box_bounds
        if bounds is None:  # the Box keys and bounds, found once (the spaces are fixed)
            bounds = self._box_bounds = [
                (key, sub.dtype, sub.low, sub.high)
                for key, sub in self.observation_space.spaces.items()
                if isinstance(sub, gym.spaces.Box)
            ]
        for key, dtype, low, high in bounds:
            if key in obs:
                obs[key] = clip_values(np.asarray(obs[key], dtype=dtype), low, high)
        return obs

    def _nominal_std(self) -> dict[str, float]:
        d = self.env.unwrapped.description
        camera = getattr(d, "camera", None)
        return {
            "joint_angle": float(d.encoder_angle_noise_rad),
            "joint_velocity": float(d.encoder_velocity_noise_rad_s),
            "camera": float(camera.pixel_noise_px) if camera is not None else 0.0,
        }


class _ExtraNoise(_PerturbationWrapper):
    """Adds Gaussian noise so a channel's total std is ``factor`` x nominal while ``active``.

    Independent Gaussians add in variance, so the extra std is ``sqrt(factor^2 - 1)`` x nominal
    (common practice, no source). Encoder noise is drawn every step; camera noise on every
    fresh frame, per watched point, and held between frames as the camera holds its pixels.
    """

    def _setup_noise(self, factors: dict[str, float]) -> None:
        nominal = self._nominal_std()
        self._extra_std = {
            ch: nominal[ch] * np.sqrt(max(f * f - 1.0, 0.0)) for ch, f in factors.items()
        }
        self._pixel_offset = {p: np.zeros(2) for p in self._points}

    def _active(self, channel: str) -> bool:
        return True

    def _add_noise(self, obs: dict[str, Any]) -> None:
        draws = self.rng.normal(0.0, 1.0, size=(2, self._n))  # drawn every step
        for row, (channel, key) in enumerate(
            (("joint_angle", _ANGLE), ("joint_velocity", _VELOCITY))
        ):
            if channel in self._extra_std and self._active(channel):
                obs[key] = np.asarray(obs[key], dtype=float) + self._extra_std[channel] * draws[row]
        if "camera" not in self._extra_std or not self._points:
            return
        if int(obs.get(_FRESH, 0)):
            pix = self.rng.normal(0.0, 1.0, size=(len(self._points), 2))  # every fresh frame
            active = self._active("camera")
            for i, point in enumerate(self._points):
                if int(obs[f"{point}_visible"]):
                    self._pixel_offset[point] = (
                        self._extra_std["camera"] * pix[i] if active else np.zeros(2)
                    )
        for point in self._points:
            key = f"{point}_pixel_px"
            obs[key] = np.asarray(obs[key], dtype=float) + self._pixel_offset[point]

    def _on_reset(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        self._pixel_offset = {p: np.zeros(2) for p in self._points}
        self._on_step(obs, info)


class SensorNoiseScale(_ExtraNoise):
    """Scale the sensor noise: total std = ``factor`` x the nominal std on every channel.

    The nominal stds are read from ``env.unwrapped.description`` (encoder angle and velocity,
    camera pixels); the description itself is left unchanged, so an agent keeps assuming the
    nominal noise.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env (``blanket/arm-reach-v0``, ``blanket/planar-2link-v0``) or a wrapper of one.
    factor : float
        Total / nominal noise std, >= 1.
    channels : sequence of str
        Channels to act on, a subset of ``("joint_angle", "joint_velocity", "camera")``.
    """

    truth_keys = ("disturbance_noise_factor",)

    def __init__(
        self, env: gym.Env, factor: float = 3.0, channels: Sequence[str] = NOISE_CHANNELS
    ) -> None:
        super().__init__(env, factor=factor, channels=tuple(channels))
        self.factor = number_in_range("factor", factor, 1.0)
        channels = tuple(channels)
        bad = [c for c in channels if c not in NOISE_CHANNELS]
        if bad or not channels:
            raise ConfigError(
                f"channels: must be a non-empty subset of {', '.join(NOISE_CHANNELS)}, "
                f"got {list(channels)!r}"
            )
        self.channels = channels
        self._setup_noise(dict.fromkeys(channels, self.factor))
        self.condition_values = {"sensor_noise_scale": self.factor}

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        self._add_noise(obs)
        info["external"]["disturbance_noise_factor"] = self.factor


class NoiseBurst(_ExtraNoise):
    """A burst of extra noise on one sensor channel: total std ``factor`` x nominal.

    Active for observations with ``start_s <= t < start_s + duration_s``; camera pixels taken
    during the burst stay noisy until the next fresh frame, as the camera holds its pixels.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env.
    channel : {"joint_angle", "joint_velocity", "camera"}
        The channel hit by the burst.
    factor : float
        Total / nominal std during the burst, >= 1.
    start_s, duration_s : float
        Burst start (>= 0) and length (> 0), seconds from reset.
    """

    def __init__(
        self,
        env: gym.Env,
        channel: str = "joint_angle",
        factor: float = 10.0,
        start_s: float = 1.0,
        duration_s: float = 0.5,
    ) -> None:
        super().__init__(
            env, channel=channel, factor=factor, start_s=start_s, duration_s=duration_s
        )
        if channel not in NOISE_CHANNELS:
            raise ConfigError(
                f"channel: must be one of {', '.join(NOISE_CHANNELS)}, got {channel!r}"
            )
        self.channel = channel
        self.factor = number_in_range("factor", factor, 1.0)
        self.start_s = number_in_range("start_s", start_s, 0.0)
        self.duration_s = number_in_range("duration_s", duration_s, 0.0, low_open=True)
        self.truth_keys = (f"fault_noise_burst_{channel}",)
        self._setup_noise({channel: self.factor})

    def _active(self, channel: str) -> bool:
        # Half a step of slack so that float time and whole steps agree at the edges.
        t, eps = self.time_s, 0.5 / self._control_hz
        return self.start_s - eps <= t < self.start_s + self.duration_s - eps

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        self._add_noise(obs)
        info["external"][self.truth_keys[0]] = bool(self._active(self.channel))


class _CameraFrames(_PerturbationWrapper):
    """Helpers for wrappers that hold or replay camera frames."""

    def _frame(self, obs: dict[str, Any]) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for p in self._points:
            out[f"{p}_pixel_px"] = np.array(obs[f"{p}_pixel_px"], dtype=float)
            out[f"{p}_visible"] = int(obs[f"{p}_visible"])
        return out

    @staticmethod
    def _put(obs: dict[str, Any], frame: dict[str, Any], fresh: bool) -> None:
        for key, value in frame.items():
            obs[key] = value.copy() if isinstance(value, np.ndarray) else value
        obs[_FRESH] = int(fresh)


class CameraDropout(_CameraFrames):
    """Drop fresh camera frames with probability ``probability``.

    A dropped frame reports ``camera_fresh = 0`` and the pixels and visibility flags of the
    last delivered frame. The frame of ``reset`` is always delivered. One uniform number is
    drawn per step, fresh frame or not.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env.
    probability : float
        Drop probability of each fresh frame, in [0, 1].
    """

    truth_keys = ("fault_camera_dropout",)

    def __init__(self, env: gym.Env, probability: float = 0.3) -> None:
        super().__init__(env, probability=probability)
        self.probability = number_in_range("probability", probability, 0.0, 1.0)
        self.condition_values = {"camera_dropout_probability": self.probability}
        if _FRESH not in env.observation_space.spaces or not self._points:
            raise ConfigError("CameraDropout: env observation has no camera (camera_fresh)")
        self._delivered: dict[str, Any] = {}

    def _on_reset(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        self._delivered = self._frame(obs)
        info["external"]["fault_camera_dropout"] = False

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        u = float(self.rng.random())
        fresh = bool(int(obs[_FRESH]))
        dropped = fresh and u < self.probability
        if fresh and not dropped:
            self._delivered = self._frame(obs)
        else:  # between frames the env holds the newest frame, delivered or not
            self._put(obs, self._delivered, fresh=False)
        info["external"]["fault_camera_dropout"] = dropped


class CameraDelay(_CameraFrames):
    """Deliver camera frames ``frames`` camera frames late.

    Each fresh frame of the env is queued; the frame delivered at that step (with
    ``camera_fresh = 1``) is the one taken ``frames`` frames earlier. Before the episode the
    arm rests where ``reset`` put it, so the queue starts filled with the reset frame. Between
    frames the delivered pixels hold.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env.
    frames : int
        Delay in camera frames, >= 0 (0 leaves the camera untouched).
    """

    truth_keys = ("fault_camera_delay_frames",)

    def __init__(self, env: gym.Env, frames: int = 2) -> None:
        super().__init__(env, frames=frames)
        if not isinstance(frames, int | np.integer) or isinstance(frames, bool) or frames < 0:
            raise ConfigError(f"frames: must be a whole number >= 0, got {frames!r}")
        if _FRESH not in env.observation_space.spaces or not self._points:
            raise ConfigError("CameraDelay: env observation has no camera (camera_fresh)")
        self.frames = int(frames)
        self.condition_values = {"camera_delay_frames": self.frames}
        self._queue: deque[dict[str, Any]] = deque(maxlen=self.frames + 1)
        self._delivered: dict[str, Any] = {}

    def _on_reset(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        first = self._frame(obs)
        self._queue = deque([first] * (self.frames + 1), maxlen=self.frames + 1)
        self._delivered = first
        info["external"]["fault_camera_delay_frames"] = self.frames

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        if int(obs[_FRESH]):
            self._queue.append(self._frame(obs))
            self._delivered = self._queue[0]
            self._put(obs, self._delivered, fresh=True)
        else:
            self._put(obs, self._delivered, fresh=False)
        info["external"]["fault_camera_delay_frames"] = self.frames


class Payload(_PerturbationWrapper):
    """Carry a payload: ``env.unwrapped.set_payload(mass_kg)`` at every reset.

    The mass sits at the tool tip link in the simulation only; the agent's body model does
    not know it.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env with a ``set_payload`` hook.
    mass_kg : float
        Payload mass, >= 0 kg.
    """

    truth_keys = ("disturbance_payload_kg",)

    def __init__(self, env: gym.Env, mass_kg: float = 1.5) -> None:
        super().__init__(env, mass_kg=mass_kg)
        self.mass_kg = number_in_range("mass_kg", mass_kg, 0.0)
        self.condition_values = {"payload_kg": self.mass_kg}
        if not hasattr(env.unwrapped, "set_payload"):
            raise ConfigError("Payload: env has no set_payload hook")

    def reset(self, *, seed: int | None = None, options: dict[str, Any] | None = None):
        # Before the env's reset (so the first observation is taken with it) and again after
        # (should the env's reset ever clear it).
        self.env.unwrapped.set_payload(self.mass_kg)
        out = super().reset(seed=seed, options=options)
        self.env.unwrapped.set_payload(self.mass_kg)
        return out

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        info["external"]["disturbance_payload_kg"] = self.mass_kg


class RandomPushes(_PerturbationWrapper):
    """Seeded random pushes at the tool tip.

    At reset a schedule is drawn for the whole episode: push starts form a Poisson process of
    rate ``rate_hz`` (exponential gaps, counted from the end of the previous push so pushes
    never overlap), each push has magnitude ``force_n`` in a uniformly random horizontal
    direction (``direction="horizontal"``) or uniformly on the sphere (``"any"``), and lasts
    ``duration_s``. A push is applied with ``env.unwrapped.apply_push`` before the step it
    starts in.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env with an ``apply_push`` hook.
    force_n : float
        Push magnitude, >= 0 N.
    rate_hz : float
        Mean number of pushes per second, > 0.
    duration_s : float
        Length of each push, > 0 s.
    direction : {"horizontal", "any"}
        Distribution of push directions.
    """

    truth_keys = ("disturbance_push_n",)
    DIRECTIONS = ("horizontal", "any")

    def __init__(
        self,
        env: gym.Env,
        force_n: float = 20.0,
        rate_hz: float = 0.5,
        duration_s: float = 0.2,
        direction: str = "horizontal",
    ) -> None:
        super().__init__(
            env, force_n=force_n, rate_hz=rate_hz, duration_s=duration_s, direction=direction
        )
        self.force_n = number_in_range("force_n", force_n, 0.0)
        self.rate_hz = number_in_range("rate_hz", rate_hz, 0.0, low_open=True)
        self.duration_s = number_in_range("duration_s", duration_s, 0.0, low_open=True)
        self.condition_values = {
            "push_magnitude_n": self.force_n,
            "push_rate_hz": self.rate_hz,
            "push_duration_s": self.duration_s,
        }
        if direction not in self.DIRECTIONS:
            raise ConfigError(
                f"direction: must be one of {', '.join(self.DIRECTIONS)}, got {direction!r}"
            )
        self.direction = direction
        if not hasattr(env.unwrapped, "apply_push"):
            raise ConfigError("RandomPushes: env has no apply_push hook")
        self._duration_steps = max(1, int(round(self.duration_s * self._control_hz)))
        self.schedule: list[tuple[int, np.ndarray]] = []
        self._active_force = np.zeros(3)
        self._ends_at = -1

    def _horizon_steps(self) -> int:
        steps = getattr(self.env.unwrapped, "max_steps", None)
        if steps is None:
            d = self.env.unwrapped.description
            steps = int(round(float(getattr(d, "episode_s", 10.0)) * self._control_hz))
        return int(steps)

    def draw_schedule(self) -> list[tuple[int, np.ndarray]]:
        """Push start steps and forces for one episode from the wrapper's generator."""
        horizon = self._horizon_steps()
        schedule: list[tuple[int, np.ndarray]] = []
        t = 0.0
        while True:
            gap, angle, u, w = self.rng.exponential(1.0 / self.rate_hz), *self.rng.random(3)
            t += gap
            start = int(round(t * self._control_hz))
            if start >= horizon:
                break
            if self.direction == "horizontal":
                unit = np.array([np.cos(2 * np.pi * angle), np.sin(2 * np.pi * angle), 0.0])
            else:  # uniform on the sphere: z uniform in [-1, 1], azimuth uniform
                z = 2.0 * u - 1.0
                r = np.sqrt(max(0.0, 1.0 - z * z))
                unit = np.array([r * np.cos(2 * np.pi * w), r * np.sin(2 * np.pi * w), z])
            schedule.append((start, self.force_n * unit))
            t = (start + self._duration_steps) / self._control_hz
        return schedule

    def _on_reset(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        self.schedule = self.draw_schedule()
        self._next = 0
        self._active_force = np.zeros(3)
        self._ends_at = -1
        info["external"]["disturbance_push_n"] = np.zeros(3)

    def _before_step(self) -> None:
        k = self._steps  # index of the step about to run
        if self._next < len(self.schedule) and self.schedule[self._next][0] == k:
            force = self.schedule[self._next][1]
            self.env.unwrapped.apply_push(force, self._duration_steps / self._control_hz)
            self._active_force = force.copy()
            self._ends_at = k + self._duration_steps
            self._next += 1
        elif k >= self._ends_at:
            self._active_force = np.zeros(3)

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        info["external"]["disturbance_push_n"] = self._active_force.copy()


class MovingTarget(_PerturbationWrapper):
    """The target (a tray cell on a conveyor) moves at constant velocity along the bench.

    Sets ``env.unwrapped.set_target_velocity`` at every reset.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env with a ``set_target_velocity`` hook.
    speed_m_s : float
        Target speed, >= 0 m/s.
    direction : {"+y", "-y", "random"} or sequence of 3 floats
        Along the bench (+y or -y in the base frame), ``"random"`` for a seeded choice of +y or
        -y per episode, or any direction vector (normalised).
    """

    truth_keys = ("disturbance_target_velocity_m_s",)
    DIRECTIONS = ("+y", "-y", "random")

    def __init__(
        self, env: gym.Env, speed_m_s: float = 0.05, direction: str | Sequence[float] = "+y"
    ) -> None:
        super().__init__(env, speed_m_s=speed_m_s, direction=direction)
        self.speed_m_s = number_in_range("speed_m_s", speed_m_s, 0.0)
        self.condition_values = {"target_speed_m_s": self.speed_m_s}
        if isinstance(direction, str):
            if direction not in self.DIRECTIONS:
                raise ConfigError(
                    f"direction: must be one of {', '.join(self.DIRECTIONS)} or "
                    f"3 numbers, got {direction!r}"
                )
            self._unit = (
                None
                if direction == "random"
                else np.array([0.0, 1.0 if direction == "+y" else -1.0, 0.0])
            )
        else:
            vec = np.asarray(direction, dtype=float)
            if vec.shape != (3,) or not np.all(np.isfinite(vec)) or np.linalg.norm(vec) == 0:
                raise ConfigError(
                    f"direction: must be 3 finite numbers, not all zero, got {direction!r}"
                )
            self._unit = vec / np.linalg.norm(vec)
        self.direction = direction
        if not hasattr(env.unwrapped, "set_target_velocity"):
            raise ConfigError("MovingTarget: env has no set_target_velocity hook")
        self.velocity_m_s = np.zeros(3)

    def reset(self, *, seed: int | None = None, options: dict[str, Any] | None = None):
        obs, info = super().reset(seed=seed, options=options)
        sign = 1.0 if self.rng.random() < 0.5 else -1.0  # drawn every reset
        unit = np.array([0.0, sign, 0.0]) if self._unit is None else self._unit
        self.velocity_m_s = self.speed_m_s * unit
        self.env.unwrapped.set_target_velocity(self.velocity_m_s)
        info["external"]["disturbance_target_velocity_m_s"] = self.velocity_m_s.copy()
        return obs, info

    def _on_reset(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        pass

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        info["external"]["disturbance_target_velocity_m_s"] = self.velocity_m_s.copy()


def _joint_index(joint: Any, n: int) -> int:
    if not isinstance(joint, int | np.integer) or isinstance(joint, bool) or not 0 <= joint < n:
        raise ConfigError(f"joint: must be a whole number in [0, {n - 1}], got {joint!r}")
    return int(joint)


class FrozenEncoder(_PerturbationWrapper):
    """From ``start_s`` on, one joint's encoder readings (angle and velocity) freeze.

    The first observation at or after ``start_s`` repeats the reading before it (the reset
    reading when ``start_s = 0``), and so does every later one.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env.
    joint : int
        Index of the joint in the observation order.
    start_s : float
        Time of the fault, >= 0 s from reset.
    """

    truth_keys = ("fault_frozen_joint",)

    def __init__(self, env: gym.Env, joint: int = 0, start_s: float = 1.0) -> None:
        super().__init__(env, joint=joint, start_s=start_s)
        self.joint = _joint_index(joint, self._n)
        self.start_s = number_in_range("start_s", start_s, 0.0)
        self._held: tuple[float, float] | None = None

    def _frozen(self) -> bool:
        return self.time_s >= self.start_s - 0.5 / self._control_hz

    def _on_reset(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        self._held = None
        self._on_step(obs, info)

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        j = self.joint
        angle = np.array(obs[_ANGLE], dtype=float)
        velocity = np.array(obs[_VELOCITY], dtype=float)
        frozen = self._frozen()
        if frozen and self._held is not None:
            angle[j], velocity[j] = self._held
        else:
            self._held = (float(angle[j]), float(velocity[j]))
        obs[_ANGLE], obs[_VELOCITY] = angle, velocity
        info["external"]["fault_frozen_joint"] = j if frozen else -1


class EncoderBias(_PerturbationWrapper):
    """A step bias on one joint's angle reading from ``start_s`` on.

    Parameters
    ----------
    env : gymnasium.Env
        An arm env.
    joint : int
        Index of the joint in the observation order.
    bias_rad : float
        Added to the angle reading (rad).
    start_s : float
        Time of the step, >= 0 s from reset.
    """

    truth_keys = ("fault_encoder_bias_rad",)

    def __init__(
        self, env: gym.Env, joint: int = 0, bias_rad: float = 0.05, start_s: float = 1.0
    ) -> None:
        super().__init__(env, joint=joint, bias_rad=bias_rad, start_s=start_s)
        self.joint = _joint_index(joint, self._n)
        self.bias_rad = number_in_range("bias_rad", bias_rad, -np.inf)
        self.start_s = number_in_range("start_s", start_s, 0.0)

    def _on_step(self, obs: dict[str, Any], info: dict[str, Any]) -> None:
        bias = np.zeros(self._n)
        if self.time_s >= self.start_s - 0.5 / self._control_hz:
            bias[self.joint] = self.bias_rad
        obs[_ANGLE] = np.asarray(obs[_ANGLE], dtype=float) + bias
        info["external"]["fault_encoder_bias_rad"] = bias
