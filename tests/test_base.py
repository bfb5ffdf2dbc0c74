"""Mobile bases: kinematics, sensors, env contract, agent (blanket/base-goto-v0)."""

from __future__ import annotations

from types import SimpleNamespace

import gymnasium as gym
import numpy as np
import pytest
from scipy.integrate import solve_ivp

import blanket  # noqa: F401  (registers the env ids)
from blanket.agent.mobile_base import BaseAgent, plan_waypoints, run_base_episode
from blanket.body.diff_drive import DiffDriveModel, polar_coordinates
from blanket.errors import ConfigError
from blanket.planar_motion import (
    bearing_range,
    bearing_range_jacobian,
    body_velocity,
    integrate_pose,
    wheel_speeds,
    wrap_angle,
)
from blanket.sensors.wheel_odometry import dead_reckoning
from blanket.success import time_to_success
from blanket_envs.base_goto import ROBOTS, BaseGotoEnv, calibrate_effective_track
from blanket_envs.greenhouse_rows import box_distance, default_layout


def _fd(fun, x, eps=1e-6):
    x = np.asarray(x, dtype=float)
    cols = []
    for i in range(x.size):
        d = np.zeros_like(x)
        d[i] = eps
        cols.append((np.asarray(fun(x + d)) - np.asarray(fun(x - d))) / (2 * eps))
    return np.stack(cols, axis=-1)


# ---------------------------------------------------------------- kinematics
def test_body_velocity_matches_textbook_relations():
    # Siegwart, Nourbakhsh & Scaramuzza 2011, sec. 3.2: v = r (wR + wL) / 2,
    # omega = r (wR - wL) / track. r = 0.1 m, track = 0.5 m, wL = 2, wR = 4 rad/s:
    # v = 0.3 m/s, omega = 0.4 rad/s (hand computation from the formulas).
    v, om = body_velocity(np.array([2.0, 4.0]), 0.1, 0.5)
    assert v == pytest.approx(0.3)
    assert om == pytest.approx(0.4)
    np.testing.assert_allclose(wheel_speeds(0.3, 0.4, 0.1, 0.5), [2.0, 4.0])


def test_integrate_pose_matches_ode_solution():
    # The unicycle ODE x' = v cos h, y' = v sin h, h' = omega integrated by scipy (RK45).
    v, om, dt = 0.4, 0.7, 1.3
    sol = solve_ivp(
        lambda t, s: [v * np.cos(s[2]), v * np.sin(s[2]), om],
        (0, dt),
        [0.5, -0.2, 2.9],
        rtol=1e-10,
        atol=1e-12,
    )
    ref = sol.y[:, -1]
    got = integrate_pose(np.array([0.5, -0.2, 2.9]), v, om, dt)
    np.testing.assert_allclose(got[:2], ref[:2], atol=1e-8)
    assert wrap_angle(got[2] - ref[2]) == pytest.approx(0.0, abs=1e-8)


def test_wrap_angle_and_polar_coordinates():
    assert wrap_angle(np.deg2rad(350.0)) == pytest.approx(np.deg2rad(-10.0))
    assert wrap_angle(-np.deg2rad(190.0)) == pytest.approx(np.deg2rad(170.0))
    # goal straight ahead 2 m, same heading: rho = 2, alpha = beta = 0 (Astolfi 1999 definitions)
    rho, alpha, beta = polar_coordinates(
        np.array([1.0, 1.0, np.pi / 2]), np.array([1.0, 3.0, np.pi / 2])
    )
    assert (rho, alpha, beta) == pytest.approx((2.0, 0.0, 0.0))


def test_model_jacobians_match_finite_differences():
    model = DiffDriveModel(0.17775, 1.77, icr_offset_m=-0.21)
    z = np.array([0.7, 0.3, -0.2, 0.5])  # heading, x', y', heading'

    def wheels(z):
        return model.predict_wheel_speeds(z[0], z[1:])

    def lateral(z):
        return model.lateral_residual(z[0], z[1:])

    np.testing.assert_allclose(
        model.predict_wheel_speeds_jacobian(z[0], z[1:]), _fd(wheels, z), atol=1e-7
    )
    np.testing.assert_allclose(
        model.lateral_residual_jacobian(z[0], z[1:]), _fd(lateral, z), atol=1e-7
    )


def test_bearing_range_jacobians_match_finite_differences():
    pose = np.array([-1.1, 1.3, 0.7])
    lm = np.array([[-3.1, 0.3], [3.1, 2.9], [0.5, -2.0]])
    for offset in (0.0, 0.35):
        jb, jr = bearing_range_jacobian(pose, lm, offset)
        np.testing.assert_allclose(
            jb, _fd(lambda p, d=offset: bearing_range(p, lm, d)[0], pose), atol=1e-7
        )
        np.testing.assert_allclose(
            jr, _fd(lambda p, d=offset: bearing_range(p, lm, d)[1], pose), atol=1e-7
        )


def test_dead_reckoning_straight_and_turning():
    # 1 s at wL = wR = 5 rad/s, r = 0.06: 0.3 m straight ahead (textbook v = r w).
    track = dead_reckoning(np.zeros(3), np.full((40, 2), 5.0), 0.025, 0.06, 0.3)
    np.testing.assert_allclose(track[-1], [0.3, 0.0, 0.0], atol=1e-12)
    # spin in place: omega = r (wR - wL) / track = 0.06 * 2 / 0.3 = 0.4 rad/s for 1 s
    spin = dead_reckoning(np.zeros(3), np.tile([-1.0, 1.0], (40, 1)), 0.025, 0.06, 0.3)
    np.testing.assert_allclose(spin[-1], [0.0, 0.0, 0.4], atol=1e-12)


# ---------------------------------------------------------------- simulation references
def test_rover_kinematics_against_pybullet_base_velocity():
    # pybullet as the dynamics reference: the rover's measured base velocity (getBaseVelocity,
    # via info["external"]) against v = r (wR + wL) / 2, omega = r (wR - wL) / track.
    env = BaseGotoEnv(robot="rover", wheel_speed_noise_rad_s=0.0)
    try:
        env.reset(seed=0, options={"start_pose": (4.3, 0.0, 0.0)})
        spec = ROBOTS["rover"]
        vs, oms = [], []
        for k in range(60):
            _, _, _, _, info = env.step(np.array([3.0, 5.0]))
            if k >= 20:
                vel = info["external"]["base_velocity"]
                h = info["external"]["base_pose"][2]
                vs.append(np.cos(h) * vel[0] + np.sin(h) * vel[1])
                oms.append(vel[2])
        v_ref = spec.wheel_radius_m * (5.0 + 3.0) / 2
        om_ref = spec.wheel_radius_m * (5.0 - 3.0) / spec.track_m
        assert np.mean(vs) == pytest.approx(v_ref, rel=0.03)
        assert np.mean(oms) == pytest.approx(om_ref, rel=0.03)
    finally:
        env.close()


def test_husky_effective_track_calibration_matches_stored_factor():
    # Spin in place in pybullet and compare the yaw rate with r (wR - wL) / track; the stored
    # factor is the mean over 1..4 rad/s (measured; pybullet's skid steer slips heavily).
    cal = [calibrate_effective_track("husky", w, duration_s=3.0) for w in (1.0, 2.0, 3.0, 4.0)]
    factor = np.mean([c["factor"] for c in cal])
    assert factor == pytest.approx(ROBOTS["husky"].effective_track_factor, rel=0.1)
    assert factor > 1.5  # a skid steer turns much less than the two-wheel relation says
    assert np.mean([c["icr_offset_m"] for c in cal]) == pytest.approx(
        ROBOTS["husky"].icr_offset_m, abs=0.03
    )
    rover = calibrate_effective_track("rover", 2.0, duration_s=2.0)
    assert rover["factor"] == pytest.approx(1.0, abs=0.03)


# ---------------------------------------------------------------- env contract
def test_seeded_reset_reproducible_and_observation_keys():
    env = gym.make("blanket/base-goto-v0", robot="husky")
    try:
        o1, i1 = env.reset(seed=7)
        o2, i2 = env.reset()
        o3, i3 = env.reset(seed=7)
        np.testing.assert_allclose(i1["external"]["base_pose"], i3["external"]["base_pose"])
        assert not np.allclose(i1["external"]["base_pose"], i2["external"]["base_pose"])
        np.testing.assert_array_equal(o1["landmark_bearing_rad"], o3["landmark_bearing_rad"])
        assert set(o1) == {
            "wheel_speed_rad_s",
            "yaw_rate_rad_s",
            "landmark_bearing_rad",
            "landmark_range_m",
            "landmark_visible",
            "camera_fresh",
        }
        for key in ("distance_m", "heading_error_rad", "success", "time_to_success_s", "contact"):
            assert key in i1
        assert i1["external"]["base_pose"].shape == (3,)
        # start poses keep the base clear of the benches
        assert (
            np.min(box_distance(i1["external"]["base_pose"][:2], default_layout().bench_boxes_m))
            > 0.5
        )
    finally:
        env.close()


def test_landmark_occlusion_by_benches():
    # In the north aisle facing east the posts at the east end of that aisle are seen; the posts
    # at the east end of the south aisle lie inside the field of view but behind the middle bench.
    env = BaseGotoEnv(robot="rover", bearing_noise_rad=0.0, range_noise_m=0.0, camera_range_m=20.0)
    try:
        obs, _ = env.reset(seed=0, options={"start_pose": (-2.5, 1.3, 0.0)})
        lm = env.description.landmarks_m
        vis = obs["landmark_visible"].astype(bool)
        north_end = (lm[:, 0] > 3) & (lm[:, 0] < 4) & (lm[:, 1] > 0) & (lm[:, 1] < 2.6)
        south_end = (lm[:, 0] > 3) & (lm[:, 0] < 4) & (lm[:, 1] < -2.0)
        assert vis[north_end].all()
        assert not vis[south_end].any()
        pose = env.unwrapped.world.planar_pose()
        b, r = bearing_range(pose, lm[vis], env.description.camera_offset_m)
        np.testing.assert_allclose(obs["landmark_bearing_rad"][vis], b, atol=1e-5)
        np.testing.assert_allclose(obs["landmark_range_m"][vis], r, atol=1e-4)
    finally:
        env.close()


@pytest.mark.parametrize(
    "kwargs, fragment",
    [
        ({"robot": "tank"}, "robot must be one of ['husky', 'rover']"),
        ({"landmarks": [[0.0, 50.0]]}, "outside the world"),
        ({"wheel_radius_m": 0.0}, "wheel_radius_m must be > 0"),
        ({"wheel_radius_m": -0.1}, "wheel_radius_m must be > 0"),
        ({"dock_pose": (0.0, 0.0, 0.0)}, "inside an obstacle"),
        ({"control_hz": 50}, "control_hz must divide 240"),
        ({"camera_hz": 100}, "camera_hz must be in"),
    ],
)
def test_bad_configuration_raises_one_line(kwargs, fragment):
    with pytest.raises(ConfigError) as err:
        BaseGotoEnv(**kwargs)
    assert fragment in str(err.value)
    assert "\n" not in str(err.value)


def test_bad_action_and_model_input_raise():
    with pytest.raises(ConfigError, match="wheel_radius_m must be > 0"):
        DiffDriveModel(0.0, 0.3)
    env = BaseGotoEnv(robot="rover")
    try:
        env.reset(seed=0)
        for bad in (np.array([np.nan, 0.0]), np.zeros(3), np.zeros((2, 1))):
            with pytest.raises(ValueError) as err:
                env.step(bad)
            assert "\n" not in str(err.value)
    finally:
        env.close()


def test_success_is_the_one_rule_entry_time_of_the_held_stay():
    # The env's success and time to success are blanket.success's rule applied to its own
    # inside_tolerance trace: the time is when the held stay began, not when the hold completed.
    env = BaseGotoEnv(robot="rover", episode_s=25.0, terminate_on_success=False)
    try:
        agent = BaseAgent.from_env(env)
        obs, info = env.reset(seed=1, options={"start_pose": (-3.6, 1.3, np.pi)})
        agent.reset()
        inside, reported = [], []
        while True:
            obs, _, terminated, truncated, info = env.step(agent.act(obs))
            inside.append(info["inside_tolerance"])
            reported.append(info["time_to_success_s"])
            if truncated:
                break
        dt = env.description.control_dt
        expected = time_to_success(inside, dt, env.description.success_hold_s)
        assert expected is not None
        assert info["success"] and info["time_to_success_s"] == pytest.approx(expected)
        # success is declared after the hold: 0.25 s (10 steps at 40 Hz) after the entry step
        entry = round(expected / dt)
        first = next(k for k, t in enumerate(reported) if t is not None)
        assert first + 1 == entry + 10
        assert all(inside[entry - 1 : first + 1]) and not inside[entry - 2]
    finally:
        env.close()


# ---------------------------------------------------------------- agent
def test_planned_path_keeps_clear_of_benches():
    boxes = default_layout().bench_boxes_m
    path = plan_waypoints(np.array([4.3, -1.3]), np.array([-3.6, 1.3]), boxes, 0.5)
    pts = np.vstack([[4.3, -1.3], *path])
    for p, q in zip(pts[:-1], pts[1:], strict=True):
        for t in np.linspace(0, 1, 200):
            x = p + t * (q - p)
            assert np.min(box_distance(x, boxes)) > 0.49
    np.testing.assert_allclose(pts[-1], [-3.6, 1.3])


class _DescriptionOnly:
    """An env stand-in that exposes only ``unwrapped.description``; anything else fails."""

    def __init__(self, description):
        self._d = description

    @property
    def unwrapped(self):
        return SimpleNamespace(description=self._d)

    def __getattr__(self, name):
        raise AssertionError(f"agent touched env.{name}")


def test_agent_docks_rover_from_aisle_using_description_only():
    env = BaseGotoEnv(robot="rover", episode_s=25.0)
    try:
        agent = BaseAgent.from_env(_DescriptionOnly(env.description))
        obs, info = env.reset(seed=1, options={"start_pose": (-1.0, 1.3, 2.0)})
        contact = False
        while True:
            obs, _, terminated, truncated, info = env.step(agent.act(obs))
            contact |= info["contact"]
            if terminated or truncated:
                break
        assert info["success"]
        assert info["distance_m"] <= 0.1 and abs(info["heading_error_rad"]) <= np.deg2rad(10)
        assert not contact
        d = agent.diagnostics()
        assert d["belief"].shape == (2, 3) and d["belief_sd"].shape == (2, 3)
        assert np.isfinite(d["free_energy"])
        for ch in ("odometry", "landmark_bearing", "landmark_range", "lateral_slip", "goal"):
            assert f"prediction_error.{ch}" in d and f"precision.{ch}" in d
        # the belief agrees with the truth well inside the docking tolerance
        assert np.hypot(*(d["belief"][0, :2] - info["external"]["base_pose"][:2])) < 0.05
    finally:
        env.close()


def test_predict_resets_at_episode_start_and_unknown_option_fails():
    env = BaseGotoEnv(robot="rover")
    try:
        agent = BaseAgent.from_env(env)
        obs, _ = env.reset(seed=2)
        a1, _ = agent.predict(obs, episode_start=np.array([True]))
        for _ in range(5):
            agent.predict(obs)
        a2, _ = agent.predict(obs, episode_start=True)
        np.testing.assert_allclose(a1, a2)
        assert a1.shape == (2,) and np.all(np.abs(a1) <= env.description.wheel_speed_limit_rad_s)
        with pytest.raises(ConfigError, match="unknown BaseAgent option"):
            BaseAgent.from_env(env, goal_precison=3.0)
    finally:
        env.close()


# ---------------------------------------------------------------- acceptance (slow)
@pytest.mark.slow
@pytest.mark.parametrize("robot", ["rover", "husky"])
def test_acceptance_fifty_starts(robot):
    env = gym.make("blanket/base-goto-v0", robot=robot)
    agent = BaseAgent.from_env(env)
    results = [run_base_episode(env, agent, seed=s) for s in range(50)]
    env.close()
    assert np.mean([r["success"] for r in results]) >= 0.95
    assert np.mean([not r["contact"] for r in results]) >= 0.95


@pytest.mark.slow
def test_efe_beats_direct_on_the_dark_aisle_with_an_uncertain_start():
    env = gym.make(
        "blanket/base-goto-v0", robot="rover", layout="dark-aisle", start_pose_sd=[0.15] * 3
    )
    out = {}
    for planner in ("direct", "efe"):
        agent = BaseAgent.from_env(env, planner=planner)
        out[planner] = [run_base_episode(env, agent, seed=s) for s in range(20)]
    env.close()
    docked = {k: np.mean([r["success"] for r in v]) for k, v in out.items()}
    error = {k: np.median([r["final_error_m"] for r in v]) for k, v in out.items()}
    assert docked["efe"] >= docked["direct"] and error["efe"] < error["direct"]


@pytest.mark.slow
@pytest.mark.parametrize("robot", ["rover", "husky"])
def test_landmarks_beat_dead_reckoning_over_60_s(robot):
    import importlib.util
    import pathlib

    path = pathlib.Path(__file__).resolve().parents[1] / "scripts" / "bench_base.py"
    spec = importlib.util.spec_from_file_location("bench_base", path)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    out = bench.patrol_rmse(robot)
    assert out["ratio"] <= 1 / 3
