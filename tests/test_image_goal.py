"""Tests of the goal in the camera image (``goal_space = "image"``, blanket.agent.image_goal).

External references used here:
- The pinhole projection ``u = fx x_c / z_c + cx`` (Hartley & Zisserman 2004, *Multiple View
  Geometry*, 2nd ed., eq. 6.1), here through pybullet's own camera matrices for the
  back-projection check (``pybullet.computeViewMatrix``), so the inverse is checked against a
  projection written outside the project.
"""

from __future__ import annotations

from pathlib import Path

import gymnasium as gym
import numpy as np
import pybullet as p
import pytest

import blanket  # noqa: F401  (registers the env ids)
import blanket_envs
from blanket.agent import ArmAgent
from blanket.agent.image_goal import ImageGoal, back_project, image_goal_offset
from blanket.errors import ConfigError
from blanket.rollout import rollout

POTTING = str(Path(blanket_envs.__file__).resolve().parent / "assets" / "potting_arm_3dof.urdf")


@pytest.fixture(scope="module")
def camera():
    env = gym.make("blanket/arm-reach-v0", urdf=POTTING, end_effector="tool_tip")
    try:
        return env.unwrapped.description.camera
    finally:
        env.close()


def _intrinsics(camera):
    return np.array([camera.fx_px, camera.fy_px, camera.cx_px, camera.cy_px])


def test_back_projection_lies_on_the_pixel_ray_at_the_point_depth(camera):
    rng = np.random.default_rng(0)
    T = np.asarray(camera.base_from_camera)
    R, t = T[:3, :3], T[:3, 3]
    # pybullet's view matrix of the same pose (OpenGL convention: camera looks along -z, y up)
    view = np.array(
        p.computeViewMatrix(
            cameraEyePosition=t.tolist(),
            cameraTargetPosition=(t + R[:, 2]).tolist(),
            cameraUpVector=(-R[:, 1]).tolist(),
        )
    ).reshape(4, 4, order="F")
    for _ in range(20):
        point = rng.uniform([-0.4, -0.4, 0.1], [0.4, 0.4, 0.8])
        pixel = rng.uniform([50, 50], [250, 200])
        x = back_project(T, _intrinsics(camera), pixel, point)
        # the same depth along the optical axis ...
        assert R[:, 2] @ (x - t) == pytest.approx(R[:, 2] @ (point - t), abs=1e-12)
        # ... and the pixel pybullet's view matrix projects it to
        xc = view @ np.append(x, 1.0)  # OpenGL camera frame: x right, y up, -z forward
        u = camera.fx_px * xc[0] / -xc[2] + camera.cx_px
        v = camera.fy_px * -xc[1] / -xc[2] + camera.cy_px
        np.testing.assert_allclose([u, v], pixel, atol=1e-3)  # pybullet works in float32


def test_the_offset_puts_the_seen_tip_on_the_target_pixel(camera):
    """A body model off by a constant ``d``: the model's tip at ``target + delta`` puts the
    real tip (``+ d``) on the target's pixel, whatever part of ``d`` lies along the ray."""
    rng = np.random.default_rng(1)
    T, K = np.asarray(camera.base_from_camera), _intrinsics(camera)
    for _ in range(20):
        target = rng.uniform([-0.3, -0.3, 0.2], [0.3, 0.3, 0.6])
        tip_model = target + rng.uniform(-0.1, 0.1, 3)
        d = rng.uniform(-0.03, 0.03, 3)  # the body model's error
        delta = image_goal_offset(
            T, K, tip_model, camera.project(tip_model + d), target, camera.project(target)
        )
        # the offset is measured at the model tip's depth: exact once the model's tip is at
        # the goal (the closed loop's fixed point)
        for _ in range(6):
            tip_model = target + delta
            delta = image_goal_offset(
                T, K, tip_model, camera.project(tip_model + d), target, camera.project(target)
            )
        np.testing.assert_allclose(
            camera.project(target + delta + d), camera.project(target), atol=1e-6
        )
        # and no model error, no offset
        np.testing.assert_allclose(
            image_goal_offset(
                T, K, tip_model, camera.project(tip_model), target, camera.project(target)
            ),
            0.0,
            atol=1e-12,
        )


def test_the_offset_is_held_while_the_tip_is_hidden_and_starts_at_zero(camera):
    goal = ImageGoal(camera)
    target = np.array([0.3, 0.1, 0.4])
    tip = np.array([0.25, 0.05, 0.45])
    seen = camera.project(tip + [0.0, 0.02, 0.0])
    obs = {
        "target_position_m": target,
        "target_pixel_px": camera.project(target),
        "tip_pixel_px": seen,
        "camera_fresh": 1,
        "tip_visible": 0,
        "target_visible": 1,
    }
    np.testing.assert_array_equal(goal.goal_observation(obs, tip)["target_position_m"], target)
    obs["tip_visible"] = 1
    moved = goal.goal_observation(obs, tip)["target_position_m"]
    assert goal.frames == 1 and np.linalg.norm(moved - target) > 0.01
    # the target hidden (the arm over it): its position is used, the offset still updates
    hidden = {**obs, "target_visible": 0, "target_pixel_px": np.zeros(2)}
    np.testing.assert_allclose(goal.goal_observation(hidden, tip)["target_position_m"], moved)
    # tip out of sight, or no fresh frame: the offset is held
    for change in ({"tip_visible": 0, "tip_pixel_px": np.zeros(2)}, {"camera_fresh": 0}):
        held = goal.goal_observation({**obs, **change}, tip + 0.1)
        np.testing.assert_allclose(held["target_position_m"], moved)
    assert goal.frames == 2
    goal.reset()
    np.testing.assert_array_equal(goal.offset, 0.0)


def test_the_image_goal_puts_the_real_tip_on_the_target_pixel():
    """Link lengths 3 % long, no learning: the Cartesian goal leaves the seen tip pixels off
    the target; the image goal brings it within a few pixels (2 px camera noise)."""
    env = gym.make("blanket/arm-reach-v0", urdf=POTTING, end_effector="tool_tip", episode_s=3.0)
    try:
        camera = env.unwrapped.description.camera
        gaps = {}
        for space in ("cartesian", "image"):
            agent = ArmAgent.from_env(env, length_scale=1.03, goal_space=space)
            obs, _ = env.reset(seed=3)
            agent.reset()
            for _ in range(int(3.0 * 240)):
                obs, _, terminated, truncated, info = env.step(agent.act(obs))
                if terminated or truncated:
                    break
            tip = info["external"]["tip_position_m"]
            gaps[space] = np.linalg.norm(
                camera.project(tip) - camera.project(info["external"]["target_position_m"])
            )
        # measured: 6.4 px and 0.3 px
        assert gaps["cartesian"] > 5.0
        assert gaps["image"] < 0.3 * gaps["cartesian"] and gaps["image"] < 2.0
    finally:
        env.close()


def test_goal_space_is_checked():
    env = gym.make("blanket/arm-reach-v0", urdf=POTTING, end_effector="tool_tip", episode_s=1.0)
    try:
        with pytest.raises(ConfigError, match="goal_space.*did you mean image"):
            ArmAgent.from_env(env, goal_space="imag")
        agent = ArmAgent.from_env(env, goal_space="image")
        assert agent.image_goal is not None
        assert ArmAgent.from_env(env).image_goal is None  # default "cartesian"
        rollout(env, agent, 1, seed=0)  # both backends' step take the moved goal
    finally:
        env.close()
