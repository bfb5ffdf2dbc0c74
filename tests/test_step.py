"""The arm agent's one step: the generative model, the belief, the pure kernels it shares
with the compiled backend, and user terms on the fast path."""

from __future__ import annotations

import dataclasses

import gymnasium
import numpy as np
import pytest

import blanket  # noqa: F401  (registers the envs)
from blanket.agent import ArmAgent, _kernel
from blanket.agent.attractor import damped_least_squares_attractor, joint_limit_weights
from blanket.agent.belief import EpisodeState
from blanket.agent.generative_model import GenerativeModel
from blanket.agent.step import CompiledWorkspace, step
from blanket.description import pinhole_projection
from blanket.model import BodyState, ModelTerm, Term


@pytest.fixture(scope="module")
def planar_env():
    env = gymnasium.make("blanket/planar-2link-v0", episode_s=1.0)
    yield env
    env.close()


class TipCoordinate:
    """A user channel: one coordinate of the tool tip seen by some sensor, ``y = fk_x(q)``
    (``reading_m`` None: the believed coordinate itself, a zero error)."""

    name = "tip_x"
    size = 1

    def __init__(self, reading_m: float | None, precision: float) -> None:
        self.reading_m, self.precision = reading_m, precision

    def evaluate(self, obs, belief, body: BodyState) -> Term:
        n = belief.shape[1]
        G = np.zeros((1, belief.size))
        G[0, :n] = body.tip_jacobian[0]
        x = body.tip_position_m[0]
        y = x if self.reading_m is None else self.reading_m
        return Term(np.array([y - x]), G, np.array([self.precision]))


def _fd(f, x, h=1e-6):
    out = []
    for i in range(x.size):
        d = np.zeros_like(x)
        d[i] = h
        out.append((f(x + d) - f(x - d)) / (2 * h))
    return np.stack(out, axis=-1)


def test_pinhole_jacobian_matches_finite_differences_and_the_textbook_projection():
    # Hartley & Zisserman 2004, Multiple View Geometry, eq. 6.1: x_c = R'(x - t), u = f x/z + c.
    rng = np.random.default_rng(0)
    R = np.linalg.qr(rng.standard_normal((3, 3)))[0]
    pose = np.eye(4)
    pose[:3, :3], pose[:3, 3] = R, rng.standard_normal(3)
    point = pose[:3, 3] + R @ np.array([0.1, -0.2, 1.5])  # 1.5 m in front of the camera
    args = (pose, 500.0, 480.0, 320.0, 240.0)
    pixel, jac = pinhole_projection(*args, point)
    np.testing.assert_allclose(pixel, [500.0 * 0.1 / 1.5 + 320.0, 480.0 * -0.2 / 1.5 + 240.0])
    fd = _fd(lambda x: pinhole_projection(*args, x)[0], point)
    np.testing.assert_allclose(jac, fd, rtol=1e-6, atol=1e-6)
    # the compiled kernel runs the same source: the same numbers
    pixel_c, jac_c = _kernel.pinhole_projection(*args, point)
    np.testing.assert_array_equal(pixel_c, pixel)
    np.testing.assert_array_equal(jac_c, jac)


def test_attractor_jacobian_matches_finite_differences_on_linear_kinematics():
    # With x(q) = x0 + J (q - q0) (J constant) and no saturation, f(q) is linear in q and the
    # Gauss-Newton F = -k J+ J - k_null (I - J+ J) is its exact Jacobian (central
    # differences, common practice, no source).
    rng = np.random.default_rng(1)
    n = 5
    J = rng.standard_normal((3, n))
    q0, home = rng.standard_normal(n), rng.standard_normal(n)
    x0, target = rng.standard_normal(3), rng.standard_normal(3)
    params = np.array([4.0, 1e9, 0.02**2, 0.5, 0.0])  # k, vmax, lambda^2, k_null, no weights
    lim = np.full(n, np.inf)

    def f(q):
        out, F = np.empty(n), np.empty((n, n))
        tip = x0 + J @ (q - q0)
        assert damped_least_squares_attractor(
            J, tip, target, np.zeros(3), q, home, -lim, lim, params, out, F
        )
        return out, F

    f0, F0 = f(q0)
    np.testing.assert_allclose(F0, _fd(lambda q: f(q)[0], q0), rtol=1e-6, atol=1e-7)
    # and f is the damped least-squares velocity (Wampler 1986, eq. 7) plus the null-space term
    Jp = J.T @ np.linalg.inv(J @ J.T + params[2] * np.eye(3))
    want = Jp @ (4.0 * (target - x0)) + 0.5 * (np.eye(n) - Jp @ J) @ (home - q0)
    np.testing.assert_allclose(f0, want, rtol=1e-9, atol=1e-12)


def test_joint_limit_weights_follow_chan_and_dubey_compiled_or_not():
    from blanket.agent.attractor import _joint_limit_weights

    q = np.array([0.0, 0.9, -0.99, 2.0])
    lo, hi = np.array([-1.0, -1.0, -1.0, -np.inf]), np.array([1.0, 1.0, 1.0, np.inf])
    with np.errstate(invalid="ignore"):  # inf - inf for the joint without limits
        w = joint_limit_weights(q, lo, hi)
    np.testing.assert_array_equal(_joint_limit_weights(q, lo, hi), w)
    assert w[0] == pytest.approx(1.0) and w[3] == 1.0 and w[2] < w[1] < 1.0
    # Chan & Dubey 1995, eq. 11: dH/dq = (u-l)^2 (2q-u-l) / (4 (u-q)^2 (q-l)^2)
    grad = 4.0 * (2 * 0.9) / (4 * 0.1**2 * 1.9**2)
    assert w[1] == pytest.approx(1.0 / (1.0 + grad))


def test_the_model_is_immutable_and_every_channel_is_a_model_term(planar_env):
    model = GenerativeModel.from_description(planar_env.unwrapped.description, goal="prior")
    assert [c.name for c in model.channels] == [
        "joint_angle",
        "joint_velocity",
        "camera",
        "motor",
        "goal",
    ]
    assert all(isinstance(c, ModelTerm) for c in model.terms)
    with pytest.raises(dataclasses.FrozenInstanceError):
        model.order = 3  # type: ignore[misc]


def test_step_function_is_what_the_agent_runs(planar_env):
    # step(model, belief, obs, episode) on its own gives the agent's actions and beliefs.
    agent = ArmAgent.from_env(planar_env)
    model = agent.model
    episode, belief, ws = EpisodeState.start(model), None, CompiledWorkspace(model)
    obs, _ = planar_env.reset(seed=3)
    for _ in range(30):
        a = agent.act(obs)
        belief, action, diag = step(model, belief, obs, episode, ws)
        np.testing.assert_array_equal(action, a)
        np.testing.assert_array_equal(belief.generalized, agent.belief)
        assert diag["free_energy"] == agent.free_energy
        obs, *_ = planar_env.step(a)


@pytest.mark.parametrize("control", ["velocity", "torque"])
def test_user_term_on_the_fast_path_gives_the_numpy_numbers(control):
    # A user term that pulls on the belief (a tip reading 2 cm off the target) runs on the
    # compiled backend (assemble, the term in Python, the compiled solve) and must match
    # the reference form; without the term the beliefs differ, so the term is used.
    env = gymnasium.make("blanket/planar-2link-v0", control=control, episode_s=1.0)
    try:
        obs0, _ = env.reset(seed=2)
        lift = float(obs0["target_position_m"][0]) + 0.02
        fast = ArmAgent.from_env(env, extra_terms=[TipCoordinate(lift, 400.0)], goal="prior")
        slow = ArmAgent.from_env(env, extra_terms=[TipCoordinate(lift, 400.0)], goal="prior")
        plain = ArmAgent.from_env(env, goal="prior")
        slow.backend = "numpy"
        obs = obs0
        for _ in range(60):
            a_fast = fast.act(obs)
            a_slow = slow.act(obs)
            plain.act(obs)
            np.testing.assert_allclose(a_fast, a_slow, rtol=1e-9, atol=1e-9)
            np.testing.assert_allclose(fast.belief, slow.belief, rtol=1e-9, atol=1e-10)
            assert fast.free_energy == pytest.approx(slow.free_energy, rel=1e-9, abs=1e-8)
            errors = fast.diagnostics()["prediction_error"]
            np.testing.assert_allclose(
                errors["tip_x"], slow.diagnostics()["prediction_error"]["tip_x"]
            )
            obs, *_ = env.step(a_fast)
        assert np.abs(fast.belief - plain.belief).max() > 1e-6
    finally:
        env.close()


def test_zero_user_term_leaves_the_step_unchanged(planar_env):
    # A term with zero error adds G' P G to the curvature only; with zero precision weight
    # (1e-12) the beliefs equal those without it to rounding.
    with_term = ArmAgent.from_env(planar_env, extra_terms=[TipCoordinate(None, 1e-12)])
    without = ArmAgent.from_env(planar_env)
    obs, _ = planar_env.reset(seed=5)
    for _ in range(40):
        a = without.act(obs)
        np.testing.assert_allclose(with_term.act(obs), a, rtol=1e-9, atol=1e-12)
        obs, *_ = planar_env.step(a)
    np.testing.assert_allclose(with_term.belief, without.belief, rtol=1e-9, atol=1e-12)


def test_user_term_gradient_matches_finite_differences(planar_env):
    # free_energy_and_gradient assembles the same terms as the step, user terms included
    # (central differences, common practice, no source).
    agent = ArmAgent.from_env(planar_env, extra_terms=[TipCoordinate(0.3, 50.0)])
    obs = dict(planar_env.reset(seed=8)[0], camera_fresh=0)
    agent.act(obs)
    z = agent.belief.reshape(-1) + np.random.default_rng(3).normal(scale=0.05, size=agent.size)
    _, grad = agent.free_energy_and_gradient(obs, z)
    fd = _fd(lambda x: agent.free_energy_and_gradient(obs, x)[0], z)
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-5 * max(1.0, np.abs(fd).max()))


def test_a_bad_backend_or_term_is_refused(planar_env):
    from blanket.errors import ConfigError

    agent = ArmAgent.from_env(planar_env)
    with pytest.raises(ConfigError, match="did you mean compiled"):
        agent.backend = "compild"
    with pytest.raises(ConfigError, match="is not a ModelTerm"):
        ArmAgent.from_env(planar_env, extra_terms=[object()])


def test_backends_agree_with_precision_learning_and_fault_tests():
    # The channel monitor reads the step's errors, prior covariance and camera Jacobian;
    # both backends must hand it the same, so learned precisions and flags agree too.
    from blanket.wrappers.perturbations import FrozenEncoder

    env = FrozenEncoder(
        gymnasium.make("blanket/planar-2link-v0", episode_s=1.5), joint=1, start_s=0.5
    )
    try:
        opts = {"learn_precision": True, "fault_detection": True}
        fast, slow = ArmAgent.from_env(env, **opts), ArmAgent.from_env(env, **opts)
        slow.backend = "numpy"
        obs, _ = env.reset(seed=6)
        flagged = False
        for _ in range(300):
            a = fast.act(obs)
            np.testing.assert_allclose(slow.act(obs), a, rtol=1e-8, atol=1e-8)
            d_fast, d_slow = fast.diagnostics(), slow.diagnostics()
            for name in ("joint_angle", "joint_velocity", "camera"):
                np.testing.assert_allclose(
                    d_fast["precision"][name], d_slow["precision"][name], rtol=1e-8
                )
                np.testing.assert_array_equal(d_fast["fault"][name], d_slow["fault"][name])
            flagged |= bool(d_fast["fault"]["joint_angle"].any())
            obs, *_ = env.step(a)
        assert flagged  # the frozen encoder was caught, on both backends alike
    finally:
        env.close()


def test_agent_takes_the_applied_command_as_its_efference_copy(planar_env):
    # With applied_command in the observation the agent's last command becomes the applied
    # one, and the change of command (the prior's velocity step) becomes the applied change.
    agent = ArmAgent.from_env(planar_env)
    obs, _ = planar_env.reset(seed=0)
    sent = agent.act(obs)
    command = agent.episode.command
    np.testing.assert_array_equal(command.command, sent)
    before = sent - command.change  # what was applied before this command
    obs, *_ = planar_env.step(sent)
    applied = 0.5 * sent
    command.sense_applied({**obs, "applied_command": applied})
    np.testing.assert_array_equal(command.command, applied)
    np.testing.assert_allclose(command.change, applied - before, atol=1e-15)
    command.sense_applied(obs)  # no key: the sent command stands
    np.testing.assert_array_equal(command.command, applied)


def test_encoder_noise_guard_recovers_a_noisier_encoder_and_ignores_a_nominal_one():
    # Readings of a joint moving at constant acceleration plus white noise: the second
    # difference of white noise of variance R has mean square 6 R (the variate difference
    # method, Tintner 1940, from memory), the first difference less the known change 2 R
    # (von Neumann et al. 1941). Joint 0 is 3x noisier than nominal (variance 9x), joint 1
    # nominal: the guard's variance in force goes to ~9x for joint 0 and stays at the nominal
    # for joint 1.
    rng = np.random.default_rng(0)
    n, dt, steps = 2, 1.0 / 240.0, 2400
    sd = np.array([[0.03, 0.01], [0.15, 0.05]])  # rows: angle, velocity; joint 0 is 3x
    nominal = np.array([[1e-4, 1e-4], [2.5e-3, 2.5e-3]])
    history = np.full((4, n), np.nan)
    square, applied = nominal.copy(), nominal.copy()
    no_change = np.full(n, np.nan)
    weight_min = -np.expm1(-0.2 * dt)
    for k in range(1, steps + 1):
        t = k * dt
        q = 0.3 * t * t + sd[0] * rng.standard_normal(n)
        v = 0.6 * t + sd[1] * rng.standard_normal(n)
        _kernel.encoder_noise_guard(
            q,
            v,
            no_change,
            history,
            square,
            nominal,
            applied,
            max(1.0 / k, weight_min),
            4.0 if k >= 20 else np.inf,
            2.0,
        )
    np.testing.assert_allclose(applied[:, 0], 9.0 * nominal[:, 0], rtol=0.15)
    np.testing.assert_array_equal(applied[:, 1], nominal[:, 1])
    np.testing.assert_allclose(square[:, 1], nominal[:, 1], rtol=0.15)
