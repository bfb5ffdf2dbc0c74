"""The loop that owns an env and an agent: episodes, timing, summary, logs and figures."""

from __future__ import annotations

import functools
import inspect
import json
import math
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from blanket.errors import ConfigError
from blanket.scenario import Scenario, env_option_names, load_object, make_env

__all__ = [
    "EpisodeResult",
    "run_episode",
    "run_episodes",
    "summarize",
    "build_agent",
    "run_scenario",
    "prepare_out_dir",
    "with_safety",
    "SUMMARY_KEYS",
]

SUMMARY_KEYS = (
    "episodes",
    "success_rate",
    "final_error_m",
    "time_to_success_s",
    "agent_step_us",
    "sim_step_us",
)


@dataclass
class EpisodeResult:
    """Outcome of one episode."""

    episode: int
    seed: int
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

    def to_dict(self) -> dict[str, Any]:
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
            "mean_free_energy": self.mean_free_energy,
            "contact": self.contact,
            "safe_stop": self.safe_stop,
        }


def _act(agent: Any) -> Callable[[Any], np.ndarray]:
    if hasattr(agent, "act"):
        return agent.act
    if hasattr(agent, "predict"):
        return lambda obs: agent.predict(obs, deterministic=True)[0]
    raise ConfigError(f"agent {type(agent).__name__} has neither act(obs) nor predict(obs)")


def run_episode(
    env: Any,
    agent: Any,
    seed: int,
    episode: int = 0,
    writer: Any = None,
    on_step: Callable[[], None] | None = None,
) -> EpisodeResult:
    """Run one episode from ``env.reset(seed=seed)`` to truncation or termination."""
    obs, info = env.reset(seed=int(seed))
    if hasattr(agent, "reset"):
        agent.reset()
    act = _act(agent)
    diagnostics = getattr(agent, "diagnostics", None)
    # Without a log, only the free energy and the safe-stop flag are needed, and agents that
    # expose them as properties (ArmAgent) skip building the full diagnostics.
    light = writer is None and hasattr(agent, "free_energy") and hasattr(agent, "safe_stop")
    numbers_only = False
    if writer is not None and diagnostics is not None:
        # The writer copies every value, so an agent that can hand out views saves a copy;
        # such views hold numbers only, so they skip the filtering of strings too.
        try:
            if "copy" in inspect.signature(diagnostics).parameters:
                diagnostics = functools.partial(diagnostics, copy=False)
                numbers_only = True
        except (TypeError, ValueError):
            pass
    dt = 1.0 / float(env.unwrapped.metadata.get("control_hz", 0) or _control_hz(env))
    max_steps = getattr(env.unwrapped, "max_steps", None)
    if writer is not None:
        writer.begin_episode(episode, max_steps=max_steps)
    agent_us: list[float] = []
    sim_us: list[float] = []
    distance: list[float] = []
    energy: list[float] = []
    step = 0
    success_time: float | None = None
    ever_success = False
    contact = False
    safe_stop = False
    while True:
        t0 = time.perf_counter_ns()
        action = act(obs)
        agent_us.append((time.perf_counter_ns() - t0) / 1e3)
        if light:
            diag = {"free_energy": agent.free_energy, "safe_stop": agent.safe_stop}
        else:
            diag = diagnostics() if diagnostics is not None else None
        if diag is not None:
            fe = diag.get("free_energy")
            energy.append(float(fe) if fe is not None else math.nan)
            safe_stop = safe_stop or bool(diag.get("safe_stop", False))
        if writer is not None:
            external = _external_group(info)
        next_obs, _reward, terminated, truncated, info = env.step(action)
        sim_us.append(float(info.get("sim_step_us", math.nan)))
        distance.append(float(info.get("distance_m", math.nan)))
        contact = contact or bool(info.get("contact", False))
        safe_stop = safe_stop or bool(info.get("safety", {}).get("safe_stop", False))
        if info.get("success") and not ever_success:
            ever_success = True
            tts = info.get("time_to_success_s")
            success_time = float(tts) if tts is not None else (step + 1) * dt
        if writer is not None:
            # One row per control step: the truth and the sensations at the time the agent
            # acted, the command it sent (and what a safety wrapper let through), and its
            # belief after that update.
            writer.record(
                step,
                step * dt,
                external=external,
                sensory=obs if type(obs) is dict else _sensory_group(obs),
                active=active_group(action, info),
                internal=None if diag is None else diag if numbers_only else _loggable(diag),
            )
        obs = next_obs
        step += 1
        if on_step is not None:
            on_step()
        if terminated or truncated:
            break
    final_heading = info.get("heading_error_rad")
    result = EpisodeResult(
        episode=episode,
        seed=int(seed),
        success=ever_success,
        time_to_success_s=success_time,
        final_error_m=float(info.get("distance_m", math.nan)),
        steps=step,
        agent_step_us=float(np.median(agent_us)),
        sim_step_us=float(np.nanmedian(sim_us)) if np.isfinite(sim_us).any() else math.nan,
        mean_free_energy=float(np.nanmean(energy)) if energy else None,
        final_heading_error_rad=None if final_heading is None else abs(float(final_heading)),
        contact=contact,
        safe_stop=safe_stop,
        trace={
            "t": np.arange(step) * dt,
            "distance_m": np.asarray(distance),
            "free_energy": np.asarray(energy) if energy else np.full(step, np.nan),
        },
    )
    if writer is not None:
        writer.end_episode(extra=result.to_dict())
    return result


def active_group(action: Any, info: Mapping[str, Any]) -> dict[str, Any]:
    """The ``active.*`` log group: the command sent and, behind a safety wrapper, the command
    it let through (``info["action_applied"]`` of the step that executed it)."""
    group: dict[str, Any] = {"action": _as_float_array(action)}
    applied = info.get("action_applied")
    if applied is not None:
        group["action_applied"] = _as_float_array(applied)
    return group


def _as_float_array(value: Any) -> np.ndarray:
    # the usual case, a float64 array, as it is (the log writer copies it)
    if type(value) is np.ndarray and value.dtype is _FLOAT64:
        return value
    return np.asarray(value, dtype=float)


_FLOAT64 = np.dtype(np.float64)


_INFO_TRUTH_KEYS = ("distance_m", "success", "inside_tolerance", "contact", "heading_error_rad")


def _external_group(info: Mapping[str, Any]) -> dict[str, Any]:
    """The ``external.*`` log group from an env's ``info``: its truth plus task status."""
    external = dict(info.get("external", {}))
    for key in _INFO_TRUTH_KEYS:
        if key in info:
            external[key] = info[key]
    return external


def _sensory_group(obs: Any) -> dict[str, Any]:
    """The ``sensory.*`` group of an observation that is not a plain dict."""
    if isinstance(obs, Mapping):
        return dict(obs)
    return {"observation": np.asarray(obs)}


def _control_hz(env: Any) -> float:
    d = getattr(env.unwrapped, "description", None)
    hz = getattr(d, "control_hz", None)
    if hz is None:
        raise ConfigError("env does not report its control rate (description.control_hz)")
    return float(hz)


def _loggable(diag: Mapping[str, Any]) -> dict[str, Any]:
    """The numeric part of an agent's diagnostics (strings stay out of the data columns)."""
    return {k: v for k, v in diag.items() if not isinstance(v, str)}


def run_episodes(
    env: Any,
    agent: Any,
    episodes: int,
    seed: int,
    writer: Any = None,
    progress: bool = True,
    description: str = "episodes",
) -> list[EpisodeResult]:
    """Run ``episodes`` episodes with seeds ``seed, seed + 1, ...``, with a progress bar."""
    if not 1 <= episodes <= 100_000:
        raise ConfigError(f"episodes must be in 1..100000, got {episodes}")
    bar = None
    if progress:
        from tqdm import tqdm

        steps = getattr(env.unwrapped, "max_steps", None)
        bar = tqdm(
            total=episodes * steps if steps else None,
            desc=description,
            unit="step",
            unit_scale=True,
            leave=False,
            dynamic_ncols=True,
        )
    results = []
    try:
        for i in range(episodes):
            results.append(
                run_episode(
                    env,
                    agent,
                    seed + i,
                    episode=i,
                    writer=writer,
                    on_step=bar.update if bar is not None else None,
                )
            )
            if bar is not None:
                ok = sum(r.success for r in results)
                bar.set_postfix_str(f"reached {ok}/{len(results)}")
    finally:
        if bar is not None:
            bar.close()
    return results


def _median(values: list[float]) -> float | None:
    vals = [v for v in values if v is not None and np.isfinite(v)]
    return float(np.median(vals)) if vals else None


def summarize(results: list[EpisodeResult]) -> dict[str, Any]:
    """The ``summary.json`` content: counts, rates and medians over episodes."""
    summary: dict[str, Any] = {
        "episodes": len(results),
        "success_rate": sum(r.success for r in results) / len(results) if results else 0.0,
        "final_error_m": _median([r.final_error_m for r in results]),
        "time_to_success_s": _median([r.time_to_success_s for r in results if r.success]),
        "agent_step_us": _median([r.agent_step_us for r in results]),
        "sim_step_us": _median([r.sim_step_us for r in results]),
        "contact_rate": sum(r.contact for r in results) / len(results) if results else 0.0,
        "safe_stops": sum(r.safe_stop for r in results),
    }
    headings = [r.final_heading_error_rad for r in results if r.final_heading_error_rad is not None]
    if headings:
        summary["final_heading_error_rad"] = float(np.median(headings))
    summary["per_episode"] = [r.to_dict() for r in results]
    return summary


def build_agent(env: Any, options: Mapping[str, Any]) -> Any:
    """The agent of a scenario's ``[agent]`` table: built in, or ``class = "pkg.mod:Name"``."""
    opts = dict(options)
    cls_path = opts.pop("class", None)
    if cls_path is None:
        from blanket.agent import agent_for_env

        return agent_for_env(env, **opts)
    cls = load_object(cls_path, "agent class")
    try:
        if hasattr(cls, "from_env"):
            return cls.from_env(env, **opts)
        return cls(env, **opts)
    except TypeError as exc:
        raise ConfigError(f"agent class {cls_path!r} rejected its options: {exc}") from None


def prepare_out_dir(out: str | Path | None, overwrite: bool, prefix: str) -> Path:
    """A fresh run folder: ``out`` (refused when non-empty unless ``overwrite``), or new."""
    if out is None:
        base = Path("blanket-runs")
        stamp = time.strftime("%Y%m%d-%H%M%S")
        path = base / f"{prefix}-{stamp}"
        k = 1
        while path.exists():
            path = base / f"{prefix}-{stamp}-{k}"
            k += 1
    else:
        path = Path(out)
        if path.exists() and not path.is_dir():
            raise ConfigError(f"--out {str(path)!r} exists and is not a folder")
        if path.is_dir() and any(path.iterdir()) and not overwrite:
            raise ConfigError(f"--out {str(path)!r} is not empty; pass --overwrite to reuse it")
    path.mkdir(parents=True, exist_ok=True)
    return path


def _run_metadata(scenario: Scenario, env: Any, seed: int) -> dict[str, Any]:
    import gymnasium
    import pybullet

    import blanket

    d = env.unwrapped.description
    meta: dict[str, Any] = {
        "scenario": {
            "name": scenario.name,
            "env": scenario.env,
            "env_options": scenario.env_options,
            "agent": scenario.agent,
        },
        "seed": seed,
        "versions": {
            "blanket": blanket.__version__,
            "numpy": np.__version__,
            "gymnasium": gymnasium.__version__,
            "pybullet": str(getattr(pybullet, "__version__", "unknown")),
        },
        "env_id": scenario.env,
        "start_time": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }
    for key in (
        "urdf_path",
        "end_effector",
        "control",
        "control_hz",
        "episode_s",
        "tolerance_m",
        "robot",
    ):
        if hasattr(d, key):
            meta[key] = getattr(d, key)
    if hasattr(d, "joint_names"):
        meta["joint_names"] = list(d.joint_names)
    space = env.action_space
    if hasattr(space, "low"):
        meta["action_low"] = np.asarray(space.low, float).tolist()
        meta["action_high"] = np.asarray(space.high, float).tolist()
    cam = getattr(d, "camera", None)
    rates = {"control_hz": getattr(d, "control_hz", None)}
    if cam is not None and hasattr(cam, "rate_hz"):
        rates["camera_hz"] = cam.rate_hz
    meta["rates"] = rates
    robot = scenario.env_options.get("robot")
    if robot is None and scenario.env_options.get("urdf"):
        robot = Path(str(scenario.env_options["urdf"])).stem
    meta["robot"] = robot or env_option_names(scenario.env).get("robot")
    for key, name in (("bench_boxes_m", "bench_boxes_m"), ("landmarks_m", "landmarks_m")):
        if hasattr(d, key):
            meta[name] = np.asarray(getattr(d, key), dtype=float).tolist()
    return meta


def _tolerance_m(env: Any) -> float | None:
    d = getattr(env.unwrapped, "description", None)
    for key in ("tolerance_m", "success_distance_m"):
        if hasattr(d, key):
            return float(getattr(d, key))
    return None


def write_figure(
    results: list[EpisodeResult], path: Path, title: str, tolerance_m: float | None = None
) -> Path:
    """Tip distance and free energy over time, one thin line per episode."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(8, 6), sharex=True, constrained_layout=True)
    cmap = plt.get_cmap("viridis")
    for i, r in enumerate(results):
        color = cmap(i / max(1, len(results) - 1))
        ax1.plot(r.trace["t"], r.trace["distance_m"] * 100.0, color=color, lw=0.9, alpha=0.8)
        fe = r.trace["free_energy"]
        if np.isfinite(fe).any():
            ax2.plot(r.trace["t"], fe, color=color, lw=0.9, alpha=0.8)
    ax1.axhline(
        1.0 if tolerance_m is None else tolerance_m * 100,
        color="#c0392b",
        ls="--",
        lw=1,
        label="tolerance",
    )
    ax1.set_yscale("log")
    ax1.set_ylabel("tip (or base) distance to goal [cm]")
    ax1.legend(loc="upper right", frameon=False)
    ax1.grid(True, which="both", alpha=0.25)
    ax2.set_ylabel("free energy [nats]")
    ax2.set_xlabel("time [s]")
    # The first steps (belief meets its first sensations) dwarf the rest: frame the bulk.
    tail = np.concatenate(
        [r.trace["free_energy"][len(r.trace["free_energy"]) // 20 :] for r in results]
    )
    tail = tail[np.isfinite(tail)]
    if tail.size:
        lo, hi = np.percentile(tail, [0.5, 99.5])
        pad = 0.15 * max(hi - lo, 1e-6)
        ax2.set_ylim(lo - pad, hi + pad)
    ax2.grid(True, alpha=0.25)
    fig.suptitle(title)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def run_scenario(
    scenario: Scenario,
    episodes: int,
    seed: int,
    out_dir: Path | None,
    progress: bool = True,
    record: bool = True,
    safety: bool = True,
) -> dict[str, Any]:
    """Run a scenario end to end: env, agent, episodes, logs, ``summary.json``, figure."""
    env = make_env(scenario.env, scenario.env_options)
    try:
        if safety:
            env = with_safety(env)
        agent = build_agent(env, scenario.agent)
        writer = None
        if record and out_dir is not None:
            from blanket.logs import RunWriter

            meta = _run_metadata(scenario, env, seed)
            if hasattr(agent, "precision_summary"):
                meta["agent_precision"] = agent.precision_summary()
            writer = RunWriter(out_dir, meta, overwrite=True)
        try:
            results = run_episodes(
                env,
                agent,
                episodes,
                seed,
                writer=writer,
                progress=progress,
                description=scenario.name,
            )
        finally:
            if writer is not None:
                writer.close()
        summary = summarize(results)
        if out_dir is not None:
            (out_dir / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
            write_figure(
                results,
                out_dir / "reach.png",
                f"{scenario.name}: {scenario.env}",
                tolerance_m=_tolerance_m(env),
            )
        return summary
    finally:
        env.close()


def with_safety(env: Any) -> Any:
    """Wrap ``env`` in :class:`blanket.wrappers.SafetyLimits` (what demo, run and bench use)."""
    from blanket.wrappers import SafetyLimits

    return SafetyLimits(env)
