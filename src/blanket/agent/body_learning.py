"""Learning the body model's parameters on a slow timescale: ``learn_body``.

The arm agent's generative model has parameters ``theta`` besides its states: per-link length
factors of the kinematic chain (with the tool offset) and, under torque control, a payload (a
point mass and its centre of mass in the end-effector frame). With ``learn_body`` they are
learned by descending the same free energy as perception, on a slower timescale and with a
Gaussian prior (Friston 2008, "Hierarchical models in the brain", PLoS Comput Biol 4(11),
e1000211, the M-step of dynamic expectation maximisation: parameters descend the free energy
accumulated over time, their conditional precision is its curvature; from memory, no
equation number)::

    F(theta) = 1/2 (theta - eta)' Pi_0 (theta - eta) + sum_t F_t(theta)
    dtheta/dt = -kappa inv(Pi) dF/dtheta,      Pi = Pi_0 + kappa sum_t d2F_t/dtheta2

``F_t`` is one sensation's share of the Laplace free energy, ``1/2 e' P e`` with ``e`` its
prediction error at the current belief; the curvature is the Gauss-Newton ``G' P G`` with
``G = -de/dtheta``. In discrete time each sensation moves ``theta`` by one Newton step on its
own term, preconditioned by the accumulated precision (:func:`laplace_parameter_step`). For
a linear-Gaussian observation model and ``kappa = 1`` this is the recursive form of the
Bayesian posterior of linear regression, ``m_N = S_N (S_0^-1 m_0 + beta Phi' t)``,
``S_N^-1 = S_0^-1 + beta Phi' Phi`` (Bishop 2006, *Pattern Recognition and Machine Learning*,
eqs. 3.50-3.51 and 3.53-3.54); ``kappa < 1`` tempers the likelihood (each sample counts as a
fraction ``kappa`` of one, for sensations whose errors are correlated in time).

Identifiability: a direction of ``theta`` that no sensation informs has no curvature, so its
posterior stays its prior (mean and precision); the Laplace precision ``Pi`` says which
parameters the data pinned down.

Sensations used:

* ``camera``: the tool tip's pixel, ``e = y - pi(fk(q; s))``; the tip is linear in the length
  factors ``s`` (:meth:`blanket.body.ArmModel.tip_length_jacobian`), so
  ``G = d pi/dx . D(q)`` (:func:`camera_length_terms`). A frame's time is taken as known to
  about one frame period ``T``: the pixel's covariance is the camera's noise plus
  ``(u' T)(u' T)'``, ``u'`` the tip's believed pixel velocity, so frames taken while the arm
  moves weigh less and a late frame cannot pass for a wrong length (common practice, no
  source).
* ``torque`` (torque control): the torque the payload-free body leaves unexplained along the
  believed motion, ``e = tau - ID_0(q, q', q'') - Y(q, q', q'') (m, h)``, with ``ID_0`` inverse
  dynamics without a payload and the payload's torque linear in its mass ``m`` and first
  moment ``h = m c`` (:meth:`blanket.body.ArmModel.payload_regressor`;
  :func:`torque_payload_terms`): a linear-Gaussian model, so learning cannot stall in a
  wrong pairing of mass and lever arm. Each sensation is the mean over a window of
  ``T = 1 / TORQUE_SAMPLE_HZ``: the mean torque that acted (the applied one when the
  observation reports it, :mod:`blanket.wrappers.safety_limits`) against the dynamics at
  the window's mid point with ``q'' = (q'(t + T) - q'(t)) / T`` from the believed velocities
  at its ends -- the integral (momentum) form of the dynamics, ``int tau dt = M dq' +
  int h dt`` with ``M`` and ``h`` held at the mid point, which needs no acceleration
  (Gautier & Khalil 1988, "On the identification of the inertial parameters of robots",
  IEEE CDC, from memory). A one-step difference of the believed velocity carries its noise
  into the regressor (errors in variables) and biased the mass 12 % high, measured. The first
  ``SETTLE_S`` of an episode (the belief's start-up transient) are left out.

A sensation whose normalized error ``e' inv(S) e``, ``S = inv(P) + G inv(Pi) G'``, lies beyond
the chi-square quantile of ``GATE_FALSE_REJECTION`` (a validation gate; Bar-Shalom, Li &
Kirubarajan 2001, *Estimation with Applications to Tracking and Navigation*, sec. 2.3 and
5.4) is not learned from: pushes, contacts and stale frames would otherwise enter as if the
body had changed.

The length factors are a two-level (hierarchical) model: ``s = g + B delta``, a shared scale
``g`` (prior sd ``body_length_prior_sd``) and one deviation ``delta_k`` per *segment* (prior
sd ``link_length_prior_sd``), so a uniform error is learned from every link at once while a
single segment's error is still expressible. A segment is a set of placements that point the
same way in every posture (:func:`collinear_length_segments`): the tip sees only the sum of
their lengths, ``sum_i l_i s_i``, never how it splits, so they share one factor
(``B`` maps segments to placements). This learns only the identifiable combinations; a
zero-length placement follows the shared scale alone. Which segments the camera can inform
at all is checked once, from the tip's length Jacobian at random postures
(:attr:`BodyLearning.segment_identifiable`).

Each segment's spread ``tau_k`` (the prior sd of ``delta_k``; it starts at
``link_length_prior_sd``) is learned at each new episode by empirical Bayes: the evidence
maximum over ``tau_k`` with the others held, ``tau_k^2 = (x_k - mu_k)^2 - v_k`` from the
data's own estimate ``x_k`` of the deviation and its variance ``v_k``, or the floor when that
is negative (sparse Bayesian learning; Tipping & Faul 2003, AISTATS, eqs. 19-20), swept over
the segments until it settles (:func:`segment_spread_step`). A segment whose data show no
deviation beyond their noise is drawn to the shared scale (a short wrist offset the camera
barely sees, when the error is uniform); one that really differs keeps its own value (one
wrong link). A segment the data do not inform (``v_k`` above the user's spread) keeps its
prior. :meth:`BodyLearning.segment_report` is the per-segment identifiability report.

The tip is predicted at the believed joint angles: their error, shared by successive frames,
enters each frame's noise (:func:`belief_pixel_covariance`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from blanket.free_energy import chi_square_threshold

__all__ = [
    "belief_pixel_covariance",
    "camera_length_terms",
    "collinear_length_segments",
    "segment_spread_step",
    "torque_payload_terms",
    "gaussian_terms",
    "laplace_parameter_step",
    "BodyLearning",
    "PAYLOAD_COM_PRIOR_SD_M",
    "SETTLE_S",
    "TORQUE_SAMPLE_HZ",
    "GATE_FALSE_REJECTION",
]

#: Prior sd of the payload's centre of mass about its prior mean (m), each axis: a payload held
#: by a tool sits within a few centimetres of the tool tip (common practice, no source).
PAYLOAD_COM_PRIOR_SD_M = 0.05
#: Start-up time of an episode left out of torque learning (s): the belief's velocity settles.
SETTLE_S = 0.25
#: Rate of the torque sensations learned from (Hz): each is the mean over a window of
#: ``1 / TORQUE_SAMPLE_HZ`` (the momentum form, below). Measured on the own arm with a 1.5 kg
#: payload, 4 episodes, true mass 1.5 kg, learned: 1.64 kg with windows of 2 control steps
#: (120 Hz), 1.55 (40 Hz), 1.51 (20 Hz), 1.50 (10 Hz); with the believed velocity's one-step
#: change as the acceleration (the earlier form) 1.68, and 1.49 with the true state.
TORQUE_SAMPLE_HZ = 10.0
#: False-rejection probability of the validation gate.
GATE_FALSE_REJECTION = 1e-6
#: Below this mass (kg) the payload's centre of mass is not learned from h = m c (kept at its
#: prior): h / m is meaningless for a vanishing mass.
_MIN_PAYLOAD_KG = 0.05
#: Floor of the learned spread of the segments' factors (common practice, no source): the
#: spread never collapses to zero, so a segment stays free to follow new data.
MIN_SEGMENT_SPREAD = 1e-3
#: Most sweeps of the segments' spread update at a new episode (it settles in a few).
_SPREAD_ITERATIONS = 50
#: Floor of a learned length factor (a factor <= 0 would turn a link inside out).
_MIN_LENGTH_SCALE = 0.2


def camera_length_terms(
    error_px: np.ndarray,
    pixel_jacobian: np.ndarray,
    length_jacobian: np.ndarray,
    precision: np.ndarray,
) -> tuple[float, np.ndarray, np.ndarray]:
    """One camera frame's free energy in the length factors, its gradient and curvature.

    (``F`` includes ``-1/2 ln|P|``, a constant in ``s``.)

    ``F = 1/2 e' P e`` with ``e = y - pi(fk(q; s))``; ``de/ds = -d pi/dx . D`` with
    ``D = d fk/ds`` (the chain rule; Friston 2008, PLoS Comput Biol, eq. 9 for ``F``), so
    ``dF/ds = -(d pi/dx D)' P e`` and the Gauss-Newton curvature is ``(d pi/dx D)' P
    (d pi/dx D)``.

    Parameters
    ----------
    error_px : numpy.ndarray
        ``e``, shape (2,).
    pixel_jacobian : numpy.ndarray
        ``d pi / dx`` at the predicted tip, shape (2, 3).
    length_jacobian : numpy.ndarray
        ``D = d fk / ds``, shape (3, L).
    precision : numpy.ndarray
        Precision of the pixel, (2, 2), or the diagonal of a diagonal one, (2,) (px^-2).

    Returns
    -------
    (float, numpy.ndarray, numpy.ndarray)
        ``F``, ``dF/ds`` (L,), ``d2F/ds2`` (L, L).
    """
    G = np.asarray(pixel_jacobian, dtype=float) @ np.asarray(length_jacobian, dtype=float)
    return gaussian_terms(error_px, -G, precision)


def collinear_length_segments(
    length_jacobians: np.ndarray, tol: float = 1e-9
) -> tuple[np.ndarray, np.ndarray]:
    """Group length factors that the tip position cannot tell apart, and test the groups.

    ``length_jacobians`` stacks ``D(q) = d fk / ds`` over postures, shape (3 P, L). The tip is
    ``sum_i D_i(q) s_i``: two placements whose columns are parallel over every posture (two
    links along one joint axis, e.g. base and shoulder of an arm whose first joint turns
    about the vertical) add up to one vector, so only ``l_a s_a + l_b s_b`` is seen (the
    column space of a regression with collinear regressors; Bishop 2006, *Pattern
    Recognition and Machine Learning*, sec. 3.1.1: ``Phi' Phi`` is singular along their
    difference). A column of zero norm (a zero-length placement, or one off the tip's
    chain) moves nothing.

    Parameters
    ----------
    length_jacobians : numpy.ndarray
        ``D`` stacked over postures, (3 P, L).
    tol : float
        Relative tolerance of "zero" and "parallel".

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        ``segment`` (L,) int: the segment of each factor (0..K-1, in order of first
        appearance), -1 for a factor that moves nothing; and ``identifiable`` (K,) bool:
        whether the stacked data determine each segment's factor (its unit vector lies in the
        row space of ``D B``).
    """
    D = np.asarray(length_jacobians, dtype=float)
    norms = np.linalg.norm(D, axis=0)
    top = float(norms.max()) if norms.size else 0.0
    segment = np.full(D.shape[1], -1, dtype=int)
    heads: list[int] = []
    for i in np.flatnonzero(norms > tol * max(top, 1e-300)):
        for k, j in enumerate(heads):
            if abs(float(D[:, i] @ D[:, j])) >= (1.0 - tol) * norms[i] * norms[j]:
                segment[i] = k
                break
        else:
            segment[i] = len(heads)
            heads.append(int(i))
    B = np.zeros((D.shape[1], len(heads)))
    B[segment >= 0, segment[segment >= 0]] = 1.0
    M = D @ B
    if not heads:
        return segment, np.zeros(0, dtype=bool)
    _, sv, Vt = np.linalg.svd(M, full_matrices=False)
    rows = Vt[sv > tol * 1e3 * sv[0]]
    identifiable = np.einsum("ki,ki->i", rows, rows) > 1.0 - 1e-6
    return segment, identifiable


def belief_pixel_covariance(
    pixel_jacobian: np.ndarray,
    angle_covariance: np.ndarray,
    encoder_variance: float,
    frames_per_step: float,
) -> np.ndarray:
    """The believed joint angles' share of a tip pixel's error, as frame noise (px^2).

    The tip is predicted at the believed angles, so their error ``dq`` (covariance
    ``Sigma_q``) moves the predicted pixel by ``H dq``, ``H = d pixel / dq``: covariance
    ``H Sigma_q H'`` (first-order propagation; Bar-Shalom, Li & Kirubarajan 2001, sec.
    1.4.16, from memory). Unlike the camera's noise this error is shared by successive
    frames: the belief averages about ``c = sigma_enc^2 / mean(diag(Sigma_q))`` encoder
    samples, so its error persists for about ``c`` control steps, ``m = c * frames_per_step``
    frames. ``m`` frames that share an error of covariance ``C`` and have independent noise
    ``R`` tell as much about their mean as ``m`` independent frames of noise ``R + m C``
    (equicorrelated samples, common practice, no source), so the share returned is
    ``max(m, 1) H Sigma_q H'``.

    Parameters
    ----------
    pixel_jacobian : numpy.ndarray
        ``H``, (2, n) (px/rad).
    angle_covariance : numpy.ndarray
        ``Sigma_q``, (n, n) (rad^2).
    encoder_variance : float
        The angle encoder's noise variance (rad^2).
    frames_per_step : float
        Camera frames per control step (``camera rate * dt``).

    Returns
    -------
    numpy.ndarray
        (2, 2) (px^2).
    """
    H = np.asarray(pixel_jacobian, dtype=float)
    S = np.asarray(angle_covariance, dtype=float)
    mean_var = float(np.mean(np.diag(S)))
    if not mean_var > 0.0:
        return np.zeros((2, 2))
    frames = max(encoder_variance / mean_var * frames_per_step, 1.0)
    return frames * H @ S @ H.T


def segment_spread_step(
    mean: np.ndarray,
    precision: np.ndarray,
    prior_mean: np.ndarray,
    prior_precision: np.ndarray,
    k: int,
    informed_below: float,
    floor: float = MIN_SEGMENT_SPREAD,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """The prior variance ``tau_k^2`` of parameter ``k`` that maximises the evidence, the
    others' priors held (one step of sparse Bayesian learning's sequential update).

    The posterior marginal of ``theta_k``, ``N(m_k, S_kk)``, is the data's (the other
    parameters integrated out), ``N(x_k, v_k)``, times the prior ``N(mu_k, tau_k^2)``:
    ``1/v_k = 1/S_kk - 1/tau_k^2`` and ``x_k = mu_k + v_k (m_k - mu_k) / S_kk``. The evidence
    is ``N(x_k | mu_k, v_k + tau_k^2)`` in ``tau_k``, largest at
    ``tau_k^2 = (x_k - mu_k)^2 - v_k`` when that is positive, at ``tau_k = 0`` (the parameter
    pruned to its prior mean) otherwise (Tipping & Faul 2003, "Fast marginal likelihood
    maximisation for sparse Bayesian models", AISTATS, eqs. 19-20, ``alpha = 1/tau^2``,
    ``s = 1/v``, ``q = (x - mu)/v``), floored at ``floor^2``. A parameter the data barely
    inform, ``v_k > informed_below^2``, keeps its prior (the identifiability guard): its
    spread is returned unchanged. The posterior under the new prior keeps the data's
    information ``Pi - Pi_0`` and ``Pi m - Pi_0 mu``: ``Pi' = Pi + dPi_0``,
    ``m' = m + inv(Pi') dPi_0 (mu - m)`` (Bishop 2006, *Pattern Recognition and Machine
    Learning*, eqs. 3.50-3.51; exact for a linear-Gaussian model, for the camera at the
    Gauss-Newton linearisation).

    Parameters
    ----------
    mean, precision : numpy.ndarray
        The posterior (p,), (p, p).
    prior_mean, prior_precision : numpy.ndarray
        The prior (p,), (p, p); row and column ``k`` of the precision zero but the diagonal.
    k : int
        The parameter whose spread is set.
    informed_below : float
        Largest data sd ``sqrt(v_k)`` for which the data count as informing ``theta_k``.
    floor : float
        Least ``tau_k``.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, numpy.ndarray, float)
        The new mean, precision, prior precision and ``tau_k``.
    """
    cov = np.linalg.inv(precision)
    S = float(cov[k, k])
    alpha = float(prior_precision[k, k])
    data_precision = 1.0 / S - alpha
    if data_precision * informed_below**2 <= 1.0:
        return mean, precision, prior_precision, float(1.0 / np.sqrt(alpha))
    v = 1.0 / data_precision
    x = v * (float(mean[k]) - float(prior_mean[k])) / S  # x_k - mu_k
    tau2 = max(x * x - v, floor * floor)
    new_prior = prior_precision.copy()
    new_prior[k, k] = 1.0 / tau2
    change = new_prior - prior_precision
    new_precision = precision + change
    new_mean = mean + np.linalg.solve(new_precision, change @ (prior_mean - mean))
    return new_mean, new_precision, new_prior, float(np.sqrt(tau2))


def torque_payload_terms(
    residual_n_m: np.ndarray,
    regressor: np.ndarray,
    theta: np.ndarray,
    precision: np.ndarray,
) -> tuple[float, np.ndarray, np.ndarray]:
    """One control step's free energy in the payload, its gradient and curvature.

    ``F = 1/2 e' P e`` with ``e = r - Y theta``, ``r`` the torque the payload-free body leaves
    unexplained, ``Y`` the payload regressor and ``theta = (m, h)`` (mass, first moment):
    ``dF/dtheta = -Y' P e``, curvature ``Y' P Y`` (exact: the model is linear in ``theta``).

    Parameters
    ----------
    residual_n_m : numpy.ndarray
        ``r``, shape (n,).
    regressor : numpy.ndarray
        ``Y``, shape (n, k).
    theta : numpy.ndarray
        The payload parameters, shape (k,).
    precision : numpy.ndarray
        Diagonal precision of the torque residual, shape (n,) ((N m)^-2).

    Returns
    -------
    (float, numpy.ndarray, numpy.ndarray)
        ``F``, ``dF/dtheta`` (k,), ``d2F/dtheta2`` (k, k).
    """
    Y = np.asarray(regressor, dtype=float)
    e = np.asarray(residual_n_m, dtype=float) - Y @ np.asarray(theta, dtype=float)
    return gaussian_terms(e, -Y, precision)


def gaussian_terms(
    error: np.ndarray, error_jacobian: np.ndarray, precision: np.ndarray
) -> tuple[float, np.ndarray, np.ndarray]:
    """``F = 1/2 e' P e - 1/2 ln|P|``, ``dF/dtheta = J' P e`` and ``J' P J`` for one error term
    with ``J = de/dtheta``: :func:`blanket.free_energy.free_energy`, ``belief_gradient`` and
    ``belief_curvature`` for a single term (Friston 2008, eqs. 9-10), without their checks --
    this runs every control step (tested equal to them).

    ``precision`` is a (k, k) matrix or the (k,) diagonal of a diagonal one.
    """
    e = np.asarray(error, dtype=float)
    J = np.asarray(error_jacobian, dtype=float)
    P = np.asarray(precision, dtype=float)
    if P.ndim == 1:
        Pe, JtP, log_det = P * e, J.T * P, float(np.log(P).sum())
    else:
        Pe, JtP, log_det = P @ e, J.T @ P, float(np.linalg.slogdet(P)[1])
    return 0.5 * float(e @ Pe) - 0.5 * log_det, J.T @ Pe, JtP @ J


def laplace_parameter_step(
    mean: np.ndarray,
    precision: np.ndarray,
    gradient: np.ndarray,
    curvature: np.ndarray,
    rate: float = 1.0,
) -> tuple[np.ndarray, np.ndarray]:
    """One slow step of the parameters: accumulate the curvature, take a Newton step.

    ``Pi <- Pi + kappa d2F_t/dtheta2``, ``theta <- theta - kappa inv(Pi) dF_t/dtheta``: the
    discrete form of ``dtheta/dt = -kappa inv(Pi) dF/dtheta`` with the Laplace precision of
    the parameters (Friston 2008, PLoS Comput Biol, M-step, from memory). For a linear-Gaussian
    model and ``kappa = 1`` it is the recursive posterior of Bishop 2006, PRML eqs. 3.53-3.54
    (tested). A direction with zero curvature and zero gradient keeps its prior.

    Parameters
    ----------
    mean, precision : numpy.ndarray
        The parameters' current mean (k,) and precision (k, k).
    gradient, curvature : numpy.ndarray
        ``dF_t/dtheta`` (k,) and ``d2F_t/dtheta2`` (k, k) of the new sensation at ``mean``.
    rate : float
        ``kappa`` in (0, 1]: the weight of one sensation.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        The new mean and precision.
    """
    new_precision = precision + rate * curvature
    step = np.linalg.solve(new_precision, rate * np.asarray(gradient, dtype=float))
    return mean - step, new_precision


@dataclass
class _Motion:
    """The believed motion and the command of the last step (for the torque sensation)."""

    q: np.ndarray
    v: np.ndarray
    tau: np.ndarray
    steps: int = 0


def _length_jacobians(body: Any, postures: int = 64, seed: int = 0) -> np.ndarray:
    """``D(q) = d fk / ds`` of ``body`` stacked over random postures within its joint limits
    (clipped to +-pi), (3 P, L); ``postures=1`` gives the home posture ``q = 0`` clipped into
    the limits (each column's norm is then the placement's nominal length)."""
    lo = np.maximum(np.asarray(body.lower, dtype=float), -np.pi)
    hi = np.minimum(np.asarray(body.upper, dtype=float), np.pi)
    if postures == 1:
        return body.tip_length_jacobian(np.clip(np.zeros(lo.size), lo, hi))[1]
    rng = np.random.default_rng(seed)
    return np.vstack([body.tip_length_jacobian(rng.uniform(lo, hi))[1] for _ in range(postures)])


_GATE = {k: chi_square_threshold(k, GATE_FALSE_REJECTION) for k in range(1, 13)}


def _gate(error: np.ndarray, noise_cov: np.ndarray, G: np.ndarray, cov: np.ndarray) -> bool:
    """Whether ``e' inv(S) e``, ``S = R + G cov G'``, is inside the validation gate."""
    S = noise_cov + G @ cov @ G.T
    nis = float(error @ np.linalg.solve(S, error))  # normalized_error(error, inv(S))
    k = error.size
    return nis <= (_GATE[k] if k in _GATE else chi_square_threshold(k, GATE_FALSE_REJECTION))


class BodyLearning:
    """The belief about the body's parameters: mean and Laplace precision, kept across
    episodes of one run (see the module docstring).

    Build it with :meth:`start`; :meth:`update` after each agent step; :meth:`new_episode` at a
    reset (keeps what was learned).

    Attributes
    ----------
    mean, precision : numpy.ndarray
        ``theta = (g, delta_1..delta_K[, m, h_x, h_y, h_z])`` and its precision: shared length
        scale, per-segment deviations, payload mass and first moment (end-effector frame).
    prior_mean, prior_precision : numpy.ndarray
        The Gaussian prior.
    names : tuple of str
        Names of the length factors (:attr:`blanket.body.ArmModel.length_parameter_names`).
    segment : numpy.ndarray
        Segment of each length factor (L,), -1 for a factor that moves nothing
        (:func:`collinear_length_segments`).
    segment_names : tuple of str
        Each segment's factors, joined by ``+``.
    segment_identifiable : numpy.ndarray
        Whether the tip's position can determine each segment's factor (K,).
    segment_spread : numpy.ndarray
        Prior sd of each segment's deviation from the shared scale (K,), learned by
        empirical Bayes at each new episode (:func:`segment_spread_step`).
    initial_spread : numpy.ndarray
        The user's prior sd of the deviations (``link_length_prior_sd``), (K,).
    length_map : numpy.ndarray
        ``s = length_map @ theta[:K + 1]`` (L, K + 1).
    learn_payload : bool
        Whether the payload part is present (torque control).
    frames, steps, rejected : int
        Camera frames and torque steps learned from so far, and sensations the gate refused.
    """

    def __init__(
        self,
        prior_mean: np.ndarray,
        prior_precision: np.ndarray,
        names: tuple[str, ...],
        learn_payload: bool,
        rate: float,
        torque_precision: float,
        prior_com_m: np.ndarray | None = None,
        segment: np.ndarray | None = None,
        segment_identifiable: np.ndarray | None = None,
    ) -> None:
        self.prior_mean = np.asarray(prior_mean, dtype=float).copy()
        self.prior_precision = np.asarray(prior_precision, dtype=float).copy()
        #: the user's prior precision (the segments' spreads are re-estimated in
        #: ``prior_precision``; this one stays)
        self.initial_prior_precision = self.prior_precision.copy()
        self.mean = self.prior_mean.copy()
        self.precision = self.prior_precision.copy()
        self.names = tuple(names)
        self.learn_payload = bool(learn_payload)
        self.rate = float(rate)
        self.torque_precision = float(torque_precision)
        self.prior_com_m = np.zeros(3) if prior_com_m is None else np.asarray(prior_com_m, float)
        self.frames = 0
        self.steps = 0
        self.rejected = 0
        L = len(self.names)
        self.L = L
        self.segment = np.arange(L) if segment is None else np.asarray(segment, dtype=int)
        K = int(self.segment.max()) + 1 if self.segment.size else 0
        self.segment_names = tuple(
            "+".join(n for n, g in zip(self.names, self.segment, strict=True) if g == k)
            for k in range(K)
        )
        self.segment_identifiable = (
            np.ones(K, dtype=bool)
            if segment_identifiable is None
            else np.asarray(segment_identifiable, dtype=bool)
        )
        #: s = A theta_length (shared scale plus the deviation of the link's segment)
        B = np.zeros((L, K))
        moves = self.segment >= 0
        B[moves, self.segment[moves]] = 1.0
        self.length_map = np.hstack([np.ones((L, 1)), B])
        #: theta[:n_length] are the length parameters (g, delta_1..delta_K)
        self.n_length = K + 1
        #: prior sd of each segment's deviation (learned at each new episode), and the
        #: user's, which a segment the data do not inform keeps
        self.segment_spread = 1.0 / np.sqrt(np.diag(self.prior_precision)[1 : K + 1])
        self.initial_spread = self.segment_spread.copy()
        self._frames_at_spread = 0
        self._last: _Motion | None = None
        self._sent: np.ndarray | None = None
        self._episode_steps = 0
        self._applied = self.mean.copy()
        self._applied_once = False

    @classmethod
    def start(cls, model: Any) -> BodyLearning:
        """The prior from a :class:`~blanket.agent.generative_model.GenerativeModel`'s options
        and body: length factors at the model's values, payload at ``payload_kg`` and
        ``payload_com_m`` (torque control only)."""
        opts = model.options
        body = model.body
        segment, identifiable = collinear_length_segments(_length_jacobians(body))
        K = int(segment.max()) + 1 if segment.size else 0
        s0 = np.asarray(body.link_length_scales, dtype=float)
        # start each segment at its placements' mean factor (weighted by nominal length, the
        # combination the tip sees), the shared scale at 1
        lengths = np.linalg.norm(_length_jacobians(body, postures=1), axis=0)
        dev = [
            float(np.average(s0[segment == k], weights=lengths[segment == k]) - 1.0)
            for k in range(K)
        ]
        mean = [1.0, *dev]
        sd = [float(opts["body_length_prior_sd"]), *[float(opts["link_length_prior_sd"])] * K]
        payload = model.control == "torque"
        c0 = np.asarray(body.payload_com_m, dtype=float)
        if payload:
            m0, sd_m = float(body.payload_kg), float(opts["payload_prior_sd_kg"])
            mean += [m0, *(m0 * c0)]
            sd += [sd_m, *[PAYLOAD_COM_PRIOR_SD_M * float(np.hypot(m0, sd_m))] * 3]
        prior_precision = np.diag(1.0 / np.square(sd))
        return cls(
            np.array(mean),
            prior_precision,
            body.length_parameter_names,
            payload,
            float(opts["body_learning_rate"]),
            1.0 / float(opts["torque_noise_sd_n_m"]) ** 2,
            c0,
            segment,
            identifiable,
        )

    # -- the parameters -------------------------------------------------------------------
    @property
    def covariance(self) -> np.ndarray:
        return np.linalg.inv(self.precision)

    def length_scales(self) -> np.ndarray:
        """The learned length factors ``s = g + B delta`` (L,)."""
        return self.length_map @ self.mean[: self.n_length]

    def length_scales_sd(self) -> np.ndarray:
        """Posterior sd of each length factor (L,)."""
        A = self.length_map
        cov = self.covariance[: self.n_length, : self.n_length]
        return np.sqrt(np.einsum("ij,jk,ik->i", A, cov, A))

    def shared_length_scale(self) -> tuple[float, float]:
        """The shared scale ``g`` and its posterior sd."""
        return float(self.mean[0]), float(np.sqrt(self.covariance[0, 0]))

    def segment_report(self) -> list[dict[str, Any]]:
        """What the data say about each segment's factor ``s_k = g + delta_k``.

        Returns one dict per segment: ``name``; ``factor`` and ``sd``, the posterior mean and
        sd; ``data_sd``, the sd from the sensations alone (the information they added,
        ``Pi - Pi_0``, mapped to the segments' factors and inverted; ``inf`` where they left
        a combination unseen); ``spread``, the prior sd of the deviation in force; and
        ``informed``, whether the data tell more than the user's prior
        (``data_sd < link_length_prior_sd``). A segment that is not informed keeps its prior
        (:func:`segment_spread_step`).
        """
        K = self.n_length - 1
        if K == 0:
            return []
        C = np.hstack([np.ones((K, 1)), np.eye(K)])  # s_seg = C theta_length
        lengths = slice(0, self.n_length)
        cov = self.covariance[lengths, lengths]
        post = C @ cov @ C.T
        data = (self.precision - self.prior_precision)[lengths, lengths]
        # data information on the segments' factors: the data see theta only through C theta
        Cp = np.linalg.pinv(C)
        H = Cp.T @ data @ Cp
        H = 0.5 * (H + H.T)
        w, V = np.linalg.eigh(H)
        seen = w > 1e-12 * max(float(w.max()), 1e-300)
        inv_diag = np.where(
            np.abs(V[:, ~seen]).max(axis=1, initial=0.0) > 1e-6,
            np.inf,
            (V[:, seen] ** 2 / w[seen]).sum(axis=1),
        )
        m = C @ self.mean[lengths]
        return [
            {
                "name": self.segment_names[k],
                "factor": float(m[k]),
                "sd": float(np.sqrt(post[k, k])),
                "data_sd": float(np.sqrt(inv_diag[k])),
                "spread": float(self.segment_spread[k]),
                "informed": bool(np.sqrt(inv_diag[k]) < self.initial_spread[k]),
            }
            for k in range(K)
        ]

    def payload(self) -> tuple[float, np.ndarray]:
        """The learned payload mass (kg) and centre of mass ``h / m`` (m, end-effector frame;
        the prior's below a few grams)."""
        k = self.n_length
        m = float(self.mean[k])
        if m < _MIN_PAYLOAD_KG:
            return m, self.prior_com_m.copy()
        return m, self.mean[k + 1 : k + 4] / m

    def payload_sd(self) -> tuple[float, np.ndarray]:
        """Posterior sd of the mass and of the centre of mass (first order in ``h / m``)."""
        k = self.n_length
        cov = self.covariance[k : k + 4, k : k + 4]
        m, c = self.payload()
        if m < _MIN_PAYLOAD_KG:
            return float(np.sqrt(cov[0, 0])), np.full(3, PAYLOAD_COM_PRIOR_SD_M)
        J = np.hstack([-c[:, None] / m, np.eye(3) / m])  # d(h/m)/d(m, h)
        return float(np.sqrt(cov[0, 0])), np.sqrt(np.diag(J @ cov @ J.T))

    def apply(self, body: Any, covariance: np.ndarray | None = None) -> None:
        """Write the current mean into the body model (lengths floored, mass >= 0).

        With the parameters' ``covariance``, a change below 10 % of every posterior sd since the
        last write is left for later (it changes what the body model predicts by far less than
        the model's own uncertainty)."""
        if covariance is not None and self._applied_once:
            step = np.abs(self.mean - self._applied) / np.sqrt(np.diag(covariance))
            if step.max() < 0.1:
                return
        self._applied, self._applied_once = self.mean.copy(), True
        s = np.maximum(self.length_scales(), _MIN_LENGTH_SCALE)
        if self.learn_payload:
            m, c = self.payload()
            body.set_body_parameters(s, max(m, 0.0), c)
        else:
            body.set_body_parameters(s)

    def summary(self) -> dict[str, Any]:
        """The ``internal.body`` log group: means and posterior sds."""
        g, g_sd = self.shared_length_scale()
        out: dict[str, Any] = {
            "length_scale": self.length_scales(),
            "length_scale_sd": self.length_scales_sd(),
            "shared_length_scale": g,
            "shared_length_scale_sd": g_sd,
        }
        if self.learn_payload:
            m, c = self.payload()
            m_sd, c_sd = self.payload_sd()
            out.update(payload_kg=m, payload_kg_sd=m_sd, payload_com_m=c, payload_com_m_sd=c_sd)
        return out

    def options(self) -> dict[str, Any]:
        """The learned values as ``[agent]`` options of a scenario (reload them to start from
        here): ``link_length_scales`` and, under torque control, ``payload_kg`` and
        ``payload_com_m``; with the segments' spread re-estimated, as the next episode
        starts from them."""
        mean = self._respread()[0] if self.frames > self._frames_at_spread else self.mean
        s = np.maximum(self.length_map @ mean[: self.n_length], _MIN_LENGTH_SCALE)
        out: dict[str, Any] = {"link_length_scales": [round(float(x), 6) for x in s]}
        if self.learn_payload:
            m, c = self.payload()
            out["payload_kg"] = round(max(m, 0.0), 6)
            out["payload_com_m"] = [round(float(x), 6) for x in c]
        return out

    # -- learning -------------------------------------------------------------------------
    def _learn_torque(self, model, window, q, v, steps, k, grad, curv) -> bool:
        """Add one window's torque sensation to ``grad`` and ``curv`` (the payload part)."""
        body = model.body
        T = steps * model.dt
        # the window's mean motion: the velocity change over it, at its mid point
        a = (v - window.v) / T
        q_mid = 0.5 * (q + window.q)
        v_mid = 0.5 * (v + window.v)
        Y = body.payload_regressor(q_mid, v_mid, a)
        m_b, c_b = body.payload_kg, body.payload_com_m
        # the mean torque that acted less what the payload-free body explains
        r = window.tau / steps - body.inverse_dynamics(q_mid, v_mid, a)
        r += Y @ [m_b, *(m_b * c_b)]
        P = np.full(model.n, self.torque_precision)
        pay = slice(self.n_length, k)
        theta = self.mean[pay]
        cov = self.covariance
        if not _gate(r - Y @ theta, np.diag(1.0 / P), Y, cov[pay, pay]):
            self.rejected += 1
            return False
        _, g_p, h_p = torque_payload_terms(r, Y, theta, P)
        grad[pay] += g_p
        curv[pay, pay] += h_p
        self.steps += 1
        return True

    def new_episode(self) -> None:
        """Forget the last step's motion (the parameters stay) and re-estimate the segments'
        spread from what was learned (:func:`segment_spread_step`, iterated)."""
        self._last = None
        self._sent = None
        self._episode_steps = 0
        if self.frames > self._frames_at_spread:
            self._frames_at_spread = self.frames
            self.mean, self.precision, self.prior_precision, self.segment_spread = self._respread()

    def _respread(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The posterior and prior with each segment's spread at the evidence maximum
        (:func:`segment_spread_step`, swept over the segments until it settles)."""
        mean, precision, prior = self.mean, self.precision, self.prior_precision
        tau = self.segment_spread.copy()
        for _ in range(_SPREAD_ITERATIONS):
            before = tau.copy()
            for j in range(tau.size):
                mean, precision, prior, tau[j] = segment_spread_step(
                    mean, precision, self.prior_mean, prior, 1 + j, float(self.initial_spread[j])
                )
            if np.allclose(tau, before, rtol=1e-6, atol=0.0):
                break
        return mean, precision, prior, tau

    def update(
        self,
        model: Any,
        belief_mean: np.ndarray,
        obs: Mapping[str, Any],
        camera_precision: np.ndarray,
        command: np.ndarray,
        belief_covariance: np.ndarray | None = None,
    ) -> None:
        """Learn from one step's sensations at the belief after perception, then write the
        new parameters into ``model.body``.

        Parameters
        ----------
        model : GenerativeModel
        belief_mean : numpy.ndarray
            The belief after the step, flattened order-major.
        obs : Mapping
            The observation of the step.
        camera_precision : numpy.ndarray
            The camera's precision in force (2,).
        command : numpy.ndarray
            The command the step sent (a torque under torque control).
        belief_covariance : numpy.ndarray, optional
            The belief's covariance after the step: its joint-angle part enters the
            camera's noise (:func:`belief_pixel_covariance`).
        """
        n = model.n
        body = model.body
        q = np.array(belief_mean[:n], dtype=float)
        v = np.array(belief_mean[n : 2 * n], dtype=float)
        self._episode_steps += 1
        k = self.mean.size
        grad = np.zeros(k)
        curv = np.zeros((k, k))
        changed = False
        cov = None
        lengths = slice(0, self.n_length)
        if (
            model.camera is not None
            and obs.get("camera_fresh", 0)
            and obs.get("tip_visible", 0)
            and np.all(np.asarray(camera_precision) > 0)
        ):
            tip, D = body.tip_length_jacobian(q)
            pixel, dpix = model.camera.project_with_jacobian(tip)
            e = np.asarray(obs["tip_pixel_px"], dtype=float) - pixel
            # a frame's time is known to about one frame period: the tip's pixel velocity
            # times that adds to the pixel noise, so moving frames weigh less
            J = body.tip_jacobian(q)
            flow = dpix @ J @ v / model.camera.rate_hz
            R = np.diag(1.0 / np.asarray(camera_precision, dtype=float)) + np.outer(flow, flow)
            if belief_covariance is not None:
                R = R + belief_pixel_covariance(
                    dpix @ J,
                    np.asarray(belief_covariance, dtype=float)[:n, :n],
                    model.description.encoder_angle_noise_rad**2,
                    model.camera.rate_hz * model.dt,
                )
            A = self.length_map
            cov = self.covariance
            if _gate(e, R, dpix @ D @ A, cov[lengths, lengths]):
                _, g_s, h_s = camera_length_terms(e, dpix, D, np.linalg.inv(R))
                grad[lengths] += A.T @ g_s
                curv[lengths, lengths] += A.T @ h_s @ A
                self.frames += 1
                changed = True
            else:
                self.rejected += 1
        if self.learn_payload:
            # the torque that acted over the last step: the applied one when the observation
            # reports it (a clamped command did not move the arm), else the one sent
            applied = obs.get("applied_command")
            if applied is not None:
                tau_now = np.asarray(applied, dtype=float)
            else:
                tau_now = self._sent
            self._sent = np.array(command, dtype=float)
            window = self._last
            if window is None or tau_now is None:
                self._last = _Motion(q, v, np.zeros(n))
            else:
                window.tau += tau_now
                window.steps += 1
                every = max(1, round(1.0 / (TORQUE_SAMPLE_HZ * model.dt)))
                if window.steps >= every:
                    self._last = _Motion(q, v, np.zeros(n))
                    if self._episode_steps * model.dt - every * model.dt > SETTLE_S:
                        if self._learn_torque(model, window, q, v, every, k, grad, curv):
                            changed = True
                        cov = self.covariance if cov is None else cov
        if changed:
            self.mean, self.precision = laplace_parameter_step(
                self.mean, self.precision, grad, curv, self.rate
            )
            self.apply(body, cov)
