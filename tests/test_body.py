"""Tests of the internal arm body model (blanket.body.arm) and the two bench-arm URDFs.

External references used here:
- pybullet (Coumans & Bai, pybullet physics simulation, https://pybullet.org) as an independent
  kinematics and dynamics implementation: getLinkState, calculateJacobian, calculateMassMatrix,
  calculateInverseDynamics, on pybullet_data's URDFs and ours.
- Spong, Hutchinson & Vidyasagar, Robot Modeling and Control (Wiley, 2006): forward kinematics,
  Jacobian and Euler-Lagrange dynamics of the two-link planar elbow manipulator.
"""

from __future__ import annotations

import os
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pinocchio as pin
import pybullet
import pybullet_data
import pytest
from pybullet_utils.bullet_client import BulletClient

from blanket.body import ArmModel
from blanket.body.arm import links_with_invalid_inertia
from blanket.errors import ConfigError

ASSETS = Path(__file__).resolve().parents[1] / "envs" / "blanket_envs" / "assets"
PLANAR = str(ASSETS / "planar_2link.urdf")
POTTING = str(ASSETS / "potting_arm_3dof.urdf")
DATA = pybullet_data.getDataPath()
GRAVITY = 9.81  # pinocchio's default |g| (m/s^2); pybullet is set to the same below

PANDA_ARM = tuple(f"panda_joint{i}" for i in range(1, 8))

# name: (urdf, end effector, controlled joints or None for every movable joint)
ROBOTS = {
    "iiwa": (os.path.join(DATA, "kuka_iiwa", "model.urdf"), "lbr_iiwa_link_7", None),
    "panda_hand": (os.path.join(DATA, "franka_panda", "panda.urdf"), "panda_hand", PANDA_ARM),
    "panda_grasptarget": (
        os.path.join(DATA, "franka_panda", "panda.urdf"),
        "panda_grasptarget",
        PANDA_ARM,
    ),
    "xarm6": (os.path.join(DATA, "xarm", "xarm6_robot.urdf"), "link6", None),
    "planar_2link": (PLANAR, "tool_tip", None),
    "potting_arm_3dof": (POTTING, "tool_tip", None),
}
BUILT_IN = ("iiwa", "panda_hand", "panda_grasptarget", "xarm6")


class BulletArm:
    """pybullet's view of a URDF: the reference implementation the body model is checked against."""

    def __init__(self, urdf: str) -> None:
        self.client = BulletClient(connection_mode=pybullet.DIRECT)
        self.client.setGravity(0.0, 0.0, -GRAVITY)
        # Inertia from the URDF, not recomputed from collision shapes (pybullet docs, loadURDF).
        self.body = self.client.loadURDF(
            urdf, useFixedBase=True, flags=pybullet.URDF_USE_INERTIA_FROM_FILE
        )
        self.link_index: dict[str, int] = {}
        self.movable: list[str] = []
        self.movable_index: list[int] = []
        for j in range(self.client.getNumJoints(self.body)):
            info = self.client.getJointInfo(self.body, j)
            self.link_index[info[12].decode()] = j
            if info[2] != pybullet.JOINT_FIXED:
                self.movable.append(info[1].decode())
                self.movable_index.append(j)

    def full_q(self, joint_names: tuple[str, ...], q: np.ndarray) -> list[float]:
        """Positions of every movable DoF: controlled ones from q, the rest (fingers) at 0."""
        full = [0.0] * len(self.movable)
        for name, value in zip(joint_names, q, strict=True):
            full[self.movable.index(name)] = float(value)
        return full

    def columns(self, joint_names: tuple[str, ...]) -> list[int]:
        return [self.movable.index(name) for name in joint_names]

    def set_q(self, full: list[float]) -> None:
        for j, value in zip(self.movable_index, full, strict=True):
            self.client.resetJointState(self.body, j, value, 0.0)

    def link_frame(self, link: str, full: list[float]) -> tuple[np.ndarray, np.ndarray]:
        """URDF link-frame origin (3,) and its linear Jacobian (3, all DoFs)."""
        self.set_q(full)
        state = self.client.getLinkState(
            self.body, self.link_index[link], computeForwardKinematics=True
        )
        # getLinkState [0] is the link's inertial (COM) frame; [4] is the URDF link frame.
        link_pos = np.array(state[4])
        # calculateJacobian measures localPosition from the URDF link-frame origin (axes of the
        # inertial frame), despite its docstring's "around its center of mass"
        # (bulletphysics/bullet3 issue #4668); [0, 0, 0] is the link-frame origin.
        zeros = [0.0] * len(full)
        linear, _angular = self.client.calculateJacobian(
            self.body, self.link_index[link], [0.0, 0.0, 0.0], full, zeros, zeros
        )
        return link_pos, np.array(linear)

    def mass_matrix(self, full: list[float]) -> np.ndarray:
        return np.array(self.client.calculateMassMatrix(self.body, full))

    def inverse_dynamics(self, full: list[float], v_full: list[float]) -> np.ndarray:
        zeros = [0.0] * len(full)
        return np.array(self.client.calculateInverseDynamics(self.body, full, v_full, zeros))

    def close(self) -> None:
        self.client.disconnect()


@pytest.fixture(scope="module")
def bullet():
    arms: dict[str, BulletArm] = {}

    def get(urdf: str) -> BulletArm:
        if urdf not in arms:
            arms[urdf] = BulletArm(urdf)
        return arms[urdf]

    yield get
    for arm in arms.values():
        arm.close()


@pytest.fixture(scope="module")
def models():
    cache: dict[str, ArmModel] = {}

    def get(name: str) -> ArmModel:
        if name not in cache:
            urdf, tip, joints = ROBOTS[name]
            cache[name] = ArmModel.from_urdf(urdf, tip, joints)
        return cache[name]

    return get


def random_configurations(arm: ArmModel, count: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lower = np.maximum(arm.lower, -np.pi)
    upper = np.minimum(arm.upper, np.pi)
    return rng.uniform(lower, upper, size=(count, arm.n))


# ---------------------------------------------------------------------------- against pybullet
@pytest.mark.parametrize("name", list(ROBOTS))
def test_kinematics_match_pybullet(name, models, bullet):
    """Tip position and linear Jacobian vs pybullet getLinkState / calculateJacobian."""
    arm = models(name)
    ref = bullet(ROBOTS[name][0])
    cols = ref.columns(arm.joint_names)
    worst_p = worst_J = 0.0
    for q in random_configurations(arm, 10, seed=1):
        full = ref.full_q(arm.joint_names, q)
        p_ref, J_ref = ref.link_frame(arm.end_effector, full)
        p, J = arm.tip_position_and_jacobian(q)
        worst_p = max(worst_p, np.abs(p - p_ref).max())
        worst_J = max(worst_J, np.abs(J - J_ref[:, cols]).max())
        np.testing.assert_allclose(arm.tip_position(q), p, atol=1e-14)
        np.testing.assert_allclose(arm.tip_jacobian(q), J, atol=1e-14)
    # pybullet reports link positions at float precision (~1e-8 m at arm scale).
    assert worst_p < 1e-6, worst_p
    assert worst_J < 1e-6, worst_J


@pytest.mark.parametrize("name", list(ROBOTS))
def test_dynamics_match_pybullet(name, models, bullet):
    """Mass matrix vs calculateMassMatrix; g(q) and C(q, v) v + g(q) vs calculateInverseDynamics."""
    arm = models(name)
    ref = bullet(ROBOTS[name][0])
    cols = ref.columns(arm.joint_names)
    rng = np.random.default_rng(2)
    for q in random_configurations(arm, 10, seed=3):
        full = ref.full_q(arm.joint_names, q)
        v = rng.uniform(-1.0, 1.0, size=arm.n)
        v_full = ref.full_q(arm.joint_names, v)
        M_ref = ref.mass_matrix(full)[np.ix_(cols, cols)]
        g_ref = ref.inverse_dynamics(full, [0.0] * len(full))[cols]
        h_ref = ref.inverse_dynamics(full, v_full)[cols]
        scale_M = max(1.0, np.abs(M_ref).max())
        scale_g = max(1.0, np.abs(g_ref).max())
        np.testing.assert_allclose(arm.mass_matrix(q), M_ref, atol=1e-10 * scale_M)
        np.testing.assert_allclose(arm.gravity_torque(q), g_ref, atol=1e-10 * scale_g)
        np.testing.assert_allclose(arm.nonlinear_effects(q, v), h_ref, atol=1e-10 * scale_g)


# ---------------------------------------------------------------------------- textbook planar arm
def planar_reference(q: np.ndarray, l1: float = 0.4, l2: float = 0.3):
    """Two-link planar elbow manipulator (Spong, Hutchinson & Vidyasagar 2006, chapters 3-4;
    from memory): x = l1 c1 + l2 c12, y = l1 s1 + l2 s12, and its Jacobian."""
    c1, s1 = np.cos(q[0]), np.sin(q[0])
    c12, s12 = np.cos(q[0] + q[1]), np.sin(q[0] + q[1])
    position = np.array([l1 * c1 + l2 * c12, l1 * s1 + l2 * s12])
    J = np.array([[-l1 * s1 - l2 * s12, -l2 * s12], [l1 * c1 + l2 * c12, l2 * c12]])
    return position, J


def test_planar_kinematics_textbook(models):
    arm = models("planar_2link")
    assert arm.joint_names == ("shoulder", "elbow")
    for q in random_configurations(arm, 20, seed=4):
        p, J = arm.tip_position_and_jacobian(q)
        p_ref, J_ref = planar_reference(q)
        np.testing.assert_allclose(p[:2], p_ref, atol=1e-12)
        assert p[2] == pytest.approx(0.05, abs=1e-12)  # arm plane 0.05 m above the bench
        np.testing.assert_allclose(J[:2], J_ref, atol=1e-12)
        np.testing.assert_allclose(J[2], 0.0, atol=1e-12)


def test_planar_dynamics_textbook(models):
    """Euler-Lagrange dynamics of the planar elbow manipulator (Spong, Hutchinson & Vidyasagar
    2006, ch. 7, from memory): d11 = m1 lc1^2 + m2 (l1^2 + lc2^2 + 2 l1 lc2 c2) + I1 + I2,
    d12 = m2 (lc2^2 + l1 lc2 c2) + I2, d22 = m2 lc2^2 + I2; with h = -m2 l1 lc2 s2 the
    velocity terms are (h (2 v1 v2 + v2^2), -h v1^2); no gravity in the horizontal plane."""
    arm = models("planar_2link")
    l1 = 0.4
    m1, lc1, I1 = 1.0, 0.2, 0.01346667  # link1 inertial from the URDF
    # link2 plus the 10 g tool-tip marker at 0.3 m, lumped into one body (parallel axis theorem).
    m_rod, m_tip = 0.6, 0.01
    m2 = m_rod + m_tip
    lc2 = (m_rod * 0.15 + m_tip * 0.3) / m2
    I2 = 0.004545 + m_rod * (0.15 - lc2) ** 2 + 4e-7 + m_tip * (0.3 - lc2) ** 2
    rng = np.random.default_rng(5)
    for q in random_configurations(arm, 10, seed=6):
        c2, s2 = np.cos(q[1]), np.sin(q[1])
        d11 = m1 * lc1**2 + m2 * (l1**2 + lc2**2 + 2 * l1 * lc2 * c2) + I1 + I2
        d12 = m2 * (lc2**2 + l1 * lc2 * c2) + I2
        d22 = m2 * lc2**2 + I2
        np.testing.assert_allclose(arm.mass_matrix(q), [[d11, d12], [d12, d22]], atol=1e-10)
        v = rng.uniform(-2.0, 2.0, size=2)
        h = -m2 * l1 * lc2 * s2
        expected = [h * (2 * v[0] * v[1] + v[1] ** 2), -h * v[0] ** 2]
        np.testing.assert_allclose(arm.nonlinear_effects(q, v), expected, atol=1e-10)
        np.testing.assert_allclose(arm.gravity_torque(q), 0.0, atol=1e-12)


# ---------------------------------------------------------------------------- internal consistency
@pytest.mark.parametrize("name", list(ROBOTS))
def test_jacobian_matches_finite_differences(name, models):
    """Central differences of tip_position (common practice, no source)."""
    arm = models(name)
    step = 1e-6
    for q in random_configurations(arm, 5, seed=7):
        _, J = arm.tip_position_and_jacobian(q)
        J_fd = np.empty_like(J)
        for j in range(arm.n):
            dq = np.zeros(arm.n)
            dq[j] = step
            J_fd[:, j] = (arm.tip_position(q + dq) - arm.tip_position(q - dq)) / (2 * step)
        np.testing.assert_allclose(J, J_fd, atol=1e-8)


@pytest.mark.parametrize("name", list(ROBOTS))
def test_forward_dynamics_inverts_mass_matrix(name, models):
    """M(q) qdd + C(q, v) v + g(q) = tau (the manipulator equation, common practice)."""
    arm = models(name)
    rng = np.random.default_rng(8)
    for q in random_configurations(arm, 5, seed=9):
        v = rng.uniform(-1.0, 1.0, size=arm.n)
        tau = rng.uniform(-5.0, 5.0, size=arm.n)
        M = arm.mass_matrix(q)
        np.testing.assert_array_equal(M, M.T)
        expected = np.linalg.solve(M, tau - arm.nonlinear_effects(q, v))
        np.testing.assert_allclose(arm.forward_dynamics(q, v, tau), expected, rtol=1e-8, atol=1e-8)


def test_results_are_not_overwritten_by_later_calls(models):
    arm = models("iiwa")
    q1, q2 = random_configurations(arm, 2, seed=10)
    p1, J1 = arm.tip_position_and_jacobian(q1)
    M1 = arm.mass_matrix(q1)
    kept = (p1.copy(), J1.copy(), M1.copy())
    arm.tip_position_and_jacobian(q2)
    arm.mass_matrix(q2)
    np.testing.assert_array_equal(p1, kept[0])
    np.testing.assert_array_equal(J1, kept[1])
    np.testing.assert_array_equal(M1, kept[2])


def test_joint_order_follows_joint_names(models):
    urdf, tip, _ = ROBOTS["panda_grasptarget"]
    reference = models("panda_grasptarget")
    order = [6, 0, 3, 1, 5, 2, 4]
    permuted = ArmModel.from_urdf(urdf, tip, [PANDA_ARM[i] for i in order])
    assert permuted.joint_names == tuple(PANDA_ARM[i] for i in order)
    np.testing.assert_array_equal(permuted.lower, reference.lower[order])
    np.testing.assert_array_equal(permuted.effort_limit, reference.effort_limit[order])
    rng = np.random.default_rng(11)
    q, v, tau = rng.uniform(-1, 1, size=(3, 7))
    p, J = reference.tip_position_and_jacobian(q)
    p2, J2 = permuted.tip_position_and_jacobian(q[order])
    np.testing.assert_allclose(p2, p, atol=1e-14)
    np.testing.assert_allclose(J2, J[:, order], atol=1e-14)
    np.testing.assert_allclose(
        permuted.mass_matrix(q[order]), reference.mass_matrix(q)[np.ix_(order, order)], atol=1e-14
    )
    np.testing.assert_allclose(
        permuted.forward_dynamics(q[order], v[order], tau[order]),
        reference.forward_dynamics(q, v, tau)[order],
        rtol=1e-10,
        atol=1e-10,
    )


def test_limits_come_from_the_urdf(models):
    planar = models("planar_2link")
    np.testing.assert_array_equal(planar.lower, [-2.6, -2.6])
    np.testing.assert_array_equal(planar.upper, [2.6, 2.6])
    np.testing.assert_array_equal(planar.velocity_limit, [3.0, 3.0])
    np.testing.assert_array_equal(planar.effort_limit, [20.0, 20.0])
    panda = models("panda_hand")
    # franka_panda/panda.urdf in pybullet_data: joint4 upper limit 0, joint7 velocity 2.61.
    assert panda.upper[3] == 0.0
    assert panda.velocity_limit[6] == pytest.approx(2.61)


# ---------------------------------------------------------------------------- miscalibration
def test_length_scale_scales_reach_and_dynamics(models):
    faithful = models("planar_2link")
    scaled = ArmModel.from_urdf(PLANAR, "tool_tip", length_scale=1.03)
    for q in random_configurations(faithful, 5, seed=12):
        np.testing.assert_allclose(
            np.linalg.norm(scaled.tip_position(q)[:2]),
            1.03 * np.linalg.norm(faithful.tip_position(q)[:2]),
            rtol=1e-12,
        )
        p_ref, _ = planar_reference(q, 0.4 * 1.03, 0.3 * 1.03)
        np.testing.assert_allclose(scaled.tip_position(q)[:2], p_ref, atol=1e-12)
        # Uniform growth at constant mass: M ~ m L^2 (dimensional analysis, common practice).
        np.testing.assert_allclose(
            scaled.mass_matrix(q), 1.03**2 * faithful.mass_matrix(q), rtol=1e-12
        )
    potting = models("potting_arm_3dof")
    potting_scaled = ArmModel.from_urdf(POTTING, "tool_tip", length_scale=0.9)
    for q in random_configurations(potting, 5, seed=13):
        # Gravity torque ~ m g L.
        np.testing.assert_allclose(
            potting_scaled.gravity_torque(q), 0.9 * potting.gravity_torque(q), atol=1e-12
        )


def test_mass_scale_scales_gravity_and_inertia(models):
    faithful = models("iiwa")
    urdf, tip, _ = ROBOTS["iiwa"]
    heavy = ArmModel.from_urdf(urdf, tip, mass_scale=1.2)
    for q in random_configurations(faithful, 5, seed=14):
        np.testing.assert_allclose(
            heavy.gravity_torque(q), 1.2 * faithful.gravity_torque(q), rtol=1e-12, atol=1e-12
        )
        np.testing.assert_allclose(heavy.mass_matrix(q), 1.2 * faithful.mass_matrix(q), rtol=1e-12)
        np.testing.assert_allclose(heavy.tip_position(q), faithful.tip_position(q), atol=1e-15)


@pytest.mark.parametrize("name", ["iiwa", "potting_arm_3dof", "planar_2link", "panda_grasptarget"])
def test_payload_adds_point_mass_at_tip(name, models):
    """A point mass m at the tip adds J^T (0, 0, m g) to g(q) and m J^T J to M(q)
    (principle of virtual work / kinetic energy of a point mass, common practice)."""
    faithful = models(name)
    urdf, tip, joints = ROBOTS[name]
    loaded = ArmModel.from_urdf(urdf, tip, joints, payload_kg=0.5)
    for q in random_configurations(faithful, 5, seed=15):
        J = faithful.tip_jacobian(q)
        expected = faithful.gravity_torque(q) + J.T @ np.array([0.0, 0.0, 0.5 * GRAVITY])
        np.testing.assert_allclose(loaded.gravity_torque(q), expected, atol=1e-10)
        np.testing.assert_allclose(
            loaded.mass_matrix(q), faithful.mass_matrix(q) + 0.5 * J.T @ J, atol=1e-10
        )


# ---------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    ("kwargs", "pattern"),
    [
        ({"urdf_path": "/no/such/arm.urdf"}, "urdf_path"),
        ({"end_effector": "gripper"}, r"end_effector: 'gripper'.*links include.*tool_tip"),
        ({"joint_names": ["shoulder", "wrist"]}, r"joint_names: \['wrist'\].*shoulder"),
        ({"joint_names": ["elbow", "elbow"]}, "joint_names: duplicates"),
        ({"joint_names": []}, "joint_names: at least one"),
        ({"length_scale": 0.0}, r"length_scale: .*> 0"),
        ({"length_scale": float("inf")}, "length_scale"),
        ({"mass_scale": -1.0}, r"mass_scale: .*> 0"),
        ({"payload_kg": -0.1}, r"payload_kg: .*>= 0"),
        ({"invalid_inertia": "fix"}, r"invalid_inertia: must be one of"),
    ],
)
def test_bad_construction_raises_one_line_config_error(kwargs, pattern):
    arguments = {"urdf_path": PLANAR, "end_effector": "tool_tip", **kwargs}
    with pytest.raises(ConfigError, match=pattern) as info:
        ArmModel.from_urdf(**arguments)
    assert "\n" not in str(info.value)


def test_unparseable_urdf_raises_one_line_config_error(tmp_path):
    broken = tmp_path / "broken.urdf"
    broken.write_text("<robot name='broken'><link name='base'/><joint")
    with pytest.raises(ConfigError, match="urdf_path: pinocchio could not parse") as info:
        ArmModel.from_urdf(str(broken), "base")
    assert "\n" not in str(info.value)


def test_wrong_vector_shape_raises_value_error(models):
    arm = models("planar_2link")
    with pytest.raises(ValueError, match=r"q: expected shape \(2,\)") as info:
        arm.tip_position(np.zeros(3))
    assert "\n" not in str(info.value)
    with pytest.raises(ValueError, match=r"tau: expected shape \(2,\)"):
        arm.forward_dynamics(np.zeros(2), np.zeros(2), np.zeros(7))


# ---------------------------------------------------------------------------- our URDFs
def test_potting_arm_urdf_limits_and_soft_limits(models, bullet):
    arm = models("potting_arm_3dof")
    assert arm.joint_names == ("base_yaw", "shoulder_pitch", "elbow_pitch")
    np.testing.assert_array_equal(arm.velocity_limit, 2.0)
    assert np.all((arm.effort_limit >= 30.0) & (arm.effort_limit <= 60.0))
    # At q = 0 the arm stands straight up: 0.1 + 0.05 + 0.35 + 0.3 m.
    np.testing.assert_allclose(arm.tip_position(np.zeros(3)), [0.0, 0.0, 0.8], atol=1e-12)

    root = ET.parse(POTTING).getroot()
    soft = {}
    for joint in root.iter("joint"):
        limit, safety = joint.find("limit"), joint.find("safety_controller")
        if safety is not None:
            lo, hi = float(limit.get("lower")), float(limit.get("upper"))
            s_lo = float(safety.get("soft_lower_limit"))
            s_hi = float(safety.get("soft_upper_limit"))
            assert lo < s_lo < s_hi < hi
            soft[joint.get("name")] = (s_lo, s_hi)
    assert soft, "no <safety_controller> in potting_arm_3dof.urdf"
    # pybullet reads the hard limits, not the soft ones (getJointInfo fields 8 and 9).
    ref = bullet(POTTING)
    for name, (s_lo, _s_hi) in soft.items():
        info = ref.client.getJointInfo(ref.body, ref.movable_index[ref.movable.index(name)])
        i = arm.joint_names.index(name)
        assert info[8] == pytest.approx(arm.lower[i]) and info[8] < s_lo
        assert info[9] == pytest.approx(arm.upper[i])


def test_planar_urdf_in_pybullet(bullet):
    ref = bullet(PLANAR)
    assert ref.movable == ["shoulder", "elbow"]
    for j in ref.movable_index:
        info = ref.client.getJointInfo(ref.body, j)
        assert info[2] == pybullet.JOINT_REVOLUTE
        assert tuple(info[13]) == (0.0, 0.0, 1.0)  # joint axis
        assert (info[8], info[9], info[10], info[11]) == pytest.approx((-2.6, 2.6, 20.0, 3.0))
    masses = [ref.client.getDynamicsInfo(ref.body, j)[0] for j in range(3)]
    assert masses == pytest.approx([1.0, 0.6, 0.01])


# ---------------------------------------------------------------------------- invalid inertias
def test_xarm6_invalid_inertias_follow_pybullet(models, bullet):
    """pybullet_data's xarm6 URDF gives link2 and link3 principal moments that break the triangle
    inequality; pybullet's URDF importer zeroes their rotational inertia
    (BulletUrdfImporter::getMassAndInertia2, "Bad inertia tensor properties")."""
    urdf, tip, _ = ROBOTS["xarm6"]
    assert links_with_invalid_inertia(urdf) == ("link2", "link3")
    for name in ("iiwa", "panda_hand", "planar_2link", "potting_arm_3dof"):
        assert links_with_invalid_inertia(ROBOTS[name][0]) == ()
    matched = models("xarm6")
    assert matched.zeroed_inertia_links == ("link2", "link3")
    as_written = ArmModel.from_urdf(urdf, tip, invalid_inertia="keep")
    assert as_written.zeroed_inertia_links == ()
    raw = pin.buildModelFromUrdf(urdf)
    raw_data = raw.createData()
    ref = bullet(urdf)
    for q in random_configurations(matched, 3, seed=16):
        np.testing.assert_allclose(as_written.mass_matrix(q), pin.crba(raw, raw_data, q))
        M_ref = ref.mass_matrix(list(q))
        assert np.abs(as_written.mass_matrix(q) - M_ref).max() > 1e-3
        np.testing.assert_allclose(matched.mass_matrix(q), M_ref, atol=1e-9)


def test_invalid_inertia_removed_from_merged_body(tmp_path, bullet):
    """A link with an impossible inertia (rotated inertial frame), welded at an angle to a valid
    link so both share one pinocchio body: only the bad link's own rotational inertia goes, as in
    pybullet (which keeps welded links apart)."""
    urdf = tmp_path / "welded.urdf"
    urdf.write_text(
        """<?xml version="1.0"?>
<robot name="welded">
  <link name="stand">
    <inertial><mass value="1"/><inertia ixx="0.01" ixy="0" ixz="0" iyy="0.01" iyz="0" izz="0.01"/>
    </inertial>
  </link>
  <link name="arm">
    <inertial><origin xyz="0.1 0.02 0" rpy="0.3 -0.2 0.5"/><mass value="1.5"/>
      <inertia ixx="0.004" ixy="0" ixz="0" iyy="0.005" iyz="0" izz="0.006"/></inertial>
  </link>
  <link name="clamp">
    <inertial><origin xyz="0.01 0 0.02" rpy="0 0.4 0"/><mass value="0.4"/>
      <inertia ixx="0.01" ixy="0.0002" ixz="0" iyy="0.002" iyz="0" izz="0.003"/></inertial>
  </link>
  <link name="hand">
    <inertial><origin xyz="0.05 0 0" rpy="0 0 0"/><mass value="0.5"/>
      <inertia ixx="0.001" ixy="0" ixz="0" iyy="0.002" iyz="0" izz="0.002"/></inertial>
  </link>
  <joint name="swing" type="revolute"><parent link="stand"/><child link="arm"/>
    <origin xyz="0 0 0.1" rpy="0 0 0"/><axis xyz="0 1 0"/>
    <limit lower="-2" upper="2" effort="10" velocity="1"/></joint>
  <joint name="weld" type="fixed"><parent link="arm"/><child link="clamp"/>
    <origin xyz="0.2 0 0" rpy="0 0 0.7"/></joint>
  <joint name="twist" type="revolute"><parent link="clamp"/><child link="hand"/>
    <origin xyz="0.05 0 0" rpy="0 0 0"/><axis xyz="1 0 0"/>
    <limit lower="-2" upper="2" effort="10" velocity="1"/></joint>
</robot>
"""
    )
    assert links_with_invalid_inertia(str(urdf)) == ("clamp",)
    arm = ArmModel.from_urdf(str(urdf), "hand")
    assert arm.zeroed_inertia_links == ("clamp",)
    ref = bullet(str(urdf))
    for q in random_configurations(arm, 5, seed=17):
        np.testing.assert_allclose(arm.mass_matrix(q), ref.mass_matrix(list(q)), atol=1e-9)
        np.testing.assert_allclose(
            arm.gravity_torque(q), ref.inverse_dynamics(list(q), [0.0, 0.0]), atol=1e-9
        )
