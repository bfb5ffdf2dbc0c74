"""Record any gymnasium loop into a blanket run folder.

:class:`Recorder` writes the same Parquet format as the runner (see
:mod:`blanket.logs.schema`) from the three groups an env wrapper can see:

- ``external.*`` from ``info["external"]`` (plus ``info`` scalars ``distance_m``,
  ``inside_tolerance`` and ``success`` when the env gives them),
- ``sensory.*`` from the observation (a Dict observation keeps its keys, any other
  observation is logged as ``sensory.observation``),
- ``active.*`` from the action (``active.joint_velocity_rad_s`` or
  ``active.joint_torque_n_m`` when the env's description names the control mode, else
  ``active.command``) and, when a safety wrapper reports it in ``info["action_applied"]``,
  the applied action as ``active.applied_<same key>``.

There is no ``internal.*`` group: a wrapper cannot see an agent's beliefs.

Row ``k`` holds the state and sensation the policy saw before its ``k``-th action, and that
action. When the episode ends (next ``reset`` or ``close``) one last row holds the final
state and sensation; its ``active.*`` values are null.
"""

from __future__ import annotations

import dataclasses
import os
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any, SupportsFloat

import gymnasium as gym
import numpy as np

from blanket.logs.writer import RunWriter

__all__ = ["Recorder"]

_INFO_SCALARS = ("distance_m", "inside_tolerance", "success")
_LIFTED_FIELDS = (
    "joint_names",
    "urdf_path",
    "end_effector",
    "control",
    "control_hz",
    "tolerance_m",
    "episode_s",
)


def _loggable(value: Any) -> bool:
    if isinstance(value, (bool, int, float, np.bool_, np.integer, np.floating)):
        return True
    if isinstance(value, np.ndarray):
        return value.ndim <= 2 and value.dtype.kind in "biuf"
    return False


def _filter(values: Mapping[str, Any], dropped: list[str], prefix: str) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in values.items():
        if isinstance(value, Mapping):
            out[str(key)] = _filter(value, dropped, f"{prefix}.{key}")
        elif _loggable(value):
            out[str(key)] = value
        elif isinstance(value, (list, tuple)) and _loggable(np.asarray(value)):
            out[str(key)] = np.asarray(value)
        else:
            dropped.append(f"{prefix}.{key}")
    return out


def _as_group(value: Any, default_key: str, dropped: list[str], prefix: str) -> dict[str, Any]:
    if isinstance(value, Mapping):
        return _filter(value, dropped, prefix)
    if isinstance(value, tuple):
        return _filter({f"item{i}": v for i, v in enumerate(value)}, dropped, prefix)
    return _filter({default_key: np.asarray(value)}, dropped, prefix)


class Recorder(gym.Wrapper, gym.utils.RecordConstructorArgs):
    """Log every step of the wrapped env to ``run_dir`` (one Parquet file per episode).

    Parameters
    ----------
    env : gymnasium.Env
        Any env; blanket envs add truth under ``info["external"]``.
    run_dir : path
        The run folder (see :class:`blanket.logs.RunWriter`); must be new or empty unless
        ``overwrite=True``.
    metadata : dict, optional
        Run metadata, merged over what the wrapper reads from the env (its id, the action
        bounds as ``action_low``/``action_high`` and, from ``env.unwrapped.description``,
        joint names, URDF path, end effector, control mode and rate, tolerance).
    overwrite : bool
        Passed to :class:`~blanket.logs.RunWriter`.

    Notes
    -----
    An episode file is written on the next ``reset`` and on ``close``; call ``close`` (or
    use the env as a context manager) so the last episode is kept.
    """

    def __init__(
        self,
        env: gym.Env,
        run_dir: str | os.PathLike[str],
        metadata: Mapping[str, Any] | None = None,
        *,
        overwrite: bool = False,
    ) -> None:
        gym.utils.RecordConstructorArgs.__init__(
            self, run_dir=str(run_dir), metadata=dict(metadata or {}), overwrite=overwrite
        )
        gym.Wrapper.__init__(self, env)
        self.run_dir = Path(run_dir)
        description = getattr(env.unwrapped, "description", None)
        derived = self._metadata_from_env(env, description)
        derived.update(dict(metadata or {}))
        control = getattr(description, "control", None)
        self._action_key = {
            "velocity": "joint_velocity_rad_s",
            "torque": "joint_torque_n_m",
        }.get(control, "command")
        control_hz = getattr(description, "control_hz", None)
        self._dt: float | None = 1.0 / float(control_hz) if control_hz else None
        if self._dt is None and getattr(env.unwrapped, "dt", None):
            self._dt = float(env.unwrapped.dt)
        max_steps = env.spec.max_episode_steps if env.spec is not None else None
        if max_steps is None and description is not None and self._dt:
            episode_s = getattr(description, "episode_s", None)
            if episode_s:
                max_steps = int(np.ceil(float(episode_s) / self._dt))
        self._max_steps = int(max_steps) + 1 if max_steps else None
        self._writer = RunWriter(self.run_dir, derived, overwrite=overwrite)
        self._episode = 0
        self._open = False
        self._step = 0
        self._seed: int | None = None
        self._last_obs: Any = None
        self._last_info: dict[str, Any] = {}
        self._ended: dict[str, bool] = {}
        self._warned = False
        self._closed = False

    @staticmethod
    def _metadata_from_env(env: gym.Env, description: Any) -> dict[str, Any]:
        meta: dict[str, Any] = {}
        if env.spec is not None:
            meta["scenario"] = env.spec.id
            meta["env_id"] = env.spec.id
            robot = env.spec.kwargs.get("robot") if env.spec.kwargs else None
            if robot is not None:
                meta["robot"] = str(robot)
        space = env.action_space
        if isinstance(space, gym.spaces.Box):
            meta["action_low"] = np.asarray(space.low, dtype=float).tolist()
            meta["action_high"] = np.asarray(space.high, dtype=float).tolist()
        if description is not None and dataclasses.is_dataclass(description):
            full = dataclasses.asdict(description)
            for name in _LIFTED_FIELDS:
                if name in full:
                    value = full[name]
                    meta[name] = list(value) if isinstance(value, tuple) else value
            meta["description"] = full
            if "control_hz" in full:
                meta["rates"] = {"control_hz": full["control_hz"]}
        return meta

    # ------------------------------------------------------------------ gym API
    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[Any, dict[str, Any]]:
        """Write the previous episode (if any), reset the env and open a new episode."""
        self._finish_episode()
        obs, info = self.env.reset(seed=seed, options=options)
        self._writer.begin_episode(self._episode, self._max_steps)
        self._open = True
        self._step = 0
        self._seed = seed
        self._ended = {"terminated": False, "truncated": False}
        self._last_obs, self._last_info = obs, info
        return obs, info

    def step(self, action: Any) -> tuple[Any, SupportsFloat, bool, bool, dict[str, Any]]:
        """Step the env and record the row (previous state and sensation, this action)."""
        obs, reward, terminated, truncated, info = self.env.step(action)
        if self._open:
            dropped: list[str] = []
            active = _as_group(action, self._action_key, dropped, "active")
            applied = info.get("action_applied") if isinstance(info, Mapping) else None
            if applied is not None:
                applied_group = _as_group(applied, self._action_key, dropped, "active")
                active.update({f"applied_{k}": v for k, v in applied_group.items()})
            self._record_row(active, dropped)
            self._step += 1
            self._last_obs, self._last_info = obs, info
            self._ended = {"terminated": bool(terminated), "truncated": bool(truncated)}
        return obs, reward, terminated, truncated, info

    def close(self) -> None:
        """Write the open episode, close the run folder, then close the env."""
        if not self._closed:
            self._finish_episode()
            self._writer.close()
            self._closed = True
        super().close()

    # ------------------------------------------------------------------ internals
    def _record_row(self, active: dict[str, Any], dropped: list[str]) -> None:
        info = self._last_info if isinstance(self._last_info, Mapping) else {}
        external_raw = dict(info.get("external", {}) or {})
        for key in _INFO_SCALARS:
            if key in info and key not in external_raw:
                external_raw[key] = info[key]
        external = _filter(external_raw, dropped, "external")
        sensory = _as_group(self._last_obs, "observation", dropped, "sensory")
        if "time_s" in info and _loggable(info["time_s"]):
            t = float(info["time_s"])
        else:
            t = self._step * (self._dt if self._dt else 1.0)
        if dropped and not self._warned:
            warnings.warn(
                f"Recorder: not logging non-numeric values {', '.join(sorted(set(dropped)))}",
                stacklevel=3,
            )
            self._warned = True
        self._writer.record(self._step, t, external=external, sensory=sensory, active=active)

    def _finish_episode(self) -> None:
        if not self._open:
            return
        self._record_row({}, [])
        extra = {"seed": self._seed, "actions": self._step, **self._ended}
        self._writer.end_episode(extra)
        self._open = False
        self._episode += 1
