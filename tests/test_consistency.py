"""NEES/NIS consistency checks (blanket.consistency)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from blanket.consistency import (
    check_consistency,
    chi_square_mean_bounds,
    effective_sample_size,
    nees,
    nees_per_component,
)


def test_bounds_match_scipy_chi2():
    # reference library: scipy.stats.chi2; the region of Bar-Shalom, Li & Kirubarajan 2001,
    # sec. 5.4.2: K * mean ~ chi2(K n)
    for dof, k in ((1, 1), (2, 50), (3, 100), (7, 1000)):
        lo, hi = chi_square_mean_bounds(dof, k, 0.95)
        assert lo == pytest.approx(stats.chi2.ppf(0.025, k * dof) / k, rel=1e-10)
        assert hi == pytest.approx(stats.chi2.ppf(0.975, k * dof) / k, rel=1e-10)
    # the textbook example: 50 runs, 2 dof -> about [1.5, 2.6] (Bar-Shalom et al. 2001,
    # sec. 5.4.2, from memory)
    lo, hi = chi_square_mean_bounds(2, 50, 0.95)
    assert lo == pytest.approx(1.5, abs=0.05) and hi == pytest.approx(2.6, abs=0.05)


def test_nees_full_and_per_component():
    rng = np.random.default_rng(0)
    A = rng.normal(size=(3, 3))
    S = A @ A.T + 3 * np.eye(3)
    e = rng.normal(size=(5, 3))
    want = np.array([x @ np.linalg.inv(S) @ x for x in e])
    np.testing.assert_allclose(nees(e, S), want, rtol=1e-12)
    assert float(nees(e[0], S)) == pytest.approx(want[0])
    sd = np.array([0.1, 2.0, 3.0])
    np.testing.assert_allclose(nees_per_component(e, sd), (e / sd) ** 2)
    # a diagonal covariance: the full NEES is the sum of the components'
    np.testing.assert_allclose(nees(e, np.diag(sd**2)), nees_per_component(e, sd).sum(axis=1))


def test_effective_sample_size_of_ar1():
    # AR(1) with coefficient phi: integrated autocorrelation time (1 + phi) / (1 - phi)
    # (a standard result for first-order autoregressions, common practice, no source)
    rng = np.random.default_rng(1)
    phi, K = 0.9, 200_000
    x = np.empty(K)
    x[0] = 0.0
    w = rng.normal(size=K)
    for k in range(1, K):
        x[k] = phi * x[k - 1] + w[k]
    assert effective_sample_size(x) == pytest.approx(K * (1 - phi) / (1 + phi), rel=0.1)
    white = rng.normal(size=20_000)
    assert effective_sample_size(white) == pytest.approx(20_000, rel=0.1)


def _scalar_kalman_run(rng, steps, q, r, report_scale):
    """A random walk x_k = x_(k-1) + w, y = x + v, and the textbook Kalman filter on it; the
    filter reports ``report_scale`` times its true posterior variance."""
    x, mu, P = 0.0, 0.0, 1.0
    x = rng.normal() * np.sqrt(P)
    out = np.empty(steps)
    for k in range(steps):
        x += rng.normal() * np.sqrt(q)
        y = x + rng.normal() * np.sqrt(r)
        P = P + q  # predict
        K = P / (P + r)  # update
        mu = mu + K * (y - mu)
        P = (1 - K) * P
        out[k] = (mu - x) ** 2 / (report_scale * P)
    return out


def test_kalman_filter_is_consistent_and_a_shrunk_covariance_is_not():
    rng = np.random.default_rng(2)
    verdicts = [
        check_consistency(_scalar_kalman_run(rng, 400, 0.01, 0.1, 1.0)).verdict for _ in range(100)
    ]
    # a consistent filter passes a 95 % test in about 95 % of runs
    assert verdicts.count("consistent") >= 85
    shrunk = [
        check_consistency(_scalar_kalman_run(rng, 400, 0.01, 0.1, 0.25)).verdict for _ in range(50)
    ]
    assert shrunk.count("overconfident") >= 45
    wide = [
        check_consistency(_scalar_kalman_run(rng, 400, 0.01, 0.1, 4.0)).verdict for _ in range(50)
    ]
    assert wide.count("underconfident") >= 45


def test_summary_line_and_bad_input():
    c = check_consistency(np.array([1.0, 0.5, 2.0, np.nan, 1.5]))
    line = c.summary("NEES")
    assert "\n" not in line and line.startswith("NEES consistent") and c.samples == 4
    with pytest.raises(ValueError, match="finite"):
        check_consistency(np.array([np.nan]))
    with pytest.raises(ValueError, match="dof"):
        chi_square_mean_bounds(0, 10)


def test_worst_component_check_skips_the_settling_time_and_names_the_worst_joint():
    from blanket.consistency import worst_component_check

    rng = np.random.default_rng(3)
    t = np.arange(480) / 240.0
    truth = np.zeros((480, 2))
    sd = np.ones((480, 2))
    belief = rng.normal(size=(480, 2))
    belief[:, 1] *= 3.0  # joint 1: errors 3x its sd -> mean NEES ~9
    belief[:60, 0] = 1e3  # a huge start on joint 0, inside the first 0.25 s: not judged
    check = worst_component_check(belief, truth, sd, t)
    assert check.mean == pytest.approx(9.0, rel=0.15) and check.verdict == "overconfident"
    assert check.samples == 480 - 60
