"""The agent's internal model of an arm's body: kinematics and rigid-body dynamics from a URDF.

:class:`ArmModel` wraps a pinocchio model (built from the URDF without geometry) and one
reusable pinocchio ``Data`` workspace. It answers the questions an agent's generative model asks
in its inner loop: where the tool tip is and how it moves with the joints (forward kinematics and
the tip Jacobian), and how the joints respond to torques (mass matrix, gravity, Coriolis and
centrifugal terms, forward dynamics).

The base frame is the URDF's root link, taken to coincide with the world frame (the simulator
places the robot base at the world origin with identity orientation). Gravity is
``(0, 0, -9.81) m/s^2`` in that frame, pinocchio's default.

The body model may be deliberately miscalibrated against the simulated body
(``length_scale``, ``mass_scale``, ``payload_kg``) to test how an agent copes with a wrong model.

Every method returns fresh arrays that the caller may keep; the pinocchio workspace is reused, so
one :class:`ArmModel` must not be shared between threads.
"""

from __future__ import annotations

import os
import xml.etree.ElementTree as ET
from collections.abc import Sequence

import numpy as np
import pinocchio as pin

from blanket.errors import ConfigError, shorten

__all__ = ["ArmModel", "links_with_invalid_inertia"]

_LOCAL_WORLD_ALIGNED = pin.ReferenceFrame.LOCAL_WORLD_ALIGNED
_INVALID_INERTIA_CHOICES = ("zero", "keep")


def _link_names(model: pin.Model, limit: int | None = None) -> list[str]:
    names = [f.name for f in model.frames if f.type == pin.FrameType.BODY]
    return names if limit is None else names[-limit:]


class ArmModel:
    """Kinematics and dynamics of a fixed-base arm, built from a URDF with pinocchio.

    Build one with :meth:`from_urdf`. Joint vectors ``q`` (rad or m), ``v`` (rad/s or m/s) and
    ``tau`` (N m or N) have length :attr:`n`, in the order of :attr:`joint_names`.

    Attributes
    ----------
    n : int
        Number of controlled joints.
    joint_names : tuple of str
        Controlled joints, in the order of every joint vector.
    end_effector : str
        URDF link (pinocchio frame) whose origin is the tool tip.
    urdf_path : str
        Absolute path of the URDF.
    lower, upper : numpy.ndarray
        Joint position limits from the URDF, shape (n,).
    velocity_limit : numpy.ndarray
        Joint velocity limits from the URDF, shape (n,).
    effort_limit : numpy.ndarray
        Joint effort (torque or force) limits from the URDF, shape (n,).
    length_scale, mass_scale, payload_kg : float
        The miscalibration this model was built with (1, 1, 0 for a faithful model).
    zeroed_inertia_links : tuple of str
        Links whose physically invalid rotational inertia was dropped (see :meth:`from_urdf`).
    model : pinocchio.Model
        The (reduced, possibly rescaled) pinocchio model; read it, do not modify it.
    """

    def __init__(
        self,
        model: pin.Model,
        end_effector: str,
        joint_names: Sequence[str],
        urdf_path: str = "",
        length_scale: float = 1.0,
        mass_scale: float = 1.0,
        payload_kg: float = 0.0,
        zeroed_inertia_links: Sequence[str] = (),
    ) -> None:
        if not model.existFrame(end_effector):
            raise ConfigError(
                f"end_effector: {end_effector!r} is not a frame of the model; "
                f"links include {_link_names(model, 6)}"
            )
        model_names = [model.names[i] for i in range(1, model.njoints)]
        if model.nq != model.nv or model.nq != len(model_names):
            bad = [
                model.names[i]
                for i in range(1, model.njoints)
                if model.joints[i].nq != 1 or model.joints[i].nv != 1
            ]
            raise ConfigError(
                f"joint_names: only 1-DoF revolute or prismatic joints are supported, got {bad}"
            )
        joint_names = tuple(joint_names)
        if sorted(joint_names) != sorted(model_names):
            raise ConfigError(
                f"joint_names: {list(joint_names)} must be a permutation of the model joints "
                f"{model_names}"
            )
        self.model = model
        self.data = model.createData()
        self.n = len(joint_names)
        self.joint_names = joint_names
        self.end_effector = end_effector
        self.urdf_path = urdf_path
        self.length_scale = float(length_scale)
        self.mass_scale = float(mass_scale)
        self.payload_kg = float(payload_kg)
        self.zeroed_inertia_links = tuple(zeroed_inertia_links)
        self._frame_id = model.getFrameId(end_effector)
        # Live reference into data.oMf: refreshed by every kinematics call below.
        self._tip_placement = self.data.oMf[self._frame_id]

        # order[i] = model index of the i-th controlled joint; None when the orders agree.
        order = np.array([model_names.index(name) for name in joint_names], dtype=np.intp)
        identity = bool(np.array_equal(order, np.arange(self.n)))
        self._order: np.ndarray | None = None if identity else order
        self._q_model = np.zeros(self.n)
        self._v_model = np.zeros(self.n)
        self._tau_model = np.zeros(self.n)

        self.lower = np.array(model.lowerPositionLimit, dtype=float)[order]
        self.upper = np.array(model.upperPositionLimit, dtype=float)[order]
        self.velocity_limit = np.array(model.velocityLimit, dtype=float)[order]
        self.effort_limit = np.array(model.effortLimit, dtype=float)[order]

        # Some pinocchio versions fill only the upper triangle of the CRBA result.
        q_probe = np.linspace(0.1, 0.7, self.n)
        M_probe = np.array(pin.crba(model, self.data, q_probe))
        self._crba_upper_only = bool(
            np.any(np.triu(M_probe, 1)) and not np.any(np.tril(M_probe, -1))
        )
        self._strict_lower = np.tril_indices(self.n, -1)
        self._snapshot_body_parameters()

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_urdf(
        cls,
        urdf_path: str,
        end_effector: str,
        joint_names: Sequence[str] | None = None,
        length_scale: float = 1.0,
        mass_scale: float = 1.0,
        payload_kg: float = 0.0,
        invalid_inertia: str = "zero",
        link_length_scales: Sequence[float] | None = None,
        payload_com_m: Sequence[float] | None = None,
    ) -> ArmModel:
        """Build the body model of a fixed-base arm from a URDF.

        Parameters
        ----------
        urdf_path : str
            Path of the URDF file (only kinematics and inertials are read, no meshes).
        end_effector : str
            Link name of the tool tip (any pinocchio frame name is accepted).
        joint_names : sequence of str, optional
            Controlled joints, in order. Every other movable joint (for example gripper
            fingers) is locked at 0 (clipped into its limits) with
            ``pinocchio.buildReducedModel``. Default: every movable joint, in tree order.
        length_scale : float
            Factor (> 0) on every translation in the kinematic tree: joint placements, frame
            placements and link centres of mass; rotational inertias scale by
            ``length_scale**2`` (each link grows uniformly at constant mass). Reach scales by
            ``length_scale``, gravity torques by ``length_scale``, the mass matrix by
            ``length_scale**2``.
        mass_scale : float
            Factor (> 0) on every link mass and rotational inertia.
        payload_kg : float
            Point mass (>= 0, kg) added at the origin of the ``end_effector`` frame, applied after
            the two scalings.
        invalid_inertia : {"zero", "keep"}
            What to do with a link whose principal moments of inertia break the triangle
            inequality (physically impossible, yet found in published URDFs such as pybullet_data's
            ``xarm/xarm6_robot.urdf``, links ``link2`` and ``link3``). ``"zero"`` (default) drops
            that link's rotational inertia and keeps its mass and centre of mass -- what pybullet's
            URDF importer does, so the body model matches the simulated body; ``"keep"`` uses the
            URDF values as written. The affected links are in :attr:`zeroed_inertia_links`.
        link_length_scales : sequence of float, optional
            Per-link factors (> 0) on top of ``length_scale``, one per joint placement in tree
            order and one for the tool offset (:attr:`length_parameter_names`); see
            :meth:`set_body_parameters`. Learned values (``learn_body``) are saved this way.
        payload_com_m : sequence of 3 float, optional
            Where the ``payload_kg`` point mass sits in the ``end_effector`` frame (default:
            its origin).

        Returns
        -------
        ArmModel

        Raises
        ------
        ConfigError
            Missing file, unknown end effector or joint name, or a scale out of range.
        """
        if not (np.isfinite(length_scale) and length_scale > 0.0):
            raise ConfigError(f"length_scale: must be a finite number > 0, got {length_scale!r}")
        if not (np.isfinite(mass_scale) and mass_scale > 0.0):
            raise ConfigError(f"mass_scale: must be a finite number > 0, got {mass_scale!r}")
        if not (np.isfinite(payload_kg) and payload_kg >= 0.0):
            raise ConfigError(f"payload_kg: must be a finite number >= 0, got {payload_kg!r}")
        if invalid_inertia not in _INVALID_INERTIA_CHOICES:
            raise ConfigError(
                f"invalid_inertia: must be one of {_INVALID_INERTIA_CHOICES}, "
                f"got {invalid_inertia!r}"
            )
        path = os.path.abspath(os.fspath(urdf_path))
        if not os.path.isfile(path):
            raise ConfigError(f"urdf_path: no such file {path!r}")
        try:
            full = pin.buildModelFromUrdf(path)
        except (RuntimeError, ValueError) as exc:
            first = str(exc).strip().splitlines()[-1] if str(exc).strip() else type(exc).__name__
            raise ConfigError(f"urdf_path: pinocchio could not parse {path!r}: {first}") from None
        if not full.existFrame(end_effector):
            raise ConfigError(
                f"end_effector: {end_effector!r} is not a link of {os.path.basename(path)}; "
                f"links include {_link_names(full, 6)}"
            )

        movable = [full.names[i] for i in range(1, full.njoints)]
        if joint_names is None:
            joint_names = tuple(movable)
        else:
            joint_names = tuple(joint_names)
            unknown = [name for name in joint_names if name not in movable]
            if unknown:
                raise ConfigError(
                    f"joint_names: {unknown} not movable joints of {os.path.basename(path)}; "
                    f"choose from {movable}"
                )
            if len(set(joint_names)) != len(joint_names):
                raise ConfigError(f"joint_names: duplicates in {list(joint_names)}")
            if not joint_names:
                raise ConfigError("joint_names: at least one joint is required")

        zeroed: tuple[str, ...] = ()
        if invalid_inertia == "zero":
            zeroed = _zero_invalid_inertias(full, path)

        model = full
        locked = [name for name in movable if name not in joint_names]
        if locked:
            reference = np.clip(pin.neutral(full), full.lowerPositionLimit, full.upperPositionLimit)
            reference = np.where(np.isfinite(reference), reference, 0.0)
            lock_ids = [full.getJointId(name) for name in locked]
            model = pin.buildReducedModel(full, lock_ids, reference)

        if length_scale != 1.0:
            _scale_lengths(model, float(length_scale))
        if mass_scale != 1.0:
            _scale_masses(model, float(mass_scale))
        arm = cls(
            model,
            end_effector,
            joint_names,
            urdf_path=path,
            length_scale=length_scale,
            mass_scale=mass_scale,
            zeroed_inertia_links=zeroed,
        )
        if payload_kg > 0.0 or payload_com_m is not None or link_length_scales is not None:
            arm.set_body_parameters(link_length_scales, payload_kg, payload_com_m)
        return arm

    # ------------------------------------------------------------------ helpers
    def _q(self, q: np.ndarray) -> np.ndarray:
        q = np.asarray(q, dtype=float)
        if q.shape != (self.n,):
            raise ValueError(f"q: expected shape ({self.n},), got {q.shape}")
        if self._order is None:
            return q
        self._q_model[self._order] = q
        return self._q_model

    def _v(self, v: np.ndarray, buffer: np.ndarray, name: str) -> np.ndarray:
        v = np.asarray(v, dtype=float)
        if v.shape != (self.n,):
            raise ValueError(f"{name}: expected shape ({self.n},), got {v.shape}")
        if self._order is None:
            return v
        buffer[self._order] = v
        return buffer

    def _out(self, x: np.ndarray) -> np.ndarray:
        return x if self._order is None else x[self._order]

    # ------------------------------------------------------------------ kinematics
    def tip_position(self, q: np.ndarray) -> np.ndarray:
        """Tool-tip position in the base (world) frame, shape (3,), metres."""
        pin.forwardKinematics(self.model, self.data, self._q(q))
        pin.updateFramePlacement(self.model, self.data, self._frame_id)
        return self._tip_placement.translation.copy()

    def tip_jacobian(self, q: np.ndarray) -> np.ndarray:
        """Linear part of the tool-tip frame Jacobian, shape (3, n), in LOCAL_WORLD_ALIGNED.

        Column ``j`` is ``d tip_position / d q_j`` expressed in the base frame.
        """
        return self.tip_position_and_jacobian(q)[1]

    def tip_position_and_jacobian(self, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Tool-tip position (3,) and linear Jacobian (3, n) from one kinematics pass."""
        J = pin.computeFrameJacobian(
            self.model, self.data, self._q(q), self._frame_id, _LOCAL_WORLD_ALIGNED
        )
        position = self._tip_placement.translation.copy()  # a view into Data otherwise
        if self._order is None:
            return position, J[:3]
        return position, J[:3, self._order]

    def chain_points(self, q: np.ndarray) -> np.ndarray:
        """Origins of the joints on the tool tip's chain, base to tip, then the tool tip
        (m, base frame), shape (k + 1, 3): the arm's skeleton (forward kinematics;
        Siciliano et al. 2009, sec. 2.9)."""
        model, data = self.model, self.data
        pin.forwardKinematics(model, data, self._q(q))
        pin.updateFramePlacement(model, data, self._frame_id)
        points = [
            data.oMi[i].translation.copy() for i in range(1, model.njoints) if self._on_chain[i - 1]
        ]
        return np.array([*points, self._tip_placement.translation.copy()])

    # ------------------------------------------------------------------ dynamics
    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        """Joint-space inertia matrix M(q), shape (n, n), symmetric (composite rigid body
        algorithm; Featherstone 2008, Rigid Body Dynamics Algorithms, ch. 6)."""
        M = pin.crba(self.model, self.data, self._q(q))
        if self._crba_upper_only:
            M[self._strict_lower] = M.T[self._strict_lower]
        if self._order is None:
            return M
        return M[np.ix_(self._order, self._order)]

    def gravity_torque(self, q: np.ndarray) -> np.ndarray:
        """Generalized gravity g(q), shape (n,): the torque that holds the arm still at q."""
        return self._out(pin.computeGeneralizedGravity(self.model, self.data, self._q(q)))

    def nonlinear_effects(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Coriolis, centrifugal and gravity terms C(q, v) v + g(q), shape (n,)."""
        v_model = self._v(v, self._v_model, "v")
        return self._out(pin.nonLinearEffects(self.model, self.data, self._q(q), v_model))

    def forward_dynamics(self, q: np.ndarray, v: np.ndarray, tau: np.ndarray) -> np.ndarray:
        """Joint accelerations inv(M(q)) (tau - C(q, v) v - g(q)), shape (n,) (articulated body
        algorithm; Featherstone 2008, Rigid Body Dynamics Algorithms, ch. 7)."""
        v_model = self._v(v, self._v_model, "v")
        tau_model = self._v(tau, self._tau_model, "tau")
        return self._out(pin.aba(self.model, self.data, self._q(q), v_model, tau_model))

    # ------------------------------------------------------------------ body parameters
    def _snapshot_body_parameters(self) -> None:
        model = self.model
        frame = model.frames[self._frame_id]
        self._tip_joint = int(frame.parentJoint)
        chain = set(int(j) for j in model.supports[self._tip_joint])
        self._nominal_placements = [pin.SE3(model.jointPlacements[i]) for i in range(model.njoints)]
        self._nominal_tool = pin.SE3(frame.placement)
        self._nominal_inertias = [pin.Inertia(model.inertias[i]) for i in range(model.njoints)]
        self._on_chain = np.array([i in chain for i in range(1, model.njoints)] + [True])
        # body i grows with the link that leaves it: its first child's placement, or the tool
        child = {}
        for i in range(1, model.njoints):
            child.setdefault(int(model.parents[i]), i)
        self._body_scale_index = [
            (child[i] - 1 if i in child else model.njoints - 1)
            if i != self._tip_joint
            else model.njoints - 1
            for i in range(model.njoints)
        ]
        self.link_length_scales = np.ones(model.njoints)  # joint placements, then the tool
        self.payload_com_m = np.zeros(3)

    @property
    def length_parameter_names(self) -> tuple[str, ...]:
        """Names of the per-link length factors: the joint each placement leads to (tree
        order), then ``tool`` (the end effector's offset from its joint)."""
        return (*(self.model.names[i] for i in range(1, self.model.njoints)), "tool")

    @property
    def length_parameter_informative(self) -> np.ndarray:
        """Which length factors can move the tip at all (on the tip's chain, non-zero length)."""
        lengths = [np.linalg.norm(p.translation) for p in self._nominal_placements[1:]]
        lengths.append(np.linalg.norm(self._nominal_tool.translation))
        return self._on_chain & (np.array(lengths) > 0.0)

    def set_body_parameters(
        self,
        link_length_scales: Sequence[float] | None = None,
        payload_kg: float | None = None,
        payload_com_m: Sequence[float] | None = None,
    ) -> None:
        """Set the learnable body parameters (in place), relative to the model as built.

        ``link_length_scales`` (one per :attr:`length_parameter_names`, > 0) multiply the
        translations of the joint placements and of the tool frame; each link body's centre of
        mass scales with the link that leaves it and its rotational inertia with the square
        (uniform growth at constant mass, as ``length_scale``). ``payload_kg`` (>= 0) is a
        point mass at ``payload_com_m`` in the end-effector frame; it replaces the payload the
        model was built with. ``None`` keeps the current value.
        """
        model = self.model
        L = model.njoints
        if link_length_scales is not None:
            s = np.asarray(link_length_scales, dtype=float)
            if s.shape != (L,) or not np.all(np.isfinite(s)) or np.any(s <= 0.0):
                raise ConfigError(
                    f"link_length_scales: expected {L} finite numbers > 0 "
                    f"({', '.join(self.length_parameter_names)}), got {shorten(s.tolist())}"
                )
            self.link_length_scales = s.copy()
        if payload_kg is not None:
            if not (np.isfinite(payload_kg) and payload_kg >= 0.0):
                raise ConfigError(f"payload_kg: must be a finite number >= 0, got {payload_kg!r}")
            self.payload_kg = float(payload_kg)
        if payload_com_m is not None:
            c = np.asarray(payload_com_m, dtype=float)
            if c.shape != (3,) or not np.all(np.isfinite(c)):
                raise ConfigError(
                    f"payload_com_m: expected 3 finite numbers (m), got {shorten(c.tolist())}"
                )
            self.payload_com_m = c.copy()
        s = self.link_length_scales
        for i in range(1, L):
            p = self._nominal_placements[i]
            model.jointPlacements[i] = pin.SE3(p.rotation, p.translation * s[i - 1])
            b = self._nominal_inertias[i]
            k = s[self._body_scale_index[i]]
            model.inertias[i] = pin.Inertia(b.mass, b.lever * k, b.inertia * k**2)
        frame = model.frames[self._frame_id]
        tool = pin.SE3(self._nominal_tool.rotation, self._nominal_tool.translation * s[L - 1])
        frame.placement = tool
        model.frames[self._frame_id] = frame
        if self.payload_kg > 0.0:
            point = pin.Inertia(self.payload_kg, tool.act(self.payload_com_m), np.zeros((3, 3)))
            model.inertias[self._tip_joint] = model.inertias[self._tip_joint] + point

    def tip_length_jacobian(self, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Tip position (3,) and its derivative with respect to the length factors (3, L).

        The tip is ``sum_i R_parent(i)(q) t_i s_i + R_tip_joint(q) t_tool s_tool`` (plus the
        travel of prismatic joints): linear in the factors ``s``, so column ``i`` is
        ``R_parent(i)(q) t_i`` with the nominal translation ``t_i`` (forward kinematics of a
        serial chain; Siciliano et al. 2009, *Robotics: Modelling, Planning and Control*,
        sec. 2.9). Columns of joints off the tip's chain are zero.
        """
        model, data = self.model, self.data
        pin.forwardKinematics(model, data, self._q(q))
        pin.updateFramePlacement(model, data, self._frame_id)
        L = model.njoints
        D = np.zeros((3, L))
        for i in range(1, L):
            if self._on_chain[i - 1]:
                R = data.oMi[int(model.parents[i])].rotation
                D[:, i - 1] = R @ self._nominal_placements[i].translation
        D[:, L - 1] = data.oMi[self._tip_joint].rotation @ self._nominal_tool.translation
        return self._tip_placement.translation.copy(), D

    def payload_regressor(self, q: np.ndarray, v: np.ndarray, a: np.ndarray) -> np.ndarray:
        """Joint torque per unit of a payload's mass and first moment, shape (n, 4).

        Inverse dynamics is linear in each body's inertial parameters (mass, first moment,
        rotational inertia about the joint frame), ``tau = Y(q, v, a) pi`` (Atkeson, An &
        Hollerbach 1986, Int J Robot Res 5(3)); pinocchio's ``computeJointTorqueRegressor``
        gives ``Y``. A payload of mass ``m`` at ``c`` in the end-effector frame, with first
        moment ``h = m c`` there, sits at ``p = t + R c`` in its joint's frame (``R``, ``t``
        the tool placement): ``pi = (m, m t + R h, I)``, with the parallel-axis inertia
        ``I = m (|p|^2 E - p p') = m (|t|^2 E - t t') + 2 (t.u) E - t u' - u t' + O(m |c|^2)``,
        ``u = R h``. Linear in ``(m, h)`` once the payload's own ``m |c|^2`` (a few grams times
        centimetres squared for a payload held at the tool) is left out. Columns: ``m``,
        ``h_x``, ``h_y``, ``h_z``.
        """
        model, data = self.model, self.data
        v_model = self._v(v, self._v_model, "v").copy()
        a_model = self._v(a, self._tau_model, "a").copy()
        Y = pin.computeJointTorqueRegressor(model, data, self._q(q), v_model, a_model)
        j = self._tip_joint
        out = np.asarray(Y)[:, 10 * (j - 1) : 10 * j] @ self._payload_map()
        return out if self._order is None else out[self._order]

    def _payload_map(self) -> np.ndarray:
        """``d pi / d(m, h)`` (10, 4) for the current tool placement (cached)."""
        tool = self.model.frames[self._frame_id].placement
        t, R = tool.translation, tool.rotation
        key = (*t, *R.ravel())
        if getattr(self, "_payload_map_key", None) != key:
            T = np.zeros((10, 4))
            T[0, 0] = 1.0
            T[1:4, 0] = t
            T[4:10, 0] = _inertia_vector(t @ t, np.outer(t, t))
            for k in range(3):
                u = R[:, k]  # d(R h)/dh_k
                T[1:4, 1 + k] = u
                T[4:10, 1 + k] = _inertia_vector(
                    2.0 * float(t @ u), np.outer(t, u) + np.outer(u, t)
                )
            self._payload_map_key, self._payload_map_value = key, T
        return self._payload_map_value

    def inverse_dynamics(self, q: np.ndarray, v: np.ndarray, a: np.ndarray) -> np.ndarray:
        """Joint torques ``M(q) a + C(q, v) v + g(q)`` (recursive Newton-Euler; Featherstone
        2008, *Rigid Body Dynamics Algorithms*, ch. 5), shape (n,)."""
        v_model = self._v(v, self._v_model, "v").copy()
        a_model = self._v(a, self._tau_model, "a")
        return self._out(pin.rnea(self.model, self.data, self._q(q), v_model, a_model)).copy()

    def __repr__(self) -> str:
        return (
            f"ArmModel({os.path.basename(self.urdf_path)!r}, end_effector={self.end_effector!r}, "
            f"n={self.n}, length_scale={self.length_scale}, mass_scale={self.mass_scale}, "
            f"payload_kg={self.payload_kg})"
        )


def _inertia_vector(trace_part: float, outer: np.ndarray) -> np.ndarray:
    """``trace_part E - outer`` in pinocchio's order ``(Ixx, Ixy, Iyy, Ixz, Iyz, Izz)``."""
    M = trace_part * np.eye(3) - outer
    return np.array([M[0, 0], M[0, 1], M[1, 1], M[0, 2], M[1, 2], M[2, 2]])


# ---------------------------------------------------------------------- miscalibration
def _scale_lengths(model: pin.Model, scale: float) -> None:
    """Grow every link uniformly by ``scale`` at constant mass (in place)."""
    for i in range(1, model.njoints):
        placement = model.jointPlacements[i]
        model.jointPlacements[i] = pin.SE3(placement.rotation, placement.translation * scale)
        inertia = model.inertias[i]
        model.inertias[i] = pin.Inertia(
            inertia.mass, inertia.lever * scale, inertia.inertia * scale**2
        )
    for k in range(len(model.frames)):
        frame = model.frames[k]
        placement = frame.placement
        frame.placement = pin.SE3(placement.rotation, placement.translation * scale)
        model.frames[k] = frame


def _scale_masses(model: pin.Model, scale: float) -> None:
    """Multiply every link mass and rotational inertia by ``scale`` (in place)."""
    for i in range(1, model.njoints):
        inertia = model.inertias[i]
        model.inertias[i] = pin.Inertia(
            inertia.mass * scale, inertia.lever, inertia.inertia * scale
        )


# ---------------------------------------------------------------------- invalid URDF inertias
def _urdf_inertials(path: str) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per link: rotational inertia (3x3, about the COM) and the rotation of its inertial axes."""
    out: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for link in ET.parse(path).getroot().iter("link"):
        inertial = link.find("inertial")
        if inertial is None or inertial.find("inertia") is None:
            continue
        e = {k: float(inertial.find("inertia").get(k, "0")) for k in _INERTIA_KEYS}
        inertia = np.array(
            [
                [e["ixx"], e["ixy"], e["ixz"]],
                [e["ixy"], e["iyy"], e["iyz"]],
                [e["ixz"], e["iyz"], e["izz"]],
            ]
        )
        origin = inertial.find("origin")
        rpy = (
            [0.0, 0.0, 0.0]
            if origin is None
            else [float(x) for x in origin.get("rpy", "0 0 0").split()]
        )
        out[link.get("name")] = (inertia, pin.rpy.rpyToMatrix(*rpy))
    return out


_INERTIA_KEYS = ("ixx", "ixy", "ixz", "iyy", "iyz", "izz")


def _breaks_triangle_inequality(inertia: np.ndarray) -> bool:
    """pybullet's test of a link inertia (BulletUrdfImporter::getMassAndInertia2): a principal
    moment that is negative or exceeds the sum of the other two."""
    a, b, c = np.linalg.eigvalsh(inertia)
    return bool(min(a, b, c) < 0.0 or a > b + c or b > a + c or c > a + b)


def links_with_invalid_inertia(urdf_path: str) -> tuple[str, ...]:
    """Links of a URDF whose principal moments of inertia break the triangle inequality.

    pybullet replaces the rotational inertia of such links by zero when it loads the URDF.
    """
    inertials = _urdf_inertials(os.fspath(urdf_path))
    return tuple(
        name for name, (inertia, _) in inertials.items() if _breaks_triangle_inequality(inertia)
    )


def _zero_invalid_inertias(model: pin.Model, path: str) -> tuple[str, ...]:
    """Remove the rotational inertia of links that break the triangle inequality (in place)."""
    zeroed = []
    for name, (inertia, inertial_rotation) in _urdf_inertials(path).items():
        if not _breaks_triangle_inequality(inertia):
            continue
        if not model.existFrame(name, pin.FrameType.BODY):
            continue
        frame = model.frames[model.getFrameId(name, pin.FrameType.BODY)]
        joint = frame.parentJoint
        # The link's inertia about its own COM, rotated into its parent joint's frame. A body's
        # rotational inertia about the combined COM is the sum of its parts' own rotational
        # inertias plus point-mass terms, so removing one part's own term leaves the rest intact.
        R = frame.placement.rotation @ inertial_rotation
        body = model.inertias[joint]
        remaining = body.inertia - R @ inertia @ R.T
        # Clear rounding noise (a body made of this link alone is left with ~1e-19 entries).
        eigenvalues, axes = np.linalg.eigh(0.5 * (remaining + remaining.T))
        eigenvalues[np.abs(eigenvalues) < 1e-12 * max(1.0, np.abs(inertia).max())] = 0.0
        remaining = (axes * eigenvalues) @ axes.T
        model.inertias[joint] = pin.Inertia(body.mass, body.lever, remaining)
        zeroed.append(name)
    return tuple(zeroed)
