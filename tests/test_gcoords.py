"""Tests of the generalized-coordinates core against closed forms and scipy."""

from __future__ import annotations

from math import factorial

import numpy as np
import pytest
from scipy.linalg import expm
from scipy.special import eval_hermitenorm

from blanket import gcoords


def test_shift_operator_moves_each_order_up_one():
    order, n = 3, 2
    mu = np.arange(1.0, 1.0 + (order + 1) * n).reshape(order + 1, n)
    D = gcoords.shift_operator(order, n)
    shifted = (D @ mu.ravel()).reshape(order + 1, n)
    np.testing.assert_array_equal(shifted[:-1], mu[1:])
    np.testing.assert_array_equal(shifted[-1], 0.0)


@pytest.mark.parametrize("s", [0.02, 0.1, 0.7])
def test_temporal_covariance_matches_gaussian_derivatives_via_hermite(s):
    # rho(h) = exp(-h^2 / (2 sigma^2)) with sigma^2 = 2 s^2; its n-th derivative at zero is
    # sigma^-n He_n(0) (Rodrigues' formula d^n/dx^n exp(-x^2/2) = (-1)^n He_n(x) exp(-x^2/2)),
    # He the probabilists' Hermite polynomial with He_2k(0) = (-1)^k (2k-1)!! (Abramowitz &
    # Stegun, Handbook of Mathematical Functions, ch. 22; equation numbers from memory: 22.2.15,
    # 22.5). scipy.special.eval_hermitenorm gives He_n independently of blanket.
    order = 6
    sigma = np.sqrt(2.0) * s
    S = gcoords.temporal_covariance(order, s)
    for i in range(order + 1):
        for j in range(order + 1):
            k = i + j
            expected = (-1) ** i * eval_hermitenorm(k, 0.0) / sigma**k if k % 2 == 0 else 0.0
            assert S[i, j] == pytest.approx(expected, rel=1e-12, abs=1e-300)
    # double-factorial form spelled out for the diagonal: S_kk = (2k-1)!! / sigma^(2k)
    for k in range(order + 1):
        dfact = factorial(2 * k) / (2**k * factorial(k))
        assert S[k, k] == pytest.approx(dfact / sigma ** (2 * k), rel=1e-12)


def test_temporal_covariance_is_symmetric_positive_definite():
    S = gcoords.temporal_covariance(5, 0.3)
    np.testing.assert_allclose(S, S.T)
    assert np.min(np.linalg.eigvalsh(S)) > 0


def test_temporal_precision_small_smoothness_limit():
    # Low orders: for order <= 1, S is diagonal and the precision tends to diag(1, 0) = s=0 value.
    for s in [1e-2, 1e-3, 1e-4]:
        P = gcoords.temporal_precision(1, s)
        np.testing.assert_allclose(P, np.diag([1.0, 2 * s * s]), rtol=1e-12)
    np.testing.assert_allclose(
        gcoords.temporal_precision(1, 1e-6), gcoords.temporal_precision(1, 0.0), atol=1e-10
    )
    # Higher orders: S(s) = D_s S(1) D_s with D_s = diag(s^-j), so inv(S(s))_ij scales as
    # s^(i + j) -> 0 for every entry except (0, 0), which keeps the s-independent value
    # inv(S(1))_00 (the order-0 precision conditional on the higher orders).
    P1 = gcoords.temporal_precision(4, 1.0)
    for s in [1e-1, 1e-2, 1e-3]:
        P = gcoords.temporal_precision(4, s)
        scale = s ** np.add.outer(np.arange(5), np.arange(5))
        np.testing.assert_allclose(P, P1 * scale, rtol=1e-8, atol=1e-300)
    assert gcoords.temporal_precision(4, 0.0)[1:, :].max() == 0.0


@pytest.mark.parametrize("window_extra", [0, 4])
def test_embedding_is_exact_for_polynomials(window_extra):
    order, dt = 3, 0.05
    coeffs = np.array([0.7, -1.3, 0.4, 2.0])  # y(t) = sum c_k t^k
    window = order + 1 + window_extra
    t_now = 1.1
    t = t_now - dt * np.arange(window - 1, -1, -1)
    y = np.polyval(coeffs[::-1], t)
    got = gcoords.embed(y, order, dt)
    poly = np.polynomial.Polynomial(coeffs)
    want = [poly.deriv(k)(t_now) if k else poly(t_now) for k in range(order + 1)]
    np.testing.assert_allclose(got, want, rtol=1e-8, atol=1e-8)


def test_local_linearisation_step_is_exact_for_linear_ode():
    # x' = J x has the exact solution x(t + dt) = expm(J dt) x(t) (scipy.linalg.expm).
    J = np.array([[-0.3, 2.0, 0.0], [-2.0, -0.3, 0.5], [0.0, 0.0, -1.0]])
    x = np.array([1.0, -0.5, 2.0])
    dt = 0.37
    dx = gcoords.local_linearisation_step(J @ x, J, dt)
    np.testing.assert_allclose(x + dx, expm(J * dt) @ x, rtol=1e-12, atol=1e-12)
    # singular Jacobian (pure integrator) is fine: x' = c gives x + c dt
    dx = gcoords.local_linearisation_step(np.array([0.4]), np.zeros((1, 1)), dt)
    np.testing.assert_allclose(dx, [0.4 * dt])


def test_local_linearisation_stays_stable_where_euler_diverges():
    # Stiff x' = -k x with k dt = 3 > 2: forward Euler multiplies by |1 - k dt| = 2 per step and
    # diverges; the exact factor is exp(-k dt) (common practice, no source).
    k, dt = 300.0, 0.01
    J = np.array([[-k]])
    x_euler = np.array([1.0])
    x_ll = np.array([1.0])
    for _ in range(40):
        x_euler = x_euler + gcoords.euler_step(J @ x_euler, dt)
        x_ll = x_ll + gcoords.local_linearisation_step(J @ x_ll, J, dt)
    assert abs(x_euler[0]) > 1e10
    assert x_ll[0] == pytest.approx(np.exp(-k * dt * 40), rel=1e-9, abs=1e-300)
    assert abs(x_ll[0]) < 1e-40


def test_generalized_precision_is_kron_of_temporal_and_spatial():
    P0 = np.array([[2.0, 0.3], [0.3, 1.0]])
    G = gcoords.generalized_precision(P0, 2, 0.2)
    np.testing.assert_allclose(G, np.kron(np.linalg.inv(gcoords.temporal_covariance(2, 0.2)), P0))


def test_bad_inputs_raise_value_error():
    with pytest.raises(ValueError, match="smoothness"):
        gcoords.temporal_covariance(2, -0.1)
    with pytest.raises(ValueError, match="order"):
        gcoords.shift_operator(-1)
    with pytest.raises(ValueError, match="window"):
        gcoords.embedding_matrix(3, 2, 0.1)
