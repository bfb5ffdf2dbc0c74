"""The benchmark's traces: any policy, seeded episodes through :func:`blanket.rollout.rollout`,
and an observer that keeps what the metrics need."""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from blanket.rollout import EpisodeStart, Observer, PolicyAdapter, StepView, rollout

__all__ = [
    "EpisodeTrace",
    "PolicyDriver",
    "BenchTrace",
    "run_policy_episode",
    "run_policy_episodes",
]

#: ``info["external"]`` keys written by perturbation wrappers start with these.
PERTURBATION_PREFIXES = ("fault_", "disturbance_")

#: The one policy adapter of the rollout loop, under the benchmark's older name.
PolicyDriver = PolicyAdapter


@dataclass
class EpisodeTrace:
    """What one episode did, step by step (row ``k`` = after control step ``k + 1``).

    ``env_tolerance_m``, ``env_success`` and ``env_time_to_success_s`` are the env's own
    success report (``info``) for its own tolerance; ``peak_joint_speed_ratio`` is the highest
    ``info["safety"]["joint_speed_ratio"]`` of the episode (None without a safety wrapper that
    reports it).
    """

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
    env_time_to_success_s: float | None = None
    env_tolerance_m: float | None = None
    peak_joint_speed_ratio: float | None = None
    belief_sd_q_rad: np.ndarray | None = None
    #: The hold task's shove force of each step (``disturbance_shove_n``; None elsewhere).
    shove_n: np.ndarray | None = None


def _digest_update(h: Any, external: Mapping[str, Any]) -> None:
    for key in sorted(external):
        if key.startswith(PERTURBATION_PREFIXES):
            h.update(key.encode())
            h.update(np.ascontiguousarray(np.asarray(external[key], dtype=float)).tobytes())


class BenchTrace(Observer):
    """Keeps an :class:`EpisodeTrace` of every episode (in :attr:`traces`).

    ``perturbation_digest`` hashes every injected perturbation (the ``fault_*`` and
    ``disturbance_*`` keys of ``info["external"]``) of the whole episode, so two policies can
    be checked to have met the same draws.
    """

    wants_diagnostics = True

    def __init__(self) -> None:
        self.traces: list[EpisodeTrace] = []

    def on_episode_start(self, start: EpisodeStart) -> None:
        ext = start.info["external"]
        self._seed = start.seed
        self._dt = start.dt
        self._q_start = np.asarray(ext["joint_angle_rad"], float).copy()
        self._tip_start = np.asarray(ext["tip_position_m"], float).copy()
        self._target_start = np.asarray(ext["target_position_m"], float).copy()
        self._hash = hashlib.sha1()
        _digest_update(self._hash, ext)
        d = getattr(start.env.unwrapped, "description", None)
        tolerance = getattr(d, "tolerance_m", None)
        self._tolerance = None if tolerance is None else float(tolerance)
        self._q_now = self._q_start
        self._distance: list[float] = []
        self._tips: list[np.ndarray] = []
        self._qs: list[np.ndarray] = []
        self._actions: list[np.ndarray] = []
        self._seen: list[np.ndarray] = []
        self._beliefs: list[np.ndarray] = []
        self._sds: list[np.ndarray] = []
        self._us: list[float] = []
        self._contact = False
        self._success = False
        self._success_time: float | None = None
        self._peak: float | None = None
        self._shoves: list[np.ndarray] | None = [] if "disturbance_shove_n" in ext else None

    def on_step(self, step: StepView) -> None:
        diag = step.diagnostics
        belief = None if diag is None else diag.get("belief")
        if belief is not None:
            # a copy: the diagnostics may be views of the agent's buffers
            self._beliefs.append(np.array(np.asarray(belief, dtype=float)[0]))
            self._seen.append(self._q_now)
            sd = diag.get("belief_sd")
            if sd is not None:
                self._sds.append(np.array(np.asarray(sd, dtype=float)[0]))
        info = step.info
        ext = info["external"]
        self._q_now = np.asarray(ext["joint_angle_rad"], float).copy()
        self._distance.append(float(info["distance_m"]))
        self._tips.append(np.asarray(ext["tip_position_m"], float).copy())
        self._qs.append(self._q_now)
        self._actions.append(np.asarray(step.action, dtype=float))
        self._us.append(step.agent_us)
        self._contact = self._contact or bool(info.get("contact", False))
        if not self._success and info.get("success", False):
            self._success = True
            tts = info.get("time_to_success_s")
            self._success_time = None if tts is None else float(tts)
        ratio = info.get("safety", {}).get("joint_speed_ratio")
        if ratio is not None:
            ratio = float(ratio)
            self._peak = ratio if self._peak is None else max(self._peak, ratio)
        _digest_update(self._hash, ext)
        if self._shoves is not None:
            self._shoves.append(np.asarray(ext["disturbance_shove_n"], dtype=float))

    def on_episode_end(self, result: Any) -> None:
        seen = self._seen
        self.traces.append(
            EpisodeTrace(
                seed=self._seed,
                dt=self._dt,
                distance_m=np.asarray(self._distance),
                tip_m=np.asarray(self._tips),
                q_rad=np.asarray(self._qs),
                action=np.asarray(self._actions),
                q_start_rad=self._q_start,
                tip_start_m=self._tip_start,
                target_start_m=self._target_start,
                q_seen_rad=np.asarray(seen) if seen else np.zeros((0, self._q_start.size)),
                belief_q_rad=np.asarray(self._beliefs) if self._beliefs else None,
                belief_sd_q_rad=(
                    np.asarray(self._sds)
                    if self._sds and len(self._sds) == len(self._beliefs)
                    else None
                ),
                policy_us=np.asarray(self._us),
                perturbation_digest=self._hash.hexdigest()[:16],
                contact=self._contact,
                env_success=self._success,
                env_time_to_success_s=self._success_time,
                env_tolerance_m=self._tolerance,
                peak_joint_speed_ratio=self._peak,
                shove_n=None if self._shoves is None else np.asarray(self._shoves).reshape(-1, 3),
            )
        )


def run_policy_episodes(env: Any, policy: Any, seeds: list[int]) -> list[EpisodeTrace]:
    """One :class:`EpisodeTrace` per seed (``env.reset(seed=s)``), through the rollout loop."""
    observer = BenchTrace()
    rollout(env, policy, seeds=seeds, observers=[observer])
    return observer.traces


def run_policy_episode(env: Any, policy: Any, seed: int) -> EpisodeTrace:
    """Run one episode from ``env.reset(seed=seed)``; return its traces."""
    return run_policy_episodes(env, policy, [int(seed)])[0]
