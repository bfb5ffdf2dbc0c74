"""Estimation you can trust: the arm agent's joint-state error against an EKF, learned
precisions against the true noise, and fault flags against injected faults."""

from __future__ import annotations

import gymnasium
import numpy as np
import pytest
from scipy.linalg import solve_discrete_are

import blanket  # noqa: F401  (registers the envs)
from blanket.agent import ArmAgent
from blanket.body import ArmModel
from blanket.runner import run_episode
from blanket.wrappers.perturbations import CameraDropout, FrozenEncoder, NoiseBurst
from reference_ekf import ArmEkf, Recording, best_ekf, record_run

RATE_HZ = 240.0
INTENSITIES = (0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0)


def _true_precision(description):
    return {
        "joint_angle": 1.0 / description.encoder_angle_noise_rad**2,
        "joint_velocity": 1.0 / description.encoder_velocity_noise_rad_s**2,
        "camera": 1.0 / description.camera.pixel_noise_px**2,
    }


def _body(description):
    return ArmModel.from_urdf(
        description.urdf_path, description.end_effector, joint_names=description.joint_names
    )


def test_reference_ekf_converges_to_the_riccati_solution():
    # Encoders only, linear: the EKF's covariance must reach the steady state of the discrete
    # algebraic Riccati equation (scipy.linalg.solve_discrete_are; Simon 2006, Optimal State
    # Estimation, eq. 7.41 gives the a-priori DARE; the a-posteriori P = P- - P- H' S^-1 H P-).
    n, steps, dt = 2, 4000, 1.0 / RATE_HZ
    rng = np.random.default_rng(0)
    rec = Recording(
        dt=dt,
        joint_angle=rng.normal(size=(steps, n)) * 0.01,
        joint_velocity=rng.normal(size=(steps, n)) * 0.05,
        tip_pixel=np.zeros((steps, 2)),
        camera_on=np.zeros(steps, dtype=bool),
        command=np.zeros((steps, n)),
        true_angle=np.zeros((steps, n)),
        belief=np.zeros((steps, n)),
        success=False,
    )
    ekf = ArmEkf(None, None, dt, 3.0, 0.01, 0.05, 1.0)
    ekf.run(rec)
    F, Q = ekf._matrices(n)
    H = np.eye(2 * n)
    R = np.diag([1e-4] * n + [2.5e-3] * n)
    prior = solve_discrete_are(F.T, H.T, Q, R)
    S = H @ prior @ H.T + R
    post = prior - prior @ H.T @ np.linalg.solve(S, H @ prior)
    np.testing.assert_allclose(ekf.covariance, post, rtol=1e-6, atol=1e-14)


@pytest.mark.parametrize(
    "env_id,kwargs", [("blanket/planar-2link-v0", {}), ("blanket/arm-reach-v0", {"robot": "iiwa"})]
)
def test_unbiased_belief_is_as_good_as_a_tuned_ekf(env_id, kwargs):
    # Acceptance: joint-angle RMSE within 1.2x that of a textbook EKF (Bar-Shalom, Li &
    # Kirubarajan 2001, ch. 10; constant-velocity model, eq. 6.2.2-12) run on the same
    # recorded encoders and camera pixels, its process noise scanned and the best taken.
    env = gymnasium.make(env_id, episode_s=3.0, **kwargs)
    d = env.unwrapped.description
    agent = ArmAgent.from_env(env, goal="reference")
    recs = [record_run(env, agent, seed=s) for s in (0, 1)]
    env.close()
    assert all(r.success for r in recs)
    agent_rmse = float(np.sqrt(np.mean([np.mean((r.belief - r.true_angle) ** 2) for r in recs])))
    ekf_rmse, tuning = best_ekf(recs, d, _body(d), INTENSITIES)
    # the scan's best is inside the grid, not on its edge
    assert INTENSITIES[0] < tuning["acceleration_intensity"] < INTENSITIES[-1]
    encoder_rmse = float(
        np.sqrt(np.mean([np.mean((r.joint_angle - r.true_angle) ** 2) for r in recs]))
    )
    assert ekf_rmse < 0.3 * encoder_rmse  # the reference filters something
    assert agent_rmse <= 1.2 * ekf_rmse, (agent_rmse, ekf_rmse)


@pytest.mark.parametrize("channel", ["joint_angle", "joint_velocity", "camera"])
@pytest.mark.parametrize("factor", [100.0, 0.01])
def test_learned_precision_finds_the_true_noise(channel, factor):
    # Acceptance: from a start 100x off, within 20 % of 1 / sigma^2 (the env's noise, the
    # truth outside the agent) after 10 s of simulated reaching and holding.
    env = gymnasium.make("blanket/planar-2link-v0", episode_s=10.0)
    true = _true_precision(env.unwrapped.description)
    agent = ArmAgent.from_env(
        env, learn_precision=True, **{f"{channel}_precision": factor * true[channel]}
    )
    result = run_episode(env, agent, seed=0)
    env.close()
    assert result.success
    learned = agent.diagnostics()["precision"]
    for name, value in learned.items():
        np.testing.assert_allclose(value / true[name], 1.0, atol=0.2, err_msg=name)


def _flag_trace(env, agent, seed):
    obs, info = env.reset(seed=seed)
    agent.reset()
    flags, speeds, success = [], [], False
    while True:
        obs, _r, terminated, truncated, info = env.step(agent.act(obs))
        diag = agent.diagnostics()["fault"]
        flags.append({k: v.copy() for k, v in diag.items()})
        speeds.append(np.abs(info["external"]["joint_velocity_rad_s"]))
        success = success or bool(info["success"])
        if terminated or truncated:
            return flags, np.array(speeds), success


@pytest.mark.parametrize("joint", [0, 1])
def test_frozen_encoder_is_flagged_fast_and_the_arm_still_reaches(joint):
    # goal="reference": under the default goal prior the belief keeps part of the offset it
    # took from the frozen reading before the flag, and the reach can fail (see
    # scripts/bench_faults.py for the rates of both modes).
    start_s = 0.3
    base = gymnasium.make("blanket/planar-2link-v0", episode_s=4.0)
    env = FrozenEncoder(base, joint=joint, start_s=start_s)
    agent = ArmAgent.from_env(base, goal="reference", fault_detection=True)
    flags, speeds, success = _flag_trace(env, agent, seed=0)
    env.close()
    k0 = int(round(start_s * RATE_HZ)) - 1  # row of the first frozen observation
    assert speeds[k0, joint] > 0.1  # the joint is moving when its encoder freezes
    flagged = [k for k, f in enumerate(flags) if f["joint_angle"][joint]]
    assert flagged and flagged[0] >= k0  # never before the fault
    assert (flagged[0] - k0) / RATE_HZ <= 0.5
    assert all(f["joint_angle"][joint] for f in flags[flagged[0] :])  # stays flagged
    assert not any(f["joint_angle"][1 - joint] for f in flags)
    assert success


def test_noise_burst_is_flagged_down_weighted_and_cleared():
    base = gymnasium.make("blanket/planar-2link-v0", episode_s=3.0)
    env = NoiseBurst(base, channel="joint_angle", factor=10.0, start_s=1.0, duration_s=0.5)
    # fault detection alone: with learned precisions the weight returns to the learned one
    agent = ArmAgent.from_env(base, fault_detection=True, learn_precision=False)
    obs, _ = env.reset(seed=0)
    agent.reset()
    t, flagged, weight = [], [], []
    while True:
        action = agent.act(obs)
        flagged.append(bool(agent.diagnostics()["fault"]["joint_angle"].any()))
        weight.append(float(agent.episode.channels.effective("joint_angle").min()))
        t.append(len(t) / RATE_HZ)
        obs, _r, terminated, truncated, info = env.step(action)
        if terminated or truncated:
            break
    env.close()
    t, flagged, weight = np.array(t), np.array(flagged), np.array(weight)
    nominal = 1.0 / base.unwrapped.description.encoder_angle_noise_rad**2
    assert not flagged[t < 1.0].any()
    assert flagged[(t > 1.1) & (t < 1.5)].all()
    assert weight[flagged].max() < 1e-3 * nominal  # down-weighted while flagged
    assert not flagged[t > 2.0].any()  # healed: the flag clears ...
    assert weight[-1] == pytest.approx(nominal)  # ... and the precision returns
    assert info["success"]


def test_fault_free_reaching_raises_no_flag():
    env = gymnasium.make("blanket/arm-reach-v0", robot="iiwa", episode_s=3.0)
    agent = ArmAgent.from_env(env, fault_detection=True)
    for seed in (0, 1):
        flags, _speeds, success = _flag_trace(env, agent, seed)
        assert success
        assert not any(v.any() for f in flags for v in f.values())
    env.close()


@pytest.mark.slow
def test_reaching_survives_thirty_percent_camera_dropout():
    base = gymnasium.make("blanket/arm-reach-v0", robot="iiwa")
    env = CameraDropout(base, probability=0.3)
    agent = ArmAgent.from_env(base, fault_detection=True)
    results = [run_episode(env, agent, seed=s) for s in range(20)]
    env.close()
    assert sum(r.success for r in results) >= 18
