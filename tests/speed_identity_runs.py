"""Seeded runs whose every observation, info value and log row is fingerprinted.

The fingerprints in ``tests/data/speed_identity.json`` were written by the code *before* the
hot-path rewrite of issue 22 (``python tests/speed_identity_runs.py --write``);
``tests/test_speed_identity.py`` reruns the same runs and requires the same bytes, so the
faster envs, sensors, wrappers and loop behave bit for bit as before for the same seeds.

Each run drives the env (behind the safety wrapper and perturbation wrappers, as
``blanket demo`` / ``bench`` do) with a fixed closed-loop policy of plain arithmetic on the
observation (not the agent, which other work changes), through the one rollout loop, and
records what the loop's logging observer would log (:mod:`blanket.logs.groups`) plus the
full ``info`` and the episode results (without the timing fields).

The fingerprints are float64 bytes: they hold for the pybullet build and CPU they were made
on (pybullet's results may differ in the last bits elsewhere).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import gymnasium as gym
import numpy as np

import blanket  # noqa: F401  (registers the env ids)
from blanket.conditions import apply_conditions, condition_env_options
from blanket.logs.groups import active_group, external_group, sensory_group
from blanket.rollout import Observer, StepView, rollout
from blanket.wrappers import SafetyLimits

REFERENCE = Path(__file__).resolve().parent / "data" / "speed_identity.json"
STEPS = 200
#: The seed of each run (default 7): these show the tip or the target hidden from the camera.
SEEDS = {"iiwa-velocity-bare": 2, "xarm6-velocity-bare": 1}
TIMING = ("agent_step_us", "sim_step_us")
#: fields EpisodeResult gained after the reference was made (no agent here: always None)
ADDED_LATER = ("median_free_energy",)

#: name -> (env id, env keywords, conditions, safety wrapper keywords or None, policy gain)
RUNS: dict[str, tuple[str, dict[str, Any], dict[str, Any], dict[str, Any] | None, float]] = {
    "iiwa-velocity": ("blanket/arm-reach-v0", {"robot": "iiwa"}, {}, {}, 0.9),
    "iiwa-velocity-box": (
        "blanket/arm-reach-v0",
        {"robot": "iiwa", "targets": "random"},
        {},
        {
            "workspace_box_m": [[0.0, -0.1, 0.3], [0.3, 0.1, 0.8]],
            "tool_speed_cap_m_s": 0.25,
            "joint_margin_rad": 0.3,
        },
        2.0,
    ),
    "iiwa-torque": ("blanket/arm-reach-v0", {"robot": "iiwa", "control": "torque"}, {}, {}, 0.0),
    "panda-velocity": (
        "blanket/arm-reach-v0",
        {"robot": "panda"},
        {"payload_kg": 1.0, "push_magnitude_n": 20.0, "sensor_noise_scale": 2.0},
        {},
        0.9,
    ),
    "panda-torque": ("blanket/arm-reach-v0", {"robot": "panda", "control": "torque"}, {}, {}, 0.02),
    "xarm6-velocity": (
        "blanket/arm-reach-v0",
        {"robot": "xarm6"},
        {"target_speed_m_s": 0.05, "camera_delay_frames": 2, "camera_dropout_probability": 0.3},
        {"stop_on_contact": False},
        3.0,
    ),
    "xarm6-torque": (
        "blanket/arm-reach-v0",
        {"robot": "xarm6", "control": "torque"},
        {"push_magnitude_n": 30.0},
        {},
        0.15,
    ),
    "iiwa-velocity-bare": (
        "blanket/arm-reach-v0",
        {"robot": "iiwa", "targets": "random"},
        {},
        None,
        3.0,
    ),
    "xarm6-velocity-bare": (
        "blanket/arm-reach-v0",
        {"robot": "xarm6", "targets": "random"},
        {},
        None,
        3.0,
    ),
    "planar-velocity": ("blanket/planar-2link-v0", {}, {}, {}, 0.9),
    "rover": ("blanket/base-goto-v0", {"robot": "rover"}, {}, {}, 0.9),
}


class FixedPolicy:
    """A closed-loop policy of plain arithmetic: a slow sweep, damped by the sensed velocity,
    large enough to reach joint margins, the velocity limits and (torque) to fall on the bench."""

    def __init__(self, space: gym.spaces.Box, gain: float) -> None:
        self.high = np.asarray(space.high, dtype=float)
        self.n = self.high.size
        self.gain = gain
        self.k = 0

    def reset(self) -> None:
        self.k = 0

    def act(self, obs: Any) -> np.ndarray:
        self.k += 1
        phase = 0.05 * self.k + np.arange(self.n)
        sweep = np.sin(phase) * self.high * self.gain
        if "joint_velocity_rad_s" in obs:
            sweep = sweep - 0.1 * np.asarray(obs["joint_velocity_rad_s"])
        if self.k % 50 == 0:
            sweep = sweep * 3.0  # beyond the limits: the wrapper scales it back
        return sweep


class Fingerprint(Observer):
    """Collects every value the loop sees, keyed by dotted name, over all steps."""

    def __init__(self) -> None:
        self.columns: dict[str, list[Any]] = {}

    def _add(self, prefix: str, values: Mapping[str, Any]) -> None:
        for key, value in values.items():
            name = f"{prefix}.{key}"
            if isinstance(value, Mapping):
                self._add(name, value)
            else:
                self.columns.setdefault(name, []).append(value)

    def on_step(self, step: StepView) -> None:
        self._add("external", external_group(step.info_before))
        self._add("sensory", sensory_group(step.obs))
        self._add("active", active_group(step.action, step.info))
        self._add("next_obs", step.next_obs)
        self._add("info", step.info)
        self.columns.setdefault("flags", []).append((step.terminated, step.truncated))


def _digest(values: list[Any]) -> str:
    h = hashlib.sha256()
    for v in values:
        if isinstance(v, np.ndarray) or isinstance(v, (float, np.floating)):
            arr = np.asarray(v)
            h.update(str(arr.shape).encode())
            h.update(arr.astype(np.float64).tobytes())
        else:
            h.update(repr(v).encode())
        h.update(b"|")
    return h.hexdigest()[:20]


def fingerprint(name: str) -> dict[str, str]:
    """Run ``name`` of :data:`RUNS` for 200 control steps (its seed); fingerprint each column."""
    env_id, options, conditions, safety, gain = RUNS[name]
    episode_s = STEPS / (40.0 if env_id == "blanket/base-goto-v0" else 240.0)
    env = gym.make(env_id, episode_s=episode_s, **options, **condition_env_options(conditions))
    try:
        wrapped, _ = apply_conditions(env, conditions) if conditions else (env, {})
        if safety is not None:
            wrapped = SafetyLimits(wrapped, **safety)
        policy = FixedPolicy(wrapped.action_space, gain)
        observer = Fingerprint()
        results = rollout(wrapped, policy, seeds=[SEEDS.get(name, 7)], observers=[observer])
        out = {key: _digest(values) for key, values in sorted(observer.columns.items())}
        result = {k: v for k, v in results[0].to_dict().items() if k not in TIMING}
        assert all(result.pop(k, None) is None for k in ADDED_LATER)
        out["result"] = _digest([json.dumps(result, sort_keys=True)])
        out["trace"] = _digest([results[0].trace[k] for k in sorted(results[0].trace)])
        out["steps"] = str(results[0].steps)
        return out
    finally:
        env.close()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--write", action="store_true", help="write the reference file")
    args = parser.parse_args(argv)
    prints = {name: fingerprint(name) for name in RUNS}
    if args.write:
        REFERENCE.parent.mkdir(exist_ok=True)
        REFERENCE.write_text(json.dumps(prints, indent=1, sort_keys=True) + "\n")
        print(f"wrote {REFERENCE}")
    else:
        json.dump(prints, sys.stdout, indent=1, sort_keys=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
