"""An active-inference agent for fixed-base arms: perception and action on one free energy.

:class:`ArmAgent` is a thin shell over three pieces:

* the :class:`~blanket.agent.generative_model.GenerativeModel`, built once from the env's
  :class:`~blanket.description.ArmDescription` and the :class:`AgentOptions` (the sensory
  channels, prior dynamics, goal and precisions, every one a :class:`~blanket.model.ModelTerm`);
* the :class:`~blanket.agent.belief.Belief` (generalized-coordinate mean and covariance) and
  the episode state of :mod:`blanket.agent.belief` (last command, home posture, target track,
  disturbance estimate, learned precisions, fault statistics);
* :func:`blanket.agent.step.step`, the one step (predict -> perceive -> act), run by its
  compiled backend by default (``backend="numpy"`` runs the reference form).

Generative model
----------------
The belief ``z`` holds the joint angles in generalized coordinates up to embedding order
``p`` (order-major, shape ``(p + 1, n)``). Sensations: encoder angles and velocities, the
tool tip's pixel in a fixed camera on fresh frames where it is visible, and (velocity
control) the efference copy ``q' ~ a``. Prior dynamics are generalized motion ``z' = D z``
with white jerk, and -- in ``goal="prior"`` mode -- an attractor on the velocity (velocity
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
from typing import Any

import numpy as np

from blanket.agent._policy import PredictMixin
from blanket.agent.attractor import joint_limit_weights
from blanket.agent.belief import Belief, EpisodeState
from blanket.agent.body_calibration import BodyCalibration
from blanket.agent.body_learning import BodyLearning
from blanket.agent.generative_model import AgentOptions, GenerativeModel
from blanket.agent.image_goal import ImageGoal
from blanket.agent.step import CompiledWorkspace, attractor, free_energy_at, step
from blanket.description import ArmDescription, CameraDescription
from blanket.errors import ConfigError, did_you_mean, shorten
from blanket.model import BodyState, ModelTerm

__all__ = ["ArmAgent", "AgentOptions", "joint_limit_weights", "torque_action_free_energy"]

_BACKENDS = ("compiled", "numpy")


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

    Attributes
    ----------
    model : GenerativeModel
        The generative model (fixed for the agent's life).
    episode : EpisodeState
        Command, target track and channel statistics of the current episode.
    backend : str
        ``"compiled"`` (numba, the default) or ``"numpy"`` (the reference form); both give
        the same numbers, user terms included.
    """

    def __init__(
        self,
        description: ArmDescription,
        extra_terms: Sequence[ModelTerm] = (),
        **options: Any,
    ) -> None:
        self.model = GenerativeModel.from_description(description, extra_terms, **options)
        self._backend = "compiled"
        self._workspace: CompiledWorkspace | None = CompiledWorkspace(self.model)
        #: the body parameters' belief (``learn_body``), kept across episodes
        self.body_learning: BodyLearning | None = (
            BodyLearning.start(self.model) if self.model.options["learn_body"] else None
        )
        #: calibration motions of the first episodes (``body_calibration_episodes``)
        self.body_calibration: BodyCalibration | None = (
            BodyCalibration(self.model, self.model.options["body_calibration_episodes"])
            if self.model.options["body_calibration_episodes"]
            else None
        )
        #: the goal in the image (``goal_space="image"``)
        self.image_goal: ImageGoal | None = None
        if self.model.options["goal_space"] == "image":
            if self.model.camera is None:
                raise ConfigError("agent option goal_space='image' needs an env with a camera")
            self.image_goal = ImageGoal(self.model.camera)
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

    @property
    def backend(self) -> str:
        """``"compiled"`` or ``"numpy"``: which form of the one step runs."""
        return self._backend

    @backend.setter
    def backend(self, value: str) -> None:
        if value not in _BACKENDS:
            raise ConfigError(
                f"agent backend must be one of {_BACKENDS}, got {shorten(value)}; "
                f"{did_you_mean(str(value), _BACKENDS)}"
            )
        self._backend = value
        self._workspace = CompiledWorkspace(self.model) if value == "compiled" else None

    # -- the model's parts, by their old names ---------------------------------------------
    @property
    def options(self) -> dict[str, Any]:
        return self.model.options

    @property
    def description(self) -> ArmDescription:
        return self.model.description

    @property
    def body(self) -> Any:
        return self.model.body

    @property
    def n(self) -> int:
        return self.model.n

    @property
    def order(self) -> int:
        return self.model.order

    @property
    def size(self) -> int:
        return self.model.size

    @property
    def dt(self) -> float:
        return self.model.dt

    @property
    def control(self) -> str:
        return self.model.control

    @property
    def camera(self) -> CameraDescription | None:
        return self.model.camera

    @property
    def extra_terms(self) -> list[ModelTerm]:
        return list(self.model.extra_terms)

    @property
    def motor_precision(self) -> float:
        return self.model.motor_precision

    @property
    def goal_precision(self) -> float:
        return self.model.goal_precision

    @property
    def precision(self) -> dict[str, np.ndarray]:
        """The channels' precisions in force (nominal, or learned this episode)."""
        return self.episode.channels.precision

    # -- episode state ------------------------------------------------------------------
    def reset(self) -> None:
        """Forget the episode: the next observation re-initialises the belief."""
        self.state: Belief | None = None
        self.episode = EpisodeState.start(self.model)
        self._diag: dict[str, Any] = {}
        if self.image_goal is not None:
            self.image_goal.reset()
        if self.body_calibration is not None:
            self.body_calibration.new_episode()
        if self.body_learning is not None:
            self.body_learning.new_episode()
            self.body_learning.apply(self.model.body)  # everything learned so far

    def _start(self, obs: Mapping[str, Any]) -> Belief:
        if self.state is None:
            self.state = Belief.from_observation(self.model, obs, self.episode.channels.precision)
            self.episode.command.start(self.model, obs)
        return self.state

    # -- the attractor ------------------------------------------------------------------
    def attractor(
        self, q: np.ndarray, body: BodyState, target: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Joint velocity the goal asks for, and its Jacobian with respect to ``q``
        (:func:`blanket.agent.attractor.damped_least_squares_attractor`, with this episode's
        home posture and believed target velocity)."""
        command = self.episode.command
        return attractor(self.model, q, body, target, self.episode.target.velocity, command.home)

    # -- one step -----------------------------------------------------------------------
    def act(self, obs: Mapping[str, Any]) -> np.ndarray:
        """Update the belief from ``obs`` and return the next command."""
        if self.body_calibration is not None and self.body_calibration.active:
            obs = self.body_calibration.goal_observation(obs, self.model, self.body_learning)
            if self.state is not None:  # the first step sets the home posture itself
                self.episode.command.home = self.body_calibration.home
        elif self.image_goal is not None:
            obs = self.image_goal.goal_observation(obs, self._predicted_tip())
        belief, action, diag = step(self.model, self.state, obs, self.episode, self._workspace)
        self.state = belief
        if diag["safe_stop"]:
            self._diag.update(diag)
        else:
            self._diag = diag
            if self.body_learning is not None:
                # the slow timescale: parameters learn at the belief after perception
                camera = self.episode.channels.effective("camera")
                self.body_learning.update(
                    self.model, belief.mean, obs, camera, action, belief.covariance
                )
        return action

    def _predicted_tip(self) -> np.ndarray | None:
        """The model's tip at the belief carried one step forward (``q + dt q'``)."""
        if self.state is None:
            return None
        z, n = self.state.mean, self.model.n
        return self.model.body.tip_position(z[:n] + self.model.dt * z[n : 2 * n])

    def learned_options(self) -> dict[str, Any]:
        """What ``learn_body`` learned, as ``[agent]`` options of a scenario
        (``link_length_scales``; under torque control ``payload_kg``, ``payload_com_m``);
        empty without ``learn_body``."""
        return {} if self.body_learning is None else self.body_learning.options()

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
        every term of the model (the same terms the step assembles) evaluated at ``belief``
        itself. The goal term's Jacobian neglects the derivative of the tip Jacobian
        (Gauss-Newton), so it is exact only where the task error and the posture error vanish.
        """
        self._start(obs)
        energy, grad, _ = free_energy_at(
            self.model, self.episode, obs, belief, prior_mean, prior_precision
        )
        return energy, grad

    # -- reporting ----------------------------------------------------------------------
    @property
    def free_energy(self) -> float | None:
        """Free energy of the last step (None before the first)."""
        return self._diag.get("free_energy")

    @property
    def safe_stop(self) -> bool:
        """Whether the last step ended in the agent's own safe stop."""
        return bool(self._diag.get("safe_stop", False)) or bool(self.episode.safe_stop_reason)

    def diagnostics(self, copy: bool = True) -> dict[str, Any]:
        """The ``internal.*`` log group for the last step.

        Keys: ``belief`` (order+1, n), ``belief_sd`` (order+1, n), ``free_energy``,
        ``prediction_error`` (per channel), ``precision`` (per channel), ``fault`` (per
        channel), ``safe_stop`` and ``safe_stop_reason``. With ``copy=False`` the arrays are
        views of the agent's buffers, valid until the next :meth:`act` or ``copy=False``
        call, and only numbers are given (no ``safe_stop_reason``): what a log writer that
        copies them anyway wants; precisions and faults only when they change in an episode
        (constant precisions are run metadata, see :meth:`precision_summary`).
        """
        if not copy:
            return self._diagnostics_view()
        out: dict[str, Any] = dict(self._diag)
        if "prediction_error" in out:
            out["prediction_error"] = {k: v.copy() for k, v in out["prediction_error"].items()}
        if self.state is not None:
            out["belief"] = self.state.generalized.copy()
            out["belief_sd"] = self.state.standard_deviation().reshape(self.state.shape).copy()
        channels = self.episode.channels
        out["precision"] = {k: v.copy() for k, v in channels.precision.items()}
        out["fault"] = {k: v.copy() for k, v in channels.fault.items()}
        if self.body_learning is not None:
            out["body"] = self.body_learning.summary()
        reason = self.episode.safe_stop_reason
        out.setdefault("safe_stop", bool(reason))
        out.setdefault("safe_stop_reason", reason)
        return out

    def _diagnostics_view(self) -> dict[str, Any]:
        diag = self._diag
        out: dict[str, Any] = {
            "free_energy": diag.get("free_energy", math.nan),
            "safe_stop": bool(diag.get("safe_stop")) or bool(self.episode.safe_stop_reason),
        }
        if "prediction_error" in diag:
            out["prediction_error"] = diag["prediction_error"]
        if self.state is not None:
            out["belief"] = self.state.generalized
            out["belief_sd"] = self.state.standard_deviation().reshape(self.state.shape)
        if self.model.precision_changing:
            out["precision"] = self.episode.channels.precision
            out["fault"] = self.episode.channels.fault
        if self.body_learning is not None:
            out["body"] = self.body_learning.summary()
        return out

    def precision_summary(self) -> dict[str, list[float]]:
        """The channels' precisions at the start of an episode (for run metadata)."""
        out = {k: np.asarray(v, dtype=float).tolist() for k, v in self.model.precision.items()}
        out["motor"] = [self.motor_precision]
        out["goal"] = [self.goal_precision]
        return out

    @property
    def belief(self) -> np.ndarray | None:
        """Current belief, shape (order+1, n), or None before the first observation."""
        return None if self.state is None else self.state.generalized
