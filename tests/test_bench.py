"""The benchmark: metrics against textbook values, baselines, CLI, and same draws per policy."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import linalg, stats

import blanket  # noqa: F401  (registers the envs)
from blanket.bench.metrics import (
    belief_rmse,
    bootstrap_interval,
    control_effort,
    joint_jerk_rms,
    path_length_ratio,
    time_to_success,
)
from blanket.bench.policies import ClassicalReach, JointKalmanFilter, constant_velocity_model
from blanket.cli import main
from blanket.errors import ConfigError

# ----------------------------------------------------------------------------- metrics


def test_time_to_success_needs_the_hold():
    dt = 1.0 / 240.0
    d = np.full(200, 0.5)
    d[10:71] = 0.005  # inside for 61 steps: entered at step 11, held 60 further steps
    assert time_to_success(d, dt, 0.01) == pytest.approx(11 * dt)
    d[70] = 0.5  # 60 steps inside is one short of the 0.25 s hold
    assert time_to_success(d, dt, 0.01) is None
    assert time_to_success(d, dt, 0.6) == pytest.approx(dt)


def test_time_to_success_matches_the_env_rule():
    import gymnasium

    from blanket.bench.evaluate import run_policy_episode

    env = gymnasium.make("blanket/planar-2link-v0", episode_s=2.0)
    try:
        rows = []
        captured = []

        class Spy(gymnasium.Wrapper):
            def step(self, action):
                out = self.env.step(action)
                captured.append(out[4])
                return out

        spied = Spy(env)
        trace = run_policy_episode(spied, ClassicalReach.from_env(spied), seed=1)
        rows.append(time_to_success(trace.distance_m, trace.dt, 0.01))
        assert rows[0] is not None
        assert rows[0] == pytest.approx(captured[-1]["time_to_success_s"])
    finally:
        env.close()


def test_env_tolerance_comes_from_the_env_and_the_other_radius_from_the_rule():
    from blanket.bench.evaluate import EpisodeTrace
    from blanket.bench.metrics import aggregate, episode_metrics

    dt = 1.0 / 240.0
    d = np.full(200, 0.03)  # inside 5 cm from the first step on, never inside 1 cm
    trace = EpisodeTrace(
        seed=0,
        dt=dt,
        distance_m=d,
        tip_m=np.zeros((200, 3)),
        q_rad=np.zeros((200, 2)),
        action=np.zeros((200, 2)),
        q_start_rad=np.zeros(2),
        tip_start_m=np.ones(3),
        target_start_m=np.zeros(3),
        q_seen_rad=np.zeros((0, 2)),
        belief_q_rad=None,
        policy_us=np.ones(200),
        perturbation_digest="",
        contact=False,
        env_success=True,  # the env's own report for its 1 cm tolerance (e.g. a moving target)
        env_time_to_success_s=0.5,
        env_tolerance_m=0.01,
        peak_joint_speed_ratio=0.8,
    )
    row = episode_metrics(trace)
    assert row["success_1cm"] and row["time_to_success_1cm_s"] == 0.5
    assert row["success_5cm"] and row["time_to_success_5cm_s"] == pytest.approx(dt)
    assert row["peak_joint_speed_ratio"] == 0.8
    trace.env_tolerance_m = None  # no report of the env: the rule on the trace for both
    row_rule = episode_metrics(trace)
    assert not row_rule["success_1cm"] and row_rule["time_to_success_1cm_s"] is None
    trace.peak_joint_speed_ratio = None
    assert episode_metrics(trace)["peak_joint_speed_ratio"] is None
    assert aggregate([row, row_rule, {**row, "peak_joint_speed_ratio": 1.2}])[
        "peak_joint_speed_ratio"
    ] == pytest.approx(1.2)
    assert aggregate([episode_metrics(trace)])["peak_joint_speed_ratio"] is None


def test_peak_joint_speed_ratio_is_the_episode_maximum_of_the_safety_report():
    import gymnasium

    from blanket.bench.evaluate import run_policy_episode

    class SpeedReport(gymnasium.Wrapper):
        """Reports |true joint velocity| / limit, max over joints (as the safety wrapper)."""

        def __init__(self, env):
            super().__init__(env)
            self.ratios = []

        def step(self, action):
            obs, r, term, trunc, info = self.env.step(action)
            limit = self.env.unwrapped.description.velocity_limit_rad_s
            ratio = float(np.max(np.abs(info["external"]["joint_velocity_rad_s"]) / limit))
            self.ratios.append(ratio)
            info = {**info, "safety": {"joint_speed_ratio": ratio}}
            return obs, r, term, trunc, info

    env = SpeedReport(gymnasium.make("blanket/planar-2link-v0", episode_s=0.5))
    try:
        trace = run_policy_episode(env, ClassicalReach.from_env(env), seed=2)
        assert trace.peak_joint_speed_ratio == max(env.ratios) > 0.0
        bare = run_policy_episode(env.env, ClassicalReach.from_env(env), seed=2)
        assert bare.peak_joint_speed_ratio is None
    finally:
        env.close()


def test_joint_jerk_of_a_cubic_is_its_third_derivative():
    # q = c t^3 has q''' = 6 c; the third difference is exact for cubics
    # (Abramowitz & Stegun 1964, eq. 25.1.2).
    dt = 0.01
    t = np.arange(50) * dt
    q = np.stack([2.0 * t**3, -0.5 * t**3 + t], axis=1)
    expected = np.sqrt(np.mean([12.0**2, 3.0**2]))
    assert joint_jerk_rms(q, dt) == pytest.approx(expected, rel=1e-6)
    assert joint_jerk_rms(np.outer(t, [1.0, 2.0]), dt) == pytest.approx(0.0, abs=1e-6)


def test_path_length_ratio_of_a_semicircle_is_pi_over_two():
    # Half a circle of radius r has length pi r against a chord of 2 r (geometry).
    theta = np.linspace(0.0, np.pi, 20001)
    tip = np.stack([np.cos(theta), np.sin(theta), np.zeros_like(theta)], axis=1)
    assert path_length_ratio(tip, np.array([-1.0, 0.0, 0.0])) == pytest.approx(np.pi / 2, 1e-6)
    line = np.linspace([0, 0, 0], [0.3, 0.4, 0], 50)
    assert path_length_ratio(line, np.array([0.3, 0.4, 0.0])) == pytest.approx(1.0)


def test_effort_and_belief_rmse():
    assert control_effort(np.array([[1.0, -3.0], [2.0, 0.0]])) == pytest.approx(14.0 / 4)
    truth = np.zeros((3, 2))
    assert belief_rmse(truth + np.array([0.3, -0.4]), truth) == pytest.approx(np.sqrt(0.125))
    with pytest.raises(ConfigError):
        belief_rmse(np.zeros((3, 2)), np.zeros((2, 2)))


def test_bootstrap_interval_matches_scipy_percentile_bootstrap():
    # Percentile bootstrap (Efron & Tibshirani 1993, eq. 13.5) against scipy.stats.bootstrap.
    rng = np.random.default_rng(7)
    for x in (rng.random(30) < 0.6, rng.normal(2.0, 1.0, 40)):
        x = x.astype(float)
        ours = bootstrap_interval(x, resamples=20000, seed=1)
        ref = stats.bootstrap(
            (x,),
            np.mean,
            confidence_level=0.95,
            n_resamples=20000,
            method="percentile",
            random_state=2,
        ).confidence_interval
        step = 1.0 / x.size if set(np.unique(x)) <= {0.0, 1.0} else 0.02
        assert ours[0] == pytest.approx(ref.low, abs=step + 1e-9)
        assert ours[1] == pytest.approx(ref.high, abs=step + 1e-9)
    assert bootstrap_interval(np.ones(10)) == (1.0, 1.0)
    assert bootstrap_interval([0.0, 1.0], seed=3) == bootstrap_interval([0.0, 1.0], seed=3)


# ----------------------------------------------------------------------------- baselines


def test_kalman_filter_reaches_the_riccati_steady_state():
    # The prior covariance of a time-invariant Kalman filter converges to the solution of the
    # discrete algebraic Riccati equation (Anderson & Moore 1979, Optimal Filtering, ch. 4),
    # solved here by scipy.linalg.solve_discrete_are.
    dt, q = 1 / 240, 200.0
    kf = JointKalmanFilter(3, dt, 0.01, 0.05, q)
    rng = np.random.default_rng(0)
    for _ in range(2000):
        kf.update(rng.normal(size=3) * 0.01, rng.normal(size=3) * 0.05)
    F, Q = constant_velocity_model(dt, q)
    P_prior = linalg.solve_discrete_are(F.T, kf.H.T, Q, kf.R)
    expected = P_prior - P_prior @ np.linalg.inv(P_prior + kf.R) @ P_prior
    for j in range(3):
        np.testing.assert_allclose(kf.P[j], expected, rtol=1e-8)
    assert np.all(np.diag(expected) < np.diag(kf.R))


def test_kalman_filter_reduces_encoder_error_on_a_smooth_joint():
    dt = 1 / 240
    kf = JointKalmanFilter(1, dt, 0.01, 0.05, 200.0)
    rng = np.random.default_rng(1)
    t = np.arange(960) * dt
    q, v = np.sin(t)[:, None], np.cos(t)[:, None]
    zq = q + 0.01 * rng.normal(size=q.shape)
    est = np.array(
        [
            kf.update(a, b)[:, 0]
            for a, b in zip(zq, v + 0.05 * rng.normal(size=v.shape), strict=True)
        ]
    )
    raw = np.sqrt(np.mean((zq[100:] - q[100:]) ** 2))
    filt = np.sqrt(np.mean((est[100:] - q[100:]) ** 2))
    assert filt < 0.5 * raw


@pytest.mark.parametrize("control", ["velocity", "torque"])
def test_classical_baseline_reaches_on_the_planar_arm(control):
    import gymnasium

    from blanket.bench.evaluate import run_policy_episode
    from blanket.bench.metrics import episode_metrics

    env = gymnasium.make("blanket/planar-2link-v0", episode_s=2.0, control=control)
    try:
        policy = ClassicalReach.from_env(env)
        rows = [episode_metrics(run_policy_episode(env, policy, s)) for s in range(2)]
    finally:
        env.close()
    assert all(r["success_1cm"] for r in rows)
    assert all(r["belief_rmse_rad"] < 0.01 for r in rows)  # filtered below the 0.01 rad noise


# ----------------------------------------------------------------------------- CLI


def test_bench_list_prints_builtin_names(capsys):
    assert main(["bench", "--list"]) == 0
    out = capsys.readouterr().out
    for name in (
        "active-inference",
        "classical-torque",
        "sac",
        "ppo",
        "nominal",
        "camera-delay-2",
        "moving-target",
        "miscalibrated-lengths",
        "payload_kg",
        "push_magnitude_n",
    ):
        assert name in out


@pytest.mark.parametrize(
    "args, words",
    [
        (["--policies", "active-inferenc"], ["active-inference", "valid"]),
        (["--conditions", "fog"], ["fog", "nominal"]),
        (["--policies", "no_such_pkg.mod:Thing"], ["does not load", "classical"]),
        (["--policies", "sac", "--rl-models", "/nonexistent"], ["--rl-models", "train-rl"]),
    ],
)
def test_bench_bad_names_exit_2_with_one_line(capsys, tmp_path, args, words):
    assert main(["bench", "--out", str(tmp_path / "o"), *args]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    for w in words:
        assert w in err


def test_bench_quick_reduced_suite_writes_results_report_and_charts(tmp_path):
    out = tmp_path / "bench"
    code = main(
        [
            "bench",
            "--quick",
            "--robot",
            "planar",
            "--episodes",
            "1",
            "--episode-s",
            "1.5",
            "--conditions",
            "nominal,payload-1.5kg",
            "--quiet",
            "--out",
            str(out),
            "--policies",
            "active-inference,classical,blanket.bench.policies:ClassicalReach",
        ]
    )
    assert code == 0
    records = json.loads((out / "results.json").read_text())
    assert len(records) == 6
    for r in records:
        for key in (
            "policy",
            "condition",
            "success_1cm",
            "success_5cm",
            "success_1cm_ci95",
            "time_to_success_5cm_s",
            "final_error_m",
            "path_length_ratio",
            "joint_jerk_rad_s3",
            "control_effort",
            "belief_rmse_rad",
            "training_steps",
            "training_wall_s",
        ):
            assert key in r
        assert r["success_5cm"] == 1.0  # all three reach the planar targets
    report = (out / "report.md").read_text()
    assert "| classical |" in report and "payload-1.5kg" in report
    assert "`payload_kg = 1.5`" in report and "SafetyLimits" in report
    for png in ("success_5cm.png", "success_1cm.png", "final_error.png"):
        assert (out / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert main(["bench", "--quick", "--out", str(out), "--policies", "classical"]) == 2


def test_every_policy_meets_identical_targets_and_perturbations(tmp_path):
    from blanket.bench.suite import BenchSettings, run_benchmark

    settings = BenchSettings.from_cli(
        policies=["active-inference", "classical-torque"],
        conditions=["random-pushes", "camera-dropout-30"],
        episodes=2,
        robot="planar",
        episode_s=1.0,
    )
    result = run_benchmark(settings, tmp_path, progress=False)
    by_condition: dict[str, list] = {}
    for r in result["records"]:
        by_condition.setdefault(r["condition"], []).append(r["per_episode"])
    for runs in by_condition.values():
        a, b = runs
        assert [e["target_start_m"] for e in a] == [e["target_start_m"] for e in b]
        assert [e["perturbation_digest"] for e in a] == [e["perturbation_digest"] for e in b]
        assert a[0]["target_start_m"] != a[1]["target_start_m"]
        assert a[0]["perturbation_digest"] != a[1]["perturbation_digest"]


def _chain(env) -> list[type]:
    out = []
    while True:
        out.append(type(env))
        if not hasattr(env, "env"):
            return out
        env = env.env


@pytest.mark.parametrize("condition", ["nominal", "payload-1.5kg", "control-120hz"])
def test_bench_envs_carry_the_safety_wrapper_of_run_outermost(condition):
    """Every policy meets the limits `blanket run` applies: the same SafetyLimits and profile,
    directly under the policy, with the condition's perturbations inside it."""
    import gymnasium as gym

    from blanket.bench.suite import BenchSettings, _make_env
    from blanket.conditions import PRESETS
    from blanket.runner import with_safety
    from blanket.wrappers import Payload, SafetyLimits

    settings = BenchSettings.from_cli(
        policies=["classical"], conditions=[condition], robot="planar", episodes=1
    )
    env = _make_env(settings, "velocity", PRESETS[condition])
    reference = with_safety(gym.make("blanket/planar-2link-v0"))
    try:
        chain = _chain(env)
        assert chain[0] is SafetyLimits and chain.count(SafetyLimits) == 1
        assert (Payload in chain) == (condition == "payload-1.5kg")
        assert env.profile == reference.profile
        np.testing.assert_array_equal(env.velocity_limit_rad_s, reference.velocity_limit_rad_s)
        _obs, info = env.reset(seed=0)
        _obs, _r, _t, _tr, info = env.step(100.0 * env.command_limit)
        assert info["safety"]["clamped"] and not info["safety"]["safe_stop"]
        assert np.all(np.abs(info["action_applied"]) <= env.velocity_limit_rad_s * (1 + 1e-12))
        assert "joint_speed_ratio" in info["safety"]
        if condition == "payload-1.5kg":
            assert info["external"]["payload_kg"] == 1.5
    finally:
        env.close()
        reference.close()


def test_rl_training_env_puts_the_safety_wrapper_under_the_action_scaling():
    """The learner's [-1, 1] actions are scaled to physical units first, then checked."""
    import gymnasium as gym

    from blanket.bench.rl import ReachVectorObservation, TrainSettings, make_training_env
    from blanket.wrappers import SafetyLimits

    env = make_training_env(TrainSettings(algo="ppo", steps=8, robot="planar"), monitor=False)
    try:
        chain = _chain(env)
        safety = chain.index(SafetyLimits)
        assert chain.index(ReachVectorObservation) < safety
        assert chain.index(gym.wrappers.RescaleAction) < safety
        env.reset(seed=0)
        _obs, _r, _t, _tr, info = env.step(np.ones(env.action_space.shape, dtype=np.float32))
        limits = env.unwrapped.description.velocity_limit_rad_s
        assert np.all(np.abs(info["action_applied"]) <= limits * (1 + 1e-12))
    finally:
        env.close()


# ----------------------------------------------------------------------------- RL


def test_sb3_check_env_and_a_tiny_training_run(tmp_path):
    pytest.importorskip("stable_baselines3")
    from stable_baselines3.common.env_checker import check_env

    from blanket.bench.evaluate import run_policy_episode
    from blanket.bench.rl import SB3Policy, TrainSettings, make_bench_env, make_training_env, train

    settings = TrainSettings(
        algo="ppo",
        steps=64,
        robot="planar",
        episode_s=1.0,
        eval_every=10_000,
        eval_episodes=1,
        hyperparameters={"n_steps": 64, "batch_size": 32, "n_epochs": 1},
    )
    env = make_training_env(settings, monitor=False)
    try:
        check_env(env, warn=True)
    finally:
        env.close()
    meta = train(settings, tmp_path)
    assert meta["policy_steps"] == 64 and meta["control_steps"] == 64 * 8
    assert meta["learning_curve"][-1]["policy_steps"] == 64
    saved = json.loads((tmp_path / "ppo.json").read_text())
    assert saved["settings"]["action_repeat"] == 8 and saved["finished"] is True
    bench_env = make_bench_env("planar", "velocity", 1.0)
    try:
        policy = SB3Policy.load(tmp_path / "ppo.zip", bench_env.unwrapped.description)
        trace = run_policy_episode(bench_env, policy, seed=0)
    finally:
        bench_env.close()
    # Held for action_repeat steps between decisions.
    assert np.all(trace.action[1:8] == trace.action[0])
    assert np.all(np.abs(trace.action) <= bench_env.unwrapped.action_space.high + 1e-12)


def test_bench_reports_the_beliefs_consistency():
    # an agent whose sd is honest scores a worst-joint mean NEES near 1 and "consistent"; the
    # same errors reported with a tenth of the sd score ~100 and are not consistent
    # (blanket.consistency: Bar-Shalom, Li & Kirubarajan 2001, sec. 5.4.2)
    from blanket.bench.evaluate import EpisodeTrace
    from blanket.bench.metrics import aggregate, episode_metrics

    rng = np.random.default_rng(0)
    k, n = 960, 3
    truth = rng.normal(size=(k, n))
    sd = np.full((k, n), 0.01)
    belief = truth + sd * rng.normal(size=(k, n))
    trace = EpisodeTrace(
        seed=0,
        dt=1.0 / 240.0,
        distance_m=np.full(k, 0.1),
        tip_m=np.zeros((k, 3)),
        q_rad=truth,
        action=np.zeros((k, n)),
        q_start_rad=np.zeros(n),
        tip_start_m=np.ones(3),
        target_start_m=np.zeros(3),
        q_seen_rad=truth,
        belief_q_rad=belief,
        policy_us=np.ones(k),
        perturbation_digest="",
        contact=False,
        env_success=False,
        belief_sd_q_rad=sd,
    )
    honest = episode_metrics(trace)
    assert 0.8 < honest["belief_nees"] < 1.25 and honest["belief_consistent"]
    trace.belief_sd_q_rad = sd / 10
    shrunk = episode_metrics(trace)
    assert shrunk["belief_nees"] > 80 and not shrunk["belief_consistent"]
    agg = aggregate([honest, shrunk])
    assert agg["belief_nees_max"] == pytest.approx(shrunk["belief_nees"])
    assert agg["belief_consistent_rate"] == 0.5


class RecklessPolicy:
    """Commands ``factor`` times the env's joint velocity bounds (the URDF's), alternating signs
    per joint: what a diverged controller might send (used by the test below, by import path).
    100x is far beyond the safety profile's "diverging controller" stop; 5x is clamped."""

    control = "velocity"
    factor = 100.0

    def __init__(self, env):
        high = np.asarray(env.action_space.high, dtype=float)
        self.command = self.factor * high * np.where(np.arange(high.size) % 2, -1.0, 1.0)

    def act(self, obs):
        return self.command


class FastPolicy(RecklessPolicy):
    factor = 5.0


def test_bench_applies_the_safety_limits_to_every_policy(tmp_path):
    # The same safety wrapper as `run`: commands of 100x the limits stop the arm, 5x are
    # clamped, and every true joint speed stays within 5 % of the profile (README, "What the
    # profile guarantees").
    from blanket.bench.suite import BenchSettings, run_benchmark

    settings = BenchSettings.from_cli(
        policies=["test_bench:RecklessPolicy", "test_bench:FastPolicy", "classical"],
        conditions=["nominal"],
        episodes=1,
        robot="iiwa",
        episode_s=1.0,
    )
    records = run_benchmark(settings, tmp_path, progress=False)["records"]
    peaks = {r["policy"]: r["peak_joint_speed_ratio"] for r in records}
    assert 0.0 <= peaks["test_bench:RecklessPolicy"] <= 1.05
    assert 0.9 < peaks["test_bench:FastPolicy"] <= 1.05  # driven at the limit, not beyond
    assert 0.0 < peaks["classical"] <= 1.05


def test_default_policies_left_out_are_named_with_the_reason(monkeypatch):
    from blanket.bench import rl
    from blanket.bench.report import markdown_report
    from blanket.bench.suite import BenchSettings

    monkeypatch.setattr(rl, "sb3_available", lambda: False)
    quick = BenchSettings.from_cli(quick=True)
    assert "sac" not in quick.policies
    assert any(x.startswith("sac: stable-baselines3 is not installed") for x in quick.left_out)
    full = BenchSettings.from_cli(rl_models=None)
    assert any(x.startswith("ppo: no ppo.zip") for x in full.left_out)
    from dataclasses import asdict

    assert "left out sac: stable-baselines3" in markdown_report([], asdict(quick), {}, 1.0)
