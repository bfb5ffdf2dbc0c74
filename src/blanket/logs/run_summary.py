"""Per-episode summary of a run folder, computed from the log columns alone.

For each episode:

- ``steps`` rows and ``duration_s`` (last ``t`` minus first);
- ``success`` and ``time_to_success_s``: the env's own report, never re-derived by another
  rule. In order: the episode metadata the rollout loop and the Recorder write (``success``,
  ``time_to_success_s``: the ``info`` of the first step that reported success); else a
  true value in ``external.success`` (or ``sensory.success``), timed by the first such row;
  else the rule of :mod:`blanket.success` (held inside ``tolerance_m`` of the run metadata
  for ``blanket.success.HOLD_S``) applied to the logged distance; else unknown (``<NA>``);
- ``final_error_m``: the episode metadata's ``final_error_m`` (the distance after the last
  step, as ``summary.json`` gives it); else the last logged distance to the target, from
  ``external.distance_m`` or computed as the Euclidean norm of
  ``external.tip_position_m - external.target_position_m`` (for a base: base position
  against the dock, in the x-y plane);
- ``median_free_energy``: median of ``internal.free_energy`` over the episode's rows, the
  settled level (NaN without an agent); ``mean_free_energy``, the mean, is kept in the table
  (and ``--csv``) but not printed: the first steps' transient dominates it;
- ``belief_nees`` and ``belief``: how honest the agent's joint-angle belief was -- the mean
  normalized estimation error squared ``((belief - truth) / belief_sd)^2`` of the worst joint
  after the first :data:`blanket.consistency.SETTLE_S` (expected 1), and its verdict against
  the chi-square region (``consistent``, ``overconfident``, ``underconfident``; see
  :mod:`blanket.consistency`), from ``internal.belief.order0.*``, ``internal.belief_sd.order0.*``
  and ``external.joint_angle_rad.*`` (absent columns: NaN and ``-``).
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from blanket.consistency import SETTLE_S, worst_component_check
from blanket.logs.reader import (
    _check_on_error,
    check_file,
    episode_files,
    read_episode_info,
    read_metadata,
    read_run,
)
from blanket.logs.schema import LogError
from blanket.success import time_to_success

__all__ = ["summarize_run", "format_summary", "inspect_text", "episode_distance"]

_COMPONENTS = ("x", "y", "z")


def episode_distance(frame: pd.DataFrame) -> np.ndarray | None:
    """Distance to the target per row (m), or None when the columns do not allow it."""
    if "external.distance_m" in frame.columns:
        return pd.to_numeric(frame["external.distance_m"], errors="coerce").to_numpy(float)
    pairs = [
        ("external.tip_position_m", "external.target_position_m", _COMPONENTS),
    ]
    for key in {c.split(".")[1] for c in frame.columns if c.startswith("external.")}:
        if "base" in key:
            for other in {c.split(".")[1] for c in frame.columns if c.startswith("external.")}:
                if "dock" in other or "goal" in other:
                    pairs.append((f"external.{key}", f"external.{other}", ("x", "y")))
    for a, b, comps in pairs:
        cols_a = [f"{a}.{c}" for c in comps]
        cols_b = [f"{b}.{c}" for c in comps]
        if all(c in frame.columns for c in cols_a + cols_b):
            diff = frame[cols_a].to_numpy(float) - frame[cols_b].to_numpy(float)
            return np.linalg.norm(diff, axis=1)
    return None


def _success(frame: pd.DataFrame) -> np.ndarray | None:
    for column in ("external.success", "sensory.success"):
        if column in frame.columns:
            return frame[column].fillna(False).to_numpy(dtype=bool)
    return None


def _reported_success(
    frame: pd.DataFrame,
    t: np.ndarray,
    distance: np.ndarray | None,
    tolerance_m: float | None,
    extra: Mapping[str, Any],
) -> tuple[Any, float]:
    """``(success, time_to_success_s)`` of one episode, see the module docstring."""
    if isinstance(extra.get("success"), bool):
        tts = extra.get("time_to_success_s")
        return extra["success"], float(tts) if isinstance(tts, (int, float)) else np.nan
    success = _success(frame)
    if success is not None and len(success):
        if success.any():
            return True, float(t[int(np.argmax(success))] - t[0])
        return False, np.nan
    if distance is not None and tolerance_m is not None and len(t) > 1:
        # row 0 is the state at reset, row k the state after control step k
        inside = np.nan_to_num(distance[1:], nan=np.inf) <= tolerance_m
        tts = time_to_success(inside, float(np.median(np.diff(t))))
        return tts is not None, np.nan if tts is None else float(tts)
    return pd.NA, np.nan


def _summarize_episode(
    frame: pd.DataFrame, tolerance_m: float | None, extra: Mapping[str, Any]
) -> dict[str, Any]:
    t = frame["t"].to_numpy(dtype=float)
    distance = episode_distance(frame)
    success, time_to_success_s = _reported_success(frame, t, distance, tolerance_m, extra)
    row: dict[str, Any] = {
        "steps": int(len(frame)),
        "duration_s": float(t[-1] - t[0]) if len(t) else 0.0,
        "success": success,
        "time_to_success_s": time_to_success_s,
        "final_error_m": np.nan,
        "median_free_energy": np.nan,
        "mean_free_energy": np.nan,
    }
    reported = extra.get("final_error_m")
    if isinstance(reported, (int, float)) and not isinstance(reported, bool):
        # the rollout loop's own figure (after the last step, which has no row of its own)
        row["final_error_m"] = float(reported)
    elif distance is not None:
        finite = distance[np.isfinite(distance)]
        if finite.size:
            row["final_error_m"] = float(finite[-1])
    if "internal.free_energy" in frame.columns:
        values = pd.to_numeric(frame["internal.free_energy"], errors="coerce")
        if values.notna().any():
            row["median_free_energy"] = float(values.median())
            row["mean_free_energy"] = float(values.mean())
    row["belief_nees"], row["belief"] = np.nan, "-"
    joints = _belief_joints(frame.columns)
    if joints and len(t):
        check = worst_component_check(
            frame[[f"{_BELIEF}{j}" for j in joints]].to_numpy(float),
            frame[[f"{_TRUTH}{j}" for j in joints]].to_numpy(float),
            frame[[f"{_BELIEF_SD}{j}" for j in joints]].to_numpy(float),
            t,
        )
        if check is not None:
            row["belief_nees"], row["belief"] = check.mean, check.verdict
    return row


_BELIEF = "internal.belief.order0."
_BELIEF_SD = "internal.belief_sd.order0."
_TRUTH = "external.joint_angle_rad."


def _belief_joints(columns: Any) -> list[str]:
    """Joints with a believed angle, its standard deviation and the true angle logged."""
    names = set(columns)
    return [
        c[len(_BELIEF) :]
        for c in columns
        if c.startswith(_BELIEF)
        and f"{_BELIEF_SD}{c[len(_BELIEF) :]}" in names
        and f"{_TRUTH}{c[len(_BELIEF) :]}" in names
    ]


def _episode_extras(files: list[Path]) -> dict[int, Mapping[str, Any]]:
    """The ``extra`` metadata of the episode files that read, by episode number."""
    extras: dict[int, Mapping[str, Any]] = {}
    for path in files:
        try:
            info = read_episode_info(path)
        except LogError:  # a damaged file: reported by read_run
            continue
        if isinstance(info.get("episode"), int) and isinstance(info.get("extra"), Mapping):
            extras[info["episode"]] = info["extra"]
    return extras


def summarize_run(run_dir: str | os.PathLike[str], *, on_error: str = "raise") -> Any:
    """One row per episode (index ``episode``), see the module docstring for the columns.

    ``on_error="skip"`` leaves out damaged episode files and returns ``(table, problems)``
    (see :func:`blanket.logs.reader.read_run`); the default raises the first problem.
    """
    _check_on_error(on_error)
    metadata = read_metadata(run_dir)
    wanted = [
        "external.distance_m",
        "external.success",
        "sensory.success",
        "internal.free_energy",
        *(f"external.tip_position_m.{c}" for c in _COMPONENTS),
        *(f"external.target_position_m.{c}" for c in _COMPONENTS),
    ]
    files = episode_files(run_dir)
    for path in files:  # the belief's columns are named by joint: take them from a file
        try:
            names = check_file(path).schema_arrow.names
        except LogError:
            continue
        wanted += [c for c in names if c.startswith((_BELIEF, _BELIEF_SD, _TRUTH))]
        break
    frame, problems = read_run(run_dir, columns=wanted, on_error="skip")
    if not any(c in frame.columns for c in wanted):
        # A base run or a custom env: fall back to every column (distance heuristics).
        frame, problems = read_run(run_dir, on_error="skip")
    if problems and on_error != "skip":
        raise problems[0]
    tolerance = metadata.get("tolerance_m")
    tolerance = float(tolerance) if isinstance(tolerance, (int, float)) else None
    extras = _episode_extras(files)
    rows = {
        int(episode): _summarize_episode(group, tolerance, extras.get(int(episode), {}))
        for episode, group in frame.groupby("episode", sort=True)
    }
    table = pd.DataFrame.from_dict(rows, orient="index")
    table.index.name = "episode"
    table["success"] = table["success"].astype("boolean")
    return (table, problems) if on_error == "skip" else table


def format_summary(table: pd.DataFrame, metadata: Mapping[str, Any], run_dir: Path | str) -> str:
    """Text rendering: a run header, the episode table and a totals line."""
    versions = metadata.get("versions") or {}
    scenario = metadata.get("scenario")
    if isinstance(scenario, Mapping):  # the runner logs {"name": ..., "env": ...}
        scenario = scenario.get("name") or scenario.get("env")
    header = [
        f"run        {run_dir}",
        f"scenario   {scenario}    seed {metadata.get('seed')}    robot {metadata.get('robot')}",
        f"rates      {metadata.get('rates')}",
        f"started    {metadata.get('started_at', '?')}    schema {metadata.get('schema_version')}"
        f"    blanket {versions.get('blanket')}",
        "",
    ]
    # as blanket demo prints them: distances in cm, the settled free energy (not the mean)
    shown = table.drop(columns=["mean_free_energy"], errors="ignore")
    if "final_error_m" in shown.columns:
        shown.insert(
            list(shown.columns).index("final_error_m"),
            "final_error_cm",
            shown.pop("final_error_m") * 100.0,
        )
    shown["success"] = shown["success"].map(
        lambda v: "-" if v is pd.NA or pd.isna(v) else ("yes" if v else "no")
    )
    body = shown.to_string(
        float_format=lambda v: f"{v:.4g}",
        na_rep="-",
    )
    known = table["success"].dropna()
    if len(known):
        n_ok = int(known.sum())
        times = table.loc[table["success"].fillna(False), "time_to_success_s"]
        median = f"{times.median():.3g} s" if len(times) else "-"
        totals = (
            f"\n\n{n_ok} of {len(known)} episodes reached the target "
            f"({100.0 * n_ok / len(known):.0f} %); median time to success {median}"
        )
    else:
        totals = "\n\nsuccess unknown (no success column and no tolerance_m in the metadata)"
    errors = table["final_error_m"].dropna()
    if len(errors):
        totals += f"; median final error {100.0 * errors.median():.3g} cm"
    totals += _belief_line(table)
    return "\n".join(header) + body + totals


def _belief_line(table: pd.DataFrame) -> str:
    """One line: in how many episodes the joint-angle belief was consistent, and if not, how."""
    if "belief" not in table.columns:
        return ""
    judged = table[table["belief"] != "-"]
    if judged.empty:
        return ""
    counts = judged["belief"].value_counts()
    worst = judged["belief_nees"]
    line = (
        f"\nbelief (joint angles, after {SETTLE_S:g} s): consistent in "
        f"{int(counts.get('consistent', 0))} of {len(judged)} episodes"
    )
    for verdict in ("overconfident", "underconfident"):
        if counts.get(verdict, 0):
            line += f", {verdict} in {int(counts[verdict])}"
    return line + (
        f"; worst-joint mean NEES median {worst.median():.3g}, max {worst.max():.3g} (expected 1)"
    )


def inspect_text(run_dir: str | os.PathLike[str]) -> str:
    """``format_summary(summarize_run(run_dir), read_metadata(run_dir), run_dir)``."""
    table = summarize_run(run_dir)
    if table.empty:
        raise LogError(f"{run_dir}: the run holds no rows")
    return format_summary(table, read_metadata(run_dir), run_dir)
