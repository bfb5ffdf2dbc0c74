"""The one rollout loop: a policy in an env for seeded episodes, extended by observers.

Every part of blanket that runs episodes runs them here -- ``blanket demo`` and ``run``
(:mod:`blanket.runner`), the benchmark (:mod:`blanket.bench.evaluate`), precision sweeps
(:mod:`blanket.tune.engines`) and the rover's episodes
(:func:`blanket.agent.mobile_base.run_base_episode`). The shape follows stable-baselines3's
``evaluate_policy`` with callbacks: the loop owns reset, act and step and the outcome of each
episode (:class:`EpisodeResult`); what else a caller needs -- a log, traces for metrics, a
progress bar -- is an :class:`Observer` with hooks at the start and end of the rollout and of
each episode and after every step.

Policies: an object with ``act(obs) -> action`` (and optionally ``reset()``, called at each
episode start), or one with stable-baselines3's ``predict(obs, state, episode_start,
deterministic) -> (action, state)`` (given ``episode_start=True`` on the first step of an
episode and its own state back afterwards). ``act`` is used when a policy has both.

Wall-clock time belongs to the loop, not to the env: the loop times the policy's ``act`` and
the env's ``step`` (``time.perf_counter_ns``) and reports their medians per episode
(``agent_step_us``, ``sim_step_us``); nothing timed enters observations, ``info`` or logs.

Success is the env's: ``info["success"]`` and ``info["time_to_success_s"]`` of the first step
that reports success (the rule of :mod:`blanket.success`); the loop never re-derives it.
"""

from __future__ import annotations

import functools
import inspect
import math
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from blanket.errors import ConfigError

__all__ = [
    "PolicyAdapter",
    "EpisodeStart",
    "StepView",
    "EpisodeResult",
    "Observer",
    "RunLog",
    "ProgressBar",
    "rollout",
    "MAX_EPISODES",
]

#: Upper bound of the episode count of one rollout.
MAX_EPISODES = 100_000


class PolicyAdapter:
    """Calls a policy the one way the loop does (see the module docstring).

    ``act`` is the policy's own bound ``act`` when it has one (no extra call per step), or a
    ``predict`` call that carries the policy's state; ``diagnostics`` is the policy's
    ``diagnostics`` method or None.
    """

    def __init__(self, policy: Any) -> None:
        if isinstance(policy, PolicyAdapter):
            policy = policy.policy
        self.policy = policy
        self._state: Any = None
        self._first = True
        if hasattr(policy, "act"):
            self.act: Callable[[Any], Any] = policy.act
            self._reset = getattr(policy, "reset", None)
        elif hasattr(policy, "predict"):
            self.act = self._predict
            self._reset = None
        else:
            raise ConfigError(
                f"policy {type(policy).__name__} has neither act(obs) nor "
                "predict(obs, state, episode_start, deterministic)"
            )
        self.diagnostics: Callable[..., Mapping[str, Any]] | None = getattr(
            policy, "diagnostics", None
        )

    def begin_episode(self) -> None:
        """Start an episode: the policy's ``reset()`` (act) or a fresh state (predict)."""
        self._state = None
        self._first = True
        if self._reset is not None:
            self._reset()

    def _predict(self, obs: Any) -> Any:
        action, self._state = self.policy.predict(
            obs, state=self._state, episode_start=np.array([self._first]), deterministic=True
        )
        self._first = False
        return action

    def __call__(self, obs: Any) -> Any:
        return self.act(obs)


@dataclass
class EpisodeResult:
    """Outcome of one episode."""

    episode: int
    seed: int | None
    success: bool
    time_to_success_s: float | None
    final_error_m: float
    steps: int
    agent_step_us: float
    sim_step_us: float
    mean_free_energy: float | None
    final_heading_error_rad: float | None = None
    contact: bool = False
    safe_stop: bool = False
    trace: dict[str, np.ndarray] = field(default_factory=dict, repr=False)
    #: Median of the free energy over the episode's steps: the settled level. The mean
    #: (``mean_free_energy``) is dominated by the first steps, where the belief meets its
    #: first sensations (one episode: peak 2e4, median -83, mean -21).
    median_free_energy: float | None = None
    #: Task measures observers add at the episode's end (the hold task's
    #: ``time_within_tolerance``, ``recovery_times_s``, ``tip_covariance_m2``), in the JSON form.
    measures: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """The JSON form (``summary.json``'s ``per_episode``, a log's episode metadata)."""
        return {
            "episode": self.episode,
            "seed": self.seed,
            "success": self.success,
            "time_to_success_s": self.time_to_success_s,
            "final_error_m": self.final_error_m,
            "final_heading_error_rad": self.final_heading_error_rad,
            "steps": self.steps,
            "agent_step_us": self.agent_step_us,
            "sim_step_us": self.sim_step_us,
            "median_free_energy": self.median_free_energy,
            "mean_free_energy": self.mean_free_energy,
            "contact": self.contact,
            "safe_stop": self.safe_stop,
            **self.measures,
        }


@dataclass(frozen=True)
class EpisodeStart:
    """What an observer learns when an episode starts (after ``env.reset``)."""

    episode: int
    seed: int | None
    obs: Any
    info: Mapping[str, Any]
    dt: float
    max_steps: int | None
    env: Any
    policy: PolicyAdapter


class StepView:
    """One control step, as observers see it (one object per rollout, updated in place:
    copy what you keep). ``diagnostics`` may hold views of the agent's buffers when
    ``diagnostics_are_views``; they are valid during the call only."""

    __slots__ = (
        "episode",
        "step",
        "t",
        "obs",
        "info_before",
        "action",
        "next_obs",
        "info",
        "terminated",
        "truncated",
        "diagnostics",
        "diagnostics_are_views",
        "agent_us",
        "env_us",
    )

    def __init__(self) -> None:
        self.episode = 0
        self.step = 0  # index of this step in the episode (0 = the first action)
        self.t = 0.0  # time the policy acted (s), step * dt
        self.obs: Any = None  # what the policy acted on
        self.info_before: Mapping[str, Any] = {}  # the env's info when the policy acted
        self.action: Any = None
        self.next_obs: Any = None
        self.info: Mapping[str, Any] = {}  # the env's info after the step
        self.terminated = False
        self.truncated = False
        self.diagnostics: Mapping[str, Any] | None = None
        self.diagnostics_are_views = False
        self.agent_us = 0.0  # the policy's act (us)
        self.env_us = 0.0  # the env's step, wrappers included (us)


class Observer:
    """Hooks of the rollout loop; subclass and override what you need.

    ``wants_diagnostics``: set True to get the policy's full diagnostics in
    :attr:`StepView.diagnostics` every step (otherwise the loop reads only the free energy and
    the safe-stop flag, through the agent's cheap properties when it has them).
    """

    wants_diagnostics: bool = False

    def on_rollout_start(self, env: Any, policy: PolicyAdapter, episodes: int) -> None:
        """Before the first episode."""

    def on_episode_start(self, start: EpisodeStart) -> None:
        """After ``env.reset`` and the policy's reset."""

    def on_step(self, step: StepView) -> None:
        """After each ``env.step``."""

    def on_episode_end(self, result: EpisodeResult) -> None:
        """After the last step of an episode."""

    def on_rollout_end(self, results: Sequence[EpisodeResult]) -> None:
        """After the last episode, and when the rollout stops on an error."""


class RunLog(Observer):
    """Writes every step's four log groups (:mod:`blanket.logs.groups`) to a
    :class:`~blanket.logs.RunWriter`, one episode per file, the :class:`EpisodeResult` as the
    episode's metadata.

    An agent whose ``diagnostics`` takes ``copy`` hands out views (the writer copies every
    value); such views hold numbers only and skip the filtering of strings too.
    """

    wants_diagnostics = True

    def __init__(self, writer: Any) -> None:
        from blanket.logs import groups

        self.writer = writer
        self.numeric_only = groups.numeric_only
        # instance attributes, so a benchmark can time the builders (scripts/bench_logging.py)
        self.external_group = groups.external_group
        self.sensory_group = groups.sensory_group
        self.active_group = groups.active_group

    def on_episode_start(self, start: EpisodeStart) -> None:
        self.writer.begin_episode(start.episode, max_steps=start.max_steps)

    def on_step(self, step: StepView) -> None:
        # One row per control step: the truth and the sensations at the time the agent acted,
        # the command it sent (and what a safety wrapper let through), and its belief after
        # that update.
        diag = step.diagnostics
        self.writer.record(
            step.step,
            step.t,
            external=self.external_group(step.info_before),
            sensory=self.sensory_group(step.obs),
            active=self.active_group(step.action, step.info),
            internal=None
            if diag is None
            else diag
            if step.diagnostics_are_views
            else self.numeric_only(diag),
        )

    def on_episode_end(self, result: EpisodeResult) -> None:
        self.writer.end_episode(extra=result.to_dict())


class ProgressBar(Observer):
    """A tqdm bar over the rollout's steps, with the count of episodes reached so far.

    The first step can take seconds (the first run of the agent's compiled step loads or
    compiles it), and a rate measured over it would give an ETA of hours. So the bar says
    ``starting`` until that step is done, then measures time from there (the mean rate since
    then, not a moving average) and shows an ETA once :attr:`WARM_STEPS` more steps have run.
    """

    #: Steps after the first before the bar shows an ETA.
    WARM_STEPS = 50
    _STARTING = (
        "{desc}: {n_fmt}/{total_fmt} steps [starting: the first step loads the compiled agent]"
    )
    _WARMING = "{desc}: {percentage:3.0f}%|{bar}| {n_fmt}/{total_fmt} [{elapsed}{postfix}]"
    _RUNNING = (
        "{desc}: {percentage:3.0f}%|{bar}| {n_fmt}/{total_fmt} "
        "[{elapsed}<{remaining}, {rate_fmt}{postfix}]"
    )

    def __init__(self, description: str = "episodes", file: Any = None) -> None:
        self.description = description
        self.file = file
        self.bar: Any = None
        self._reached = 0
        self._done = 0
        self._steps = 0

    def on_rollout_start(self, env: Any, policy: PolicyAdapter, episodes: int) -> None:
        from tqdm import tqdm

        steps = getattr(env.unwrapped, "max_steps", None)
        self.bar = tqdm(
            total=episodes * steps if steps else None,
            desc=self.description,
            unit="step",
            unit_scale=True,
            leave=False,
            dynamic_ncols=True,
            smoothing=0,
            bar_format=self._STARTING if steps else None,
            file=self.file,
        )
        self._reached = self._done = self._steps = 0

    def on_step(self, step: StepView) -> None:
        bar = self.bar
        self._steps += 1
        if self._steps == 1 and bar.total:
            # time from the end of the first step: restart the clock with that step counted
            bar.bar_format = self._WARMING
            bar.reset(total=bar.total)
        elif self._steps == self.WARM_STEPS + 1 and bar.total:
            bar.bar_format = self._RUNNING
        bar.update()

    def on_episode_end(self, result: EpisodeResult) -> None:
        self._done += 1
        self._reached += bool(result.success)
        self.bar.set_postfix_str(f"reached {self._reached}/{self._done}")

    def on_rollout_end(self, results: Sequence[EpisodeResult]) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None


def _seed_list(
    episodes: int | None, seed: int | None, seeds: Iterable[int | None] | None
) -> list[int | None]:
    if seeds is not None:
        listed = [None if s is None else int(s) for s in seeds]
        if episodes is not None and episodes != len(listed):
            raise ConfigError(f"episodes: {episodes} given with {len(listed)} seeds")
        count = len(listed)
    else:
        if episodes is None:
            raise ConfigError("rollout: give episodes or seeds")
        count = episodes
        listed = []
    if isinstance(count, bool) or not 1 <= count <= MAX_EPISODES:
        raise ConfigError(f"episodes must be in 1..{MAX_EPISODES}, got {count}")
    if seeds is None:
        base = 0 if seed is None else int(seed)
        listed = [base + i for i in range(count)]
    return listed


def rollout(
    env: Any,
    policy: Any,
    episodes: int | None = None,
    *,
    seed: int | None = 0,
    seeds: Iterable[int | None] | None = None,
    observers: Sequence[Observer] = (),
    first_episode: int = 0,
) -> list[EpisodeResult]:
    """Run ``policy`` in ``env`` for seeded episodes; return one :class:`EpisodeResult` each.

    Parameters
    ----------
    env : gymnasium.Env
        Any env; blanket's envs report ``distance_m``, ``success``, ``time_to_success_s``,
        ``contact`` (and wrappers ``safety``) in ``info``.
    policy : object
        ``act(obs)`` (optional ``reset()``) or stable-baselines3's ``predict``.
    episodes : int, optional
        Number of episodes (1..100000), with seeds ``seed, seed + 1, ...``.
    seed : int, optional
        First seed when ``seeds`` is not given.
    seeds : iterable of int or None, optional
        The seed of each episode (``env.reset(seed=s)``); ``None`` continues the env's
        generator.
    observers : sequence of Observer
        Called in order at each hook.
    first_episode : int
        Episode number of the first episode (log files are numbered by it).
    """
    seed_list = _seed_list(episodes, seed, seeds)
    adapter = PolicyAdapter(policy)
    observers = list(observers)
    for observer in observers:
        observer.on_rollout_start(env, adapter, len(seed_list))
    results: list[EpisodeResult] = []
    try:
        for i, s in enumerate(seed_list):
            results.append(_episode(env, adapter, s, first_episode + i, observers))
    finally:
        for observer in observers:
            observer.on_rollout_end(results)
    return results


def _control_hz(env: Any) -> float:
    hz = env.unwrapped.metadata.get("control_hz", 0)
    if hz:
        return float(hz)
    hz = getattr(getattr(env.unwrapped, "description", None), "control_hz", None)
    if hz is None:
        raise ConfigError("env does not report its control rate (description.control_hz)")
    return float(hz)


def _mean_known(values: list[float]) -> float | None:
    """Mean over the steps that reported a value; None when none did."""
    array = np.asarray(values, dtype=float)
    return float(np.nanmean(array)) if (~np.isnan(array)).any() else None


def _median_known(values: list[float]) -> float | None:
    """Median over the steps that reported a value; None when none did."""
    array = np.asarray(values, dtype=float)
    return float(np.nanmedian(array)) if (~np.isnan(array)).any() else None


def _episode(
    env: Any, policy: PolicyAdapter, seed: int | None, episode: int, observers: list[Observer]
) -> EpisodeResult:
    obs, info = env.reset(seed=seed)
    policy.begin_episode()
    act = policy.act
    agent = policy.policy
    diagnostics = policy.diagnostics
    full = diagnostics is not None and any(o.wants_diagnostics for o in observers)
    views = False
    if full:
        try:
            if "copy" in inspect.signature(diagnostics).parameters:
                diagnostics = functools.partial(diagnostics, copy=False)
                views = True
        except (TypeError, ValueError):
            pass
    # Without full diagnostics, only the free energy and the safe-stop flag are needed, and
    # agents that expose them as properties (ArmAgent) skip building the diagnostics.
    light = not full and hasattr(agent, "free_energy") and hasattr(agent, "safe_stop")
    track_energy = light or diagnostics is not None
    dt = 1.0 / _control_hz(env)
    max_steps = getattr(env.unwrapped, "max_steps", None)
    start = EpisodeStart(episode, seed, obs, info, dt, max_steps, env, policy)
    for observer in observers:
        observer.on_episode_start(start)
    view = StepView()
    view.episode = episode
    view.diagnostics_are_views = views
    clock = time.perf_counter_ns
    nan = math.nan
    agent_us: list[float] = []
    env_us: list[float] = []
    distance: list[float] = []
    energy: list[float] = []
    step = 0
    success_time: float | None = None
    ever_success = False
    contact = False
    safe_stop = False
    diag: Mapping[str, Any] | None = None
    while True:
        t0 = clock()
        action = act(obs)
        t1 = clock()
        if light:
            fe = agent.free_energy
            safe_stop = safe_stop or bool(agent.safe_stop)
        elif diagnostics is not None:
            diag = diagnostics()
            fe = diag.get("free_energy")
            safe_stop = safe_stop or bool(diag.get("safe_stop", False))
        if track_energy:
            energy.append(float(fe) if fe is not None else nan)
        t2 = clock()
        next_obs, _reward, terminated, truncated, next_info = env.step(action)
        t3 = clock()
        agent_us.append((t1 - t0) / 1e3)
        env_us.append((t3 - t2) / 1e3)
        distance.append(float(next_info.get("distance_m", nan)))
        contact = contact or bool(next_info.get("contact", False))
        safe_stop = safe_stop or bool(next_info.get("safety", {}).get("safe_stop", False))
        if not ever_success and next_info.get("success"):
            ever_success = True
            tts = next_info.get("time_to_success_s")
            success_time = float(tts) if tts is not None else (step + 1) * dt
        if observers:
            view.step = step
            view.t = step * dt
            view.obs = obs
            view.info_before = info
            view.action = action
            view.next_obs = next_obs
            view.info = next_info
            view.terminated = terminated
            view.truncated = truncated
            view.diagnostics = diag
            view.agent_us = agent_us[-1]
            view.env_us = env_us[-1]
            for observer in observers:
                observer.on_step(view)
        obs, info = next_obs, next_info
        step += 1
        if terminated or truncated:
            break
    final_heading = info.get("heading_error_rad")
    result = EpisodeResult(
        episode=episode,
        seed=seed,
        success=ever_success,
        time_to_success_s=success_time,
        final_error_m=float(info.get("distance_m", nan)),
        steps=step,
        agent_step_us=float(np.median(agent_us)),
        sim_step_us=float(np.median(env_us)),
        mean_free_energy=_mean_known(energy),
        median_free_energy=_median_known(energy),
        final_heading_error_rad=None if final_heading is None else abs(float(final_heading)),
        contact=contact,
        safe_stop=safe_stop,
        trace={
            "t": np.arange(step) * dt,
            "distance_m": np.asarray(distance),
            "free_energy": np.asarray(energy) if energy else np.full(step, np.nan),
        },
    )
    for observer in observers:
        observer.on_episode_end(result)
    return result
