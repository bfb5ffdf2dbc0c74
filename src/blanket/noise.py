"""Coloured (smooth) Gaussian noise with the smoothness convention of :mod:`blanket.gcoords`.

Smooth noise is white noise convolved with a Gaussian kernel of standard deviation ``s``
seconds, ``k(t) = exp(-t**2 / (2 s**2))``. The convolution of two such kernels is a Gaussian
of variance ``2 s**2``, so the stationary process has autocorrelation

    rho(h) = exp(-h**2 / (4 s**2)),

the convention of :func:`blanket.gcoords.temporal_covariance` (Friston 2008, "Hierarchical
models in the brain", PLoS Comput Biol, eq. 6). Its integral is ``2 sqrt(pi) s``, which links a
continuous-time white-noise intensity ``Q`` to the marginal variance ``Q / (2 sqrt(pi) s)`` of
the smooth process with the same low-frequency power (see :func:`smooth_variance_from_intensity`).
"""

from __future__ import annotations

import numpy as np
from scipy.signal import fftconvolve

__all__ = [
    "KERNEL_TRUNCATION",
    "MAX_CLOSURE_ORDER",
    "gauss_markov_closure",
    "gaussian_kernel",
    "smooth_noise",
    "smooth_variance_from_intensity",
]

MAX_CLOSURE_ORDER = 7
"""Highest order of :func:`gauss_markov_closure`; above it ``S(s)`` is too ill-conditioned."""

KERNEL_TRUNCATION = 5.0
"""The Gaussian kernel is cut at ``KERNEL_TRUNCATION * s`` either side of its centre."""


def _check_positive(name: str, value: float) -> float:
    v = float(value)
    if not (np.isfinite(v) and v > 0):
        raise ValueError(f"{name} must be a finite number > 0, got {value!r}")
    return v


def _check_smoothness(smoothness: float) -> float:
    s = float(smoothness)
    if not (np.isfinite(s) and s >= 0):
        raise ValueError(f"smoothness must be a finite number of seconds >= 0, got {smoothness!r}")
    return s


def gaussian_kernel(dt: float, smoothness: float) -> np.ndarray:
    """Sampled Gaussian kernel of standard deviation ``smoothness`` seconds, unit energy.

    The kernel is sampled every ``dt`` seconds on ``|t| <= 5 s`` and scaled so that the sum of
    its squares is one: convolving unit white noise with it gives unit marginal variance.
    ``smoothness == 0`` (or a kernel narrower than one sample) returns ``[1.0]`` (white noise).

    Returns
    -------
    numpy.ndarray
        Shape ``(2 h + 1,)`` with ``h = floor(5 s / dt)``.
    """
    dt = _check_positive("dt", dt)
    s = _check_smoothness(smoothness)
    half = int(np.floor(KERNEL_TRUNCATION * s / dt)) if s > 0 else 0
    if half == 0:
        return np.ones(1)
    t = dt * np.arange(-half, half + 1, dtype=float)
    k = np.exp(-(t**2) / (2.0 * s * s))
    return k / np.sqrt(np.sum(k * k))


def smooth_variance_from_intensity(intensity: np.ndarray | float, smoothness: float) -> np.ndarray:
    """Marginal covariance ``Q / (2 sqrt(pi) s)`` of smooth noise with white-noise intensity ``Q``.

    ``Q`` is the spectral density at zero frequency (covariance per second of the integrated
    noise). A stationary process with autocorrelation ``rho`` and covariance ``V`` has
    zero-frequency density ``V * integral(rho) = V * 2 sqrt(pi) s`` for the Gaussian ``rho``
    above (Wiener-Khinchin theorem; common practice, no source). ``s`` must be > 0.
    """
    s = _check_smoothness(smoothness)
    if s == 0:
        raise ValueError("smoothness must be > 0 seconds for a finite variance, got 0")
    return np.asarray(intensity, dtype=float) / (2.0 * np.sqrt(np.pi) * s)


def _factor(covariance: np.ndarray) -> np.ndarray:
    """Return ``L`` with ``L @ L.T == covariance`` for a symmetric PSD matrix (singular allowed)."""
    w, V = np.linalg.eigh(covariance)
    tol = 1e-12 * max(1.0, float(np.max(np.abs(w))) if w.size else 1.0)
    if np.any(w < -tol):
        raise ValueError("covariance must be symmetric positive semi-definite")
    return V * np.sqrt(np.clip(w, 0.0, None))


def smooth_noise(
    rng: np.random.Generator,
    n_samples: int,
    dt: float,
    smoothness: float,
    covariance: np.ndarray | float | None = None,
    std: np.ndarray | float | None = None,
    dim: int | None = None,
) -> np.ndarray:
    """Draw stationary smooth Gaussian noise sampled every ``dt`` seconds.

    Unit white noise is convolved with :func:`gaussian_kernel` (standard deviation
    ``smoothness`` seconds, cut at 5 s), then coloured across dimensions by a square root of the
    nominal covariance, so every sample has exactly that marginal covariance and lag ``h``
    autocorrelation ``exp(-h^2 / (4 s^2))`` (up to sampling of the kernel when ``s`` is
    comparable to ``dt``). The white noise is drawn with a margin of one kernel half-width at
    each end and only the fully convolved middle is kept, so there are no edge effects.
    ``smoothness == 0`` gives independent samples.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness.
    n_samples : int
        Number of samples ``T``.
    dt : float
        Sample interval in seconds (> 0).
    smoothness : float
        Kernel standard deviation ``s`` in seconds (>= 0).
    covariance : array_like or float, optional
        Marginal covariance, ``(dim, dim)``, ``(dim,)`` (diagonal) or scalar. Give at most one
        of ``covariance`` and ``std``; with neither the covariance is the identity.
    std : array_like or float, optional
        Marginal standard deviation per dimension (diagonal covariance ``std**2``).
    dim : int, optional
        Dimension; inferred from ``covariance`` / ``std`` when omitted, else 1.

    Returns
    -------
    numpy.ndarray
        Shape ``(n_samples, dim)``.
    """
    if not isinstance(rng, np.random.Generator):
        raise ValueError("rng must be a numpy.random.Generator")
    if int(n_samples) != n_samples or n_samples < 0:
        raise ValueError(f"n_samples must be a whole number >= 0, got {n_samples!r}")
    n_samples = int(n_samples)
    if covariance is not None and std is not None:
        raise ValueError("give at most one of covariance and std")
    if std is not None:
        sd = np.atleast_1d(np.asarray(std, dtype=float))
        if sd.ndim != 1 or not np.all(np.isfinite(sd)) or np.any(sd < 0):
            raise ValueError("std must be finite and >= 0 per dimension")
        cov = np.diag(sd**2)
    elif covariance is not None:
        c = np.asarray(covariance, dtype=float)
        if c.ndim == 0:
            c = c.reshape(1, 1)
        elif c.ndim == 1:
            c = np.diag(c)
        if c.ndim != 2 or c.shape[0] != c.shape[1] or not np.all(np.isfinite(c)):
            raise ValueError(f"covariance must be a finite square matrix, got shape {c.shape}")
        if not np.allclose(c, c.T, rtol=1e-10, atol=1e-12):
            raise ValueError("covariance must be symmetric")
        cov = c
    else:
        cov = np.eye(1 if dim is None else int(dim))
    if dim is not None and int(dim) != cov.shape[0]:
        if covariance is None and std is not None and sd.size == 1:
            cov = np.eye(int(dim)) * cov[0, 0]
        else:
            raise ValueError(f"dim must match the covariance size {cov.shape[0]}, got {dim!r}")
    L = _factor(cov)
    d = cov.shape[0]
    kernel = gaussian_kernel(dt, smoothness)
    half = (kernel.size - 1) // 2
    white = rng.standard_normal((n_samples + 2 * half, d))
    if half:
        smooth = fftconvolve(white, kernel[:, None], mode="valid", axes=0)
    else:
        smooth = white
    return smooth @ L.T


def gauss_markov_closure(order: int, smoothness: float) -> tuple[np.ndarray, float]:
    """Stationary linear model for the generalized coordinates of unit smooth noise.

    The state is ``(v, v', ..., v^(q))`` for ``q = order``; the lower rows are the Taylor chain
    ``d v^(j)/dt = v^(j+1)`` and the top row closes it with a stable linear SDE

        d v^(q)/dt = -sum_l a_l v^(l) + sqrt(c) * (unit white noise).

    The ``q + 2`` numbers ``a_0..a_q, c`` are fixed by two requirements: the stationary
    covariance (the solution of the Lyapunov equation ``M X + X M' + c e_q e_q' = 0``) equals
    ``S(s)`` of :func:`blanket.gcoords.temporal_covariance` (``q + 1`` linear conditions, one of
    which gives ``c``), and the spectral density at zero frequency ``c / a_0^2`` equals
    ``2 sqrt(pi) s``, the integral of ``rho(h) = exp(-h^2 / (4 s^2))``, so low-frequency power
    (and hence the white-noise limit) is kept. Among the roots the stable one (all eigenvalues of
    ``M`` in the left half plane) with ``c > 0`` is returned. Our construction: a finite Markov
    stand-in for the non-Markov Gaussian-correlated noise, so a Kalman-type recursion can carry
    its generalized coordinates; ``S(s)`` is from Friston 2008, PLoS Comput Biol, eq. 6.

    Parameters
    ----------
    order : int
        Highest derivative ``q`` in the state (0 gives the Ornstein-Uhlenbeck process with
        correlation time ``sqrt(pi) s``).
    smoothness : float
        ``s`` in seconds, > 0.

    Returns
    -------
    drift : numpy.ndarray
        Companion matrix ``M``, shape ``(q + 1, q + 1)``.
    intensity : float
        ``c``, the white-noise intensity driving the top order.
    """
    from scipy.linalg import null_space

    from blanket.gcoords import temporal_covariance

    if int(order) != order or not 0 <= order <= MAX_CLOSURE_ORDER:
        raise ValueError(f"order must be a whole number in [0, {MAX_CLOSURE_ORDER}], got {order!r}")
    q = int(order)
    s = _check_smoothness(smoothness)
    if s == 0:
        raise ValueError("smoothness must be > 0 seconds for a Markov closure, got 0")
    # Solve for s = 1 (time in units of s), then rescale: a_l ~ s^-(q+1-l), c ~ s^-(2q+1).
    S = temporal_covariance(q, 1.0)
    psd0 = 2.0 * np.sqrt(np.pi)
    if q == 0:
        a = np.array([2.0 / psd0])
        c = 2.0 * a[0]
    else:
        # Lyapunov rows (q, j) for j < q: sum_l a_l S[l, j] = S[q, j + 1].
        L = np.array([[S[l, j] for l in range(q + 1)] for j in range(q)])
        rhs = np.array([S[q, j + 1] for j in range(q)])
        a_part = np.linalg.lstsq(L, rhs, rcond=None)[0]
        a_null = null_space(L)[:, 0]
        # (q, q) entry: c = 2 a . S[:, q]; zero-frequency density: c = psd0 a_0^2.
        c0, c1 = 2.0 * a_part @ S[:, q], 2.0 * a_null @ S[:, q]
        roots = np.roots(
            [
                psd0 * a_null[0] ** 2,
                2.0 * psd0 * a_part[0] * a_null[0] - c1,
                psd0 * a_part[0] ** 2 - c0,
            ]
        )
        found = None
        for t in roots:
            if abs(np.imag(t)) > 1e-9 * max(1.0, abs(t)):
                continue
            cand = a_part + np.real(t) * a_null
            c_cand = c0 + c1 * np.real(t)
            poles = np.roots(np.concatenate([[1.0], cand[::-1]]))
            if c_cand > 1e-9 and np.max(poles.real) < -1e-9:
                found = (cand, float(c_cand))
                break
        if found is None:  # pragma: no cover - tested to exist for every allowed order
            raise ValueError(f"order {q} has no stable Markov closure")
        a, c = found
    a = a / s ** (q + 1 - np.arange(q + 1))
    c = c / s ** (2 * q + 1)
    M = np.eye(q + 1, k=1)
    M[q, :] = -a
    return M, float(c)
