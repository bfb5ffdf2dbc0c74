"""Generalized coordinates of motion: shift operator, temporal covariance and embedding.

A belief in generalized coordinates is the stack ``(mu, mu', mu'', ..., mu^(p))`` for
embedding order ``p``. Throughout blanket the stack is stored *order-major*: an array of
shape ``(p + 1, n)`` whose row ``k`` is the k-th temporal derivative, and flattened
vectors are ``[mu(0), mu(1), ..., mu(p)]`` (length ``(p + 1) * n``). Matrices acting on
flattened vectors therefore use ``np.kron(temporal_matrix, spatial_matrix)``.

Smoothness convention
---------------------
The smoothness ``s`` (seconds) is the standard deviation of the Gaussian kernel that white
noise is convolved with. The resulting stationary process has autocorrelation

    rho(h) = exp(-h**2 / (4 s**2)),

and its generalized (derivative) covariance is (Friston 2008, "Hierarchical models in the
brain", PLoS Comput Biol, eq. 6; Friston, Stephan, Li & Daunizeau 2010, "Generalised
filtering", Math Probl Eng, eq. 3)

    S_ij = (-1)**i rho^(i+j)(0)  for i + j even, 0 otherwise.

With ``rho(h) = exp(-a h**2)``, ``a = 1 / (4 s**2)``, the even derivatives at zero are
``rho^(2k)(0) = (-1)**k (2k)! / k! a**k``. The same convention drives the coloured-noise
generator in :mod:`blanket.noise`. ``s = 0`` is white noise: the derivatives have infinite
variance, so orders above zero carry zero precision.
"""

from __future__ import annotations

from math import factorial

import numpy as np
from scipy.linalg import expm

__all__ = [
    "shift_operator",
    "autocorrelation_derivative",
    "temporal_covariance",
    "temporal_precision",
    "generalized_precision",
    "embedding_matrix",
    "embed",
    "euler_step",
    "local_linearisation_step",
]


def _check_order(order: int) -> int:
    if int(order) != order or order < 0:
        raise ValueError(f"order must be a whole number >= 0, got {order!r}")
    return int(order)


def _check_smoothness(smoothness: float) -> float:
    s = float(smoothness)
    if not np.isfinite(s) or s < 0:
        raise ValueError(f"smoothness must be a finite number of seconds >= 0, got {smoothness!r}")
    return s


def shift_operator(order: int, n: int = 1) -> np.ndarray:
    """Block shift operator ``D`` with ``(D mu~)_k = mu^(k+1)`` and a zero top block.

    Parameters
    ----------
    order : int
        Embedding order ``p``; the result acts on vectors of length ``(p + 1) * n``.
    n : int
        Dimension of each order's block.

    Returns
    -------
    numpy.ndarray
        ``kron(diag(ones(p), k=1), eye(n))``, shape ``((p+1) n, (p+1) n)``.
    """
    p = _check_order(order)
    return np.kron(np.eye(p + 1, k=1), np.eye(int(n)))


def autocorrelation_derivative(k: int, smoothness: float) -> float:
    """k-th derivative at lag zero of ``rho(h) = exp(-h^2 / (4 s^2))``.

    Odd derivatives vanish; ``rho^(2m)(0) = (-1)^m (2m)! / m! * (1 / (4 s^2))^m``.
    """
    s = _check_smoothness(smoothness)
    if k % 2:
        return 0.0
    m = k // 2
    if m == 0:
        return 1.0
    if s == 0.0:
        return float("inf") * (-1) ** m
    a = 1.0 / (4.0 * s * s)
    return (-1) ** m * factorial(2 * m) / factorial(m) * a**m


def temporal_covariance(order: int, smoothness: float) -> np.ndarray:
    """Covariance ``S(s)`` of generalized noise up to embedding order ``order``.

    ``S_ij = (-1)^i rho^(i+j)(0)`` for ``i + j`` even, zero otherwise (Friston 2008, PLoS
    Comput Biol, eq. 6), with ``rho`` the autocorrelation of the module's smoothness
    convention. For white noise (``smoothness == 0``) the derivative variances are infinite
    and this function raises; use :func:`temporal_precision`, which has a finite limit.

    Returns
    -------
    numpy.ndarray
        Shape ``(order + 1, order + 1)``, for unit-variance noise.
    """
    p = _check_order(order)
    s = _check_smoothness(smoothness)
    if s == 0.0 and p > 0:
        raise ValueError(
            "smoothness must be > 0 for a finite temporal covariance above order 0 "
            "(white noise has infinite derivative variance); use temporal_precision"
        )
    S = np.zeros((p + 1, p + 1))
    for i in range(p + 1):
        for j in range(p + 1):
            if (i + j) % 2 == 0:
                S[i, j] = (-1) ** i * autocorrelation_derivative(i + j, s)
    return S


def temporal_precision(order: int, smoothness: float) -> np.ndarray:
    """Inverse of :func:`temporal_covariance`; for white noise, ``diag(1, 0, ..., 0)``.

    The white-noise limit: as ``s -> 0`` every derivative variance grows without bound, so the
    precision of orders above zero goes to zero; ``s = 0`` gives order zero its marginal, unit
    precision. (Entrywise, ``inv(S(s))_ij`` scales as ``s^(i+j)``, so for ``order >= 2`` the
    ``(0, 0)`` entry stays at ``inv(S(1))_00 > 1``, the precision conditional on the higher orders.)
    """
    p = _check_order(order)
    s = _check_smoothness(smoothness)
    if s == 0.0:
        P = np.zeros((p + 1, p + 1))
        P[0, 0] = 1.0
        return P
    S = temporal_covariance(p, s)
    P = np.linalg.inv(S)
    return 0.5 * (P + P.T)


def generalized_precision(
    precision: np.ndarray | float, order: int, smoothness: float
) -> np.ndarray:
    """Precision of generalized noise: ``inv(S(s)) kron P_0`` (Friston 2008, eq. 6).

    Parameters
    ----------
    precision : array_like or float
        Precision ``P_0`` of the order-zero noise, shape ``(n, n)``, ``(n,)`` (diagonal) or a
        scalar (``n = 1``).
    order : int
        Embedding order.
    smoothness : float
        Smoothness ``s`` in seconds (see the module docstring).

    Returns
    -------
    numpy.ndarray
        Shape ``((order+1) n, (order+1) n)``, order-major.
    """
    P0 = np.asarray(precision, dtype=float)
    if P0.ndim == 0:
        P0 = P0.reshape(1, 1)
    elif P0.ndim == 1:
        P0 = np.diag(P0)
    if P0.ndim != 2 or P0.shape[0] != P0.shape[1]:
        raise ValueError(f"precision must be square, got shape {P0.shape}")
    return np.kron(temporal_precision(order, smoothness), P0)


def embedding_matrix(order: int, window: int, dt: float) -> np.ndarray:
    """Matrix ``E`` mapping the last ``window`` samples to generalized coordinates.

    The samples ``y_{k-window+1}, ..., y_k`` (oldest first) are fitted by a Taylor
    polynomial about the newest sample time ``t_k``: ``y(t_k - j dt) = sum_i (-j dt)^i / i!
    y^(i)``. With ``window == order + 1`` the fit is exact (finite differences, backward in
    time so the embedding stays causal); a longer window gives the least-squares fit.

    Returns
    -------
    numpy.ndarray
        Shape ``(order + 1, window)``; ``y~ = E @ samples`` with ``samples`` oldest first.
    """
    p = _check_order(order)
    w = int(window)
    if w < p + 1:
        raise ValueError(f"window must be >= order + 1 = {p + 1}, got {window!r}")
    if not (np.isfinite(dt) and dt > 0):
        raise ValueError(f"dt must be a positive number of seconds, got {dt!r}")
    lags = -dt * np.arange(w - 1, -1, -1, dtype=float)  # oldest first, newest at lag 0
    T = np.stack([lags**i / factorial(i) for i in range(p + 1)], axis=1)  # (w, p+1)
    return np.linalg.pinv(T)


def embed(samples: np.ndarray, order: int, dt: float) -> np.ndarray:
    """Generalized embedding of a window of samples (oldest first).

    Parameters
    ----------
    samples : numpy.ndarray
        Shape ``(window, n)`` or ``(window,)``.
    order, dt
        Embedding order and sample interval (seconds).

    Returns
    -------
    numpy.ndarray
        Shape ``(order + 1, n)``: estimates of the value and its derivatives at the newest
        sample time.
    """
    y = np.asarray(samples, dtype=float)
    squeeze = y.ndim == 1
    if squeeze:
        y = y[:, None]
    E = embedding_matrix(order, y.shape[0], dt)
    out = E @ y
    return out[:, 0] if squeeze else out


def euler_step(rate: np.ndarray, dt: float) -> np.ndarray:
    """Euler increment ``dt * rate``."""
    return dt * np.asarray(rate, dtype=float)


def local_linearisation_step(rate: np.ndarray, jacobian: np.ndarray, dt: float) -> np.ndarray:
    """Local-linearisation increment (Ozaki 1992, Statistica Sinica 2, eq. 2.6).

    ``dx = (expm(J dt) - I) inv(J) x_dot``, computed without inverting ``J`` as the top-right
    block of ``expm([[J, x_dot], [0, 0]] dt)`` so a singular ``J`` is fine.

    Parameters
    ----------
    rate : numpy.ndarray
        Flow ``x_dot`` at the current point, shape ``(m,)``.
    jacobian : numpy.ndarray
        ``J = d x_dot / d x``, shape ``(m, m)``.
    dt : float
        Step in seconds.
    """
    f = np.asarray(rate, dtype=float).ravel()
    J = np.asarray(jacobian, dtype=float)
    m = f.size
    if J.shape != (m, m):
        raise ValueError(f"jacobian must have shape {(m, m)}, got {J.shape}")
    A = np.zeros((m + 1, m + 1))
    A[:m, :m] = J
    A[:m, m] = f
    return expm(A * dt)[:m, m]
