"""Benchmark report: Markdown tables and PNG charts from the records of a run."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

__all__ = [
    "write_report",
    "markdown_report",
    "plot_success",
    "plot_final_error",
    "plot_learning_curves",
    "reference_success",
]

_INK = "#2b2b2b"
_GRID = "#d9d9d9"
# Our own palette: muted greens and earth tones of the potting bench.
_COLOURS = ["#3f7f5f", "#b5651d", "#4f6d8f", "#8f4f6d", "#7f7f3f", "#5f9f9f", "#a0522d", "#6b8e23"]


def _order(records: Sequence[Mapping[str, Any]], key: str) -> list[str]:
    seen: list[str] = []
    for r in records:
        if r[key] not in seen:
            seen.append(r[key])
    return seen


def _pct(v: Any) -> str:
    return "-" if v is None or not np.isfinite(v) else f"{100 * v:.0f}"


def _rate(r: Mapping[str, Any], tag: str) -> str:
    lo, hi = r[f"success_{tag}_ci95"]
    return f"{_pct(r[f'success_{tag}'])} [{_pct(lo)}, {_pct(hi)}]"


def _num(v: Any, scale: float = 1.0, digits: int = 2) -> str:
    if v is None or (isinstance(v, float) and not np.isfinite(v)):
        return "-"
    return f"{v * scale:.{digits}f}"


def _grid(records, value) -> list[str]:
    policies = _order(records, "policy")
    conditions = _order(records, "condition")
    index = {(r["policy"], r["condition"]): r for r in records}
    lines = [
        "| policy | " + " | ".join(conditions) + " |",
        "| --- | " + " | ".join("---" for _ in conditions) + " |",
    ]
    for p in policies:
        cells = [value(index[(p, c)]) if (p, c) in index else "" for c in conditions]
        lines.append(f"| {p} | " + " | ".join(cells) + " |")
    return lines


def _condition_lines(records: Sequence[Mapping[str, Any]]) -> list[str]:
    """The parameters of each named condition in the records (blanket.conditions)."""
    from blanket.conditions import PRESETS

    lines = []
    for name in _order(records, "condition"):
        preset = PRESETS.get(name)
        if preset is None:
            continue
        values = ", ".join(f"`{k} = {v:g}`" for k, v in preset.parameters.items())
        lines.append(f"- **{name}**: {preset.summary}" + (f" ({values})" if values else ""))
    return ["Conditions:", "", *lines, ""] if lines else []


def markdown_report(
    records: Sequence[Mapping[str, Any]],
    settings: Mapping[str, Any] | None = None,
    rl_meta: Mapping[str, Any] | None = None,
    wall_s: float | None = None,
) -> str:
    """The text of ``report.md``."""
    s = dict(settings or {})
    lines = ["# Reaching benchmark", ""]
    if s:
        lines.append(
            f"Robot **{s.get('robot')}**, {s.get('episodes')} episodes of {s.get('episode_s')} s "
            f"per policy and condition, seeds {s.get('seed')}.."
            f"{s.get('seed', 0) + s.get('episodes', 1) - 1}"
            " (every policy meets the same targets and perturbations)."
            + (f" Wall time {wall_s:.0f} s." if wall_s is not None else "")
        )
        lines.append("")
        for line in s.get("left_out") or []:
            lines.append(f"- left out {line}")
        if s.get("left_out"):
            lines.append("")
    lines += [
        "Every policy commands through the safety wrapper `blanket run` uses (SafetyLimits "
        "with the arm's profile, outermost, around the condition's perturbations).",
        "",
        "Success: the tool tip entered the ball and stayed 0.25 s. Intervals: 95 % percentile "
        "bootstrap of the rate (Efron & Tibshirani 1993, An Introduction to the Bootstrap).",
        "",
        *_condition_lines(records),
        "## Reached within 1 cm, % [95 % interval]",
        "",
        *_grid(records, lambda r: _rate(r, "1cm")),
        "",
        "## Reached within 5 cm, % [95 % interval]",
        "",
        *_grid(records, lambda r: _rate(r, "5cm")),
        "",
        "## Final distance to target, median, cm",
        "",
        *_grid(records, lambda r: _num(r["final_error_m"], 100.0)),
        "",
        "## All measures",
        "",
        "| policy | condition | control | time to 1 cm, s | time to 5 cm, s | path ratio | "
        "joint jerk, rad/s^3 | effort | belief RMSE, mrad | step, us | note |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    for r in records:
        unit = "rad²/s²" if r["control"] == "velocity" else "N²m²"
        lines.append(
            f"| {r['policy']} | {r['condition']} | {r['control']} | "
            f"{_num(r['time_to_success_1cm_s'])} | {_num(r['time_to_success_5cm_s'])} | "
            f"{_num(r['path_length_ratio'])} | {_num(r['joint_jerk_rad_s3'], digits=0)} | "
            f"{_num(r['control_effort'], digits=3)} {unit} | "
            f"{_num(r['belief_rmse_rad'], 1000.0, 2)} | {_num(r['policy_step_us'], digits=0)} | "
            f"{r.get('note', '')} |"
        )
    lines += [
        "",
        "Medians over episodes except effort (mean squared command) and rates. Path ratio: tip "
        "path length over the straight line from the start to the target. Belief RMSE: the "
        "policy's believed joint angles against the true ones (policies that report a belief).",
    ]
    lines += _training_cost(records, rl_meta or {})
    if rl_meta:
        lines += [
            "",
            "## RL training",
            "",
            "| algo | policy steps | control steps | wall time, s | finished | settings |",
            "| --- | --- | --- | --- | --- | --- |",
        ]
        for algo, meta in rl_meta.items():
            st = meta.get("settings", {})
            shown = {
                k: st.get(k)
                for k in (
                    "action_repeat",
                    "distance_scale_m",
                    "tolerance_bonus",
                    "effort_weight",
                    "seed",
                )
            }
            shown.update(meta.get("sb3_hyperparameters", {}))
            lines.append(
                f"| {algo} | {meta.get('policy_steps')} | {meta.get('control_steps')} | "
                f"{_num(meta.get('wall_time_s'), digits=0)} | {meta.get('finished')} | "
                f"{', '.join(f'{k}={v}' for k, v in shown.items())} |"
            )
        lines += [
            "",
            "Learning curves (eval seeds disjoint from the benchmark's):",
            "",
            "| algo | policy steps | reached 1 cm, % | reached 5 cm, % | final error, cm |",
            "| --- | --- | --- | --- | --- |",
        ]
        for algo, meta in rl_meta.items():
            for row in meta.get("learning_curve", []):
                lines.append(
                    f"| {algo} | {row['policy_steps']} | {_pct(row['success_1cm'])} | "
                    f"{_pct(row['success_5cm'])} | {_num(row['final_error_m'], 100)} |"
                )
    return "\n".join(lines) + "\n"


def _seeds(meta: Mapping[str, Any]) -> list[Any]:
    """The training seeds behind shipped weights (``seeds_trained``, else the run's seed)."""
    seeds = meta.get("seeds_trained")
    return list(seeds) if isinstance(seeds, list) else [meta.get("seed")]


def _training_cost(records: Sequence[Mapping[str, Any]], rl_meta: Mapping[str, Any]) -> list[str]:
    """What each policy cost before the benchmark: RL's training beside the models' zero."""
    from blanket.bench.policies import POLICIES

    lines = [
        "",
        "## Training cost before the benchmark",
        "",
        "| policy | training control steps | decisions | training wall time, h | seeds trained |",
        "| --- | --- | --- | --- | --- |",
    ]
    for name in _order(records, "policy"):
        spec = POLICIES.get(name)
        meta = rl_meta.get((spec.rl_algo or spec.name) if spec else name)
        if meta:
            wall = meta.get("wall_time_s")
            seeds = _seeds(meta)
            total = meta.get("seeds_wall_time_s")
            hours = _num(None if wall is None else wall / 3600.0)
            if total is not None:
                hours += f" (all seeds {total / 3600.0:.2f})"
            lines.append(
                f"| {name} | {meta.get('control_steps')} | {meta.get('policy_steps')} | "
                f"{hours} | {len(seeds)} ({', '.join(map(str, seeds))}) |"
            )
        elif spec is not None and spec.model_based:
            lines.append(f"| {name} | 0 | 0 | 0 | none (a body model, no training) |")
        else:
            lines.append(f"| {name} | - | - | - | - |")
    lines += [
        "",
        "Wall time at `nice 10` on a shared 2-core machine; decisions = control steps / action "
        "repeat. The model-based policies run on the URDF's body model with no training.",
    ]
    return lines


def _style(ax) -> None:
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(_INK)
    ax.tick_params(colors=_INK, labelsize=8)
    ax.grid(True, axis="x", color=_GRID, lw=0.6)
    ax.set_axisbelow(True)


def plot_success(records: Sequence[Mapping[str, Any]], path: Path, tag: str = "5cm") -> Path:
    """Horizontal bars of the success rate per condition and policy, with 95 % intervals."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    policies = _order(records, "policy")
    conditions = _order(records, "condition")
    index = {(r["policy"], r["condition"]): r for r in records}
    height = 0.8 / max(1, len(policies))
    fig, ax = plt.subplots(
        figsize=(7.5, 0.5 + 0.42 * len(conditions) * max(1, len(policies)) ** 0.5),
        constrained_layout=True,
    )
    for j, p in enumerate(policies):
        ys, xs, lo, hi = [], [], [], []
        for i, c in enumerate(conditions):
            r = index.get((p, c))
            if r is None:
                continue
            ys.append(i + (j - (len(policies) - 1) / 2) * height)
            xs.append(100 * r[f"success_{tag}"])
            ci = r[f"success_{tag}_ci95"]
            lo.append(100 * (r[f"success_{tag}"] - ci[0]))
            hi.append(100 * (ci[1] - r[f"success_{tag}"]))
        ax.barh(
            ys,
            xs,
            height=height * 0.9,
            color=_COLOURS[j % len(_COLOURS)],
            label=p,
            xerr=[lo, hi],
            error_kw={"ecolor": _INK, "elinewidth": 0.7, "capsize": 1.5},
        )
        # a 0 % bar has no length: mark it, so "none reached" differs from "not run"
        zeros = [y for y, x in zip(ys, xs, strict=True) if x == 0]
        if zeros:
            ax.plot(
                [0.0] * len(zeros),
                zeros,
                linestyle="none",
                marker="|",
                markersize=9,
                markeredgewidth=2.2,
                color=_COLOURS[j % len(_COLOURS)],
                clip_on=False,
                gid="zero-bar",
            )
            for y in zeros:
                ax.text(1.2, y, "0", va="center", fontsize=6, color=_INK)
    ax.set_yticks(range(len(conditions)), conditions)
    ax.invert_yaxis()
    ax.set_xlim(0, 105)
    ax.set_xlabel(f"reached within {tag[:-2]} cm and held 0.25 s  [% of episodes]", color=_INK)
    _style(ax)
    ax.legend(frameon=False, fontsize=7, loc="lower left", bbox_to_anchor=(1.0, 0.0))
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def plot_final_error(records: Sequence[Mapping[str, Any]], path: Path) -> Path:
    """Per-episode final distances (dots) and medians (ticks), per condition and policy."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    policies = _order(records, "policy")
    conditions = _order(records, "condition")
    index = {(r["policy"], r["condition"]): r for r in records}
    fig, ax = plt.subplots(figsize=(7.5, 0.6 + 0.45 * len(conditions)), constrained_layout=True)
    step = 0.8 / max(1, len(policies))
    for j, p in enumerate(policies):
        colour = _COLOURS[j % len(_COLOURS)]
        for i, c in enumerate(conditions):
            r = index.get((p, c))
            if r is None:
                continue
            y = i + (j - (len(policies) - 1) / 2) * step
            errs = np.array([e["final_error_m"] for e in r["per_episode"]]) * 100
            errs = np.maximum(errs, 1e-3)
            ax.plot(
                errs,
                np.full(errs.size, y),
                "o",
                ms=2.5,
                color=colour,
                alpha=0.6,
                label=p if i == 0 else None,
            )
            ax.plot([np.median(errs)] * 2, [y - step * 0.45, y + step * 0.45], color=colour, lw=2)
    ax.axvline(1.0, color=_INK, lw=0.7, ls=":")
    ax.axvline(5.0, color=_INK, lw=0.7, ls=":")
    ax.set_xscale("log")
    ax.set_yticks(range(len(conditions)), conditions)
    ax.invert_yaxis()
    ax.set_xlabel("final distance to target [cm]  (dotted: 1 and 5 cm)", color=_INK)
    _style(ax)
    ax.legend(frameon=False, fontsize=7, loc="lower left", bbox_to_anchor=(1.0, 0.0))
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def reference_success(
    records: Sequence[Mapping[str, Any]],
    policy: str = "active-inference",
    condition: str = "nominal",
) -> dict[str, dict[str, float]]:
    """``{policy: {"1cm": share, "5cm": share}}`` of one bench cell (empty when absent)."""
    for r in records:
        if r["policy"] == policy and r["condition"] == condition:
            return {policy: {"1cm": r["success_1cm"], "5cm": r["success_5cm"]}}
    return {}


def plot_learning_curves(
    rl_meta: Mapping[str, Any],
    path: Path,
    reference: Mapping[str, Mapping[str, float]] | None = None,
) -> Path | None:
    """Held-out success within 1 cm and 5 cm against training control steps.

    One panel per tolerance; each entry of ``rl_meta`` (a training JSON, or any mapping with a
    ``learning_curve`` list) is one line; ``reference`` (``{label: {"1cm": share, "5cm":
    share}}``, e.g. :func:`reference_success`) adds flat lines for policies that need no
    training.
    """
    curves = {a: m.get("learning_curve", []) for a, m in rl_meta.items()}
    if not any(curves.values()):
        return None
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(9.0, 3.4), sharey=True, constrained_layout=True)
    for ax, tag in zip(axes, ("1cm", "5cm"), strict=True):
        for j, (algo, rows) in enumerate(curves.items()):
            if not rows:
                continue
            steps = np.array([r["control_steps"] for r in rows], dtype=float)
            ax.plot(
                steps,
                [100 * r[f"success_{tag}"] for r in rows],
                "-o",
                ms=3,
                lw=1.2,
                color=_COLOURS[j % len(_COLOURS)],
                label=algo,
            )
        for k, (label, shares) in enumerate((reference or {}).items()):
            ax.axhline(
                100 * shares[tag],
                color=_INK,
                lw=1.4,
                ls=("-", "--", ":")[k % 3],
                label=f"{label} (no training)",
            )
        ax.set_title(f"within {tag[:-2]} cm", color=_INK, fontsize=9)
        ax.set_xlabel("training control steps", color=_INK)
        ax.set_ylim(-3, 103)
        _style(ax)
        ax.grid(True, axis="y", color=_GRID, lw=0.6)
    axes[0].set_ylabel("held-out episodes reached [%]", color=_INK)
    axes[1].legend(frameon=False, fontsize=7, loc="lower right")
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def write_report(
    records: Sequence[Mapping[str, Any]],
    out_dir: Path,
    settings: Mapping[str, Any] | None = None,
    rl_meta: Mapping[str, Any] | None = None,
    wall_s: float | None = None,
) -> list[Path]:
    """Write ``report.md`` and the charts; return the paths written."""
    out = Path(out_dir)
    paths = [out / "report.md"]
    paths[0].write_text(markdown_report(records, settings, rl_meta, wall_s))
    paths.append(plot_success(records, out / "success_5cm.png", "5cm"))
    paths.append(plot_success(records, out / "success_1cm.png", "1cm"))
    paths.append(plot_final_error(records, out / "final_error.png"))
    if rl_meta:
        p = plot_learning_curves(
            rl_meta, out / "rl_learning_curves.png", reference_success(records)
        )
        if p is not None:
            paths.append(p)
    return paths
