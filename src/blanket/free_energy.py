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
belief (or action) of length ``n``.
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
    "free_energy_diagonal",
    "belief_gradient_diagonal",
    "belief_curvature_diagonal",
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
        P = np.atleast_2d(np.asarray(P, dtype=float))
        if P.shape != (e.size, e.size):
            raise ValueError(
                f"precisions[{i}] must have shape {(e.size, e.size)} to match errors[{i}], "
                f"got {P.shape}"
            )
        out.append((e, P))
    return out


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


def log_pseudo_determinant(precision: np.ndarray, rtol: float = 1e-12) -> float:
    """Log pseudo-determinant: sum of ``ln`` of the eigenvalues above ``rtol * max``.

    For a symmetric positive semi-definite matrix. Zero eigenvalues (precision-free directions)
    are skipped; a full-rank matrix gives ``ln|P|``.
    """
    P = np.atleast_2d(np.asarray(precision, dtype=float))
    if P.size == 0:
        return 0.0
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
        Precisions ``P_i``, each symmetric PSD of shape ``(k_i, k_i)``.

    Returns
    -------
    float
    """
    F = 0.0
    for e, P in _as_terms(errors, precisions):
        F += 0.5 * float(e @ P @ e) - 0.5 * log_pseudo_determinant(P)
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
    terms = _as_terms(errors, precisions)
    Js = _jacobians(error_jacobians, terms, "error_jacobians")
    if not Js:
        raise ValueError("error_jacobians must hold at least one term")
    return np.sum([J.T @ (P @ e) for J, (e, P) in zip(Js, terms, strict=True)], axis=0)


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
        P = np.atleast_2d(np.asarray(P, dtype=float))
        if P.shape != (J.shape[0], J.shape[0]):
            raise ValueError(
                f"precisions[{i}] must have shape {(J.shape[0], J.shape[0])}, got {P.shape}"
            )
        term = J.T @ P @ J
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
    terms = _as_terms(errors, precisions)
    Js = _jacobians(error_action_jacobians, terms, "error_action_jacobians")
    if not Js:
        raise ValueError("error_action_jacobians must hold at least one term")
    return np.sum([J.T @ (P @ e) for J, (e, P) in zip(Js, terms, strict=True)], axis=0)


def _diagonal_terms(
    errors: Sequence[np.ndarray], precisions: Sequence[np.ndarray]
) -> list[tuple[np.ndarray, np.ndarray]]:
    if len(errors) != len(precisions):
        raise ValueError(
            f"errors and precisions must have the same length, got {len(errors)} and "
            f"{len(precisions)}"
        )
    out = []
    for i, (e, p) in enumerate(zip(errors, precisions, strict=True)):
        e = np.atleast_1d(np.asarray(e, dtype=float)).ravel()
        p = np.atleast_1d(np.asarray(p, dtype=float)).ravel()
        if p.shape != e.shape:
            raise ValueError(
                f"precisions[{i}] must hold {e.size} diagonal entries to match errors[{i}], "
                f"got shape {p.shape}"
            )
        out.append((e, p))
    return out


def free_energy_diagonal(errors: Sequence[np.ndarray], precisions: Sequence[np.ndarray]) -> float:
    """:func:`free_energy` for diagonal precisions ``P_i = diag(p_i)``, given as vectors.

    ``F = 1/2 sum_i sum_j p_ij e_ij^2 - 1/2 sum_i sum_(p_ij > 0) ln p_ij`` (Friston 2008, PLoS
    Comput Biol, eq. 9, with the pseudo-determinant of :func:`log_pseudo_determinant`).
    """
    F = 0.0
    for e, p in _diagonal_terms(errors, precisions):
        F += 0.5 * float(e @ (p * e)) - 0.5 * float(np.log(p[p > 0]).sum())
    return F


def belief_gradient_diagonal(
    errors: Sequence[np.ndarray],
    error_jacobians: Sequence[np.ndarray],
    precisions: Sequence[np.ndarray],
) -> np.ndarray:
    """:func:`belief_gradient` for diagonal precisions: ``sum_i J_i' (p_i * e_i)``.

    ``J_i = d e_i / d mu`` (Friston 2008, eq. 10), shape ``(k_i, n)``; ``p_i`` shape ``(k_i,)``.
    """
    terms = _diagonal_terms(errors, precisions)
    Js = _jacobians(error_jacobians, terms, "error_jacobians")
    if not Js:
        raise ValueError("error_jacobians must hold at least one term")
    return np.sum([J.T @ (p * e) for J, (e, p) in zip(Js, terms, strict=True)], axis=0)


def belief_curvature_diagonal(
    error_jacobians: Sequence[np.ndarray], precisions: Sequence[np.ndarray]
) -> np.ndarray:
    """:func:`belief_curvature` for diagonal precisions: ``sum_i J_i' diag(p_i) J_i``.

    The Gauss-Newton curvature (the Laplace conditional precision, Friston 2008, eq. 9).
    """
    if len(error_jacobians) != len(precisions):
        raise ValueError("error_jacobians and precisions must have the same length")
    H = None
    for i, (J, p) in enumerate(zip(error_jacobians, precisions, strict=True)):
        J = np.atleast_2d(np.asarray(J, dtype=float))
        p = np.atleast_1d(np.asarray(p, dtype=float)).ravel()
        if p.shape != (J.shape[0],):
            raise ValueError(f"precisions[{i}] must hold {J.shape[0]} entries, got {p.shape}")
        term = (J.T * p) @ J
        if H is None:
            H = term
        elif H.shape != term.shape:
            raise ValueError("error_jacobians must all have the same number of columns")
        else:
            H = H + term
    if H is None:
        raise ValueError("error_jacobians must hold at least one term")
    return H


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
