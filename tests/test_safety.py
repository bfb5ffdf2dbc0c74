"""Safety profiles and the SafetyLimits wrapper: no command beyond the profile reaches pybullet.

The checks look at the pybullet motor call itself (``setJointMotorControlArray`` on the env's
own ``BulletClient``), since pybullet reports no applied torque under torque control, and use
pybullet as the reference for measured joint speeds, tip velocities and Jacobians.
"""

from __future__ import annotations

import gc
import math

import gymnasium as gym
import numpy as np
import pybullet
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import blanket_envs  # noqa: F401  (registers the env ids)
from blanket.errors import ConfigError
from blanket.robot_limits import (
    IIWA14_R820,
    PANDA,
    REDUCED_SPEED_M_S,
    SafetyProfile,
    profile_for,
    profile_named,
)
from blanket.scenario import make_env as scenario_make_env
from blanket.scenario import scenario_from_dict
from blanket.wrappers.safety_limits import SafetyLimits
from reference_urdf import pybullet_joint_limits

FAST_EXAMPLES = 50
SLOW_EXAMPLES = 500
#: Measured joint speeds may exceed the commanded limit this much (contacts, solver slack).
SPEED_SLACK_REL = 0.05
SPEED_SLACK_ABS_RAD_S = 0.05

_ENVS: dict[tuple, SafetyLimits] = {}


class MotorLog:
    """Records every setJointMotorControlArray call of one BulletClient."""

    def __init__(self, env: gym.Env) -> None:
        self.client = env.unwrapped.world.client
        self.robot = env.unwrapped.world.robot
        self.calls: list[tuple[int, np.ndarray, np.ndarray]] = []
        original = self.client.__getattr__("setJointMotorControlArray")

        def record(body, joints, mode, **kwargs):
            if body == self.robot:
                targets = np.asarray(kwargs.get("targetVelocities", []), dtype=float)
                forces = np.asarray(kwargs.get("forces", []), dtype=float)
                self.calls.append((mode, targets, forces))
            return original(body, joints, mode, **kwargs)

        # An instance attribute shadows BulletClient.__getattr__'s lookup of pybullet's function.
        self.client.setJointMotorControlArray = record


def cached_env(env_id: str, **kwargs) -> tuple[SafetyLimits, MotorLog]:
    """One wrapped env (and motor log) per configuration for the whole module."""
    key = (env_id, tuple(sorted(kwargs.items())))
    if key not in _ENVS:
        env = SafetyLimits(gym.make(env_id, **kwargs))
        _ENVS[key] = (env, MotorLog(env))
    return _ENVS[key]


def teardown_module() -> None:
    for env, _ in _ENVS.values():
        env.close()
    _ENVS.clear()


# ----------------------------------------------------------------------------- profiles
def test_iiwa_profile_is_enforced_where_stricter_than_the_urdf() -> None:
    # The profile's numbers are configuration (blanket.robot_limits: the maker's figures,
    # from memory), not checked against anything here. Checked: the description carries the
    # URDF's limits as pybullet reads them (reference library), and the wrapper enforces the
    # element-wise minimum of profile and URDF.
    env = gym.make("blanket/arm-reach-v0", robot="iiwa")
    try:
        d = env.unwrapped.description
        profile = profile_for(d)
        assert profile is IIWA14_R820
        ref = pybullet_joint_limits(d.urdf_path)
        urdf_velocity = [ref[n].velocity for n in d.joint_names]
        urdf_torque = [ref[n].effort for n in d.joint_names]
        np.testing.assert_allclose(d.velocity_limit_rad_s, urdf_velocity)
        np.testing.assert_allclose(d.torque_limit_n_m, urdf_torque)
        wrapped = SafetyLimits(env)
        np.testing.assert_allclose(
            wrapped.velocity_limit_rad_s,
            np.minimum(profile.velocity_limit_rad_s, urdf_velocity),
            rtol=1e-12,
        )
        np.testing.assert_allclose(
            wrapped.torque_limit_n_m, np.minimum(profile.torque_limit_n_m, urdf_torque)
        )
        # the reason the profile exists: this URDF's speeds are placeholders far above it
        assert np.all(np.asarray(profile.velocity_limit_rad_s) < 0.5 * np.asarray(urdf_velocity))
    finally:
        env.close()


def test_panda_profile_agrees_with_its_urdf() -> None:
    # The profile (configuration) and pybullet_data's panda.urdf, read by pybullet
    # (reference library), give the same joint velocity and torque limits.
    env = gym.make("blanket/arm-reach-v0", robot="panda")
    try:
        d = env.unwrapped.description
        assert profile_for(d) is PANDA
        ref = pybullet_joint_limits(d.urdf_path)
        np.testing.assert_allclose(
            PANDA.velocity_limit_rad_s, [ref[n].velocity for n in d.joint_names]
        )
        np.testing.assert_allclose(PANDA.torque_limit_n_m, [ref[n].effort for n in d.joint_names])
        np.testing.assert_allclose(d.velocity_limit_rad_s, PANDA.velocity_limit_rad_s)
        np.testing.assert_allclose(d.torque_limit_n_m, PANDA.torque_limit_n_m)
    finally:
        env.close()


def test_xarm6_and_planar_use_the_urdf_limits() -> None:
    for env_id, kwargs, name in (
        ("blanket/arm-reach-v0", {"robot": "xarm6"}, "xarm6-urdf"),
        ("blanket/planar-2link-v0", {}, "urdf"),
    ):
        env = gym.make(env_id, **kwargs)
        try:
            d = env.unwrapped.description
            profile = profile_for(d)
            assert profile.name == name
            np.testing.assert_allclose(profile.velocity_limit_rad_s, d.velocity_limit_rad_s)
            np.testing.assert_allclose(profile.torque_limit_n_m, d.torque_limit_n_m)
        finally:
            env.close()


def test_bad_profiles_and_options_raise_one_line_config_errors() -> None:
    with pytest.raises(ConfigError, match="velocity_limit_rad_s"):
        SafetyProfile("x", (1.0, math.nan), (1.0, 1.0), "test")
    with pytest.raises(ConfigError, match="same non-zero length"):
        SafetyProfile("x", (1.0,), (1.0, 1.0), "test")
    env = gym.make("blanket/planar-2link-v0")
    try:
        d = env.unwrapped.description
        bad = [
            {"profile": "kuka-lbr-iiwa-14-r820"},  # 7 joints for a 2-joint arm
            {"profile": "no-such-profile"},
            {"profile": 3},
            {"joint_margin_rad": -0.1},
            {"joint_margin_rad": math.nan},
            {"workspace_box_m": [[0, 0, 0], [1, 1]]},
            {"workspace_box_m": [[1, 0, 0], [0, 1, 1]]},
            {"tool_speed_cap_m_s": 0.0},
            {"tool_speed_cap_m_s": math.inf},
            {"divergence_factor": 0.5},
            {"brake_gain_1_s": -1.0},
        ]
        for kwargs in bad:
            with pytest.raises(ConfigError) as info:
                SafetyLimits(env, **kwargs)
            assert "\n" not in str(info.value), kwargs
        with pytest.raises(ConfigError, match="joints"):
            profile_named("franka-panda", d)
    finally:
        env.close()


# ------------------------------------------------------------- hostile actions (property)
def _action_values(limit: float) -> st.SearchStrategy[float]:
    return st.one_of(
        st.floats(-3.0 * limit, 3.0 * limit),
        st.sampled_from([math.nan, math.inf, -math.inf, 1e308, -1e308, 0.0, 5e-324]),
        st.floats(allow_nan=True, allow_infinity=True),
    )


def _check_motor_calls(log: MotorLog, env: SafetyLimits, start: int) -> None:
    vlim = env.velocity_limit_rad_s
    tlim = env.torque_limit_n_m
    for mode, targets, forces in log.calls[start:]:
        if mode == pybullet.VELOCITY_CONTROL and targets.size:
            assert np.all(np.isfinite(targets))
            assert np.all(np.abs(targets) <= vlim * (1 + 1e-12)), targets
        elif mode == pybullet.TORQUE_CONTROL:
            assert np.all(np.isfinite(forces))
            assert np.all(np.abs(forces) <= tlim * (1 + 1e-12)), forces


def _run_hostile(env: SafetyLimits, log: MotorLog, seed: int, actions: list) -> None:
    env.reset(seed=seed)
    start = len(log.calls)
    for action in actions:
        _obs, _r, _term, _trunc, info = env.step(np.array(action))
        applied = info["action_applied"]
        assert np.all(np.isfinite(applied))
        changed = not np.array_equal(applied, np.array(action))
        assert info["safety"]["clamped"] == (changed or info["safety"]["safe_stop"])
        if not np.all(np.isfinite(action)):
            assert info["safety"]["safe_stop"] and info["external"]["safe_stop"]
        if env.control == "velocity":
            speed = np.abs(info["external"]["joint_velocity_rad_s"])
            allowed = env.velocity_limit_rad_s * (1 + SPEED_SLACK_REL) + SPEED_SLACK_ABS_RAD_S
            assert np.all(speed <= allowed), (speed, allowed)
    _check_motor_calls(log, env, start)
    assert len(log.calls) > start


@pytest.mark.parametrize("control", ["velocity", "torque"])
@settings(
    max_examples=FAST_EXAMPLES,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(data=st.data())
def test_hostile_actions_planar_never_exceed_the_profile(control: str, data) -> None:
    env, log = cached_env("blanket/planar-2link-v0", control=control)
    limit = float(np.max(env.command_limit))
    actions = data.draw(
        st.lists(st.lists(_action_values(limit), min_size=2, max_size=2), min_size=1, max_size=12)
    )
    _run_hostile(env, log, data.draw(st.integers(0, 2**16)), actions)


@pytest.mark.slow
@pytest.mark.parametrize("control", ["velocity", "torque"])
@settings(
    max_examples=SLOW_EXAMPLES,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(data=st.data())
def test_hostile_actions_iiwa_never_exceed_the_profile(control: str, data) -> None:
    env, log = cached_env("blanket/arm-reach-v0", robot="iiwa", control=control)
    limit = float(np.max(env.command_limit))
    actions = data.draw(
        st.lists(st.lists(_action_values(limit), min_size=7, max_size=7), min_size=1, max_size=12)
    )
    _run_hostile(env, log, data.draw(st.integers(0, 2**16)), actions)


@pytest.mark.slow
@settings(max_examples=SLOW_EXAMPLES, deadline=None)
@given(data=st.data())
def test_hostile_actions_planar_slow_suite(data) -> None:
    control = data.draw(st.sampled_from(["velocity", "torque"]))
    env, log = cached_env("blanket/planar-2link-v0", control=control)
    limit = float(np.max(env.command_limit))
    actions = data.draw(
        st.lists(st.lists(_action_values(limit), min_size=2, max_size=2), min_size=1, max_size=30)
    )
    _run_hostile(env, log, data.draw(st.integers(0, 2**16)), actions)


def test_malformed_actions_raise_value_error() -> None:
    env, _ = cached_env("blanket/planar-2link-v0", control="velocity")
    env.reset(seed=0)
    for bad in ([1.0], [1.0, 2.0, 3.0], "fast", {"a": 1}, [[1.0, 2.0]], None, [1.0, "x"]):
        with pytest.raises(ValueError) as info:
            env.step(bad)
        assert "\n" not in str(info.value)


# ------------------------------------------------------ random scenarios and env options
_OPTION_VALUES = {
    "control": st.sampled_from(["velocity", "torque", "position", "", 3]),
    "episode_s": st.one_of(st.floats(0.01, 0.2), st.sampled_from([0.0, -1.0, math.nan, "1"])),
    "tolerance_m": st.one_of(st.floats(1e-3, 0.1), st.sampled_from([-0.01, math.inf, True])),
    "control_hz": st.one_of(st.sampled_from([60.0, 120.0, 240.0]), st.sampled_from([-240.0, 0])),
    "camera_hz": st.one_of(st.sampled_from([10.0, 30.0]), st.sampled_from([-30.0, 1e9])),
    "encoder_angle_noise_rad": st.one_of(st.floats(0.0, 0.05), st.just(-1.0)),
    "camera_noise_px": st.one_of(st.floats(0.0, 5.0), st.just(math.nan)),
    "targets": st.sampled_from(["random", "bench", 7]),
    "colour": st.just("red"),
}


def _scenario_strategy(env_ids: list[str]) -> st.SearchStrategy[dict]:
    options = st.dictionaries(st.sampled_from(sorted(_OPTION_VALUES)), st.none(), max_size=4)
    return st.fixed_dictionaries(
        {"env": st.sampled_from(env_ids), "env_options": options},
        optional={"episodes": st.integers(-2, 3), "bogus": st.just(1)},
    )


def _try_scenario(data, env_ids: list[str], steps: int) -> None:
    raw = data.draw(_scenario_strategy(env_ids))
    raw["env_options"] = {k: data.draw(_OPTION_VALUES[k]) for k in raw["env_options"]}
    try:
        scenario = scenario_from_dict(raw)
        env = scenario_make_env(scenario.env, scenario.env_options)
    except ValueError as exc:  # ConfigError is a ValueError
        message = str(exc)
        assert message and "\n" not in message, message
        return
    try:
        wrapped = SafetyLimits(env)
        log = MotorLog(wrapped)
        wrapped.reset(seed=data.draw(st.integers(0, 1000)))
        n = wrapped.action_space.shape[0]
        limit = float(np.max(wrapped.command_limit))
        for _ in range(steps):
            action = data.draw(st.lists(_action_values(limit), min_size=n, max_size=n))
            wrapped.step(np.array(action))
        _check_motor_calls(log, wrapped, 0)
    finally:
        env.close()


@settings(max_examples=FAST_EXAMPLES, deadline=None)
@given(data=st.data())
def test_random_scenarios_planar_clear_error_or_safe_clamp(data) -> None:
    _try_scenario(data, ["blanket/planar-2link-v0", "blanket/no-such-env-v0"], steps=5)


@pytest.mark.slow
@settings(max_examples=SLOW_EXAMPLES, deadline=None)
@given(data=st.data())
def test_random_scenarios_arms_clear_error_or_safe_clamp(data) -> None:
    _try_scenario(data, ["blanket/planar-2link-v0", "blanket/arm-reach-v0"], steps=5)


# -------------------------------------------------------------- individual safeguards
def test_joint_margin_stops_a_joint_before_its_limit_velocity_mode() -> None:
    env, log = cached_env("blanket/planar-2link-v0", control="velocity")
    env.reset(seed=0)
    upper = env.unwrapped.description.upper_rad
    reasons = set()
    for _ in range(400):
        _, _, _, _, info = env.step(np.array([3.0, 0.0]))
        reasons.add(info["safety"]["reason"])
    q = info["external"]["joint_angle_rad"]
    # Came to rest inside the margin and short of the hard limit (the velocity motor's finite
    # force lets the joint coast past the margin's edge; the margin absorbs it).
    assert upper[0] - env.joint_margin_rad - 0.05 < q[0] < upper[0]
    assert abs(info["external"]["joint_velocity_rad_s"][0]) < 1e-6
    assert info["action_applied"][0] == 0.0
    assert "joint position margin" in reasons
    # Motion away from the limit is still allowed.
    _, _, _, _, info = env.step(np.array([-1.0, 0.0]))
    assert info["action_applied"][0] == -1.0


def test_joint_margin_in_torque_mode_keeps_the_joint_off_its_limit() -> None:
    env, _ = cached_env("blanket/planar-2link-v0", control="torque")
    env.reset(seed=0)
    upper = env.unwrapped.description.upper_rad
    limit = env.torque_limit_n_m
    q_max = -np.inf
    for _ in range(600):
        _, _, _, _, info = env.step(np.array([limit[0], 0.0]))
        q_max = max(q_max, info["external"]["joint_angle_rad"][0])
    assert q_max < upper[0]
    assert abs(info["external"]["joint_velocity_rad_s"][0]) < 1e-3


def _pybullet_tip_jacobian(env) -> np.ndarray:
    """Linear tip Jacobian of the controlled joints from pybullet's calculateJacobian."""
    world = env.unwrapped.world
    c = world.client
    movable = [
        j
        for j in range(c.getNumJoints(world.robot))
        if c.getJointInfo(world.robot, j)[2] != pybullet.JOINT_FIXED
    ]
    q_all = [c.getJointState(world.robot, j)[0] for j in movable]
    zeros = [0.0] * len(movable)
    lin, _ = c.calculateJacobian(world.robot, world.tip_link, [0.0, 0.0, 0.0], q_all, zeros, zeros)
    lin = np.array(lin)
    return lin[:, [movable.index(j) for j in world.joint_indices]]


def test_workspace_box_removes_motion_further_out() -> None:
    base = gym.make("blanket/planar-2link-v0")
    try:
        _, info = base.reset(seed=3)
        tip = info["external"]["tip_position_m"]
        # A box whose +x face lies just below the tip: the tip is outside on +x.
        box = [[tip[0] - 1.0, -5.0, -5.0], [tip[0] - 0.01, 5.0, 5.0]]
        env = SafetyLimits(base, workspace_box_m=box)
        env.reset(seed=3)
        rng = np.random.default_rng(0)
        hits = 0
        for _ in range(40):
            J = _pybullet_tip_jacobian(env)  # reference: pybullet's Jacobian
            outside = env.unwrapped.world.tip_position()[0] > box[1][0]
            command = rng.uniform(-2.0, 2.0, 2)
            _, _, _, _, info = env.step(command)
            applied = info["action_applied"]
            if outside and J[0] @ command > 0:
                hits += 1
                assert "workspace box" in info["safety"]["reason"]
            if outside:
                assert J[0] @ applied <= 1e-6
        assert hits > 0
    finally:
        base.close()


def test_tool_speed_cap_bounds_the_measured_tip_speed() -> None:
    # 250 mm/s: the reduced speed of ISO 10218-1:2011, 5.6.
    assert REDUCED_SPEED_M_S == 0.25
    base = gym.make("blanket/planar-2link-v0")
    try:
        env = SafetyLimits(base, tool_speed_cap_m_s=REDUCED_SPEED_M_S)
        env.reset(seed=1)
        world = env.unwrapped.world
        fastest = 0.0
        capped = 0
        for k in range(120):
            _, _, _, _, info = env.step(np.array([3.0, -3.0]) * (1 if k < 60 else -1))
            capped += "tool speed cap" in info["safety"]["reason"]
            state = world.client.getLinkState(world.robot, world.tip_link, computeLinkVelocity=1)
            fastest = max(fastest, float(np.linalg.norm(state[6])))  # pybullet's link velocity
        assert capped > 0
        assert fastest <= REDUCED_SPEED_M_S * 1.05
        assert fastest > 0.5 * REDUCED_SPEED_M_S  # it did move
    finally:
        base.close()


def test_contact_with_a_tray_stops_the_arm_and_is_counted() -> None:
    env = SafetyLimits(gym.make("blanket/arm-reach-v0", robot="iiwa"))
    try:
        env.reset(seed=0)
        stop_step = None
        for k in range(480):
            _, _, _, _, info = env.step(np.array([0.0, 2.0, 0.0, 0.0, 0.0, 0.0, 0.0]))
            if info["contact"] and stop_step is None:
                stop_step = k
            if stop_step is not None and k == stop_step + 1:
                # The very next command is the stop.
                assert info["safety"]["safe_stop"]
                assert info["safety"]["safe_stop_reason"].startswith("contact:")
                np.testing.assert_array_equal(info["action_applied"], 0.0)
            if stop_step is not None and k == stop_step + 6:
                break
        assert stop_step is not None, "the arm never reached the tray"
        assert info["safety"]["contact_stops"] == 1
        assert np.max(np.abs(info["external"]["joint_velocity_rad_s"])) < 0.05
        env.reset(seed=0)
        _, _, _, _, info = env.step(np.zeros(7))
        assert not info["safety"]["safe_stop"]  # reset releases the latch
        assert info["safety"]["contact_stops"] == 1
    finally:
        env.close()


# --------------------------------------------------------------- a diverging controller
@pytest.mark.parametrize("bad", [math.nan, 1e12])
def test_diverging_policy_is_stopped_within_one_step_velocity(bad: float) -> None:
    env, _ = cached_env("blanket/planar-2link-v0", control="velocity")
    env.reset(seed=5)
    for _ in range(30):
        env.step(np.array([1.0, -1.0]))
    _, _, _, _, info = env.step(np.array([bad, 0.5]))
    assert info["safety"]["safe_stop"] and info["external"]["safe_stop"]
    np.testing.assert_array_equal(info["action_applied"], 0.0)
    for _ in range(3):
        _, _, _, _, info = env.step(np.array([1.0, 1.0]))  # latched: still stopped
        assert info["safety"]["safe_stop"]
    assert np.max(np.abs(info["external"]["joint_velocity_rad_s"])) < 1e-3


def test_diverging_policy_in_torque_mode_is_braked_to_rest() -> None:
    env, _ = cached_env("blanket/arm-reach-v0", robot="iiwa", control="torque")
    env.reset(seed=2)
    limit = env.torque_limit_n_m
    for _k in range(40):
        _, _, _, _, info = env.step(limit * np.where(np.arange(7) % 2, 1.0, -1.0))
    moving = np.max(np.abs(info["external"]["joint_velocity_rad_s"]))
    assert moving > 0.5
    _, _, _, _, info = env.step(np.full(7, math.inf))
    assert info["safety"]["safe_stop_reason"] == "non-finite command"
    for _ in range(60):
        _, _, _, _, info = env.step(np.full(7, math.nan))
    assert np.max(np.abs(info["external"]["joint_velocity_rad_s"])) < 1e-3 * moving


class _ExplodingEncoders(gym.ObservationWrapper):
    """Test fault: after ``after`` steps the encoders report absurd velocities."""

    def __init__(self, env: gym.Env, after: int) -> None:
        super().__init__(env)
        self.after = after
        self.count = 0

    def reset(self, **kwargs):
        self.count = 0
        return super().reset(**kwargs)

    def observation(self, obs):
        self.count += 1
        if self.count > self.after:
            obs = dict(obs)
            obs["joint_velocity_rad_s"] = np.full_like(obs["joint_velocity_rad_s"], 1e9)
            obs["joint_angle_rad"] = obs["joint_angle_rad"] + 1e6
        return obs


def test_arm_agent_fed_exploding_observations_is_stopped_and_logged(tmp_path) -> None:
    import pandas as pd

    from blanket.agent import ArmAgent
    from blanket.logs import RunWriter
    from blanket.runner import run_episode

    base = gym.make("blanket/planar-2link-v0", episode_s=0.5)
    try:
        env = SafetyLimits(_ExplodingEncoders(base, after=40))
        agent = ArmAgent.from_env(env)
        writer = RunWriter(tmp_path / "run", {"joint_names": ["shoulder", "elbow"]})
        result = run_episode(env, agent, seed=0, writer=writer)
        writer.close()
        assert result.safe_stop  # the agent's own watchdog or the wrapper
        frame = pd.read_parquet(next((tmp_path / "run" / "episodes").glob("*.parquet")))
        stop_cols = [c for c in frame.columns if c.endswith("safe_stop")]
        assert stop_cols, list(frame.columns)
        flagged = frame[stop_cols].astype(bool).any(axis=1).to_numpy()
        first = int(np.argmax(flagged))
        assert flagged.any() and first >= 40
        # Within one control step of the fault the arm is commanded to rest, and is at rest
        # a few steps later.
        speed_cols = [c for c in frame.columns if c.startswith("external.joint_velocity_rad_s")]
        speed = frame[speed_cols].abs().to_numpy().max(axis=1)
        assert np.all(speed[first + 5 :] < 1e-2), speed[first:]
    finally:
        base.close()


# ------------------------------------------------------------------------- leaks
def test_dropped_envs_close_their_pybullet_clients() -> None:
    ids = []
    for k in range(50):
        env = gym.make("blanket/planar-2link-v0")
        if k % 2:
            env = SafetyLimits(env)
        env.reset(seed=k)
        env.step(np.zeros(2))
        ids.append(env.unwrapped.world.client._client)
        del env
    gc.collect()
    still_connected = [
        i for i in ids if pybullet.getConnectionInfo(physicsClientId=i)["isConnected"]
    ]
    assert still_connected == []


def test_base_env_commands_are_bounded_and_nan_stops() -> None:
    base = gym.make("blanket/base-goto-v0")
    try:
        env = SafetyLimits(base)
        env.reset(seed=0)
        high = base.action_space.high.astype(float)
        _, _, _, _, info = env.step(np.array([1e3, 1.0]))
        assert np.all(np.abs(info["action_applied"]) <= high + 1e-9)
        assert info["safety"]["clamped"]
        _, _, _, _, info = env.step(np.array([math.nan, 1.0]))
        np.testing.assert_array_equal(info["action_applied"], 0.0)
        assert info["safety"]["safe_stop"]
        with pytest.raises(ConfigError):
            SafetyLimits(base, tool_speed_cap_m_s=0.25)
    finally:
        base.close()


# ------------------------------------------------------- measured speed against the limit
@pytest.mark.parametrize(
    "control, patterns, steps",
    [("velocity", 5, 300), ("torque", 3, 200)],
)
def test_hundredfold_commands_keep_the_measured_joint_speed_at_the_limit(
    control: str, patterns: int, steps: int
) -> None:
    """A policy that asks for 100x the profile's limits on every joint (the largest command
    that is still clamped rather than treated as divergence) runs the arm at its limits and
    no faster: the peak of ``info["safety"]["joint_speed_ratio"]`` stays within 5 %."""
    env, _ = cached_env("blanket/arm-reach-v0", robot="iiwa", control=control)
    rng = np.random.default_rng(11)
    peaks = []
    for p in range(patterns):
        sign = np.ones(7) if p == 0 else rng.choice([-1.0, 1.0], size=7)
        _obs, info = env.reset(seed=p)
        assert info["safety"]["joint_speed_ratio"] == 0.0  # at rest after reset
        peak = 0.0
        for _ in range(steps):
            _obs, _r, _term, _trunc, info = env.step(100.0 * env.command_limit * sign)
            ratio = info["safety"]["joint_speed_ratio"]
            speed = np.abs(info["external"]["joint_velocity_rad_s"])
            assert ratio == pytest.approx(np.max(speed / env.velocity_limit_rad_s), rel=1e-12)
            peak = max(peak, ratio)
        peaks.append(peak)
    print(f"\n{control}: peak joint speed / profile limit per command pattern: {peaks}")
    assert max(peaks) <= 1.05
    assert min(peaks) >= 0.95  # the arm did run at its limit


def test_base_env_reports_wheel_speed_ratio() -> None:
    base = gym.make("blanket/base-goto-v0")
    try:
        env = SafetyLimits(base)
        env.reset(seed=0)
        for _ in range(40):
            _, _, _, _, info = env.step(50.0 * env.command_limit)
        wheels = np.abs(info["external"]["wheel_speed_rad_s"])
        expected = np.max(wheels / env.command_limit)
        assert info["safety"]["joint_speed_ratio"] == pytest.approx(expected)
        assert 0.5 < info["safety"]["joint_speed_ratio"] <= 1.05
    finally:
        base.close()


# ------------------------------------------------------------ world-side dynamics
@pytest.mark.parametrize("robot", ["iiwa", "panda", "xarm6"])
def test_world_dynamics_match_the_body_model_they_replace(robot: str) -> None:
    """The wrapper's M(q), h(q, q') and tip Jacobian now come from the simulator
    (``ArmWorld``); they equal the agent's pinocchio body model that it used before."""
    from blanket.body import ArmModel

    env = gym.make("blanket/arm-reach-v0", robot=robot)
    try:
        env.reset(seed=0)
        world, d = env.unwrapped.world, env.unwrapped.description
        model = ArmModel.from_urdf(d.urdf_path, d.end_effector, joint_names=d.joint_names)
        rng = np.random.default_rng(3)
        for _ in range(4):
            q = rng.uniform(np.maximum(d.lower_rad, -2.5), np.minimum(d.upper_rad, 2.5))
            qd = rng.normal(0.0, 1.0, size=q.size)
            M = world.mass_matrix(q)
            np.testing.assert_allclose(M, model.mass_matrix(q), rtol=1e-9, atol=1e-9)
            np.testing.assert_allclose(M, M.T, atol=1e-12)
            h = world.inverse_dynamics(q, qd, np.zeros_like(q))
            np.testing.assert_allclose(h, model.nonlinear_effects(q, qd), rtol=1e-9, atol=1e-9)
            np.testing.assert_allclose(
                world.tip_jacobian(q), model.tip_jacobian(q), rtol=1e-9, atol=1e-9
            )
    finally:
        env.close()


def test_world_tip_jacobian_is_the_derivative_of_pybullets_forward_kinematics() -> None:
    # Reference: central differences of pybullet's own link-frame positions (getLinkState),
    # which pybullet returns rounded to float32 (~6e-8 m here): hence the 1e-3 rad step.
    env = gym.make("blanket/arm-reach-v0", robot="iiwa")
    try:
        env.reset(seed=0)
        world = env.unwrapped.world
        q = np.array([0.3, 0.7, -0.4, -1.2, 0.5, 0.9, 0.1])
        eps = 1e-3
        shifted = np.concatenate([q + eps * np.eye(7), q - eps * np.eye(7)])
        tips = world.tip_positions_for(shifted)
        numeric = ((tips[:7] - tips[7:]) / (2 * eps)).T
        np.testing.assert_allclose(world.tip_jacobian(q), numeric, atol=1e-4)
    finally:
        env.close()


def test_safety_wrapper_never_loads_the_agents_body_model() -> None:
    """World code must not import the agent's internals: run the torque brake (M and h) and
    the workspace box (tip Jacobian) in a fresh interpreter and look at what got imported."""
    import subprocess
    import sys

    code = (
        "import sys, numpy as np, gymnasium as gym, blanket\n"
        "from blanket.wrappers import SafetyLimits\n"
        "box = [[0.2, -0.6, 0.0], [0.9, 0.6, 0.8]]\n"
        "for control in ('torque', 'velocity'):\n"
        "    env = SafetyLimits(gym.make('blanket/arm-reach-v0', robot='iiwa', control=control),\n"
        "                       workspace_box_m=box, tool_speed_cap_m_s=0.25)\n"
        "    env.reset(seed=0)\n"
        "    env.step(np.full(7, 0.5)); env.step(np.full(7, np.nan)); env.step(np.zeros(7))\n"
        "    env.close()\n"
        "print(sorted(m for m in sys.modules if m.startswith(('blanket.body', 'blanket.agent'))))\n"
    )
    proc = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True
    )
    assert proc.stdout.strip().splitlines()[-1] == "[]"


@pytest.mark.parametrize("control", ["velocity", "torque"])
def test_applied_command_is_sensed_and_the_wrapped_env_passes_check_env(control) -> None:
    # The wrapper adds the command that reached the env to the Dict observation (a drive
    # reports its applied setpoint): zeros after reset, then info["action_applied"].
    import warnings

    from gymnasium.utils.env_checker import check_env

    env = SafetyLimits(gym.make("blanket/planar-2link-v0", control=control))
    try:
        assert "applied_command" in env.observation_space.spaces
        assert env.observation_space["applied_command"] == env.action_space
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # "the env is wrapped": intended here
            check_env(env, skip_render_check=True)
        obs, _ = env.reset(seed=0)
        np.testing.assert_array_equal(obs["applied_command"], np.zeros(2))
        clamped = 0
        for _ in range(60):
            obs, _, _, _, info = env.step(100.0 * env.command_limit * np.array([1.0, -0.5]))
            np.testing.assert_array_equal(obs["applied_command"], info["action_applied"])
            assert env.observation_space.contains(obs)
            clamped += info["safety"]["clamped"]
        assert clamped == 60  # every command was beyond the limits: what was applied differs
    finally:
        env.close()
