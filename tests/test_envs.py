"""Tests of the reaching envs (blanket/arm-reach-v0, blanket/planar-2link-v0)."""

from __future__ import annotations

import warnings
from pathlib import Path

import gymnasium as gym
import numpy as np
import pybullet
import pytest
from gymnasium.utils.env_checker import check_env, data_equivalence
from gymnasium.utils.passive_env_checker import env_render_passive_checker

import blanket
import blanket_envs  # noqa: F401  (registers the env ids)
from blanket.description import ArmDescription, CameraDescription
from blanket.errors import ConfigError
from blanket_envs.arm_reach import ArmReachEnv, PlanarReachEnv
from reference_urdf import pybullet_joint_limits, urdf_soft_limits

PLANAR = "blanket/planar-2link-v0"
ARM = "blanket/arm-reach-v0"

# Our actions are joint velocities (rad/s) or torques (N m) bounded by the URDF limits, so
# gymnasium's advice to normalize Box action spaces to [-1, 1] is the one warning we expect.
NORMALIZE_ADVICE = "For Box action spaces, we recommend using a symmetric and normalized space"


def _check_env_without_warnings(env_id: str, **kwargs) -> None:
    env = gym.make(env_id, render_mode="rgb_array", **kwargs)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            # "human" needs a display, so render modes are checked one by one below.
            check_env(env.unwrapped, skip_render_check=True)
            env.reset(seed=0)
            env_render_passive_checker(env.unwrapped)
        unexpected = [str(w.message) for w in caught if NORMALIZE_ADVICE not in str(w.message)]
        assert unexpected == []
        frame = env.render()
        assert frame.shape == (480, 640, 3) and frame.dtype == np.uint8
        assert frame.std() > 5.0  # something was drawn
    finally:
        env.close()


def test_check_env_planar():
    # Reference: gymnasium's own API checker (gymnasium.utils.env_checker.check_env).
    _check_env_without_warnings(PLANAR, episode_s=0.5)


def test_check_env_arm_torque():
    _check_env_without_warnings(ARM, robot="xarm6", control="torque", episode_s=0.5)


@pytest.mark.parametrize("env_id", sorted(blanket.ENV_IDS))
def test_check_env_passes_with_warnings_as_errors(env_id):
    # Reference: gymnasium's own API checker (gymnasium.utils.env_checker.check_env), which
    # resets twice with one seed and compares whole info dicts. Every registered env passes
    # with every warning an error but one: Box actions are physical units here, not [-1, 1].
    # blanket/base-goto-v0 passes once its info carries no wall-clock time either (its
    # `sim_step_us` is removed in the base env's own change, merged beside this one).
    env = gym.make(env_id)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            warnings.filterwarnings("ignore", message=f".*{NORMALIZE_ADVICE}.*")
            check_env(env.unwrapped, skip_render_check=True)
    finally:
        env.close()


def test_seeded_reset_and_steps_are_reproducible():
    env = gym.make(ARM, robot="panda", episode_s=0.5)
    try:
        runs = []
        for _ in range(2):
            obs, _ = env.reset(seed=5)
            trace = [obs]
            for _ in range(12):
                trace.append(env.step(np.full(7, 0.3))[0])
            trace.append(env.reset()[0])  # the unseeded reset after a seeded one
            runs.append(trace)
        assert all(data_equivalence(a, b, exact=True) for a, b in zip(*runs, strict=True))
        other, _ = env.reset(seed=6)
        assert not np.array_equal(other["joint_angle_rad"], runs[0][0]["joint_angle_rad"])
    finally:
        env.close()


def test_panda_description_has_the_urdfs_limits():
    # References: the URDF's <safety_controller> soft limits read with xml.etree as the URDF
    # XML specification defines them, and its velocity and effort limits as pybullet reads
    # them (tests/reference_urdf.py). The maker's figures are configuration, not a reference.
    env = gym.make(ARM, robot="panda", control="velocity")
    try:
        d = env.unwrapped.description
        assert isinstance(d, ArmDescription) and isinstance(d.camera, CameraDescription)
        soft = urdf_soft_limits(d.urdf_path)
        hard = pybullet_joint_limits(d.urdf_path)
        np.testing.assert_allclose(d.lower_rad, [soft[n][0] for n in d.joint_names])
        np.testing.assert_allclose(d.upper_rad, [soft[n][1] for n in d.joint_names])
        np.testing.assert_allclose(env.action_space.high, [hard[n].velocity for n in d.joint_names])
        np.testing.assert_allclose(env.action_space.low, -env.action_space.high)
        assert d.joint_names == tuple(f"panda_joint{i}" for i in range(1, 8))
        assert d.end_effector == "panda_grasptarget" and d.urdf_path.endswith("panda.urdf")
        assert d.control_hz == 240.0 and d.episode_s == 4.0 and d.tolerance_m == 0.01
        np.testing.assert_allclose(d.gravity_m_s2, [0.0, 0.0, -9.81])
    finally:
        env.close()
    env = gym.make(ARM, robot="panda", control="torque")
    try:
        np.testing.assert_allclose(env.action_space.high, [hard[n].effort for n in d.joint_names])
    finally:
        env.close()


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        (dict(robot="ur5"), "iiwa, panda, xarm6"),
        (dict(urdf="/nonexistent/arm.urdf", end_effector="tip"), "urdf"),
        (dict(robot="iiwa", end_effector="gripper"), "end_effector"),
        (dict(control="position"), "control"),
        (dict(control_hz=0.0), "control_hz"),
        (dict(camera_hz=-30.0), "camera_hz"),
        (dict(camera_hz=480.0), "camera_hz"),
        (dict(episode_s=0.0), "episode_s"),
        (dict(tolerance_m=-0.01), "tolerance_m"),
        (dict(encoder_angle_noise_rad=-0.1), "encoder_angle_noise_rad"),
        (dict(encoder_velocity_noise_rad_s=float("nan")), "encoder_velocity_noise_rad_s"),
        (dict(camera_noise_px=-2.0), "camera_noise_px"),
        (dict(targets="shelf"), "targets"),
        (dict(render_mode="video"), "render_mode"),
    ],
)
def test_bad_input_is_a_one_line_config_error(kwargs, field):
    with pytest.raises(ConfigError) as err:
        ArmReachEnv(**kwargs)
    message = str(err.value)
    assert field in message and "\n" not in message


def test_bad_end_effector_lists_link_names():
    with pytest.raises(ConfigError, match="lbr_iiwa_link_7"):
        ArmReachEnv(robot="iiwa", end_effector="gripper")


def test_planar_rejects_bench_targets():
    with pytest.raises(ConfigError, match="targets"):
        PlanarReachEnv(targets="bench")


def test_bad_actions_raise_and_out_of_bounds_actions_are_clipped():
    env = gym.make(PLANAR)
    try:
        env.reset(seed=0)
        for bad in (
            np.array([np.nan, 0.0]),
            np.array([np.inf, 0.0]),
            np.zeros(3),
            np.zeros((2, 1)),
        ):
            with pytest.raises(ValueError, match="action") as err:
                env.step(bad)
            assert "\n" not in str(err.value)
        _, _, _, _, info = env.step(np.array([10.0, -0.5]))
        np.testing.assert_allclose(info["external"]["commanded_action"], [3.0, -0.5])
    finally:
        env.close()


def test_velocity_control_tracks_the_commanded_velocity():
    # Reference: kinematics of a constant joint velocity, q(t) = q(0) + v t.
    env = gym.make(PLANAR, episode_s=1.0)
    try:
        _, info = env.reset(seed=1)
        q0 = info["external"]["joint_angle_rad"]
        v = np.array([0.8, -0.5])
        for _ in range(120):
            _, _, _, _, info = env.step(v)
        np.testing.assert_allclose(info["external"]["joint_velocity_rad_s"], v, atol=1e-3)
        np.testing.assert_allclose(info["external"]["joint_angle_rad"], q0 + v * 0.5, atol=1e-2)
    finally:
        env.close()


def test_torque_mode_holds_still_with_pybullet_gravity_compensation():
    # Reference: pybullet.calculateInverseDynamics(q, 0, 0) gives the gravity torques; applying
    # them each step keeps the arm at rest.
    env = gym.make(ARM, robot="iiwa", control="torque", episode_s=1.0)
    try:
        _, info = env.reset(seed=2)
        world = env.unwrapped.world
        q0 = info["external"]["joint_angle_rad"]
        for _ in range(120):
            q = info["external"]["joint_angle_rad"]
            tau = world.client.calculateInverseDynamics(
                world.robot, q.tolist(), [0.0] * 7, [0.0] * 7
            )
            _, _, _, _, info = env.step(np.array(tau))
        assert np.max(np.abs(info["external"]["joint_angle_rad"] - q0)) < 2e-3
        assert np.max(np.abs(tau)) > 5.0  # gravity really loads the arm
        # Without compensation the arm falls.
        for _ in range(60):
            _, _, _, _, info = env.step(np.zeros(7))
        assert np.max(np.abs(info["external"]["joint_angle_rad"] - q0)) > 0.05
    finally:
        env.close()


def test_success_truncation_and_reward():
    env = gym.make(PLANAR, episode_s=0.5, tolerance_m=0.01)
    try:
        obs, info = env.reset(seed=3)
        tip = info["external"]["tip_position_m"]
        obs, info = env.reset(
            seed=3,
            options={
                "target_position_m": tip,
                "joint_angle_rad": info["external"]["joint_angle_rad"],
            },
        )
        np.testing.assert_allclose(obs["target_position_m"], tip)
        assert info["inside_tolerance"] and not info["success"]
        rewards, steps = [], 0
        truncated = False
        while not truncated:
            _, reward, terminated, truncated, info = env.step(np.zeros(2))
            rewards.append(reward)
            steps += 1
            assert terminated is False
        assert steps == 120  # 0.5 s at 240 Hz
        assert info["success"] and info["time_to_success_s"] == pytest.approx(1 / 240)
        # The bonus starts once the tip has stayed 0.25 s (60 steps) inside the ball.
        assert rewards[59] < 0.5 < rewards[60]
        assert info["time_s"] == pytest.approx(0.5)
        # no wall clock in info: the rollout loop times the step (blanket.rollout)
        assert not any(key.endswith("_us") for key in info)
    finally:
        env.close()


def test_camera_frames_arrive_at_the_camera_rate():
    env = gym.make(PLANAR, camera_hz=30.0)
    try:
        obs, _ = env.reset(seed=0)
        fresh = [obs["camera_fresh"]] + [
            env.step(np.zeros(2))[0]["camera_fresh"] for _ in range(16)
        ]
        assert fresh == [1, 0, 0, 0, 0, 0, 0, 0, 1, 0, 0, 0, 0, 0, 0, 0, 1]
        # The reported pixel is the projection of the truth plus noise (2 px std).
        _, _, _, _, info = env.step(np.zeros(2))
        camera = env.unwrapped.description.camera
        obs, _ = env.reset(seed=1)
        truth = env.unwrapped.world.tip_position()
        assert obs["tip_visible"] == 1
        assert np.linalg.norm(obs["tip_pixel_px"] - camera.project(truth)) < 10.0
    finally:
        env.close()


def test_bench_targets_are_reachable_and_clear_of_the_bench():
    # Reference: pybullet's inverse kinematics reaches every cell target (within 1 mm, joints
    # within the limits in force) without touching the bench or trays.
    for robot in ("iiwa", "panda", "xarm6"):
        env = ArmReachEnv(robot=robot)
        try:
            world = env.world
            c = world.client
            movable = [
                j
                for j in range(c.getNumJoints(world.robot))
                if c.getJointInfo(world.robot, j)[2] != pybullet.JOINT_FIXED
            ]
            columns = [movable.index(j) for j in world.joint_indices]
            targets = env.cell_targets_m
            assert targets.shape == (48, 3)
            assert np.all(targets[:, 2] > env.layout.top_z_m + 0.05)
            for target in targets:
                world.reset_joints(env.home_rad)
                for _ in range(4):
                    solution = c.calculateInverseKinematics(
                        world.robot, world.tip_link, target.tolist(), maxNumIterations=200
                    )
                    q = np.clip(np.array(solution)[columns], world.lower_rad, world.upper_rad)
                    world.reset_joints(q)
                assert np.linalg.norm(world.tip_position() - target) < 1e-3
                c.performCollisionDetection()
                assert world.contacts() == []
        finally:
            env.close()


def test_contact_with_the_bench_is_reported():
    env = gym.make(ARM, robot="iiwa", episode_s=0.5)
    try:
        env.reset(seed=0)
        _, info = env.reset(
            seed=0, options={"joint_angle_rad": np.array([0, 2.0, 0, 0, 0, 0, 0.0])}
        )
        _, _, _, _, info = env.step(np.zeros(7))
        assert info["contact"]
        assert "bench" in {c.other for c in env.unwrapped.contacts()}
        _, info = env.reset(seed=0)
        assert not info["contact"]
    finally:
        env.close()


def test_target_velocity_moves_the_target():
    env = gym.make(PLANAR, episode_s=1.0)
    try:
        obs, _ = env.reset(seed=0)
        start = obs["target_position_m"]
        env.unwrapped.set_target_velocity(np.array([0.1, -0.2, 0.0]))
        for _ in range(48):
            obs, _, _, _, info = env.step(np.zeros(2))
        np.testing.assert_allclose(obs["target_position_m"], start + np.array([0.02, -0.04, 0.0]))
        np.testing.assert_allclose(info["external"]["target_velocity_m_s"], [0.1, -0.2, 0.0])
    finally:
        env.close()


def test_payload_and_push_hooks_reach_the_simulation():
    env = gym.make(PLANAR, control="torque", episode_s=1.0)
    try:
        env.reset(seed=0)
        env.unwrapped.set_payload(0.5)
        env.unwrapped.apply_push(np.array([0.0, 4.0, 0.0]), duration_s=0.05)
        _, _, _, _, info = env.step(np.zeros(2))
        assert info["external"]["payload_kg"] == 0.5
        np.testing.assert_allclose(info["external"]["push_force_n"], [0.0, 4.0, 0.0])
        assert np.linalg.norm(info["external"]["joint_velocity_rad_s"]) > 1e-3
    finally:
        env.close()


def test_close_twice_is_fine():
    env = gym.make(PLANAR)
    env.close()
    env.close()


def test_custom_urdf_gets_random_reachable_targets_above_the_bench():
    # The 3-DoF potting arm from the env suite's assets, loaded as a user's own URDF.
    urdf = Path(blanket_envs.__file__).resolve().parent / "assets" / "potting_arm_3dof.urdf"
    env = ArmReachEnv(urdf=str(urdf), end_effector="tool_tip", episode_s=0.1)
    try:
        assert env.targets == "random"
        # Soft limits in force where the URDF gives them.
        np.testing.assert_allclose(env.description.lower_rad[1:], [-1.7, -2.4])
        lowest = env.layout.top_z_m + 0.04 + 0.05
        for seed in range(10):
            obs, info = env.reset(seed=seed)
            target = obs["target_position_m"]
            assert target[2] >= lowest and np.hypot(target[0], target[1]) >= 0.25 * env.reach_m
            assert np.linalg.norm(target) <= 0.8 + 1e-9  # the arm's length, from its URDF
        obs, *_ = env.step(np.zeros(3))
        assert obs["joint_angle_rad"].shape == (3,)
    finally:
        env.close()


def test_human_render_mode_without_a_display_is_a_config_error(monkeypatch):
    monkeypatch.delenv("DISPLAY", raising=False)
    monkeypatch.delenv("WAYLAND_DISPLAY", raising=False)
    with pytest.raises(ConfigError, match="render_mode"):
        PlanarReachEnv(render_mode="human")
