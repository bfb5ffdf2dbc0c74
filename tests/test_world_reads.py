"""The world's reads after the hot-path rewrite (issue 22): one pybullet read per physics
state, shared and read-only, dropped by every step and reset; the contact flag and the client's
bound calls agree with pybullet's own answers."""

from __future__ import annotations

import numpy as np
import pytest

from blanket.sim.arm_world import ArmWorld
from blanket.sim.bullet import Client, pybullet
from blanket.sim.robots import builtin_robot
from blanket_envs.arm_reach import PLANAR_URDF


@pytest.fixture
def world():
    w = ArmWorld(PLANAR_URDF, "tool_tip")
    yield w
    w.close()


def _pybullet_state(w: ArmWorld) -> tuple[np.ndarray, np.ndarray]:
    states = pybullet.getJointStates(
        w.robot, list(w.joint_indices), physicsClientId=w.client._client
    )
    return np.array([s[0] for s in states]), np.array([s[1] for s in states])


def test_joint_state_is_read_once_per_physics_state(world):
    world.reset_joints(np.array([0.3, 1.2]))
    first = world.joint_state()
    assert world.joint_state() is first  # the same reading until the world changes
    with pytest.raises(ValueError):
        first[0][0] = 1.0  # read-only: a caller cannot change what others read
    world.send_command("velocity", np.array([1.0, -0.5]))
    world.step()
    after = world.joint_state()
    assert after is not first
    angle, velocity = _pybullet_state(world)
    np.testing.assert_array_equal(after[0], angle)
    np.testing.assert_array_equal(after[1], velocity)
    assert not np.array_equal(after[0], first[0])


def test_tip_position_follows_steps_and_resets(world):
    world.reset_joints(np.array([0.0, 0.0]))
    tip0 = world.tip_position().copy()
    world.reset_joints(np.array([0.5, 0.5]))
    tip1 = world.tip_position()
    state = world.client.getLinkState(world.robot, world.tip_link, computeForwardKinematics=True)
    np.testing.assert_array_equal(tip1, np.array(state[4]))
    assert not np.allclose(tip0, tip1)
    # a change made on the client directly is seen after forget_state()
    world.client.resetJointState(world.robot, world.joint_indices[0], -0.5, 0.0)
    world.forget_state()
    assert world.joint_state()[0][0] == -0.5
    # tip positions of other postures leave the current reading honest
    world.tip_positions_for(np.array([[1.0, 1.0]]))
    np.testing.assert_array_equal(world.joint_state()[0], _pybullet_state(world)[0])


def test_in_contact_agrees_with_the_contact_list():
    spec = builtin_robot("iiwa")
    w = ArmWorld(spec.urdf_path, spec.end_effector)
    try:
        box = w.add_box("bench", np.array([0.3, 0.3, 0.05]), np.array([0.5, 0.0, 0.3]))
        assert box >= 0
        seen = set()
        for _ in range(240):
            w.send_command("velocity", np.array([0.0, 1.5, 0.0, 0.8, 0.0, 0.0, 0.0]))
            w.step()
            flag = w.in_contact()
            assert flag == bool(w.contacts())
            seen.add(flag)
        assert seen == {False, True}  # both answers were checked
    finally:
        w.close()


def test_client_binds_each_call_once_and_can_be_shadowed():
    c = Client()
    try:
        c.setGravity(0.0, 0.0, -9.81)
        bound = c.__dict__["setGravity"]
        assert c.setGravity is bound  # plain attribute lookup from now on
        calls = []
        c.setGravity = lambda *a, **k: calls.append(a)  # an instance attribute shadows it
        c.setGravity(0.0, 0.0, -1.0)
        assert calls == [(0.0, 0.0, -1.0)]
        assert pybullet.getConnectionInfo(physicsClientId=c._client)["isConnected"]
    finally:
        cid = c._client
        c.disconnect()
    assert c._client == -1
    assert not pybullet.getConnectionInfo(physicsClientId=cid)["isConnected"]
