"""The goal's attractor: a damped least-squares joint velocity towards the target (pure).

Both functions are pure and compile with numba: the agent's kernel and its numpy step call
the same compiled code, so the attractor is written once.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from blanket.agent._linalg import spd_inverse

__all__ = ["joint_limit_weights", "damped_least_squares_attractor"]


def joint_limit_weights(q: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """Inverse weights ``1 / w_i`` of the weighted least-norm solution near joint limits.

    ``w_i = 1 + |dH/dq_i|`` with the joint-limit criterion
    ``H = sum (u - l)^2 / (4 (u - q)(q - l))``, so
    ``dH/dq_i = (u - l)^2 (2 q - u - l) / (4 (u - q)^2 (q - l)^2)`` (Chan & Dubey 1995, "A
    weighted least-norm solution based scheme for avoiding joint limits for redundant joint
    manipulators", IEEE Trans Robot Autom 11(2), eqs. 9-11; without their direction test, so
    a joint near a limit is slowed whichever way it moves). Joints without finite limits get
    weight 1; the distance to a limit is floored at 1 mrad.
    """
    span = upper - lower
    du = np.maximum(upper - q, 1e-3)
    dl = np.maximum(q - lower, 1e-3)
    w = 1.0 + np.abs(span * span * (du - dl) / (4.0 * du * du * dl * dl))
    out = np.ones_like(w)
    finite = np.isfinite(w)
    out[finite] = 1.0 / w[finite]
    return out


_joint_limit_weights = njit(cache=True)(joint_limit_weights)


@njit(cache=True)
def damped_least_squares_attractor(  # pragma: no cover - compiled
    J, tip, target, target_velocity, q, home, lower, upper, params, f_out, F_out
):
    """Joint velocity the goal asks for, ``f(q)``, and its Jacobian ``F = df/dq``.

    ``f(q) = J+ sat(k (x* - x) + x*') + k_null (I - J+ J)(q_home - q)`` with the weighted
    damped least-squares inverse ``J+ = W^-1 J' inv(J W^-1 J' + lambda^2 I)`` (Wampler 1986,
    IEEE Trans SMC 16(1), eq. 7; Nakamura & Hanafusa 1986, J Dyn Syst Meas Control 108; the
    weights ``W^-1`` of :func:`joint_limit_weights` after Chan & Dubey 1995, or ``I``).
    ``sat`` scales the task velocity down to at most ``vmax``. The Jacobian ignores the
    derivatives of ``J`` and ``W`` (Gauss-Newton): ``F = -k s J+ J - k_null (I - J+ J)``.

    ``params = (k, vmax, lambda^2, k_null, weighting_on)``; ``J`` (3, n) and ``tip`` (3,) are
    the tip Jacobian and position at ``q``. Writes ``f_out`` (n,) and ``F_out`` (n, n);
    returns False (outputs untouched) when ``J W^-1 J' + lambda^2 I`` is not positive definite.
    """
    n = q.shape[0]
    k = params[0]
    vmax = params[1]
    lam2 = params[2]
    kn = params[3]
    if params[4] > 0.0:
        winv = _joint_limit_weights(q, lower, upper)
    else:
        winv = np.ones(n)
    A3 = np.empty((3, 3))
    for r in range(3):
        for c in range(3):
            s = 0.0
            for j in range(n):
                s += J[r, j] * winv[j] * J[c, j]
            A3[r, c] = s
        A3[r, r] += lam2
    I3 = np.empty((3, 3))
    if not spd_inverse(A3, I3, np.empty((3, 3)), np.empty((3, 3))):
        return False
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
    for i in range(n):
        fi = 0.0
        for c in range(3):
            fi += Jp[i, c] * vel[c] * scale
        for j in range(n):
            s = 0.0
            for c in range(3):
                s += Jp[i, c] * J[c, j]
            nullij = (1.0 if i == j else 0.0) - s
            fi += kn * nullij * (home[j] - q[j])
            F_out[i, j] = -k * scale * s - kn * nullij
        f_out[i] = fi
    return True
