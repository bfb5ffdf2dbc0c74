"""Small dense linear algebra for the compiled kernels (numba): Cholesky and SPD inverse."""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["cholesky", "spd_inverse"]


@njit(cache=True)
def cholesky(A, L):  # pragma: no cover - compiled
    """Lower Cholesky factor of SPD ``A`` into ``L``; False if ``A`` is not PD.

    The Cholesky-Banachiewicz order (Golub & Van Loan 2013, *Matrix Computations*, 4th ed.,
    alg. 4.2.1, row by row).
    """
    m = A.shape[0]
    for i in range(m):
        for j in range(i + 1):
            s = A[i, j]
            for k in range(j):
                s -= L[i, k] * L[j, k]
            if i == j:
                if s <= 0.0 or not np.isfinite(s):
                    return False
                L[i, i] = np.sqrt(s)
            else:
                L[i, j] = s / L[j, j]
        for j in range(i + 1, m):
            L[i, j] = 0.0
    return True


@njit(cache=True)
def spd_inverse(A, out, L, Linv):  # pragma: no cover - compiled
    """``out = inv(A)`` for SPD ``A`` via Cholesky, ``inv(A) = inv(L)' inv(L)``; False if
    ``A`` is not PD. ``L`` and ``Linv`` are scratch of ``A``'s shape."""
    m = A.shape[0]
    if not cholesky(A, L):
        return False
    for i in range(m):
        Linv[i, i] = 1.0 / L[i, i]
        for j in range(i):
            s = 0.0
            for k in range(j, i):
                s -= L[i, k] * Linv[k, j]
            Linv[i, j] = s / L[i, i]
        for j in range(i + 1, m):
            Linv[i, j] = 0.0
    for i in range(m):
        for j in range(i + 1):
            s = 0.0
            for k in range(i, m):
                s += Linv[k, i] * Linv[k, j]
            out[i, j] = s
            out[j, i] = s
    return True
