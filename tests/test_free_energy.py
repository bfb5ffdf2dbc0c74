"""Tests of the Laplace free-energy kernels: values against scipy, gradients by finite
differences."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import chi2, multivariate_normal

from blanket import free_energy as fe


def _spd(rng, k):
    A = rng.standard_normal((k, k))
    return A @ A.T + k * np.eye(k)


def _fd_grad(f, x, h=1e-6):
    g = np.zeros_like(x)
    for i in range(x.size):
        d = np.zeros_like(x)
        d[i] = h
        g[i] = (f(x + d) - f(x - d)) / (2 * h)
    return g


def test_free_energy_is_negative_gaussian_log_density_up_to_constant():
    # F = 1/2 e'Pe - 1/2 ln|P| = -log N(e; 0, inv(P)) - k/2 ln(2 pi)  (scipy.stats reference)
    rng = np.random.default_rng(0)
    e1, P1 = rng.standard_normal(3), _spd(rng, 3)
    e2, P2 = rng.standard_normal(2), _spd(rng, 2)
    want = 0.0
    for e, P in [(e1, P1), (e2, P2)]:
        want += -multivariate_normal(np.zeros(e.size), np.linalg.inv(P)).logpdf(e)
        want -= 0.5 * e.size * np.log(2 * np.pi)
    assert fe.free_energy([e1, e2], [P1, P2]) == pytest.approx(want, rel=1e-10)


def test_free_energy_with_singular_precision_uses_pseudo_determinant():
    # scipy's singular Gaussian (allow_singular) uses the pseudo-inverse and pseudo-determinant
    # of the covariance: -logpdf = 1/2 (r ln 2pi + ln pdet(C) + e' C^+ e), C = P^+.
    rng = np.random.default_rng(1)
    V = np.linalg.qr(rng.standard_normal((3, 3)))[0]
    P = V @ np.diag([2.0, 0.5, 0.0]) @ V.T
    e = V[:, :2] @ np.array([0.3, -1.2])  # in the range of P
    ref = multivariate_normal(np.zeros(3), np.linalg.pinv(P), allow_singular=True)
    want = -ref.logpdf(e) - 0.5 * 2 * np.log(2 * np.pi)
    assert fe.free_energy([e], [P]) == pytest.approx(want, rel=1e-9)
    assert fe.log_pseudo_determinant(P) == pytest.approx(np.log(2.0 * 0.5), abs=1e-10)


def test_belief_gradient_and_curvature_match_finite_differences():
    rng = np.random.default_rng(2)
    n = 3
    W = rng.standard_normal((4, n))
    G = rng.standard_normal((2, n))
    y1, y2 = rng.standard_normal(4), rng.standard_normal(2)
    P1, P2 = _spd(rng, 4), _spd(rng, 2)

    def errors(mu):  # one nonlinear and one linear sensory error
        return [y1 - np.sin(W @ mu), y2 - G @ mu]

    def jacobians(mu):
        return [-(np.cos(W @ mu)[:, None] * W), -G]

    def F(mu):
        return fe.free_energy(errors(mu), [P1, P2])

    mu = rng.standard_normal(n)
    g = fe.belief_gradient(errors(mu), jacobians(mu), [P1, P2])
    np.testing.assert_allclose(g, _fd_grad(F, mu), rtol=1e-6, atol=1e-7)

    # curvature is exact for linear errors: compare with a finite-difference Hessian
    def F_lin(m):
        return fe.free_energy([y2 - G @ m], [P2])

    def grad_lin(m):
        return fe.belief_gradient([y2 - G @ m], [-G], [P2])

    H_fd = np.stack([_fd_grad(lambda m, i=i: grad_lin(m)[i], mu) for i in range(n)])
    np.testing.assert_allclose(fe.belief_curvature([-G], [P2]), H_fd, rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(grad_lin(mu), _fd_grad(F_lin, mu), rtol=1e-6, atol=1e-7)


def test_action_gradient_matches_finite_differences():
    rng = np.random.default_rng(3)
    dyda = rng.standard_normal((3, 2))  # sensations respond to action linearly
    target = rng.standard_normal(3)
    P = _spd(rng, 3)

    def F(a):
        return fe.free_energy([dyda @ a - target], [P])

    a = rng.standard_normal(2)
    g = fe.action_gradient([dyda @ a - target], [dyda], [P])
    np.testing.assert_allclose(g, _fd_grad(F, a), rtol=1e-6, atol=1e-7)


def test_log_precision_gradients_match_finite_differences():
    rng = np.random.default_rng(4)
    e = rng.standard_normal(4)
    base = _spd(rng, 4)
    l0 = 0.3
    got = fe.log_precision_gradient(e, np.exp(l0) * base)
    want = _fd_grad(lambda lv: fe.free_energy([e], [np.exp(lv[0]) * base]), np.array([l0]))[0]
    assert got == pytest.approx(want, rel=1e-6)
    # isotropic form 1/2 (exp(l) e'e - n)
    assert fe.log_precision_gradient(e, np.exp(l0) * np.eye(4)) == pytest.approx(
        0.5 * (np.exp(l0) * e @ e - 4)
    )
    # per-component, diagonal P = diag(exp(l))
    lv = rng.standard_normal(4)
    got_d = fe.log_precision_gradient_diagonal(e, np.exp(lv))
    want_d = _fd_grad(lambda l: fe.free_energy([e], [np.diag(np.exp(l))]), lv)
    np.testing.assert_allclose(got_d, want_d, rtol=1e-6, atol=1e-8)


def test_normalized_error_is_chi_square_and_threshold_matches_tables():
    # chi-square table values (from memory): chi2_0.95(1) = 3.841, chi2_0.99(2) = 9.210.
    assert fe.chi_square_threshold(1, 0.05) == pytest.approx(3.841, abs=1e-3)
    assert fe.chi_square_threshold(2, 0.01) == pytest.approx(9.210, abs=1e-3)
    rng = np.random.default_rng(5)
    P = _spd(rng, 3)
    L = np.linalg.cholesky(np.linalg.inv(P))
    stats = np.array([fe.normalized_error(L @ rng.standard_normal(3), P) for _ in range(20000)])
    assert stats.mean() == pytest.approx(3.0, rel=0.03)
    thr = fe.chi_square_threshold(3, 0.05)
    assert np.mean(stats > thr) == pytest.approx(0.05, abs=0.006)
    assert thr == pytest.approx(chi2.ppf(0.95, 3))


def test_bad_inputs_raise_value_error():
    with pytest.raises(ValueError, match="precisions"):
        fe.free_energy([np.zeros(2)], [np.eye(3)])
    with pytest.raises(ValueError, match="same length"):
        fe.free_energy([np.zeros(2)], [])
    with pytest.raises(ValueError, match="error_jacobians"):
        fe.belief_gradient([np.zeros(2)], [np.zeros((3, 2))], [np.eye(2)])
    with pytest.raises(ValueError, match="dof"):
        fe.chi_square_threshold(0)
    with pytest.raises(ValueError, match="false_alarm"):
        fe.chi_square_threshold(2, 1.5)


def test_diagonal_precision_vectors_equal_diagonal_matrices_and_match_finite_differences():
    # A precision given as a vector is the diagonal of a diagonal precision: every function
    # gives what it gives for np.diag(p). The gradient and Gauss-Newton curvature of a
    # linear error e = y - G mu are checked by central differences (common practice, no
    # source); a zero-precision component drops out of ln|P| (pseudo-determinant).
    rng = np.random.default_rng(7)
    n = 4
    G1, G2 = rng.standard_normal((3, n)), rng.standard_normal((2, n))
    y1, y2 = rng.standard_normal(3), rng.standard_normal(2)
    p = [rng.uniform(0.5, 3.0, 3), np.array([2.0, 0.0])]
    full = [np.diag(v) for v in p]

    def errors(mu):
        return [y1 - G1 @ mu, y2 - G2 @ mu]

    mu = rng.standard_normal(n)
    e, J = errors(mu), [-G1, -G2]
    assert fe.free_energy(e, p) == pytest.approx(fe.free_energy(e, full), rel=1e-12)
    assert fe.log_pseudo_determinant(p[1]) == pytest.approx(np.log(2.0))
    grad = fe.belief_gradient(e, J, p)
    np.testing.assert_allclose(grad, fe.belief_gradient(e, J, full), rtol=1e-12)
    np.testing.assert_allclose(fe.action_gradient(e, J, p), grad, rtol=1e-12)
    np.testing.assert_allclose(
        grad, _fd_grad(lambda m: fe.free_energy(errors(m), p), mu), rtol=1e-6, atol=1e-8
    )
    H = fe.belief_curvature(J, p)
    np.testing.assert_allclose(H, fe.belief_curvature(J, full), rtol=1e-12)
    fd_H = np.stack(
        [_fd_grad(lambda m, i=i: fe.belief_gradient(errors(m), J, p)[i], mu) for i in range(n)]
    )
    np.testing.assert_allclose(H, fd_H, rtol=1e-6, atol=1e-8)
    with pytest.raises(ValueError, match=r"precisions\[1\] must have shape \(2, 2\) or \(2,\)"):
        fe.free_energy(e, [p[0], np.ones(3)])
