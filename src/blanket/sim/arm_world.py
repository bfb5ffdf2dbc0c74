"""A fixed-base URDF arm in its own pybullet client: load, step, reset, perturb, look.

One :class:`ArmWorld` owns one :class:`blanket.sim.bullet.Client` (a
``pybullet_utils.bullet_client.BulletClient``; DIRECT, or GUI for a human viewer), so several
worlds run side by side in one process. The robot's base sits
at the world origin with identity orientation: the base frame *is* the world frame.

Every motor command to the controlled joints goes through :meth:`ArmWorld.send_command`, the
one place that calls ``setJointMotorControlArray`` for them, so a safety check can inspect the
values at the motor call itself.

The true joint state and the tool-tip position are read from pybullet once per physics state:
:meth:`ArmWorld.joint_state` and :meth:`ArmWorld.tip_position` keep their last reading until
the world steps, resets or moves the joints (the env, the safety wrapper before the next
command and its speed check all read the same state). Their arrays are read-only; copy them to
change them. A change made through ``world.client`` directly is seen after the next
:meth:`ArmWorld.step` (or call :meth:`ArmWorld.forget_state`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from blanket.errors import ConfigError
from blanket.sim.bullet import Client, pybullet
from blanket.sim.urdf_limits import JointLimit, read_joint_limits, read_link_names

__all__ = ["ArmWorld", "Contact", "CONTROL_MODES"]

#: Control modes of :meth:`ArmWorld.send_command`.
CONTROL_MODES = ("velocity", "torque")


@dataclass(frozen=True)
class Contact:
    """One contact point reported by pybullet between the arm and something.

    Attributes
    ----------
    arm_link : str
        Arm link in contact (URDF link name).
    other : str
        ``"self:<link name>"`` for self-contact, else the name the other body was added under.
    position_m : numpy.ndarray
        Contact point on the arm, world (= base) frame.
    normal_force_n : float
        Normal force of the contact.
    """

    arm_link: str
    other: str
    position_m: np.ndarray
    normal_force_n: float


class ArmWorld:
    """A fixed-base arm loaded from a URDF into its own pybullet client.

    Parameters
    ----------
    urdf_path : str or Path
        URDF of a fixed-base arm.
    end_effector : str
        URDF link whose origin is the tool tip.
    control_hz : float
        Control rate; the physics timestep is ``1 / control_hz`` (one ``stepSimulation`` per
        control step).
    controlled_joints : sequence of str, optional
        Movable joints the commands drive, in command order. Default: every movable joint
        in URDF order.
    held_joint_positions : dict of str to float, optional
        Movable joints not controlled (e.g. gripper fingers): held at these positions by a
        position motor at their effort limit. Every movable joint that is not controlled must
        appear here (default position 0 when omitted).
    gravity_m_s2 : array_like, shape (3,)
        Gravity in the world frame.
    gui : bool
        Connect a GUI client (needs a display) instead of DIRECT.
    self_collision : bool
        Enable self-collision (adjacent links excluded) so self-contact is simulated and reported.
    """

    def __init__(
        self,
        urdf_path: str | Path,
        end_effector: str,
        control_hz: float = 240.0,
        controlled_joints: list[str] | tuple[str, ...] | None = None,
        held_joint_positions: dict[str, float] | None = None,
        gravity_m_s2: np.ndarray | tuple[float, float, float] = (0.0, 0.0, -9.81),
        gui: bool = False,
        self_collision: bool = True,
    ) -> None:
        self.urdf_path = str(Path(urdf_path).resolve())
        if not Path(self.urdf_path).is_file():
            raise ConfigError(f"urdf: file not found: {urdf_path}")
        if not control_hz > 0.0:
            raise ConfigError(f"control_hz: must be > 0, got {control_hz}")
        link_names = read_link_names(self.urdf_path)
        if end_effector not in link_names:
            raise ConfigError(
                f"end_effector: link {end_effector!r} is not in {Path(self.urdf_path).name} "
                f"(links include {', '.join(link_names[-5:])})"
            )
        limits = read_joint_limits(self.urdf_path)
        if controlled_joints is None:
            controlled_joints = list(limits)
        unknown = [name for name in controlled_joints if name not in limits]
        if unknown or not controlled_joints:
            raise ConfigError(
                f"controlled_joints: {unknown or '[]'} are not movable joints of the URDF "
                f"(movable: {', '.join(limits)})"
            )
        self.control_hz = float(control_hz)
        self.dt = 1.0 / self.control_hz
        self.end_effector = end_effector
        self.joint_limits: tuple[JointLimit, ...] = tuple(limits[n] for n in controlled_joints)
        self.joint_names: tuple[str, ...] = tuple(controlled_joints)
        self.gravity_m_s2 = np.asarray(gravity_m_s2, dtype=float).copy()

        self.client = Client(pybullet.GUI if gui else pybullet.DIRECT)
        self._connected = True
        c = self.client
        c.resetSimulation()
        c.setGravity(*self.gravity_m_s2)
        c.setTimeStep(self.dt)
        flags = pybullet.URDF_USE_INERTIA_FROM_FILE
        if self_collision:
            flags |= (
                pybullet.URDF_USE_SELF_COLLISION | pybullet.URDF_USE_SELF_COLLISION_EXCLUDE_PARENT
            )
        self.robot = c.loadURDF(
            self.urdf_path,
            basePosition=[0.0, 0.0, 0.0],
            baseOrientation=[0.0, 0.0, 0.0, 1.0],
            useFixedBase=True,
            flags=flags,
        )
        # pybullet joint index j moves link j; the base link has index -1.
        n_bullet = c.getNumJoints(self.robot)
        self._link_names: dict[int, str] = {-1: c.getBodyInfo(self.robot)[0].decode()}
        joint_index: dict[str, int] = {}
        link_index: dict[str, int] = {self._link_names[-1]: -1}
        # Movable joints in pybullet's order: the degrees of freedom of its dynamics calls.
        self._movable: list[int] = []
        for j in range(n_bullet):
            info = c.getJointInfo(self.robot, j)
            joint_index[info[1].decode()] = j
            link_index[info[12].decode()] = j
            self._link_names[j] = info[12].decode()
            if info[2] != pybullet.JOINT_FIXED:
                self._movable.append(j)
        if end_effector not in link_index:
            raise ConfigError(
                f"end_effector: link {end_effector!r} was merged away by pybullet; pick a link "
                f"with its own joint (links: {', '.join(list(link_index)[-5:])})"
            )
        self.tip_link = link_index[end_effector]
        self.joint_indices: tuple[int, ...] = tuple(joint_index[n] for n in self.joint_names)
        self._joint_list = list(self.joint_indices)  # the argument pybullet's calls take
        self._n = len(self.joint_indices)
        self._state: tuple[np.ndarray, np.ndarray] | None = None  # last joint_state reading
        self._tip: np.ndarray | None = None  # last tip_position reading
        held = dict(held_joint_positions or {})
        self._held: list[tuple[int, float, float]] = []
        for name, limit in limits.items():
            if name not in self.joint_names:
                self._held.append((joint_index[name], float(held.get(name, 0.0)), limit.effort))
        # Columns of the controlled joints among the movable ones; held joints at their hold.
        self._dof_columns = np.array([self._movable.index(j) for j in self.joint_indices])
        self._dof_angles = np.zeros(len(self._movable))
        for j, position, _ in self._held:
            self._dof_angles[self._movable.index(j)] = position
        # Every movable joint controlled, in pybullet's order: dynamics calls take the values as
        # they are.
        self._all_controlled = self._dof_columns.tolist() == list(range(len(self._movable)))
        self._zero_dofs = [0.0] * len(self._movable)

        # URDF joint damping made a torque-controlled wrist blow up at 240 Hz: zero all damping.
        for link in range(-1, n_bullet):
            c.changeDynamics(
                self.robot, link, linearDamping=0.0, angularDamping=0.0, jointDamping=0.0
            )
        tip_dynamics = c.getDynamicsInfo(self.robot, self.tip_link)
        self._tip_mass0 = float(tip_dynamics[0])
        # changeDynamics(mass=...) alone recomputes the inertia from the collision shape,
        # discarding the URDF's: always pass the URDF inertia back with a new mass.
        self._tip_inertia0 = [float(v) for v in tip_dynamics[2]]
        self.lower_rad = np.array([lim.lower_in_force for lim in self.joint_limits])
        self.upper_rad = np.array([lim.upper_in_force for lim in self.joint_limits])
        self.velocity_limit_rad_s = np.array([lim.velocity for lim in self.joint_limits])
        self.torque_limit_n_m = np.array([lim.effort for lim in self.joint_limits])

        self._mode = "velocity"
        self._velocity_motor_force = self.torque_limit_n_m.tolist()
        self._payload_kg = 0.0
        self._push_force_n = np.zeros(3)
        self._push_steps_left = 0
        self._tool_force_n: list[float] | None = None
        self._bodies: dict[int, str] = {}
        self._configure_motors("velocity")
        self._initial_state = c.saveState()

    def exclude_touching_self_pairs(self, angle_rad: np.ndarray) -> list[tuple[str, str]]:
        """Stop simulating self-collision between link pairs that touch at ``angle_rad``.

        Links that touch in a reference posture (e.g. a hand on its flange, two closed
        fingers) are parts of one assembly, not a self-collision; their pair is filtered out
        (``setCollisionFilterPair``). Returns the excluded pairs (link names).
        """
        c = self.client
        self.reset_joints(angle_rad)
        c.performCollisionDetection()
        pairs = sorted({(p[3], p[4]) for p in c.getContactPoints(self.robot, self.robot)})
        for a, b in pairs:
            c.setCollisionFilterPair(self.robot, self.robot, a, b, enableCollision=0)
        self._initial_state = c.saveState()
        return [(self._link_names[a], self._link_names[b]) for a, b in pairs]

    # ----------------------------------------------------------------- motors
    def _configure_motors(self, mode: str) -> None:
        """Set up the motors for ``mode`` (setup calls, not commands) and hold passive joints."""
        c = self.client
        n = len(self.joint_indices)
        if mode == "torque":
            # Release the default velocity motors, else they fight the commanded torques.
            c.setJointMotorControlArray(
                self.robot,
                list(self.joint_indices),
                pybullet.VELOCITY_CONTROL,
                targetVelocities=[0.0] * n,
                forces=[0.0] * n,
            )
        for j, position, effort in self._held:
            c.setJointMotorControl2(
                self.robot, j, pybullet.POSITION_CONTROL, targetPosition=position, force=effort
            )
        self._mode = mode

    def set_velocity_motor_force(self, force_n_m: np.ndarray) -> None:
        """Cap the force velocity motors may use (default: the URDF effort limits)."""
        force = np.asarray(force_n_m, dtype=float)
        if force.shape != self.torque_limit_n_m.shape or not np.all(force > 0):
            raise ConfigError(
                f"velocity motor force: expected {self.torque_limit_n_m.size} values > 0, "
                f"got {force!r}"
            )
        self._velocity_motor_force = np.minimum(force, self.torque_limit_n_m).tolist()

    def send_command(self, mode: str, values: np.ndarray) -> None:
        """Send one motor command to the controlled joints: the only path to the motors.

        Parameters
        ----------
        mode : {"velocity", "torque"}
            ``velocity``: ``VELOCITY_CONTROL`` with target velocities (rad/s) and force = the
            URDF effort limit; ``torque``: ``TORQUE_CONTROL`` with these torques (N m), after
            the velocity motors are released.
        values : numpy.ndarray, shape (n_joints,)
            Target joint velocities or torques, in :attr:`joint_names` order.
        """
        if mode != self._mode:
            if mode not in CONTROL_MODES:
                raise ConfigError(f"control: must be one of {CONTROL_MODES}, got {mode!r}")
        values = np.asarray(values, dtype=float)
        listed = values.tolist()
        if values.shape != (self._n,) or not all(map(math.isfinite, listed)):
            raise ValueError(f"command: expected {self._n} finite values, got {values!r}")
        if mode != self._mode:
            self._configure_motors(mode)
        if mode == "velocity":
            self.client.setJointMotorControlArray(
                self.robot,
                self._joint_list,
                pybullet.VELOCITY_CONTROL,
                targetVelocities=listed,
                forces=self._velocity_motor_force,
            )
        else:
            self.client.setJointMotorControlArray(
                self.robot,
                self._joint_list,
                pybullet.TORQUE_CONTROL,
                forces=listed,
            )

    # ------------------------------------------------------------------ state
    def reset_joints(self, angle_rad: np.ndarray, velocity_rad_s: np.ndarray | None = None) -> None:
        """Restore the freshly loaded state, then set the controlled joints (no URDF reload).

        The payload set by :meth:`set_payload` is kept; a pending push is cancelled.
        """
        c = self.client
        self.forget_state()
        c.restoreState(self._initial_state)
        angle_rad = np.asarray(angle_rad, dtype=float)
        velocity = np.zeros_like(angle_rad) if velocity_rad_s is None else velocity_rad_s
        for j, q, qd in zip(self.joint_indices, angle_rad, velocity, strict=True):
            c.resetJointState(self.robot, j, float(q), float(qd))
        for j, position, _ in self._held:
            c.resetJointState(self.robot, j, position, 0.0)
        self._push_steps_left = 0
        self._push_force_n = np.zeros(3)
        self._tool_force_n = None
        self._configure_motors(self._mode)
        c.performCollisionDetection()  # so contacts() describes the new posture

    def forget_state(self) -> None:
        """Drop the kept joint-state and tip readings: the next calls ask pybullet."""
        self._state = None
        self._tip = None

    def joint_state(self) -> tuple[np.ndarray, np.ndarray]:
        """True angles (rad) and velocities (rad/s) of the controlled joints (read-only
        arrays, read once per physics state)."""
        state = self._state
        if state is None:
            states = self.client.getJointStates(self.robot, self._joint_list)
            angle = np.array([s[0] for s in states], dtype=float)
            velocity = np.array([s[1] for s in states], dtype=float)
            angle.flags.writeable = False
            velocity.flags.writeable = False
            state = self._state = (angle, velocity)
        return state

    def tip_position(self) -> np.ndarray:
        """World (= base) position of the tool tip link's URDF frame origin, m (read-only,
        read once per physics state)."""
        tip = self._tip
        if tip is None:
            tip = self._tip = self._read_tip()
            tip.flags.writeable = False
        return tip

    def _read_tip(self) -> np.ndarray:
        state = self.client.getLinkState(self.robot, self.tip_link, computeForwardKinematics=True)
        return np.array(state[4], dtype=float)

    def tip_positions_for(self, angles_rad: np.ndarray) -> np.ndarray:
        """Tool-tip positions for many joint configurations, shape (m, 3).

        Moves the joints to each configuration and reads pybullet's forward kinematics; the
        caller resets the world afterwards (:meth:`reset_joints`).
        """
        self.forget_state()
        out = np.empty((len(angles_rad), 3))
        for i, q in enumerate(np.asarray(angles_rad, dtype=float)):
            for j, qj in zip(self.joint_indices, q, strict=True):
                self.client.resetJointState(self.robot, j, float(qj), 0.0)
            out[i] = self._read_tip()
        return out

    def step(self) -> None:
        """One physics step of ``1 / control_hz`` seconds, applying any pending push."""
        if self._push_steps_left > 0:
            self.client.applyExternalForce(
                self.robot,
                self.tip_link,
                forceObj=self._push_force_n.tolist(),
                posObj=self.tip_position().tolist(),
                flags=pybullet.WORLD_FRAME,
            )
            self._push_steps_left -= 1
        if self._tool_force_n is not None:
            self.client.applyExternalForce(
                self.robot,
                self.tip_link,
                forceObj=self._tool_force_n,
                posObj=self.tip_position().tolist(),
                flags=pybullet.WORLD_FRAME,
            )
            self._tool_force_n = None
        self._state = None
        self._tip = None
        self.client.stepSimulation()

    # ---------------------------------------------------------- perturbations
    def set_payload(self, mass_kg: float) -> None:
        """Add ``mass_kg`` at the tool tip link (at its centre of mass) in the simulation only."""
        mass_kg = float(mass_kg)
        if not (np.isfinite(mass_kg) and mass_kg >= 0.0):
            raise ConfigError(f"mass_kg: must be finite and >= 0, got {mass_kg}")
        self._payload_kg = mass_kg
        self._apply_payload()

    def _apply_payload(self) -> None:
        # A point mass at the link's centre of mass adds no inertia about that centre.
        self.client.changeDynamics(
            self.robot,
            self.tip_link,
            mass=self._tip_mass0 + self._payload_kg,
            localInertiaDiagonal=self._tip_inertia0,
        )

    @property
    def payload_kg(self) -> float:
        return self._payload_kg

    def apply_push(self, force_n: np.ndarray, duration_s: float) -> None:
        """Push the tool tip with a world-frame force (N) over the next ``duration_s`` seconds."""
        force = np.asarray(force_n, dtype=float)
        if force.shape != (3,) or not np.all(np.isfinite(force)):
            raise ConfigError(f"force_n: expected 3 finite values (N), got {force_n!r}")
        if not (np.isfinite(duration_s) and duration_s >= 0.0):
            raise ConfigError(f"duration_s: must be finite and >= 0, got {duration_s}")
        self._push_force_n = force.copy()
        self._push_steps_left = int(round(duration_s * self.control_hz))

    def apply_tool_force(self, force_n: np.ndarray) -> None:
        """Apply a world-frame force (N) at the tool tip during the next step only, on top of
        any push (an env's own forcing, e.g. a random force drawn every step)."""
        self._tool_force_n = [float(v) for v in force_n]

    @property
    def push_force_n(self) -> np.ndarray:
        """Force applied at the next step (zeros when no push is pending)."""
        return self._push_force_n.copy() if self._push_steps_left > 0 else np.zeros(3)

    # ------------------------------------------------------------ other bodies
    def add_box(
        self,
        name: str,
        half_extents_m: np.ndarray,
        position_m: np.ndarray,
        rgba: tuple[float, float, float, float] = (0.6, 0.5, 0.4, 1.0),
    ) -> int:
        """Add a static box with collision (mass 0); its contacts are reported under ``name``."""
        c = self.client
        half = [float(v) for v in half_extents_m]
        body = c.createMultiBody(
            baseMass=0.0,
            baseCollisionShapeIndex=c.createCollisionShape(pybullet.GEOM_BOX, halfExtents=half),
            baseVisualShapeIndex=c.createVisualShape(
                pybullet.GEOM_BOX, halfExtents=half, rgbaColor=list(rgba)
            ),
            basePosition=[float(v) for v in position_m],
        )
        self._bodies[body] = name
        self._initial_state = c.saveState()
        return body

    def add_marker(
        self,
        name: str,
        radius_m: float,
        position_m: np.ndarray,
        rgba: tuple[float, float, float, float] = (0.1, 0.4, 1.0, 0.8),
    ) -> int:
        """Add a visual-only sphere (no collision shape) that :meth:`move_body` can move."""
        c = self.client
        body = c.createMultiBody(
            baseMass=0.0,
            baseCollisionShapeIndex=-1,
            baseVisualShapeIndex=c.createVisualShape(
                pybullet.GEOM_SPHERE, radius=float(radius_m), rgbaColor=list(rgba)
            ),
            basePosition=[float(v) for v in position_m],
        )
        self._bodies[body] = name
        self._initial_state = c.saveState()
        return body

    def move_body(self, body: int, position_m: np.ndarray) -> None:
        """Place a body added by :meth:`add_box` / :meth:`add_marker` at a world position."""
        self.client.resetBasePositionAndOrientation(
            body, [float(v) for v in position_m], [0.0, 0.0, 0.0, 1.0]
        )

    # -------------------------------------------------------------- contacts
    def in_contact(self) -> bool:
        """Whether the arm touches an added body or itself (after the last step): the same
        answer as ``bool(contacts())`` without building the contact list."""
        return bool(self.client.getContactPoints(bodyA=self.robot))

    def contacts(self) -> list[Contact]:
        """Contacts of the arm with added bodies and with itself (after the last step)."""
        c = self.client
        out: list[Contact] = []
        for point in c.getContactPoints(bodyA=self.robot):
            other_body, link_a, link_b = point[2], point[3], point[4]
            if other_body == self.robot:
                other = f"self:{self._link_names.get(link_b, str(link_b))}"
            else:
                other = self._bodies.get(other_body, f"body{other_body}")
            out.append(
                Contact(
                    arm_link=self._link_names.get(link_a, str(link_a)),
                    other=other,
                    position_m=np.array(point[5], dtype=float),
                    normal_force_n=float(point[9]),
                )
            )
        return out

    # ------------------------------------------------------------ line of sight
    def line_of_sight(
        self,
        origin_m: np.ndarray,
        point_m: np.ndarray,
        own: tuple[int, int] | None = None,
        margin_m: float = 0.0,
    ) -> bool:
        """Whether a ray from ``origin_m`` reaches ``point_m`` unblocked (pybullet ``rayTest``).

        Parameters
        ----------
        origin_m, point_m : numpy.ndarray, shape (3,)
            Ray start (camera centre) and end (the watched point), world frame.
        own : (body, link) or None
            The body link the point belongs to (e.g. the tool tip link); hitting it first
            counts as seeing the point.
        margin_m : float
            Hits closer than this to the point do not block it (the point sits inside or on
            the surface of the geometry around it).
        """
        origin = np.asarray(origin_m, dtype=float)
        point = np.asarray(point_m, dtype=float)
        length = float(np.linalg.norm(point - origin))
        hit = self.client.rayTest(origin.tolist(), point.tolist())[0]
        body, link, fraction = hit[0], hit[1], hit[2]
        if body < 0:
            return True
        if own is not None and (body, link) == own:
            return True
        return (1.0 - fraction) * length <= margin_m

    def render(
        self, view_matrix: list[float], projection_matrix: list[float], width: int, height: int
    ) -> np.ndarray:
        """An RGB image (height, width, 3) uint8 from pybullet's tiny renderer."""
        _, _, rgba, _, _ = self.client.getCameraImage(
            width,
            height,
            viewMatrix=view_matrix,
            projectionMatrix=projection_matrix,
            renderer=pybullet.ER_TINY_RENDERER,
        )
        image = np.asarray(rgba, dtype=np.uint8).reshape(height, width, 4)
        return np.ascontiguousarray(image[:, :, :3])

    # ------------------------------------------------------------ dynamics
    def _all_dofs(self, values: np.ndarray | None, held: np.ndarray | None = None) -> list[float]:
        """Controlled-joint values spread over every movable joint (held ones: ``held`` or 0)."""
        if self._all_controlled:
            return self._zero_dofs if values is None else np.asarray(values, dtype=float).tolist()
        out = np.zeros(len(self._movable)) if held is None else held.copy()
        if values is not None:
            out[self._dof_columns] = np.asarray(values, dtype=float)
        return out.tolist()

    def inverse_dynamics(
        self, angle_rad: np.ndarray, velocity_rad_s: np.ndarray, acceleration_rad_s2: np.ndarray
    ) -> np.ndarray:
        """Joint torques from pybullet's ``calculateInverseDynamics`` for the controlled joints.

        ``inverse_dynamics(q, q', 0)`` is the bias torque ``h(q, q')`` (gravity, Coriolis and
        centrifugal terms). Held joints are taken at their hold positions with zero velocity
        and acceleration. pybullet computes these on the model as loaded: a payload set by
        :meth:`set_payload` does not enter them (it acts in the simulation only).
        """
        tau = self.client.calculateInverseDynamics(
            self.robot,
            self._all_dofs(angle_rad, self._dof_angles),
            self._all_dofs(velocity_rad_s),
            self._all_dofs(acceleration_rad_s2),
        )
        if self._all_controlled:
            return np.array(tau, dtype=float)
        return np.asarray(tau, dtype=float)[self._dof_columns]

    def mass_matrix(self, angle_rad: np.ndarray) -> np.ndarray:
        """Joint-space inertia matrix M(q) of the controlled joints, (n, n), from pybullet's
        ``calculateMassMatrix`` (held joints at their hold positions; as loaded, no payload)."""
        M = self.client.calculateMassMatrix(self.robot, self._all_dofs(angle_rad, self._dof_angles))
        if self._all_controlled:
            return np.array(M, dtype=float)
        return np.asarray(M, dtype=float)[np.ix_(self._dof_columns, self._dof_columns)]

    def tip_jacobian(self, angle_rad: np.ndarray) -> np.ndarray:
        """Linear Jacobian (3, n) of the tool tip link's URDF frame origin, world (= base)
        frame, at joint angles ``angle_rad`` (pybullet's ``calculateJacobian``)."""
        zeros = self._zero_dofs
        # localPosition [0, 0, 0] is the link's URDF frame origin (measured against finite
        # differences of getLinkState's worldLinkFramePosition in tests/test_sim.py).
        linear, _ = self.client.calculateJacobian(
            self.robot,
            self.tip_link,
            [0.0, 0.0, 0.0],
            self._all_dofs(angle_rad, self._dof_angles),
            zeros,
            zeros,
        )
        return np.asarray(linear, dtype=float)[:, self._dof_columns]

    def close(self) -> None:
        """Disconnect the pybullet client (safe to call twice)."""
        if getattr(self, "_connected", False):
            self._connected = False
            try:
                self.client.disconnect()
            except pybullet.error:
                pass

    def __del__(self) -> None:
        try:
            self.close()
        except Exception:  # noqa: BLE001  (interpreter shutdown: modules may be gone)
            pass
