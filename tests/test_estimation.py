"""Tests of the generalized filter against scipy-based Kalman filters and closed forms."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.linalg import expm, solve_discrete_are, solve_discrete_lyapunov
from scipy.stats import multivariate_normal

from blanket.estimation import (
    LinearSystem,
    laplace_update,
    run_filter,
    static_posterior_mean,
    van_loan_discretisation,
)
from blanket.free_energy import belief_curvature, belief_gradient

DT = 0.01
# Damped oscillator (greenhouse bench arm joint, 0.5 Hz, damping ratio 0.3), position measured;
# noise only on the acceleration, so Q is singular.
OMEGA = 2 * np.pi * 0.5
A_OSC = np.array([[0.0, 1.0], [-(OMEGA**2), -2 * 0.3 * OMEGA]])
C_OSC = np.array([[1.0, 0.0]])
Q_OSC = np.diag([0.0, 1.0])
R_OSC = np.array([[0.01]])


def _van_loan(A, Q, dt):
    # Van Loan 1978, IEEE TAC 23(3), sec. 4: expm([[-A, Q], [0, A']] dt) = [[., Ad^-1 Qd], [0, Ad']]
    n = A.shape[0]
    M = np.block([[-A, Q], [np.zeros((n, n)), A.T]])
    E = expm(M * dt)
    Ad = E[n:, n:].T
    return Ad, Ad @ E[:n, n:]


def _kalman(A, C, Q, R, dt, y, x0, P0):
    # Time-varying Kalman filter (Kalman 1960, J Basic Eng), discretised exactly.
    Ad, Qd = _van_loan(A, Q, dt)
    x, P = x0.copy(), P0.copy()
    out = np.zeros((y.shape[0], x.size))
    for k in range(y.shape[0]):
        if k:
            x, P = Ad @ x, Ad @ P @ Ad.T + Qd
        K = P @ C.T @ np.linalg.inv(C @ P @ C.T + R)
        x = x + K @ (y[k] - C @ x)
        P = (np.eye(x.size) - K @ C) @ P
        out[k] = x
    return out


def _steady_state_kalman(A, C, Q, R, dt, y):
    # Steady-state gain from the discrete algebraic Riccati equation
    # (scipy.linalg.solve_discrete_are).
    Ad, Qd = _van_loan(A, Q, dt)
    P = solve_discrete_are(Ad.T, C.T, Qd, R)
    K = P @ C.T @ np.linalg.inv(C @ P @ C.T + R)
    x = np.zeros(A.shape[0])
    out = np.zeros((y.shape[0], x.size))
    for k in range(y.shape[0]):
        if k:
            x = Ad @ x
        x = x + K @ (y[k] - C @ x)
        out[k] = x
    return out


def _rmse(est, x, burn):
    return float(np.sqrt(np.mean((est[burn:, 0] - x[burn:, 0]) ** 2)))


def test_van_loan_discretisation_matches_quadrature():
    # Qd = int_0^dt expm(A t) Q expm(A' t) dt by scipy quad, entry by entry.
    Ad, Qd = van_loan_discretisation(A_OSC, Q_OSC, 0.2)
    want = np.zeros((2, 2))
    for i in range(2):
        for j in range(2):
            want[i, j] = quad(
                lambda t, i=i, j=j: (expm(A_OSC * t) @ Q_OSC @ expm(A_OSC.T * t))[i, j], 0, 0.2
            )[0]
    np.testing.assert_allclose(Qd, want, rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(Ad, expm(A_OSC * 0.2))


def test_white_noise_filter_equals_kalman_filter_and_steady_state_acceptance():
    system = LinearSystem(A_OSC, C_OSC, Q_OSC, R_OSC, DT)
    x, y = system.simulate(5000, np.random.default_rng(11))
    x0, P0 = np.array([0.2, -0.1]), np.diag([0.5, 2.0])
    ref = _kalman(A_OSC, C_OSC, Q_OSC, R_OSC, DT, y, x0, P0)
    for order in (0, 2):
        res = run_filter(system, y, order=order, x0=x0, P0=P0)
        np.testing.assert_allclose(res.means, ref, rtol=1e-7, atol=1e-9)
        assert res.generalized_means.shape == (5000, order + 1, 2)
    # ACCEPTANCE: after convergence, RMSE <= 1.05 x the steady-state KF on the same data.
    res = run_filter(system, y, order=2)
    ratio = _rmse(res.means, x, 500) / _rmse(
        _steady_state_kalman(A_OSC, C_OSC, Q_OSC, R_OSC, DT, y), x, 500
    )
    assert ratio <= 1.05
    # the filter must not just track the raw samples (sensory precision consistent with dt)
    assert _rmse(res.means, x, 500) < 0.7 * _rmse(y, x, 500)
    # expected motion for white noise: x' = A x
    np.testing.assert_allclose(res.generalized_means[:, 1], res.means @ A_OSC.T, atol=1e-12)


def test_coloured_noise_filter_beats_best_tuned_white_kalman_filter():
    # Smooth noise, s = 10 samples: generalized coordinates of the noise in the belief should
    # beat the white-noise KF even after tuning its Q scale on the same data (Meera & Wisse 2021,
    # Entropy, report the same kind of gain for DEM over the KF under coloured noise).
    system = LinearSystem(A_OSC, C_OSC, Q_OSC, R_OSC, DT, smoothness=10 * DT)
    x, y = system.simulate(5000, np.random.default_rng(12))
    best = min(
        _rmse(_steady_state_kalman(A_OSC, C_OSC, f * Q_OSC, R_OSC, DT, y), x, 500)
        for f in np.logspace(-2, 2, 17)
    )
    ratio = _rmse(run_filter(system, y, order=3).means, x, 500) / best
    assert ratio < 0.95


def test_white_sensory_fraction_guards_against_overstated_smoothness():
    # Model s = 4 x the true s: a larger white sensory part must keep the error bounded.
    truth = LinearSystem(A_OSC, C_OSC, Q_OSC, R_OSC, DT, smoothness=10 * DT)
    model = LinearSystem(A_OSC, C_OSC, Q_OSC, R_OSC, DT, smoothness=40 * DT)
    x, y = truth.simulate(3000, np.random.default_rng(19))
    tight = _rmse(run_filter(model, y, order=4).means, x, 500)
    guarded = _rmse(run_filter(model, y, order=4, white_sensory_fraction=1e-2).means, x, 500)
    assert guarded < 0.5 * tight
    assert guarded < 2.0 * _rmse(_steady_state_kalman(A_OSC, C_OSC, Q_OSC, R_OSC, DT, y), x, 500)


def test_static_gaussian_posterior_matches_closed_form():
    # Bishop 2006, Pattern Recognition and Machine Learning, sec. 2.3.3 (eqs. 2.116-2.117, from
    # memory): posterior of x ~ N(m, P0) given y_k = C x + N(0, R), k = 1..K:
    # cov = inv(inv(P0) + K C' inv(R) C), mean = cov (inv(P0) m + C' inv(R) sum_k y_k).
    rng = np.random.default_rng(13)
    m0 = np.array([0.4, -0.2])
    P0 = np.array([[0.5, 0.1], [0.1, 0.3]])
    C = np.array([[1.0, 0.5], [0.0, 1.0], [1.0, -1.0]])
    R = np.diag([0.2, 0.1, 0.4])
    x_true = np.array([0.1, 0.3])
    y = x_true @ C.T + rng.multivariate_normal(np.zeros(3), R, size=25)
    Ri = np.linalg.inv(R)
    cov = np.linalg.inv(np.linalg.inv(P0) + 25 * C.T @ Ri @ C)
    mean = cov @ (np.linalg.inv(P0) @ m0 + C.T @ Ri @ y.sum(axis=0))
    got = static_posterior_mean(m0, P0, C, R, y)
    np.testing.assert_allclose(got, mean, atol=1e-6)
    # the filter with a static state (A = 0, Q = 0) reaches the same belief
    system = LinearSystem(np.zeros((2, 2)), C, np.zeros((2, 2)), R, DT)
    res = run_filter(system, y, order=1, x0=m0, P0=P0)
    np.testing.assert_allclose(res.means[-1], mean, atol=1e-6)
    np.testing.assert_allclose(res.covariances[-1], cov, atol=1e-6)


def test_laplace_update_is_the_gauss_newton_step_and_its_free_energy_the_evidence():
    rng = np.random.default_rng(14)
    m = rng.standard_normal(3)
    Sig = np.cov(rng.standard_normal((3, 10)))
    H = rng.standard_normal((2, 3))
    R = np.diag([0.3, 0.2])
    y = rng.standard_normal(2)
    mean, cov, F, nis = laplace_update(m, Sig, H, y, R)
    # Gauss-Newton step in information form from the free-energy kernels
    Pp, Py = np.linalg.inv(Sig), np.linalg.inv(R)
    g = belief_gradient([np.zeros(3), y - H @ m], [np.eye(3), -H], [Pp, Py])
    curv = belief_curvature([np.eye(3), -H], [Pp, Py])
    np.testing.assert_allclose(mean, m - np.linalg.solve(curv, g), rtol=1e-10)
    np.testing.assert_allclose(cov, np.linalg.inv(curv), rtol=1e-10)
    # minimised free energy = -log p(y) - m/2 ln 2pi (scipy.stats reference)
    S = H @ Sig @ H.T + R
    evidence = multivariate_normal(H @ m, S).logpdf(y)
    assert F == pytest.approx(-evidence - np.log(2 * np.pi), rel=1e-10)
    assert nis == pytest.approx((y - H @ m) @ np.linalg.solve(S, y - H @ m))


def test_simulate_matches_stationary_covariances():
    # white: stationary covariance solves X = Ad X Ad' + Qd (scipy.linalg.solve_discrete_lyapunov)
    system = LinearSystem(A_OSC, C_OSC, Q_OSC, R_OSC, DT)
    x, y = system.simulate(60_000, np.random.default_rng(15))
    Ad, Qd = _van_loan(A_OSC, Q_OSC, DT)
    X = solve_discrete_lyapunov(Ad, Qd)
    np.testing.assert_allclose(np.cov(x[2000:].T), X, rtol=0.15, atol=0.01 * X.max())
    np.testing.assert_allclose(np.var(y[:, 0] - x[:, 0]), R_OSC[0, 0], rtol=0.03)
    # smooth: x' = -a x + w, Var(x) = V int rho(h) exp(-a|h|) / (2a) dh (filtered stationary
    # process; common practice, no source), V = Q / (2 sqrt(pi) s)
    a, q, s = 2.0, 0.5, 0.05
    system = LinearSystem([[-a]], [[1.0]], [[q]], [[0.04]], DT, smoothness=s)
    x, y = system.simulate(60_000, np.random.default_rng(16))
    V = q / (2 * np.sqrt(np.pi) * s)
    want = quad(lambda h: V * np.exp(-(h**2) / (4 * s * s) - a * abs(h)) / (2 * a), -1, 1)[0]
    assert np.var(x[1000:, 0]) == pytest.approx(want, rel=0.15)
    z = y[:, 0] - x[:, 0]
    assert np.var(z) == pytest.approx(0.04, rel=0.1)
    assert np.corrcoef(z[:-5], z[5:])[0, 1] == pytest.approx(
        np.exp(-((5 * DT) ** 2) / (4 * s * s)), abs=0.05
    )


def test_filter_is_causal_and_exports_a_table():
    system = LinearSystem(A_OSC, C_OSC, Q_OSC, R_OSC, DT, smoothness=0.05)
    _, y = system.simulate(300, np.random.default_rng(17))
    res = run_filter(system, y, order=2)
    y2 = y.copy()
    y2[150:] += 5.0
    res2 = run_filter(system, y2, order=2)
    np.testing.assert_array_equal(res.means[:150], res2.means[:150])
    assert not np.allclose(res.means[150:], res2.means[150:])
    df = res.to_pandas()
    assert list(df.columns[:5]) == ["time_s", "mean_x0", "sd_x0", "mean_x1", "sd_x1"]
    assert {"mean_x0_order2", "free_energy", "normalized_error"} <= set(df.columns)
    assert len(df) == 300 and df["time_s"].iloc[-1] == pytest.approx(299 * DT)


def test_inputs_are_applied_by_zero_order_hold():
    B = np.array([[0.0], [1.0]])
    system = LinearSystem(A_OSC, C_OSC, Q_OSC, R_OSC, DT, B=B)
    u = np.sin(np.arange(2000) * DT)[:, None]
    x, y = system.simulate(2000, np.random.default_rng(18), u=u)
    Ad, Qd = _van_loan(A_OSC, Q_OSC, DT)
    Bd = (expm(np.block([[A_OSC, B], [np.zeros((1, 3))]]) * DT))[:2, 2:]
    # reference KF with the same input model
    xk, P = np.zeros(2), np.eye(2)
    ref = np.zeros((2000, 2))
    for k in range(2000):
        if k:
            xk, P = Ad @ xk + Bd @ u[k - 1], Ad @ P @ Ad.T + Qd
        K = P @ C_OSC.T @ np.linalg.inv(C_OSC @ P @ C_OSC.T + R_OSC)
        xk, P = xk + K @ (y[k] - C_OSC @ xk), (np.eye(2) - K @ C_OSC) @ P
        ref[k] = xk
    np.testing.assert_allclose(run_filter(system, y, u=u, order=1).means, ref, rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        (dict(C=np.ones((1, 3))), "C"),
        (dict(Q=np.array([[0.0, 1.0], [0.0, 1.0]])), "Q"),
        (dict(Q=np.diag([1.0, -1.0])), "Q"),
        (dict(R=np.array([[0.0]])), "R"),
        (dict(R=np.array([[-1.0]])), "R"),
        (dict(dt=0.0), "dt"),
        (dict(dt=-0.1), "dt"),
        (dict(smoothness=-0.1), "smoothness"),
        (dict(smoothness=float("nan")), "smoothness"),
        (dict(A=np.ones((2, 3))), "A"),
        (dict(B=np.ones((3, 1))), "B"),
    ],
)
def test_bad_system_arguments_raise(kwargs, field):
    args = dict(A=A_OSC, C=C_OSC, Q=Q_OSC, R=R_OSC, dt=DT)
    args.update(kwargs)
    with pytest.raises(ValueError, match=field):
        LinearSystem(**args)


def test_bad_filter_arguments_raise():
    system = LinearSystem(A_OSC, C_OSC, Q_OSC, R_OSC, DT)
    y = np.zeros((10, 1))
    bad = y.copy()
    bad[3] = np.nan
    with pytest.raises(ValueError, match="y"):
        run_filter(system, bad)
    with pytest.raises(ValueError, match="y"):
        run_filter(system, np.zeros((10, 2)))
    with pytest.raises(ValueError, match="order"):
        run_filter(system, y, order=-1)
    with pytest.raises(ValueError, match="order"):
        run_filter(system, y, order=99)
    with pytest.raises(ValueError, match="u"):
        run_filter(system, y, u=np.zeros((10, 1)))
    with pytest.raises(ValueError, match="P0"):
        run_filter(system, y, P0=-np.eye(2))
    with pytest.raises(ValueError, match="x0"):
        run_filter(system, y, x0=np.zeros(3))
    with pytest.raises(ValueError, match="white_sensory_fraction"):
        run_filter(system, y, white_sensory_fraction=0.0)
