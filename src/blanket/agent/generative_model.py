"""The arm agent's generative model: built once, never changed by a step.

:class:`GenerativeModel` holds what the agent assumes about its body and its senses: the
sensory channels and the prior dynamics (every one a :class:`~blanket.model.ModelTerm`, the
built-in ones and a user's alike), the generalized motion and its noise, the goal and the
nominal precisions. It is built from an env's static
:class:`~blanket.description.ArmDescription` and the :class:`AgentOptions`, as pinocchio
builds a model once and keeps what changes in a separate data object: here the belief and
the episode state of :mod:`blanket.agent.belief`.

Terms (``e = y - g(z)``, ``G = dg/dz`` with respect to the flattened belief, order-major):

* ``joint_angle``: ``y = q + noise`` (order 0); ``joint_velocity``: ``y = q' - l q'' + noise``
  (order 1) (:class:`EncoderChannel`), ``l`` the reading's lag (``velocity_reading_lag_s``:
  half a period under torque control, where the simulator advances the position with the
  velocity it reports at the period's end, semi-implicit Euler; 0 under velocity control);
* ``camera``: the tool tip's pixel ``y = pi(fk(q))`` on fresh frames in which it is visible,
  ``G = d pi / d x . J(q)`` (:func:`blanket.description.pinhole_projection`);
* ``motor`` (velocity control): the efference copy, the motors track the last command,
  ``a = q' + b + noise``, with a precision learned from how closely they did
  (:meth:`blanket.agent.belief.ChannelMonitor.track_motor`) and a slowly varying tracking
  bias ``b`` per joint (a random walk in the distance the joints travel: a load the motors
  barely hold makes them lag their command steadily, by an amount that changes with the
  posture), estimated beside the belief in two-stage form
  (:class:`blanket.agent.belief.MotorBias`, :func:`blanket.agent._kernel.motor_bias_predict`);
* ``goal`` (``goal="prior"``): the attractor as prior dynamics, ``q' = f(q)`` under velocity
  control, ``q'' = k_v (f(q) - q')`` under torque control
  (:func:`blanket.agent.attractor.damped_least_squares_attractor`).

Under velocity control the prior's motion noise also holds a velocity step per period
(:func:`velocity_step_covariance`, :meth:`GenerativeModel.motion_noise_at`): the motors move
the joints to each new command within a period and the position advances with the new
velocity, which the white-jerk motion alone does not foresee. With it and the learned
efference copy the belief's covariance stays as large as its errors when commands change,
are clamped, or are not followed (``scripts/bench_consistency.py``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from math import factorial
from typing import Any

import numpy as np
from scipy.linalg import expm
from scipy.special import chdtri  # chi-square quantiles; scipy.stats costs ~0.5 s to import

from blanket.description import ArmDescription, CameraDescription
from blanket.errors import ConfigError, did_you_mean, shorten
from blanket.model import BodyState, ModelTerm, Term

__all__ = [
    "AgentOptions",
    "GenerativeModel",
    "StepContext",
    "EncoderChannel",
    "CameraChannel",
    "EfferenceCopy",
    "AttractorPrior",
    "generalized_motion",
    "jerk_covariance",
    "velocity_step_covariance",
    "MOTOR_TRACKING_SD_RAD_S",
]

_GOALS = ("prior", "reference")
_GOAL_SPACES = ("cartesian", "image")  # the goal's space (blanket.agent.image_goal)
_INTEGRATIONS = ("ozaki", "euler")
#: How closely velocity motors are assumed to track the last command (rad/s): pybullet's
#: velocity motors tracked to ~2e-4 rad/s on the built-in arms (measured); 5e-3 leaves margin.
MOTOR_TRACKING_SD_RAD_S = 0.005
#: Channels whose precision can be learned and whose faults are tested.
MONITORED_CHANNELS = ("joint_angle", "joint_velocity", "camera")


class AgentOptions:
    """Options of :class:`~blanket.agent.ArmAgent`, with their defaults and allowed ranges.

    Every option is a keyword of :meth:`~blanket.agent.ArmAgent.from_env` and a key of a
    scenario file's ``[agent]`` table. Unknown names raise :class:`~blanket.errors.ConfigError`.
    """

    defaults: dict[str, Any] = {
        "order": 2,
        "goal": "reference",
        "goal_space": "cartesian",
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
        "velocity_step_sd_rad_s": 0.01,
        "velocity_step_gain": 10.0,
        "velocity_reading_lag_s": None,
        "motor_bias_sd_rad_s": 0.01,
        "motor_bias_travel_sd_rad_s": 0.02,
        "action_fraction": 1.0,
        "learn_precision": False,
        "learn_motor_precision": True,
        "robust_precision": True,
        "motor_window_s": 0.1,
        "precision_learning_rate": 0.2,
        "fault_detection": False,
        "fault_window_s": 0.1,
        "fault_false_alarm": 1e-7,
        "length_scale": 1.0,
        "mass_scale": 1.0,
        "payload_kg": 0.0,
        "divergence_limit": 1e3,
        "learn_body": False,
        "body_calibration_episodes": 0,
        "body_learning_rate": 1.0,
        "body_length_prior_sd": 0.1,
        "link_length_prior_sd": 0.02,
        "payload_prior_sd_kg": 2.0,
        "torque_noise_sd_n_m": 3.0,
        "link_length_scales": None,
        "payload_com_m": None,
    }

    @classmethod
    def resolve(cls, options: Mapping[str, Any]) -> dict[str, Any]:
        """The options with defaults filled in; a one-line ConfigError for any bad value."""
        unknown = sorted(set(options) - set(cls.defaults))
        if unknown:
            hint = did_you_mean(unknown[0], cls.defaults)
            raise ConfigError(f"unknown agent option {shorten(unknown[0])}; {hint}")
        out = dict(cls.defaults)
        out.update(options)
        order = out["order"]
        if not isinstance(order, int | np.integer) or not 0 < int(order) <= 6:
            raise ConfigError(
                f"agent option order must be a whole number in 1..6, got {shorten(order)}"
            )
        if out["goal"] not in _GOALS:
            raise ConfigError(
                f"agent option goal must be one of {_GOALS}, got {shorten(out['goal'])}"
            )
        space = out["goal_space"]
        if space not in _GOAL_SPACES:
            raise ConfigError(
                f"agent option goal_space must be one of {_GOAL_SPACES}, got "
                f"{shorten(space)}; {did_you_mean(str(space), _GOAL_SPACES)}"
            )
        if out["integration"] not in _INTEGRATIONS:
            raise ConfigError(
                f"agent option integration must be one of {_INTEGRATIONS}, "
                f"got {shorten(out['integration'])}"
            )
        for key in (
            "attractor_gain_1_s",
            "max_tip_speed_m_s",
            "velocity_gain_1_s",
            "jerk_intensity",
            "length_scale",
            "mass_scale",
            "fault_window_s",
            "motor_window_s",
            "target_window_s",
            "divergence_limit",
            "body_length_prior_sd",
            "link_length_prior_sd",
            "payload_prior_sd_kg",
            "torque_noise_sd_n_m",
        ):
            v = out[key]
            if not isinstance(v, int | float) or not np.isfinite(v) or v <= 0:
                raise ConfigError(f"agent option {key} must be a number > 0, got {shorten(v)}")
        for key in (
            "damping_m",
            "posture_gain_1_s",
            "velocity_step_sd_rad_s",
            "velocity_step_gain",
            "motor_bias_sd_rad_s",
            "motor_bias_travel_sd_rad_s",
            "payload_kg",
            "precision_learning_rate",
            "disturbance_time_constant_s",
        ):
            v = out[key]
            if not isinstance(v, int | float) or not np.isfinite(v) or v < 0:
                raise ConfigError(f"agent option {key} must be a number >= 0, got {shorten(v)}")
        for key in ("learn_body", "robust_precision"):
            if not isinstance(out[key], bool | np.bool_):
                raise ConfigError(
                    f"agent option {key} must be true or false, got {shorten(out[key])}"
                )
        if not isinstance(out["learn_body"], bool | np.bool_):
            raise ConfigError(
                f"agent option learn_body must be true or false, got {shorten(out['learn_body'])}"
            )
        v = out["body_calibration_episodes"]
        if not isinstance(v, int | np.integer) or isinstance(v, bool) or v < 0:
            raise ConfigError(
                f"agent option body_calibration_episodes must be a whole number >= 0, got "
                f"{shorten(v)}"
            )
        if v and not out["learn_body"]:
            raise ConfigError("agent option body_calibration_episodes needs learn_body = true")
        v = out["body_learning_rate"]
        if not isinstance(v, int | float) or not 0 < v <= 1:
            raise ConfigError(
                f"agent option body_learning_rate must be in (0, 1], got {shorten(v)}"
            )
        for key, size in (("link_length_scales", None), ("payload_com_m", 3)):
            v = out[key]
            if v is None:
                continue
            ok = isinstance(v, list | tuple | np.ndarray) and all(
                isinstance(x, int | float | np.floating) and np.isfinite(x) for x in v
            )
            if not ok or (size is not None and len(v) != size):
                what = "3 numbers (m)" if size else "a list of numbers > 0"
                raise ConfigError(f"agent option {key} must be {what}, got {shorten(v)}")
        v = out["action_fraction"]
        if not isinstance(v, int | float) or not 0 < v <= 1:
            raise ConfigError(f"agent option action_fraction must be in (0, 1], got {shorten(v)}")
        v = out["fault_false_alarm"]
        if not isinstance(v, int | float) or not 0 < v < 0.5:
            raise ConfigError(
                f"agent option fault_false_alarm must be in (0, 0.5), got {shorten(v)}"
            )
        v = out["velocity_reading_lag_s"]
        if v is not None and (not isinstance(v, int | float) or not np.isfinite(v) or v < 0):
            raise ConfigError(
                f"agent option velocity_reading_lag_s must be a number >= 0 or omitted, "
                f"got {shorten(v)}"
            )
        for key in (
            "joint_angle_precision",
            "joint_velocity_precision",
            "camera_precision",
            "motor_precision",
            "goal_precision",
        ):
            v = out[key]
            if v is not None and (not isinstance(v, int | float) or not np.isfinite(v) or v <= 0):
                raise ConfigError(
                    f"agent option {key} must be a number > 0 or omitted, got {shorten(v)}"
                )
        out["order"] = int(order)
        return out


def generalized_motion(order: int, dt: float, integration: str) -> np.ndarray:
    """Transition of generalized motion over ``dt`` for one joint, shape (p+1, p+1).

    The flow ``z' = D z`` (``D`` the shift operator) integrated by local linearisation
    (Ozaki 1992, Statistica Sinica 2), exact for this linear flow: ``expm(D dt)``;
    ``integration="euler"`` gives ``I + D dt``.
    """
    D = np.eye(order + 1, k=1)
    if integration == "euler":
        return np.eye(order + 1) + D * dt
    return expm(D * dt)


def jerk_covariance(order: int, dt: float, intensity: float) -> np.ndarray:
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


def velocity_step_covariance(order: int, dt: float, sd: float) -> np.ndarray:
    """Covariance of a velocity step at the start of a control period, for one joint.

    A velocity motor moves the joint velocity to its command within a period, and the
    position then advances with the new velocity over the whole period (semi-implicit
    Euler, as pybullet integrates its bodies): a step ``w`` of sd ``sd`` moves
    ``(q, q')`` by ``b w``, ``b = (dt, 1, 0, ...)``, so the covariance is ``sd^2 b b'``
    (common practice, no source). Without it the prior couples position to a change of
    velocity by only ``3 dt / 8`` (the white-jerk covariance, :func:`jerk_covariance`),
    and every change of command leaves ``5 dt / 8`` of it as an error of the believed
    position that the belief's covariance does not hold.
    """
    b = np.zeros(order + 1)
    b[0] = dt
    if order >= 1:
        b[1] = 1.0
    return sd**2 * np.outer(b, b)


@dataclass(frozen=True)
class StepContext:
    """What the built-in terms need besides the observation, for one step.

    Attributes
    ----------
    command : numpy.ndarray
        The last command (the efference copy), shape (n,).
    precision : Mapping[str, numpy.ndarray]
        The channels' precisions in force this step (learned, down-weighted where flagged).
    attractor_velocity, attractor_jacobian : numpy.ndarray
        ``f(q)`` (n,) and ``df/dq`` (n, n) of the goal's attractor at the believed posture.
    """

    command: np.ndarray
    precision: Mapping[str, np.ndarray]
    attractor_velocity: np.ndarray
    attractor_jacobian: np.ndarray


def _selection(n: int, size: int, order: int) -> np.ndarray:
    G = np.zeros((n, size))
    G[:, order * n : (order + 1) * n] = np.eye(n)
    return G


@dataclass(frozen=True)
class EncoderChannel:
    """Encoder readings of one generalized order: ``y = q^(order) - lag q^(order+1) + noise``.

    ``joint_angle`` observes order 0, ``joint_velocity`` order 1; ``G`` selects that order
    (less ``lag`` times the next). A reading of the value ``lag`` seconds ago is, to first
    order, ``q^(k)(t - lag) = q^(k) - lag q^(k+1)`` (Taylor).
    """

    name: str
    observation: str
    order: int
    size: int
    jacobian: np.ndarray
    lag_s: float = 0.0

    def evaluate(
        self, obs: Mapping[str, Any], belief: np.ndarray, body: BodyState, context: StepContext
    ) -> Term:
        y = np.asarray(obs[self.observation], dtype=float)
        predicted = belief[self.order]
        if self.lag_s:
            predicted = predicted - self.lag_s * belief[self.order + 1]
        return Term(y - predicted, self.jacobian, context.precision[self.name])


@dataclass(frozen=True)
class CameraChannel:
    """The tool tip's pixel on fresh frames where it is visible: ``y = pi(fk(q))``.

    ``G = d pi / d x . J(q)`` on order 0 (:func:`blanket.description.pinhole_projection`).
    """

    camera: CameraDescription
    belief_size: int
    size: int = 2
    name: str = "camera"

    def evaluate(
        self, obs: Mapping[str, Any], belief: np.ndarray, body: BodyState, context: StepContext
    ) -> Term | None:
        if not (obs.get("camera_fresh", 0) and obs.get("tip_visible", 0)):
            return None
        pixel, dpix = self.camera.project_with_jacobian(body.tip_position_m)
        n = belief.shape[1]
        G = np.zeros((2, self.belief_size))
        G[:, :n] = dpix @ body.tip_jacobian
        y = np.asarray(obs["tip_pixel_px"], dtype=float)
        return Term(y - pixel, G, context.precision[self.name])


@dataclass(frozen=True)
class EfferenceCopy:
    """Velocity motors track the last command: ``a = q' + noise`` (order 1).

    ``precision`` is the nominal one; a step uses the precision in force (learned from the
    tracking error, :meth:`blanket.agent.belief.ChannelMonitor.track_motor`).
    """

    size: int
    jacobian: np.ndarray
    precision: np.ndarray
    name: str = "motor"

    def evaluate(
        self, obs: Mapping[str, Any], belief: np.ndarray, body: BodyState, context: StepContext
    ) -> Term:
        precision = context.precision.get(self.name, self.precision)
        return Term(context.command - belief[1], self.jacobian, precision)


@dataclass(frozen=True)
class AttractorPrior:
    """The goal as prior dynamics (``goal="prior"``); the error is ``0 - (D z - f(z))``.

    Velocity control: ``e = f(q) - q'``, ``G = [-F, I, 0, ...]``. Torque control:
    ``e = k_v (f(q) - q') - q''``, ``G = [-k_v F, k_v I, I, 0, ...]``; its precision is
    scaled by ``1 / k_v^2`` so the goal weighs on the velocity belief as under velocity
    control. ``F`` is the attractor's Gauss-Newton Jacobian.
    """

    size: int
    belief_size: int
    velocity_gain: float | None  # None: velocity control
    precision: np.ndarray
    name: str = "goal"

    def evaluate(
        self, obs: Mapping[str, Any], belief: np.ndarray, body: BodyState, context: StepContext
    ) -> Term:
        n = self.size
        f, F = context.attractor_velocity, context.attractor_jacobian
        G = np.zeros((n, self.belief_size))
        if self.velocity_gain is None:
            G[:, :n] = -F
            G[:, n : 2 * n] = np.eye(n)
            return Term(f - belief[1], G, self.precision)
        kv = self.velocity_gain
        G[:, :n] = -kv * F
        G[:, n : 2 * n] = kv * np.eye(n)
        G[:, 2 * n : 3 * n] = np.eye(n)
        return Term(kv * (f - belief[1]) - belief[2], G, self.precision)


@dataclass(frozen=True, eq=False)
class GenerativeModel:
    """The arm agent's generative model (immutable; build with :meth:`from_description`).

    Attributes
    ----------
    description : ArmDescription
        The env's static description the model was built from.
    options : dict
        The resolved :class:`AgentOptions`.
    body : blanket.body.ArmModel
        Kinematics and dynamics of the believed body (pinocchio, from the URDF).
    n, order, size : int
        Joints, embedding order ``p`` and belief length ``(p + 1) n``.
    dt : float
        Control period (s).
    transition : numpy.ndarray
        Generalized motion over ``dt`` for one joint, (p+1, p+1); ``transition_full`` is its
        ``kron`` with ``I_n``.
    motion_noise : numpy.ndarray
        Covariance ``W`` of the generalized motion's noise over ``dt``, (N, N), without the
        velocity step of a change of command (:meth:`motion_noise_at`).
    precision : dict
        Nominal precisions of the monitored channels (``joint_angle``, ``joint_velocity``,
        ``camera``); ``motor_precision`` and ``goal_precision`` those of the efference copy
        and the goal.
    channels : tuple
        The built-in terms (:class:`~blanket.model.ModelTerm`), in assembly order.
    extra_terms : tuple
        The user's terms, assembled after the built-in ones.
    goal_mode : int
        0 no goal in the belief (``goal="reference"``), 1 velocity attractor prior, 2
        acceleration attractor prior (torque control).
    precision_changing : bool
        Whether the monitored channels' precisions change during an episode (learning or
        fault down-weighting).
    motor_learned : bool
        Whether the efference copy's precision is learned from its tracking error.
    guarded : tuple of str
        The monitored channels the noise guard watches (``robust_precision``, without
        ``learn_precision``): those whose precision the options did not set
        (:meth:`blanket.agent.belief.ChannelMonitor.guard`).
    motor_bias_variance, motor_bias_walk : float
        Prior variance ``motor_bias_sd_rad_s^2`` of the efference copy's tracking bias and
        its random walk's variance per radian the joints travel,
        ``motor_bias_travel_sd_rad_s^2`` (both 0 without an efference copy or with
        ``motor_bias_sd_rad_s = 0``: no bias state).
    velocity_reading_lag_s : float
        The velocity encoder's lag ``l`` in its model ``y = q' - l q''`` (order >= 2).
    """

    description: ArmDescription
    options: dict[str, Any]
    body: Any
    n: int
    order: int
    size: int
    dt: float
    control: str
    camera: CameraDescription | None
    transition: np.ndarray
    transition_full: np.ndarray
    motion_noise: np.ndarray
    precision: dict[str, np.ndarray]
    motor_precision: float
    goal_precision: float
    channels: tuple[Any, ...]
    extra_terms: tuple[ModelTerm, ...]
    goal_mode: int
    precision_changing: bool
    motor_learned: bool
    fault_threshold: dict[str, float]
    fault_alpha: float
    kernel_constants: np.ndarray = field(repr=False)
    camera_pose: np.ndarray = field(repr=False)
    camera_intrinsics: np.ndarray = field(repr=False)
    limits: np.ndarray = field(repr=False)
    guarded: tuple[str, ...] = ()
    motor_bias_variance: float = 0.0
    motor_bias_walk: float = 0.0
    velocity_reading_lag_s: float = 0.0

    @classmethod
    def from_description(
        cls,
        description: ArmDescription,
        extra_terms: Sequence[ModelTerm] = (),
        **options: Any,
    ) -> GenerativeModel:
        """Build the model from an env's static description and :class:`AgentOptions`."""
        from blanket.body import ArmModel

        opts = AgentOptions.resolve(options)
        for term in extra_terms:
            if not isinstance(term, ModelTerm):
                raise ConfigError(
                    f"extra term {shorten(term)} is not a ModelTerm (needs name, size, evaluate)"
                )
        body = ArmModel.from_urdf(
            description.urdf_path,
            description.end_effector,
            joint_names=description.joint_names,
            length_scale=float(opts["length_scale"]),
            mass_scale=float(opts["mass_scale"]),
            payload_kg=float(opts["payload_kg"]),
            link_length_scales=opts["link_length_scales"],
            payload_com_m=opts["payload_com_m"],
        )
        n = description.n_joints
        p = opts["order"]
        N = (p + 1) * n
        dt = description.control_dt
        camera = description.camera
        control = description.control

        sq = max(description.encoder_angle_noise_rad, 1e-6)
        sv = max(description.encoder_velocity_noise_rad_s, 1e-6)
        precision = {
            "joint_angle": np.full(n, opts["joint_angle_precision"] or 1.0 / sq**2),
            "joint_velocity": np.full(n, opts["joint_velocity_precision"] or 1.0 / sv**2),
            "camera": np.full(
                2,
                opts["camera_precision"]
                or (1.0 / max(camera.pixel_noise_px, 1e-3) ** 2 if camera else 0.0),
            ),
        }
        # In goal="prior" mode a tight efference copy would leave the goal only the position
        # belief to pull on (measured: 27x the EKF's error), so the copy is looser there.
        motor_sd = MOTOR_TRACKING_SD_RAD_S if opts["goal"] == "reference" else 0.5 * sv
        motor_precision = float(opts["motor_precision"] or 1.0 / motor_sd**2)
        goal_precision = float(opts["goal_precision"] or 1.0 / sv**2)

        phi_t = generalized_motion(p, dt, opts["integration"])
        w_t = jerk_covariance(p, dt, float(opts["jerk_intensity"]))
        if control == "velocity":
            w_t += velocity_step_covariance(p, dt, float(opts["velocity_step_sd_rad_s"]))
        w_t += np.diag(np.full(p + 1, 1e-12))
        eye = np.eye(n)

        kv = float(opts["velocity_gain_1_s"])
        lag = opts["velocity_reading_lag_s"]
        lag = (0.5 * dt if control == "torque" else 0.0) if lag is None else float(lag)
        if p < 2:
            lag = 0.0  # no acceleration in the belief to lag with
        g_velocity = _selection(n, N, 1)
        if lag:
            g_velocity = g_velocity - lag * _selection(n, N, 2)
        channels: list[Any] = [
            EncoderChannel("joint_angle", "joint_angle_rad", 0, n, _selection(n, N, 0)),
            EncoderChannel("joint_velocity", "joint_velocity_rad_s", 1, n, g_velocity, lag),
        ]
        if camera is not None:
            channels.append(CameraChannel(camera, N))
        pm = 0.0
        if control == "velocity":
            pm = motor_precision
            channels.append(EfferenceCopy(n, _selection(n, N, 1), np.full(n, pm)))
        if opts["goal"] == "reference":
            goal_mode, pg = 0, 0.0
        elif control == "velocity":
            goal_mode, pg = 1, goal_precision
            channels.append(AttractorPrior(n, N, None, np.full(n, pg)))
        else:
            goal_mode, pg = 2, goal_precision / kv**2
            channels.append(AttractorPrior(n, N, kv, np.full(n, pg)))

        fault_alpha = 1.0 - np.exp(-dt / float(opts["fault_window_s"]))
        w_eff = max(1.0, 2.0 / fault_alpha - 1.0)  # effective samples of the EWMA
        fault_threshold = {
            # Innovation test (Bar-Shalom, Li & Kirubarajan 2001, sec. 5.4.2): the windowed
            # mean of normalized innovations is ~ chi2(w m) / w under no fault.
            name: chdtri(w_eff * dof, float(opts["fault_false_alarm"])) / w_eff
            for name, dof in (("joint_angle", 1), ("joint_velocity", 1), ("camera", 2))
        }
        guarded: tuple[str, ...] = ()
        if opts["robust_precision"] and not opts["learn_precision"]:
            given = {
                "joint_angle": opts["joint_angle_precision"],
                "joint_velocity": opts["joint_velocity_precision"],
                "camera": opts["camera_precision"] if camera is not None else 0.0,
            }
            guarded = tuple(k for k in MONITORED_CHANNELS if given[k] is None)
        constants = np.array(
            [
                pm,
                pg,
                kv,
                float(opts["divergence_limit"]),
                opts["attractor_gain_1_s"],
                opts["max_tip_speed_m_s"],
                opts["damping_m"] ** 2,
                opts["posture_gain_1_s"],
                1.0 if opts["joint_limit_weighting"] else 0.0,
                lag,
            ],
            dtype=float,
        )
        if camera is not None:
            pose = np.ascontiguousarray(camera.base_from_camera, dtype=float)
            intrinsics = np.array([camera.fx_px, camera.fy_px, camera.cx_px, camera.cy_px])
        else:
            pose, intrinsics = np.eye(4), np.ones(4)
        limits = np.ascontiguousarray(
            np.stack(
                [
                    np.asarray(description.lower_rad, dtype=float),
                    np.asarray(description.upper_rad, dtype=float),
                ]
            )
        )
        bias_var = float(opts["motor_bias_sd_rad_s"]) ** 2 if pm > 0 else 0.0
        bias_walk = float(opts["motor_bias_travel_sd_rad_s"]) ** 2 if bias_var > 0 else 0.0
        return cls(
            description=description,
            options=opts,
            body=body,
            n=n,
            order=p,
            size=N,
            dt=dt,
            control=control,
            camera=camera,
            transition=phi_t,
            transition_full=np.kron(phi_t, eye),
            motion_noise=np.kron(w_t, eye),
            precision=precision,
            motor_precision=motor_precision,
            goal_precision=goal_precision,
            channels=tuple(channels),
            extra_terms=tuple(extra_terms),
            goal_mode=goal_mode,
            precision_changing=bool(opts["learn_precision"] or opts["fault_detection"]),
            motor_learned=bool(pm > 0 and opts["learn_motor_precision"]),
            fault_threshold=fault_threshold,
            fault_alpha=float(fault_alpha),
            kernel_constants=constants,
            camera_pose=pose,
            camera_intrinsics=intrinsics,
            limits=limits,
            guarded=guarded,
            motor_bias_variance=bias_var,
            motor_bias_walk=bias_walk,
            velocity_reading_lag_s=lag,
        )

    def motion_noise_at(
        self,
        change: np.ndarray,
        tracking: np.ndarray | None = None,
        out: np.ndarray | None = None,
    ) -> np.ndarray:
        """``W`` of one step: the generalized motion's noise plus a velocity step per joint
        (velocity control; :func:`velocity_step_covariance`) of variance
        ``(velocity_step_gain change)^2 + tracking``: ``change`` (n,) the last change of
        command, ``tracking`` (n,) the motors' learned tracking variance beyond the nominal
        (:meth:`blanket.agent.belief.ChannelMonitor.track_motor`).

        A velocity motor moves the joint to a new command within the period that follows it,
        so the change of command is the size of the velocity step the white-jerk motion does
        not foresee (common practice, no source); a steady command adds nothing, and the
        belief then averages its encoders over many periods. The step's variance is
        ``velocity_step_sd_rad_s^2 + (velocity_step_gain change)^2``: the first part, in
        :attr:`motion_noise`, stands for what the motors do that no command asked for (a slow
        sag under a load they barely hold, measured on the bench's payload condition).
        """
        if self.control != "velocity":
            return self.motion_noise  # read-only use: no step under torque control
        if out is None:
            out = np.empty_like(self.motion_noise)
        gain = float(self.options["velocity_step_gain"])
        var = (gain * np.asarray(change, dtype=float)) ** 2
        if tracking is not None:
            var += tracking
        # kron(b b', I_n) is nonzero only on the (q, q') blocks' diagonals: strided views
        n, dt, N = self.n, self.dt, self.size
        out[:] = self.motion_noise
        flat = out.reshape(-1)
        step = N + 1
        flat[0 : n * step : step] += dt * dt * var  # (q, q)
        flat[n : n + n * step : step] += dt * var  # (q, q')
        flat[n * N : n * N + n * step : step] += dt * var  # (q', q)
        flat[n * step : n * step + n * step : step] += var  # (q', q')
        return out

    @property
    def terms(self) -> tuple[Any, ...]:
        """Every term, built-in channels first, then the user's."""
        return self.channels + self.extra_terms

    @property
    def channel_names(self) -> tuple[str, ...]:
        """Names of the built-in channels, in the order of the logs' prediction errors."""
        names = ["joint_angle", "joint_velocity"]
        if self.control == "velocity":
            names.append("motor")
        if self.goal_mode:
            names.append("goal")
        if self.camera is not None:
            names.append("camera")
        return tuple(names)
