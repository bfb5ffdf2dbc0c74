"""Tests of the smooth-noise generator and the Gauss-Markov closure."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.linalg import solve_continuous_lyapunov
from scipy.special import erf

from blanket import gcoords, noise


def test_autocorrelation_matches_gaussian_convention():
    # Gaussian kernel of std s convolved with itself is a Gaussian of variance 2 s^2, so the
    # autocorrelation is exp(-h^2 / (4 s^2)) (common practice, no source).
    rng = np.random.default_rng(3)
    dt, s = 0.01, 0.05
    x = noise.smooth_noise(rng, 300_000, dt, s)[:, 0]
    x = x - x.mean()
    var = x @ x / x.size
    for lag in [0, 2, 5, 10, 15, 20]:
        emp = (x[: x.size - lag] @ x[lag:]) / (x.size - lag) / var
        assert emp == pytest.approx(np.exp(-((lag * dt) ** 2) / (4 * s * s)), abs=0.02)


def test_marginal_covariance_is_the_nominal_one():
    rng = np.random.default_rng(4)
    cov = np.array([[2.0, 0.6], [0.6, 0.5]])
    x = noise.smooth_noise(rng, 200_000, 0.01, 0.03, covariance=cov)
    assert x.shape == (200_000, 2)
    np.testing.assert_allclose(np.cov(x.T), cov, rtol=0.05, atol=0.03)
    sd = noise.smooth_noise(rng, 100_000, 0.01, 0.0, std=[0.5, 3.0])
    np.testing.assert_allclose(sd.std(axis=0), [0.5, 3.0], rtol=0.02)


def test_zero_smoothness_is_white():
    x = noise.smooth_noise(np.random.default_rng(5), 100_000, 0.01, 0.0)[:, 0]
    assert abs(np.corrcoef(x[:-1], x[1:])[0, 1]) < 0.01


def test_no_edge_effects():
    # Every sample, including the first and last, has the nominal variance: the white noise is
    # padded by the kernel half-width and only fully convolved samples are kept.
    rng = np.random.default_rng(6)
    runs = np.stack([noise.smooth_noise(rng, 40, 0.01, 0.05)[:, 0] for _ in range(3000)])
    for idx in [0, 20, 39]:
        assert np.var(runs[:, idx]) == pytest.approx(1.0, abs=0.08)


def test_finite_difference_covariance_matches_temporal_covariance():
    # The covariance of (x, x', x'') of the sampled process, by central differences, against
    # S(s) of gcoords (Friston 2008, PLoS Comput Biol, eq. 6). Difference error ~ (dt / s)^2.
    rng = np.random.default_rng(7)
    dt, s = 0.004, 0.08
    x = noise.smooth_noise(rng, 400_000, dt, s)[:, 0]
    d0 = x[1:-1]
    d1 = (x[2:] - x[:-2]) / (2 * dt)
    d2 = (x[2:] - 2 * x[1:-1] + x[:-2]) / dt**2
    emp = np.cov(np.stack([d0, d1, d2]))
    S = gcoords.temporal_covariance(2, s)
    scale = np.sqrt(np.outer(np.diag(S), np.diag(S)))
    np.testing.assert_allclose(emp / scale, S / scale, atol=0.05)
    assert emp[1, 1] == pytest.approx(S[1, 1], rel=0.05)
    assert emp[2, 2] == pytest.approx(S[2, 2], rel=0.05)
    assert emp[0, 2] == pytest.approx(S[0, 2], rel=0.05)


def test_intensity_conversion_keeps_low_frequency_power():
    # Var(int_0^L w) = V int int rho(t - t') = 2 V [sqrt(pi) s L erf(L / 2s) - 2 s^2 (1 -
    # exp(-L^2 / 4 s^2))] (direct integration; common practice, no source). With
    # V = Q / (2 sqrt(pi) s) it tends to Q L, the white-noise value, for L >> s.
    Q, s, dt, L = 0.8, 0.05, 0.005, 1.0
    V = float(noise.smooth_variance_from_intensity(Q, s))
    exact = (
        2
        * V
        * (
            np.sqrt(np.pi) * s * L * erf(L / (2 * s))
            - 2 * s * s * (1 - np.exp(-(L**2) / (4 * s * s)))
        )
    )
    assert exact == pytest.approx(Q * L, rel=0.06)
    rng = np.random.default_rng(8)
    n = int(round(L / dt))
    w = noise.smooth_noise(rng, 4000 * n, dt, s, covariance=V)[:, 0].reshape(4000, n)
    integrals = w.sum(axis=1) * dt
    assert np.var(integrals) == pytest.approx(exact, rel=0.08)


@pytest.mark.parametrize("order", range(noise.MAX_CLOSURE_ORDER + 1))
def test_gauss_markov_closure_is_stationary_with_covariance_S(order):
    s = 0.3
    M, c = noise.gauss_markov_closure(order, s)
    assert np.max(np.linalg.eigvals(M).real) < 0
    G = np.zeros_like(M)
    G[-1, -1] = c
    # stationary covariance: solve M X + X M' + G = 0 with scipy (Lyapunov equation)
    X = solve_continuous_lyapunov(M, -G)
    S = gcoords.temporal_covariance(order, s)
    scale = np.sqrt(np.outer(np.diag(S), np.diag(S)))
    np.testing.assert_allclose(X / scale, S / scale, atol=1e-6)
    # zero-frequency spectral density of v: c / a_0^2 = integral of rho = 2 sqrt(pi) s
    a0 = -M[-1, 0]
    integral = quad(lambda h: np.exp(-(h**2) / (4 * s * s)), -np.inf, np.inf)[0]
    assert c / a0**2 == pytest.approx(integral, rel=1e-9)


def test_bad_inputs_raise_value_error():
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match="smoothness"):
        noise.smooth_noise(rng, 10, 0.01, -1.0)
    with pytest.raises(ValueError, match="dt"):
        noise.smooth_noise(rng, 10, 0.0, 0.1)
    with pytest.raises(ValueError, match="covariance"):
        noise.smooth_noise(rng, 10, 0.01, 0.1, covariance=[[1.0, 0.0], [0.0, -1.0]])
    with pytest.raises(ValueError, match="order"):
        noise.gauss_markov_closure(noise.MAX_CLOSURE_ORDER + 1, 0.1)
