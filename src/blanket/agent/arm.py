"""An active-inference agent for fixed-base arms: perception and action on one free energy.

Generative model
----------------
The belief ``z`` holds the joint angles in generalized coordinates up to embedding order
``p`` (order-major, shape ``(p + 1, n)``). Sensations:

* ``joint_angle``: encoder angles, ``y = q + z_q`` (observes order 0);
* ``joint_velocity``: encoder velocities, ``y = q' + z_v`` (observes order 1);
* ``camera``: pixel coordinates of the tool tip, ``y = pi(T fk(q)) + z_px`` (order 0), present
  only on fresh frames in which the tip is visible;
* ``motor`` (velocity control): the motors track the last command, ``q' ~ a`` (an efference
  copy, order 1).

Prior dynamics are generalized motion ``z' = D z`` with white jerk (random-walk noise on the
highest order), and -- in ``goal="prior"`` mode -- an attractor on the velocity (velocity
control) or acceleration (torque control):

    q' = f(q) = J+(q) k sat(x_target - fk(q)) + k_null (I - J+ J)(q_home - q),

``J+`` the damped least-squares inverse of the tip Jacobian (Wampler 1986, IEEE Trans SMC;
Nakamura & Hanafusa 1986, J Dyn Syst Meas Control). In ``goal="reference"`` mode (the
default) the belief carries no goal -- it stays an unbiased estimate of the body, within 0.65x
the joint-angle error of a tuned EKF on the same sensations -- and the attractor is a reference
on the velocity sensation that only the action sees. ``goal="prior"`` is the classic scheme in
which the goal biases the belief itself and the action follows the belief; it reaches a little
faster, but its belief is biased towards the goal (1.2-5x the EKF's error, measured).

Perception
----------
Each control step the belief is moved by its generalized motion over ``dt`` -- the flow
``D z`` integrated exactly by local linearisation (Ozaki 1992, Statistica Sinica 2), which for
this linear flow is ``expm(D dt)`` (``integration="euler"`` uses ``I + D dt``) -- and then by one
Gauss-Newton step on the Laplace-encoded free energy

    F(z) = 1/2 (z - z-)' Pi- (z - z-) + sum_m 1/2 e_m' P_m e_m - 1/2 sum_m ln|P_m|

(Friston 2008, PLoS Comput Biol, eq. 9; Buckley et al. 2017, J Math Psychol, sec. 5), where
``Pi-`` is the prior precision carried forward from the last step's curvature (the Laplace
approximation, Friston et al. 2010, "Generalised filtering", Math Probl Eng, eq. 10). The step
``dz = -inv(H) dF/dz`` uses the curvature ``H = Pi- + sum G' P G``; its inverse is the belief's
covariance, used for the next prior and for the ``belief_sd`` diagnostic.

Action
------
Action descends the same free energy through the predicted sensations, with the step
preconditioned by the curvature with respect to the action (a Newton step). Under velocity
control ``dy_velocity/da = I``, so the step sets the command to the velocity the agent
believes in (``goal="prior"``) or to the attractor's velocity (``goal="reference"``). Under
torque control the forward model is rigid-body dynamics, ``dq''/dtau = inv(M(q))``, and the
Newton step turns ``inv(M)`` into ``M``: ``tau = M(q) q''_wanted + h(q, q')``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from math import factorial
from typing import Any

import numpy as np
from scipy.linalg import expm
from scipy.linalg.lapack import dposv, dpotrf, dpotrs
from scipy.special import chdtri  # chi-square quantiles; scipy.stats costs ~0.5 s to import

from blanket.agent._policy import PredictMixin
from blanket.description import ArmDescription
from blanket.errors import ConfigError
from blanket.model import BodyState, ModelTerm

try:  # the compiled perception kernel; the numpy path computes the same step
    from blanket.agent import _kernel
except ImportError:  # pragma: no cover - numba missing
    _kernel = None

__all__ = ["ArmAgent", "AgentOptions", "joint_limit_weights", "torque_action_free_energy"]

_GOALS = ("prior", "reference")
#: How closely velocity motors are assumed to track the last command (rad/s): pybullet's
#: velocity motors tracked to ~2e-4 rad/s on the built-in arms (measured); 5e-3 leaves margin.
MOTOR_TRACKING_SD_RAD_S = 0.005
#: Samples a channel averages before its learned precision is applied.
_LEARNING_BURN_IN = 20
_INTEGRATIONS = ("ozaki", "euler")


class AgentOptions:
    """Options of :class:`ArmAgent`, with their defaults and allowed ranges.

    Every option is a keyword of :meth:`ArmAgent.from_env` and a key of a scenario file's
    ``[agent]`` table. Unknown names raise :class:`~blanket.errors.ConfigError`.
    """

    defaults: dict[str, Any] = {
        "order": 2,
        "goal": "reference",
        "integration": "ozaki",
        "attractor_gain_1_s": 4.0,
        "max_tip_speed_m_s": 0.6,
        "damping_m": 0.02,
        "posture_gain_1_s": 0.5,
        "joint_limit_weighting": False,
        "track_target_motion": True,
        "disturbance_time_constant_s": 0.1,
        "target_window_s": 0.05,
        "velocity_gain_1_s": 25.0,
        "joint_angle_precision": None,
        "joint_velocity_precision": None,
        "camera_precision": None,
        "motor_precision": None,
        "goal_precision": None,
        "jerk_intensity": 50.0,
        "action_fraction": 1.0,
        "learn_precision": False,
        "precision_learning_rate": 0.2,
        "fault_detection": False,
        "fault_window_s": 0.1,
        "fault_false_alarm": 1e-7,
        "length_scale": 1.0,
        "mass_scale": 1.0,
        "payload_kg": 0.0,
        "divergence_limit": 1e3,
    }

    @classmethod
    def resolve(cls, options: Mapping[str, Any]) -> dict[str, Any]:
        unknown = sorted(set(options) - set(cls.defaults))
        if unknown:
            raise ConfigError(
                f"unknown agent option {unknown[0]!r}; valid options: {', '.join(cls.defaults)}"
            )
        out = dict(cls.defaults)
        out.update(options)
        order = out["order"]
        if not isinstance(order, int | np.integer) or not 0 < int(order) <= 6:
            raise ConfigError(f"agent option order must be a whole number in 1..6, got {order!r}")
        if out["goal"] not in _GOALS:
            raise ConfigError(f"agent option goal must be one of {_GOALS}, got {out['goal']!r}")
        if out["integration"] not in _INTEGRATIONS:
            raise ConfigError(
                f"agent option integration must be one of {_INTEGRATIONS}, "
                f"got {out['integration']!r}"
            )
        for key in (
            "attractor_gain_1_s",
            "max_tip_speed_m_s",
            "velocity_gain_1_s",
            "jerk_intensity",
            "length_scale",
            "mass_scale",
            "fault_window_s",
            "target_window_s",
            "divergence_limit",
        ):
            v = out[key]
            if not isinstance(v, int | float) or not np.isfinite(v) or v <= 0:
                raise ConfigError(f"agent option {key} must be a number > 0, got {v!r}")
        for key in (
            "damping_m",
            "posture_gain_1_s",
            "payload_kg",
            "precision_learning_rate",
            "disturbance_time_constant_s",
        ):
            v = out[key]
            if not isinstance(v, int | float) or not np.isfinite(v) or v < 0:
                raise ConfigError(f"agent option {key} must be a number >= 0, got {v!r}")
        v = out["action_fraction"]
        if not isinstance(v, int | float) or not 0 < v <= 1:
            raise ConfigError(f"agent option action_fraction must be in (0, 1], got {v!r}")
        v = out["fault_false_alarm"]
        if not isinstance(v, int | float) or not 0 < v < 0.5:
            raise ConfigError(f"agent option fault_false_alarm must be in (0, 0.5), got {v!r}")
        for key in (
            "joint_angle_precision",
            "joint_velocity_precision",
            "camera_precision",
            "motor_precision",
            "goal_precision",
        ):
            v = out[key]
            if v is not None and (not isinstance(v, int | float) or not np.isfinite(v) or v <= 0):
                raise ConfigError(f"agent option {key} must be a number > 0 or omitted, got {v!r}")
        out["order"] = int(order)
        return out


def _shift_taylor(order: int, dt: float, integration: str) -> np.ndarray:
    """Transition of generalized motion over ``dt`` for one joint, shape (p+1, p+1)."""
    D = np.eye(order + 1, k=1)
    if integration == "euler":
        return np.eye(order + 1) + D * dt
    return expm(D * dt)


def _jerk_covariance(order: int, dt: float, intensity: float) -> np.ndarray:
    """Discrete covariance of white noise of ``intensity`` driving the highest order.

    Van Loan's method in closed form for the integrator chain: the (i, j) entry (orders
    counted down from the highest, ``a = p - i``, ``b = p - j``) is
    ``q dt^(a+b+1) / ((a+b+1) a! b!)`` (Van Loan 1978, IEEE Trans Autom Control 23(3)).
    """
    W = np.zeros((order + 1, order + 1))
    for i in range(order + 1):
        for j in range(order + 1):
            a, b = order - i, order - j
            W[i, j] = intensity * dt ** (a + b + 1) / ((a + b + 1) * factorial(a) * factorial(b))
    return W


def joint_limit_weights(q: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """Inverse weights ``1 / w_i`` of the weighted least-norm solution near joint limits.

    ``w_i = 1 + |dH/dq_i|`` with the joint-limit criterion
    ``H = sum (u - l)^2 / (4 (u - q)(q - l))``, so
    ``dH/dq_i = (u - l)^2 (2 q - u - l) / (4 (u - q)^2 (q - l)^2)`` (Chan & Dubey 1995, "A
    weighted least-norm solution based scheme for avoiding joint limits for redundant joint
    manipulators", IEEE Trans Robot Autom 11(2), eqs. 9-11; without their direction test, so
    a joint near a limit is slowed whichever way it moves). Joints without finite limits get
    weight 1; the distance to a limit is floored at 1 mrad.
    """
    span = upper - lower
    du = np.maximum(upper - q, 1e-3)
    dl = np.maximum(q - lower, 1e-3)
    grad = span * span * (du - dl) / (4.0 * du * du * dl * dl)
    w = 1.0 + np.abs(grad)
    return np.where(np.isfinite(w), 1.0 / w, 1.0)


def torque_action_free_energy(
    tau: np.ndarray,
    mass_matrix: np.ndarray,
    nonlinear: np.ndarray,
    wanted_acceleration: np.ndarray,
    precision: np.ndarray,
) -> tuple[float, np.ndarray]:
    """Free energy of the predicted acceleration under torque ``tau``, and ``dF/dtau``.

    The forward model is rigid-body dynamics, ``q'' = inv(M) (tau - h)`` (Featherstone 2008,
    *Rigid Body Dynamics Algorithms*, eq. 1.1), so with ``e = q''_wanted - q''(tau)``:
    ``F = 1/2 e' P e`` and ``dF/dtau = -inv(M)' P e``. The curvature is
    ``inv(M)' P inv(M)``; the Newton step ``-inv(curvature) dF/dtau`` lands on
    ``tau = h + M q''_wanted``.
    """
    Minv = np.linalg.inv(mass_matrix)
    e = wanted_acceleration - Minv @ (tau - nonlinear)
    P = np.diag(precision) if np.ndim(precision) == 1 else np.asarray(precision)
    return 0.5 * float(e @ P @ e), -Minv.T @ P @ e


class ArmAgent(PredictMixin):
    """Active-inference reaching agent; see the module docstring for the model.

    Build it with :meth:`from_env`. It reads only the env's static
    :class:`~blanket.description.ArmDescription` and the observations passed to :meth:`act`.
    """

    def __init__(
        self,
        description: ArmDescription,
        extra_terms: Sequence[ModelTerm] = (),
        **options: Any,
    ) -> None:
        from blanket.body import ArmModel

        opts = AgentOptions.resolve(options)
        self.options = opts
        self.description = description
        self.body = ArmModel.from_urdf(
            description.urdf_path,
            description.end_effector,
            joint_names=description.joint_names,
            length_scale=float(opts["length_scale"]),
            mass_scale=float(opts["mass_scale"]),
            payload_kg=float(opts["payload_kg"]),
        )
        self.n = n = description.n_joints
        self.order = p = opts["order"]
        self.size = (p + 1) * n
        self.dt = description.control_dt
        self.control = description.control
        self.camera = description.camera
        self.extra_terms = list(extra_terms)

        sq = max(description.encoder_angle_noise_rad, 1e-6)
        sv = max(description.encoder_velocity_noise_rad_s, 1e-6)
        self.precision = {
            "joint_angle": np.full(n, opts["joint_angle_precision"] or 1.0 / sq**2),
            "joint_velocity": np.full(n, opts["joint_velocity_precision"] or 1.0 / sv**2),
            "camera": np.full(
                2,
                opts["camera_precision"]
                or (1.0 / max(self.camera.pixel_noise_px, 1e-3) ** 2 if self.camera else 0.0),
            ),
        }
        # In goal="prior" mode a tight efference copy would leave the goal only the position
        # belief to pull on (measured: 27x the EKF's error), so the copy is looser there.
        motor_sd = MOTOR_TRACKING_SD_RAD_S if opts["goal"] == "reference" else 0.5 * sv
        self.motor_precision = float(opts["motor_precision"] or 1.0 / motor_sd**2)
        self.goal_precision = float(opts["goal_precision"] or 1.0 / sv**2)
        self._initial_precision = {k: v.copy() for k, v in self.precision.items()}

        # Generalized motion and its noise, shared by every joint (kron with I_n).
        phi_t = _shift_taylor(p, self.dt, opts["integration"])
        w_t = _jerk_covariance(p, self.dt, float(opts["jerk_intensity"]))
        w_t += np.diag(np.full(p + 1, 1e-12))
        eye = np.eye(n)
        self._phi_t = phi_t
        self._phi = np.kron(phi_t, eye)
        self._phi_T = np.ascontiguousarray(self._phi.T)
        self._w = np.kron(w_t, eye)
        self._eye_N = np.eye(self.size)
        self._eye_n = np.eye(n)
        self._attractor_velocity = np.zeros(n)
        self._limit_low = np.asarray(description.lower_rad, dtype=float)
        self._limit_high = np.asarray(description.upper_rad, dtype=float)
        self._compiled = _kernel is not None and not self.extra_terms
        self._buffers()
        # Encoder terms have constant Jacobians: precompute their curvature.
        self._sel = [slice(k * n, (k + 1) * n) for k in range(p + 1)]
        self._fault_threshold = {}
        self._fault_alpha = 1.0 - np.exp(-self.dt / float(opts["fault_window_s"]))
        w_eff = max(1.0, 2.0 / self._fault_alpha - 1.0)  # effective samples of the EWMA
        for name, dof in (("joint_angle", 1), ("joint_velocity", 1), ("camera", 2)):
            # Innovation test (Bar-Shalom, Li & Kirubarajan 2001, sec. 5.4.2): the windowed
            # mean of normalized innovations is ~ chi2(w m) / w under no fault.
            self._fault_threshold[name] = (
                chdtri(w_eff * dof, float(opts["fault_false_alarm"])) / w_eff
            )
        self.reset()

    # -- construction -------------------------------------------------------------------
    @classmethod
    def from_env(cls, env: Any, extra_terms: Sequence[ModelTerm] = (), **options: Any) -> ArmAgent:
        """Build an agent from an env's static description (never its simulator state)."""
        description = getattr(env.unwrapped, "description", None)
        if not isinstance(description, ArmDescription):
            raise ConfigError(
                f"env {type(env.unwrapped).__name__} has no ArmDescription; "
                "ArmAgent needs an arm env such as blanket/arm-reach-v0"
            )
        return cls(description, extra_terms=extra_terms, **options)

    # -- episode state ------------------------------------------------------------------
    def reset(self) -> None:
        """Forget the episode: the next observation re-initialises the belief."""
        self._belief: np.ndarray | None = None
        self._cov = np.zeros((self.size, self.size))
        self._action = np.zeros(self.n)
        self._home = np.zeros(self.n)
        self.precision = {k: v.copy() for k, v in self._initial_precision.items()}
        self._fault_stat = {
            k: np.zeros(self.n if k != "camera" else 1) for k in self._fault_threshold
        }
        self._fault = {k: np.zeros_like(v, dtype=bool) for k, v in self._fault_stat.items()}
        self._diag: dict[str, Any] = {}
        self._error_view: dict[str, np.ndarray] = {}
        self._error_view_layout: tuple[int, bool, bool, bool] | None = None
        # belief_sd of the diagnostics view: one buffer, refilled per call
        self._sd_flat = np.zeros(self.size)
        self._sd_fresh = False
        self._sd_view = self._sd_flat.reshape(self.order + 1, self.n)
        self._lazy_errors = False
        self._safe_stop_reason = ""
        self._last_finite_q = np.zeros(self.n)
        self._disturbance = np.zeros(self.n)
        self._last_velocity_belief: np.ndarray | None = None
        self._target_last: np.ndarray | None = None
        self._target_velocity = np.zeros(3)
        self._target_window = max(1, int(round(self.options["target_window_s"] / self.dt)))
        self._target_steps = np.zeros((self._target_window, 3))
        self._target_count = 0
        self._reset_channel_statistics()

    def _initialise(self, obs: Mapping[str, Any]) -> None:
        n, p = self.n, self.order
        q = np.asarray(obs["joint_angle_rad"], dtype=float)
        v = np.asarray(obs["joint_velocity_rad_s"], dtype=float)
        z = np.zeros((p + 1, n))
        z[0] = q
        z[1] = v
        self._belief = z.reshape(-1)
        var = np.empty(self.size)
        var[self._sel[0]] = 1.0 / self.precision["joint_angle"]
        var[self._sel[1]] = 1.0 / self.precision["joint_velocity"]
        for k in range(2, p + 1):
            var[self._sel[k]] = 10.0 ** (2 * k)
        self._cov = np.diag(var)
        self._sd_fresh = False
        self._home = q.copy()
        self._last_finite_q = q.copy()
        self._action = v.copy() if self.control == "velocity" else np.zeros(n)

    # -- the attractor ------------------------------------------------------------------
    def attractor(
        self, q: np.ndarray, body: BodyState, target: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Joint velocity the goal asks for, and its Jacobian with respect to ``q``.

        ``f(q) = J+ sat(k (x* - x) + x*') + k_null (I - J+ J)(q_home - q)`` with the weighted damped
        least-squares inverse ``J+ = W^-1 J' inv(J W^-1 J' + lambda^2 I)`` (Wampler 1986, IEEE
        Trans SMC 16(1), eq. 7; the weights of :func:`joint_limit_weights`, after Chan & Dubey
        1995). ``x*'`` is the believed target velocity (:meth:`_track_target`). The Jacobian
        ignores the derivatives of ``J`` and ``W`` (Gauss-Newton).
        """
        opts = self.options
        J = body.tip_jacobian
        err = target - body.tip_position_m
        k = opts["attractor_gain_1_s"]
        vel = k * err + self._target_velocity
        speed = float(np.sqrt(vel @ vel))
        vmax = opts["max_tip_speed_m_s"]
        scale = vmax / speed if speed > vmax else 1.0
        lam2 = opts["damping_m"] ** 2
        if opts["joint_limit_weighting"]:
            Jw = J * joint_limit_weights(q, self._limit_low, self._limit_high)
        else:
            Jw = J
        JJt = Jw @ J.T
        JJt.flat[::4] += lam2
        _, X, info = dposv(JJt, Jw, lower=1)  # X = inv(J W^-1 J' + lambda^2 I) J W^-1
        if info != 0:
            raise np.linalg.LinAlgError("damped Jacobian product is not positive definite")
        Jpinv = X.T
        JpJ = Jpinv @ J
        null = self._eye_n - JpJ
        kn = opts["posture_gain_1_s"]
        f = Jpinv @ (vel * scale) + kn * (null @ (self._home - q))
        F = -k * scale * JpJ - kn * null
        return f, F

    # -- one step -----------------------------------------------------------------------
    def act(self, obs: Mapping[str, Any]) -> np.ndarray:
        """Update the belief from ``obs`` and return the next command."""
        if self._belief is None:
            self._initialise(obs)
        self._track_target(obs["target_position_m"])
        try:
            action = self._step_compiled(obs) if self._compiled else self._step_numpy(obs)
        except (np.linalg.LinAlgError, FloatingPointError, ValueError) as exc:
            return self._safe_stop(f"numerical failure: {exc}")
        return action

    def _track_target(self, position: Any) -> None:
        """Believed target velocity: the order-1 generalized coordinate of its recent track.

        The backward difference over the last ``target_window_s`` (exact for a target moving at
        constant velocity; target positions are given, not sensed with noise); a jump of more
        than 5 cm in one step (a new target) restarts the track. A target carried on a
        conveyor is then followed without the steady lag ``speed / attractor_gain`` of a pure
        position attractor.
        """
        if not self.options["track_target_motion"]:
            return
        x = np.asarray(position, dtype=float)
        last = self._target_last
        self._target_last = x.copy()
        if last is None:
            return
        step = x - last
        if np.abs(step).max() > 0.05:
            self._target_steps[:] = 0.0
            self._target_count = 0
            self._target_velocity = np.zeros(3)
            return
        w = self._target_window
        self._target_steps[self._target_count % w] = step
        self._target_count += 1
        self._target_velocity = self._target_steps.sum(axis=0) / (
            min(self._target_count, w) * self.dt
        )

    def _safe_stop(self, reason: str) -> np.ndarray:
        self._safe_stop_reason = reason
        self._diag["safe_stop"] = True
        self._diag["safe_stop_reason"] = reason
        if self.control == "torque":
            return self.body.gravity_torque(self._last_finite_q)
        return np.zeros(self.n)

    def _terms(
        self, obs: Mapping[str, Any], z: np.ndarray, body: BodyState
    ) -> list[tuple[str, np.ndarray, np.ndarray, np.ndarray]]:
        """(name, error, jacobian, diagonal precision) of every term active this step."""
        n, N = self.n, self.size
        s0, s1 = self._sel[0], self._sel[1]
        terms = []
        q = z[s0]
        # Encoders: constant Jacobians (selection of order 0 and order 1).
        y = np.asarray(obs["joint_angle_rad"], dtype=float)
        Gq = np.zeros((n, N))
        Gq[:, s0] = np.eye(n)
        Pq = self.precision["joint_angle"] * ~self._fault["joint_angle"] + 1e-6
        terms.append(("joint_angle", y - q, Gq, Pq))
        yv = np.asarray(obs["joint_velocity_rad_s"], dtype=float)
        Gv = np.zeros((n, N))
        Gv[:, s1] = np.eye(n)
        Pv = self.precision["joint_velocity"] * ~self._fault["joint_velocity"] + 1e-6
        terms.append(("joint_velocity", yv - z[s1], Gv, Pv))
        # Camera: pixel of the tool tip, on fresh frames where it is visible.
        cam = self.camera
        if cam is not None and int(obs.get("camera_fresh", 0)) and int(obs.get("tip_visible", 0)):
            ypx = np.asarray(obs["tip_pixel_px"], dtype=float)
            gpx = cam.project(body.tip_position_m)
            Gpx = np.zeros((2, N))
            Gpx[:, s0] = cam.project_jacobian(body.tip_position_m) @ body.tip_jacobian
            Ppx = self.precision["camera"] * (0.0 if self._fault["camera"][0] else 1.0) + 1e-9
            terms.append(("camera", ypx - gpx, Gpx, Ppx))
        # Efference copy: velocity motors track the last command.
        if self.control == "velocity":
            terms.append(("motor", self._action - z[s1], Gv, np.full(n, self.motor_precision)))
        if self.options["goal"] == "prior":
            target = np.asarray(obs["target_position_m"], dtype=float)
            f, F = self.attractor(q, body, target)
            G = np.zeros((n, N))
            if self.control == "velocity":
                # prior: q' = f(q)  ->  error 0 - (q' - f(q)), d/dz = [-F, I, 0...]
                G[:, s0] = -F
                G[:, s1] = np.eye(n)
                err = f - z[s1]
            else:
                # prior: q'' = k_v (f(q) - q')
                kv = self.options["velocity_gain_1_s"]
                s2 = self._sel[2]
                G[:, s0] = -kv * F
                G[:, s1] = kv * np.eye(n)
                G[:, s2] = np.eye(n)
                err = kv * (f - z[s1]) - z[s2]
            # In torque control the error is an acceleration: scale its precision by 1/kv^2 so
            # the goal weighs on the velocity belief as it does under velocity control.
            scale = (
                1.0 if self.control == "velocity" else 1.0 / self.options["velocity_gain_1_s"] ** 2
            )
            terms.append(("goal", err, G, np.full(n, self.goal_precision * scale)))
        for term in self.extra_terms:
            t = term.evaluate(obs, z.reshape(self.order + 1, n), body)
            if t is not None:
                terms.append((term.name, t.error, t.jacobian, np.asarray(t.precision, float)))
        return terms

    def _step_numpy(self, obs: Mapping[str, Any]) -> np.ndarray:
        """One perception step (prediction + Gauss-Newton step on F), then the action.

        The built-in terms are assembled block by block (their Jacobians are selections or
        small dense blocks), which is what keeps a 7-DoF step in tens of microseconds;
        :meth:`free_energy_and_gradient` evaluates the same terms generically and the tests
        check that both agree.
        """
        n, N = self.n, self.size
        p1 = self.order + 1
        opts = self.options
        # Prediction: generalized motion over dt (local linearisation of D z), Laplace prior.
        z_prior = (self._phi_t @ self._belief.reshape(p1, n)).reshape(-1)
        cov_prior = self._phi @ self._cov @ self._phi_T
        cov_prior += self._w
        chol, info = dpotrf(cov_prior, lower=1, clean=0)
        if info != 0:
            raise np.linalg.LinAlgError("prior covariance is not positive definite")
        H, _ = dpotrs(chol, self._eye_N, lower=1)  # prior precision Pi-
        q = z_prior[:n]
        v = z_prior[n : 2 * n]
        tip, J = self.body.tip_position_and_jacobian(q)

        grad = np.zeros(N)
        hdiag = np.zeros(N)
        errors: dict[str, np.ndarray] = {}
        # Encoder angles and velocities: Jacobians select orders 0 and 1.
        pq = self._effective_precision("joint_angle")
        pv = self._effective_precision("joint_velocity")
        eq = obs["joint_angle_rad"] - q
        ev = obs["joint_velocity_rad_s"] - v
        grad[:n] -= pq * eq
        grad[n : 2 * n] -= pv * ev
        hdiag[:n] += pq
        hdiag[n : 2 * n] += pv
        energy = 0.5 * (float(eq @ (pq * eq)) + float(ev @ (pv * ev)))
        logdet = float(np.log(pq).sum() + np.log(pv).sum())
        errors["joint_angle"] = eq
        errors["joint_velocity"] = ev
        # Camera: the tool tip's pixel on fresh frames where it is visible.
        cam = self.camera
        g_cam = None
        if cam is not None and obs.get("camera_fresh", 0) and obs.get("tip_visible", 0):
            pix, dpix = cam.project_with_jacobian(tip)
            g_cam = dpix @ J
            ec = obs["tip_pixel_px"] - pix
            pc = self._effective_precision("camera")
            gtp = g_cam.T * pc
            H[:n, :n] += gtp @ g_cam
            grad[:n] -= gtp @ ec
            energy += 0.5 * float(ec @ (pc * ec))
            logdet += float(np.log(pc).sum())
            errors["camera"] = ec
        # Efference copy: velocity motors track the last command.
        if self.control == "velocity":
            pm = self.motor_precision
            em = self._action - v
            grad[n : 2 * n] -= pm * em
            hdiag[n : 2 * n] += pm
            energy += 0.5 * pm * float(em @ em)
            logdet += n * np.log(pm)
            errors["motor"] = em
        # The goal: attractor on the velocity (or acceleration) as prior dynamics.
        target = np.asarray(obs["target_position_m"], dtype=float)
        f, F = self.attractor(q, BodyState(tip, J), target)
        self._attractor_velocity = f
        if opts["goal"] == "prior":
            pg = self.goal_precision
            if self.control == "velocity":
                eg = f - v
                grad[:n] += pg * (F.T @ eg)
                grad[n : 2 * n] -= pg * eg
                FtF = pg * (F.T @ F)
                H[:n, :n] += FtF
                H[:n, n : 2 * n] -= pg * F.T
                H[n : 2 * n, :n] -= pg * F
                hdiag[n : 2 * n] += pg
            else:
                kv = opts["velocity_gain_1_s"]
                pg = pg / kv**2
                acc = z_prior[2 * n : 3 * n]
                eg = kv * (f - v) - acc
                s2 = slice(2 * n, 3 * n)
                Ft = F.T
                grad[:n] += pg * kv * (Ft @ eg)
                grad[n : 2 * n] -= pg * kv * eg
                grad[s2] -= pg * eg
                H[:n, :n] += (pg * kv * kv) * (Ft @ F)
                H[:n, n : 2 * n] -= (pg * kv * kv) * Ft
                H[n : 2 * n, :n] -= (pg * kv * kv) * F
                H[:n, s2] -= (pg * kv) * Ft
                H[s2, :n] -= (pg * kv) * F
                H[n : 2 * n, s2] += pg * kv * np.eye(n)
                H[s2, n : 2 * n] += pg * kv * np.eye(n)
                hdiag[n : 2 * n] += pg * kv * kv
                hdiag[s2] += pg
            energy += 0.5 * pg * float(eg @ eg)
            logdet += n * np.log(pg)
            errors["goal"] = eg
        if self.extra_terms:
            body = BodyState(tip, J)
            for term in self.extra_terms:
                t = term.evaluate(obs, z_prior.reshape(p1, n), body)
                if t is None:
                    continue
                P = np.asarray(t.precision, dtype=float)
                gtp = t.jacobian.T * P
                H += gtp @ t.jacobian
                grad -= gtp @ t.error
                energy += 0.5 * float(t.error @ (P * t.error))
                logdet += float(np.log(P).sum())
                errors[term.name] = t.error
        H.flat[:: N + 1] += hdiag
        energy -= 0.5 * logdet
        chol, info = dpotrf(H, lower=1, clean=0)
        if info != 0:
            raise np.linalg.LinAlgError("free-energy curvature is not positive definite")
        cov, _ = dpotrs(chol, self._eye_N, lower=1)
        z = z_prior - cov @ grad
        if not (np.isfinite(energy) and np.isfinite(z).all()):
            return self._safe_stop("belief or free energy is not finite")
        if np.abs(z[n : 2 * n]).max() > opts["divergence_limit"]:
            return self._safe_stop("belief velocity exploded")

        if opts["fault_detection"]:
            self._detect_faults(errors, cov_prior, g_cam)
        if opts["learn_precision"]:
            self._learn_precisions(errors, cov_prior, g_cam)

        self._belief = z
        self._cov = cov
        self._sd_fresh = False
        self._last_finite_q = z[:n]
        action = self._action_update(z)
        self._action = action
        self._lazy_errors = False
        self._diag = {
            "free_energy": energy,
            "prediction_error": errors,
            "safe_stop": False,
            "safe_stop_reason": "",
        }
        return action

    def _buffers(self) -> None:
        n, N = self.n, self.size
        self._z_out = np.zeros(N)
        self._cov_out = np.zeros((N, N))
        self._cov_prior = np.zeros((N, N))
        self._F = np.zeros((n, n))
        self._g_cam = np.zeros((2, n))
        self._err = {k: np.zeros(n) for k in ("joint_angle", "joint_velocity", "motor", "goal")}
        self._err["camera"] = np.zeros(2)
        self._work = np.zeros((N, 4 * N))
        self._f_out = np.zeros(n)
        self._cam_on = False
        if self.camera is not None:
            c = self.camera
            self._cam_R = np.ascontiguousarray(c.base_from_camera[:3, :3], dtype=float)
            self._cam_t = np.ascontiguousarray(c.base_from_camera[:3, 3], dtype=float)
            self._cam_k = np.array([c.fx_px, c.fy_px, c.cx_px, c.cy_px], dtype=float)
        else:
            self._cam_R, self._cam_t, self._cam_k = np.eye(3), np.zeros(3), np.ones(4)
        o = self.options
        self._attractor_params = np.array(
            [
                o["attractor_gain_1_s"],
                o["max_tip_speed_m_s"],
                o["damping_m"] ** 2,
                o["posture_gain_1_s"],
                1.0 if o["joint_limit_weighting"] else 0.0,
            ],
            dtype=float,
        )
        if o["goal"] == "reference":
            self._goal_mode, self._pg = 0, 0.0
        elif self.control == "velocity":
            self._goal_mode, self._pg = 1, self.goal_precision
        else:
            self._goal_mode = 2
            self._pg = self.goal_precision / o["velocity_gain_1_s"] ** 2
        self._pm = self.motor_precision if self.control == "velocity" else 0.0
        self._zero2 = np.zeros(2)
        self._nan2 = np.full(2, np.nan)
        self._log_det_key: tuple[int, int] | None = None
        self._log_det_value = 0.0
        self._log_det_cam: float | None = None
        self._precision_changing = bool(o["learn_precision"] or o["fault_detection"])

    def _step_compiled(self, obs: Mapping[str, Any]) -> np.ndarray:
        """The same step as :meth:`_step_numpy`, through the compiled kernel."""
        n = self.n
        z = self._belief
        q_prior = self._phi_t[0] @ z.reshape(self.order + 1, n)
        tip, J = self.body.tip_position_and_jacobian(q_prior)
        cam_on = bool(
            self.camera is not None and obs.get("camera_fresh", 0) and obs.get("tip_visible", 0)
        )
        pq = self._effective_precision("joint_angle")
        pv = self._effective_precision("joint_velocity")
        pc = self._effective_precision("camera")
        err = self._err
        status, energy = _kernel.perception_step(
            z,
            self._cov,
            self._phi_t,
            self._w,
            np.asarray(obs["joint_angle_rad"], dtype=float),
            np.asarray(obs["joint_velocity_rad_s"], dtype=float),
            self._action,
            pq,
            pv,
            self._pm,
            tip,
            J,
            cam_on,
            np.asarray(obs["tip_pixel_px"], dtype=float) if cam_on else self._zero2,
            self._cam_R,
            self._cam_t,
            self._cam_k,
            pc,
            np.asarray(obs["target_position_m"], dtype=float),
            self._target_velocity,
            self._home,
            self._attractor_params,
            self._limit_low,
            self._limit_high,
            self._goal_mode,
            self._pg,
            float(self.options["velocity_gain_1_s"]),
            self._z_out,
            self._cov_out,
            self._cov_prior,
            self._f_out,
            self._F,
            self._g_cam,
            err["joint_angle"],
            err["joint_velocity"],
            err["motor"],
            err["camera"],
            err["goal"],
            self._sd_flat,
            self._work,
            float(self.options["divergence_limit"]),
        )
        self._sd_fresh = status == _kernel.OK
        if status == _kernel.NOT_FINITE:
            return self._safe_stop("belief or free energy is not finite")
        if status == _kernel.EXPLODED:
            return self._safe_stop("belief velocity exploded")
        if status != _kernel.OK:
            raise np.linalg.LinAlgError(
                ("prior covariance", "free-energy curvature", "damped Jacobian product")[status - 1]
                + " is not positive definite"
            )
        energy -= 0.5 * (self._log_det(pq, pv) + (self._log_det_camera(pc) if cam_on else 0.0))
        z_new = self._z_out
        self._cam_on = cam_on
        if self.options["fault_detection"] or self.options["learn_precision"]:
            errors = self._error_dict(stable=False)
            g_cam = self._g_cam if cam_on else None
            if self.options["fault_detection"]:
                self._detect_faults(errors, self._cov_prior, g_cam)
            if self.options["learn_precision"]:
                self._learn_precisions(errors, self._cov_prior, g_cam)
        # swap buffers: the new belief becomes current, the old one the next output
        self._belief, self._z_out = z_new, self._belief
        self._cov, self._cov_out = self._cov_out, self._cov
        self._attractor_velocity = self._f_out.copy()
        self._last_finite_q = self._belief[:n]
        action = self._action_update(self._belief)
        self._action = action
        self._diag = {"free_energy": energy, "safe_stop": False, "safe_stop_reason": ""}
        self._lazy_errors = True
        return action

    def _log_det(self, pq: np.ndarray, pv: np.ndarray) -> float:
        """Sum of log precisions of the encoder, motor and goal terms (cached while fixed)."""
        key = (id(pq), id(pv))
        if self._log_det_key != key or self._precision_changing:
            n = self.n
            value = float(np.log(pq).sum() + np.log(pv).sum())
            if self._pm > 0:
                value += n * np.log(self._pm)
            if self._goal_mode:
                value += n * np.log(self._pg)
            self._log_det_key, self._log_det_value = key, value
        return self._log_det_value

    def _log_det_camera(self, pc: np.ndarray) -> float:
        if self._precision_changing or self._log_det_cam is None:
            self._log_det_cam = float(np.log(pc).sum())
        return self._log_det_cam

    def _error_dict(self, stable: bool = True) -> dict[str, np.ndarray]:
        """Prediction errors of the last step. ``stable``: the same keys every step (a stable
        log schema), the camera's NaN on steps without a fresh, visible frame; otherwise only
        the terms that were active."""
        names = ["joint_angle", "joint_velocity"]
        if self._pm > 0:
            names.append("motor")
        if self._goal_mode:
            names.append("goal")
        out = {k: self._err[k].copy() for k in names}
        if self._cam_on:
            out["camera"] = self._err["camera"].copy()
        elif stable and self.camera is not None:
            out["camera"] = np.full(2, np.nan)
        return out

    def _effective_precision(self, name: str) -> np.ndarray:
        """A channel's precision, down-weighted where it is flagged faulty."""
        P = self.precision[name]
        if self.options["fault_detection"]:
            if name == "joint_angle" and self._pending_inflation is not None:
                # Covariance inflation when an angle is flagged: the belief followed the bad
                # reading for the detection delay (about 3 windows) at the believed speed, so
                # its variance grows by that drift squared and the other channels can correct
                # it (common practice, no source). Only with goal="reference": under a goal
                # prior the freed variance lets the goal, not the camera, take the joint.
                j = self._pending_inflation
                self._pending_inflation = None
                n = self.n
                v = self._belief[n : 2 * n] if self._belief is not None else np.zeros(n)
                drift = np.abs(v[j]) * 3.0 * float(self.options["fault_window_s"])
                drift = drift + 1.0 / np.sqrt(P[j])
                self._cov[j, j] += drift * drift
            flags = self._fault[name]
            if flags.any():
                return np.where(flags if name != "camera" else flags.repeat(2), P * 1e-6, P)
        return P

    def _action_update(self, z: np.ndarray) -> np.ndarray:
        """Newton step of the action on F through the predicted sensations."""
        d = self.description
        n = self.n
        q, v = z[:n], z[n : 2 * n]
        frac = self.options["action_fraction"]
        f = self._attractor_velocity
        if self.control == "velocity":
            # F_a = 1/2 P (y_v(a) - v*)^2 with y_v(a) = a: Newton step a += frac (v* - a).
            wanted = v if self.options["goal"] == "prior" else f
            a = wanted.copy() if frac == 1.0 else self._action + frac * (wanted - self._action)
            lim = d.velocity_limit_rad_s
            return np.minimum(np.maximum(a, -lim, out=a), lim, out=a)
        # Torque: q''(tau) = inv(M)(tau - h); the Newton step on F_a gives
        # tau = h + M q''_wanted (see torque_action_free_energy).
        if self.options["goal"] == "prior":
            qdd = z[2 * n : 3 * n]
        else:
            qdd = self.options["velocity_gain_1_s"] * (f - v)
        h = self.body.nonlinear_effects(q, v)
        M = self.body.mass_matrix(q)
        tau = h + M @ qdd
        td = self.options["disturbance_time_constant_s"]
        if td > 0:
            # Hidden cause: an unmodelled joint torque d (payload, contact, friction), believed
            # slowly varying. Its prediction error is the gap between the acceleration the
            # velocity belief went through and the forward model's under the last torque,
            # M q'' - (tau_prev - h) (a disturbance observer, Ohnishi, Shibata & Murakami
            # 1996, IEEE/ASME Trans Mech 1(1)).
            if self._last_velocity_belief is not None:
                beta = min(1.0, self.dt / td)
                qdd_seen = (v - self._last_velocity_belief) / self.dt
                seen = M @ qdd_seen - (self._action - h)
                self._disturbance += beta * (seen - self._disturbance)
            self._last_velocity_belief = v.copy()
            tau = tau - self._disturbance
        a = self._action + frac * (tau - self._action)
        return np.clip(a, -d.torque_limit_n_m, d.torque_limit_n_m)

    def _innovation_variance(
        self, name: str, cov_prior: np.ndarray, g_cam: np.ndarray | None
    ) -> np.ndarray:
        """Diagonal of the predicted innovation covariance ``G Sigma- G'`` (without noise)."""
        n = self.n
        if name == "camera":
            return np.einsum("ij,jk,ik->i", g_cam, cov_prior[:n, :n], g_cam)
        sel = slice(0, n) if name == "joint_angle" else slice(n, 2 * n)
        return np.diagonal(cov_prior)[sel]

    def _reset_channel_statistics(self) -> None:
        """Per-episode state of the fault tests and of precision learning."""
        n = self.n
        enc = ("joint_angle", "joint_velocity")
        self._fault_high = {k: np.zeros_like(v, dtype=bool) for k, v in self._fault_stat.items()}
        self._fault_low = {k: np.zeros(n, dtype=bool) for k in enc}
        self._flatline_stat = {k: np.ones(n) for k in enc}
        self._last_reading: dict[str, np.ndarray] = {}
        # Reading increments of white noise are MA(1) (lag-1 correlation -1/2): the mean of
        # their squares over w samples has variance 3/w, not 2/w, so it counts as 2w/3
        # independent chi-square(1) samples (common practice, no source).
        w_eff = max(1.0, 2.0 / self._fault_alpha - 1.0) * 2.0 / 3.0
        pfa = float(self.options["fault_false_alarm"])
        self._flatline_threshold = chdtri(w_eff, 1.0 - pfa) / w_eff  # lower pfa quantile
        self._increment_threshold = chdtri(w_eff, pfa) / w_eff  # upper pfa quantile
        self._noise_variance = {
            k: 1.0 / v for k, v in self._initial_precision.items() if np.all(v > 0)
        }
        self._noise_samples = dict.fromkeys(self._noise_variance, 0)
        self._last_angle_reading: np.ndarray | None = None
        self._pending_inflation: np.ndarray | None = None

    def _detect_faults(self, errors, cov_prior, g_cam) -> None:
        """Two-sided tests per channel (per joint for the encoders); flags in ``self._fault``.

        Each test averages a normalized squared residual ``x`` over an exponential window of
        ``fault_window_s`` (``w`` effective samples); under no fault the average is close to
        ``chi2(w m) / (w m)`` for ``m`` components, and the two-sided acceptance region of
        the innovation test at ``fault_false_alarm`` (Bar-Shalom, Li & Kirubarajan 2001,
        *Estimation with Applications to Tracking and Navigation*, sec. 5.4.2) bounds it.
        Each sample is capped at 16 (4 standard deviations) so that one outlier, such as a
        motor that lags a jump of command for a step, cannot raise a flag alone.

        * Too much error. Under velocity control the encoders are tested against the
          efference copy ``a``, which the motors track far closer than the encoder noise, so
          the test does not depend on the belief (a goal prior biases the belief by design,
          and a down-weighted channel would otherwise never look healthy again): angles on
          ``r = y_k - y_(k-1) - dt a`` (variance ``2 / P``; MA(1), so ``w`` shrinks by 2/3),
          velocities on ``r = y - a`` (variance ``1 / P``). Otherwise, and for the camera,
          on the innovation, ``x = nu^2 / S``, ``S = G Sigma- G' + inv(P)``. The flag clears
          below half the threshold. The camera is not flagged while an encoder angle is (the
          belief it is tested against is then the suspect).
        * Too little noise (encoders): a stuck reading stops carrying its noise. The squared
          increment ``(y_k - y_(k-1))^2 P / 2`` has mean >= 1 under white noise of
          precision ``P`` (motion only adds to it); below the lower quantile the joint is
          flagged, and the flag clears above twice that quantile.

        ``P`` is the channel's nominal (or learned) precision, never the down-weighted one.
        A flagged channel's precision is cut to 1e-6 of its value (:meth:`_effective_precision`)
        and returns when the tests pass again.
        """
        alpha = self._fault_alpha
        motor = errors.get("motor")
        p1 = self.order + 1
        predicted = self._phi_t[:2] @ self._belief.reshape(p1, self.n)
        command = None if motor is None else motor + predicted[1]
        for name in ("joint_angle", "joint_velocity", "camera"):
            if name not in errors:
                continue
            e = errors[name]
            P = self.precision[name]
            thr = self._fault_threshold[name]
            low = None
            if name == "camera":
                S = self._innovation_variance(name, cov_prior, g_cam) + 1.0 / P
                stat = np.array([np.minimum(e * e / S, 16.0).mean()])
            else:
                # The raw reading is the error plus the prediction it was measured against.
                reading = e + predicted[0 if name == "joint_angle" else 1]
                last = self._last_reading.get(name)
                self._last_reading[name] = reading
                if last is None:
                    continue
                d = reading - last
                if command is None:
                    S = self._innovation_variance(name, cov_prior, g_cam) + 1.0 / P
                    stat = e * e / S
                elif name == "joint_angle":
                    r = d - self.dt * command
                    stat = 0.5 * r * r * P
                    thr = self._increment_threshold
                else:
                    r = reading - command
                    stat = r * r * P
                stat = np.minimum(stat, 16.0)
                f = self._flatline_stat[name]
                f += alpha * (0.5 * d * d * P - f)
                lo = self._flatline_threshold
                low = self._fault_low[name]
                low[:] = np.where(low, f < 2.0 * lo, f < lo)
            m = self._fault_stat[name]
            m += alpha * (stat - m)
            high = self._fault_high[name]
            high[:] = np.where(high, m > 0.5 * thr, m > thr)
            if name == "camera":
                # The camera is tested against the belief, which leans on the encoder angles:
                # while one of those is flagged, the camera is the arbiter and stays in use.
                high &= not self._fault["joint_angle"].any()
            new = high.copy() if low is None else high | low
            rising = new & ~self._fault[name]
            if name == "joint_angle" and rising.any() and self.options["goal"] == "reference":
                self._pending_inflation = np.flatnonzero(rising)
            self._fault[name] = new

    def _learn_precisions(self, errors, cov_prior, g_cam) -> None:
        """Covariance matching of each channel's noise variance on its innovations.

        Under a consistent filter the innovation ``nu = y - g(mu-)`` has variance
        ``S = G Sigma- G' + R``, so ``R = E[nu^2] - G Sigma- G'`` per component (diagonal
        ``R``): the innovation-based adaptive estimate of Mehra 1970 (IEEE Trans Autom
        Control 15(2), sec. IV) in the sample form of Myers & Tapley 1976 (IEEE Trans Autom
        Control 21(4), eq. 29). Under velocity control two channels use the efference copy
        ``a`` (the motors track it far closer than the encoder noise) instead of ``Sigma-``,
        which a goal prior or an unmodelled change of command makes wrong. Encoder angles:
        the reading's increment less the commanded motion, ``d = y_k - y_(k-1) - dt a``, is
        ``n_k - n_(k-1)``, so ``R_q = E[d^2] / 2`` (the difference variance estimator, von
        Neumann et al. 1941, Ann Math Stat 12(2), from memory). The velocity prediction misses every
        change of command, so ``Sigma-`` understates its error; there the efference copy's
        error ``e_m = a - q'-`` carries the same prediction error with independent noise, and
        ``R_v = E[nu_v (nu_v - e_m)]`` is Grubbs' two-instrument estimator (Grubbs 1948, J Am
        Stat Assoc 43(242), from memory), free of the prediction error whatever its size. The
        camera's pixel error is likewise predicted by the encoder angles' error through the
        camera Jacobian ``G``: ``R_px = E[nu_px (nu_px - G nu_q)]`` (while no encoder angle is
        flagged), which keeps the camera from absorbing an error of ``Sigma-``. Each estimate
        is averaged with weights ``max(1 / k, 1 - exp(-r dt_m))``
        (``k`` the channel's sample count, ``r = precision_learning_rate`` per second, ``dt_m``
        the channel's sample interval; ``r = 0`` keeps the full average), and the precision
        is ``P = 1 / R``, bounded to ``[e^-7, e^7]`` times the starting precision, applied from
        the ``_LEARNING_BURN_IN``-th sample on; each sample is clipped to ``[-3, 20]`` predicted
        innovation variances (an outlier guard, common practice, no source). Samples a
        channel takes while flagged by :meth:`_detect_faults` are skipped.
        """
        rate = float(self.options["precision_learning_rate"])
        for name in ("joint_angle", "joint_velocity", "camera"):
            if name not in errors or name not in self._noise_variance:
                continue
            high = self._fault_high[name]
            if name != "camera":
                high = high | self._fault_low[name]
            if high.all():
                continue
            e = errors[name]
            s = self._innovation_variance(name, cov_prior, g_cam)
            if name == "joint_angle" and "motor" in errors:
                # The reading's increment less the commanded motion is n_k - n_(k-1).
                p1 = self.order + 1
                v_prior = self._phi_t[1] @ self._belief.reshape(p1, self.n)
                q_prior = self._phi_t[0] @ self._belief.reshape(p1, self.n)
                reading = e + q_prior
                last = self._last_angle_reading
                self._last_angle_reading = reading
                if last is None:
                    continue
                d = reading - last - self.dt * (errors["motor"] + v_prior)
                sample = 0.5 * d * d
                s = 0.0
            elif name == "joint_velocity" and "motor" in errors:
                # Grubbs' estimator: the efference copy sees the same prediction error.
                sample = e * (e - errors["motor"])
            elif name == "camera" and not self._fault["joint_angle"].any():
                # ... and the encoder angles see the camera's, through its Jacobian.
                sample = e * (e - g_cam @ errors["joint_angle"])
            else:
                sample = e * e - s
            # Robustness: one sample moves the estimate by at most 20 (up) or 3 (down)
            # predicted innovation variances (a chi-square(1) draw exceeds 20 with p < 1e-5).
            S = s + 1.0 / self.precision[name]
            sample = np.clip(sample, -3.0 * S, 20.0 * S)
            k = self._noise_samples[name] + 1
            self._noise_samples[name] = k
            step_s = self.dt
            if name == "camera" and self.camera is not None:
                step_s = max(self.dt, 1.0 / self.camera.rate_hz)
            a = max(1.0 / k, -np.expm1(-rate * step_s))
            healthy = ~(high.repeat(2) if name == "camera" else high)
            R = self._noise_variance[name]
            R += (a * healthy) * (sample - R)
            if k < _LEARNING_BURN_IN:
                continue
            p0 = self._initial_precision[name]
            self.precision[name] = np.clip(
                1.0 / np.maximum(R, 1e-300), p0 * np.exp(-7.0), p0 * np.exp(7.0)
            )

    # -- free energy at an arbitrary belief (for checks and analysis) ----------------------
    def free_energy_and_gradient(
        self,
        obs: Mapping[str, Any],
        belief: np.ndarray,
        prior_mean: np.ndarray | None = None,
        prior_precision: np.ndarray | None = None,
    ) -> tuple[float, np.ndarray]:
        """Laplace-encoded free energy at ``belief`` and its gradient ``dF/dz``.

        ``F = 1/2 dz' Pi dz + sum_m (1/2 e_m' P_m e_m - 1/2 ln|P_m|)``, ``dz = z - prior_mean``;
        ``dF/dz = Pi dz - sum_m G_m' P_m e_m`` (Friston 2008, PLoS Comput Biol, eq. 9), with
        every term evaluated at ``belief`` itself. The goal term's Jacobian neglects the
        derivative of the tip Jacobian (Gauss-Newton), so it is exact only where the task
        error and the posture error vanish.
        """
        z = np.asarray(belief, dtype=float).reshape(-1)
        if self._belief is None:
            self._initialise(obs)
        q = z[self._sel[0]]
        body = BodyState(*self.body.tip_position_and_jacobian(q))
        energy, grad = 0.0, np.zeros(self.size)
        if prior_mean is not None and prior_precision is not None:
            dz = z - np.asarray(prior_mean, dtype=float).reshape(-1)
            grad += prior_precision @ dz
            energy += 0.5 * float(dz @ prior_precision @ dz)
        for _name, e, G, P in self._terms(obs, z, body):
            energy += 0.5 * float(e @ (P * e)) - 0.5 * float(np.sum(np.log(P)))
            grad -= (G.T * P) @ e
        return energy, grad

    # -- reporting ----------------------------------------------------------------------
    @property
    def free_energy(self) -> float | None:
        """Free energy of the last step (None before the first)."""
        return self._diag.get("free_energy")

    @property
    def safe_stop(self) -> bool:
        """Whether the last step ended in the agent's own safe stop."""
        return bool(self._diag.get("safe_stop", False)) or bool(self._safe_stop_reason)

    def diagnostics(self, copy: bool = True) -> dict[str, Any]:
        """The ``internal.*`` log group for the last step.

        Keys: ``belief`` (order+1, n), ``belief_sd`` (order+1, n), ``free_energy``,
        ``prediction_error`` (per channel), ``precision`` (per channel), ``fault`` (per
        channel), ``safe_stop`` and ``safe_stop_reason``. With ``copy=False`` the arrays are
        views of the agent's buffers, valid until the next :meth:`act` or ``copy=False``
        call, and only numbers are given (no ``safe_stop_reason``): what a log writer that
        copies them anyway wants.
        """
        if not copy:
            return self._diagnostics_view()
        p1, n = self.order + 1, self.n
        out: dict[str, Any] = dict(self._diag)
        if getattr(self, "_lazy_errors", False) and "prediction_error" not in out:
            out["prediction_error"] = self._error_dict()
        if self._belief is not None:
            out["belief"] = self._belief.reshape(p1, n).copy()
            out["belief_sd"] = np.sqrt(np.maximum(np.diag(self._cov), 0.0)).reshape(p1, n)
        out["precision"] = {k: v.copy() for k, v in self.precision.items()}
        out["fault"] = {k: v.copy() for k, v in self._fault.items()}
        out.setdefault("safe_stop", bool(self._safe_stop_reason))
        out.setdefault("safe_stop_reason", self._safe_stop_reason)
        return out

    def _diagnostics_view(self) -> dict[str, Any]:
        # Numbers only (the safe-stop reason, a string, is left out): a log writer takes it
        # as it is.
        p1, n = self.order + 1, self.n
        diag = self._diag
        out: dict[str, Any] = {
            "free_energy": diag.get("free_energy", math.nan),
            "safe_stop": bool(diag.get("safe_stop")) or bool(self._safe_stop_reason),
        }
        if self._lazy_errors:
            # views of the error buffers the kernel updates in place: built once per layout
            layout = (id(self._err), self._cam_on, self._pm > 0, bool(self._goal_mode))
            if self._error_view_layout != layout:
                err = self._err
                errors = {k: err[k] for k in ("joint_angle", "joint_velocity")}
                if self._pm > 0:
                    errors["motor"] = err["motor"]
                if self._goal_mode:
                    errors["goal"] = err["goal"]
                if self.camera is not None:
                    errors["camera"] = err["camera"] if self._cam_on else self._nan2
                self._error_view, self._error_view_layout = errors, layout
            out["prediction_error"] = self._error_view
        elif "prediction_error" in diag:
            out["prediction_error"] = diag["prediction_error"]
        if self._belief is not None:
            out["belief"] = self._belief.reshape(p1, n)
            if not self._sd_fresh:  # (the kernel fills it on every completed step)
                np.sqrt(self._cov.diagonal(), out=self._sd_flat)
            out["belief_sd"] = self._sd_view
        if self._precision_changing:
            # Constant precisions are run metadata (see precision_summary), not per-step data.
            out["precision"] = self.precision
            out["fault"] = self._fault
        return out

    def precision_summary(self) -> dict[str, list[float]]:
        """The channels' precisions at the start of an episode (for run metadata)."""
        out = {k: np.asarray(v, dtype=float).tolist() for k, v in self._initial_precision.items()}
        out["motor"] = [self.motor_precision]
        out["goal"] = [self.goal_precision]
        return out

    @property
    def belief(self) -> np.ndarray | None:
        """Current belief, shape (order+1, n), or None before the first observation."""
        return None if self._belief is None else self._belief.reshape(self.order + 1, self.n)
