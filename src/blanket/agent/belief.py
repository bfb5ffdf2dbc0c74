"""What changes during an episode: the belief, and small objects for the rest.

* :class:`Belief` -- the generalized-coordinate mean ``(order + 1, n)`` and its covariance;
* :class:`CommandState` -- the last command (the efference copy), the home posture, the
  attractor's velocity and the disturbance estimate of torque control;
* :class:`TargetTrack` -- the believed target velocity from recent target positions;
* :class:`ChannelMonitor` -- learned precisions and fault statistics of the sensory channels;
* :class:`MotorBias` -- the velocity motors' tracking bias and its coupling to the belief.

:class:`EpisodeState` bundles the last four. None of them is part of the
:class:`~blanket.agent.generative_model.GenerativeModel`, which a step never changes.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np
from scipy.special import chdtri

from blanket.agent import _kernel
from blanket.agent.generative_model import MONITORED_CHANNELS, GenerativeModel

__all__ = [
    "Belief",
    "CommandState",
    "TargetTrack",
    "ChannelMonitor",
    "Innovations",
    "MotorBias",
    "EpisodeState",
]

#: Samples a channel averages before its learned precision is applied.
_LEARNING_BURN_IN = 20
#: How many times its nominal variance a guarded channel's estimate must reach before the
#: guard lowers its precision (``robust_precision``; a noise sd twice the nominal); it
#: returns to the nominal below the square root of that (hysteresis). With 2 the velocity
#: encoders of the planar arm left the nominal in a nominal episode (motors that lag a
#: change of command look like noise), measured.
_GUARD_DEPART = 4.0
#: The same for the camera, whose pixel errors no motor lag confounds: 2 (a noise sd 41 %
#: above the nominal; with 4 a body model 3 % too long left the camera at its nominal
#: precision, its error variance 2.8x the nominal, and the iiwa's belief at NEES 4.4).
_GUARD_DEPART_CAMERA = 2.0
#: Frames the camera's guard averages before it may depart (20 pixel errors: the mean's
#: relative sd is about 0.3, so 2x is about 3 sd); with 20 frames (0.67 s at 30 Hz) two
#: delayed frames left the iiwa's belief at NEES 4 over its first reach, measured.
_GUARD_CAMERA_BURN_IN = 10
#: The camera's guard departs at the smaller of ``_GUARD_DEPART_CAMERA`` and the upper
#: quantile of this probability of the mean of its pixel errors' squares under the nominal
#: noise (an innovation test, Bar-Shalom, Li & Kirubarajan 2001, sec. 5.4.2): with more
#: frames a smaller excess is strong evidence (a body model 3 % too long left one iiwa
#: episode's camera errors 1.4x the nominal and its belief at NEES 3.5, measured).
_GUARD_FALSE_ALARM = 1e-3
#: Growth of a learned encoder variance that rescales the belief's covariance (1: any
#: growth; 1.05 and 1.25 left the 3-DoF arm's worst episode at NEES 3.0 and 3.1, measured).
_RESCALE_STEP = 1.0


@dataclass
class Belief:
    """Generalized-coordinate mean (flattened, order-major) and its covariance.

    Attributes
    ----------
    mean : numpy.ndarray
        ``[q, q', ..., q^(p)]`` flattened, shape ``((p + 1) n,)``.
    covariance : numpy.ndarray
        Laplace covariance ``inv(H)`` of the last step, shape ``(N, N)``.
    shape : tuple of int
        ``(p + 1, n)``.
    sd : numpy.ndarray or None
        ``sqrt(diag(covariance))`` when already known (the compiled step fills it).
    """

    mean: np.ndarray
    covariance: np.ndarray
    shape: tuple[int, int]
    sd: np.ndarray | None = None

    @property
    def generalized(self) -> np.ndarray:
        """The mean as ``(order + 1, n)`` (a view)."""
        return self.mean.reshape(self.shape)

    def standard_deviation(self) -> np.ndarray:
        """``sqrt(diag(covariance))``, shape ``(N,)``."""
        if self.sd is None:
            self.sd = np.sqrt(np.maximum(self.covariance.diagonal(), 0.0))
        return self.sd

    @classmethod
    def from_observation(
        cls, model: GenerativeModel, obs: Mapping[str, Any], precision: Mapping[str, np.ndarray]
    ) -> Belief:
        """The first belief: the encoders' readings, their noise as variance; higher orders
        zero with variance ``10^(2k)`` (uninformative)."""
        n, p = model.n, model.order
        z = np.zeros((p + 1, n))
        z[0] = np.asarray(obs["joint_angle_rad"], dtype=float)
        z[1] = np.asarray(obs["joint_velocity_rad_s"], dtype=float)
        var = np.empty((p + 1, n))
        var[0] = 1.0 / precision["joint_angle"]
        var[1] = 1.0 / precision["joint_velocity"]
        for k in range(2, p + 1):
            var[k] = 10.0 ** (2 * k)
        return cls(z.reshape(-1), np.diag(var.reshape(-1)), (p + 1, n))


@dataclass
class CommandState:
    """The action side of an episode.

    Attributes
    ----------
    command : numpy.ndarray
        The last command sent (the efference copy of the next step).
    home : numpy.ndarray
        The posture at the first observation (the attractor's null-space goal).
    last_finite_q : numpy.ndarray
        The last believed posture that was finite (a torque safe stop holds it).
    attractor_velocity : numpy.ndarray
        ``f(q)`` of the last step.
    disturbance : numpy.ndarray
        Believed unmodelled joint torque (torque control).
    last_velocity_belief : numpy.ndarray or None
        The believed velocity of the last step (for the disturbance observer).
    change : numpy.ndarray
        The last command less the one before it (the velocity step the motors make next).
    """

    command: np.ndarray
    home: np.ndarray
    last_finite_q: np.ndarray
    attractor_velocity: np.ndarray
    disturbance: np.ndarray
    last_velocity_belief: np.ndarray | None = None
    change: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def sense_applied(self, obs: Mapping[str, Any]) -> None:
        """Take the command that reached the motors, when the observation reports it.

        A drive reports the setpoint it applied (the safety wrapper adds it as
        ``applied_command``, :mod:`blanket.wrappers.safety_limits`); a command that was
        clamped or replaced by a protective stop is then not mistaken for the one that moved
        the arm: the efference copy, the velocity step of the prior (:attr:`change`), the
        disturbance observer and the payload's torque residual all use what was applied.
        Without the key the sent command stands for it.
        """
        applied = obs.get("applied_command")
        if applied is None:
            return
        applied = np.asarray(applied, dtype=float)
        if applied.shape != self.command.shape:
            return
        # change = sent - applied before; make it applied - applied before
        self.change += applied - self.command
        self.command = applied.copy()

    @classmethod
    def empty(cls, n: int) -> CommandState:
        z = np.zeros(n)
        return cls(z.copy(), z.copy(), z.copy(), z.copy(), z.copy(), None, z.copy())

    def start(self, model: GenerativeModel, obs: Mapping[str, Any]) -> None:
        """First observation of an episode: home posture, and the command the motors run."""
        q = np.asarray(obs["joint_angle_rad"], dtype=float)
        self.home = q.copy()
        self.last_finite_q = q.copy()
        if model.control == "velocity":
            self.command = np.asarray(obs["joint_velocity_rad_s"], dtype=float).copy()
        else:
            self.command = np.zeros(model.n)
        self.change = np.zeros(model.n)


class TargetTrack:
    """Believed target velocity: the order-1 generalized coordinate of its recent track.

    The backward difference over the last ``target_window_s`` (exact for a target moving at
    constant velocity; target positions are given, not sensed with noise); a jump of more
    than 5 cm in one step (a new target) restarts the track. A target carried on a conveyor
    is then followed without the steady lag ``speed / attractor_gain`` of a pure position
    attractor.
    """

    def __init__(self, window: int, dt: float, enabled: bool) -> None:
        self.window, self.dt, self.enabled = window, dt, enabled
        self.velocity = np.zeros(3)
        self._last: np.ndarray | None = None
        self._steps = np.zeros((window, 3))
        self._count = 0

    def update(self, position: Any) -> None:
        if not self.enabled:
            return
        x = np.asarray(position, dtype=float)
        last = self._last
        self._last = x.copy()
        if last is None:
            return
        step = x - last
        if np.abs(step).max() > 0.05:
            self._steps[:] = 0.0
            self._count = 0
            self.velocity = np.zeros(3)
            return
        w = self.window
        self._steps[self._count % w] = step
        self._count += 1
        self.velocity = self._steps.sum(axis=0) / (min(self._count, w) * self.dt)


class Innovations(NamedTuple):
    """What a step saw, for the channel tests: the prediction errors of the active terms,
    the prior covariance ``Sigma-``, the camera's Jacobian ``G`` (None without a frame) and
    the belief before the step (its prediction is what the errors were measured against)."""

    errors: Mapping[str, np.ndarray]
    cov_prior: np.ndarray
    g_cam: np.ndarray | None
    belief: Belief


class ChannelMonitor:
    """Learned precisions and fault flags of the monitored channels, for one episode.

    ``precision`` holds each channel's nominal-or-learned precision; :meth:`effective` the
    one a step uses (cut to 1e-6 where flagged faulty).
    """

    def __init__(self, model: GenerativeModel) -> None:
        self.model = model
        n = model.n
        self.precision = {k: v.copy() for k, v in model.precision.items()}
        self.fault_stat = {k: np.zeros(n if k != "camera" else 1) for k in MONITORED_CHANNELS}
        self.fault = {k: np.zeros_like(v, dtype=bool) for k, v in self.fault_stat.items()}
        enc = ("joint_angle", "joint_velocity")
        self.fault_high = {k: np.zeros_like(v, dtype=bool) for k, v in self.fault_stat.items()}
        self.fault_low = {k: np.zeros(n, dtype=bool) for k in enc}
        self.flatline_stat = {k: np.ones(n) for k in enc}
        self.last_reading: dict[str, np.ndarray] = {}
        # Reading increments of white noise are MA(1) (lag-1 correlation -1/2): the mean of
        # their squares over w samples has variance 3/w, not 2/w, so it counts as 2w/3
        # independent chi-square(1) samples (common practice, no source).
        w_eff = max(1.0, 2.0 / model.fault_alpha - 1.0) * 2.0 / 3.0
        pfa = float(model.options["fault_false_alarm"])
        self.flatline_threshold = chdtri(w_eff, 1.0 - pfa) / w_eff  # lower pfa quantile
        self.increment_threshold = chdtri(w_eff, pfa) / w_eff  # upper pfa quantile
        self.noise_variance = {k: 1.0 / v for k, v in model.precision.items() if np.all(v > 0)}
        self.noise_samples = dict.fromkeys(self.noise_variance, 0)
        self.last_angle_reading: np.ndarray | None = None
        self.last_velocity_reading: np.ndarray | None = None
        self.last_command: np.ndarray | None = None
        #: the encoders' noise variances the belief's covariance was last scaled for
        self.rescaled_for = np.stack(
            [1.0 / self.precision["joint_angle"], 1.0 / self.precision["joint_velocity"]]
        )
        self.pending_inflation: np.ndarray | None = None
        # the efference copy's precision per joint, from the tracking residual's mean square
        self.motor_precision = np.full(
            n, model.motor_precision if model.control == "velocity" else 0.0
        )
        self.motor_alpha = -float(np.expm1(-model.dt / float(model.options["motor_window_s"])))
        self.motor_square = np.full(
            n,
            1.0 / self.precision["joint_velocity"].mean()
            + 1.0 / max(model.motor_precision, 1e-300),
        )
        #: the motors' tracking variance beyond the nominal (0 while they track)
        self.tracking_variance = np.zeros(n)
        self.motor_ceiling = (2.0 * np.asarray(model.description.velocity_limit_rad_s)) ** 2
        # the noise guard (robust_precision): readings' history and variance estimates
        nominal = np.stack(
            [1.0 / model.precision["joint_angle"], 1.0 / model.precision["joint_velocity"]]
        )
        self.guard_history = np.full((4, n), np.nan)
        self.guard_square = nominal.copy()
        self.guard_nominal = nominal
        self.guard_variance = nominal.copy()  # the encoders' variances in force
        self.guard_samples = 0
        self.guard_rate = float(model.options["precision_learning_rate"])
        self.guard_alpha = -float(np.expm1(-self.guard_rate * model.dt))
        self.guard_no_change = np.full(n, np.nan)
        cam0 = model.precision["camera"]
        self.guard_camera = np.array(
            [1.0 / cam0[0] if cam0[0] > 0 else np.nan, 0.0, 1.0 / cam0[0] if cam0[0] > 0 else 0.0]
        )  # estimate, frames, variance in force

    def track_motor(self, obs: Mapping[str, Any], command: np.ndarray) -> None:
        """Learn how closely the velocity motors track the last command (velocity control).

        The command ``a`` sent a step ago and the velocity encoder's reading ``y`` now give
        the tracking residual ``r = a - y = (a - q') - n``, whose variance is the motors'
        tracking variance ``R_m`` plus the encoder's ``R_v`` (independent). Covariance
        matching (Mehra 1970, IEEE Trans Autom Control 15(2), sec. IV, as
        :meth:`learn_precisions`) gives ``R_m = E[r^2] - R_v``; ``E[r^2]`` is an exponential
        average over ``motor_window_s`` that takes this step's residual before the step uses
        it, so a command the motors cannot follow -- a payload that holds them back, a
        command the safety wrapper or the env clamped -- loosens the efference copy in the
        same step. The copy's precision is ``1 / max(R_m, 1 / motor_precision)`` (the nominal
        precision is the most it is trusted), and the excess ``R_m - 1 / motor_precision``
        (:attr:`tracking_variance`) joins the velocity step of the prior
        (:meth:`~blanket.agent.generative_model.GenerativeModel.motion_noise_at`): motors
        that do not follow their commands change the velocity in ways no command foresees,
        and a lag that persists then moves the position belief less than its covariance
        admits. The average pauses while the velocity encoder is flagged faulty.
        """
        model = self.model
        if not model.motor_learned:
            return
        if model.options["fault_detection"] and self.fault["joint_velocity"].any():
            return
        r = command - np.asarray(obs["joint_velocity_rad_s"], dtype=float)
        self.motor_square += self.motor_alpha * (r * r - self.motor_square)
        floor = 1.0 / model.motor_precision
        tracking = np.maximum(self.motor_square - 1.0 / self.precision["joint_velocity"], floor)
        # no motor misses its command by more than twice its speed limit
        np.minimum(tracking, self.motor_ceiling, out=tracking)
        np.divide(1.0, tracking, out=self.motor_precision)
        np.subtract(tracking, floor, out=self.tracking_variance)

    def guard(
        self,
        obs: Mapping[str, Any],
        command_change: np.ndarray | None,
        errors: Mapping[str, np.ndarray],
        g_cam: np.ndarray | None,
        belief: Belief,
    ) -> bool:
        """The noise guard (``robust_precision``): lower a channel's precision when its
        readings show more noise than the precision says; never raise it.

        Encoders: :func:`blanket.agent._kernel.encoder_noise_guard` (differences of readings
        from which the motion cancels; covariance matching, Mehra 1970). Camera, on fresh
        frames: the pixel error less the part the encoder angles' error predicts through the
        camera Jacobian ``G``, ``R_px = E[nu_px (nu_px - G nu_q)]`` (as
        :meth:`learn_precisions`). An encoder's variance leaves the nominal one only above
        ``_GUARD_DEPART`` times it after ``_LEARNING_BURN_IN`` samples, and comes back below
        the square root of that; the camera's departs at a chi-square test of its mean
        (``_GUARD_FALSE_ALARM``, at most ``_GUARD_DEPART_CAMERA``) after
        ``_GUARD_CAMERA_BURN_IN`` frames, and comes back below the nominal. Only channels
        whose precision the user did not set are guarded
        (:attr:`~blanket.agent.generative_model.GenerativeModel.guarded`): a tuned precision
        is the user's choice. When an encoder's variance grows, the joint's covariance grows
        with it (:meth:`rescale`). Returns whether a precision changed.
        """
        model = self.model
        guarded = model.guarded
        self.guard_samples += 1
        k = self.guard_samples
        weight = max(1.0 / k, self.guard_alpha)
        depart = _GUARD_DEPART if k >= _LEARNING_BURN_IN else np.inf
        changed = False
        if "joint_angle" in guarded or "joint_velocity" in guarded:
            command = self.guard_no_change if command_change is None else command_change
            if _kernel.encoder_noise_guard(
                np.asarray(obs["joint_angle_rad"], dtype=float),
                np.asarray(obs["joint_velocity_rad_s"], dtype=float),
                command,
                self.guard_history,
                self.guard_square,
                self.guard_nominal,
                self.guard_variance,
                weight,
                depart,
                np.sqrt(_GUARD_DEPART),
            ):
                for row, name in enumerate(("joint_angle", "joint_velocity")):
                    if name in guarded:
                        self.precision[name] = 1.0 / self.guard_variance[row]
                self.rescale(belief)
                changed = True
        if "camera" in guarded and g_cam is not None and "camera" in errors:
            e = errors["camera"]
            cam = self.guard_camera
            cam[1] += 1.0
            r0 = 1.0 / model.precision["camera"][0]
            sample = float(np.mean(e * (e - g_cam @ errors["joint_angle"])))
            sample = min(sample, 20.0 * max(cam[0], r0))
            step_s = max(model.dt, 1.0 / model.camera.rate_hz)
            w = max(1.0 / cam[1], -float(np.expm1(-self.guard_rate * step_s)))
            cam[0] += w * (sample - cam[0])
            # the frames' effective count in the average (an EWMA of weight w holds the
            # variance of (2 - w) / w samples) and the upper chi-square quantile of its
            # mean under the nominal noise, two pixel components per frame
            w_min = -float(np.expm1(-self.guard_rate * step_s))
            frames = min(cam[1], (2.0 - w_min) / w_min)
            depart_c = np.inf
            if cam[1] >= _GUARD_CAMERA_BURN_IN:
                dof = 2.0 * frames
                depart_c = min(_GUARD_DEPART_CAMERA, chdtri(dof, _GUARD_FALSE_ALARM) / dof)
            if cam[2] > r0:
                target = cam[0] if cam[0] > r0 else r0
            else:
                target = cam[0] if cam[0] > depart_c * r0 else r0
            if abs(target - cam[2]) > 0.1 * cam[2]:
                cam[2] = target
                self.precision["camera"] = np.full(2, 1.0 / target)
                changed = True
        return changed

    def effective(self, name: str) -> np.ndarray:
        """A channel's precision, down-weighted to 1e-6 of itself where it is flagged."""
        P = self.precision[name]
        if self.model.options["fault_detection"]:
            flags = self.fault[name]
            if flags.any():
                return np.where(flags if name != "camera" else flags.repeat(2), P * 1e-6, P)
        return P

    def inflate(self, belief: Belief) -> None:
        """Covariance inflation when an encoder angle has just been flagged.

        The belief followed the bad reading for the detection delay (about 3 windows) at the
        believed speed, so its variance grows by that drift squared and the other channels
        can correct it (common practice, no source). Only with ``goal="reference"``: under a
        goal prior the freed variance lets the goal, not the camera, take the joint.
        """
        j = self.pending_inflation
        if j is None or not self.model.options["fault_detection"]:
            return
        self.pending_inflation = None
        n = self.model.n
        v = belief.mean[n : 2 * n]
        drift = np.abs(v[j]) * 3.0 * float(self.model.options["fault_window_s"])
        drift = drift + 1.0 / np.sqrt(self.precision["joint_angle"][j])
        belief.covariance[j, j] += drift * drift
        belief.sd = None

    def innovation_variance(
        self, name: str, cov_prior: np.ndarray, g_cam: np.ndarray | None
    ) -> np.ndarray:
        """Diagonal of the predicted innovation covariance ``G Sigma- G'`` (without noise)."""
        n = self.model.n
        if name == "camera":
            return np.einsum("ij,jk,ik->i", g_cam, cov_prior[:n, :n], g_cam)
        sel = slice(0, n) if name == "joint_angle" else slice(n, 2 * n)
        return np.diagonal(cov_prior)[sel]

    def update(self, seen: Innovations, new: Belief | None = None) -> None:
        """After a step: test for faults and learn precisions, as the options ask; with
        ``new`` (the belief the step made) rescale its covariance where an encoder was found
        noisier than it was weighted (:meth:`rescale`)."""
        if self.model.options["fault_detection"]:
            self.detect_faults(seen)
        if self.model.options["learn_precision"]:
            self.learn_precisions(seen)
            if new is not None:
                self.rescale(new)

    def rescale(self, belief: Belief) -> None:
        """Grow a joint's covariance by the factor its encoders' learned noise variance grew.

        A belief built on readings weighted with a precision ``c`` times too high holds a
        covariance up to ``c`` times too small in the directions those readings inform (a
        filter dominated by one sensor has a covariance proportional to its noise variance);
        so when an encoder's learned variance has grown by more than ``_RESCALE_STEP`` since
        the belief was last scaled, the joint's block (every order) is scaled by that growth,
        and the belief stays as uncertain as the readings it rests on (covariance rescaling
        of adaptive filters, common practice, no source). A learned variance that shrinks
        leaves the covariance alone (the next readings shrink it) and becomes the reference.
        """
        ref = self.rescaled_for
        growth = np.ones(self.model.n)
        for k, name in enumerate(("joint_angle", "joint_velocity")):
            variance = 1.0 / self.precision[name]
            np.maximum(growth, variance / ref[k], out=growth)
            np.minimum(ref[k], variance, out=ref[k])
        grow = growth > _RESCALE_STEP
        if not grow.any():
            return
        for k, name in enumerate(("joint_angle", "joint_velocity")):
            ref[k][grow] = np.maximum(ref[k][grow], 1.0 / self.precision[name][grow])
        scale = np.sqrt(np.tile(np.where(grow, growth, 1.0), self.model.order + 1))
        cov = belief.covariance
        cov *= scale[:, None]
        cov *= scale[None, :]
        if belief.sd is not None:
            np.sqrt(np.maximum(cov.diagonal(), 0.0), out=belief.sd)

    def detect_faults(self, seen: Innovations) -> None:
        """Two-sided tests per channel (per joint for the encoders); flags in ``fault``.

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
        A flagged channel's precision is cut to 1e-6 of its value (:meth:`effective`) and
        returns when the tests pass again.
        """
        errors, cov_prior, g_cam, belief = seen
        model = self.model
        alpha = model.fault_alpha
        motor = errors.get("motor")
        predicted = model.transition[:2] @ belief.generalized
        if model.velocity_reading_lag_s:
            # the velocity reading's prediction (EncoderChannel's lag)
            predicted[1] -= model.velocity_reading_lag_s * (
                model.transition[2] @ belief.generalized
            )
        command = None if motor is None else motor + predicted[1]
        for name in MONITORED_CHANNELS:
            if name not in errors:
                continue
            e = errors[name]
            P = self.precision[name]
            thr = model.fault_threshold[name]
            low = None
            if name == "camera":
                S = self.innovation_variance(name, cov_prior, g_cam) + 1.0 / P
                stat = np.array([np.minimum(e * e / S, 16.0).mean()])
            else:
                # The raw reading is the error plus the prediction it was measured against.
                reading = e + predicted[0 if name == "joint_angle" else 1]
                last = self.last_reading.get(name)
                self.last_reading[name] = reading
                if last is None:
                    continue
                d = reading - last
                if command is None:
                    S = self.innovation_variance(name, cov_prior, g_cam) + 1.0 / P
                    stat = e * e / S
                elif name == "joint_angle":
                    r = d - model.dt * command
                    stat = 0.5 * r * r * P
                    thr = self.increment_threshold
                else:
                    r = reading - command
                    stat = r * r * P
                stat = np.minimum(stat, 16.0)
                f = self.flatline_stat[name]
                f += alpha * (0.5 * d * d * P - f)
                lo = self.flatline_threshold
                low = self.fault_low[name]
                low[:] = np.where(low, f < 2.0 * lo, f < lo)
            m = self.fault_stat[name]
            m += alpha * (stat - m)
            high = self.fault_high[name]
            high[:] = np.where(high, m > 0.5 * thr, m > thr)
            if name == "camera":
                # The camera is tested against the belief, which leans on the encoder angles:
                # while one of those is flagged, the camera is the arbiter and stays in use.
                high &= not self.fault["joint_angle"].any()
            new = high.copy() if low is None else high | low
            rising = new & ~self.fault[name]
            if name == "joint_angle" and rising.any() and model.options["goal"] == "reference":
                self.pending_inflation = np.flatnonzero(rising)
            self.fault[name] = new

    def learn_precisions(self, seen: Innovations) -> None:
        """Covariance matching of each channel's noise variance on its innovations.

        Under a consistent filter the innovation ``nu = y - g(mu-)`` has variance
        ``S = G Sigma- G' + R``, so
        ``R = E[nu^2] - G Sigma- G'`` per component (diagonal ``R``): the innovation-based
        adaptive estimate of Mehra 1970 (IEEE Trans Autom Control 15(2), sec. IV) in the
        sample form of Myers & Tapley 1976 (IEEE Trans Autom Control 21(4), eq. 29). Under
        velocity control two channels use the efference copy ``a`` (the motors track it far
        closer than the encoder noise) instead of ``Sigma-``, which a goal prior or an
        unmodelled change of command makes wrong. Encoder angles: the reading's increment
        less the commanded motion, ``d = y_k - y_(k-1) - dt a``, is ``n_k - n_(k-1)``, so
        ``R_q = E[d^2] / 2`` (the difference variance estimator, von Neumann et al. 1941, Ann
        Math Stat 12(2), from memory). Encoder velocities likewise: the reading's increment
        less the commanded change of velocity (velocity control; a lag of the motors that
        persists cancels in it) or less ``dt`` times the believed acceleration (torque
        control), ``R_v = E[d^2] / 2`` (the velocity prediction misses every change of
        command, so ``Sigma-`` would understate its error). The
        camera's pixel error is likewise predicted by the encoder angles' error through the
        camera Jacobian ``G``: ``R_px = E[nu_px (nu_px - G nu_q)]`` (while no encoder angle is
        flagged), which keeps the camera from absorbing an error of ``Sigma-``. Each estimate
        is averaged with weights ``max(1 / k, 1 - exp(-r dt_m))`` (``k`` the channel's sample
        count, ``r = precision_learning_rate`` per second, ``dt_m`` the channel's sample
        interval; ``r = 0`` keeps the full average), and the precision is ``P = 1 / R``,
        bounded to ``[e^-7, e^7]`` times the starting precision, applied from the
        ``_LEARNING_BURN_IN``-th sample on; each sample is clipped to ``[-3, 20]`` predicted
        innovation variances (an outlier guard, common practice, no source). Samples a
        channel takes while flagged by :meth:`detect_faults` are skipped.
        """
        errors, cov_prior, g_cam, belief = seen
        model = self.model
        rate = float(model.options["precision_learning_rate"])
        for name in MONITORED_CHANNELS:
            if name not in errors or name not in self.noise_variance:
                continue
            high = self.fault_high[name]
            if name != "camera":
                high = high | self.fault_low[name]
            if high.all():
                continue
            e = errors[name]
            s = self.innovation_variance(name, cov_prior, g_cam)
            if name == "joint_angle" and "motor" in errors:
                # The reading's increment less the commanded motion is n_k - n_(k-1).
                v_prior = model.transition[1] @ belief.generalized
                q_prior = model.transition[0] @ belief.generalized
                reading = e + q_prior
                last = self.last_angle_reading
                self.last_angle_reading = reading
                if last is None:
                    continue
                d = reading - last - model.dt * (errors["motor"] + v_prior)
                sample = 0.5 * d * d
                s = 0.0
            elif name == "joint_velocity" and ("motor" in errors or model.order >= 2):
                # The reading's increment less the commanded change of velocity (velocity
                # control) or the believed acceleration's (torque control) is n_k - n_(k-1):
                # a lag of the motors that persists cancels in it.
                g = belief.generalized
                reading = e + model.transition[1] @ g
                if model.velocity_reading_lag_s:
                    reading -= model.velocity_reading_lag_s * (model.transition[2] @ g)
                if "motor" in errors:
                    moved = errors["motor"] + model.transition[1] @ g  # the command a
                    expected = None if self.last_command is None else moved - self.last_command
                    self.last_command = moved
                else:
                    expected = model.dt * g[2]
                last = self.last_velocity_reading
                self.last_velocity_reading = reading
                if last is None or expected is None:
                    continue
                d = reading - last - expected
                sample = 0.5 * d * d
                s = 0.0
            elif name == "camera" and not self.fault["joint_angle"].any():
                # ... and the encoder angles see the camera's, through its Jacobian.
                sample = e * (e - g_cam @ errors["joint_angle"])
            else:
                sample = e * e - s
            # Robustness: one sample moves the estimate by at most 20 (up) or 3 (down)
            # predicted innovation variances (a chi-square(1) draw exceeds 20 with p < 1e-5).
            S = s + 1.0 / self.precision[name]
            sample = np.clip(sample, -3.0 * S, 20.0 * S)
            k = self.noise_samples[name] + 1
            self.noise_samples[name] = k
            step_s = model.dt
            if name == "camera" and model.camera is not None:
                step_s = max(model.dt, 1.0 / model.camera.rate_hz)
            a = max(1.0 / k, -np.expm1(-rate * step_s))
            healthy = ~(high.repeat(2) if name == "camera" else high)
            R = self.noise_variance[name]
            R += (a * healthy) * (sample - R)
            if k < _LEARNING_BURN_IN:
                continue
            p0 = model.precision[name]
            self.precision[name] = np.clip(
                1.0 / np.maximum(R, 1e-300), p0 * np.exp(-7.0), p0 * np.exp(7.0)
            )


class MotorBias:
    """The velocity motors' tracking bias ``b`` (efference copy ``a = q' + b + noise``).

    Kept beside the belief in two-stage form (Friedland 1969, IEEE Trans Autom Control 14(4);
    :func:`blanket.agent._kernel.motor_bias_predict` and
    :func:`~blanket.agent._kernel.motor_bias_update`): ``b ~ N(mean, covariance)`` and the
    belief given ``b`` moves by ``sensitivity (b - mean)``; the belief's covariance is the
    marginal one, so its reported uncertainty includes what the bias leaves unknown. A
    random walk, prior ``N(0, motor_bias_sd_rad_s^2 I)`` per episode, of variance per step
    ``motor_bias_travel_sd_rad_s^2 ||q'|| dt + R_x dt / motor_window_s``. The first part
    makes the bias move with the posture (a load's torque on a joint is a function of the
    posture), not with time: at a steady hold the bias settles and the belief with it. With
    a walk in time instead (5e-3 rad/s per root second) the iiwa's median final error at
    the hold was 0.07 cm, with this 0.06, without any bias state 0.03 (10 nominal episodes,
    measured). ``R_x`` is the motors' learned
    tracking variance beyond the nominal (:attr:`ChannelMonitor.tracking_variance`): a
    tracking error of variance ``R_x`` over the window is taken as a bias that moves by as
    much per window (common practice, no source), where ``R_x`` exceeds the velocity
    encoder's noise variance ``R_v``. Below that ``R_x`` is mostly the scatter of its own
    estimate (a window of ``w`` ~ 24 residuals of variance ``R_v`` scatters their mean
    square by ``R_v sqrt(2 / w)`` ~ ``0.3 R_v``), and taking it left the bias a random
    walk of ~5e-3 rad/s per step at a steady hold and the iiwa's median final error at
    0.07 cm instead of 0.03 (measured). Without that part a command the motors
    could not follow for a while (a clamp, a saturated drive) left the bias at a value it
    then kept, with a small variance, once the motors tracked again (measured: the planar
    arm with commands clipped to 0.15 rad/s, NEES 3.6).

    A motor that lags its command steadily (a payload it barely holds) would otherwise move
    the believed angle away from the truth at the lag's rate, with a covariance that treats
    the lag as white noise; the encoders make the bias observable.
    """

    def __init__(self, model: GenerativeModel) -> None:
        n, N = model.n, model.size
        self.walk = np.zeros(n)
        self._travel_walk = model.motor_bias_walk * model.dt
        self._window_rate = model.dt / float(model.options["motor_window_s"])
        self.mean = np.zeros(n)
        self.covariance = np.eye(n) * model.motor_bias_variance
        self.sensitivity = np.zeros((N, n))
        self.prior_sensitivity = np.zeros((N, n))
        self.prior_covariance = np.zeros((n, n))
        self._a = np.zeros((N, n))
        self._u = np.zeros((N, n))
        self._scratch = np.zeros((3, n, n))
        self._sd = np.zeros(N)

    def predict(
        self,
        model: GenerativeModel,
        motion_noise: np.ndarray,
        tracking: np.ndarray,
        velocity_precision: np.ndarray,
        velocity: np.ndarray,
    ) -> None:
        """Prediction over one step; ``motion_noise`` (the ``W`` of this step) becomes the
        one that turns the belief's marginal covariance into the conditional prior;
        ``tracking`` (n,) the motors' tracking variance beyond the nominal, taken where it
        exceeds the velocity encoder's noise variance ``1 / velocity_precision`` (n,);
        ``velocity`` (n,) the believed joint velocity (the distance the joints travel this
        step is ``||velocity|| dt``)."""
        if not _kernel.motor_bias_predict(
            model.transition,
            self.sensitivity,
            self.covariance,
            tracking,
            velocity_precision,
            velocity,
            self._travel_walk,
            self._window_rate,
            self.walk,
            motion_noise,
            self.prior_sensitivity,
            self.prior_covariance,
            self._a,
            self._scratch,
        ):
            raise np.linalg.LinAlgError("motor bias covariance is not positive definite")

    def update(
        self,
        prior_precision: np.ndarray,
        belief: Belief,
        prior_mean: np.ndarray,
        motor_precision: np.ndarray,
        motor_error: np.ndarray,
    ) -> None:
        """After the belief's step (efference copy less ``mean``): the bias's update, and
        the belief's mean and covariance moved to the marginal ones, in place."""
        sd = belief.sd if belief.sd is not None else self._sd
        if not _kernel.motor_bias_update(
            prior_precision,
            belief.covariance,
            prior_mean,
            belief.mean,
            sd,
            motor_precision,
            motor_error,
            self.prior_sensitivity,
            self.prior_covariance,
            self.mean,
            self.sensitivity,
            self.covariance,
            self._u,
            self._scratch,
        ):
            raise np.linalg.LinAlgError("motor bias curvature is not positive definite")
        if belief.sd is None:
            belief.sd = sd.copy()


@dataclass
class EpisodeState:
    """The per-episode state apart from the belief; a fresh one per episode."""

    command: CommandState
    target: TargetTrack
    channels: ChannelMonitor
    safe_stop_reason: str = ""
    bias: MotorBias | None = None

    @classmethod
    def start(cls, model: GenerativeModel) -> EpisodeState:
        window = max(1, int(round(model.options["target_window_s"] / model.dt)))
        return cls(
            CommandState.empty(model.n),
            TargetTrack(window, model.dt, bool(model.options["track_target_motion"])),
            ChannelMonitor(model),
            bias=MotorBias(model) if model.motor_bias_variance > 0 else None,
        )
