"""gymnasium's env checker on ``blanket/base-goto-v0``: no wall clock in ``info``."""

from __future__ import annotations

import warnings

import gymnasium as gym
import numpy as np
from gymnasium.utils.env_checker import check_env

import blanket  # noqa: F401  (registers the env ids)


def _check(env: gym.Env) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        # The action is in physical units (rad/s) by the env contract, so gymnasium's advice to
        # normalise Box actions to [-1, 1] is the one warning we accept.
        warnings.filterwarnings("ignore", message=".*symmetric and normalized.*")
        check_env(env, skip_render_check=True)


def test_check_env_passes_with_default_settings():
    # gymnasium's check_env resets twice with one seed and compares whole info dicts
    # (gymnasium.utils.env_checker.check_reset_seed_determinism), so any wall-clock value in
    # info fails it.
    env = gym.make("blanket/base-goto-v0", episode_s=2.0).unwrapped
    try:
        _check(env)
    finally:
        env.close()


def test_measure_step_time_is_accepted_and_info_has_no_wall_clock():
    # The keyword stays accepted for existing scenario files; either value gives the same info.
    infos = []
    for measure in (True, False):
        env = gym.make("blanket/base-goto-v0", episode_s=2.0, measure_step_time=measure)
        try:
            _, info = env.reset(seed=3)
            _, _, _, _, info = env.step(np.array([2.0, 2.5]))
            infos.append(info)
        finally:
            env.close()
    assert "sim_step_us" not in infos[0]
    assert infos[0]["external"]["base_pose"].tolist() == infos[1]["external"]["base_pose"].tolist()
    assert infos[0]["distance_m"] == infos[1]["distance_m"]
