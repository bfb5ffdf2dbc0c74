"""Laplace-encoded free energy, its gradients and curvature (pure functions on arrays).

Under the Laplace assumption with Gaussian noise, the free energy of a belief ``mu`` is, up
to constants, a sum over error terms (sensory channels, prior dynamics, priors)

    F = 1/2 sum_i e_i' P_i e_i - 1/2 sum_i ln|P_i|,

with ``e_i`` the prediction errors and ``P_i`` their precisions (Friston 2008, "Hierarchical
models in the brain", PLoS Comput Biol, eqs. 8-9; Buckley, Kim, McGregor & Seth 2017, "The
free energy principle for action and perception: a mathematical review", J Math Psychol,
sec. 5). The determinant is the *pseudo*-determinant (product of the positive eigenvalues), so
error terms whose precision is singular -- e.g. generalized orders that carry zero precision
under white noise -- are allowed and simply contribute nothing in those directions.

Every function accepts a sequence of error terms: ``errors[i]`` of shape ``(k_i,)`` and
``precisions[i]`` of shape ``(k_i, k_i)``, with Jacobians ``(k_i, n)`` with respect to the
belief (or action) of length ``n``. A precision given as a vector of shape ``(k_i,)`` is the
diagonal of a diagonal precision: the fast form, with no ``k_i x k_i`` products (the agent's
channels all have diagonal precisions).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy.special import chdtri

__all__ = [
    "log_pseudo_determinant",
    "free_energy",
    "belief_gradient",
    "belief_curvature",
    "action_gradient",
    "log_precision_gradient",
    "log_precision_gradient_diagonal",
    "normalized_error",
    "chi_square_threshold",
]


def _as_terms(
    errors: Sequence[np.ndarray], precisions: Sequence[np.ndarray]
) -> list[tuple[np.ndarray, np.ndarray]]:
    if len(errors) != len(precisions):
        raise ValueError(
            f"errors and precisions must have the same length, got {len(errors)} and "
            f"{len(precisions)}"
        )
    out = []
    for i, (e, P) in enumerate(zip(errors, precisions, strict=True)):
        e = np.atleast_1d(np.asarray(e, dtype=float)).ravel()
        P = _precision(P, e.size, f"precisions[{i}]", f" to match errors[{i}]")
        out.append((e, P))
    return out


def _precision(P: np.ndarray, k: int, name: str, context: str = "") -> np.ndarray:
    """``P`` as a (k, k) matrix, or as a (k,) vector (the diagonal of a diagonal precision)."""
    P = np.asarray(P, dtype=float)
    if P.ndim == 1 and P.shape == (k,):
        return P
    P = np.atleast_2d(P)
    if P.shape != (k, k):
        raise ValueError(f"{name} must have shape {(k, k)} or {(k,)}{context}, got {P.shape}")
    return P


def _weigh(P: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``P x`` for a full precision or the diagonal vector of a diagonal one."""
    return P * x if P.ndim == 1 else P @ x


def _jacobians(jacobians: Sequence[np.ndarray], terms: list, name: str) -> list[np.ndarray]:
    if len(jacobians) != len(terms):
        raise ValueError(f"{name} must have one entry per error term, got {len(jacobians)}")
    out = []
    for i, (J, (e, _)) in enumerate(zip(jacobians, terms, strict=True)):
        J = np.asarray(J, dtype=float)
        if J.ndim == 1:
            J = J.reshape(e.size, -1)
        if J.ndim != 2 or J.shape[0] != e.size:
            raise ValueError(f"{name}[{i}] must have {e.size} rows, got shape {J.shape}")
        out.append(J)
    if len({J.shape[1] for J in out}) > 1:
        raise ValueError(f"{name} must all have the same number of columns")
    return out


def _weighted_errors(
    errors: Sequence[np.ndarray],
    jacobians: Sequence[np.ndarray],
    precisions: Sequence[np.ndarray],
    name: str,
) -> np.ndarray:
    """``sum_i J_i' P_i e_i``."""
    terms = _as_terms(errors, precisions)
    Js = _jacobians(jacobians, terms, name)
    if not Js:
        raise ValueError(f"{name} must hold at least one term")
    return np.sum([J.T @ _weigh(P, e) for J, (e, P) in zip(Js, terms, strict=True)], axis=0)


def log_pseudo_determinant(precision: np.ndarray, rtol: float = 1e-12) -> float:
    """Log pseudo-determinant: sum of ``ln`` of the eigenvalues above ``rtol * max``.

    For a symmetric positive semi-definite matrix, or the vector of a diagonal one. Zero
    eigenvalues (precision-free directions) are skipped; a full-rank matrix gives ``ln|P|``.
    """
    P = np.asarray(precision, dtype=float)
    if P.size == 0:
        return 0.0
    if P.ndim == 1:  # the diagonal of a diagonal precision
        top = float(np.max(P))
        return float(np.sum(np.log(P[P > rtol * top]))) if top > 0 else 0.0
    P = np.atleast_2d(P)
    w = np.linalg.eigvalsh(0.5 * (P + P.T))
    top = float(np.max(w))
    if top <= 0:
        return 0.0
    keep = w > rtol * top
    return float(np.sum(np.log(w[keep])))


def free_energy(errors: Sequence[np.ndarray], precisions: Sequence[np.ndarray]) -> float:
    """Laplace-encoded free energy ``1/2 sum e'Pe - 1/2 sum ln|P|`` (constants dropped).

    Friston 2008, PLoS Comput Biol, eq. 9 (the Gaussian energy under the Laplace assumption);
    Buckley et al. 2017, J Math Psychol, eq. 41 for the single-level form. ``ln|P|`` is the log
    pseudo-determinant (:func:`log_pseudo_determinant`), so zero-precision orders are allowed.

    Parameters
    ----------
    errors : sequence of numpy.ndarray
        Prediction errors ``e_i``, each of shape ``(k_i,)``.
    precisions : sequence of numpy.ndarray
        Precisions ``P_i``, each symmetric PSD of shape ``(k_i, k_i)``, or ``(k_i,)`` for a
        diagonal one.

    Returns
    -------
    float
    """
    F = 0.0
    for e, P in _as_terms(errors, precisions):
        F += 0.5 * float(e @ _weigh(P, e)) - 0.5 * log_pseudo_determinant(P)
    return F


def belief_gradient(
    errors: Sequence[np.ndarray],
    error_jacobians: Sequence[np.ndarray],
    precisions: Sequence[np.ndarray],
) -> np.ndarray:
    """Gradient of :func:`free_energy` with respect to the belief: ``sum_i J_i' P_i e_i``.

    ``J_i = d e_i / d mu`` (for a sensory error ``e = y - g(mu)`` this is ``-dg/dmu``). Friston
    2008, eq. 10 (the gradient that perception descends). Precisions are taken as symmetric.

    Returns
    -------
    numpy.ndarray
        Shape ``(n,)``.
    """
    return _weighted_errors(errors, error_jacobians, precisions, "error_jacobians")


def belief_curvature(
    error_jacobians: Sequence[np.ndarray], precisions: Sequence[np.ndarray]
) -> np.ndarray:
    """Gauss-Newton Hessian of :func:`free_energy`: ``sum_i J_i' P_i J_i``.

    Exact for errors linear in the belief; otherwise the Gauss-Newton approximation that drops
    second derivatives of the errors. Its inverse is the Laplace posterior covariance (Friston
    2008, eq. 9: the conditional precision is the curvature of the energy at the mode).

    Returns
    -------
    numpy.ndarray
        Shape ``(n, n)``.
    """
    if len(error_jacobians) != len(precisions):
        raise ValueError("error_jacobians and precisions must have the same length")
    H = None
    for i, (J, P) in enumerate(zip(error_jacobians, precisions, strict=True)):
        J = np.atleast_2d(np.asarray(J, dtype=float))
        P = _precision(P, J.shape[0], f"precisions[{i}]")
        term = (J.T * P) @ J if P.ndim == 1 else J.T @ P @ J
        if H is None:
            H = term
        elif H.shape != term.shape:
            raise ValueError("error_jacobians must all have the same number of columns")
        else:
            H = H + term
    if H is None:
        raise ValueError("error_jacobians must hold at least one term")
    return 0.5 * (H + H.T)


def action_gradient(
    errors: Sequence[np.ndarray],
    error_action_jacobians: Sequence[np.ndarray],
    precisions: Sequence[np.ndarray],
) -> np.ndarray:
    """Gradient of :func:`free_energy` with respect to action: ``sum_i (de_i/da)' P_i e_i``.

    Action changes free energy only through sensations, ``de/da = -dy~/da``, so action descends
    ``-(dy~/da)' P e`` (Friston 2008 / Friston et al. 2010; Buckley et al. 2017, eq. 48).

    Returns
    -------
    numpy.ndarray
        Shape ``(n_actions,)``.
    """
    return _weighted_errors(errors, error_action_jacobians, precisions, "error_action_jacobians")


def log_precision_gradient(error: np.ndarray, precision: np.ndarray) -> float:
    """``dF/dl`` for a precision ``P = exp(l) P_base``: ``1/2 (e'Pe - n)``.

    With ``P = exp(l) I`` this is the familiar ``1/2 (exp(l) e'e - n)`` (Friston 2008, eq. 12
    for the hyperparameter gradient; Buckley et al. 2017, sec. 6). ``n`` is the rank of ``P``
    (the number of components with precision), so zero-precision components do not count.
    """
    e = np.atleast_1d(np.asarray(error, dtype=float)).ravel()
    P = np.atleast_2d(np.asarray(precision, dtype=float))
    if P.shape != (e.size, e.size):
        raise ValueError(f"precision must have shape {(e.size, e.size)}, got {P.shape}")
    rank = int(np.linalg.matrix_rank(P)) if P.size else 0
    return 0.5 * (float(e @ P @ e) - rank)


def log_precision_gradient_diagonal(error: np.ndarray, precision: np.ndarray) -> np.ndarray:
    """Per-component ``dF/dl_j`` for diagonal ``P = diag(exp(l))``: ``1/2 (P_jj e_j^2 - 1)``.

    ``precision`` is the diagonal ``(n,)`` or a diagonal matrix ``(n, n)``. Components with zero
    precision get gradient zero (they carry no log-determinant term).
    """
    e = np.atleast_1d(np.asarray(error, dtype=float)).ravel()
    p = np.asarray(precision, dtype=float)
    if p.ndim == 2:
        if p.shape != (e.size, e.size) or np.any(p - np.diag(np.diag(p))):
            raise ValueError(f"precision must be diagonal of size {e.size}")
        p = np.diag(p)
    p = np.atleast_1d(p)
    if p.shape != (e.size,):
        raise ValueError(f"precision must have {e.size} entries, got shape {p.shape}")
    return np.where(p > 0, 0.5 * (p * e * e - 1.0), 0.0)


def normalized_error(error: np.ndarray, precision: np.ndarray) -> float:
    """Normalized (squared) prediction error ``e'Pe``: the innovation statistic.

    If ``e ~ N(0, inv(P))`` it is chi-square distributed with ``rank(P)`` degrees of freedom
    (Bar-Shalom, Li & Kirubarajan 2001, "Estimation with Applications to Tracking and
    Navigation", sec. 5.4 (section from memory): the normalized innovation squared).
    """
    e = np.atleast_1d(np.asarray(error, dtype=float)).ravel()
    P = np.atleast_2d(np.asarray(precision, dtype=float))
    if P.shape != (e.size, e.size):
        raise ValueError(f"precision must have shape {(e.size, e.size)}, got {P.shape}")
    return float(e @ P @ e)


def chi_square_threshold(dof: int, false_alarm: float = 0.01) -> float:
    """Upper chi-square quantile: ``e'Pe`` above it flags a fault at rate ``false_alarm``.

    ``scipy.stats.chi2.ppf(1 - false_alarm, dof)``, computed as the inverse survival
    function ``scipy.special.chdtri(dof, false_alarm)`` (no loss of digits in ``1 - p``).
    """
    if int(dof) != dof or dof < 1:
        raise ValueError(f"dof must be a whole number >= 1, got {dof!r}")
    if not (0.0 < float(false_alarm) < 1.0):
        raise ValueError(f"false_alarm must be in (0, 1), got {false_alarm!r}")
    return float(chdtri(int(dof), float(false_alarm)))
