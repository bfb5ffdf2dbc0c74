"""Expected free energy of the bases' routes: the Gaussian formulas against Monte Carlo and
reference libraries, the route prediction against sampling, and the route choice on the
dark-aisle layout."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from scipy import stats

import blanket  # noqa: F401  (registers the env ids)
from blanket.agent.efe import (
    aisle_centres,
    expected_free_energy,
    gaussian_entropy,
    gaussian_kl,
    gaussian_kl_mean_gradient,
    information_gain,
    motion_jacobian,
    predict_route,
    uniform_entropy,
    update_covariance,
    visible_posts,
)
from blanket.agent.mobile_base import BaseAgent
from blanket.errors import ConfigError


def _spd(rng: np.random.Generator, k: int, scale: float = 1.0) -> np.ndarray:
    a = rng.normal(size=(k, k)) * scale
    return a @ a.T + 0.1 * scale**2 * np.eye(k)


def test_gaussian_entropy_against_scipy_and_monte_carlo():
    rng = np.random.default_rng(0)
    cov = _spd(rng, 3, 0.3)
    h = gaussian_entropy(cov)
    # reference library: scipy.stats.multivariate_normal.entropy (same closed form,
    # Cover & Thomas 2006, theorem 8.4.1)
    assert h == pytest.approx(stats.multivariate_normal(np.zeros(3), cov).entropy(), rel=1e-12)
    # brute force: H = -E[ln p(x)] by sampling
    x = rng.multivariate_normal(np.zeros(3), cov, size=200_000)
    lp = stats.multivariate_normal(np.zeros(3), cov).logpdf(x)
    se = lp.std() / np.sqrt(len(lp))
    assert abs(-lp.mean() - h) < 4 * se
    # uniform: ln(width) (Cover & Thomas 2006, example 8.1.1)
    assert uniform_entropy(2 * np.pi) == pytest.approx(stats.uniform(0, 2 * np.pi).entropy())


def test_kl_against_monte_carlo_and_its_gradient_against_finite_differences():
    rng = np.random.default_rng(1)
    mq, mp = rng.normal(size=3), rng.normal(size=3)
    sq, sp = _spd(rng, 3, 0.5), _spd(rng, 3, 0.8)
    kl = gaussian_kl(mq, sq, mp, sp)
    # brute force: KL = E_q[ln q - ln p] (closed form of Rasmussen & Williams 2006, eq. A.23)
    x = rng.multivariate_normal(mq, sq, size=200_000)
    d = stats.multivariate_normal(mq, sq).logpdf(x) - stats.multivariate_normal(mp, sp).logpdf(x)
    assert abs(d.mean() - kl) < 4 * d.std() / np.sqrt(len(d))
    assert gaussian_kl(mq, sq, mq, sq) == pytest.approx(0.0, abs=1e-12)
    g = gaussian_kl_mean_gradient(mq, mp, sp)
    eps = 1e-6
    fd = [
        (gaussian_kl(mq + eps * e, sq, mp, sp) - gaussian_kl(mq - eps * e, sq, mp, sp)) / (2 * eps)
        for e in np.eye(3)
    ]
    np.testing.assert_allclose(g, fd, rtol=1e-6, atol=1e-8)


def test_information_gain_is_half_log_det_ratio_and_the_mutual_information():
    rng = np.random.default_rng(2)
    cov = _spd(rng, 3, 0.2)
    J = rng.normal(size=(4, 3))
    r = rng.uniform(0.01, 0.1, size=4)
    post = update_covariance(cov, J, r)
    # the Kalman form of the same posterior (Thrun, Burgard & Fox 2005, table 3.3)
    K = cov @ J.T @ np.linalg.inv(J @ cov @ J.T + np.diag(r))
    np.testing.assert_allclose(post, cov - K @ J @ cov, rtol=1e-9, atol=1e-12)
    ig = information_gain(cov, J, r)
    ratio = 0.5 * (np.linalg.slogdet(cov)[1] - np.linalg.slogdet(post)[1])
    assert ig == pytest.approx(ratio, rel=1e-10)
    # = H[q(o)] - E_q H[p(o|s)]: predicted-outcome entropy minus the ambiguity
    h_pred = gaussian_entropy(J @ cov @ J.T + np.diag(r))
    assert ig == pytest.approx(h_pred - gaussian_entropy(np.diag(r)), rel=1e-10)
    # brute force: I(s; o) = E[ln p(o|s) - ln q(o)] by sampling s and o
    s = rng.multivariate_normal(np.zeros(3), cov, size=200_000)
    o = s @ J.T + rng.normal(size=(len(s), 4)) * np.sqrt(r)
    lik = stats.multivariate_normal(np.zeros(4), np.diag(r)).logpdf(o - s @ J.T)
    marg = stats.multivariate_normal(np.zeros(4), J @ cov @ J.T + np.diag(r)).logpdf(o)
    d = lik - marg
    assert abs(d.mean() - ig) < 4 * d.std() / np.sqrt(len(d))


def test_route_prediction_matches_sampled_dead_reckoning():
    """The EKF prediction of a drive with a turn against sampled unicycle poses."""
    rng = np.random.default_rng(3)
    start = np.array([0.0, 0.0, 0.0])
    start_cov = np.diag([0.02, 0.02, 0.05]) ** 2
    q = np.array([1e-4, 1e-4, 4e-4])
    dt = 0.1
    kw = dict(
        speed_m_s=0.5,
        turn_rad_s=1.0,
        frame_dt_s=dt,
        drift_var_per_s=q,
        landmarks_m=np.array([[50.0, 50.0]]),  # far out of range: no updates
        bench_boxes_m=np.zeros((0, 4)),
        camera_offset_m=0.1,
        fov_rad=1.0,
        max_range_m=5.0,
        bearing_var=1e-4,
        range_var=None,
    )
    route = np.array([[2.0, 0.0], [2.0, 2.0]])
    pred = predict_route(start, start_cov, route, np.pi / 2, **kw)
    assert pred.length_m == pytest.approx(4.0)
    assert not pred.visible.any() and np.all(pred.information_gain == 0)
    # sample: the same primitives, exact unicycle kinematics, per-frame noise Q * (moving time)
    n = 20_000
    x = rng.multivariate_normal(start, start_cov, size=n)
    means = pred.means
    prev = start
    for m in means:
        dh = m[2] - prev[2]
        dist = float(np.hypot(*(m[:2] - prev[:2])))
        moving = abs(dh) / 1.0 + dist / 0.5
        x[:, 0] += dist * np.cos(x[:, 2])
        x[:, 1] += dist * np.sin(x[:, 2])
        x[:, 2] += dh
        x += rng.normal(size=x.shape) * np.sqrt(q * moving)
        prev = m
    np.testing.assert_allclose(x.mean(0), means[-1], atol=0.01)
    np.testing.assert_allclose(np.cov(x.T), pred.covariances[-1], rtol=0.08, atol=2e-5)
    # the one-step Jacobian against central differences
    f = lambda p: np.array([p[0] + 0.3 * np.cos(p[2]), p[1] + 0.3 * np.sin(p[2]), p[2]])  # noqa: E731
    p0, eps = np.array([0.1, 0.2, 0.7]), 1e-6
    fd = np.stack([(f(p0 + eps * e) - f(p0 - eps * e)) / (2 * eps) for e in np.eye(3)], axis=1)
    np.testing.assert_allclose(motion_jacobian(0.7, 0.3), fd, atol=1e-8)


def test_visibility_respects_field_of_view_range_and_benches():
    posts = np.array([[2.0, 0.0], [-2.0, 0.0], [2.0, 3.0], [9.0, 0.0]])
    bench = np.array([[0.8, -0.2, 1.2, 0.2]])
    pose = np.array([0.0, 0.0, 0.0])
    seen = visible_posts(pose, posts, np.zeros((0, 4)), 0.0, np.deg2rad(100), 8.0)
    assert seen.tolist() == [True, False, False, False]  # behind, off the field, too far
    assert not visible_posts(pose, posts, bench, 0.0, np.deg2rad(100), 8.0)[0]  # occluded


def test_aisle_centres_of_the_greenhouse_rows():
    from blanket_envs.greenhouse_rows import default_layout

    centres = aisle_centres(default_layout().bench_boxes_m)
    np.testing.assert_allclose(sorted(centres[:, 1]), [-1.3, 1.3])
    np.testing.assert_allclose(centres[:, 0], 0.0)


def test_expected_free_energy_decomposes_per_frame():
    """Camera share per frame = L H_out - IG_k: routes on one horizon differ by risk - sum IG."""
    posts = np.array([[3.0, 0.5], [3.0, -0.5]])
    kw = dict(
        speed_m_s=0.5,
        turn_rad_s=1.0,
        frame_dt_s=0.1,
        drift_var_per_s=np.array([1e-4, 1e-4, 1e-4]),
        landmarks_m=posts,
        bench_boxes_m=np.zeros((0, 4)),
        camera_offset_m=0.1,
        fov_rad=np.deg2rad(100),
        max_range_m=8.0,
        bearing_var=4e-4,
        range_var=2.5e-3,
    )
    start, cov = np.array([0.0, 0.0, 0.0]), np.diag([0.1, 0.1, 0.1]) ** 2
    goal = np.array([2.0, 0.0, 0.0])
    a = predict_route(start, cov, np.array([[2.0, 0.0]]), 0.0, horizon_s=13.0, **kw)
    b = predict_route(start, cov, np.array([[0.0, 1.5], [2.0, 0.0]]), 0.0, horizon_s=13.0, **kw)
    assert len(a.means) == len(b.means) == 130
    pref = np.diag([0.05, 0.05, 0.09]) ** 2
    sa = expected_free_energy(a, goal, pref, 2.0, 1e-3, 4e-4, 2.5e-3, 8.0)
    sb = expected_free_energy(b, goal, pref, 2.0, 1e-3, 4e-4, 2.5e-3, 8.0)
    h_out = np.log(2 * np.pi) + np.log(8.0)
    for s, p in ((sa, a), (sb, b)):
        cam = s["risk_outcomes"] + s["ambiguity"]
        assert cam == pytest.approx(len(p.means) * 2 * h_out - s["information_gain"], rel=1e-9)
        assert s["expected_free_energy"] == pytest.approx(s["risk"] + s["ambiguity"])
    diff = sa["expected_free_energy"] - sb["expected_free_energy"]
    net = lambda s: s["risk_pose"] + s["risk_time"] - s["information_gain"]  # noqa: E731
    assert diff == pytest.approx(net(sa) - net(sb), rel=1e-9, abs=1e-9)
    assert sa["information_gain"] > 0  # posts in view straight ahead


def _dark_agent(sd: float, robot: str = "rover") -> BaseAgent:
    env = gym.make(
        "blanket/base-goto-v0", robot=robot, layout="dark-aisle", start_pose_sd=[sd, sd, sd]
    )
    try:
        return BaseAgent.from_env(env, planner="efe")
    finally:
        env.close()


def test_efe_route_flips_with_start_uncertainty():
    """A confident start takes the short dark north aisle, an uncertain one the lit south one;
    the choice is the least G over all candidates (brute-force enumeration)."""
    for sd, aisle_y in ((0.01, 1.3), (0.15, -1.3)):
        agent = _dark_agent(sd)
        g = [r.scores["expected_free_energy"] for r in agent.routes]
        assert len(g) >= 2 and agent.route_index == int(np.argmin(g))
        chosen = agent.routes[agent.route_index]
        # the route's middle runs along the chosen aisle (y of the points at x = 0 +- 3)
        mid = chosen.means[np.abs(chosen.means[:, 0]) < 2.5]
        assert len(mid) and np.allclose(mid[:, 1], aisle_y, atol=0.2), (sd, mid[:3])
        assert agent.stage == "travel" and agent.localised
    # the short route is the direct planner's
    direct = BaseAgent(_dark_agent(0.01).description)
    assert np.allclose([w[1] for w in direct.waypoints], 1.3)


def test_planner_and_layout_options_fail_with_one_line():
    desc = _dark_agent(0.01).description
    with pytest.raises(ConfigError, match="planner 'eef' is unknown; did you mean efe"):
        BaseAgent(desc, planner="eef")
    with pytest.raises(ConfigError, match="preferred_sd"):
        BaseAgent(desc, preferred_sd=(0.1, 0.0, 0.1))
    with pytest.raises(ConfigError, match="layout 'dark_aisle' is unknown; did you mean"):
        gym.make("blanket/base-goto-v0", layout="dark_aisle")
    with pytest.raises(ConfigError, match="start_pose_sd needs a layout with a nominal start"):
        gym.make("blanket/base-goto-v0", start_pose_sd=[0.1, 0.1, 0.1])
    with pytest.raises(ConfigError, match=r"start_pose_sd must be 3 numbers"):
        gym.make("blanket/base-goto-v0", layout="dark-aisle", start_pose_sd=[0.1, -1, 0.1])


def test_dark_aisle_starts_spread_as_told():
    sd = np.array([0.1, 0.05, 0.2])
    env = gym.make("blanket/base-goto-v0", layout="dark-aisle", start_pose_sd=sd)
    desc = env.unwrapped.description
    np.testing.assert_allclose(desc.start_pose_sd, sd)
    np.testing.assert_allclose(desc.start_pose, [4.4, 1.3, np.pi])
    starts = []
    for seed in range(150):
        _, info = env.reset(seed=seed)
        starts.append(info["external"]["base_pose"])
    env.close()
    starts = np.array(starts)
    dev = starts - desc.start_pose
    dev[:, 2] = (dev[:, 2] + np.pi) % (2 * np.pi) - np.pi
    # sample sd of 150 draws: within ~25 % of the truth (chi distribution, common practice)
    np.testing.assert_allclose(dev.std(0), sd, rtol=0.25)
    assert len(desc.landmarks_m) == 4
