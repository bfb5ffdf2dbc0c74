"""Tests of the pybullet arm world, URDF limit parsing and the sensor models."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pinocchio as pin
import pybullet
import pytest
from scipy import stats

from blanket.description import CameraDescription
from blanket.errors import ConfigError
from blanket.sensors import (
    JointEncoders,
    PointCamera,
    frame_period_steps,
    in_view,
    look_at,
    opengl_matrices,
    pinhole_camera,
)
from blanket.sim.arm_world import ArmWorld
from blanket.sim.robots import BUILTIN_ROBOTS, builtin_robot
from blanket.sim.urdf_limits import read_joint_limits
from reference_urdf import pybullet_joint_limits, urdf_soft_limits

PLANAR_URDF = str(
    Path(__file__).resolve().parents[1] / "envs" / "blanket_envs" / "assets" / "planar_2link.urdf"
)


def _world(name: str, **kwargs) -> ArmWorld:
    spec = builtin_robot(name)
    return ArmWorld(
        spec.urdf_path,
        spec.end_effector,
        controlled_joints=spec.controlled_joints,
        held_joint_positions=spec.held_joint_positions,
        **kwargs,
    )


# ------------------------------------------------------------------- URDF limits
def test_panda_limits_agree_with_outside_readers_of_the_urdf():
    # References: pybullet's getJointInfo (hard <limit>, velocity, effort) and the URDF XML
    # specification's <safety_controller> soft limits, read with xml.etree (tests/
    # reference_urdf.py). The maker's published figures are configuration, not a reference.
    path = builtin_robot("panda").urdf_path
    limits = read_joint_limits(path)
    hard = pybullet_joint_limits(path)
    soft = urdf_soft_limits(path)
    arm = [f"panda_joint{i}" for i in range(1, 8)]
    assert set(arm) <= set(soft)  # this URDF has soft limits on every arm joint
    for name in arm:
        lim = limits[name]
        assert (lim.lower, lim.upper) == pytest.approx((hard[name].lower, hard[name].upper))
        assert (lim.velocity, lim.effort) == pytest.approx((hard[name].velocity, hard[name].effort))
        # in force: the soft range, inside the hard one
        assert (lim.lower_in_force, lim.upper_in_force) == pytest.approx(soft[name])
        assert lim.lower <= lim.lower_in_force < lim.upper_in_force <= lim.upper


def test_iiwa_limits_in_force_are_the_urdf_hard_limits():
    # References: pybullet's getJointInfo and pinocchio's model of the same URDF (both read
    # <limit>); this URDF has no <safety_controller>, so the hard limits are in force.
    path = builtin_robot("iiwa").urdf_path
    limits = read_joint_limits(path)
    assert urdf_soft_limits(path) == {}
    hard = pybullet_joint_limits(path)
    model = pin.buildModelFromUrdf(path)
    for name, lim in limits.items():
        assert lim.soft_lower is None
        assert (lim.lower_in_force, lim.upper_in_force) == pytest.approx(
            (hard[name].lower, hard[name].upper)
        )
        q = model.joints[model.getJointId(name)].idx_q
        assert lim.upper_in_force == pytest.approx(model.upperPositionLimit[q])
        assert lim.lower_in_force == pytest.approx(model.lowerPositionLimit[q])


def test_urdf_without_velocity_limit_is_a_one_line_config_error(tmp_path):
    urdf = tmp_path / "bad.urdf"
    urdf.write_text(
        '<robot name="bad"><link name="a"/><link name="b"/>'
        '<joint name="j" type="revolute"><parent link="a"/><child link="b"/>'
        '<axis xyz="0 0 1"/><limit lower="-1" upper="1" effort="5"/></joint></robot>'
    )
    with pytest.raises(ConfigError, match="velocity") as err:
        read_joint_limits(urdf)
    assert "\n" not in str(err.value)
    with pytest.raises(ConfigError, match="not found"):
        read_joint_limits(tmp_path / "missing.urdf")


# --------------------------------------------------------- kinematics and dynamics
@pytest.mark.parametrize("name", sorted(BUILTIN_ROBOTS))
def test_tip_position_matches_pinocchio_forward_kinematics(name):
    # Reference: pinocchio's forward kinematics of the same URDF (frame placement of the tip
    # link). Agreement shows the base sits at the world origin and the tip is the link origin.
    spec = builtin_robot(name)
    world = _world(name)
    model = pin.buildModelFromUrdf(spec.urdf_path)
    data = model.createData()
    frame = model.getFrameId(spec.end_effector)
    rng = np.random.default_rng(3)
    try:
        for _ in range(5):
            q = rng.uniform(np.maximum(world.lower_rad, -3), np.minimum(world.upper_rad, 3))
            world.reset_joints(q)
            q_pin = pin.neutral(model)
            for name_j, angle in zip(world.joint_names, q, strict=True):
                joint = model.joints[model.getJointId(name_j)]
                q_pin[joint.idx_q] = angle
            pin.framesForwardKinematics(model, data, q_pin)
            np.testing.assert_allclose(world.tip_position(), data.oMf[frame].translation, atol=1e-6)
    finally:
        world.close()


def test_gravity_torques_match_pinocchio():
    # Reference: pinocchio's generalized gravity (RNEA with zero velocity and acceleration) on
    # the same URDF; pybullet loads the URDF inertias (URDF_USE_INERTIA_FROM_FILE).
    spec = builtin_robot("iiwa")
    world = _world("iiwa")
    model = pin.buildModelFromUrdf(spec.urdf_path)
    data = model.createData()
    try:
        q = np.array([0.3, 0.7, -0.4, -1.2, 0.5, 0.9, 0.1])
        tau_bullet = world.inverse_dynamics(q, np.zeros(7), np.zeros(7))
        tau_pin = pin.computeGeneralizedGravity(model, data, q)
        np.testing.assert_allclose(tau_bullet, tau_pin, rtol=1e-6, atol=1e-6)
        assert np.max(np.abs(tau_pin)) > 1.0  # gravity does load this posture
    finally:
        world.close()


def test_push_gives_the_rigid_body_acceleration():
    # Reference: rigid-body dynamics M(q) qdd = J(q)^T F (no gravity load in the plane, zero
    # velocity), with M and J from pinocchio; pybullet's semi-implicit Euler step gives
    # qd(dt) = qdd dt after one step from rest.
    world = ArmWorld(PLANAR_URDF, "tool_tip", control_hz=240.0)
    model = pin.buildModelFromUrdf(PLANAR_URDF)
    data = model.createData()
    try:
        q = np.array([0.3, 1.1])
        world.reset_joints(q)
        world.send_command("torque", np.zeros(2))
        force = np.array([2.0, -3.0, 0.0])
        world.apply_push(force, duration_s=1.0 / 240.0)
        world.step()
        _, qd = world.joint_state()
        frame = model.getFrameId("tool_tip")
        jacobian = pin.computeFrameJacobian(model, data, q, frame, pin.LOCAL_WORLD_ALIGNED)[:3]
        qdd = pin.aba(model, data, q, np.zeros(2), jacobian.T @ force)
        np.testing.assert_allclose(qd, qdd / 240.0, rtol=2e-3, atol=1e-6)
        assert np.allclose(world.push_force_n, 0.0)  # the push is over after its duration
    finally:
        world.close()


def test_payload_adds_its_mass_at_the_tip_link():
    # Reference: pinocchio's articulated-body algorithm (Featherstone 2008, "Rigid Body
    # Dynamics Algorithms") on the same URDF with a point mass added at the tip link's centre
    # of mass. From rest, one semi-implicit Euler step gives qd(dt) = qdd dt.
    spec = builtin_robot("iiwa")
    world = _world("iiwa")
    model = pin.buildModelFromUrdf(spec.urdf_path)
    data = model.createData()
    try:
        q = np.array([0.2, 0.8, 0.1, -1.0, 0.3, 0.7, 0.0])
        tau = pin.computeGeneralizedGravity(model, data, q)  # holds the arm without payload
        world.set_payload(1.5)
        world.reset_joints(q)
        world.send_command("torque", tau)
        world.step()
        _, qd = world.joint_state()
        joint = model.getJointId("lbr_iiwa_joint_7")
        com = model.inertias[joint].lever
        model.inertias[joint] = model.inertias[joint] + pin.Inertia(1.5, com, np.zeros((3, 3)))
        qdd = pin.aba(model, model.createData(), q, np.zeros(7), tau)
        assert np.linalg.norm(qdd) > 1.0  # the payload does make the arm sag
        np.testing.assert_allclose(qd, qdd / 240.0, rtol=1e-3, atol=1e-5)
        assert world.payload_kg == 1.5
        with pytest.raises(ConfigError, match="mass_kg"):
            world.set_payload(-1.0)
    finally:
        world.close()


def test_every_motor_command_goes_through_send_command(monkeypatch):
    world = ArmWorld(PLANAR_URDF, "tool_tip")
    calls = []
    original = world.client.setJointMotorControlArray

    def spy(body, joints, mode, **kwargs):
        calls.append((mode, kwargs))
        return original(body, joints, mode, **kwargs)

    try:
        monkeypatch.setattr(world.client, "setJointMotorControlArray", spy)
        world.send_command("velocity", np.array([0.1, -0.2]))
        assert calls[-1][0] == pybullet.VELOCITY_CONTROL
        assert calls[-1][1]["targetVelocities"] == [0.1, -0.2]
        assert calls[-1][1]["forces"] == [20.0, 20.0]  # the URDF effort limits
        world.send_command("torque", np.array([1.0, 2.0]))
        # Switching to torque first releases the velocity motors (zero force), then commands.
        assert calls[-2][0] == pybullet.VELOCITY_CONTROL and calls[-2][1]["forces"] == [0.0, 0.0]
        assert calls[-1][0] == pybullet.TORQUE_CONTROL and calls[-1][1]["forces"] == [1.0, 2.0]
        with pytest.raises(ValueError, match="finite"):
            world.send_command("torque", np.array([np.nan, 0.0]))
        with pytest.raises(ConfigError, match="control"):
            world.send_command("position", np.zeros(2))
    finally:
        world.close()


def test_world_rejects_a_link_not_in_the_urdf():
    with pytest.raises(ConfigError, match="end_effector") as err:
        ArmWorld(PLANAR_URDF, "gripper")
    assert "tool_tip" in str(err.value) and "\n" not in str(err.value)


# ------------------------------------------------------------------------ sensors
def test_encoder_noise_std_matches_configuration():
    # Reference: the chi-square distribution of the sample variance of Gaussian samples,
    # (n - 1) s^2 / sigma^2 ~ chi2(n - 1) (textbook statistics); a 1e-6 two-sided band.
    encoders = JointEncoders(angle_noise_rad=0.01, velocity_noise_rad_s=0.05)
    rng = np.random.default_rng(7)
    truth = np.array([0.3, -1.0, 2.0])
    readings = [encoders.read(truth, np.zeros(3), rng) for _ in range(4000)]
    angle = np.array([r[0] for r in readings]) - truth
    velocity = np.array([r[1] for r in readings])
    n = angle.size
    low, high = stats.chi2.ppf([1e-6, 1 - 1e-6], n - 1) / (n - 1)
    assert low < angle.var(ddof=1) / 0.01**2 < high
    assert low < velocity.var(ddof=1) / 0.05**2 < high
    assert abs(angle.mean()) < 6 * 0.01 / np.sqrt(n)
    with pytest.raises(ConfigError, match="encoder_angle_noise_rad"):
        JointEncoders(-0.1, 0.0)


def _camera(noise_px: float = 2.0) -> CameraDescription:
    return pinhole_camera(
        look_at(np.array([1.6, -1.1, 1.2]), np.array([0.4, 0.0, 0.2])),
        640,
        480,
        np.deg2rad(60.0),
        30.0,
        noise_px,
    )


def test_projection_matches_pybullet_view_and_projection_matrices():
    # Reference: pybullet's computeViewMatrix / computeProjectionMatrixFOV (OpenGL pipeline):
    # clip = P V p, ndc = clip / w, u = (ndc_x + 1) W / 2, v = (1 - ndc_y) H / 2.
    camera = _camera()
    pose = camera.base_from_camera
    eye = pose[:3, 3]
    view = (
        np.array(
            pybullet.computeViewMatrix(
                eye.tolist(), (eye + pose[:3, 2]).tolist(), (-pose[:3, 1]).tolist()
            )
        )
        .reshape(4, 4)
        .T
    )
    fov_deg = np.rad2deg(2 * np.arctan(0.5 * camera.height_px / camera.fy_px))
    proj = (
        np.array(pybullet.computeProjectionMatrixFOV(fov_deg, 640 / 480, 0.02, 20.0))
        .reshape(4, 4)
        .T
    )
    ours_view, ours_proj = opengl_matrices(camera, 0.02, 20.0)
    np.testing.assert_allclose(np.array(ours_view).reshape(4, 4).T, view, atol=1e-6)
    np.testing.assert_allclose(np.array(ours_proj).reshape(4, 4).T, proj, atol=1e-6)
    rng = np.random.default_rng(0)
    for point in rng.uniform([0.0, -0.4, 0.0], [0.8, 0.4, 0.6], size=(10, 3)):
        clip = proj @ view @ np.append(point, 1.0)
        ndc = clip[:3] / clip[3]
        expected = np.array([(ndc[0] + 1) * 320.0, (1 - ndc[1]) * 240.0])
        np.testing.assert_allclose(camera.project(point), expected, atol=1e-3)


def test_projection_matches_the_rendered_image():
    # Reference: pybullet's tiny renderer. A small sphere's pixels in the segmentation mask are
    # centred on the projected pixel (within a pixel).
    world = ArmWorld(PLANAR_URDF, "tool_tip")
    try:
        camera = _camera()
        point = np.array([0.5, 0.1, 0.3])
        marker = world.add_marker("probe", 0.025, point)
        view, proj = opengl_matrices(camera)
        _, _, _, _, seg = world.client.getCameraImage(
            640, 480, viewMatrix=view, projectionMatrix=proj, renderer=pybullet.ER_TINY_RENDERER
        )
        rows, cols = np.nonzero(np.asarray(seg).reshape(480, 640) == marker)
        assert rows.size > 20
        centroid = np.array([cols.mean() + 0.5, rows.mean() + 0.5])  # pixel centres at i + 0.5
        np.testing.assert_allclose(centroid, camera.project(point), atol=1.0)
    finally:
        world.close()


def test_field_of_view_and_behind_camera():
    camera = _camera()
    pose = camera.base_from_camera
    ahead = pose[:3, 3] + 1.0 * pose[:3, 2]
    pixel, inside = in_view(camera, ahead)
    assert inside and np.allclose(pixel, [320.0, 240.0])
    behind = pose[:3, 3] - 1.0 * pose[:3, 2]
    assert not in_view(camera, behind)[1]
    # 40 degrees to the side of the axis: outside a 60 x ~75 degree field of view.
    side = pose[:3, 3] + pose[:3, 2] + np.tan(np.deg2rad(40.0)) * pose[:3, 0]
    assert not in_view(camera, side)[1]


def test_occlusion_by_a_box_between_camera_and_point():
    world = ArmWorld(PLANAR_URDF, "tool_tip")
    try:
        camera = _camera(noise_px=0.0)
        point = np.array([-0.3, -0.3, 0.2])  # away from the arm
        watch = PointCamera(
            camera, 240.0, lambda name, p: world.line_of_sight(camera.base_from_camera[:3, 3], p)
        )
        rng = np.random.default_rng(0)
        frame = watch.reset({"target": point}, rng)
        assert frame.visible["target"] and frame.fresh
        np.testing.assert_allclose(frame.pixel_px["target"], camera.project(point))
        midway = 0.5 * (camera.base_from_camera[:3, 3] + point)
        world.add_box("screen", np.array([0.05, 0.05, 0.05]), midway)
        seen = [watch.observe({"target": point + 0.01}, rng) for _ in range(8)]
        assert [f.fresh for f in seen] == [False] * 7 + [True]
        assert not seen[-1].visible["target"]
        # Unseen: the pixel keeps its last value.
        np.testing.assert_allclose(seen[-1].pixel_px["target"], camera.project(point))
    finally:
        world.close()


def test_camera_pixel_noise_std_and_rate():
    # Reference: chi-square band of the sample variance (textbook statistics), as above.
    camera = _camera(noise_px=2.0)
    watch = PointCamera(camera, 240.0, lambda name, p: True)
    assert watch.period_steps == frame_period_steps(240.0, 30.0) == 8
    rng = np.random.default_rng(11)
    point = np.array([0.4, 0.0, 0.2])
    watch.reset({"p": point}, rng)
    pixels = []
    for _ in range(8 * 2000):
        frame = watch.observe({"p": point}, rng)
        if frame.fresh:
            pixels.append(frame.pixel_px["p"] - camera.project(point))
    errors = np.array(pixels).ravel()
    n = errors.size
    low, high = stats.chi2.ppf([1e-6, 1 - 1e-6], n - 1) / (n - 1)
    assert low < errors.var(ddof=1) / 4.0 < high


def test_camera_description_validation():
    with pytest.raises(ConfigError, match="camera_hz"):
        pinhole_camera(np.eye(4), rate_hz=0.0)
    with pytest.raises(ConfigError, match="camera_noise_px"):
        pinhole_camera(np.eye(4), pixel_noise_px=-1.0)


# ------------------------------------------------------------------- base world
def _base_world(robot: str = "rover"):
    from blanket.sim.base_world import BaseWorld
    from blanket_envs.base_goto import ROBOTS
    from blanket_envs.greenhouse_rows import default_layout

    layout = default_layout()
    return BaseWorld(ROBOTS[robot], layout, rest_pose=layout.dock_pose), layout


def test_base_world_reset_repeats_a_run_bit_for_bit():
    # restoreState before placing the base makes repeated runs identical (bullet3 issue #3285).
    world, _ = _base_world()
    try:
        runs = []
        for _ in range(2):
            world.reset(np.array([4.3, 1.3, 0.4]))
            poses = []
            for k in range(40):
                world.command(4.0 + 0.05 * k, 5.0)
                world.step(6)
                poses.append(world.planar_pose())
            runs.append(np.array(poses))
        np.testing.assert_array_equal(runs[0], runs[1])
        assert np.hypot(*(runs[0][-1, :2] - [4.3, 1.3])) > 0.2  # it did drive
    finally:
        world.close()


def test_base_world_velocity_integrates_to_the_pose_change():
    # planar_velocity transfers pybullet's centre-of-mass velocity to the link origin
    # (v_o = v_com + w x (p_o - p_com), rigid-body kinematics, common practice, no source); its
    # trapezoid integral over half a second must match the change of planar_pose.
    from blanket.sim.base_world import PHYSICS_HZ

    world, _ = _base_world()
    try:
        world.reset(np.array([4.3, 0.0, 0.0]))
        world.command(3.0, 6.0)
        world.step(120)
        poses, velocities = [world.planar_pose()], [world.planar_velocity()]
        for _ in range(120):
            world.step()
            poses.append(world.planar_pose())
            velocities.append(world.planar_velocity())
        v = np.array(velocities)
        integral = (v[1:] + v[:-1]).sum(axis=0) / (2 * PHYSICS_HZ)
        change = poses[-1] - poses[0]
        np.testing.assert_allclose(integral, change, atol=2e-3)
        assert abs(change[2]) > 0.15 and np.hypot(*change[:2]) > 0.1  # it drove and turned
        # the origin's velocity differs from the centre of mass's when turning: the transfer
        # term is needed (the rover's mass centre is not at its axle)
        lin, _ = world.client.getBaseVelocity(world.body)
        assert np.hypot(*(np.array(lin[:2]) - v[-1, :2])) > 1e-3
    finally:
        world.close()


def test_base_world_reports_bench_contact_only_when_touching():
    world, layout = _base_world()
    try:
        bench = layout.bench_boxes_m[1]  # the middle bench, y in [-0.4, 0.4]
        world.reset(np.array([0.0, -1.3, np.pi / 2]))  # south aisle, facing the bench
        assert not world.step(12)
        world.command(6.0, 6.0)
        touched = [world.step(6) for _ in range(200)]
        assert any(touched)
        assert world.planar_pose()[1] < bench[1]  # stopped by the bench, not through it
    finally:
        world.close()


def test_base_world_render_gives_an_rgb_image():
    world, _ = _base_world()
    try:
        image = world.render(64, 48)
        assert image.shape == (48, 64, 3) and image.dtype == np.uint8
        assert image.std() > 0  # not a blank frame
    finally:
        world.close()
