"""Figures of one logged episode (matplotlib, Agg backend, blanket's own look).

:func:`plot_run` writes up to four PNGs per episode into ``RUN_DIR/figures``:

``episode-NNNNN-tip-path.png``
    tool-tip path against the target in three views (top x-y, front x-z, side y-z), or
    for a mobile base the x-y path against the dock;
``episode-NNNNN-belief.png``
    belief against truth per joint (rows) and order of motion (columns: angle, velocity),
    with +-2 sigma bands from ``internal.belief_sd`` (or ``internal.belief_precision``),
    and a third column of the angle error (belief - truth) against that band on its own
    scale (the band is a few mrad, too narrow to see beside the angles);
``episode-NNNNN-free-energy.png``
    free energy and each sensory channel's prediction errors over time;
``episode-NNNNN-commands.png``
    each commanded component against its limits (``action_low``/``action_high`` in the
    run metadata), with the applied command when a safety wrapper logged one;
``episode-NNNNN-hold.png``
    a hold run only (``blanket/arm-hold-v0``): the tip's distance from the preferred point
    over time with the tolerance band and the shoves marked, and the random force on the tool.

A figure whose columns are missing (a Recorder log has no ``internal.*``) is skipped.
:func:`build_figures` returns the figures without saving them.
"""

from __future__ import annotations

import os
import re
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from blanket.logs.reader import read_metadata, read_one_episode  # noqa: E402
from blanket.logs.schema import LogError, unit_for_key  # noqa: E402

__all__ = ["plot_run", "build_figures", "load_episode", "FIGURE_NAMES", "LOOK"]

FIGURE_NAMES = ("tip-path", "belief", "free-energy", "commands", "hold")

# Greenhouse colours: leaf, clay, slate, ochre, plum, teal, soil.
PALETTE = ("#2f6b3a", "#c8652a", "#3d5a80", "#b58b00", "#7a4e8c", "#4f9d9a", "#8c5a3c")
TRUTH = "#33302b"
SENSED = "#b9b3a6"
TARGET = "#c8652a"
LIMIT = "#a23b2a"

LOOK: dict[str, Any] = {
    "figure.facecolor": "#fcfbf7",
    "axes.facecolor": "#fcfbf7",
    "savefig.facecolor": "#fcfbf7",
    "axes.edgecolor": "#5b5648",
    "axes.linewidth": 0.8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.grid.axis": "y",
    "grid.color": "#ddd6c6",
    "grid.linestyle": (0, (1, 3)),
    "grid.linewidth": 0.9,
    "axes.titlesize": 9.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlecolor": "#3b382f",
    "axes.labelsize": 8.5,
    "axes.labelcolor": "#3b382f",
    "axes.prop_cycle": matplotlib.cycler(color=PALETTE),
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "xtick.color": "#5b5648",
    "ytick.color": "#5b5648",
    "xtick.direction": "in",
    "ytick.direction": "in",
    "legend.fontsize": 7.5,
    "legend.frameon": False,
    "lines.linewidth": 1.3,
    "font.family": "DejaVu Sans",
}


@contextmanager
def _look() -> Iterator[None]:
    with plt.rc_context(LOOK):
        yield


# ---------------------------------------------------------------------- column helpers
def _vector(frame: pd.DataFrame, prefix: str) -> dict[str, str]:
    """Components of a logged 1-D vector: {component: column}."""
    out: dict[str, str] = {}
    start = prefix + "."
    for column in frame.columns:
        if column.startswith(start) and "." not in column[len(start) :]:
            out[column[len(start) :]] = column
    return out


def _orders(frame: pd.DataFrame, prefix: str) -> dict[int, dict[str, str]]:
    """Orders of a logged 2-D array: {order: {component: column}}."""
    out: dict[int, dict[str, str]] = {}
    pattern = re.compile(re.escape(prefix) + r"\.order(\d+)\.([^.]+)$")
    for column in frame.columns:
        match = pattern.match(column)
        if match:
            out.setdefault(int(match.group(1)), {})[match.group(2)] = column
    return dict(sorted(out.items()))


def _values(frame: pd.DataFrame, column: str) -> np.ndarray:
    return pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=float)


def _unit_label(key: str) -> str:
    unit = unit_for_key(key)
    return f" ({unit})" if unit else ""


def _key_label(key: str) -> str:
    """``joint_velocity_rad_s`` -> ``joint velocity (rad/s)``."""
    unit = unit_for_key(key)
    words = key
    if unit is not None:
        for suffix in (
            "_rad_s2",
            "_m_s2",
            "_rad_s",
            "_m_s",
            "_n_m",
            "_rad",
            "_px",
            "_us",
            "_kg",
            "_hz",
            "_m",
            "_s",
            "_n",
        ):
            if key.endswith(suffix):
                words = key[: -len(suffix)]
                break
    words = words.replace("_", " ")
    return f"{words} ({unit})" if unit else words


def _success_time(frame: pd.DataFrame) -> float | None:
    for column in ("external.success", "sensory.success"):
        if column in frame.columns:
            hits = frame[column].fillna(False).to_numpy(dtype=bool)
            if hits.any():
                return float(frame["t"].to_numpy()[np.argmax(hits)])
    return None


def _mark_success(ax: Any, t_success: float | None) -> None:
    if t_success is not None:
        ax.axvline(
            t_success,
            color=PALETTE[0],
            linestyle=(0, (4, 2)),
            linewidth=0.9,
            alpha=0.8,
            label="first success",
        )


def _heading(fig: Figure, title: str, meta: Mapping[str, Any], episode: int) -> None:
    scenario = meta.get("scenario") or "run"
    if isinstance(scenario, Mapping):  # the runner logs {"name": ..., "env": ...}
        scenario = scenario.get("name") or scenario.get("env") or "run"
    # one line, inside the layout (a separate corner text overlapped the panel titles)
    fig.suptitle(
        f"{title} — episode {episode}   ·   {scenario}, seed {meta.get('seed')}",
        x=0.015,
        ha="left",
        fontsize=11,
        fontweight="bold",
        color="#2b2923",
    )


def load_episode(
    run_dir: str | os.PathLike[str],
    episode: int | None = None,
    *,
    strict: bool = False,
    problems: list[LogError] | None = None,
) -> tuple[pd.DataFrame, int]:
    """One episode's rows (the first episode that reads when ``episode`` is None) and its
    number. Damaged episode files of the run are skipped (appended to ``problems`` when
    given), or, with ``strict``, raise."""
    table, episode, found = read_one_episode(
        run_dir, episode, on_error="raise" if strict else "skip"
    )
    if problems is not None:
        problems.extend(found)
    if table.num_rows == 0:
        raise LogError(f"{run_dir}: episode {episode} holds no rows")
    frame = table.to_pandas().sort_values("step", kind="stable").reset_index(drop=True)
    return frame, int(episode)


# ---------------------------------------------------------------------- figures
def _tip_path_figure(frame: pd.DataFrame, meta: Mapping[str, Any], episode: int) -> Figure | None:
    tip = _vector(frame, "external.tip_position_m")
    if {"x", "y", "z"} <= tip.keys():
        target = _vector(frame, "external.target_position_m") or _vector(
            frame, "sensory.target_position_m"
        )
        fig, axes = plt.subplots(1, 3, figsize=(11.0, 3.9), layout="constrained")
        views = (("x", "y", "top view"), ("x", "z", "front view"), ("y", "z", "side view"))
        tolerance = meta.get("tolerance_m")
        for ax, (a, b, name) in zip(axes, views, strict=True):
            u, v = _values(frame, tip[a]), _values(frame, tip[b])
            ax.plot(u, v, color=PALETTE[2], label="tool tip")
            ax.plot(u[:1], v[:1], "o", color=PALETTE[2], markersize=5, label="start")
            ax.plot(u[-1:], v[-1:], "s", color=PALETTE[2], markersize=5, mfc="white", label="end")
            if {a, b} <= target.keys():
                tu, tv = _values(frame, target[a]), _values(frame, target[b])
                ax.plot(tu, tv, color=TARGET, linewidth=0.8, alpha=0.6)
                ax.plot(tu[-1:], tv[-1:], "*", color=TARGET, markersize=11, label="target")
                if tolerance and name == "top view":
                    circle = plt.Circle(
                        (tu[-1], tv[-1]),
                        float(tolerance),
                        fill=False,
                        color=TARGET,
                        linestyle=(0, (2, 2)),
                        linewidth=0.8,
                    )
                    ax.add_patch(circle)
            ax.set_xlabel(f"{a} (m)")
            ax.set_ylabel(f"{b} (m)")
            ax.set_title(name)
            ax.set_aspect("equal", adjustable="datalim")
            ax.grid(True, axis="both")
        axes[0].legend(loc="best")
        _heading(fig, "Tool-tip path against the target", meta, episode)
        return fig
    base = _find_planar(frame, ("base",))
    if base is None:
        return None
    dock = _find_planar(frame, ("dock", "goal", "target"))
    fig, ax = plt.subplots(figsize=(5.6, 5.0), layout="constrained")
    for k, box in enumerate(meta.get("bench_boxes_m") or []):
        x0, y0, x1, y1 = (float(v) for v in box)
        ax.add_patch(
            plt.Rectangle(
                (x0, y0),
                x1 - x0,
                y1 - y0,
                facecolor="#c9b79c",
                edgecolor="#8a7356",
                lw=0.8,
                label="bench" if k == 0 else None,
            )
        )
    landmarks = np.asarray(meta.get("landmarks_m") or [], dtype=float)
    if landmarks.size:
        ax.plot(
            landmarks[:, 0],
            landmarks[:, 1],
            "^",
            color="#6b6b6b",
            markersize=5,
            label="row-end post",
        )
    x, y = _values(frame, base[0]), _values(frame, base[1])
    ax.plot(x, y, color=PALETTE[2], label="base")
    ax.plot(x[:1], y[:1], "o", color=PALETTE[2], markersize=5, label="start")
    ax.plot(x[-1:], y[-1:], "s", color=PALETTE[2], markersize=5, mfc="white", label="end")
    if dock is not None:
        dx, dy = _values(frame, dock[0]), _values(frame, dock[1])
        ax.plot(dx[-1:], dy[-1:], "*", color=TARGET, markersize=13, label="dock")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    ax.set_title("top view")
    ax.set_aspect("equal", adjustable="datalim")
    ax.grid(True, axis="both")
    ax.legend(loc="best")
    _heading(fig, "Base path against the dock", meta, episode)
    return fig


def _find_planar(frame: pd.DataFrame, words: tuple[str, ...]) -> tuple[str, str] | None:
    keys: dict[str, dict[str, str]] = {}
    for column in frame.columns:
        parts = column.split(".")
        if parts[0] != "external" or len(parts) != 3:
            continue
        keys.setdefault(parts[1], {})[parts[2]] = column
    for key, comps in keys.items():
        if any(w in key.lower() for w in words) and {"x", "y"} <= comps.keys():
            return comps["x"], comps["y"]
    return None


def _belief_figure(frame: pd.DataFrame, meta: Mapping[str, Any], episode: int) -> Figure | None:
    belief = _orders(frame, "internal.belief")
    if not belief:
        return None
    sd = _orders(frame, "internal.belief_sd")
    precision = _orders(frame, "internal.belief_precision")
    truth_keys = {0: "joint_angle_rad", 1: "joint_velocity_rad_s"}
    orders = [k for k in (0, 1) if k in belief]
    joints = list(belief[orders[0]].keys())
    t = frame["t"].to_numpy(dtype=float)
    t_success = _success_time(frame)

    def sigma_of(order: int, joint: str) -> np.ndarray | None:
        if order in sd and joint in sd[order]:
            return _values(frame, sd[order][joint])
        if order in precision and joint in precision[order]:
            with np.errstate(divide="ignore", invalid="ignore"):
                return 1.0 / np.sqrt(_values(frame, precision[order][joint]))
        return None

    # The belief's +-2 sigma is a few mrad on a scale of a radian: beside the angles, a
    # column of the angle error (belief - truth) against its band, on the band's own scale.
    error_column = (
        any(
            joint in belief[0]
            and f"external.{truth_keys[0]}.{joint}" in frame.columns
            and sigma_of(0, joint) is not None
            for joint in joints
        )
        if 0 in orders
        else False
    )
    columns = [(order, "value") for order in orders] + ([(0, "error")] if error_column else [])
    fig, axes = plt.subplots(
        len(joints),
        len(columns),
        figsize=(4.6 * len(columns), 1.9 * len(joints) + 0.9),
        sharex=True,
        squeeze=False,
        layout="constrained",
    )
    for col, (order, kind) in enumerate(columns):
        for row, joint in enumerate(joints):
            ax = axes[row, col]
            key = truth_keys[order]
            truth = f"external.{key}.{joint}"
            sigma = sigma_of(order, joint) if joint in belief[order] else None
            if kind == "error":
                if sigma is None or truth not in frame.columns:
                    ax.set_visible(False)
                    continue
                error = _values(frame, belief[order][joint]) - _values(frame, truth)
                ax.fill_between(
                    t,
                    -2 * sigma,
                    2 * sigma,
                    color=PALETTE[0],
                    alpha=0.3,
                    linewidth=0,
                    label="±2σ (belief)",
                )
                ax.axhline(0.0, color=TRUTH, linewidth=0.6)
                ax.plot(t, error, color=PALETTE[0], linewidth=1.0, label="belief − truth")
                settled = t >= t[0] + 0.25 if len(t) else t
                scale = np.nanmax(np.abs(np.r_[2 * sigma[settled], error[settled]]), initial=0)
                if np.isfinite(scale) and scale > 0:
                    ax.set_ylim(-1.6 * scale, 1.6 * scale)  # the first 0.25 s may run off
                _mark_success(ax, t_success)
                ax.set_title(f"{joint} · angle error")
                ax.set_ylabel("error" + _unit_label(key))
                continue
            sensed = f"sensory.{key}.{joint}"
            if sensed in frame.columns:
                ax.plot(t, _values(frame, sensed), color=SENSED, linewidth=0.7, label="sensed")
            if truth in frame.columns:
                ax.plot(t, _values(frame, truth), color=TRUTH, linewidth=1.1, label="truth")
            if joint not in belief[order]:
                continue
            mu = _values(frame, belief[order][joint])
            if sigma is not None:
                ax.fill_between(
                    t,
                    mu - 2 * sigma,
                    mu + 2 * sigma,
                    color=PALETTE[0],
                    alpha=0.3,
                    linewidth=0,
                    label="±2σ",
                    zorder=3,
                )
            ax.plot(t, mu, color=PALETTE[0], linewidth=1.4, label="belief", zorder=4)
            _mark_success(ax, t_success)
            ax.set_title(f"{joint} · {'angle' if order == 0 else 'velocity'}")
            ax.set_ylabel(("q" if order == 0 else "q'") + _unit_label(key))
        axes[-1, col].set_xlabel("t (s)")
    axes[0, 0].legend(loc="best", ncol=2)
    if error_column:
        axes[0, -1].legend(loc="best")
    _heading(fig, "Belief against truth", meta, episode)
    return fig


def _free_energy_figure(
    frame: pd.DataFrame, meta: Mapping[str, Any], episode: int
) -> Figure | None:
    channels: dict[str, dict[str, str]] = {}
    for column in frame.columns:
        if column.startswith("internal.prediction_error."):
            channel = column.split(".")[2]
            channels.setdefault(channel, {})
    for channel in channels:
        prefix = f"internal.prediction_error.{channel}"
        orders = _orders(frame, prefix)
        channels[channel] = orders.get(0) or _vector(frame, prefix)
        if not channels[channel] and prefix in frame.columns:
            channels[channel] = {"error": prefix}
    channels = {k: v for k, v in channels.items() if v}
    has_free_energy = "internal.free_energy" in frame.columns
    if not has_free_energy and not channels:
        return None
    n_axes = int(has_free_energy) + len(channels)
    fig, axes = plt.subplots(
        n_axes,
        1,
        figsize=(8.0, 1.9 * n_axes + 0.9),
        sharex=True,
        squeeze=False,
        layout="constrained",
    )
    axes = axes[:, 0]
    t = frame["t"].to_numpy(dtype=float)
    t_success = _success_time(frame)
    i = 0
    if has_free_energy:
        ax = axes[0]
        free_energy = _values(frame, "internal.free_energy")
        ax.plot(t, free_energy, color=PALETTE[4], label="free energy")
        ax.set_title("free energy")
        ax.set_ylabel("F (nats)")
        finite = np.abs(free_energy[np.isfinite(free_energy)])
        typical = float(np.median(finite)) if finite.size else 0.0
        if typical > 0 and finite.max() > 100 * typical:
            # A start-up transient would flatten the rest: linear within the typical
            # magnitude, logarithmic beyond.
            ax.set_yscale("symlog", linthresh=typical)
            ax.set_title("free energy (symmetric log scale)")
        _mark_success(ax, t_success)
        ax.legend(loc="upper right")
        i = 1
    for ax, (channel, comps) in zip(axes[i:], channels.items(), strict=True):
        if len(comps) <= 6:
            for n, (comp, column) in enumerate(comps.items()):
                y = _values(frame, column)
                # A channel sampled on some steps only (camera frames) shows as points.
                sparse = np.isfinite(y).mean() < 0.5 if len(y) else False
                ax.plot(
                    t,
                    y,
                    color=PALETTE[n % len(PALETTE)],
                    label=comp,
                    **({"marker": ".", "linestyle": "none", "markersize": 3} if sparse else {}),
                )
            ax.legend(loc="upper right", ncol=min(len(comps), 6))
        else:
            stack = np.column_stack([_values(frame, c) for c in comps.values()])
            ax.plot(t, np.linalg.norm(stack, axis=1), color=PALETTE[2], label="norm")
            ax.legend(loc="upper right")
        ax.axhline(0.0, color="#8d8677", linewidth=0.6)
        ax.set_title(f"prediction error · {channel}")
        ax.set_ylabel("error" + _unit_label(channel))
        _mark_success(ax, t_success)
    axes[-1].set_xlabel("t (s)")
    _heading(fig, "Free energy and prediction errors", meta, episode)
    return fig


def _commands_figure(frame: pd.DataFrame, meta: Mapping[str, Any], episode: int) -> Figure | None:
    keys: dict[str, dict[str, str]] = {}
    for column in frame.columns:
        parts = column.split(".")
        if parts[0] != "active" or _is_applied(parts[1]):
            continue
        comp = parts[2] if len(parts) == 3 else (parts[1] if len(parts) == 2 else None)
        if comp is None:
            continue
        keys.setdefault(parts[1], {})[comp] = column
    if not keys:
        return None
    panels = [(key, comp, column) for key, comps in keys.items() for comp, column in comps.items()]
    panels = panels[:12]
    low = np.asarray(meta.get("action_low") or [], dtype=float).ravel()
    high = np.asarray(meta.get("action_high") or [], dtype=float).ravel()
    n_first = len(next(iter(keys.values())))
    t = frame["t"].to_numpy(dtype=float)
    n_cols = 2 if len(panels) > 3 else 1
    n_rows = int(np.ceil(len(panels) / n_cols))
    fig, axes = plt.subplots(
        n_rows,
        n_cols,
        figsize=(5.0 * n_cols + 1.0, 1.8 * n_rows + 0.9),
        sharex=True,
        squeeze=False,
        layout="constrained",
    )
    flat = axes.ravel()
    for idx, (key, comp, column) in enumerate(panels):
        ax = flat[idx]
        ax.plot(t, _values(frame, column), color=PALETTE[2], label="commanded")
        applied = next(
            (
                c
                for c in (f"active.applied_{key}.{comp}", f"active.{key}_applied.{comp}")
                if c in frame.columns
            ),
            None,
        )
        if applied is not None:
            ax.plot(
                t,
                _values(frame, applied),
                color=PALETTE[1],
                linewidth=1.0,
                linestyle=(0, (3, 1.5)),
                label="applied",
            )
        first_key = key == next(iter(keys))
        j = list(keys[key]).index(comp)
        if first_key and low.size == n_first and high.size == n_first:
            for bound in (low[j], high[j]):
                if np.isfinite(bound):
                    ax.axhline(bound, color=LIMIT, linewidth=0.9, linestyle=(0, (5, 2)))
            ax.axhspan(low[j], high[j], color="#e9efe4", alpha=0.5, zorder=0, linewidth=0)
        ax.set_title(f"{comp}")
        ax.set_ylabel(_key_label(key))
    for ax in flat[len(panels) :]:
        ax.set_visible(False)
    for ax in axes[-1]:
        ax.set_xlabel("t (s)")
    handles, labels = flat[0].get_legend_handles_labels()
    if low.size == n_first:
        handles.append(plt.Line2D([], [], color=LIMIT, linestyle=(0, (5, 2))))
        labels.append("limit")
    flat[0].legend(handles, labels, loc="best")
    _heading(fig, "Commands against their limits", meta, episode)
    return fig


def _is_applied(key: str) -> bool:
    """``applied_<key>`` (Recorder) and ``<key>_applied`` (runner) hold the applied command."""
    return key.startswith("applied_") or key.endswith("_applied")


def _hold_figure(frame: pd.DataFrame, meta: Mapping[str, Any], episode: int) -> Figure | None:
    """Hold trace: tip distance with the tolerance band and the shoves; the random force."""
    shove = _vector(frame, "external.disturbance_shove_n")
    force = _vector(frame, "external.disturbance_force_n")
    if not shove or "external.distance_m" not in frame.columns:
        return None
    t = _values(frame, "t")
    distance_cm = 100.0 * _values(frame, "external.distance_m")
    pushed = np.linalg.norm(np.column_stack([_values(frame, c) for c in shove.values()]), axis=1)
    fig, (ax, ax_f) = plt.subplots(
        2, 1, figsize=(9.0, 4.8), sharex=True, layout="constrained", height_ratios=(2.2, 1.0)
    )
    tolerance = meta.get("tolerance_m")
    if tolerance:
        ax.axhspan(0.0, 100.0 * float(tolerance), color=PALETTE[0], alpha=0.12, lw=0)
        ax.axhline(100.0 * float(tolerance), color=PALETTE[0], lw=0.9, label="tolerance")
    on = pushed > 0.0
    edges = np.flatnonzero(np.diff(np.concatenate([[0], on.astype(int), [0]])))
    for k, (a, b) in enumerate(zip(edges[::2], edges[1::2], strict=True)):
        end = t[min(b, len(t) - 1)]
        for axis in (ax, ax_f):
            axis.axvspan(
                t[a],
                end,
                color=TARGET,
                alpha=0.35,
                lw=0,
                label="shove" if k == 0 and axis is ax else None,
            )
    ax.plot(t, distance_cm, color=PALETTE[2], label="tip distance")
    ax.set_ylabel("distance from the preferred point (cm)")
    ax.set_ylim(0.0, max(float(np.nanmax(distance_cm)) * 1.1, 2.0 * 100.0 * float(tolerance or 0)))
    ax.set_title("tool tip")
    ax.legend(loc="upper right", ncols=3)
    for k, (axis_name, column) in enumerate(sorted(force.items())):
        ax_f.plot(t, _values(frame, column), color=PALETTE[3 + k], lw=0.9, label=axis_name)
    ax_f.set_ylabel("random force (N)")
    ax_f.set_xlabel("t (s)")
    ax_f.set_title("random force on the tool, per axis")
    ax_f.legend(loc="upper right", ncols=3)
    _heading(fig, "Holding the nozzle over the tray", meta, episode)
    return fig


_BUILDERS = {
    "tip-path": _tip_path_figure,
    "belief": _belief_figure,
    "free-energy": _free_energy_figure,
    "commands": _commands_figure,
    "hold": _hold_figure,
}


def build_figures(
    frame: pd.DataFrame, metadata: Mapping[str, Any], episode: int
) -> dict[str, Figure]:
    """The figures one episode's columns allow, by name (see :data:`FIGURE_NAMES`).

    The caller owns the figures (close them with ``matplotlib.pyplot.close``).
    """
    figures: dict[str, Figure] = {}
    with _look():
        for name, builder in _BUILDERS.items():
            fig = builder(frame, metadata, episode)
            if fig is not None:
                figures[name] = fig
    return figures


def plot_run(
    run_dir: str | os.PathLike[str],
    out_dir: str | os.PathLike[str] | None = None,
    episode: int | None = None,
    *,
    strict: bool = False,
    problems: list[LogError] | None = None,
) -> list[Path]:
    """Write the PNG figures of one episode and return their paths.

    Parameters
    ----------
    run_dir : path
        A run folder (or its ``episodes/`` folder, or one episode file).
    out_dir : path, optional
        Where to write; default ``RUN_DIR/figures``.
    episode : int, optional
        Episode number; default the first episode of the run that reads.
    strict : bool
        Refuse a run with any damaged episode file (default: skip them, see ``problems``).
    problems : list, optional
        Receives the :class:`LogError` of each damaged episode file skipped.

    Returns
    -------
    list of pathlib.Path
        The PNGs written, in the order of :data:`FIGURE_NAMES` (skipped figures absent).
    """
    run_dir = Path(run_dir)
    frame, episode = load_episode(run_dir, episode, strict=strict, problems=problems)
    metadata = read_metadata(run_dir)
    if out_dir is None:
        root = run_dir.parent.parent if run_dir.is_file() else run_dir
        if root.name == "episodes":
            root = root.parent
        out_dir = root / "figures"
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths: list[Path] = []
    figures = build_figures(frame, metadata, episode)
    try:
        with _look():
            for name, fig in figures.items():
                path = out / f"episode-{episode:05d}-{name}.png"
                fig.savefig(path, dpi=110, metadata={"Software": None})
                paths.append(path)
    finally:
        for fig in figures.values():
            plt.close(fig)
    return paths
