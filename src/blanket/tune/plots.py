"""Figures of a sweep: a heatmap for two varied names, line plots for one or more.

Axes carry the dotted parameter names and use a log scale where the spec was ``log:``. With
more than two names (or a random/adaptive search over two), each panel shows, for each value of
one name, the best objective over the other names' values.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from blanket.tune.space import ParameterSpec

__all__ = ["plot_objective"]

_UNITS = {"_m": "m", "_s": "s", "_rad": "rad", "_px": "px", "_1_s": "1/s", "_m_s": "m/s"}


def _label(metric: str) -> str:
    for suffix, unit in sorted(_UNITS.items(), key=lambda kv: -len(kv[0])):
        if metric.endswith(suffix):
            return f"{metric} [{unit}]"
    return metric


def _edges(values: np.ndarray, log: bool) -> np.ndarray:
    """Cell edges midway between grid values (geometric midpoints on a log axis)."""
    v = np.log10(values) if log else values.astype(float)
    if len(v) == 1:
        e = np.array([v[0] - 0.5, v[0] + 0.5])
    else:
        mid = 0.5 * (v[1:] + v[:-1])
        e = np.concatenate([[v[0] - (mid[0] - v[0])], mid, [v[-1] + (v[-1] - mid[-1])]])
    return 10.0**e if log else e


def _axis_values(spec: ParameterSpec, column: Any) -> tuple[list[Any], bool]:
    """Sorted distinct values of a column, and whether the axis is numeric."""
    vals = list(dict.fromkeys(column.tolist()))
    numeric = all(isinstance(v, int | float) and not isinstance(v, bool) for v in vals)
    if numeric:
        return sorted(vals), True
    order = {repr(v): i for i, v in enumerate(spec.values)}
    return sorted(vals, key=lambda v: order.get(repr(v), len(order))), False


def plot_objective(
    frame: Any, specs: Sequence[ParameterSpec], objective: Any, path: str | Path, grid: bool = True
) -> Path:
    """Write the objective figure of a sweep table (columns as in ``trials.parquet``).

    Parameters
    ----------
    frame : pandas.DataFrame
        The trials table.
    specs : sequence of ParameterSpec
        The varied names (axis labels, log scales).
    objective : Objective
        Metric shown and its direction (the colour bar says which way is better).
    path : path
        PNG file to write.
    grid : bool
        True for a grid search (cells of a heatmap); otherwise points.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    path = Path(path)
    metric_col = f"metric.{objective.metric}"
    better = "higher is better" if objective.direction == "max" else "lower is better"
    best_of = np.nanmax if objective.direction == "max" else np.nanmin
    if len(specs) == 2:
        sx, sy = specs
        fig, ax = plt.subplots(figsize=(6.4, 5.0), constrained_layout=True)
        xs, xnum = _axis_values(sx, frame[f"param.{sx.name}"])
        ys, ynum = _axis_values(sy, frame[f"param.{sy.name}"])
        xlog = sx.scale == "log" and xnum
        ylog = sy.scale == "log" and ynum
        cmap = plt.get_cmap("cividis" if objective.direction == "max" else "cividis_r")
        if grid:
            z = np.full((len(ys), len(xs)), np.nan)
            xi = {repr(v): i for i, v in enumerate(xs)}
            yi = {repr(v): i for i, v in enumerate(ys)}
            for _, row in frame.iterrows():
                i = yi[repr(row[f"param.{sy.name}"])]
                j = xi[repr(row[f"param.{sx.name}"])]
                val = row[metric_col]
                z[i, j] = val if not np.isfinite(z[i, j]) else best_of([z[i, j], val])
            xe = _edges(np.array(xs, float), xlog) if xnum else np.arange(len(xs) + 1) - 0.5
            ye = _edges(np.array(ys, float), ylog) if ynum else np.arange(len(ys) + 1) - 0.5
            mesh = ax.pcolormesh(xe, ye, np.ma.masked_invalid(z), cmap=cmap, shading="flat")
            finite = z[np.isfinite(z)]
            span = (finite.max() - finite.min()) if finite.size else 0.0
            for i in range(len(ys)):
                for j in range(len(xs)):
                    xc = math.sqrt(xe[j] * xe[j + 1]) if xlog else 0.5 * (xe[j] + xe[j + 1])
                    yc = math.sqrt(ye[i] * ye[i + 1]) if ylog else 0.5 * (ye[i] + ye[i + 1])
                    text = "n/a" if not np.isfinite(z[i, j]) else f"{z[i, j]:.3g}"
                    light = (
                        np.isfinite(z[i, j])
                        and span > 0
                        and ((z[i, j] - finite.min()) / span < 0.5)
                        == (objective.direction == "max")
                    )
                    ax.text(
                        xc,
                        yc,
                        text,
                        ha="center",
                        va="center",
                        fontsize=7,
                        color="white" if light else "black",
                    )
        else:
            xv = [xs.index(v) if not xnum else v for v in frame[f"param.{sx.name}"]]
            yv = [ys.index(v) if not ynum else v for v in frame[f"param.{sy.name}"]]
            mesh = ax.scatter(
                xv, yv, c=frame[metric_col], cmap=cmap, s=40, edgecolors="k", linewidths=0.4
            )
        if xlog:
            ax.set_xscale("log")
        if ylog:
            ax.set_yscale("log")
        if not xnum:
            ax.set_xticks(range(len(xs)), [str(v) for v in xs])
        if not ynum:
            ax.set_yticks(range(len(ys)), [str(v) for v in ys])
        ax.set_xlabel(sx.name)
        ax.set_ylabel(sy.name)
        bar = fig.colorbar(mesh, ax=ax)
        bar.set_label(f"{_label(objective.metric)} ({better})")
        ax.set_title(f"sweep: {objective.text}, {len(frame)} trials", fontsize=10)
    else:
        n = len(specs)
        fig, axes = plt.subplots(
            1, n, figsize=(4.2 * n, 3.6), squeeze=False, constrained_layout=True
        )
        for ax, spec in zip(axes[0], specs, strict=True):
            col = frame[f"param.{spec.name}"]
            xs, xnum = _axis_values(spec, col)
            ys = [
                best_of(frame.loc[col == v, metric_col].to_numpy(float))
                if np.isfinite(frame.loc[col == v, metric_col].to_numpy(float)).any()
                else np.nan
                for v in xs
            ]
            xplot = xs if xnum else list(range(len(xs)))
            ax.plot(xplot, ys, "-o", color="#2a6f97", lw=1.5, ms=5)
            if n == 1 and "seed.success" in frame and objective.metric != "success_rate":
                ax2 = ax.twinx()
                rate = [frame.loc[col == v, "metric.success_rate"].max() for v in xs]
                ax2.plot(xplot, rate, "--", color="#b5651d", lw=1.0)
                ax2.set_ylabel("success_rate", color="#b5651d")
                ax2.set_ylim(-0.05, 1.05)
            if spec.scale == "log" and xnum:
                ax.set_xscale("log")
            if not xnum:
                ax.set_xticks(range(len(xs)), [str(v) for v in xs])
            ax.set_xlabel(spec.name)
            ax.set_ylabel(_label(objective.metric) + ("" if n == 1 else " (best over others)"))
            ax.grid(True, which="both", alpha=0.25)
        fig.suptitle(f"sweep: {objective.text} ({better}), {len(frame)} trials", fontsize=10)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
