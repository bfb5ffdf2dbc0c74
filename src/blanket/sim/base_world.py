"""A wheeled base on a floor with bench rows, posts and a dock, in its own pybullet client.

One :class:`BaseWorld` owns one :class:`blanket.sim.bullet.Client` (a ``BulletClient``; DIRECT,
or GUI for a human viewer), so several worlds run side by side in one process, as :class:`ArmWorld`
does for arms. Physics runs at :data:`PHYSICS_HZ`; the wheels are driven by pybullet's velocity
motors at the robot's torque limit. The world knows nothing of tasks, rewards or sensors: the
env (``blanket/base-goto-v0``) and the sensor models read it.

Resets restore a snapshot of the settled world (base standing at ``rest_pose``) before placing
the base, so contact caches are identical and steps are deterministic (pybullet's advice for
deterministic resets, bullet3 issue #3285).
"""

from __future__ import annotations

import contextlib
import os
from dataclasses import dataclass
from typing import Protocol

import numpy as np
import pybullet_data
from pybullet_utils.bullet_client import BulletClient

from blanket.sim.bullet import Client, pybullet

__all__ = [
    "PHYSICS_HZ",
    "RobotSpec",
    "RowsLayout",
    "WorldIds",
    "BaseWorld",
    "build_world",
    "spin_in_place",
]

#: Physics rate of every base world (Hz); control rates must divide it.
PHYSICS_HZ = 240


@dataclass(frozen=True)
class RobotSpec:
    """Fixed facts about a simulated base (geometry from its URDF, limits our choice)."""

    urdf: str
    left_joints: tuple[str, ...]
    right_joints: tuple[str, ...]
    wheel_radius_m: float
    track_m: float
    effective_track_factor: float
    icr_offset_m: float
    wheel_speed_limit_rad_s: float
    wheel_torque_limit_n_m: float
    camera_offset_m: float
    camera_height_m: float
    half_length_m: float
    half_width_m: float
    has_gyro: bool


class RowsLayout(Protocol):
    """What :func:`build_world` reads of a layout (e.g. ``blanket_envs.greenhouse_rows``)."""

    bench_boxes_m: np.ndarray
    bench_height_m: float
    landmarks_m: np.ndarray
    post_radius_m: float
    post_height_m: float
    dock_pose: np.ndarray


@dataclass
class WorldIds:
    """Body ids of the world's parts in one physics client."""

    plane: int
    benches: list[int]
    posts: list[int]
    dock: int


def build_world(client: BulletClient, layout: RowsLayout | None, plane_urdf: str) -> WorldIds:
    """Create floor, benches (static boxes), posts (static cylinders) and the dock marker.

    ``layout=None`` gives the bare floor (no benches, posts or dock; ``dock`` is -1).
    """
    plane = client.loadURDF(plane_urdf)
    if layout is None:
        return WorldIds(plane=plane, benches=[], posts=[], dock=-1)
    h = float(layout.bench_height_m)
    benches = []
    for x0, y0, x1, y1 in np.asarray(layout.bench_boxes_m, dtype=float):
        half = [(x1 - x0) / 2, (y1 - y0) / 2, h / 2]
        col = client.createCollisionShape(client.GEOM_BOX, halfExtents=half)
        vis = client.createVisualShape(
            client.GEOM_BOX, halfExtents=half, rgbaColor=[0.45, 0.33, 0.22, 1.0]
        )
        benches.append(
            client.createMultiBody(
                0.0, col, vis, basePosition=[(x0 + x1) / 2, (y0 + y1) / 2, h / 2]
            )
        )
    posts = []
    r, ph = float(layout.post_radius_m), float(layout.post_height_m)
    col = client.createCollisionShape(client.GEOM_CYLINDER, radius=r, height=ph)
    vis = client.createVisualShape(
        client.GEOM_CYLINDER, radius=r, length=ph, rgbaColor=[0.95, 0.85, 0.1, 1.0]
    )
    for x, y in np.asarray(layout.landmarks_m, dtype=float):
        posts.append(client.createMultiBody(0.0, col, vis, basePosition=[x, y, ph / 2]))
    dx, dy, dh = np.asarray(layout.dock_pose, dtype=float)
    pad = client.createVisualShape(
        client.GEOM_BOX, halfExtents=[0.35, 0.3, 0.003], rgbaColor=[0.1, 0.5, 0.9, 0.8]
    )
    dock = client.createMultiBody(
        0.0,
        -1,
        pad,
        basePosition=[dx, dy, 0.003],
        baseOrientation=client.getQuaternionFromEuler([0, 0, dh]),
    )
    return WorldIds(plane=plane, benches=benches, posts=posts, dock=dock)


class BaseWorld:
    """A wheeled base loaded from a URDF onto a floor with bench rows, in its own client.

    Parameters
    ----------
    spec : RobotSpec
        The base: URDF, wheel joints, wheel geometry and motor limits.
    layout : RowsLayout or None
        Benches, posts and dock to build; None for a bare floor.
    gui : bool
        Connect a GUI client (needs a display) instead of DIRECT.
    rest_pose : array_like, shape (3,)
        ``(x_m, y_m, heading_rad)`` where the base settles (0.25 s, wheels held) before the
        snapshot that every :meth:`reset` restores.
    """

    def __init__(
        self,
        spec: RobotSpec,
        layout: RowsLayout | None = None,
        gui: bool = False,
        rest_pose: np.ndarray | tuple[float, float, float] = (0.0, 0.0, 0.0),
    ) -> None:
        self.spec = spec
        self.client = Client(pybullet.GUI if gui else pybullet.DIRECT)
        self._connected = True
        c = self.client
        c.setGravity(0, 0, -9.81)
        c.setPhysicsEngineParameter(fixedTimeStep=1.0 / PHYSICS_HZ)
        self.bodies = build_world(
            c, layout, os.path.join(pybullet_data.getDataPath(), "plane.urdf")
        )
        self.body = c.loadURDF(spec.urdf, [0, 0, 0.3], flags=pybullet.URDF_USE_INERTIA_FROM_FILE)
        names = {}
        for j in range(c.getNumJoints(self.body)):
            info = c.getJointInfo(self.body, j)
            names[info[1].decode()] = j
        self.left_joints = [names[n] for n in spec.left_joints]
        self.right_joints = [names[n] for n in spec.right_joints]
        self._wheels = self.left_joints + self.right_joints
        # Links without an <inertial> get 1 kg and unit inertia from pybullet; make them light.
        for link in range(-1, c.getNumJoints(self.body)):
            dyn = c.getDynamicsInfo(self.body, link)
            if abs(dyn[0] - 1.0) < 1e-12 and np.allclose(dyn[2], 1.0):
                c.changeDynamics(self.body, link, mass=0.01, localInertiaDiagonal=[1e-5] * 3)
        dyn = c.getDynamicsInfo(self.body, -1)
        self._com_in_link = (tuple(dyn[3]), tuple(dyn[4]))
        self._link_in_com = c.invertTransform(*self._com_in_link)  # fixed: found once
        # Height of the link origin above the floor when standing: the wheel axle for the rover
        # (wheel radius), the floor for the husky's base_footprint.
        self._stand_z = spec.wheel_radius_m if spec.urdf.endswith("rover.urdf") else 0.0
        self._place(np.asarray(rest_pose, dtype=float))
        self.command(0.0, 0.0)
        self.step(PHYSICS_HZ // 4)
        self._snapshot = c.saveState()

    # ------------------------------------------------------------------ state
    def _place(self, pose: np.ndarray) -> None:
        """Put the base link at a planar pose, at rest, wheels at zero."""
        c = self.client
        q = c.getQuaternionFromEuler([0.0, 0.0, float(pose[2])])
        p, qq = c.multiplyTransforms(
            [float(pose[0]), float(pose[1]), self._stand_z + 0.002], q, *self._com_in_link
        )
        c.resetBasePositionAndOrientation(self.body, p, qq)
        c.resetBaseVelocity(self.body, [0, 0, 0], [0, 0, 0])
        for j in self._wheels:
            c.resetJointState(self.body, j, 0.0, 0.0)

    def reset(self, pose: np.ndarray) -> None:
        """Restore the settled snapshot, place the base at ``(x_m, y_m, heading_rad)``, stop it."""
        self.client.restoreState(stateId=self._snapshot)
        self._place(np.asarray(pose, dtype=float))
        self.command(0.0, 0.0)

    def command(self, left_rad_s: float, right_rad_s: float) -> None:
        """Wheel velocity motors: ``(left, right)`` target speeds, each side's wheels alike."""
        n_l, n_r = len(self.left_joints), len(self.right_joints)
        self.client.setJointMotorControlArray(
            self.body,
            self._wheels,
            pybullet.VELOCITY_CONTROL,
            targetVelocities=[left_rad_s] * n_l + [right_rad_s] * n_r,
            forces=[self.spec.wheel_torque_limit_n_m] * (n_l + n_r),
        )

    def step(self, substeps: int = 1) -> bool:
        """Advance ``substeps`` physics steps; whether the base touched a bench in any of them."""
        contact = False
        for _ in range(substeps):
            self.client.stepSimulation()
            contact = contact or self.touching_bench()
        return contact

    def touching_bench(self) -> bool:
        """Whether the base is in contact with a bench (after the last physics step)."""
        for bench in self.bodies.benches:
            if self.client.getContactPoints(bodyA=self.body, bodyB=bench):
                return True
        return False

    def link_pose(self) -> tuple[np.ndarray, np.ndarray]:
        """World position and quaternion of the base *link* frame (not its inertial frame)."""
        c = self.client
        pos, orn = c.getBasePositionAndOrientation(self.body)
        inv_pos, inv_orn = self._link_in_com
        p, q = c.multiplyTransforms(pos, orn, inv_pos, inv_orn)
        return np.array(p), np.array(q)

    def planar_pose(self) -> np.ndarray:
        """``(x_m, y_m, heading_rad)`` of the base link frame."""
        p, q = self.link_pose()
        yaw = self.client.getEulerFromQuaternion(q)[2]
        return np.array([p[0], p[1], yaw])

    def planar_velocity(self) -> np.ndarray:
        """World-frame ``(x', y', yaw rate)`` of the link origin.

        Rigid-body velocity transfer from the centre of mass: ``v_o = v_com + w x (p_o - p_com)``.
        """
        lin, ang = self.client.getBaseVelocity(self.body)
        com, _ = self.client.getBasePositionAndOrientation(self.body)
        p, _ = self.link_pose()
        v = np.array(lin) + np.cross(np.array(ang), p - np.array(com))
        return np.array([v[0], v[1], ang[2]])

    # ------------------------------------------------------------------ output
    def render(self, width: int = 320, height: int = 240) -> np.ndarray:
        """An RGB image (height, width, 3) uint8 of the rows from above, following the base."""
        c = self.client
        pose = self.planar_pose()
        view = c.computeViewMatrixFromYawPitchRoll(
            cameraTargetPosition=[pose[0] * 0.3, pose[1] * 0.3, 0.0],
            distance=12.0,
            yaw=0.0,
            pitch=-70.0,
            roll=0.0,
            upAxisIndex=2,
        )
        proj = c.computeProjectionMatrixFOV(fov=60.0, aspect=width / height, nearVal=0.1, farVal=40)
        rgba = c.getCameraImage(width, height, view, proj, renderer=pybullet.ER_TINY_RENDERER)[2]
        return np.asarray(rgba, dtype=np.uint8).reshape(height, width, 4)[:, :, :3]

    def close(self) -> None:
        """Disconnect the pybullet client (safe to call twice)."""
        if self._connected:
            self._connected = False
            with contextlib.suppress(pybullet.error):
                self.client.disconnect()


def spin_in_place(
    spec: RobotSpec, wheel_speed_rad_s: float = 2.0, duration_s: float = 4.0
) -> dict[str, float]:
    """Measure a base's effective-track factor and ICR offset by a spin in place.

    On a bare floor the base settles for 0.5 s at the origin, then spins with wheel commands
    ``(-w, +w)``; the first second is discarded and the yaw rate ``omega`` and the lateral
    velocity ``u`` of the base origin are averaged. The factor is
    ``(r (w_R - w_L) / track) / omega`` (1 for a base that does not slip) and the ICR offset is
    ``-u / omega`` (Martinez et al. 2005, Int J Robot Res 24(10)).

    Returns
    -------
    dict
        ``factor``, ``icr_offset_m``, ``yaw_rate_rad_s`` (measured) and
        ``predicted_yaw_rate_rad_s`` (two-wheel relation with the geometric track).
    """
    world = BaseWorld(spec)  # settles 0.25 s at the origin
    try:
        world.step(PHYSICS_HZ // 2 - PHYSICS_HZ // 4)
        world.command(-wheel_speed_rad_s, wheel_speed_rad_s)
        rates, lateral = [], []
        for k in range(int(duration_s * PHYSICS_HZ)):
            world.step()
            if k >= PHYSICS_HZ:
                vel = world.planar_velocity()
                h = world.planar_pose()[2]
                rates.append(vel[2])
                lateral.append(-np.sin(h) * vel[0] + np.cos(h) * vel[1])
    finally:
        world.close()
    omega = float(np.mean(rates))
    predicted = spec.wheel_radius_m * 2.0 * wheel_speed_rad_s / spec.track_m
    return {
        "factor": predicted / omega,
        "icr_offset_m": -float(np.mean(lateral)) / omega,
        "yaw_rate_rad_s": omega,
        "predicted_yaw_rate_rad_s": predicted,
    }
