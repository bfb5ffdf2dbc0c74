"""Is a belief's reported uncertainty honest? NEES and NIS against chi-square bounds.

A Gaussian belief with mean ``mu`` and covariance ``Sigma`` about a true state ``x`` is
*consistent* when its errors are as large as it says: the normalized estimation error squared

    NEES = (mu - x)' inv(Sigma) (mu - x)

is then chi-square distributed with ``n = dim(x)`` degrees of freedom, with mean ``n``. Likewise
the normalized innovation squared ``NIS = nu' inv(S) nu`` of a prediction error ``nu`` with
predicted covariance ``S``. The average of ``K`` independent such values, times ``K``, is
chi-square with ``K n`` degrees of freedom, which gives the two-sided acceptance region of the
consistency test (Bar-Shalom, Li & Kirubarajan 2001, *Estimation with Applications to Tracking
and Navigation*, sec. 5.4.2, the time-average and Monte-Carlo NEES/NIS tests; section numbers
from memory). An average above the region means an **overconfident** belief (errors larger than
its covariance admits), below it an **underconfident** one.

Successive values of one run are correlated (a belief that is wrong stays wrong for a while), so
the bounds here use the *effective* number of independent samples of the sequence (the initial
positive sequence estimate of Geyer 1992, Statistical Science 7(4), sec. 3.3), never more than
the samples given. With white values this is the textbook test.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import chdtri

__all__ = [
    "nees",
    "nees_per_component",
    "chi_square_mean_bounds",
    "effective_sample_size",
    "ConsistencyCheck",
    "check_consistency",
]


def nees(error: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """Normalized estimation (or innovation) error squared, ``e' inv(Sigma) e``, per sample.

    Parameters
    ----------
    error : numpy.ndarray
        Errors ``mu - x`` (or innovations), shape ``(n,)`` or ``(K, n)``.
    covariance : numpy.ndarray
        Their covariances, ``(n, n)`` (shared) or ``(K, n, n)``.

    Returns
    -------
    numpy.ndarray
        Shape ``(K,)`` (a 0-d array for one sample).
    """
    e = np.asarray(error, dtype=float)
    S = np.asarray(covariance, dtype=float)
    single = e.ndim == 1
    e2 = e[None, :] if single else e
    if e2.ndim != 2:
        raise ValueError(f"error must have shape (n,) or (K, n), got {e.shape}")
    n = e2.shape[1]
    if S.shape == (n, n):
        S = np.broadcast_to(S, (e2.shape[0], n, n))
    if S.shape != (e2.shape[0], n, n):
        raise ValueError(
            f"covariance must have shape {(n, n)} or {(e2.shape[0], n, n)}, got {S.shape}"
        )
    out = np.einsum("ki,ki->k", e2, np.linalg.solve(S, e2[..., None])[..., 0])
    return out[0] if single else out


def nees_per_component(error: np.ndarray, sd: np.ndarray) -> np.ndarray:
    """``((mu - x) / sd)^2`` per component: the NEES of each coordinate on its own (1 dof)."""
    e = np.asarray(error, dtype=float)
    s = np.asarray(sd, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return (e / s) ** 2


def chi_square_mean_bounds(dof: int, samples: float, level: float = 0.95) -> tuple[float, float]:
    """Two-sided acceptance region of the mean of ``samples`` chi-square(``dof``) values.

    ``K * mean ~ chi2(K dof)``, so the region is ``[chi2_lo(K dof), chi2_hi(K dof)] / K`` with
    tail probability ``(1 - level) / 2`` on each side (Bar-Shalom et al. 2001, sec. 5.4.2).
    ``samples`` may be fractional (an effective sample size).
    """
    if dof < 1:
        raise ValueError(f"dof must be >= 1, got {dof!r}")
    if not samples > 0:
        raise ValueError(f"samples must be > 0, got {samples!r}")
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    k = float(samples) * dof
    tail = 0.5 * (1.0 - level)
    return float(chdtri(k, 1.0 - tail)) / samples, float(chdtri(k, tail)) / samples


def effective_sample_size(values: np.ndarray) -> float:
    """Effective number of independent samples of a stationary sequence.

    ``K / (1 + 2 sum_k rho_k)``, the sum over lags taken by Geyer's initial positive sequence
    (pairs of autocorrelations summed while positive; Geyer 1992, Stat Sci 7(4), sec. 3.3).
    Clipped to ``[1, K]``: correlation never makes a sequence worth more than its length.
    """
    x = np.asarray(values, dtype=float).ravel()
    x = x[np.isfinite(x)]
    K = x.size
    if K < 4:
        return float(max(K, 1))
    d = x - x.mean()
    var = float(d @ d) / K
    if var <= 0:
        return float(K)
    m = 1 << int(np.ceil(np.log2(2 * K)))
    f = np.fft.rfft(d, m)
    acf = np.fft.irfft(f * np.conj(f), m)[:K] / (K * var)
    tau = -1.0  # 1 + 2 sum rho_k = -rho_0 + 2 sum of the pair sums Gamma_m
    for i in range(0, K - 1, 2):
        pair = acf[i] + acf[i + 1]
        if pair <= 0:
            break
        tau += 2.0 * pair
    return float(np.clip(K / max(tau, 1e-12), 1.0, K))


@dataclass(frozen=True)
class ConsistencyCheck:
    """Outcome of a NEES or NIS test on one sequence.

    Attributes
    ----------
    mean : float
        Average normalized error squared.
    dof : int
        Degrees of freedom of each value.
    samples : int
        Values averaged.
    effective_samples : float
        Independent samples they are worth (see :func:`effective_sample_size`).
    lower, upper : float
        The acceptance region of the mean at ``level``.
    level : float
        Probability of the region under a consistent belief.
    """

    mean: float
    dof: int
    samples: int
    effective_samples: float
    lower: float
    upper: float
    level: float

    @property
    def verdict(self) -> str:
        """``consistent``, ``overconfident`` (mean above the region) or ``underconfident``."""
        if self.mean > self.upper:
            return "overconfident"
        if self.mean < self.lower:
            return "underconfident"
        return "consistent"

    def summary(self, what: str = "NEES") -> str:
        """One line: the verdict, the mean against its expected value and the region."""
        return (
            f"{what} {self.verdict}: mean {self.mean:.3g} (expected {self.dof}), "
            f"{self.level:.0%} region [{self.lower:.3g}, {self.upper:.3g}] "
            f"over {self.samples} samples (~{self.effective_samples:.0f} independent)"
        )


def check_consistency(values: np.ndarray, dof: int = 1, level: float = 0.95) -> ConsistencyCheck:
    """Test a sequence of NEES (or NIS) values of ``dof`` degrees of freedom each.

    Non-finite values (steps without a belief or a truth) are left out.
    """
    x = np.asarray(values, dtype=float).ravel()
    x = x[np.isfinite(x)]
    if x.size == 0:
        raise ValueError("values must hold at least one finite number")
    k_eff = effective_sample_size(x)
    lo, hi = chi_square_mean_bounds(int(dof), k_eff, level)
    return ConsistencyCheck(
        mean=float(x.mean()),
        dof=int(dof),
        samples=int(x.size),
        effective_samples=k_eff,
        lower=lo,
        upper=hi,
        level=float(level),
    )


#: The start of an episode the belief consistency is not judged on (s): the belief meets its
#: first sensations there (common practice, no source).
SETTLE_S = 0.25


def worst_component_check(
    belief: np.ndarray,
    truth: np.ndarray,
    sd: np.ndarray,
    t: np.ndarray,
    settle_s: float = SETTLE_S,
    level: float = 0.95,
) -> ConsistencyCheck | None:
    """The NEES test of the component (joint) whose mean NEES is highest, after ``settle_s``.

    Parameters
    ----------
    belief, truth, sd : numpy.ndarray
        Believed values, true values and the belief's standard deviations, shape ``(K, n)``.
    t : numpy.ndarray
        Time of each row (s), shape ``(K,)``; rows before ``t[0] + settle_s`` are left out.

    Returns
    -------
    ConsistencyCheck or None
        None when no row after ``settle_s`` holds a finite value.
    """
    b, x, s = (np.asarray(a, dtype=float) for a in (belief, truth, sd))
    if b.ndim == 1:
        b, x, s = b[:, None], x[:, None], s[:, None]
    t = np.asarray(t, dtype=float)
    keep = t >= t[0] + settle_s - 1e-9 if t.size else np.zeros(0, bool)
    values = nees_per_component(b[keep] - x[keep], s[keep])
    best: ConsistencyCheck | None = None
    for j in range(values.shape[1]):
        column = values[:, j]
        if not np.isfinite(column).any():
            continue
        check = check_consistency(column, dof=1, level=level)
        if best is None or check.mean > best.mean:
            best = check
    return best


__all__ += ["SETTLE_S", "worst_component_check"]
