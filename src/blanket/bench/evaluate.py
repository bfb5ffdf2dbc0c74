"""The benchmark's episode loop: any policy, one seeded episode, full traces for scoring."""

from __future__ import annotations

import hashlib
import time
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from blanket.errors import ConfigError

__all__ = ["EpisodeTrace", "PolicyDriver", "run_policy_episode"]

#: ``info["external"]`` keys written by perturbation wrappers start with these.
PERTURBATION_PREFIXES = ("fault_", "disturbance_")


@dataclass
class EpisodeTrace:
    """What one episode did, step by step (row ``k`` = after control step ``k + 1``)."""

    seed: int
    dt: float
    distance_m: np.ndarray
    tip_m: np.ndarray
    q_rad: np.ndarray
    action: np.ndarray
    q_start_rad: np.ndarray
    tip_start_m: np.ndarray
    target_start_m: np.ndarray
    q_seen_rad: np.ndarray
    belief_q_rad: np.ndarray | None
    policy_us: np.ndarray
    perturbation_digest: str
    contact: bool
    env_success: bool


class PolicyDriver:
    """Calls a policy the same way every step: ``predict`` (SB3 style) or ``act``.

    ``predict(obs, state, episode_start, deterministic=True)`` gets ``episode_start=True`` on
    the first step of each episode and its returned state back on the next; an ``act``-only
    policy has ``reset()`` called at each episode start when it has one.
    """

    def __init__(self, policy: Any) -> None:
        if not (hasattr(policy, "predict") or hasattr(policy, "act")):
            raise ConfigError(
                f"policy {type(policy).__name__} has neither act(obs) nor "
                "predict(obs, state, episode_start, deterministic)"
            )
        self.policy = policy
        self._state: Any = None
        self._first = True
        self._diagnostics = getattr(policy, "diagnostics", None)

    def begin_episode(self) -> None:
        self._state = None
        self._first = True
        if not hasattr(self.policy, "predict") and hasattr(self.policy, "reset"):
            self.policy.reset()

    def __call__(self, obs: Mapping[str, Any]) -> np.ndarray:
        if hasattr(self.policy, "predict"):
            action, self._state = self.policy.predict(
                obs, state=self._state, episode_start=np.array([self._first]), deterministic=True
            )
        else:
            action = self.policy.act(obs)
        self._first = False
        return np.asarray(action, dtype=float)

    def believed_angles(self) -> np.ndarray | None:
        if self._diagnostics is None:
            return None
        belief = self._diagnostics().get("belief")
        if belief is None:
            return None
        return np.asarray(belief, dtype=float)[0]


def _digest_update(h: Any, external: Mapping[str, Any]) -> None:
    for key in sorted(external):
        if key.startswith(PERTURBATION_PREFIXES):
            h.update(key.encode())
            h.update(np.ascontiguousarray(np.asarray(external[key], dtype=float)).tobytes())


def run_policy_episode(env: Any, policy: Any, seed: int) -> EpisodeTrace:
    """Run one episode from ``env.reset(seed=seed)``; return its traces.

    ``perturbation_digest`` hashes every injected perturbation (the ``fault_*`` and
    ``disturbance_*`` keys of ``info["external"]``) of the whole episode, so two policies can
    be checked to have met the same draws.
    """
    driver = policy if isinstance(policy, PolicyDriver) else PolicyDriver(policy)
    obs, info = env.reset(seed=int(seed))
    driver.begin_episode()
    dt = 1.0 / float(env.unwrapped.description.control_hz)
    ext = info["external"]
    q_start = np.asarray(ext["joint_angle_rad"], float).copy()
    tip_start = np.asarray(ext["tip_position_m"], float).copy()
    target_start = np.asarray(ext["target_position_m"], float).copy()
    h = hashlib.sha1()
    _digest_update(h, ext)
    distance, tips, qs, actions, seen, beliefs, us = [], [], [], [], [], [], []
    contact = False
    success = False
    q_now = q_start
    while True:
        t0 = time.perf_counter_ns()
        action = driver(obs)
        us.append((time.perf_counter_ns() - t0) / 1e3)
        belief = driver.believed_angles()
        if belief is not None:
            beliefs.append(belief)
            seen.append(q_now)
        obs, _r, terminated, truncated, info = env.step(action)
        ext = info["external"]
        q_now = np.asarray(ext["joint_angle_rad"], float).copy()
        distance.append(float(info["distance_m"]))
        tips.append(np.asarray(ext["tip_position_m"], float).copy())
        qs.append(q_now)
        actions.append(action)
        contact = contact or bool(info.get("contact", False))
        success = success or bool(info.get("success", False))
        _digest_update(h, ext)
        if terminated or truncated:
            break
    return EpisodeTrace(
        seed=int(seed),
        dt=dt,
        distance_m=np.asarray(distance),
        tip_m=np.asarray(tips),
        q_rad=np.asarray(qs),
        action=np.asarray(actions),
        q_start_rad=q_start,
        tip_start_m=tip_start,
        target_start_m=target_start,
        q_seen_rad=np.asarray(seen) if seen else np.zeros((0, q_start.size)),
        belief_q_rad=np.asarray(beliefs) if beliefs else None,
        policy_us=np.asarray(us),
        perturbation_digest=h.hexdigest()[:16],
        contact=contact,
        env_success=success,
    )
