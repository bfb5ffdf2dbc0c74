"""The one rollout loop: policy protocol, observer hooks, success and timing, log columns."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

from blanket.errors import ConfigError
from blanket.logs import RunWriter, read_run
from blanket.rollout import Observer, ProgressBar, RunLog, rollout
from blanket.success import HeldInside
from blanket.wrappers import Recorder


class _LineEnv(gym.Env):
    """A physics-free 1-D reach: the position moves by action * dt toward a goal at 1.0;
    success is :class:`blanket.success.HeldInside` on ``|goal - x| <= 0.05``."""

    metadata = {"control_hz": 10.0}
    observation_space = gym.spaces.Dict({"x": gym.spaces.Box(-10, 10, (1,))})
    action_space = gym.spaces.Box(-5.0, 5.0, (1,))
    max_steps = 30

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.x = float(self.np_random.uniform(-0.5, 0.0))
        self.k = 0
        self.rule = HeldInside(0.1)
        return self._obs(), self._info()

    def step(self, action):
        self.x += float(np.asarray(action)[0]) * 0.1
        self.k += 1
        self.rule.update(abs(1.0 - self.x) <= 0.05)
        return self._obs(), -abs(1.0 - self.x), False, self.k >= self.max_steps, self._info()

    def _obs(self):
        return {"x": np.array([self.x])}

    def _info(self):
        return {
            "distance_m": abs(1.0 - self.x),
            "success": self.rule.success if self.k else False,
            "time_to_success_s": self.rule.time_to_success_s if self.k else None,
            "external": {"position_m": np.array([self.x])},
        }


class _Proportional:
    """act/reset policy: command = gain (goal - x); counts its resets."""

    def __init__(self, gain: float = 4.0) -> None:
        self.gain = gain
        self.resets = 0

    def reset(self) -> None:
        self.resets += 1

    def act(self, obs):
        return np.array([self.gain * (1.0 - obs["x"][0])])


class _PredictOnly:
    """SB3-style policy: checks episode_start and carries a step count as its state."""

    def __init__(self) -> None:
        self.calls: list[tuple[bool, object]] = []

    def predict(self, observation, state=None, episode_start=None, deterministic=True):
        self.calls.append((bool(np.any(episode_start)), state))
        count = 0 if state is None else state
        return np.array([4.0 * (1.0 - observation["x"][0])]), count + 1


class _Hooks(Observer):
    def __init__(self) -> None:
        self.events: list[str] = []
        self.rows: list[tuple[int, float, float, float]] = []

    def on_rollout_start(self, env, policy, episodes):
        self.events.append(f"start {episodes}")

    def on_episode_start(self, start):
        self.events.append(f"episode {start.episode} seed {start.seed}")
        self.x0 = float(start.obs["x"][0])

    def on_step(self, step):
        # the observation the policy acted on, and the truth after the step
        self.rows.append(
            (
                step.step,
                step.t,
                float(step.obs["x"][0]),
                float(step.info["external"]["position_m"][0]),
            )
        )
        assert step.agent_us >= 0.0 and step.env_us > 0.0

    def on_episode_end(self, result):
        self.events.append(f"end {result.episode} {result.success}")

    def on_rollout_end(self, results):
        self.events.append(f"done {len(results)}")


def test_act_policy_is_reset_each_episode_and_observers_see_every_step():
    env = _LineEnv()
    policy = _Proportional()
    hooks = _Hooks()
    results = rollout(env, policy, 2, seed=5, observers=[hooks], first_episode=3)
    assert policy.resets == 2
    assert hooks.events == [
        "start 2",
        "episode 3 seed 5",
        f"end 3 {results[0].success}",
        "episode 4 seed 6",
        f"end 4 {results[1].success}",
        "done 2",
    ]
    assert len(hooks.rows) == 2 * _LineEnv.max_steps
    steps = [r[0] for r in hooks.rows[:30]]
    assert steps == list(range(30))
    np.testing.assert_allclose([r[1] for r in hooks.rows[:30]], np.arange(30) * 0.1)
    # row k: the policy saw the position after step k (row 0: the reset), the truth after k+1
    xs = [r[2] for r in hooks.rows[:30]]
    truth = [r[3] for r in hooks.rows[:30]]
    np.testing.assert_allclose(xs[1:], truth[:-1])
    assert results[0].steps == 30 and results[0].seed == 5


def test_success_and_its_time_are_the_envs_report():
    env = _LineEnv()
    (result,) = rollout(env, _Proportional(), seeds=[1])
    # recompute by hand: replay the same seed and apply the rule step by step
    env2 = _LineEnv()
    obs, _ = env2.reset(seed=1)
    inside = []
    for _ in range(30):
        obs, *_rest = env2.step(np.array([4.0 * (1.0 - obs["x"][0])]))
        inside.append(abs(1.0 - obs["x"][0]) <= 0.05)
    first = inside.index(True)  # inside after step first + 1, and it stays (a stable approach)
    assert all(inside[first:])
    assert result.success
    assert result.time_to_success_s == pytest.approx((first + 1) * 0.1)
    assert result.final_error_m == pytest.approx(abs(1.0 - obs["x"][0]))
    # the loop's timings are wall clock of its own, never read from info
    assert result.agent_step_us > 0.0 and result.sim_step_us > 0.0
    (slow,) = rollout(env, _Proportional(gain=0.1), seeds=[1])
    assert not slow.success and slow.time_to_success_s is None


def test_predict_policy_gets_episode_start_and_its_state_back():
    env = _LineEnv()
    policy = _PredictOnly()
    a, b = rollout(env, policy, 2, seed=0)
    first = [c for c in policy.calls[:30]]
    assert first[0] == (True, None)
    assert [s for _, s in first[1:]] == list(range(1, 30))
    assert not any(start for start, _ in first[1:])
    assert policy.calls[30] == (True, None)  # a fresh state for the second episode
    rerun = rollout(env, _Proportional(), 2, seed=0)
    assert [r.final_error_m for r in (a, b)] == [r.final_error_m for r in rerun]


def test_bad_counts_and_policies_are_config_errors():
    env = _LineEnv()
    with pytest.raises(ConfigError, match="episodes must be in 1..100000"):
        rollout(env, _Proportional(), 0)
    with pytest.raises(ConfigError, match="give episodes or seeds"):
        rollout(env, _Proportional())
    with pytest.raises(ConfigError, match="2 given with 3 seeds"):
        rollout(env, _Proportional(), 2, seeds=[1, 2, 3])
    with pytest.raises(ConfigError, match="neither act"):
        rollout(env, object(), 1)


def test_rollout_end_runs_when_an_episode_fails():
    class Broken(_Proportional):
        def act(self, obs):
            raise RuntimeError("policy failed")

    bar = ProgressBar("t")
    hooks = _Hooks()
    with pytest.raises(RuntimeError, match="policy failed"):
        rollout(_LineEnv(), Broken(), 2, observers=[hooks, bar])
    assert hooks.events[-1] == "done 0" and bar.bar is None


def test_light_path_reads_properties_and_observers_get_full_diagnostics():
    class Agent(_Proportional):
        def __init__(self):
            super().__init__()
            self.full_calls = 0
            self.view_calls = 0

        @property
        def free_energy(self):
            return 2.0

        @property
        def safe_stop(self):
            return False

        def diagnostics(self, copy=True):
            if copy:
                self.full_calls += 1
            else:
                self.view_calls += 1
            return {"free_energy": 2.0, "safe_stop": False, "belief": np.zeros((2, 1))}

    agent = Agent()
    (result,) = rollout(_LineEnv(), agent, 1)
    assert agent.full_calls == agent.view_calls == 0
    assert result.mean_free_energy == 2.0

    class Wants(Observer):
        wants_diagnostics = True

        def on_step(self, step):
            assert step.diagnostics_are_views and "belief" in step.diagnostics

    rollout(_LineEnv(), agent, 1, observers=[Wants()])
    assert agent.view_calls == 30 and agent.full_calls == 0


def test_run_log_and_recorder_write_the_same_columns(tmp_path):
    """One log-group builder: the loop's log and the Recorder name every column alike."""
    import blanket  # noqa: F401  (registers the env ids)
    from blanket.bench.policies import ClassicalReach

    env = gym.make("blanket/planar-2link-v0", episode_s=0.25)
    try:
        names = list(env.unwrapped.description.joint_names)
        with RunWriter(tmp_path / "loop", {"joint_names": names}) as writer:
            rollout(env, ClassicalReach.from_env(env), seeds=[4], observers=[RunLog(writer)])
        recorded = Recorder(env, tmp_path / "wrapped")
        rollout(recorded, ClassicalReach.from_env(env), seeds=[4])
        recorded.close()
    finally:
        env.close()
    loop = read_run(tmp_path / "loop")
    wrapped = read_run(tmp_path / "wrapped")
    loop_columns = [c for c in loop.columns if not c.startswith("internal.")]
    assert loop_columns == list(wrapped.columns)
    assert "active.action.shoulder" in loop_columns and "external.success" in loop_columns
    # the same rows too (the Recorder adds the final state as one more row)
    shared = [c for c in loop_columns if c not in ("episode", "t")]
    np.testing.assert_array_equal(
        loop[shared].to_numpy(float), wrapped[shared].iloc[:-1].to_numpy(float)
    )
    # the loop's t is step * dt, the Recorder's the env's time_s (step / rate)
    np.testing.assert_allclose(loop["t"], wrapped["t"].iloc[:-1], rtol=1e-12)


def test_held_inside_reports_the_entry_time_as_envs_count_time():
    # entry after step 11, held 60 further steps (0.25 s at 240 Hz): time 11 / 240 exactly,
    # the env's time_s convention (step / control rate)
    rule = HeldInside(1.0 / 240.0)
    inside = [False] * 10 + [True] * 61 + [False] * 5
    reached = [rule.update(ok) for ok in inside]
    assert reached.index(True) == 70 and rule.time_to_success_s == 11 / 240.0
    assert not rule.held and rule.success  # left again; success stays
    from blanket.success import time_to_success

    assert time_to_success(inside, 1.0 / 240.0) == 11 / 240.0
    assert time_to_success(inside[:70], 1.0 / 240.0) is None  # one step short of the hold
