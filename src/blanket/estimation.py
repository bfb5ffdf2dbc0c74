"""Standalone generalized filter for linear state-space models with white or smooth noise.

Model (:class:`LinearSystem`)
-----------------------------
Continuous-time drift ``x' = A x + B u + w``, observations every ``dt`` seconds
``y_k = C x(k dt) + z_k``. ``Q`` is the intensity of ``w`` (spectral density at zero frequency,
covariance per second of the integrated noise) and ``R`` the per-sample covariance of ``z_k``.
With smoothness ``s > 0`` both noises are smooth in the convention of :mod:`blanket.gcoords`
(autocorrelation ``exp(-h^2 / (4 s^2))``): ``w`` has variance ``Q / (2 sqrt(pi) s)`` (the same
low-frequency power, so the model is continuous as ``s -> 0``) and ``z`` variance ``R``.

Filter (:func:`run_filter`)
---------------------------
The belief is Gaussian (Laplace) over the generalized state

    Z = (x, w^(0..p-1), z^(0..p-1))

-- the hidden state with the generalized coordinates of motion of both noises up to order
``p - 1``, for embedding order ``p``. The generalized means of the state follow from ``Z``
exactly through the model, ``x^(j+1) = A x^(j) + B u^(j) + w^(j)`` (``u`` is held between
samples, so ``u^(j) = 0`` for ``j >= 1``), which gives ``x~`` up to order ``p``.

* **Prediction.** The belief mean *and precision* are carried forward through the dynamics over
  one sample (the Laplace-propagated prior of generalised filtering; Friston, Stephan, Li &
  Daunizeau 2010, "Generalised filtering", Math Probl Eng), discretised exactly: the matrix
  exponential for the drift and Van Loan's method for the noise (Van Loan 1978, IEEE TAC 23).
  The generalized noise coordinates follow the stationary Gauss-Markov closure of
  :func:`blanket.noise.gauss_markov_closure`, whose stationary covariance is ``S(s)`` (Friston
  2008, PLoS Comput Biol, eq. 6) and whose zero-frequency power is that of the smooth noise.
* **Update.** One Gauss-Newton step on the Laplace free energy of the new sample,
  ``F(Z) = 1/2 e_y' P_y e_y + 1/2 e_p' P_p e_p`` with sensory error ``e_y = y_k - H Z`` and
  prior error ``e_p = Z - Z_prior``. ``F`` is quadratic, so the step lands on its minimum; it
  is computed in covariance (Woodbury) form, ``Z = Z_prior + K e_y``, which equals
  ``-inv(curvature) @ gradient`` (see :func:`laplace_update`) and stays well conditioned when the
  sensory channel is (nearly) noise free given the belief about its smooth noise.

How observations enter
----------------------
Each sample enters at order 0, once, when it arrives: ``e_y = y_k - C x - z^(0)``. There is no
finite-difference embedding of ``y`` (:func:`blanket.gcoords.embed`): the information carried by
the derivatives of a smooth signal is extracted through the generalized noise coordinates of the
belief instead, and overlapping embedding windows would count each sample several times. With
``s = 0`` (white noise) the noise coordinates are absent -- orders above 0 carry zero precision
-- the belief is over ``x`` alone, the filter equals the Kalman filter of the exactly discretised
model, and the higher generalized means are the expected motion ``A x^(j) + B u^(j)``. With
``order = 0`` the noise is treated as white whatever ``s`` is (the white-noise filter).

The filter is causal: ``means[k]`` uses ``y[:k + 1]`` only.

Limits
------
The model's ``smoothness`` must not overstate the true one: the filter then treats white
sample-to-sample jitter as informative derivatives, and at high orders its error grows by orders
of magnitude (see ``white_sensory_fraction`` of :func:`run_filter` for a guard). Understating it
costs little (the gain shrinks towards the white-noise filter).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import expm

from blanket.free_energy import (
    belief_curvature,
    belief_gradient,
    free_energy,
    normalized_error,
)
from blanket.gcoords import temporal_covariance
from blanket.noise import (
    MAX_CLOSURE_ORDER,
    gauss_markov_closure,
    smooth_noise,
    smooth_variance_from_intensity,
)

__all__ = [
    "MAX_ORDER",
    "LinearSystem",
    "FilterResult",
    "run_filter",
    "laplace_update",
    "static_posterior_mean",
    "van_loan_discretisation",
]

MAX_ORDER = MAX_CLOSURE_ORDER + 1
"""Highest embedding order accepted by :func:`run_filter`."""

_SUBSTEPS_MAX = 64
_SENSORY_FLOOR = 1e-10  # default white sensory variance, as a fraction of R (numerical floor)


# --------------------------------------------------------------------------- helpers


def _matrix(name: str, value: object, shape: tuple[int | None, int | None]) -> np.ndarray:
    a = np.asarray(value, dtype=float)
    if a.ndim == 0:
        a = a.reshape(1, 1)
    elif a.ndim == 1 and shape[0] is not None and shape[0] == 1:
        a = a.reshape(1, -1)
    elif a.ndim == 1 and shape[1] == 1:
        a = a.reshape(-1, 1)
    if a.ndim != 2:
        raise ValueError(f"{name} must be a 2-D matrix, got {a.ndim} dimensions")
    for axis, want in enumerate(shape):
        if want is not None and a.shape[axis] != want:
            raise ValueError(f"{name} must have shape {shape} (None = any), got {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError(f"{name} must be finite (no NaN or inf)")
    return a


def _psd_factor(name: str, M: np.ndarray, definite: bool) -> np.ndarray:
    """Symmetric check and a factor ``L`` (columns = positive directions) with ``L L' = M``."""
    scale = max(1.0, float(np.max(np.abs(M)))) if M.size else 1.0
    if not np.allclose(M, M.T, rtol=1e-9, atol=1e-12 * scale):
        raise ValueError(f"{name} must be symmetric")
    w, V = np.linalg.eigh(0.5 * (M + M.T))
    top = float(np.max(w)) if w.size else 0.0
    if definite and (w.size == 0 or np.min(w) <= 1e-12 * max(top, 1e-300)):
        raise ValueError(f"{name} must be positive definite (all eigenvalues > 0)")
    if np.any(w < -1e-10 * max(abs(top), 1.0)):
        raise ValueError(f"{name} must be positive semi-definite (eigenvalues >= 0)")
    keep = w > 1e-12 * max(top, 1e-300)
    return V[:, keep] * np.sqrt(w[keep])


def van_loan_discretisation(
    drift: np.ndarray, intensity: np.ndarray, dt: float
) -> tuple[np.ndarray, np.ndarray]:
    """Exact discretisation of ``x' = F x + w``, ``E[w w'] = G delta``, over ``dt`` seconds.

    Van Loan 1978, "Computing integrals involving the matrix exponential", IEEE Trans. Autom.
    Control 23(3), sec. 4: ``expm([[-F, G], [0, F']] dt) = [[., Phi^-1 Qd], [0, Phi']]``.

    Returns
    -------
    transition : numpy.ndarray
        ``Phi = expm(F dt)``.
    covariance : numpy.ndarray
        ``Qd = int_0^dt expm(F t) G expm(F' t) dt``.
    """
    F = np.asarray(drift, dtype=float)
    G = np.asarray(intensity, dtype=float)
    n = F.shape[0]
    M = np.zeros((2 * n, 2 * n))
    M[:n, :n] = -F
    M[:n, n:] = G
    M[n:, n:] = F.T
    E = expm(M * dt)
    Phi = E[n:, n:].T
    Qd = Phi @ E[:n, n:]
    return Phi, 0.5 * (Qd + Qd.T)


def _input_matrix(drift: np.ndarray, B: np.ndarray, dt: float) -> np.ndarray:
    """``int_0^dt expm(F t) dt @ B`` (zero-order hold), from one augmented exponential."""
    n, k = B.shape
    M = np.zeros((n + k, n + k))
    M[:n, :n] = drift
    M[:n, n:] = B
    return expm(M * dt)[:n, n:]


# --------------------------------------------------------------------------- model


class LinearSystem:
    """Linear state-space model with white or smooth noise.

    ``x' = A x + B u + w``; ``y_k = C x(k dt) + z_k`` every ``dt`` seconds.

    Parameters
    ----------
    A : array_like, (n, n)
        Drift matrix.
    C : array_like, (m, n)
        Observation matrix.
    Q : array_like, (n, n)
        Intensity of ``w``: spectral density at zero frequency (covariance per second of the
        integrated noise). Symmetric positive semi-definite; singular allowed.
    R : array_like, (m, m)
        Per-sample covariance of ``z_k``; symmetric positive definite.
    dt : float
        Sample interval in seconds, > 0.
    B : array_like, (n, k), optional
        Input matrix; ``u`` is held constant between samples.
    smoothness : float
        ``s`` in seconds, >= 0. ``0``: white ``w`` and independent ``z_k``. ``s > 0``: both are
        smooth (Gaussian autocorrelation ``exp(-h^2 / (4 s^2))``), ``w`` with variance
        ``Q / (2 sqrt(pi) s)`` and ``z`` with variance ``R``.
    """

    def __init__(
        self,
        A: np.ndarray,
        C: np.ndarray,
        Q: np.ndarray,
        R: np.ndarray,
        dt: float,
        B: np.ndarray | None = None,
        smoothness: float = 0.0,
    ) -> None:
        self.A = _matrix("A", A, (None, None))
        n = self.A.shape[0]
        if self.A.shape != (n, n):
            raise ValueError(f"A must be square, got shape {self.A.shape}")
        self.C = _matrix("C", C, (None, n))
        m = self.C.shape[0]
        self.Q = _matrix("Q", Q, (n, n))
        self.R = _matrix("R", R, (m, m))
        self._Q_factor = _psd_factor("Q", self.Q, definite=False)
        self._R_factor = _psd_factor("R", self.R, definite=True)
        try:
            dt_f = float(dt)
        except (TypeError, ValueError):
            raise ValueError(f"dt must be a number of seconds > 0, got {dt!r}") from None
        if not (np.isfinite(dt_f) and dt_f > 0):
            raise ValueError(f"dt must be a finite number of seconds > 0, got {dt!r}")
        self.dt = dt_f
        self.B = None if B is None else _matrix("B", B, (n, None))
        try:
            s = float(smoothness)
        except (TypeError, ValueError):
            raise ValueError(
                f"smoothness must be a number of seconds >= 0, got {smoothness!r}"
            ) from None
        if not (np.isfinite(s) and s >= 0):
            raise ValueError(f"smoothness must be a finite number of seconds >= 0, got {s!r}")
        self.smoothness = s

    @property
    def n_states(self) -> int:
        """Dimension ``n`` of ``x``."""
        return self.A.shape[0]

    @property
    def n_outputs(self) -> int:
        """Dimension ``m`` of ``y``."""
        return self.C.shape[0]

    @property
    def n_inputs(self) -> int:
        """Dimension ``k`` of ``u`` (0 without ``B``)."""
        return 0 if self.B is None else self.B.shape[1]

    def discretised(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """White-noise discretisation over ``dt``: ``(expm(A dt), Qd, Bd)`` (Van Loan 1978)."""
        Ad, Qd = van_loan_discretisation(self.A, self.Q, self.dt)
        Bd = (
            np.zeros((self.n_states, 0))
            if self.B is None
            else _input_matrix(self.A, self.B, self.dt)
        )
        return Ad, Qd, Bd

    def _check_inputs(self, u: np.ndarray | None, T: int) -> np.ndarray:
        k = self.n_inputs
        if u is None:
            return np.zeros((T, k))
        if self.B is None:
            raise ValueError("u must be None for a system without B")
        uu = np.asarray(u, dtype=float)
        if uu.ndim == 1 and k == 1:
            uu = uu[:, None]
        if uu.shape != (T, k):
            raise ValueError(f"u must have shape {(T, k)}, got {uu.shape}")
        if not np.all(np.isfinite(uu)):
            raise ValueError("u must be finite (no NaN or inf)")
        return uu

    def simulate(
        self,
        T: int,
        rng: np.random.Generator,
        x0: np.ndarray | None = None,
        u: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Draw ``T`` samples of states and observations from the model.

        White noise (``s = 0``): the exact discretisation ``x_{k+1} = expm(A dt) x_k + Bd u_k +
        w_k``, ``w_k ~ N(0, Qd)`` by Van Loan's method, ``z_k ~ N(0, R)`` independent. Smooth
        noise (``s > 0``): ``w`` is drawn with :func:`blanket.noise.smooth_noise` on a grid of
        ``ceil(4 dt / s)`` sub-steps per sample (held over each sub-step, the state advanced
        exactly) and ``z`` with ``smooth_noise`` at the sample rate. If ``s < dt / 16`` the
        process noise is indistinguishable from white at the sample rate and is drawn as white.

        Parameters
        ----------
        T : int
            Number of samples (``x[0] = x0``).
        rng : numpy.random.Generator
        x0 : array_like, (n,), optional
            Initial state, zeros by default.
        u : array_like, (T, k), optional
            Inputs; ``u[k]`` is held over ``[k dt, (k + 1) dt)``.

        Returns
        -------
        x : numpy.ndarray, (T, n)
        y : numpy.ndarray, (T, m)
        """
        if int(T) != T or T < 1:
            raise ValueError(f"T must be a whole number >= 1, got {T!r}")
        T = int(T)
        if not isinstance(rng, np.random.Generator):
            raise ValueError("rng must be a numpy.random.Generator")
        n, m = self.n_states, self.n_outputs
        x_init = np.zeros(n) if x0 is None else np.asarray(x0, dtype=float).reshape(-1)
        if x_init.shape != (n,) or not np.all(np.isfinite(x_init)):
            raise ValueError(f"x0 must be a finite vector of length {n}")
        uu = self._check_inputs(u, T)
        s = self.smoothness
        x = np.zeros((T, n))
        x[0] = x_init
        n_sub = int(np.ceil(4.0 * self.dt / s)) if s > 0 else 0
        if s == 0 or n_sub > _SUBSTEPS_MAX:
            Ad, Qd, Bd = self.discretised()
            L = _psd_factor("Qd", Qd, definite=False)
            w = rng.standard_normal((T, L.shape[1])) @ L.T
            for k in range(1, T):
                x[k] = Ad @ x[k - 1] + Bd @ uu[k - 1] + w[k]
        else:
            h = self.dt / n_sub
            Ah = expm(self.A * h)
            Gh = _input_matrix(self.A, np.eye(n), h)
            Bu = uu @ self.B.T if self.B is not None else np.zeros((T, n))
            w = smooth_noise(
                rng, (T - 1) * n_sub, h, s, covariance=smooth_variance_from_intensity(self.Q, s)
            )
            xc = x_init.copy()
            for k in range(1, T):
                for j in range(n_sub):
                    xc = Ah @ xc + Gh @ (Bu[k - 1] + w[(k - 1) * n_sub + j])
                x[k] = xc
        if s == 0:
            z = rng.standard_normal((T, m)) @ self._R_factor.T
        else:
            z = smooth_noise(rng, T, self.dt, s, covariance=self.R)
        return x, x @ self.C.T + z


# --------------------------------------------------------------------------- kernels


def laplace_update(
    prior_mean: np.ndarray,
    prior_covariance: np.ndarray,
    observation_matrix: np.ndarray,
    y: np.ndarray,
    sensory_covariance: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, float, float]:
    """One Gauss-Newton step on the Laplace free energy of a linear-Gaussian observation.

    ``F(x) = 1/2 e_y' P_y e_y + 1/2 e_p' P_p e_p`` with ``e_y = y - H x``, ``e_p = x - m``,
    ``P_p = inv(prior_covariance)``, ``P_y = inv(sensory_covariance)``. The step from ``m``,
    ``-inv(H' P_y H + P_p) (-H' P_y e_y)``, is computed in the equivalent covariance form
    ``m + K e_y`` with ``K = Sigma H' inv(H Sigma H' + R)`` (matrix inversion lemma), so it is
    exact and needs neither precision to be finite. This is the Kalman update (Kalman 1960,
    J Basic Eng) read as free-energy minimisation (Friston 2008, PLoS Comput Biol, eq. 9). The
    covariance uses the Joseph form.

    Returns
    -------
    mean : numpy.ndarray
        Posterior mean (the minimiser of ``F``).
    covariance : numpy.ndarray
        Inverse curvature of ``F`` (the Laplace posterior covariance).
    free_energy : float
        ``1/2 e'inv(S)e - 1/2 ln|inv(S)|`` for the prediction error ``e = y - H m`` and
        ``S = H Sigma H' + R``: the minimised free energy of this sample (the negative log
        evidence up to the constant ``m/2 ln(2 pi)``).
    normalized_error : float
        ``e' inv(S) e``, chi-square with ``len(y)`` degrees of freedom under the model.
    """
    m = np.asarray(prior_mean, dtype=float)
    Sig = np.asarray(prior_covariance, dtype=float)
    H = np.asarray(observation_matrix, dtype=float)
    R = np.asarray(sensory_covariance, dtype=float)
    e = np.asarray(y, dtype=float) - H @ m
    S = H @ Sig @ H.T + R
    S = 0.5 * (S + S.T)
    S_inv = np.linalg.inv(S)
    S_inv = 0.5 * (S_inv + S_inv.T)
    K = Sig @ H.T @ S_inv
    mean = m + K @ e
    IKH = np.eye(m.size) - K @ H
    cov = IKH @ Sig @ IKH.T + K @ R @ K.T
    cov = 0.5 * (cov + cov.T)
    return mean, cov, free_energy([e], [S_inv]), normalized_error(e, S_inv)


def static_posterior_mean(
    prior_mean: np.ndarray,
    prior_covariance: np.ndarray,
    C: np.ndarray,
    R: np.ndarray,
    y: np.ndarray,
    tol: float = 1e-12,
    max_iter: int = 200_000,
) -> np.ndarray:
    """Fixed point of plain gradient descent on the free energy of a static Gaussian problem.

    ``F(x) = 1/2 sum_k (y_k - C x)' inv(R) (y_k - C x) + 1/2 (x - m)' inv(P0) (x - m)``, descended
    as ``x <- x - eta dF/dx`` with ``eta = 1 / lambda_max(curvature)`` (gradient from
    :func:`blanket.free_energy.belief_gradient`) until the step is below ``tol`` relative to
    ``|x|``. At the fixed point the belief is the linear-Gaussian posterior mean.

    Parameters
    ----------
    prior_mean : array_like, (n,)
    prior_covariance : array_like, (n, n), positive definite
    C : array_like, (m, n)
    R : array_like, (m, m), positive definite
    y : array_like, (K, m) or (m,)
        Independent observations of the same ``x``.
    """
    m0 = np.asarray(prior_mean, dtype=float).reshape(-1)
    n = m0.size
    P0 = _matrix("prior_covariance", prior_covariance, (n, n))
    _psd_factor("prior_covariance", P0, definite=True)
    Cm = _matrix("C", C, (None, n))
    Rm = _matrix("R", R, (Cm.shape[0], Cm.shape[0]))
    _psd_factor("R", Rm, definite=True)
    yy = np.atleast_2d(np.asarray(y, dtype=float))
    if yy.shape[1] != Cm.shape[0] or not np.all(np.isfinite(yy)):
        raise ValueError(f"y must be finite with {Cm.shape[0]} columns, got shape {yy.shape}")
    P_prior = np.linalg.inv(P0)
    P_y = np.linalg.inv(Rm)
    jac = [np.eye(n)] + [-Cm] * yy.shape[0]
    precs = [P_prior] + [P_y] * yy.shape[0]
    eta = 1.0 / float(np.max(np.linalg.eigvalsh(belief_curvature(jac, precs))))
    x = m0.copy()
    for _ in range(int(max_iter)):
        errs = [x - m0] + [yk - Cm @ x for yk in yy]
        step = eta * belief_gradient(errs, jac, precs)
        x = x - step
        if np.linalg.norm(step) <= tol * max(1.0, float(np.linalg.norm(x))):
            return x
    raise ValueError(f"max_iter={max_iter} too small: gradient descent did not converge")


# --------------------------------------------------------------------------- filter


@dataclass
class FilterResult:
    """Output of :func:`run_filter`; arrays indexed by sample.

    Attributes
    ----------
    time_s : (T,) sample times ``k dt``.
    means : (T, n) order-0 belief means (posterior after sample k).
    generalized_means : (T, order + 1, n) belief means of ``x, x', ..., x^(order)``.
    covariances : (T, n, n) posterior covariance of ``x``.
    free_energy : (T,) free energy of each sample at the belief's minimum (see
        :func:`laplace_update`).
    normalized_error : (T,) ``e' P e`` of each sample's sensory prediction error.
    order : embedding order. smoothness : ``s`` in seconds used by the model.
    """

    time_s: np.ndarray
    means: np.ndarray
    generalized_means: np.ndarray
    covariances: np.ndarray
    free_energy: np.ndarray
    normalized_error: np.ndarray
    order: int
    smoothness: float

    def to_pandas(self):  # -> pandas.DataFrame
        """Table with columns ``time_s``, ``mean_x<i>``, ``sd_x<i>``, ``mean_x<i>_order<j>``
        (``j >= 1``), ``free_energy``, ``normalized_error``."""
        import pandas as pd

        n = self.means.shape[1]
        cols: dict[str, np.ndarray] = {"time_s": self.time_s}
        for i in range(n):
            cols[f"mean_x{i}"] = self.means[:, i]
            cols[f"sd_x{i}"] = np.sqrt(np.clip(self.covariances[:, i, i], 0.0, None))
        for j in range(1, self.order + 1):
            for i in range(n):
                cols[f"mean_x{i}_order{j}"] = self.generalized_means[:, j, i]
        cols["free_energy"] = self.free_energy
        cols["normalized_error"] = self.normalized_error
        return pd.DataFrame(cols)


def _generalized_model(system: LinearSystem, order: int):
    """Drift, noise intensity, input and observation matrices of the belief state ``Z``."""
    n, m = system.n_states, system.n_outputs
    s = system.smoothness
    B = system.B if system.B is not None else np.zeros((n, 0))
    if s == 0 or order == 0:
        prior_cov_noise = np.zeros((0, 0))
        return system.A, system.Q, B, system.C, np.zeros((m, m)), prior_cov_noise, None
    q = order - 1
    M1, c1 = gauss_markov_closure(q, 1.0)  # time in units of s; coordinates v^(j) s^j
    Lw = system._Q_factor / np.sqrt(2.0 * np.sqrt(np.pi) * s)  # Lw Lw' = Q / (2 sqrt(pi) s)
    Lz = system._R_factor  # Lz Lz' = R
    r = Lw.shape[1]
    nw, nz = (q + 1) * r, (q + 1) * m
    N = n + nw + nz
    F = np.zeros((N, N))
    G = np.zeros((N, N))
    F[:n, :n] = system.A
    F[:n, n : n + r] = Lw
    F[n : n + nw, n : n + nw] = np.kron(M1 / s, np.eye(r))
    G[n + q * r : n + nw, n + q * r : n + nw] = (c1 / s) * np.eye(r)
    F[n + nw :, n + nw :] = np.kron(M1 / s, np.eye(m))
    G[n + nw + q * m :, n + nw + q * m :] = (c1 / s) * np.eye(m)
    Bz = np.zeros((N, B.shape[1]))
    Bz[:n] = B
    H = np.zeros((m, N))
    H[:, :n] = system.C
    H[:, n + nw : n + nw + m] = Lz
    S1 = temporal_covariance(q, 1.0)
    prior_noise = np.zeros((nw + nz, nw + nz))
    prior_noise[:nw, :nw] = np.kron(S1, np.eye(r))
    prior_noise[nw:, nw:] = np.kron(S1, np.eye(m))
    return F, G, Bz, H, None, prior_noise, (Lw, r)


def run_filter(
    system: LinearSystem,
    y: np.ndarray,
    u: np.ndarray | None = None,
    order: int = 2,
    x0: np.ndarray | None = None,
    P0: np.ndarray | None = None,
    *,
    white_sensory_fraction: float = _SENSORY_FLOOR,
) -> FilterResult:
    """Run the generalized filter (module docstring) over a record of observations.

    Parameters
    ----------
    system : LinearSystem
        Generative model (its ``smoothness`` sets the noise model).
    y : array_like, (T, m) (or (T,) for m = 1)
        Observations, one per ``dt``; must be finite (NaN raises ValueError).
    u : array_like, (T, k), optional
        Inputs; ``u[k]`` acts over ``[k dt, (k + 1) dt)``.
    order : int
        Embedding order ``p`` in ``[0, MAX_ORDER]``: generalized means up to ``x^(p)``; for
        ``s > 0`` the belief carries the generalized coordinates of both noises up to ``p - 1``.
    x0 : array_like, (n,), optional
        Prior mean of ``x`` at ``t = 0`` (zeros by default).
    P0 : array_like, (n, n), optional
        Prior covariance of ``x`` at ``t = 0`` (identity by default).
    white_sensory_fraction : float
        For ``s > 0`` and ``order >= 1``: a white sensory-noise part of covariance
        ``fraction * R`` added to the smooth one, in (0, 1]. The default ``1e-10`` is a numerical
        floor (the model as stated). Larger values trade accuracy under a correct ``s`` for
        robustness when ``s`` is overestimated: measured on a 2-state oscillator with true
        ``s = 10`` samples and model ``s = 40`` samples, order 6 RMSE went from 134x to 1.2x the
        best white KF with ``1e-2``, while the matched-model ratio rose from 0.85 to 0.90.

    Returns
    -------
    FilterResult
    """
    if not isinstance(system, LinearSystem):
        raise ValueError("system must be a blanket.estimation.LinearSystem")
    if isinstance(order, bool) or int(order) != order or not 0 <= order <= MAX_ORDER:
        raise ValueError(f"order must be a whole number in [0, {MAX_ORDER}], got {order!r}")
    p = int(order)
    n, m = system.n_states, system.n_outputs
    yy = np.asarray(y, dtype=float)
    if yy.ndim == 1 and m == 1:
        yy = yy[:, None]
    if yy.ndim != 2 or yy.shape[1] != m or yy.shape[0] < 1:
        raise ValueError(f"y must have shape (T, {m}) with T >= 1, got {np.shape(y)}")
    if not np.all(np.isfinite(yy)):
        raise ValueError("y must be finite: NaN/inf samples are not accepted")
    T = yy.shape[0]
    uu = system._check_inputs(u, T)
    mean_x0 = np.zeros(n) if x0 is None else np.asarray(x0, dtype=float).reshape(-1)
    if mean_x0.shape != (n,) or not np.all(np.isfinite(mean_x0)):
        raise ValueError(f"x0 must be a finite vector of length {n}")
    cov_x0 = np.eye(n) if P0 is None else _matrix("P0", P0, (n, n))
    _psd_factor("P0", cov_x0, definite=True)

    frac = float(white_sensory_fraction)
    if not (np.isfinite(frac) and 0.0 < frac <= 1.0):
        raise ValueError(
            f"white_sensory_fraction must be in (0, 1], got {white_sensory_fraction!r}"
        )
    F, G, Bz, H, R_y, prior_noise, noise = _generalized_model(system, p)
    R_y = system.R if noise is None else frac * system.R
    N = F.shape[0]
    Phi, Qd = van_loan_discretisation(F, G, system.dt)
    Bd = _input_matrix(F, Bz, system.dt) if Bz.shape[1] else np.zeros((N, 0))

    mean = np.zeros(N)
    mean[:n] = mean_x0
    cov = np.zeros((N, N))
    cov[:n, :n] = cov_x0
    cov[n:, n:] = prior_noise

    means_z = np.zeros((T, N))
    covs = np.zeros((T, n, n))
    fe = np.zeros(T)
    ne = np.zeros(T)
    for k in range(T):
        if k:
            # Laplace-propagated prior: mean and covariance through the exact discretisation.
            mean = Phi @ mean + Bd @ uu[k - 1]
            cov = Phi @ cov @ Phi.T + Qd
        mean, cov, fe[k], ne[k] = laplace_update(mean, cov, H, yy[k], R_y)
        means_z[k] = mean
        covs[k] = cov[:n, :n]

    # Generalized means: x^(j+1) = A x^(j) + B u^(j) + w^(j); w^(j) = Lw v^(j) / s^j.
    gm = np.zeros((T, p + 1, n))
    gm[:, 0] = means_z[:, :n]
    Bu = uu @ system.B.T if system.B is not None else np.zeros((T, n))
    for j in range(p):
        nxt = gm[:, j] @ system.A.T + (Bu if j == 0 else 0.0)
        if noise is not None:
            Lw, r = noise
            v = means_z[:, n + j * r : n + (j + 1) * r]
            nxt = nxt + (v @ Lw.T) / system.smoothness**j
        gm[:, j + 1] = nxt
    return FilterResult(
        time_s=system.dt * np.arange(T),
        means=gm[:, 0].copy(),
        generalized_means=gm,
        covariances=covs,
        free_energy=fe,
        normalized_error=ne,
        order=p,
        smoothness=system.smoothness,
    )
