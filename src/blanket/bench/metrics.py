"""Benchmark metrics: pure functions on an episode's arrays, and their aggregation.

Every per-episode metric takes plain arrays (time along axis 0) so it can be checked by hand;
:func:`episode_metrics` applies them to an :class:`~blanket.bench.evaluate.EpisodeTrace`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from blanket import success as _success
from blanket.consistency import worst_component_check
from blanket.errors import ConfigError
from blanket.success import HOLD_S  # how long success needs the tip inside (s), re-exported

__all__ = [
    "HOLD_S",
    "SUCCESS_TOLERANCES_M",
    "time_to_success",
    "path_length_ratio",
    "joint_jerk_rms",
    "control_effort",
    "belief_rmse",
    "bootstrap_interval",
    "episode_metrics",
    "aggregate",
    "time_within_tolerance",
    "shove_starts",
    "recovery_times_s",
    "tip_covariance",
    "hold_metrics",
    "aggregate_hold",
    "HOLD_SETTLE_S",
    "lyapunov_covariance",
]

#: The hold task's tip covariance leaves out the first this many seconds (the controller and
#: the belief meeting their first sensations).
HOLD_SETTLE_S = 0.5

#: Success radii reported by the benchmark (m).
SUCCESS_TOLERANCES_M = (0.01, 0.05)


def time_to_success(
    distance_m: np.ndarray, dt: float, tolerance_m: float, hold_s: float = HOLD_S
) -> float | None:
    """Time the tip entered the tolerance ball for the first stay of at least ``hold_s``: the
    rule of :mod:`blanket.success` on ``distance_m <= tolerance_m``.

    ``distance_m[k]`` is the distance after control step ``k + 1`` (time ``(k + 1) dt``).
    Returns None when never reached.
    """
    if dt <= 0 or tolerance_m <= 0:
        raise ConfigError(f"dt and tolerance_m must be > 0, got {dt}, {tolerance_m}")
    return _success.time_to_success(np.asarray(distance_m, dtype=float) <= tolerance_m, dt, hold_s)


def path_length_ratio(tip_m: np.ndarray, target_m: np.ndarray) -> float:
    """Length of the tip's path over the straight-line distance from its start to the target.

    ``tip_m`` is (T, 3) tip positions starting at the initial tip; ``target_m`` the (3,) target
    at the start. 1 for a straight reach that stops on the target; larger for detours, overshoot
    and jitter. NaN when the tip starts on the target.
    """
    tip = np.asarray(tip_m, dtype=float)
    if tip.ndim != 2 or tip.shape[0] < 2:
        raise ConfigError(f"tip_m: expected (T >= 2, 3) positions, got shape {tip.shape}")
    length = float(np.sum(np.linalg.norm(np.diff(tip, axis=0), axis=1)))
    straight = float(np.linalg.norm(np.asarray(target_m, dtype=float) - tip[0]))
    return length / straight if straight > 1e-9 else math.nan


def joint_jerk_rms(q: np.ndarray, dt: float) -> float:
    """RMS joint jerk: the third difference of the joint angles over ``dt^3``, over all joints.

    The third backward difference ``q[k] - 3 q[k-1] + 3 q[k-2] - q[k-3]`` approximates
    ``dt^3 q'''`` (exact for cubics; Abramowitz & Stegun 1964, eq. 25.1.2 with n = 3).
    """
    q = np.asarray(q, dtype=float)
    if q.ndim == 1:
        q = q[:, None]
    if q.shape[0] < 4:
        return math.nan
    jerk = np.diff(q, n=3, axis=0) / dt**3
    return float(np.sqrt(np.mean(jerk**2)))


def control_effort(actions: np.ndarray) -> float:
    """Mean squared command over steps and joints (rad^2/s^2 or N^2 m^2)."""
    a = np.asarray(actions, dtype=float)
    return float(np.mean(a**2)) if a.size else math.nan


def belief_rmse(belief_q: np.ndarray, true_q: np.ndarray) -> float:
    """Root-mean-square error of believed joint angles against the true ones (rad)."""
    b = np.asarray(belief_q, dtype=float)
    t = np.asarray(true_q, dtype=float)
    if b.shape != t.shape:
        raise ConfigError(f"belief and truth shapes differ: {b.shape} vs {t.shape}")
    ok = np.all(np.isfinite(b), axis=tuple(range(1, b.ndim))) if b.ndim > 1 else np.isfinite(b)
    if not np.any(ok):
        return math.nan
    return float(np.sqrt(np.mean((b[ok] - t[ok]) ** 2)))


def bootstrap_interval(
    values: Sequence[float] | np.ndarray,
    level: float = 0.95,
    resamples: int = 4000,
    seed: int = 0,
) -> tuple[float, float]:
    """Percentile bootstrap interval of the mean (Efron & Tibshirani 1993, *An Introduction to
    the Bootstrap*, ch. 13, eq. 13.5): the ``(1-level)/2`` and ``(1+level)/2`` quantiles of the
    means of ``resamples`` resamples drawn with replacement, from a generator seeded ``seed``.
    """
    x = np.asarray(values, dtype=float)
    x = x[np.isfinite(x)]
    if not 0.0 < level < 1.0:
        raise ConfigError(f"level must be in (0, 1), got {level}")
    if resamples < 1:
        raise ConfigError(f"resamples must be >= 1, got {resamples}")
    if x.size == 0:
        return (math.nan, math.nan)
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, x.size, size=(resamples, x.size))
    means = x[idx].mean(axis=1)
    alpha = 1.0 - level
    lo, hi = np.quantile(means, [alpha / 2.0, 1.0 - alpha / 2.0])
    return float(lo), float(hi)


def episode_metrics(trace: Any) -> dict[str, Any]:
    """Every per-episode metric of an :class:`~blanket.bench.evaluate.EpisodeTrace`."""
    dt = trace.dt
    out: dict[str, Any] = {"seed": trace.seed}
    env_tolerance = getattr(trace, "env_tolerance_m", None)
    for tol in SUCCESS_TOLERANCES_M:
        tag = f"{round(tol * 100)}cm"
        if env_tolerance is not None and math.isclose(tol, env_tolerance):
            # the env's own report for its own tolerance (the same rule, applied by the env)
            reached = bool(trace.env_success)
            t = trace.env_time_to_success_s if reached else None
        else:
            t = time_to_success(trace.distance_m, dt, tol)
            reached = t is not None
        out[f"success_{tag}"] = reached
        out[f"time_to_success_{tag}_s"] = t
    out["final_error_m"] = float(trace.distance_m[-1])
    tip = np.vstack([trace.tip_start_m[None, :], trace.tip_m])
    out["path_length_ratio"] = path_length_ratio(tip, trace.target_start_m)
    q = np.vstack([trace.q_start_rad[None, :], trace.q_rad])
    out["joint_jerk_rad_s3"] = joint_jerk_rms(q, dt)
    out["control_effort"] = control_effort(trace.action)
    out["belief_rmse_rad"] = (
        belief_rmse(trace.belief_q_rad, trace.q_seen_rad)
        if trace.belief_q_rad is not None
        else None
    )
    # how honest the belief was: the worst joint's mean NEES after the first 0.25 s
    # (expected 1; blanket.consistency)
    check = None
    if trace.belief_q_rad is not None and trace.belief_sd_q_rad is not None:
        check = worst_component_check(
            trace.belief_q_rad,
            trace.q_seen_rad,
            trace.belief_sd_q_rad,
            np.arange(len(trace.belief_q_rad)) * dt,
        )
    out["belief_nees"] = None if check is None else check.mean
    out["belief_consistent"] = None if check is None else check.verdict == "consistent"
    out["policy_step_us"] = float(np.median(trace.policy_us)) if len(trace.policy_us) else None
    out["target_start_m"] = [float(v) for v in trace.target_start_m]
    out["perturbation_digest"] = trace.perturbation_digest
    out["contact"] = bool(trace.contact)
    peak = getattr(trace, "peak_joint_speed_ratio", None)
    out["peak_joint_speed_ratio"] = None if peak is None else float(peak)
    shove = getattr(trace, "shove_n", None)
    if shove is not None and env_tolerance is not None:  # the hold task
        out.update(hold_metrics(trace.distance_m, trace.tip_m, shove, dt, env_tolerance))
    return out


def _median(values: list[Any]) -> float | None:
    v = [float(x) for x in values if x is not None and np.isfinite(x)]
    return float(np.median(v)) if v else None


def aggregate(rows: Sequence[Mapping[str, Any]], seed: int = 0) -> dict[str, Any]:
    """Rates with 95 % percentile-bootstrap intervals, medians of the rest, over episodes."""
    out: dict[str, Any] = {"episodes": len(rows)}
    for tol in SUCCESS_TOLERANCES_M:
        tag = f"{round(tol * 100)}cm"
        hits = [float(r[f"success_{tag}"]) for r in rows]
        out[f"success_{tag}"] = float(np.mean(hits)) if hits else math.nan
        out[f"success_{tag}_ci95"] = list(bootstrap_interval(hits, seed=seed))
        out[f"time_to_success_{tag}_s"] = _median(
            [r[f"time_to_success_{tag}_s"] for r in rows if r[f"success_{tag}"]]
        )
    for key in (
        "final_error_m",
        "path_length_ratio",
        "joint_jerk_rad_s3",
        "belief_rmse_rad",
        "belief_nees",
        "policy_step_us",
    ):
        out[key] = _median([r.get(key) for r in rows])
    nees = [float(r["belief_nees"]) for r in rows if r.get("belief_nees") is not None]
    out["belief_nees_max"] = max(nees) if nees else None
    judged = [r["belief_consistent"] for r in rows if r.get("belief_consistent") is not None]
    out["belief_consistent_rate"] = float(np.mean(judged)) if judged else None
    out["final_error_m_mean"] = float(np.mean([r["final_error_m"] for r in rows]))
    out["control_effort"] = float(np.mean([r["control_effort"] for r in rows]))
    out["contact_rate"] = float(np.mean([r["contact"] for r in rows]))
    peaks = [r.get("peak_joint_speed_ratio") for r in rows]
    peaks = [float(p) for p in peaks if p is not None]
    out["peak_joint_speed_ratio"] = max(peaks) if peaks else None
    held = [r for r in rows if "time_within_tolerance" in r]
    if held:  # the hold task
        out.update(aggregate_hold(held))
    return out


# ------------------------------------------------------------------------ holding a pose
def time_within_tolerance(distance_m: np.ndarray, tolerance_m: float) -> float:
    """Fraction of control steps whose tip distance is within ``tolerance_m`` (NaN if none)."""
    d = np.asarray(distance_m, dtype=float)
    return float(np.mean(d <= tolerance_m)) if d.size else math.nan


def shove_starts(shove_n: np.ndarray) -> np.ndarray:
    """Step indices where a shove starts: a non-zero force after a zero one (or at step 0)."""
    on = np.any(np.asarray(shove_n, dtype=float) != 0.0, axis=1)
    return np.flatnonzero(on & ~np.concatenate([[False], on[:-1]]))


def recovery_times_s(
    distance_m: np.ndarray, starts: Sequence[int], dt: float, tolerance_m: float
) -> list[float | None]:
    """Time from each shove's start until the tip is back inside the tolerance and stays
    there for the hold time: the one success rule (:mod:`blanket.success`) on the trace from
    the shove's row on. Row ``k`` is control step ``k + 1``: the force that acted during it and
    the distance after it, so a shove starting at row ``s`` starts at time ``s dt`` and the
    recovery time counts from there. None: not recovered by the episode's end. A tip that
    never leaves the tolerance recovers at ``dt``.
    """
    inside = np.asarray(distance_m, dtype=float) <= tolerance_m
    return [_success.time_to_success(inside[int(s) :], dt) for s in starts]


def tip_covariance(tip_m: np.ndarray, skip: int = 0) -> np.ndarray:
    """Empirical covariance (3, 3) of the tip positions ``tip_m[skip:]`` about their mean, m^2
    (unbiased, ``n - 1``)."""
    tip = np.asarray(tip_m, dtype=float)[skip:]
    if tip.shape[0] < 2:
        return np.full((3, 3), math.nan)
    return np.cov(tip, rowvar=False)


def hold_metrics(
    distance_m: np.ndarray,
    tip_m: np.ndarray,
    shove_n: np.ndarray,
    dt: float,
    tolerance_m: float,
    settle_s: float = HOLD_SETTLE_S,
) -> dict[str, Any]:
    """One hold episode's measures: ``time_within_tolerance``, ``recovery_times_s`` (one per
    shove, None when not recovered), ``tip_covariance_m2`` (after ``settle_s``)."""
    starts = shove_starts(shove_n)
    skip = int(round(settle_s / dt))
    return {
        "time_within_tolerance": time_within_tolerance(distance_m, tolerance_m),
        "recovery_times_s": recovery_times_s(distance_m, starts, dt, tolerance_m),
        "tip_covariance_m2": tip_covariance(tip_m, skip).tolist(),
    }


def aggregate_hold(rows: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """Hold measures over episodes: the mean and lowest time within tolerance, the median
    recovery time over every recovered shove, shove counts, and the tip covariance averaged
    over episodes (the within-episode covariance, pooled) with its axis standard deviations."""
    if not rows:
        return {}
    fractions = [float(r["time_within_tolerance"]) for r in rows]
    recoveries = [t for r in rows for t in r["recovery_times_s"]]
    done = [float(t) for t in recoveries if t is not None]
    cov = np.mean([np.asarray(r["tip_covariance_m2"], dtype=float) for r in rows], axis=0)
    return {
        "time_within_tolerance": float(np.mean(fractions)),
        "time_within_tolerance_min": float(np.min(fractions)),
        "recovery_time_s": float(np.median(done)) if done else None,
        "shoves": len(recoveries),
        "shoves_recovered": len(done),
        "tip_covariance_m2": cov.tolist(),
        "tip_sd_m": np.sqrt(np.clip(np.diag(cov), 0.0, None)).tolist(),
    }


def lyapunov_covariance(A: np.ndarray, Q: np.ndarray) -> np.ndarray:
    """Stationary covariance ``P`` of the linear SDE ``dx = A x dt + dw``, ``E[dw dw'] = Q dt``:
    the solution of the continuous Lyapunov equation ``A P + P A' + Q = 0`` (Gardiner,
    *Stochastic Methods*, 4th ed. 2009, sec. 4.5.6, from memory), by
    ``scipy.linalg.solve_continuous_lyapunov`` (Bartels-Stewart). ``A`` must be Hurwitz."""
    from scipy.linalg import solve_continuous_lyapunov

    A = np.asarray(A, dtype=float)
    if np.max(np.linalg.eigvals(A).real) >= 0.0:
        raise ConfigError("A: the closed loop is not stable (an eigenvalue has real part >= 0)")
    P = solve_continuous_lyapunov(A, -np.asarray(Q, dtype=float))
    return 0.5 * (P + P.T)
