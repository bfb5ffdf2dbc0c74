"""The ``miscalibrated-lengths`` condition on every arm: built-in, planar and a URDF arm the
project was never tuned on, with every model-based velocity policy (incl. the learning and
image-goal rows).

External reference: the truth is pinocchio's forward kinematics of the unscaled URDF
(``ArmModel.from_urdf`` without ``length_scale``); a uniform length factor scales every
placement, so the model's tip is the true tip times the factor for every posture (a
similarity of the kinematic chain; common practice, no source).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from blanket.bench.policies import resolve_policy
from blanket.bench.rl import make_bench_env
from blanket.body import ArmModel
from blanket.conditions import PRESETS, condition_model_options

SEEDLING = dict(
    urdf=str(Path(__file__).resolve().parent / "data" / "seedling_picker_4dof.urdf"),
    end_effector="picker_tip",
)
ARMS = {
    "iiwa": ("iiwa", {}),
    "panda": ("panda", {}),
    "xarm6": ("xarm6", {}),
    "planar": ("planar", {}),
    "seedling (urdf=)": ("iiwa", SEEDLING),
}
POLICIES = ("active-inference", "active-inference+learn", "active-inference+image", "classical")


@pytest.mark.parametrize("arm", list(ARMS))
def test_miscalibrated_lengths_reach_every_arm_and_policy(arm):
    robot, extra = ARMS[arm]
    values = PRESETS["miscalibrated-lengths"].parameters
    factor = values["model_length_scale"]
    env = make_bench_env(robot, "velocity", 1.0, conditions=values, **extra)
    try:
        d = env.unwrapped.description
        truth = ArmModel.from_urdf(d.urdf_path, d.end_effector, d.joint_names)
        rng = np.random.default_rng(0)
        lo, hi = np.maximum(d.lower_rad, -np.pi), np.minimum(d.upper_rad, np.pi)
        for name in POLICIES:
            if name == "active-inference+image" and d.camera is None:
                continue
            policy = resolve_policy(name).build(env, condition_model_options(values), {})
            q = rng.uniform(lo, hi)
            np.testing.assert_allclose(
                policy.body.tip_position(q), factor * truth.tip_position(q), atol=1e-12
            )
            obs, _ = env.reset(seed=1)
            policy.reset()
            for _ in range(20):
                obs, _, terminated, truncated, info = env.step(policy.act(obs))
                assert not (terminated or truncated)
            assert info["external"]["model_length_scale"] == factor
    finally:
        env.close()
