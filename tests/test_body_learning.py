"""Tests of body-parameter learning (``learn_body``, blanket.agent.body_learning).

External references used here:
- Bishop 2006, *Pattern Recognition and Machine Learning*, sec. 3.3, eqs. 3.53-3.54: the
  posterior of Bayesian linear regression with a Gaussian prior (the closed form the learned
  parameters must reach for a linear-Gaussian observation model).
- pinocchio's recursive Newton-Euler inverse dynamics (``pin.rnea``, through
  ``ArmModel.inverse_dynamics``) with a point mass added to the tip body, for the payload
  regressor and its derivative.
- Finite differences (central, common practice, no source) for every analytic gradient.
"""

from __future__ import annotations

from pathlib import Path

import gymnasium as gym
import numpy as np
import pinocchio as pin
import pytest

import blanket  # noqa: F401  (registers the env ids)
from blanket.agent import ArmAgent
from blanket.agent.body_calibration import (
    e_optimal_design,
    skeleton_clearance,
    smallest_eigenvalue,
)
from blanket.agent.body_learning import (
    BodyLearning,
    belief_pixel_covariance,
    camera_length_terms,
    collinear_length_segments,
    laplace_parameter_step,
    segment_spread_step,
    torque_payload_terms,
)
from blanket.body import ArmModel
from blanket.errors import ConfigError
from blanket.scenario import Scenario, scenario_from_dict

ASSETS = Path(__file__).resolve().parents[1] / "envs" / "blanket_envs" / "assets"
POTTING = str(ASSETS / "potting_arm_3dof.urdf")
#: a 4-DoF arm no setting of the project was tuned on
SEEDLING = str(Path(__file__).resolve().parent / "data" / "seedling_picker_4dof.urdf")


@pytest.fixture(scope="module")
def arms():
    """Descriptions of the own 3-DoF arm and the panda (which has zero-length placements)."""
    out = {}
    for name, kw in (
        ("potting", dict(urdf=POTTING, end_effector="tool_tip")),
        ("panda", dict(robot="panda")),
        ("seedling", dict(urdf=SEEDLING, end_effector="picker_tip")),
    ):
        env = gym.make("blanket/arm-reach-v0", **kw)
        out[name] = env.unwrapped.description
        env.close()
    return out


def _body(description, **kw) -> ArmModel:
    return ArmModel.from_urdf(
        description.urdf_path, description.end_effector, description.joint_names, **kw
    )


def _fd(fun, x, h=1e-6):
    """Central differences of a scalar or vector function, (k,) or (m, k)."""
    cols = [(fun(x + h * d) - fun(x - h * d)) / (2 * h) for d in np.eye(x.size)]
    return np.stack(cols, axis=-1)


# ------------------------------------------------------------------------ gradients (FD)
@pytest.mark.parametrize("arm", ["potting", "panda"])
def test_camera_length_gradient_matches_finite_differences(arms, arm):
    description = arms[arm]
    body = _body(description)
    camera = description.camera
    rng = np.random.default_rng(1)
    q = 0.5 * (description.lower_rad + description.upper_rad) + 0.3 * rng.standard_normal(
        description.n_joints
    )
    s = 1.0 + 0.03 * rng.standard_normal(len(body.length_parameter_names))
    body.set_body_parameters(s)
    tip, D = body.tip_length_jacobian(q)
    y = camera.project(tip) + np.array([3.0, -2.0])
    P = np.array([0.25, 0.25])

    def energy(scales):
        body.set_body_parameters(scales)
        e = y - camera.project(body.tip_position(q))
        return 0.5 * float(e @ (P * e))

    body.set_body_parameters(s)
    pixel, dpix = camera.project_with_jacobian(tip)
    F, grad, curv = camera_length_terms(y - pixel, dpix, D, P)
    assert F == pytest.approx(energy(s) - 0.5 * np.log(P).sum(), rel=1e-12)
    fd = _fd(energy, s)
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())
    # Gauss-Newton curvature: FD of the residual's Jacobian
    G = dpix @ D
    np.testing.assert_allclose(curv, G.T @ np.diag(P) @ G)


def test_tip_is_linear_in_the_length_factors(arms):
    body = _body(arms["panda"])
    rng = np.random.default_rng(2)
    q = 0.3 * rng.standard_normal(7)
    s = 1.0 + 0.05 * rng.standard_normal(len(body.length_parameter_names))
    body.set_body_parameters(s)
    tip, D = body.tip_length_jacobian(q)
    np.testing.assert_allclose(tip, D @ s, atol=1e-14)
    # the uniform factor reproduces the body model's own length_scale option
    uniform = _body(arms["panda"], length_scale=1.03)
    body.set_body_parameters(np.full(s.size, 1.03))
    np.testing.assert_allclose(body.tip_position(q), uniform.tip_position(q), atol=1e-14)


@pytest.mark.parametrize("arm", ["potting", "panda"])
def test_payload_regressor_and_gradient_match_inverse_dynamics(arms, arm):
    """Y (m, h) against pinocchio's RNEA with the point mass added, and dF/dtheta by FD."""
    body = _body(arms[arm])
    n = body.n
    rng = np.random.default_rng(3)
    q, v, a = (rng.standard_normal(n) for _ in range(3))
    bare = body.inverse_dynamics(q, v, a)

    def payload_torque(th):  # th = (m, h), h = m c in the end-effector frame
        body.set_body_parameters(payload_kg=th[0], payload_com_m=th[1:] / th[0])
        return body.inverse_dynamics(q, v, a) - bare

    Y = body.payload_regressor(q, v, a)
    # at the tool origin (h = 0) the regressor is exact, and so is its derivative in h
    theta = np.array([1.5, 0.0, 0.0, 0.0])
    np.testing.assert_allclose(Y @ theta, payload_torque(theta), atol=1e-12)
    np.testing.assert_allclose(Y, _fd(payload_torque, theta), atol=1e-6)
    # off the origin only the payload's own m |c|^2 is left out
    c = np.array([0.01, -0.02, 0.015])
    theta_c = np.array([1.5, *(1.5 * c)])
    gap = np.abs(Y @ theta_c - payload_torque(theta_c)).max()
    assert gap < 1.5 * (c @ c) * (np.abs(a).max() + np.abs(v).max() ** 2) * 10
    # the free energy's gradient
    r = payload_torque(theta) + rng.standard_normal(n)
    P = np.full(n, 4.0)

    def energy(th):
        e = r - payload_torque(th)
        return 0.5 * float(e @ (P * e))

    F, grad, curv = torque_payload_terms(r, Y, theta, P)
    assert F == pytest.approx(energy(theta) - 0.5 * np.log(P).sum(), rel=1e-10)
    np.testing.assert_allclose(grad, _fd(energy, theta), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(curv, Y.T @ np.diag(P) @ Y)


# ------------------------------------------------------------------------ closed form
def _bishop_posterior(Phi, t, m0, S0_inv, beta):
    """Bishop 2006, PRML eqs. 3.53-3.54 (3.50-3.51 with a general Gaussian prior)."""
    SN_inv = S0_inv + beta * Phi.T @ Phi
    mN = np.linalg.solve(SN_inv, S0_inv @ m0 + beta * Phi.T @ t)
    return mN, SN_inv


@pytest.mark.parametrize("rate", [1.0, 0.25])
def test_linear_gaussian_learning_reaches_the_bayesian_posterior(rate):
    rng = np.random.default_rng(4)
    k, N, beta = 4, 300, 1.0 / 0.3**2
    Phi = rng.standard_normal((N, k))
    w_true = np.array([0.5, -1.0, 2.0, 0.1])
    t = Phi @ w_true + rng.standard_normal(N) / np.sqrt(beta)
    m0, S0_inv = np.zeros(k), np.eye(k) / 2.0**2
    mean, precision = m0.copy(), S0_inv.copy()
    for phi, y in zip(Phi, t, strict=True):
        # one sample's F_t = beta/2 (y - phi'w)^2 at the current mean
        _, g, h = torque_payload_terms(np.array([y]), phi[None], mean, [beta])
        mean, precision = laplace_parameter_step(mean, precision, g, h, rate)
    mN, SN_inv = _bishop_posterior(Phi, t, m0, S0_inv, rate * beta)
    np.testing.assert_allclose(mean, mN, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(precision, SN_inv, rtol=1e-12)
    if rate == 1.0:  # and it approaches the least-squares estimate
        w_ls = np.linalg.lstsq(Phi, t, rcond=None)[0]
        assert np.abs(mean - w_ls).max() < 0.01


def test_length_factors_from_tip_positions_reach_the_bayesian_posterior(arms):
    """Through the real kinematics: tips seen directly are linear in s, y = D(q) s + noise."""
    body = _body(arms["potting"])
    model = _Model(body)
    learner = BodyLearning.start(model)
    rng = np.random.default_rng(5)
    s_true = np.array([0.97, 0.97, 0.98, 0.96])
    sd = 0.002
    rows, ys = [], []
    for _ in range(200):
        q = rng.uniform(-1.0, 1.0, 3)
        D = body.tip_length_jacobian(q)[1]  # kinematics do not depend on s' current value
        y = D @ s_true + sd * rng.standard_normal(3)
        tip = body.tip_position(q)
        _, g_s, h_s = camera_length_terms(y - tip, np.eye(3), D, np.full(3, 1 / sd**2))
        A = learner.length_map
        learner.mean, learner.precision = laplace_parameter_step(
            learner.mean, learner.precision, A.T @ g_s, A.T @ h_s @ A
        )
        learner.apply(body)
        rows.append(D @ A)
        ys.append(y)
    Phi = np.vstack(rows)
    t = np.concatenate(ys)
    # theta = (g, delta): y = D A theta; prior mean (1, 0, 0, 0, 0)
    mN, SN_inv = _bishop_posterior(Phi, t, learner.prior_mean, learner.prior_precision, 1 / sd**2)
    np.testing.assert_allclose(learner.mean, mN, atol=1e-9)
    np.testing.assert_allclose(learner.precision, SN_inv, rtol=1e-9)
    # the links that the tip sees are pinned down (within 3 posterior sd) ...
    s, sd_s = learner.length_scales(), learner.length_scales_sd()
    assert np.all(np.abs(s[2:] - s_true[2:]) < 3 * sd_s[2:]) and sd_s[2:].max() < 2e-3
    # ... the two collinear vertical placements are one segment with one factor: the tip
    # sees only their summed length
    assert learner.segment_names[0] == "base_yaw+shoulder_pitch"
    assert s[0] == s[1]
    assert 0.1 * s[0] + 0.05 * s[1] == pytest.approx(0.15 * 0.97, abs=3e-4)


def _log_evidence(Phi, t, m0, S0_inv, beta):
    """ln N(t | Phi m0, I / beta + Phi S0 Phi'): the marginal likelihood of Bayesian linear
    regression with a general Gaussian prior (Bishop 2006, eq. 3.86 in its covariance form,
    from eq. 2.115), by scipy's multivariate normal."""
    from scipy.stats import multivariate_normal

    cov = np.eye(len(t)) / beta + Phi @ np.linalg.inv(S0_inv) @ Phi.T
    return multivariate_normal(Phi @ m0, cov).logpdf(t)


@pytest.mark.parametrize("deviation", [0.08, 0.0])
def test_segment_spread_maximises_the_evidence_and_keeps_the_data(deviation):
    """The spread of parameter k is the maximum of the marginal likelihood over tau_k (the
    others' priors held), found here by scipy's bounded scalar search on the log evidence;
    and the new posterior is the Bayesian posterior of the same data under the new prior
    (Bishop 2006, eqs. 3.50-3.51). With no real deviation the evidence is largest at
    tau_k -> 0: the spread goes to its floor (the parameter is pruned to its prior mean)."""
    from scipy.optimize import minimize_scalar

    rng = np.random.default_rng(7)
    p, N, beta = 5, 40, 1.0 / 0.05**2
    Phi = rng.standard_normal((N, p))
    w = np.array([1.0, 0.01, deviation, -0.03, 0.0])
    t = Phi @ w + rng.standard_normal(N) / np.sqrt(beta)
    m0 = np.array([1.0, 0.0, 0.0, 0.0, 0.0])
    P0 = np.diag([1 / 0.1**2, *[1 / 0.02**2] * 4])
    m, P = _bishop_posterior(Phi, t, m0, P0, beta)
    k = 2

    def negative_evidence(log_tau):
        prior = P0.copy()
        prior[k, k] = np.exp(-2 * log_tau)
        return -_log_evidence(Phi, t, m0, prior, beta)

    best = minimize_scalar(negative_evidence, bounds=(np.log(1e-6), np.log(1.0)), method="bounded")
    m1, P1, P01, tau = segment_spread_step(m, P, m0, P0, k, informed_below=0.02, floor=1e-6)
    if deviation:
        assert tau == pytest.approx(np.exp(best.x), rel=1e-3)
    else:  # pruned: the evidence grows as tau_k shrinks
        assert tau == 1e-6
        assert negative_evidence(np.log(1e-4)) < negative_evidence(np.log(1e-2))
    mN, PN = _bishop_posterior(Phi, t, m0, P01, beta)
    np.testing.assert_allclose(m1, mN, atol=1e-10)
    np.testing.assert_allclose(P1, PN, rtol=1e-10)
    # the identifiability guard: data that tell less than the prior leave the spread alone
    unchanged = segment_spread_step(m, P, m0, P0, k, informed_below=1e-4)
    assert unchanged[3] == pytest.approx(0.02) and unchanged[2] is P0


@pytest.mark.parametrize("truth", ["uniform", "one segment longer"])
def test_learned_spread_pins_weak_segments_without_hiding_a_real_one(arms, truth):
    """Panda, tip pixels from a few postures (its short wrist offsets barely seen): with the
    error uniform the spread shrinks and every factor lands near the truth; with one long
    segment 2 % longer than the rest the spread stays wide enough to keep it."""
    description = arms["panda"]
    body = _body(description)
    learner = BodyLearning.start(_Model(body))
    camera = description.camera
    factors = np.full(len(learner.names), 0.97)
    long = learner.names.index("panda_joint5")  # 0.39 m, well seen
    if truth != "uniform":
        factors[long] = 0.99
    truth_body = _body(description, link_length_scales=factors)
    rng = np.random.default_rng(8)
    home = np.array([0.0, -0.3, 0.0, -2.2, 0.0, 1.9, 0.785])
    for _ in range(5):
        _learn_pixels(
            learner, body, camera, truth_body, home + 0.5 * rng.standard_normal((60, 7)), rng
        )
        learner.new_episode()
    s = learner.length_scales()
    moves = learner.segment >= 0
    spread = dict(zip(learner.segment_names, learner.segment_spread, strict=True))
    if truth == "uniform":
        assert max(spread.values()) < 0.005
        assert np.abs(s[moves] / 0.97 - 1).max() < 0.005
    else:
        assert spread["panda_joint5"] > 0.005
        assert s[long] / 0.99 - 1 == pytest.approx(0.0, abs=0.005)


def _learn_pixels(learner, body, camera, truth, postures, rng):
    """Learn from the true tip's pixel (2 px noise) at each posture, one Laplace step each
    (the camera part of ``BodyLearning.update``); returns the rows ``D(q) A`` seen."""
    A = learner.length_map
    seen = []
    for q in postures:
        y = camera.project(truth.tip_position(q)) + 2.0 * rng.standard_normal(2)
        tip, D = body.tip_length_jacobian(q)
        pixel, dpix = camera.project_with_jacobian(tip)
        _, g_s, h_s = camera_length_terms(y - pixel, dpix, D, np.full(2, 0.25))
        learner.mean, learner.precision = laplace_parameter_step(
            learner.mean, learner.precision, A.T @ g_s, A.T @ h_s @ A
        )
        learner.frames += 1
        learner.apply(body)
        seen.append(D @ A)
    return seen


class _Model:
    """The parts of a GenerativeModel that BodyLearning.start reads."""

    def __init__(self, body, control="velocity"):
        self.body = body
        self.control = control
        self.options = {
            "body_length_prior_sd": 0.1,
            "link_length_prior_sd": 0.02,
            "payload_prior_sd_kg": 2.0,
            "torque_noise_sd_n_m": 3.0,
            "body_learning_rate": 1.0,
        }


# ------------------------------------------------------------------------ identifiability
@pytest.mark.parametrize(
    "arm, segments",
    [
        # base and shoulder placements are both vertical in every posture: one segment
        ("potting", ("base_yaw+shoulder_pitch", "elbow_pitch", "tool")),
        # two zero-length placements (joint2, joint6) move nothing and get no parameter
        (
            "panda",
            ("panda_joint1", "panda_joint3", "panda_joint4", "panda_joint5", "panda_joint7")
            + ("tool",),
        ),
        ("seedling", ("turntable", "lift", "reach", "wrist", "tool")),
    ],
)
def test_collinear_placements_share_one_factor_and_zero_lengths_none(arms, arm, segments):
    body = _body(arms[arm])
    learner = BodyLearning.start(_Model(body))
    assert learner.segment_names == segments
    assert learner.segment_identifiable.all()
    assert learner.mean.size == 1 + len(segments)
    idle = learner.segment < 0
    assert idle.sum() == len(learner.names) - sum(len(n.split("+")) for n in segments)
    # a factor that moves nothing follows the shared scale alone
    np.testing.assert_array_equal(learner.length_map[idle, 1:], 0.0)


def test_a_segment_the_data_cannot_inform_is_flagged_and_keeps_its_prior(arms):
    """With the 3-DoF arm held upright (only the yaw joint turns) the tip stays on the yaw
    axis: it sees only the arm's total height. Every direction of theta that no sensation
    informs keeps its prior mean and precision (the identifiability guard)."""
    description = arms["potting"]
    body = _body(description)
    D = np.vstack(
        [body.tip_length_jacobian(np.array([y, 0.0, 0.0]))[1] for y in np.linspace(-2, 2, 9)]
    )
    segment, identifiable = collinear_length_segments(D)
    # all four placements point up: one segment, determined (its factor is the height's)
    np.testing.assert_array_equal(segment, [0, 0, 0, 0])
    assert identifiable.tolist() == [True]
    learner = BodyLearning.start(_Model(body))  # segments from postures over the limits
    camera = description.camera
    truth = _body(description, length_scale=0.97)
    rng = np.random.default_rng(6)
    qs = np.column_stack([rng.uniform(-2, 2, 200), np.zeros(200), np.zeros(200)])
    seen = _learn_pixels(learner, body, camera, truth, qs, rng)
    # the height is learned ...
    assert body.tip_position(np.zeros(3))[2] == pytest.approx(
        truth.tip_position(np.zeros(3))[2], abs=2e-3
    )
    # ... and the directions w the data never saw (Phi w = 0) keep their prior: the same
    # precision, and the mean moves only where the prior couples them to what was seen
    # (m - m0 lies in the span of S0 Phi'; Bishop 2006, eq. 3.53 with Woodbury's identity)
    _, sv, Vt = np.linalg.svd(np.vstack(seen))
    null = Vt[np.flatnonzero(sv < 1e-9 * sv[0])]
    assert null.shape[0] == learner.mean.size - 1  # only the height was seen
    P0 = learner.prior_precision
    for w in null:
        assert w @ learner.precision @ w == pytest.approx(w @ P0 @ w, rel=1e-9)
        assert abs((P0 @ w) @ (learner.mean - learner.prior_mean)) < 1e-9 * np.abs(P0).max()
    # the report says so: no segment's factor is determined by the data alone, and at the
    # next episode every segment keeps its prior spread (nothing is re-estimated from data
    # that cannot inform it)
    report = learner.segment_report()
    assert [r["informed"] for r in report] == [False] * len(report)
    assert all(np.isinf(r["data_sd"]) for r in report)
    mean = learner.mean.copy()
    learner.new_episode()
    np.testing.assert_array_equal(learner.segment_spread, learner.initial_spread)
    np.testing.assert_array_equal(learner.mean, mean)
    np.testing.assert_array_equal(learner.prior_precision, P0)


def test_belief_error_shared_by_frames_counts_as_frame_noise():
    """m frames sharing an error of covariance C, each with independent noise R: the exact
    information about their common mean, 1' inv(Sigma) 1 with Sigma = I (x) R + 11' (x) C
    (the block covariance, inverted by numpy), equals m inv(R + m C), the form
    ``belief_pixel_covariance`` uses; and the share it returns is m H Sigma_q H' with m the
    encoder samples the belief averages times the frames per control step."""
    rng = np.random.default_rng(3)
    A = rng.standard_normal((2, 2))
    R = A @ A.T + 4 * np.eye(2)
    Bq = rng.standard_normal((2, 2))
    C = 0.1 * Bq @ Bq.T
    m = 9
    Sigma = np.kron(np.eye(m), R) + np.kron(np.ones((m, m)), C)
    ones = np.kron(np.ones((m, 1)), np.eye(2))
    exact = ones.T @ np.linalg.solve(Sigma, ones)
    np.testing.assert_allclose(exact, m * np.linalg.inv(R + m * C), rtol=1e-10)
    H = rng.standard_normal((2, 3))
    S = np.diag([1e-6, 2e-6, 3e-6])  # mean variance 2e-6 rad^2
    share = belief_pixel_covariance(H, S, 1e-4, 0.125)  # 50 samples, 6.25 frames
    np.testing.assert_allclose(share, 6.25 * H @ S @ H.T, rtol=1e-12)
    # a belief as sure as one encoder sample, or surer than none: at least one frame
    np.testing.assert_allclose(belief_pixel_covariance(H, S, 1e-9, 0.125), H @ S @ H.T)


# ------------------------------------------------------------------------ calibration design
def test_e_optimal_design_of_a_line_fit_is_the_interval_ends():
    """Fitting y = a + b x on [-1, 1] with two points: the E-optimal (also D- and A-optimal)
    design puts them at the ends, M = 2 I (Pukelsheim 2006, *Optimal Design of
    Experiments*, the line fit on the symmetric interval; from memory). Any other pair has
    trace(M) = 2 + x1^2 + x2^2 < 4, so a smaller least eigenvalue."""
    xs = np.linspace(-1.0, 1.0, 21)
    candidates = np.array([np.outer([1.0, x], [1.0, x]) for x in xs])
    chosen = e_optimal_design(np.zeros((2, 2)), candidates, 2)
    assert sorted(xs[chosen].tolist()) == [-1.0, 1.0]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_e_optimal_design_matches_brute_force_on_a_toy(seed):
    """Three length factors, twelve candidate postures of rank-2 information (a pixel sees
    two directions): the greedy choice with Fedorov's exchange reaches the best smallest
    eigenvalue over all 220 triples (brute force), and beats a random triple."""
    from itertools import combinations

    rng = np.random.default_rng(seed)
    G = rng.standard_normal((12, 2, 3)) * rng.uniform(0.2, 2.0, size=(12, 1, 3))
    candidates = np.einsum("cij,cik->cjk", G, G)
    prior = np.eye(3) * 0.1
    best = max(
        smallest_eigenvalue(prior + candidates[list(c)].sum(axis=0))
        for c in combinations(range(12), 3)
    )
    chosen = e_optimal_design(prior, candidates, 3)
    assert len(set(chosen)) == 3
    assert smallest_eigenvalue(prior + candidates[chosen].sum(axis=0)) == pytest.approx(
        best, rel=1e-9
    )


def test_skeleton_clearance_is_the_point_to_segment_distance():
    """A planar arm folded back over itself: the tip's distance from the first link is the
    perpendicular distance to it (point-to-segment distance, common practice, no source)."""
    # base origin, shoulder at 0.1 m up, elbow 0.5 m out, wrist 0.5 m further, tip folded
    # back to (0.3, 0, 0.1 + 0.2)
    points = np.array([[0.0, 0.0, 0.1], [0.5, 0.0, 0.1], [1.0, 0.0, 0.1], [0.3, 0.0, 0.3]])
    # tip: segments base->shoulder and shoulder->elbow (the last two left out);
    # wrist (1.0, 0, 0.1): base->shoulder only
    expected = min(
        0.2,  # tip above the shoulder->elbow segment
        np.hypot(0.3, 0.2),  # tip from the shoulder (end of the base segment)
        np.hypot(1.0, 0.0),  # wrist from the shoulder
    )
    assert skeleton_clearance(points) == pytest.approx(expected)


def test_calibration_postures_are_seen_and_clear(arms):
    """The calibration's candidate postures keep the tip in the camera's view, above the
    base and clear of the arm's first links; the plan's targets are the model's tips at the
    planned postures' homes; an agent with calibration counts its calibrating episodes."""
    env = gym.make("blanket/arm-reach-v0", robot="panda", episode_s=1.5)
    try:
        agent = ArmAgent.from_env(env, learn_body=True, body_calibration_episodes=1)
        calibration = agent.body_calibration
        model = agent.model
        obs, _ = env.reset(seed=0)
        agent.reset()
        agent.act(obs)
        assert calibration.plan is not None and calibration.remaining == 1
        planned_with = ArmAgent.from_env(env).body  # the body before anything was learned
        for target, home in zip(calibration.plan, calibration.homes, strict=True):
            np.testing.assert_allclose(target, planned_with.tip_position(home), atol=1e-12)
        for q in calibration.postures:
            points = model.body.chain_points(q)
            u, v = model.camera.project(points[-1])
            assert 0 <= u <= model.camera.width_px and 0 <= v <= model.camera.height_px
            assert points[-1][2] > 0.0 and skeleton_clearance(points) >= 0.2
        agent.reset()
        assert calibration.remaining == 0 and not calibration.active
    finally:
        env.close()


@pytest.mark.slow
def test_calibration_informs_every_segment_better_than_reaching():
    """Panda, one link 3 % long (panda_joint5), 3 episodes: the camera's own sd of the worst
    informed segment (``data_sd``: the information the frames added, not the prior) is at
    least halved by calibration postures against reaching for the bench's targets, and
    every learned factor lies within 3 posterior sd of the truth."""
    worst = {}
    for episodes in (0, 3):
        env = gym.make("blanket/arm-reach-v0", robot="panda")
        try:
            names = ArmAgent.from_env(env).body.length_parameter_names
            scales = [1.03 if n == "panda_joint5" else 1.0 for n in names]
            agent = ArmAgent.from_env(
                env,
                learn_body=True,
                link_length_scales=scales,
                body_calibration_episodes=episodes,
            )
            from blanket.rollout import rollout

            rollout(env, agent, 3, seed=0)
            agent.reset()
        finally:
            env.close()
        report = agent.body_learning.segment_report()
        worst[episodes] = max(r["data_sd"] for r in report)
        if episodes:
            for r in report:
                assert abs(r["factor"] - 1.0) < 3 * r["sd"], r
    assert worst[3] < 0.5 * worst[0]


# ------------------------------------------------------------------------ the agent
def test_agent_learns_lengths_across_episodes_and_saves_them():
    env = gym.make("blanket/arm-reach-v0", urdf=POTTING, end_effector="tool_tip", episode_s=2.0)
    try:
        agent = ArmAgent.from_env(env, length_scale=1.03, learn_body=True)
        before = agent.body.tip_position(np.zeros(3)).copy()
        from blanket.rollout import rollout

        rollout(env, agent, episodes=2, seed=0)
        body = agent.diagnostics()["body"]
        assert agent.body_learning.frames > 100  # learning carried over the reset
        informed = agent.body.length_parameter_informative
        s = body["length_scale"][informed] * 1.03
        assert np.abs(s - 1.0).max() < 0.01
        assert np.all(body["length_scale_sd"] > 0)
        assert not np.allclose(agent.body.tip_position(np.zeros(3)), before)
        # save and reload as a scenario's [agent] values
        saved = agent.learned_options()
        scenario = Scenario(
            env="blanket/arm-reach-v0",
            env_options={"urdf": POTTING, "end_effector": "tool_tip"},
            agent={"length_scale": 1.03, **saved},
        )
        import tomllib

        loaded = scenario_from_dict(tomllib.loads(scenario.to_toml()))
        again = ArmAgent.from_env(env, **loaded.agent)
        np.testing.assert_allclose(
            again.body.link_length_scales, saved["link_length_scales"], atol=0
        )
        q = np.array([0.3, -0.4, 0.8])
        agent.reset()  # writes all it learned into its body model
        np.testing.assert_allclose(
            again.body.tip_position(q), agent.body.tip_position(q), atol=1e-5
        )
    finally:
        env.close()


def test_payload_is_learned_from_torques_under_torque_control():
    env = gym.make(
        "blanket/arm-reach-v0",
        urdf=POTTING,
        end_effector="tool_tip",
        control="torque",
        episode_s=3.0,
    )
    try:
        env.unwrapped.set_payload(1.5)
        agent = ArmAgent.from_env(env, learn_body=True)
        from blanket.rollout import rollout

        rollout(env, agent, episodes=3, seed=0)
        m, _ = agent.body_learning.payload()
        m_sd, _ = agent.body_learning.payload_sd()
        assert abs(m - 1.5) < 0.15 and abs(m - 1.5) < 3 * m_sd
        assert agent.learned_options()["payload_kg"] == pytest.approx(m, abs=1e-6)
    finally:
        env.close()


def test_learn_body_off_leaves_the_body_as_built(arms):
    """Default options: no learner, no body group, the model as from_urdf always built it."""
    description = arms["potting"]
    env = gym.make("blanket/arm-reach-v0", urdf=POTTING, end_effector="tool_tip")
    try:
        agent = ArmAgent.from_env(env, payload_kg=0.5)
        assert agent.body_learning is None and agent.learned_options() == {}
        obs, _ = env.reset(seed=0)
        agent.act(obs)
        assert "body" not in agent.diagnostics()
    finally:
        env.close()
    # the payload path: the tip body is the URDF's plus a point mass at the tool origin
    body = _body(description, payload_kg=0.5)
    full = pin.buildModelFromUrdf(description.urdf_path)
    frame = full.frames[full.getFrameId("tool_tip")]
    full.inertias[frame.parentJoint] = full.inertias[frame.parentJoint] + pin.Inertia(
        0.5, frame.placement.translation.copy(), np.zeros((3, 3))
    )
    q = np.array([0.2, 0.5, -0.7])
    M = pin.crba(full, full.createData(), q)
    M = np.triu(M) + np.triu(M, 1).T
    np.testing.assert_allclose(body.mass_matrix(q), M, rtol=0, atol=1e-15)


@pytest.mark.parametrize(
    "options, field",
    [
        ({"learn_body": "yes"}, "learn_body"),
        ({"body_learning_rate": 0.0}, "body_learning_rate"),
        ({"body_learning_rate": 2.0}, "body_learning_rate"),
        ({"link_length_prior_sd": -1.0}, "link_length_prior_sd"),
        ({"payload_com_m": [0.0, 0.1]}, "payload_com_m"),
        ({"link_length_scales": [1.0, 1.0]}, "link_length_scales"),
        ({"link_length_scales": [1.0, 1.0, -1.0, 1.0]}, "link_length_scales"),
        ({"learn_bodyy": True}, "learn_body"),
        ({"body_calibration_episodes": -1, "learn_body": True}, "body_calibration_episodes"),
        ({"body_calibration_episodes": 1.5, "learn_body": True}, "body_calibration_episodes"),
        ({"body_calibration_episodes": 2}, "body_calibration_episodes"),
    ],
)
def test_bad_learning_options_are_one_line_config_errors(options, field):
    env = gym.make("blanket/arm-reach-v0", urdf=POTTING, end_effector="tool_tip")
    try:
        with pytest.raises(ConfigError) as info:
            ArmAgent.from_env(env, **options)
    finally:
        env.close()
    message = str(info.value)
    assert field in message and "\n" not in message


def _camera_obs(model, truth, z):
    """A fresh frame of the true tip at the belief's posture, with no noise."""
    q = z[: model.n]
    return {
        "camera_fresh": 1,
        "tip_visible": 1,
        "tip_pixel_px": model.camera.project(truth.tip_position(q)),
    }


def test_gate_refuses_an_outlier_and_moving_frames_weigh_less(arms):
    from blanket.agent.generative_model import GenerativeModel

    description = arms["potting"]
    truth = _body(description, length_scale=0.97)
    P = np.full(2, 0.25)
    n = description.n_joints
    z_still = np.zeros(3 * n)
    z_still[:n] = [0.3, 0.4, 0.9]
    z_moving, z_fast = z_still.copy(), z_still.copy()
    z_moving[n : 2 * n] = [1.0, -1.0, 1.0]  # believed joint velocity, rad/s
    z_fast[n : 2 * n] = [3.0, -3.0, 3.0]
    steps = {}
    for name, z in (("still", z_still), ("moving", z_moving), ("fast", z_fast)):
        model = GenerativeModel.from_description(description, learn_body=True)
        learner = BodyLearning.start(model)
        learner.update(model, z, _camera_obs(model, truth, z), P, np.zeros(n))
        steps[name] = np.trace(learner.precision - learner.prior_precision)  # information
    assert steps["fast"] < steps["moving"] < steps["still"]
    # after many still frames the belief is confident: a frame 200 px off is refused
    model = GenerativeModel.from_description(description, learn_body=True)
    learner = BodyLearning.start(model)
    rng = np.random.default_rng(7)
    for _ in range(200):
        z = z_still.copy()
        z[:n] += 0.5 * rng.standard_normal(n)
        learner.update(model, z, _camera_obs(model, truth, z), P, np.zeros(n))
    assert learner.rejected == 0 and learner.frames == 200
    mean = learner.mean.copy()
    obs = _camera_obs(model, truth, z_still)
    obs["tip_pixel_px"] = obs["tip_pixel_px"] + 200.0
    learner.update(model, z_still, obs, P, np.zeros(n))
    assert learner.rejected == 1
    np.testing.assert_array_equal(learner.mean, mean)


@pytest.mark.parametrize("full", [False, True])
def test_gaussian_terms_equal_the_free_energy_module(full):
    from blanket.agent.body_learning import gaussian_terms
    from blanket.free_energy import belief_curvature, belief_gradient, free_energy

    rng = np.random.default_rng(8)
    e, J = rng.standard_normal(3), rng.standard_normal((3, 5))
    P = np.array([2.0, 0.5, 4.0])
    if full:
        B = rng.standard_normal((3, 3))
        P = B @ B.T + np.eye(3)
    F, grad, curv = gaussian_terms(e, J, P)
    assert F == pytest.approx(free_energy([e], [P]), rel=1e-12)
    np.testing.assert_allclose(grad, belief_gradient([e], [J], [P]), rtol=1e-12)
    np.testing.assert_allclose(curv, belief_curvature([J], [P]), rtol=1e-12)


def test_a_run_saves_what_it_learned_as_a_scenario(tmp_path):
    from blanket.runner import run_scenario
    from blanket.scenario import load_scenario

    scenario = Scenario(
        env="blanket/arm-reach-v0",
        env_options={"urdf": POTTING, "end_effector": "tool_tip", "episode_s": 1.0},
        agent={"learn_body": True},
        name="potting bench, learning",
        conditions={"model_length_scale": 1.03},
    )
    summary = run_scenario(scenario, 1, 0, tmp_path, progress=False, record=False)
    learned = summary["learned_agent_options"]
    again = load_scenario(tmp_path / "learned.toml")
    assert again.agent == {"learn_body": True, **learned}
    assert again.conditions == {"model_length_scale": 1.03}
    # one second of reaching already moved the informed lengths towards 1 / 1.03
    assert np.median(learned["link_length_scales"]) < 0.99


def test_both_backends_learn_the_same():
    from blanket.rollout import rollout

    env = gym.make("blanket/arm-reach-v0", urdf=POTTING, end_effector="tool_tip", episode_s=1.0)
    try:
        means = []
        for backend in ("compiled", "numpy"):
            agent = ArmAgent.from_env(env, length_scale=1.03, learn_body=True)
            agent.backend = backend
            rollout(env, agent, 1, seed=0)
            assert agent.body_learning.frames > 20
            means.append(agent.body_learning.mean)
    finally:
        env.close()
    np.testing.assert_allclose(means[0], means[1], rtol=0, atol=1e-12)
