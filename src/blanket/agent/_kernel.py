"""Compiled kernel of the arm agent's perception step (numba).

:func:`perception_step` performs, in one call, exactly the computation documented in
:mod:`blanket.agent.arm`: the prediction of the belief by generalized motion, the Laplace
prior precision, the precision-weighted prediction errors of every built-in term, and one
Gauss-Newton step on the free energy. It is a pure function of its array arguments (results
go to the ``*_out`` buffers) and is checked against the numpy implementation in the tests.
"""

from __future__ import annotations

import numpy as np
from numba import njit

OK = 0
PRIOR_NOT_PD = 1
CURVATURE_NOT_PD = 2
JACOBIAN_NOT_PD = 3
NOT_FINITE = 4
EXPLODED = 5


@njit(cache=True)
def _cholesky(A, L):  # pragma: no cover - compiled
    """Lower Cholesky factor of SPD ``A`` into ``L``; False if ``A`` is not PD."""
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
def _spd_inverse(A, out, L, Linv):  # pragma: no cover - compiled
    """``out = inv(A)`` for SPD ``A`` via Cholesky; False if ``A`` is not PD."""
    m = A.shape[0]
    if not _cholesky(A, L):
        return False
    # Linv = inv(L), lower triangular
    for i in range(m):
        Linv[i, i] = 1.0 / L[i, i]
        for j in range(i):
            s = 0.0
            for k in range(j, i):
                s -= L[i, k] * Linv[k, j]
            Linv[i, j] = s / L[i, i]
        for j in range(i + 1, m):
            Linv[i, j] = 0.0
    # inv(A) = Linv' Linv
    for i in range(m):
        for j in range(i + 1):
            s = 0.0
            for k in range(i, m):
                s += Linv[k, i] * Linv[k, j]
            out[i, j] = s
            out[j, i] = s
    return True


@njit(cache=True)
def perception_step(  # pragma: no cover - compiled
    z,
    cov,
    phi_t,
    W,
    yq,
    yv,
    a_prev,
    pq,
    pv,
    pm,
    tip,
    J,
    cam_on,
    ypx,
    R,
    t,
    intrinsics,
    pc,
    target,
    target_velocity,
    home,
    attractor_params,
    lower,
    upper,
    goal_mode,
    pg,
    kv,
    z_out,
    cov_out,
    cov_prior_out,
    f_out,
    F_out,
    gcam_out,
    err_q,
    err_v,
    err_m,
    err_c,
    err_g,
    sd_out,
    work,
    velocity_limit,
):
    """One perception step; returns ``(status, quadratic_energy)``.

    ``goal_mode``: 0 no goal in the belief, 1 velocity attractor prior, 2 acceleration
    attractor prior (torque control).
    ``attractor_params = (k, vmax, lambda^2, k_null, weighting_on)``.
    ``intrinsics = (fx, fy, cx, cy)``. ``pm <= 0`` disables the efference-copy term.
    ``sd_out`` receives the posterior standard deviations ``sqrt(diag(cov_out))`` (for the
    logs). ``work`` is an (N, 4N) scratch buffer. A belief velocity above ``velocity_limit`` returns
    ``EXPLODED``; a non-finite belief or energy ``NOT_FINITE``.
    """
    n = yq.shape[0]
    p1 = phi_t.shape[0]
    N = n * p1
    H = work[:, 0:N]
    L = work[:, N : 2 * N]
    Linv = work[:, 2 * N : 3 * N]
    T = work[:, 3 * N : 4 * N]
    # -- prediction: z- = (phi kron I) z ; Sigma- = Phi Sigma Phi' + W
    zp = np.empty(N)
    for a in range(p1):
        for i in range(n):
            s = 0.0
            for c in range(p1):
                s += phi_t[a, c] * z[c * n + i]
            zp[a * n + i] = s
    for a in range(p1):
        for i in range(n):
            r = a * n + i
            for col in range(N):
                s = 0.0
                for c in range(p1):
                    s += phi_t[a, c] * cov[c * n + i, col]
                T[r, col] = s
    for row in range(N):
        for b in range(p1):
            for j in range(n):
                s = 0.0
                for d in range(p1):
                    s += T[row, d * n + j] * phi_t[b, d]
                cov_prior_out[row, b * n + j] = s + W[row, b * n + j]
    if not _spd_inverse(cov_prior_out, H, L, Linv):
        return PRIOR_NOT_PD, 0.0
    grad = np.zeros(N)
    energy = 0.0
    # -- encoders and efference copy (selections of orders 0 and 1)
    for i in range(n):
        e = yq[i] - zp[i]
        err_q[i] = e
        H[i, i] += pq[i]
        grad[i] -= pq[i] * e
        energy += 0.5 * pq[i] * e * e
        e = yv[i] - zp[n + i]
        err_v[i] = e
        H[n + i, n + i] += pv[i]
        grad[n + i] -= pv[i] * e
        energy += 0.5 * pv[i] * e * e
        if pm > 0.0:
            e = a_prev[i] - zp[n + i]
            err_m[i] = e
            H[n + i, n + i] += pm
            grad[n + i] -= pm * e
            energy += 0.5 * pm * e * e
    # -- attractor: f = J+ k sat(x* - x) + k_null (I - J+ J)(home - q), F = df/dq (Gauss-Newton)
    k = attractor_params[0]
    vmax = attractor_params[1]
    lam2 = attractor_params[2]
    kn = attractor_params[3]
    winv = np.ones(n)
    if attractor_params[4] > 0.0:
        # weighted least norm near joint limits (see blanket.agent.arm.joint_limit_weights)
        for j in range(n):
            span = upper[j] - lower[j]
            du = max(upper[j] - zp[j], 1e-3)
            dl = max(zp[j] - lower[j], 1e-3)
            w = 1.0 + abs(span * span * (du - dl) / (4.0 * du * du * dl * dl))
            if np.isfinite(w):
                winv[j] = 1.0 / w
    A3 = np.empty((3, 3))
    for r in range(3):
        for c in range(3):
            s = 0.0
            for j in range(n):
                s += J[r, j] * winv[j] * J[c, j]
            A3[r, c] = s
        A3[r, r] += lam2
    L3 = np.empty((3, 3))
    I3 = np.empty((3, 3))
    Li3 = np.empty((3, 3))
    if not _spd_inverse(A3, I3, L3, Li3):
        return JACOBIAN_NOT_PD, 0.0
    vel = np.empty(3)
    speed2 = 0.0
    for r in range(3):
        vel[r] = k * (target[r] - tip[r]) + target_velocity[r]
        speed2 += vel[r] * vel[r]
    scale = 1.0
    speed = np.sqrt(speed2)
    if speed > vmax:
        scale = vmax / speed
    Jp = np.empty((n, 3))
    for j in range(n):
        for c in range(3):
            s = 0.0
            for r in range(3):
                s += J[r, j] * I3[r, c]
            Jp[j, c] = winv[j] * s
    dq_home = np.empty(n)
    for j in range(n):
        dq_home[j] = home[j] - zp[j]
    for i in range(n):
        fi = 0.0
        for c in range(3):
            fi += Jp[i, c] * vel[c] * scale
        for j in range(n):
            s = 0.0
            for c in range(3):
                s += Jp[i, c] * J[c, j]
            nullij = (1.0 if i == j else 0.0) - s
            fi += kn * nullij * dq_home[j]
            F_out[i, j] = -k * scale * s - kn * nullij
        f_out[i] = fi
    # -- goal as prior dynamics
    if goal_mode == 1:
        for i in range(n):
            e = f_out[i] - zp[n + i]
            err_g[i] = e
            energy += 0.5 * pg * e * e
            grad[n + i] -= pg * e
            for j in range(n):
                grad[j] += pg * F_out[i, j] * e
        for i in range(n):
            H[n + i, n + i] += pg
            for j in range(n):
                s = 0.0
                for r in range(n):
                    s += F_out[r, i] * F_out[r, j]
                H[i, j] += pg * s
                H[i, n + j] -= pg * F_out[j, i]
                H[n + i, j] -= pg * F_out[i, j]
    elif goal_mode == 2:
        s2 = 2 * n
        for i in range(n):
            e = kv * (f_out[i] - zp[n + i]) - zp[s2 + i]
            err_g[i] = e
            energy += 0.5 * pg * e * e
            grad[n + i] -= pg * kv * e
            grad[s2 + i] -= pg * e
            for j in range(n):
                grad[j] += pg * kv * F_out[i, j] * e
        kk = pg * kv * kv
        for i in range(n):
            H[n + i, n + i] += kk
            H[s2 + i, s2 + i] += pg
            H[n + i, s2 + i] += pg * kv
            H[s2 + i, n + i] += pg * kv
            for j in range(n):
                s = 0.0
                for r in range(n):
                    s += F_out[r, i] * F_out[r, j]
                H[i, j] += kk * s
                H[i, n + j] -= kk * F_out[j, i]
                H[n + i, j] -= kk * F_out[i, j]
                H[i, s2 + j] -= pg * kv * F_out[j, i]
                H[s2 + i, j] -= pg * kv * F_out[i, j]
    # -- camera: pixel of the tool tip
    if cam_on:
        pcam = np.empty(3)
        for r in range(3):
            s = 0.0
            for c in range(3):
                s += R[c, r] * (tip[c] - t[c])
            pcam[r] = s
        iz = 1.0 / pcam[2]
        fx = intrinsics[0]
        fy = intrinsics[1]
        u = fx * pcam[0] * iz + intrinsics[2]
        vv = fy * pcam[1] * iz + intrinsics[3]
        d = np.zeros((2, 3))
        d[0, 0] = fx * iz
        d[0, 2] = -fx * pcam[0] * iz * iz
        d[1, 1] = fy * iz
        d[1, 2] = -fy * pcam[1] * iz * iz
        # dpix/dtip = d R'
        dR = np.empty((2, 3))
        for r in range(2):
            for c in range(3):
                s = 0.0
                for m in range(3):
                    s += d[r, m] * R[c, m]
                dR[r, c] = s
        for r in range(2):
            for j in range(n):
                s = 0.0
                for c in range(3):
                    s += dR[r, c] * J[c, j]
                gcam_out[r, j] = s
        err_c[0] = ypx[0] - u
        err_c[1] = ypx[1] - vv
        for r in range(2):
            energy += 0.5 * pc[r] * err_c[r] * err_c[r]
            for j in range(n):
                grad[j] -= gcam_out[r, j] * pc[r] * err_c[r]
        for i in range(n):
            for j in range(n):
                s = 0.0
                for r in range(2):
                    s += gcam_out[r, i] * pc[r] * gcam_out[r, j]
                H[i, j] += s
    # -- Gauss-Newton step: Sigma = inv(H); z = z- - Sigma grad
    if not _spd_inverse(H, cov_out, L, Linv):
        return CURVATURE_NOT_PD, energy
    vmax_belief = 0.0
    for i in range(N):
        s = 0.0
        for j in range(N):
            s += cov_out[i, j] * grad[j]
        z_out[i] = zp[i] - s
        sd_out[i] = np.sqrt(cov_out[i, i])
        if not np.isfinite(z_out[i]):
            return NOT_FINITE, energy
        if n <= i < 2 * n and abs(z_out[i]) > vmax_belief:
            vmax_belief = abs(z_out[i])
    if not np.isfinite(energy):
        return NOT_FINITE, energy
    if vmax_belief > velocity_limit:
        return EXPLODED, energy
    return OK, energy
