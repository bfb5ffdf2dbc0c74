"""The arm agent: gradients, reaching on the planar arm, and isolation from the simulator."""

from __future__ import annotations

import dataclasses

import gymnasium
import numpy as np
import pytest

import blanket  # noqa: F401  (registers the envs)
from blanket.agent import ArmAgent
from blanket.agent.arm import torque_action_free_energy
from blanket.agent.generative_model import jerk_covariance
from blanket.errors import ConfigError
from blanket.runner import run_episode


@pytest.fixture(scope="module")
def planar_env():
    env = gymnasium.make("blanket/planar-2link-v0", episode_s=3.0)
    yield env
    env.close()


def _obs(env, seed=0):
    obs, _ = env.reset(seed=seed)
    return obs


@pytest.mark.parametrize("per_joint_motor", [False, True])
def test_free_energy_gradient_matches_finite_differences(planar_env, per_joint_motor):
    # Encoders, camera and the efference copy have exact Jacobians; compare dF/dz with
    # central differences at random beliefs (common practice, no source). The copy's
    # precision is learned per joint (ChannelMonitor.track_motor): also with two that differ.
    agent = ArmAgent.from_env(planar_env, goal="reference")
    obs = _obs(planar_env, 3)
    obs = dict(obs, camera_fresh=1, tip_visible=1)
    rng = np.random.default_rng(0)
    agent.act(obs)
    if per_joint_motor:
        agent.episode.command.command = np.array([0.3, -0.2])
        agent.episode.channels.motor_precision[:] = [4e4, 25.0]
    N = agent.size
    A = rng.normal(size=(N, N))
    prior_precision = A @ A.T + N * np.eye(N)
    for _ in range(3):
        z = agent.belief.reshape(-1) + rng.normal(scale=0.05, size=N)
        z_prior = z + rng.normal(scale=0.02, size=N)
        F, grad = agent.free_energy_and_gradient(obs, z, z_prior, prior_precision)
        fd = np.zeros(N)
        h = 1e-6
        for i in range(N):
            dz = np.zeros(N)
            dz[i] = h
            fp, _ = agent.free_energy_and_gradient(obs, z + dz, z_prior, prior_precision)
            fm, _ = agent.free_energy_and_gradient(obs, z - dz, z_prior, prior_precision)
            fd[i] = (fp - fm) / (2 * h)
        np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-4 * max(1.0, np.abs(fd).max()))


def test_goal_prior_gradient_exact_at_rest_on_target(planar_env):
    # Where task and posture errors vanish, the Gauss-Newton goal Jacobian is exact.
    agent = ArmAgent.from_env(planar_env, goal="prior")
    obs = dict(_obs(planar_env, 5))
    agent.act(obs)
    q = agent.episode.command.home.copy()
    tip = agent.body.tip_position(q)
    obs["target_position_m"] = tip
    obs["camera_fresh"] = 0
    z = np.zeros(agent.size)
    z[: agent.n] = q
    F, grad = agent.free_energy_and_gradient(obs, z)
    h = 1e-6
    fd = np.zeros(agent.size)
    for i in range(agent.size):
        dz = np.zeros(agent.size)
        dz[i] = h
        fd[i] = (
            agent.free_energy_and_gradient(obs, z + dz)[0]
            - agent.free_energy_and_gradient(obs, z - dz)[0]
        ) / (2 * h)
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-3)


def test_torque_action_gradient_and_newton_step():
    rng = np.random.default_rng(1)
    A = rng.normal(size=(4, 4))
    M = A @ A.T + 0.5 * np.eye(4)
    h = rng.normal(size=4)
    qdd = rng.normal(size=4)
    P = np.array([1.0, 2.0, 3.0, 4.0])
    tau = rng.normal(size=4)
    _, g = torque_action_free_energy(tau, M, h, qdd, P)
    fd = np.zeros(4)
    for i in range(4):
        d = np.zeros(4)
        d[i] = 1e-6
        fd[i] = (
            torque_action_free_energy(tau + d, M, h, qdd, P)[0]
            - torque_action_free_energy(tau - d, M, h, qdd, P)[0]
        ) / 2e-6
    np.testing.assert_allclose(g, fd, rtol=1e-6, atol=1e-8)
    # The Newton step the agent takes, tau = h + M qdd, zeroes the gradient.
    F, g0 = torque_action_free_energy(h + M @ qdd, M, h, qdd, P)
    assert F < 1e-20 and np.abs(g0).max() < 1e-9


def test_jerk_covariance_matches_van_loan():
    # Van Loan 1978 (IEEE TAC 23(3)): the discrete noise covariance is the top-right block
    # products of expm([[-A, BQB'], [0, A']] dt).
    from scipy.linalg import expm

    order, dt, q = 2, 0.01, 3.0
    A = np.eye(order + 1, k=1)
    B = np.zeros((order + 1, 1))
    B[-1, 0] = 1.0
    n = order + 1
    M = np.zeros((2 * n, 2 * n))
    M[:n, :n] = -A
    M[:n, n:] = B @ B.T * q
    M[n:, n:] = A.T
    E = expm(M * dt)
    Phi = E[n:, n:].T
    W = Phi @ E[:n, n:]
    np.testing.assert_allclose(jerk_covariance(order, dt, q), W, rtol=1e-9, atol=1e-16)


def test_planar_arm_reaches_in_velocity_mode(planar_env):
    agent = ArmAgent.from_env(planar_env)
    results = [run_episode(planar_env, agent, seed=s) for s in range(3)]
    assert all(r.success for r in results), [r.final_error_m for r in results]
    assert max(r.final_error_m for r in results) < 0.01


def test_planar_arm_reaches_in_torque_mode():
    env = gymnasium.make("blanket/planar-2link-v0", control="torque", episode_s=3.0)
    try:
        agent = ArmAgent.from_env(env)
        results = [run_episode(env, agent, seed=s) for s in range(2)]
    finally:
        env.close()
    assert all(r.success for r in results), [r.final_error_m for r in results]


def test_agent_never_touches_the_simulator(planar_env):
    # Run once live, then replay the same observations to a fresh agent after the env's
    # pybullet client is gone: any read of simulator state would fail, and the actions must
    # match the live run exactly.
    env = gymnasium.make("blanket/planar-2link-v0", episode_s=0.5)
    agent = ArmAgent.from_env(env)
    obs, _ = env.reset(seed=11)
    observations, actions = [], []
    for _ in range(60):
        observations.append({k: np.copy(v) for k, v in obs.items()})
        a = agent.act(obs)
        actions.append(a.copy())
        obs, *_ = env.step(a)
    description = dataclasses.replace(env.unwrapped.description)
    env.close()
    replay = ArmAgent(description)
    for o, a in zip(observations, actions, strict=True):
        np.testing.assert_array_equal(replay.act(o), a)
    # The agent holds no reference to an env, a world or a pybullet client.
    for value in vars(replay).values():
        assert "bullet" not in type(value).__module__.lower()
        assert not isinstance(value, gymnasium.Env)


def test_unknown_agent_option_is_refused(planar_env):
    with pytest.raises(ConfigError, match="unknown agent option 'ordr'; did you mean order"):
        ArmAgent.from_env(planar_env, ordr=2)
    with pytest.raises(ConfigError, match="did you mean goal_precision"):
        ArmAgent.from_env(planar_env, goal_precison=2.0)
    with pytest.raises(ConfigError, match="order must be"):
        ArmAgent.from_env(planar_env, order=9)


def test_diverging_belief_triggers_safe_stop(planar_env):
    agent = ArmAgent.from_env(planar_env)
    obs = _obs(planar_env, 2)
    agent.act(obs)
    bad = dict(obs, joint_velocity_rad_s=np.full(2, 1e9))
    a = agent.act(bad)
    d = agent.diagnostics()
    assert d["safe_stop"] and "exploded" in d["safe_stop_reason"]
    np.testing.assert_array_equal(a, np.zeros(2))
    # the log view then reports the kept belief's spread, not the rejected step's
    np.testing.assert_allclose(agent.diagnostics(copy=False)["belief_sd"], d["belief_sd"])


@pytest.mark.parametrize("control", ["velocity", "torque"])
@pytest.mark.parametrize("goal", ["prior", "reference"])
def test_compiled_step_equals_numpy_step(control, goal):
    # The compiled kernel must compute exactly the documented numpy step.
    env = gymnasium.make("blanket/planar-2link-v0", control=control, episode_s=1.0)
    try:
        fast = ArmAgent.from_env(env, goal=goal)
        slow = ArmAgent.from_env(env, goal=goal)
        slow.backend = "numpy"
        obs, _ = env.reset(seed=4)
        for _ in range(120):
            a_fast = fast.act(obs)
            a_slow = slow.act(obs)
            np.testing.assert_allclose(a_fast, a_slow, rtol=1e-9, atol=1e-9)
            np.testing.assert_allclose(fast.belief, slow.belief, rtol=1e-9, atol=1e-10)
            assert fast.diagnostics()["free_energy"] == pytest.approx(
                slow.diagnostics()["free_energy"], rel=1e-9, abs=1e-8
            )
            # the log view's standard deviations (filled by the kernel, or by numpy on the
            # numpy path) are those of the copied diagnostics
            for agent in (fast, slow):
                np.testing.assert_allclose(
                    agent.diagnostics(copy=False)["belief_sd"],
                    agent.diagnostics()["belief_sd"],
                    rtol=1e-12,
                )
            np.testing.assert_allclose(
                fast.diagnostics(copy=False)["belief_sd"],
                slow.diagnostics(copy=False)["belief_sd"],
                rtol=1e-8,
            )
            obs, *_ = env.step(a_fast)
    finally:
        env.close()


def test_one_gauss_newton_step_zeroes_the_linearised_gradient(planar_env):
    # After an update the gradient of the (linear) encoder + prior free energy vanishes at
    # the new belief: the step is the exact minimiser of the quadratic (Gauss-Newton).
    # Without the motors' bias state, which moves the belief after this step (its joint
    # step is checked in tests/test_motor_bias.py).
    agent = ArmAgent.from_env(planar_env, goal="reference", motor_bias_sd_rad_s=0.0)
    agent.backend = "numpy"
    obs = dict(_obs(planar_env, 6), camera_fresh=0)
    agent.act(obs)
    z_before, cov_before = agent.state.mean.copy(), agent.state.covariance.copy()
    action_before = agent.episode.command.command.copy()
    change_before = agent.episode.command.change.copy()
    agent.act(obs)
    z_after = agent.state.mean.copy()
    agent.episode.command.command = action_before  # the efference copy the step used
    # the step's motion noise: its velocity step of the change of command and tracking
    tracking = agent.episode.channels.tracking_variance
    phi, w = agent.model.transition_full, agent.model.motion_noise_at(change_before, tracking)
    z_prior = phi @ z_before
    prec_prior = np.linalg.inv(phi @ cov_before @ phi.T + w)
    _, grad_prior = agent.free_energy_and_gradient(obs, z_prior, z_prior, prec_prior)
    _, grad = agent.free_energy_and_gradient(obs, z_after, z_prior, prec_prior)
    assert np.abs(grad_prior).max() > 1.0
    assert np.abs(grad).max() < 1e-7 * np.abs(grad_prior).max()
