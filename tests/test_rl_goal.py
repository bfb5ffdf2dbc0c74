"""The goal-conditioned RL baselines: the HER view, the numpy actor, training and resume."""

from __future__ import annotations

import json

import gymnasium as gym
import numpy as np
import pytest

from blanket.bench.evaluate import run_policy_episode
from blanket.bench.rl import make_bench_env
from blanket.bench.rl_goal import (
    GoalPolicy,
    GoalTrainSettings,
    MlpActor,
    ReachGoalView,
    load_goal_policy,
    make_goal_env,
    reach_goal_reward,
    train_goal,
)
from blanket.errors import ConfigError

PLANAR = {"robot": "planar", "episode_s": 0.5}


def _view(repeat: int = 4, **env_options) -> ReachGoalView:
    return ReachGoalView(make_bench_env("planar", "velocity", 0.5, **env_options), repeat)


def _actor(n_in: int, n_out: int, seed: int = 0) -> MlpActor:
    rng = np.random.default_rng(seed)
    sizes = [n_in, 16, 16, n_out]
    weights = [rng.normal(0, 0.5, (b, a)) for a, b in zip(sizes[:-1], sizes[1:], strict=True)]
    return MlpActor(weights, [rng.normal(0, 0.1, w.shape[0]) for w in weights], "relu", "tanh")


def test_goal_view_passes_gymnasium_and_sb3_env_checkers():
    from gymnasium.utils.env_checker import check_env
    from stable_baselines3.common.env_checker import check_env as sb3_check_env

    for robot in ("planar", "iiwa"):
        env = make_goal_env(GoalTrainSettings(robot=robot, episode_s=0.5), monitor=False)
        try:
            check_env(env, skip_render_check=True)
            sb3_check_env(env, warn=True)  # includes the compute_reward checks of goal envs
            assert env.action_space.low.min() == -1.0 and env.action_space.high.max() == 1.0
        finally:
            env.close()


def test_compute_reward_is_vectorised_and_matches_step_rewards():
    env = _view()
    try:
        obs, _ = env.reset(seed=3)
        achieved, desired, rewards = [], [], []
        for _ in range(6):
            obs, r, _t, _tr, info = env.step(env.action_space.sample())
            achieved.append(obs["achieved_goal"])
            desired.append(obs["desired_goal"])
            rewards.append(r)
        batch = env.compute_reward(np.array(achieved), np.array(desired), [info] * 6)
        assert batch.shape == (6,)
        np.testing.assert_allclose(batch, rewards, rtol=1e-6)
        # the tolerance bonus: 1 inside the env's 1 cm, none outside
        g = np.zeros((2, 3))
        a = np.array([[0.005, 0.0, 0.0], [0.02, 0.0, 0.0]])
        np.testing.assert_allclose(
            reach_goal_reward(a, g, 0.01, 0.1, 1.0), [1.0 - 0.05, -0.2], rtol=1e-6
        )
    finally:
        env.close()


def test_achieved_goal_is_forward_kinematics_of_the_encoders_matching_pybullet():
    # with noiseless encoders the body model's tip (pinocchio) must equal the simulator's tip
    # (pybullet's link state): an outside check of the achieved goal
    for robot in ("planar", "iiwa"):
        env = ReachGoalView(
            make_bench_env(
                robot,
                "velocity",
                0.5,
                encoder_angle_noise_rad=0.0,
                encoder_velocity_noise_rad_s=0.0,
            ),
            1,
        )
        try:
            env.reset(seed=1)
            for _ in range(5):
                obs, _r, _t, _tr, info = env.step(np.full(env.action_space.shape, 0.5))
            tip = info["external"]["tip_position_m"]
            np.testing.assert_allclose(obs["achieved_goal"], tip, atol=1e-5)
            np.testing.assert_allclose(
                obs["desired_goal"], info["external"]["target_position_m"], atol=1e-6
            )
        finally:
            env.close()


def test_action_repeat_must_be_one_of_the_allowed_values():
    base = make_bench_env("planar", "velocity", 0.5)
    try:
        for bad in (0, 3, 16, 2.0, True):
            with pytest.raises(ConfigError, match="action_repeat"):
                ReachGoalView(base, bad)
    finally:
        base.close()
    with pytest.raises(ConfigError, match="eval_seed"):
        GoalTrainSettings(eval_seed=5).validate()
    with pytest.raises(ConfigError, match="--algo"):
        GoalTrainSettings(algo="sac").validate()
    for key in ("learning_rate_end", "target_entropy_end", "actor_ema"):
        for bad in ("x", float("nan"), True):
            with pytest.raises(ConfigError, match=key):
                GoalTrainSettings(hyperparameters={key: bad}).defaults()


def test_bench_policy_decides_exactly_as_the_training_view():
    # the same actor driven through the HER view and as a bench policy meets the same states:
    # one observation rule (averaged readings, forward kinematics, [-1, 1] actions)
    repeat = 4
    env = _view(repeat)
    actor = _actor(env.observation_space["observation"].shape[0] + 6, 2)
    try:
        obs, _ = env.reset(seed=11)
        distances = []
        done = False
        while not done:
            x = np.concatenate([obs[k] for k in sorted(obs)])
            obs, _r, term, trunc, info = env.step(actor(x))
            distances.append(info["distance_m"])
            done = term or trunc
        description = env.unwrapped.description
    finally:
        env.close()
    bench = make_bench_env("planar", "velocity", 0.5)
    try:
        trace = run_policy_episode(bench, GoalPolicy(actor, description, repeat), seed=11)
    finally:
        bench.close()
    decisions = trace.distance_m[repeat - 1 :: repeat]
    np.testing.assert_allclose(decisions, distances[: len(decisions)], rtol=0, atol=1e-12)
    assert np.all(trace.action[1:repeat] == trace.action[0])
    assert len(decisions) == len(distances) > 10


def test_numpy_actor_matches_stable_baselines3_predict():
    # the exported actor against SB3's own deterministic predict (the reference library)
    from blanket.bench.rl_goal import _build

    rng = np.random.default_rng(0)
    for algo in ("sac-her", "ppo-vec"):
        settings = GoalTrainSettings(algo=algo, steps=64, n_envs=2, **PLANAR)
        hp = {**settings.defaults(), "net_arch": [32, 32]}
        if algo == "sac-her":
            hp["buffer_size"] = 1000
        model, env = _build(settings, hp)
        try:
            actor = MlpActor.from_sb3(model)
            for _ in range(5):
                obs = {
                    k: rng.normal(size=s.shape).astype(np.float32)
                    for k, s in env.observation_space.spaces.items()
                }
                expected, _ = model.predict(obs, deterministic=True)
                got = actor(np.concatenate([obs[k] for k in sorted(obs)]))
                np.testing.assert_allclose(got, expected, atol=1e-5)
        finally:
            env.close()


def test_sac_her_smoke_run_writes_curve_weights_and_resumes(tmp_path):
    import pyarrow.parquet as pq

    hyper = {"net_arch": [32, 32], "batch_size": 32}
    settings = GoalTrainSettings(
        steps=160, eval_every=80, eval_episodes=2, hyperparameters=hyper, **PLANAR
    )
    meta = train_goal(settings, tmp_path)
    assert meta["policy_steps"] == 160 and meta["control_steps"] == 160 * 8
    curve = pq.read_table(tmp_path / "curve.parquet").to_pylist()
    assert [r["policy_steps"] for r in curve] == [80, 160]
    for r in curve:
        assert 0 <= r["success_1cm"] <= r["success_5cm"] <= 1 and r["final_error_m"] > 0
    assert "decisions 160" in (tmp_path / "progress.log").read_text()
    best = json.loads((tmp_path / "best" / "sac-her.json").read_text())
    assert best["seed"] == 0 and best["settings"]["action_repeat"] == 8
    assert best["versions"]["stable_baselines3"]
    # resume continues the same run to a larger budget and keeps the curve
    more = GoalTrainSettings(
        steps=240, eval_every=80, eval_episodes=2, hyperparameters=hyper, **PLANAR
    )
    meta = train_goal(more, tmp_path, resume=True)
    assert [r["policy_steps"] for r in meta["learning_curve"]] == [80, 160, 240]
    assert meta["wall_time_s"] >= curve[-1]["wall_s"]
    with pytest.raises(ConfigError, match="settings differ"):
        train_goal(GoalTrainSettings(steps=300, seed=1, **PLANAR), tmp_path, resume=True)
    # the best weights run as a bench policy, with no SB3 in the loop
    bench = make_bench_env("planar", "velocity", 0.5)
    try:
        policy = load_goal_policy("sac-her", bench.unwrapped.description, tmp_path / "best")
        trace = run_policy_episode(bench, policy, seed=0)
    finally:
        bench.close()
    assert np.all(np.abs(trace.action) <= bench.unwrapped.action_space.high + 1e-12)


def test_ppo_runs_on_four_vector_envs(tmp_path):
    # gymnasium's own vector env steps the goal view, and PPO trains on 4 envs
    settings = GoalTrainSettings(algo="ppo-vec", **PLANAR)
    vec = gym.vector.SyncVectorEnv([lambda: make_goal_env(settings, monitor=False)] * 4)
    try:
        obs, _ = vec.reset(seed=0)
        assert obs["achieved_goal"].shape == (4, 3)
        obs, r, _t, _tr, _i = vec.step(vec.action_space.sample())
        assert r.shape == (4,) and np.all(np.isfinite(r))
    finally:
        vec.close()
    ppo = GoalTrainSettings(
        algo="ppo-vec",
        steps=128,
        n_envs=4,
        eval_every=128,
        eval_episodes=1,
        hyperparameters={"n_steps": 32, "batch_size": 64, "n_epochs": 1, "net_arch": [16]},
        **PLANAR,
    )
    meta = train_goal(ppo, tmp_path)
    assert meta["policy_steps"] == 128 and len(meta["learning_curve"]) == 1
    assert (tmp_path / "best" / "ppo-vec.npz").is_file()


def test_train_rl_cli_refuses_bad_goal_options(tmp_path):
    from blanket.cli import main

    out = str(tmp_path / "o")
    for args in (
        ["--algo", "sac-her", "--action-repeat", "3"],
        ["--algo", "sac-her", "--resume"],
        ["--algo", "sac", "--resume"],
        ["--algo", "sac-herr"],
    ):
        assert main(["train-rl", "--steps", "10", "--out", out, *args]) == 2


def test_learning_rate_end_gives_a_linear_schedule_over_the_budget():
    from blanket.bench.rl_goal import _build

    settings = GoalTrainSettings(
        steps=1000, hyperparameters={"learning_rate_end": 1e-4, "buffer_size": 1000}, **PLANAR
    )
    model, env = _build(settings, settings.defaults())
    try:
        assert model.lr_schedule(1.0) == pytest.approx(1e-3)
        assert model.lr_schedule(0.5) == pytest.approx(5.5e-4)
        assert model.lr_schedule(0.0) == pytest.approx(1e-4)
    finally:
        env.close()


def test_near_bonus_adds_the_smooth_term_inside_and_outside_the_tolerance():
    # r = -d / s + b [d <= tol] + w exp(-d / tol), evaluated by hand (common practice, no source)
    g = np.zeros((3, 3))
    a = np.array([[0.0, 0.0, 0.0], [0.005, 0.0, 0.0], [0.0, 0.02, 0.0]])
    expected = [1.0 + 2.0, -0.05 + 1.0 + 2.0 * np.exp(-0.5), -0.2 + 2.0 * np.exp(-2.0)]
    np.testing.assert_allclose(reach_goal_reward(a, g, 0.01, 0.1, 1.0, 2.0), expected, rtol=1e-6)
    # the term is sharper than the linear one near the goal: slope at 1 cm is w / (e tol)
    h = 1e-6
    d = np.array([[0.01 - h, 0, 0], [0.01 + h, 0, 0]])
    r = reach_goal_reward(d, np.zeros((2, 3)), 0.02, 0.1, 0.0, 2.0).astype(float)
    slope = (r[1] - r[0]) / (2 * h)
    assert slope == pytest.approx(-1 / 0.1 - 2.0 / 0.02 * np.exp(-0.5), rel=1e-2)
    with pytest.raises(ConfigError, match="near_bonus"):
        ReachGoalView(make_bench_env("planar", "velocity", 0.5), 4, near_bonus=-1.0)


def test_actor_average_follows_the_polyak_recursion():
    # after k updates towards fixed weights theta from avg0: avg_k = theta + decay^k (avg0 -
    # theta), the closed form of the geometric recursion (common practice, no source)
    import torch

    from blanket.bench.rl_goal import ActorAverage, _build

    settings = GoalTrainSettings(
        steps=1000, hyperparameters={"buffer_size": 1000, "net_arch": [8]}, **PLANAR
    )
    model, env = _build(settings, settings.defaults())
    try:
        average = ActorAverage(model, 0.9)
        start = MlpActor.from_sb3(model)
        with torch.no_grad():
            for p in average.params:
                p.add_(1.0)
        for _ in range(5):
            average.update()
        avg = average.actor()
        for w0, w in zip(start.weights, avg.weights, strict=True):
            np.testing.assert_allclose(w, w0 + 1.0 - 0.9**5, atol=1e-6)
        now = MlpActor.from_sb3(model)
        np.testing.assert_allclose(now.weights[0], start.weights[0] + 1.0, atol=1e-6)
        with pytest.raises(ConfigError, match="actor_ema"):
            ActorAverage(model, 1.0)
    finally:
        env.close()


def test_averaged_actor_and_falling_entropy_target_in_a_smoke_run(tmp_path):
    import pyarrow.parquet as pq

    hyper = {
        "net_arch": [32, 32],
        "batch_size": 32,
        "actor_ema": 0.99,
        "target_entropy_end": -5.0,
    }
    settings = GoalTrainSettings(
        steps=160, eval_every=80, eval_episodes=2, hyperparameters=hyper, **PLANAR
    )
    train_goal(settings, tmp_path)
    curve = pq.read_table(tmp_path / "curve.parquet").to_pylist()
    # planar arm: 2 actions, SB3's automatic target -2 falls linearly to -5 over 160 decisions
    assert [r["target_entropy"] for r in curve] == pytest.approx([-3.5, -5.0], abs=0.05)
    for r in curve:
        assert 0 <= r["raw_success_1cm"] <= r["raw_success_5cm"] <= 1
    assert (tmp_path / "checkpoint" / "actor_ema.npz").is_file()
    more = GoalTrainSettings(
        steps=240, eval_every=80, eval_episodes=2, hyperparameters=hyper, **PLANAR
    )
    meta = train_goal(more, tmp_path, resume=True)
    assert [r["policy_steps"] for r in meta["learning_curve"]] == [80, 160, 240]
