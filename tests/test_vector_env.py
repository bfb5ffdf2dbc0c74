"""gymnasium's SyncVectorEnv / AsyncVectorEnv over blanket envs (issue 22, item 4): batched
shapes, automatic resets, and the same numbers as single envs for the same seeds."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

import blanket  # noqa: F401  (registers the env ids)
from blanket.wrappers import SafetyLimits

STEPS = 14
EPISODE_S = 6 / 240.0  # truncates after 6 steps, so every run crosses two automatic resets


def _actions(n_envs: int, n_joints: int, high: np.ndarray) -> np.ndarray:
    k = np.arange(STEPS)[:, None, None] + np.arange(n_envs)[None, :, None]
    return 0.5 * high * np.sin(0.3 * k + np.arange(n_joints))


def _single_runs(options: dict, seed: int, actions: np.ndarray, safety: bool) -> list[list]:
    """Each env alone, reset by hand the way the vector env's next-step autoreset does."""
    runs = []
    for i in range(actions.shape[1]):
        env = gym.make("blanket/arm-reach-v0", episode_s=EPISODE_S, **options)
        if safety:
            env = SafetyLimits(env)
        obs, _ = env.reset(seed=seed + i)
        rows = [(obs, 0.0, False, False)]
        done = False
        for a in actions[:, i]:
            if done:  # the step after an episode's end only resets (no seed: the env's stream)
                obs, _ = env.reset()
                rows.append((obs, 0.0, False, False))
                done = False
                continue
            obs, reward, terminated, truncated, _ = env.step(a)
            rows.append((obs, reward, terminated, truncated))
            done = terminated or truncated
        env.close()
        runs.append(rows)
    return runs


def _vector_run(vec: gym.vector.VectorEnv, seed: int, actions: np.ndarray) -> list:
    obs, _ = vec.reset(seed=seed)
    n = actions.shape[1]
    rows = [(obs, np.zeros(n), np.zeros(n, bool), np.zeros(n, bool))]
    for a in actions:
        obs, reward, terminated, truncated, _ = vec.step(a)
        rows.append((obs, reward, terminated, truncated))
    vec.close()
    return rows


def _assert_same(vector_rows: list, single_runs: list[list]) -> None:
    for t, (obs, reward, terminated, truncated) in enumerate(vector_rows):
        for i, run in enumerate(single_runs):
            s_obs, s_reward, s_terminated, s_truncated = run[t]
            for key, value in s_obs.items():
                np.testing.assert_array_equal(obs[key][i], value, err_msg=f"step {t} env {i} {key}")
            assert reward[i] == s_reward
            assert terminated[i] == s_terminated and truncated[i] == s_truncated


@pytest.mark.parametrize("safety", [False, True])
def test_sync_vector_env_matches_single_envs(safety):
    options = {"robot": "panda"}
    vec = gym.make_vec(
        "blanket/arm-reach-v0",
        num_envs=3,
        vectorization_mode="sync",
        wrappers=[SafetyLimits] if safety else None,
        episode_s=EPISODE_S,
        **options,
    )
    assert vec.observation_space["joint_angle_rad"].shape == (3, 7)
    assert vec.action_space.shape == (3, 7)
    high = vec.single_action_space.high
    actions = _actions(3, 7, high)
    rows = _vector_run(vec, 5, actions)
    obs, reward, terminated, truncated = rows[6]
    assert obs["tip_pixel_px"].shape == (3, 2) and reward.shape == (3,)
    assert truncated.all() and not terminated.any()  # all three episodes end at step 6
    _assert_same(rows, _single_runs(options, 5, actions, safety))


def test_async_vector_env_matches_single_envs():
    options = {"robot": "xarm6", "control": "torque"}
    vec = gym.make_vec(
        "blanket/arm-reach-v0",
        num_envs=2,
        vectorization_mode="async",
        vector_kwargs={"context": "forkserver"},
        wrappers=[SafetyLimits],
        episode_s=EPISODE_S,
        **options,
    )
    high = vec.single_action_space.high
    actions = _actions(2, 6, 0.05 * high)
    rows = _vector_run(vec, 9, actions)
    assert rows[-1][0]["joint_velocity_rad_s"].shape == (2, 6)
    _assert_same(rows, _single_runs(options, 9, actions, True))
