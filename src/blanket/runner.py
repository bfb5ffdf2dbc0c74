"""Scenarios end to end: env, agent, episodes (through :mod:`blanket.rollout`), summary, logs
and figures."""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from blanket.errors import ConfigError
from blanket.rollout import EpisodeResult, Observer, ProgressBar, RunLog, StepView, rollout
from blanket.scenario import Scenario, env_option_names, load_object, make_env

__all__ = [
    "EpisodeResult",
    "run_episode",
    "run_episodes",
    "summarize",
    "build_agent",
    "agent_options_under",
    "run_scenario",
    "prepare_out_dir",
    "with_safety",
    "SUMMARY_KEYS",
    "HoldRecord",
]

SUMMARY_KEYS = (
    "episodes",
    "success_rate",
    "final_error_m",
    "time_to_success_s",
    "agent_step_us",
    "sim_step_us",
)


def run_episode(
    env: Any,
    agent: Any,
    seed: int,
    episode: int = 0,
    writer: Any = None,
    on_step: Callable[[], None] | None = None,
) -> EpisodeResult:
    """One episode from ``env.reset(seed=seed)`` through :func:`blanket.rollout.rollout`,
    logged to ``writer`` when given; ``on_step()`` is called after every step."""
    observers: list[Observer] = [HoldRecord()] if is_hold_env(env) else []
    if writer is not None:
        observers.append(RunLog(writer))
    if on_step is not None:
        observers.append(_Callback(on_step))
    return rollout(env, agent, seeds=[seed], observers=observers, first_episode=episode)[0]


class _Callback(Observer):
    def __init__(self, fn: Callable[[], None]) -> None:
        self.fn = fn

    def on_step(self, step: StepView) -> None:
        self.fn()


def run_episodes(
    env: Any,
    agent: Any,
    episodes: int,
    seed: int,
    writer: Any = None,
    progress: bool = True,
    description: str = "episodes",
) -> list[EpisodeResult]:
    """``episodes`` episodes with seeds ``seed, seed + 1, ...`` through
    :func:`blanket.rollout.rollout`, logged to ``writer`` when given, with a progress bar."""
    observers: list[Observer] = []
    if is_hold_env(env):  # before the log: its measures go into the episode's metadata
        observers.append(HoldRecord())
    if writer is not None:
        observers.append(RunLog(writer))
    if progress:
        observers.append(ProgressBar(description))
    return rollout(env, agent, episodes, seed=seed, observers=observers)


def is_hold_env(env: Any) -> bool:
    """Whether ``env`` is a holding task (``blanket/arm-hold-v0``: it reports its forcing as
    ``disturbance_force_n`` and ``disturbance_shove_n`` and has ``shove_starts_s``)."""
    return hasattr(env.unwrapped, "shove_starts_s")


class HoldRecord(Observer):
    """The hold task's measures of each episode (:func:`blanket.bench.metrics.hold_metrics`),
    added to its :attr:`EpisodeResult.measures`: the fraction of steps within the env's
    tolerance, the recovery time after each shove, the tip covariance."""

    def on_episode_start(self, start: Any) -> None:
        self._dt = start.dt
        self._tolerance = float(start.env.unwrapped.description.tolerance_m)
        self._distance: list[float] = []
        self._tip: list[np.ndarray] = []
        self._shove: list[np.ndarray] = []

    def on_step(self, step: StepView) -> None:
        ext = step.info["external"]
        self._distance.append(float(step.info["distance_m"]))
        self._tip.append(np.array(ext["tip_position_m"], dtype=float))
        self._shove.append(np.array(ext["disturbance_shove_n"], dtype=float))

    def on_episode_end(self, result: EpisodeResult) -> None:
        from blanket.bench.metrics import hold_metrics

        result.measures.update(
            hold_metrics(
                np.asarray(self._distance),
                np.asarray(self._tip).reshape(-1, 3),
                np.asarray(self._shove).reshape(-1, 3),
                self._dt,
                self._tolerance,
            )
        )


def __getattr__(name: str) -> Any:
    # the log-group builder used to live here (blanket.logs.groups, imported on demand)
    if name == "active_group":
        from blanket.logs.groups import active_group

        return active_group
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


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
        # the median over episodes of each episode's median: the settled level, which the
        # first steps' transient (the belief meeting its first sensations) does not move
        "median_free_energy": _median([r.median_free_energy for r in results]),
        "contact_rate": sum(r.contact for r in results) / len(results) if results else 0.0,
        "safe_stops": sum(r.safe_stop for r in results),
    }
    headings = [r.final_heading_error_rad for r in results if r.final_heading_error_rad is not None]
    if headings:
        summary["final_heading_error_rad"] = float(np.median(headings))
    held = [r.measures for r in results if "time_within_tolerance" in r.measures]
    if held:  # the hold task (HoldRecord)
        from blanket.bench.metrics import aggregate_hold

        summary.update(aggregate_hold(held))
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
    if not callable(cls):
        raise ConfigError(
            f"agent class {cls_path!r} is a {type(cls).__name__}, not a class; name the class"
        )
    try:
        if hasattr(cls, "from_env"):
            return cls.from_env(env, **opts)
        return cls(env, **opts)
    except TypeError as exc:
        raise ConfigError(f"agent class {cls_path!r} rejected its options: {exc}") from None


def prepare_out_dir(
    out: str | Path | None, overwrite: bool, prefix: str, create: bool = True
) -> Path:
    """A fresh run folder: ``out`` (refused when non-empty unless ``overwrite``), or new.

    With ``create=False`` the folder is only checked and named; :func:`run_scenario` creates
    it once the env and agent are built, so a bad option leaves no empty folder behind.
    """
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
    if create:
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
    boxes = _scene_boxes(env)
    if boxes:
        meta["scene_boxes"] = boxes
    for key, name in (("bench_boxes_m", "bench_boxes_m"), ("landmarks_m", "landmarks_m")):
        if hasattr(d, key):
            meta[name] = np.asarray(getattr(d, key), dtype=float).tolist()
    return meta


def _scene_boxes(env: Any) -> list[dict[str, Any]]:
    """The potting bench and its trays as boxes (``name``, ``centre_m``, ``half_extents_m``),
    for the replay video; empty for envs without a bench layout."""
    layout = getattr(env.unwrapped, "layout", None)
    if layout is None or not hasattr(layout, "trays"):
        return []
    boxes = [
        {
            "name": "bench",
            "centre_m": [float(v) for v in layout.bench_centre_m],
            "half_extents_m": [float(v) for v in layout.bench_half_extents_m],
        }
    ]
    for k, tray in enumerate(layout.trays):
        half = np.asarray(tray.half_extents_m, dtype=float)
        centre = np.asarray(tray.centre_m, dtype=float) - [0.0, 0.0, half[2]]  # top -> centre
        boxes.append(
            {"name": f"tray{k}", "centre_m": centre.tolist(), "half_extents_m": half.tolist()}
        )
    return boxes


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
    from blanket.conditions import apply_conditions, condition_env_options

    conditions = scenario.conditions
    env = make_env(scenario.env, {**scenario.env_options, **condition_env_options(conditions)})
    try:
        env, model_options = apply_conditions(env, conditions)
        if safety:
            env = with_safety(env)
        agent = build_agent(env, agent_options_under(scenario.agent, model_options, env))
        if out_dir is not None:
            out_dir.mkdir(parents=True, exist_ok=True)  # only now: the options are good
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
        learned = agent.learned_options() if hasattr(agent, "learned_options") else {}
        if learned:  # learn_body: reload with `blanket run learned.toml`
            summary["learned_agent_options"] = learned
            if out_dir is not None:
                again = replace(scenario, agent={**scenario.agent, **learned})
                (out_dir / "learned.toml").write_text(again.to_toml())
        if out_dir is not None:
            (out_dir / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
            (out_dir / "figures").mkdir(exist_ok=True)
            write_figure(
                results,
                out_dir / "figures" / "reach.png",
                f"{scenario.name}: {scenario.env}",
                tolerance_m=_tolerance_m(env),
            )
        return summary
    finally:
        env.close()


def agent_options_under(
    agent_options: Mapping[str, Any], model_options: Mapping[str, Any], env: Any
) -> dict[str, Any]:
    """The ``[agent]`` options with a condition's body-model options (``length_scale``) added.

    Only the built-in arm agent has the body model they change; an agent of your own
    (``class = ...``) and the mobile bases get their options as written.
    """
    from blanket.description import ArmDescription

    out = dict(agent_options)
    arm = isinstance(getattr(env.unwrapped, "description", None), ArmDescription)
    if model_options and arm and "class" not in out:
        out.update(model_options)
    return out


def with_safety(env: Any) -> Any:
    """Wrap ``env`` in :class:`blanket.wrappers.SafetyLimits` (what demo, run and bench use)."""
    from blanket.wrappers import SafetyLimits

    return SafetyLimits(env)
