"""Record any gymnasium loop into a blanket run folder.

:class:`Recorder` writes the same Parquet format and the same columns as the rollout loop's
log (see :mod:`blanket.logs.schema`; both build their rows with :mod:`blanket.logs.groups`)
from the three groups an env wrapper can see:

- ``external.*`` from ``info["external"]`` (plus the ``info`` scalars ``distance_m``,
  ``success``, ``inside_tolerance``, ``contact`` and ``heading_error_rad`` when the env gives
  them),
- ``sensory.*`` from the observation (a Dict observation keeps its keys, a tuple becomes
  ``item0``, ``item1``, ..., any other observation ``sensory.observation``),
- ``active.action``, the action, and, when a safety wrapper reports it in
  ``info["action_applied"]``, ``active.action_applied``.

There is no ``internal.*`` group: a wrapper cannot see an agent's beliefs. Values the format
cannot hold (strings, objects) are left out, with one warning naming them.

Each episode's metadata holds the seed, the number of actions, whether the episode was
terminated or truncated, and the env's own success report: ``success`` (reported at any step)
and ``time_to_success_s`` (the ``info`` value of the first step that reported success, or None).

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

from blanket.logs.groups import active_group, external_group, numeric_only, sensory_group
from blanket.logs.writer import RunWriter

__all__ = ["Recorder"]

_LIFTED_FIELDS = (
    "joint_names",
    "urdf_path",
    "end_effector",
    "control",
    "control_hz",
    "tolerance_m",
    "episode_s",
)


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
        self._success = False
        self._success_time: float | None = None
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
        self._success, self._success_time = False, None
        self._last_obs, self._last_info = obs, info
        return obs, info

    def step(self, action: Any) -> tuple[Any, SupportsFloat, bool, bool, dict[str, Any]]:
        """Step the env and record the row (previous state and sensation, this action)."""
        obs, reward, terminated, truncated, info = self.env.step(action)
        if self._open:
            dropped: list[str] = []
            info_map = info if isinstance(info, Mapping) else {}
            active = numeric_only(active_group(action, info_map), dropped, "active")
            self._record_row(active, dropped)
            if not self._success and info_map.get("success"):
                self._success = True
                tts = info_map.get("time_to_success_s")
                self._success_time = None if tts is None else float(tts)
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
        external = numeric_only(external_group(info), dropped, "external")
        sensory = numeric_only(sensory_group(self._last_obs), dropped, "sensory")
        if isinstance(info.get("time_s"), (int, float, np.integer, np.floating)):
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
        extra = {
            "seed": self._seed,
            "actions": self._step,
            **self._ended,
            "success": self._success,
            "time_to_success_s": self._success_time,
        }
        self._writer.end_episode(extra)
        self._open = False
        self._episode += 1
