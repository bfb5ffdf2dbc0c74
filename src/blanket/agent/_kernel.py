"""Compiled backend (numba) of the arm agent's step: the same numbers as the numpy form.

The perception step of :func:`blanket.agent.step.step` in two pure functions:

* :func:`perception_step` -- predict the belief by generalized motion, invert the prior
  covariance into the Laplace prior precision, and add every built-in term's
  precision-weighted prediction error to the gradient ``dF/dz`` and its ``G' P G`` to the
  curvature; then, without user terms, :func:`solve` in the same call;
* :func:`solve` -- the Gauss-Newton step ``Sigma = inv(H)``, ``z = z- - Sigma dF/dz``.

With user terms the step stops :func:`perception_step` after the assembly, adds the terms'
gradient and curvature in Python at the predicted belief, and calls :func:`solve`: the same
compiled solve follows. Results go to the
``*_out`` buffers; the equations are those of :mod:`blanket.agent.step` (checked equal there).

Buffer layouts: ``err`` (4n + 2) holds the errors of ``joint_angle | joint_velocity | motor |
goal | camera``; ``vec`` (2, N) the predicted belief ``z-`` and the gradient; ``work`` (N, 4N)
the curvature ``H`` and scratch; ``prior_precision_out`` (N, N) receives the prior
precision ``Pi- = inv(Sigma-)`` (read by :func:`motor_bias_update`). ``pm`` holds the
efference copy's precision per joint (learned, see :class:`blanket.agent.belief.ChannelMonitor`).
``constants = (nominal motor precision (<= 0:
no efference copy), goal precision, velocity gain kv, velocity limit of the belief, k, vmax,
lambda^2, k_null, weighting_on, velocity reading lag l)``; entries 4-8 are the attractor's
parameters, and the velocity encoder reads ``q' - l q''``
(:class:`blanket.agent.generative_model.EncoderChannel`).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from blanket.agent._linalg import spd_inverse
from blanket.agent.attractor import damped_least_squares_attractor
from blanket.description import compiled_pinhole_projection

OK = 0
PRIOR_NOT_PD = 1
CURVATURE_NOT_PD = 2
JACOBIAN_NOT_PD = 3
NOT_FINITE = 4
EXPLODED = 5

#: The camera model of :mod:`blanket.description`, compiled (the one the sensor uses).
pinhole_projection = compiled_pinhole_projection()


@njit(cache=True)
def solve(work, vec, n, energy, velocity_limit, z_out, cov_out, sd_out):  # pragma: no cover
    """Gauss-Newton step on the assembled free energy; returns a status.

    ``Sigma = inv(H)``, ``z = z- - Sigma dF/dz``, ``sd_out = sqrt(diag(Sigma))`` (for the logs).
    A belief velocity above ``velocity_limit`` returns ``EXPLODED``; a non-finite belief or
    energy ``NOT_FINITE``.
    """
    N = vec.shape[1]
    H = work[:, 0:N]
    L = work[:, N : 2 * N]
    Linv = work[:, 2 * N : 3 * N]
    zp = vec[0]
    grad = vec[1]
    if not spd_inverse(H, cov_out, L, Linv):
        return CURVATURE_NOT_PD
    vmax_belief = 0.0
    for i in range(N):
        s = 0.0
        for j in range(N):
            s += cov_out[i, j] * grad[j]
        z_out[i] = zp[i] - s
        sd_out[i] = np.sqrt(cov_out[i, i])
        if not np.isfinite(z_out[i]):
            return NOT_FINITE
        if n <= i < 2 * n and abs(z_out[i]) > vmax_belief:
            vmax_belief = abs(z_out[i])
    if not np.isfinite(energy):
        return NOT_FINITE
    if vmax_belief > velocity_limit:
        return EXPLODED
    return OK


@njit(cache=True)
def _motion_rows(phi_t, X, out, n):  # pragma: no cover - compiled
    """``out = (phi_t kron I_n) X``: the generalized motion applied to the rows of ``X``
    (order-major, ``n`` joints)."""
    p1 = phi_t.shape[0]
    for a in range(p1):
        for i in range(n):
            r = a * n + i
            for col in range(X.shape[1]):
                s = 0.0
                for c in range(p1):
                    s += phi_t[a, c] * X[c * n + i, col]
                out[r, col] = s


@njit(cache=True)
def perception_step(  # pragma: no cover - compiled
    z,
    cov,
    phi_t,
    W,
    yq,
    yv,
    command,
    pq,
    pv,
    pm,
    pc,
    tip,
    J,
    cam_on,
    ypx,
    target,
    target_velocity,
    home,
    camera_pose,
    intrinsics,
    limits,
    goal_mode,
    constants,
    cov_prior_out,
    prior_precision_out,
    f_out,
    F_out,
    gcam_out,
    err,
    vec,
    work,
    solve_now,
    z_out,
    cov_out,
    sd_out,
):
    """Prediction, prior precision and the built-in terms, then (``solve_now``) :func:`solve`.

    Returns ``(status, energy)``, ``energy`` the quadratic part ``sum 1/2 e' P e``. With
    ``solve_now`` False it stops after the assembly (the curvature in ``work[:, :N]``, the
    gradient in ``vec[1]``, ``z-`` in ``vec[0]``) so the caller can add terms and call
    :func:`solve`. ``goal_mode``: 0 no goal in the belief, 1 velocity attractor prior,
    2 acceleration attractor prior (torque control).
    """
    n = yq.shape[0]
    p1 = phi_t.shape[0]
    N = n * p1
    H = work[:, 0:N]
    L = work[:, N : 2 * N]
    Linv = work[:, 2 * N : 3 * N]
    T = work[:, 3 * N : 4 * N]
    zp = vec[0]
    grad = vec[1]
    err_q = err[0:n]
    err_v = err[n : 2 * n]
    err_m = err[2 * n : 3 * n]
    err_g = err[3 * n : 4 * n]
    err_c = err[4 * n : 4 * n + 2]
    motor_on = constants[0] > 0.0
    pg = constants[1]
    kv = constants[2]
    # -- prediction: z- = (phi kron I) z ; Sigma- = Phi Sigma Phi' + W
    for a in range(p1):
        for i in range(n):
            s = 0.0
            for c in range(p1):
                s += phi_t[a, c] * z[c * n + i]
            zp[a * n + i] = s
    _motion_rows(phi_t, cov, T, n)
    for row in range(N):
        for b in range(p1):
            for j in range(n):
                s = 0.0
                for d in range(p1):
                    s += T[row, d * n + j] * phi_t[b, d]
                cov_prior_out[row, b * n + j] = s + W[row, b * n + j]
    # -- Laplace prior precision Pi- = inv(Sigma-) (a copy for the motor bias)
    if not spd_inverse(cov_prior_out, H, L, Linv):
        return PRIOR_NOT_PD, 0.0
    for i in range(N):
        for j in range(N):
            prior_precision_out[i, j] = H[i, j]
    for i in range(N):
        grad[i] = 0.0
    energy = 0.0
    # -- encoders and efference copy (selections of orders 0 and 1; the velocity reading's
    # lag l adds -l on order 2: G_v = [0, I, -l I])
    lag = constants[9] if p1 > 2 else 0.0
    for i in range(n):
        e = yq[i] - zp[i]
        err_q[i] = e
        H[i, i] += pq[i]
        grad[i] -= pq[i] * e
        energy += 0.5 * pq[i] * e * e
        e = yv[i] - zp[n + i]
        if lag > 0.0:
            a2 = 2 * n + i
            e += lag * zp[a2]
            H[a2, a2] += lag * lag * pv[i]
            H[n + i, a2] -= lag * pv[i]
            H[a2, n + i] -= lag * pv[i]
            grad[a2] += lag * pv[i] * e
        err_v[i] = e
        H[n + i, n + i] += pv[i]
        grad[n + i] -= pv[i] * e
        energy += 0.5 * pv[i] * e * e
        if motor_on:
            e = command[i] - zp[n + i]
            err_m[i] = e
            H[n + i, n + i] += pm[i]
            grad[n + i] -= pm[i] * e
            energy += 0.5 * pm[i] * e * e
    # -- attractor f(q-) and F = df/dq (used by the goal prior and by the action)
    if not damped_least_squares_attractor(
        J, tip, target, target_velocity, zp[0:n], home, limits[0], limits[1], constants[4:9],
        f_out, F_out,
    ):  # fmt: skip
        return JACOBIAN_NOT_PD, 0.0
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
    # -- camera: pixel of the tool tip, G = d pixel / d tip . J
    if cam_on:
        pixel, dpix = pinhole_projection(
            camera_pose, intrinsics[0], intrinsics[1], intrinsics[2], intrinsics[3], tip
        )
        for r in range(2):
            for j in range(n):
                s = 0.0
                for c in range(3):
                    s += dpix[r, c] * J[c, j]
                gcam_out[r, j] = s
        err_c[0] = ypx[0] - pixel[0]
        err_c[1] = ypx[1] - pixel[1]
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
    if not solve_now:
        return OK, energy
    return solve(work, vec, n, energy, constants[3], z_out, cov_out, sd_out), energy


@njit(cache=True)
def encoder_noise_guard(  # pragma: no cover - compiled
    angle,
    velocity,
    expected_velocity_change,
    history,
    square,
    nominal,
    applied,
    weight,
    depart,
    back,
):
    """One step of the encoders' noise guard: update each joint's noise-variance estimate
    from its readings' differences and move the variance in force off the nominal one only
    on strong evidence of more noise. Returns whether a variance in force changed.

    Estimates (each sample is a difference of readings from which the motion cancels):

    * angles: the second difference ``d = y_k - 2 y_(k-1) + y_(k-2)`` of white noise of
      variance ``R`` has ``E[d^2] = 6 R`` (the variate difference method, Tintner 1940,
      *The Variate Difference Method*, from memory: the k-th difference has variance
      ``C(2k, k) R``); the motion adds ``dt^2 q''``, ~1e-4 rad at 240 Hz;
    * velocities: with ``expected_velocity_change`` finite (velocity control: the change of
      the applied command, which the motors make within a period) the first difference less
      it, ``E[d^2] = 2 R`` (von Neumann, Kent, Bellinson & Hart 1941, Ann Math Stat 12(2));
      else (torque control) the second difference, ``E[d^2] = 6 R``.

    ``square`` (2, n) holds the exponentially weighted mean of ``d^2 / c`` (``c`` 6 or 2)
    with weight ``weight`` per sample -- the sample form of covariance matching (Mehra 1970,
    IEEE Trans Autom Control 15(2), sec. IV; Myers & Tapley 1976, IEEE Trans Autom Control
    21(4), eq. 29); each sample is capped at 20 times the larger of the estimate and the
    nominal variance (an outlier guard, common practice, no source). The variance in force
    ``applied`` (2, n) leaves the ``nominal`` one when the estimate exceeds ``depart`` times
    it, then follows the estimate, and returns to the nominal one when the estimate falls
    below ``back`` times it (hysteresis, ``1 <= back <= depart``): the guard only ever
    lowers a precision; a reading less noisy than the nominal leaves it alone. It skips a
    change below 10 % (few recomputations).

    ``history`` (4, n): the last two angle readings and the last two velocity readings
    (NaN before the first), updated in place.
    """
    n = angle.shape[0]
    changed = False
    for j in range(n):
        for k in range(2):
            y = angle[j] if k == 0 else velocity[j]
            y1 = history[2 * k, j]
            y2 = history[2 * k + 1, j]
            history[2 * k + 1, j] = y1
            history[2 * k, j] = y
            if k == 1 and np.isfinite(expected_velocity_change[j]):
                if not np.isfinite(y1):
                    continue
                d = y - y1 - expected_velocity_change[j]
                sample = 0.5 * d * d
            else:
                if not (np.isfinite(y1) and np.isfinite(y2)):
                    continue
                d = y - 2.0 * y1 + y2
                sample = d * d / 6.0
            cap = 20.0 * max(square[k, j], nominal[k, j])
            if sample > cap:
                sample = cap
            square[k, j] += weight * (sample - square[k, j])
            est = square[k, j]
            now = applied[k, j]
            r0 = nominal[k, j]
            if now > r0:
                target = est if est > back * r0 else r0
            else:
                target = est if est > depart * r0 else r0
            if abs(target - now) > 0.1 * now:
                applied[k, j] = target
                changed = True
    return changed


@njit(cache=True)
def _product(A, B, out, transpose_a):  # pragma: no cover - compiled
    """``out = A B`` (``A' B`` with ``transpose_a``); ``out`` must not share memory with
    ``A`` or ``B``."""
    rows = A.shape[1] if transpose_a else A.shape[0]
    inner = A.shape[0] if transpose_a else A.shape[1]
    for i in range(rows):
        for j in range(B.shape[1]):
            s = 0.0
            for k in range(inner):
                s += (A[k, i] if transpose_a else A[i, k]) * B[k, j]
            out[i, j] = s


@njit(cache=True)
def motor_bias_predict(  # pragma: no cover - compiled
    phi_t, V, M, tracking, velocity_precision, velocity, travel_walk, window_rate, walk, W,
    V_prior, M_prior, A, scratch,
):  # fmt: skip
    """Prediction of the motors' tracking bias in two-stage form; returns False if not PD.

    The efference copy with a bias, ``a = q' + b + noise``, ``b`` a random walk per joint
    (variance ``walk`` (n,) per step), is the augmented-state filter of the belief ``z`` and
    ``b``, run in the two-stage form of Friedland (1969, "Treatment of bias in recursive
    filtering", IEEE Trans Autom Control 14(4), eqs. 20-26, from memory) extended to a random
    bias (Ignagni 1981, IEEE Trans Autom Control 26(3); Alouani, Xia, Rice & Blair 1993, IEEE
    Trans Autom Control 38(8)): the joint Gaussian of ``(z, b)`` is kept as ``b ~ N(b^, M)``
    and ``z | b ~ N(z^ + V (b - b^), P~)``, so the belief's marginal covariance is
    ``Sigma = P~ + V M V'`` (``V = Sigma_zb inv(M)`` the sensitivity of the belief to the
    bias). Over one step (``A = Phi V``, ``Phi = phi_t kron I_n``):

        M-      = M + diag(walk)
        V-      = Cov(z-, b-) inv(M-) = A M inv(M-)
        P~-     = Phi P~ Phi' + W + A (M - M inv(M-) M) A'

    and, since ``Phi Sigma Phi' = Phi P~ Phi' + A M A'``, the generalized motion of the
    marginal covariance gives ``P~-`` with the motion noise ``W - A M inv(M-) M A'``: ``W``
    is changed in place to that, ``V_prior``, ``M_prior`` and ``A`` (N, n) written;
    ``scratch`` (3, n, n).

    The walk's variance ``walk`` (n,) is written first (:class:`blanket.agent.belief.MotorBias`):
    ``travel_walk ||velocity|| + window_rate tracking`` per joint, the second part only where
    the tracking variance exceeds the velocity encoder's noise variance
    ``1 / velocity_precision``.
    """
    n = M.shape[0]
    N = V.shape[0]
    speed = 0.0
    for i in range(n):
        speed += velocity[i] * velocity[i]
    base = travel_walk * np.sqrt(speed)
    for i in range(n):
        walk[i] = base
        if tracking[i] * velocity_precision[i] > 1.0:
            walk[i] += window_rate * tracking[i]
    Minv = scratch[0]
    L = scratch[1]
    Linv = scratch[2]
    for i in range(n):
        for j in range(n):
            M_prior[i, j] = M[i, j]
        M_prior[i, i] += walk[i]
    if not spd_inverse(M_prior, Minv, L, Linv):
        return False
    _motion_rows(phi_t, V, A, n)  # A = Phi V
    # K = M inv(M-) (in L), V- = A K, and B = K M (in Linv; symmetric)
    _product(M, Minv, L, False)
    _product(L, M, Linv, False)
    _product(A, L, V_prior, False)
    # W -= (A B) A', (A B) in U's place: A itself is no longer needed after this
    for r in range(N):
        for j in range(n):
            s = 0.0
            for k in range(n):
                s += A[r, k] * Linv[k, j]
            Minv[0, j] = s  # inv(M-) is no longer needed: the row (A B)[r]
        for c in range(r + 1):  # W stays symmetric: the lower triangle, mirrored
            s = 0.0
            for k in range(n):
                s += Minv[0, k] * A[c, k]
            W[r, c] -= s
            if c != r:
                W[c, r] -= s
    return True


@njit(cache=True)
def motor_bias_update(  # pragma: no cover - compiled
    prior_precision, cov, z_prior, z_out, sd_out, pm, motor_error, V_prior, M_prior, b, V, M,
    U, scratch,
):  # fmt: skip
    """Update of the motors' tracking bias after the belief's step (two-stage form, see
    :func:`motor_bias_predict`); returns False if not PD.

    The belief's step gives the conditional posterior ``z | b``: curvature ``H`` with
    ``cov = inv(H) = P~`` and mean ``z_out`` at ``b = b^-`` (the efference copy was
    ``a - b^-``). The joint curvature of ``(z, b)`` at the prior mean has the blocks
    ``J_zz = H``, ``J_zb = -U``, ``U = Pi- V- - G_m' P_m`` (``G_m`` selects ``q'``, ``P_m =
    diag(pm)``), ``J_bb = inv(M-) + V-' Pi- V- + P_m``, and the gradient ``dF/db = -P_m e_m``
    (``e_m`` the efference copy's error). One Gauss-Newton step on the joint free energy by
    the Schur complement of ``H`` (Friedland 1969, eqs. 20-26; the information form of the
    augmented Kalman filter, Bar-Shalom, Li & Kirubarajan 2001, sec. 7.4, from memory):

        V      = P~ U                                  the belief's sensitivity to b
        inv(M) = inv(M-) + V-' Pi- V- + P_m - U' V     the bias's posterior covariance
        db     = M (P_m e_m + U' (z_out - z-))
        b^     = b^- + db ;   z_out += V db ;   cov += V M V'   (the marginal covariance)

    ``sd_out`` becomes ``sqrt(diag(cov))``. ``U`` (N, n) and ``scratch`` (3, n, n) are
    scratch; ``b``, ``V``, ``M`` are written.
    """
    n = M.shape[0]
    N = cov.shape[0]
    Jbb = scratch[0]
    L = scratch[1]
    Linv = scratch[2]
    # U = Pi- V- - G_m' P_m ; Jbb = V-' Pi- V- + P_m + inv(M-)
    _product(prior_precision, V_prior, U, False)
    _product(V_prior, U, Jbb, True)
    for i in range(n):
        Jbb[i, i] += pm[i]
        U[n + i, i] -= pm[i]
    if not spd_inverse(M_prior, M, L, Linv):
        return False
    for i in range(n):
        for j in range(n):
            Jbb[i, j] += M[i, j]
    # V = P~ U ; inv(M) = Jbb - U' V (symmetrised)
    _product(cov, U, V, False)
    _product(U, V, L, True)
    for i in range(n):
        for j in range(i + 1):
            s = 0.5 * (Jbb[i, j] + Jbb[j, i] - L[i, j] - L[j, i])
            Jbb[i, j] = s
            Jbb[j, i] = s
    if not spd_inverse(Jbb, M, L, Linv):
        return False
    # db = M (P_m e_m + U' (z_out - z-)): the right side in L[0], db in Linv[0]
    for j in range(n):
        s = pm[j] * motor_error[j]
        for k in range(N):
            s += U[k, j] * (z_out[k] - z_prior[k])
        L[0, j] = s
    for i in range(n):
        s = 0.0
        for j in range(n):
            s += M[i, j] * L[0, j]
        Linv[0, i] = s
        b[i] += s
    for r in range(N):
        s = 0.0
        for j in range(n):
            s += V[r, j] * Linv[0, j]
        z_out[r] += s
    # cov += (V M) V', V M in U's place
    _product(V, M, U, False)
    for r in range(N):
        for c in range(r + 1):
            s = 0.0
            for k in range(n):
                s += U[r, k] * V[c, k]
            cov[r, c] += s
            if c != r:
                cov[c, r] += s
        sd_out[r] = np.sqrt(cov[r, r])
    return True
