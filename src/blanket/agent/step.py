"""One step of the arm agent: predict -> perceive -> act (-> monitor the channels).

:func:`step` ``(model, belief, obs, episode) -> (belief, action, diagnostics)`` is the only
step. Its reference form (``workspace=None``) assembles every term of the
:class:`~blanket.agent.generative_model.GenerativeModel` generically and takes one
Gauss-Newton step on the Laplace free energy of :mod:`blanket.free_energy`; with a
:class:`CompiledWorkspace` the same step runs through the numba backend
(:mod:`blanket.agent._kernel`), user terms included, and gives the same numbers (tested).

Perception (Friston 2008, "Hierarchical models in the brain", PLoS Comput Biol, eqs. 9-10;
Friston et al. 2010, "Generalised filtering", Math Probl Eng, eq. 10 for the Laplace prior):

    z-     = Phi z                                  generalized motion over dt
    Sigma- = Phi Sigma Phi' + W                     its noise (Van Loan 1978)
    F(z)   = 1/2 (z - z-)' inv(Sigma-) (z - z-) + sum_m 1/2 e_m' P_m e_m - 1/2 sum_m ln|P_m|
    H      = inv(Sigma-) + sum_m G_m' P_m G_m       Gauss-Newton curvature at z-
    Sigma  = inv(H)                                 the Laplace covariance
    z      = z- - Sigma dF/dz(z-)                   one Gauss-Newton step

Action descends the same free energy through the predicted sensations (a Newton step, see
:func:`act`).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from scipy.linalg.lapack import dpotrf, dpotrs

from blanket.agent import _kernel
from blanket.agent.attractor import damped_least_squares_attractor
from blanket.agent.belief import Belief, CommandState, EpisodeState, Innovations
from blanket.agent.generative_model import GenerativeModel, StepContext
from blanket.free_energy import belief_curvature, belief_gradient, free_energy
from blanket.model import BodyState, Term

__all__ = [
    "step",
    "predict",
    "act",
    "attractor",
    "evaluate_terms",
    "free_energy_at",
    "CompiledWorkspace",
]

#: Under torque control the attractor's velocity is scaled (direction kept) to at most this
#: fraction of the joints' velocity limits; the rest is room for the velocity loop's
#: overshoot. Own 3-DoF arm, 6 episodes: the safety wrapper clamped 29 % of the commands
#: without the scaling, 14 % with 1.0 and 9.5 % with 0.9, same final errors (measured).
TORQUE_REFERENCE_SPEED_FRACTION = 0.9

_NOT_PD = ("prior covariance", "free-energy curvature", "damped Jacobian product")


def predict(
    model: GenerativeModel,
    belief: Belief,
    change: np.ndarray | None = None,
    tracking: np.ndarray | None = None,
    motion_noise: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Prior mean and covariance of the next step: ``z- = Phi z``, ``Sigma- = Phi Sigma Phi' + W``.

    ``Phi`` the generalized motion over ``dt`` (local linearisation, Ozaki 1992), ``W`` its
    noise (Van Loan 1978, IEEE Trans Autom Control 23(3)), plus under velocity control the
    velocity step of the last change of command ``change`` and of the motors' learned
    tracking variance ``tracking``
    (:meth:`~blanket.agent.generative_model.GenerativeModel.motion_noise_at`); a given
    ``motion_noise`` stands for all of that ``W``.
    """
    z_prior = (model.transition @ belief.generalized).reshape(-1)
    cov_prior = model.transition_full @ belief.covariance @ model.transition_full.T
    if motion_noise is None:
        motion_noise = model.motion_noise_at(
            np.zeros(model.n) if change is None else change, tracking
        )
    cov_prior += motion_noise
    return z_prior, cov_prior


def attractor(
    model: GenerativeModel,
    q: np.ndarray,
    body: BodyState,
    target: np.ndarray,
    target_velocity: np.ndarray,
    home: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """``f(q)`` and ``F = df/dq`` of the goal's attractor (see
    :func:`blanket.agent.attractor.damped_least_squares_attractor`)."""
    n = model.n
    f, F = np.empty(n), np.empty((n, n))
    ok = damped_least_squares_attractor(
        np.ascontiguousarray(body.tip_jacobian, dtype=float),
        np.asarray(body.tip_position_m, dtype=float),
        np.asarray(target, dtype=float),
        target_velocity,
        np.ascontiguousarray(q, dtype=float),
        home,
        model.limits[0],
        model.limits[1],
        model.kernel_constants[4:9],
        f,
        F,
    )
    if not ok:
        raise np.linalg.LinAlgError("damped Jacobian product is not positive definite")
    return f, F


def evaluate_terms(
    model: GenerativeModel,
    obs: Mapping[str, Any],
    z: np.ndarray,
    body: BodyState,
    context: StepContext,
) -> list[tuple[str, Term]]:
    """Every term active at belief ``z`` (shape (order+1, n)): built-in channels, then the
    user's terms; ``(name, Term)`` with ``Term.jacobian = dg/dz`` and a diagonal precision."""
    out = []
    for channel in model.channels:
        t = channel.evaluate(obs, z, body, context)
        if t is not None:
            out.append((channel.name, t))
    for term in model.extra_terms:
        t = term.evaluate(obs, z, body)
        if t is not None:
            out.append((term.name, t))
    return out


def free_energy_at(
    model: GenerativeModel,
    episode: EpisodeState,
    obs: Mapping[str, Any],
    z: np.ndarray,
    prior_mean: np.ndarray | None = None,
    prior_precision: np.ndarray | None = None,
) -> tuple[float, np.ndarray, np.ndarray]:
    """Laplace free energy, its gradient and its Gauss-Newton curvature at belief ``z``.

    ``F = 1/2 dz' Pi dz + sum_m (1/2 e_m' P_m e_m - 1/2 ln|P_m|)``, ``dz = z - prior_mean``;
    ``dF/dz = Pi dz - sum_m G_m' P_m e_m``; ``H = Pi + sum_m G_m' P_m G_m`` (Friston 2008,
    PLoS Comput Biol, eqs. 9-10), every term (and the attractor) evaluated at ``z`` itself,
    with the episode's last command and precisions in force.
    """
    z = np.asarray(z, dtype=float).reshape(-1)
    n = model.n
    q = z[:n]
    body = BodyState(*model.body.tip_position_and_jacobian(q))
    command = episode.command
    f, F = attractor(
        model, q, body, obs["target_position_m"], episode.target.velocity, command.home
    )
    terms = evaluate_terms(
        model, obs, z.reshape(model.order + 1, n), body, _context(model, episode, f, F)
    )
    return _laplace(terms, z, prior_mean, prior_precision)


def _laplace(
    terms: list[tuple[str, Term]],
    z: np.ndarray,
    prior_mean: np.ndarray | None,
    prior_precision: np.ndarray | None,
) -> tuple[float, np.ndarray, np.ndarray]:
    errors = [t.error for _, t in terms]
    jacobians = [-t.jacobian for _, t in terms]  # d e / d z = -dg/dz
    precisions = [np.asarray(t.precision, dtype=float) for _, t in terms]
    # diagonal precisions, given as vectors (the fast form of free_energy.py)
    energy = free_energy(errors, precisions)  # sum 1/2 e'Pe - 1/2 ln|P|      (eq. 9)
    grad = belief_gradient(errors, jacobians, precisions)  # sum J'Pe         (eq. 10)
    curvature = belief_curvature(jacobians, precisions)  # sum J'PJ  (Gauss-Newton)
    if prior_mean is not None and prior_precision is not None:
        dz = z - np.asarray(prior_mean, dtype=float).reshape(-1)
        energy += 0.5 * float(dz @ prior_precision @ dz)  # 1/2 dz' Pi- dz
        grad = grad + prior_precision @ dz  # Pi- dz
        curvature = curvature + prior_precision  # Pi-
    return energy, grad, curvature


def _context(
    model: GenerativeModel, episode: EpisodeState, f, F, command: np.ndarray | None = None
) -> StepContext:
    ch = episode.channels
    precision = {name: ch.effective(name) for name in ch.precision}
    precision["motor"] = ch.motor_precision
    if command is None:
        command = _efference(episode)
    return StepContext(command, precision, f, F)


def _efference(episode: EpisodeState) -> np.ndarray:
    """The efference copy the terms see: the last command less the motors' believed
    tracking bias (:class:`~blanket.agent.belief.MotorBias`)."""
    if episode.bias is None:
        return episode.command.command
    return episode.command.command - episode.bias.mean


class CompiledWorkspace:
    """Scratch buffers of the compiled backend for one model (not state: any step may
    overwrite them). The step swaps its output buffers with the previous belief's arrays,
    so a belief the compiled step replaced must not be kept."""

    def __init__(self, model: GenerativeModel) -> None:
        n, N = model.n, model.size
        self.z_out = np.zeros(N)
        self.cov_out = np.zeros((N, N))
        self.sd_out = np.zeros(N)
        self.cov_prior = np.zeros((N, N))
        self.prior_precision = np.zeros((N, N))
        self.motion_noise = np.zeros((N, N))
        self.f = np.zeros(n)
        self.F = np.zeros((n, n))
        self.g_cam = np.zeros((2, n))
        self.err = np.zeros(4 * n + 2)
        self.vec = np.zeros((2, N))
        self.work = np.zeros((N, 4 * N))
        self.zero2 = np.zeros(2)
        nan2 = np.full(2, np.nan)
        err = self.err
        views = {
            "joint_angle": err[0:n],
            "joint_velocity": err[n : 2 * n],
            "motor": err[2 * n : 3 * n],
            "goal": err[3 * n : 4 * n],
            "camera": err[4 * n : 4 * n + 2],
        }
        names = model.channel_names
        #: error views in the logs' stable layout, with and without a camera frame
        self.log_errors = {
            cam_on: {k: (nan2 if k == "camera" and not cam_on else views[k]) for k in names}
            for cam_on in (False, True)
        }
        self.active_errors = {
            cam_on: {k: views[k] for k in names if k != "camera" or cam_on}
            for cam_on in (False, True)
        }
        self._log_det: dict[str, float] = {}


def _perceive_reference(model, belief, obs, episode, motion_noise=None) -> dict[str, Any]:
    """Prediction and one Gauss-Newton step on F, every term assembled generically.

    Returns a dict (the compiled backend returns the same): ``status`` (a
    :mod:`blanket.agent._kernel` code), ``belief`` (the new one, when ``status`` is OK),
    ``free_energy`` (at ``z-``), ``errors`` (active terms), ``log_errors`` (the logs' stable
    layout), ``cov_prior``, ``g_cam`` (camera Jacobian or None), ``attractor_velocity``,
    ``z_prior`` and ``prior_precision`` (``inv(Sigma-)``). ``motion_noise`` is the ``W`` of
    this step when already built.
    """
    n = model.n
    # z- = Phi z ; Sigma- = Phi Sigma Phi' + W
    z_prior, cov_prior = predict(
        model, belief, episode.command.change, episode.channels.tracking_variance, motion_noise
    )
    chol, info = dpotrf(cov_prior, lower=1, clean=0)
    if info != 0:
        raise np.linalg.LinAlgError("prior covariance is not positive definite")
    prior_precision, _ = dpotrs(chol, np.eye(model.size), lower=1)  # Pi- = inv(Sigma-)
    q = z_prior[:n]
    body = BodyState(*model.body.tip_position_and_jacobian(q))  # fk(q-), J(q-)
    command = episode.command
    f, F = attractor(
        model, q, body, obs["target_position_m"], episode.target.velocity, command.home
    )  # f(q-), df/dq
    terms = evaluate_terms(
        model, obs, z_prior.reshape(belief.shape), body, _context(model, episode, f, F)
    )
    # F, dF/dz and H at z = z- (the prior's own error and gradient vanish there)
    energy, grad, H = _laplace(terms, z_prior, z_prior, prior_precision)
    chol, info = dpotrf(H, lower=1, clean=0)
    if info != 0:
        raise np.linalg.LinAlgError("free-energy curvature is not positive definite")
    cov, _ = dpotrs(chol, np.eye(model.size), lower=1)  # Sigma = inv(H)
    z = z_prior - cov @ grad  # z = z- - Sigma dF/dz
    status = _kernel.OK
    if not (np.isfinite(energy) and np.isfinite(z).all()):
        status = _kernel.NOT_FINITE
    elif np.abs(z[n : 2 * n]).max() > model.options["divergence_limit"]:
        status = _kernel.EXPLODED
    errors = {name: t.error for name, t in terms}
    log_errors = {k: errors.get(k, np.full(2, np.nan)) for k in model.channel_names}
    log_errors.update((k, v) for k, v in errors.items() if k not in log_errors)
    g_cam = next((t.jacobian[:, :n] for name, t in terms if name == "camera"), None)
    return {
        "status": status,
        "belief": Belief(z, cov, belief.shape),
        "free_energy": energy,
        "errors": errors,
        "log_errors": log_errors,
        "cov_prior": cov_prior,
        "g_cam": g_cam,
        "attractor_velocity": f,
        "z_prior": z_prior,
        "prior_precision": prior_precision,
    }


def _perceive_compiled(
    model, belief, obs, episode, ws: CompiledWorkspace, motion_noise=None
) -> dict[str, Any]:
    n, N = model.n, model.size
    channels = episode.channels
    z = belief.mean
    q_prior = model.transition[0] @ belief.generalized
    tip, J = model.body.tip_position_and_jacobian(q_prior)
    cam_on = bool(
        model.camera is not None and obs.get("camera_fresh", 0) and obs.get("tip_visible", 0)
    )
    pq = channels.effective("joint_angle")
    pv = channels.effective("joint_velocity")
    pc = channels.effective("camera")
    pm = channels.motor_precision
    log_errors = ws.log_errors[cam_on]
    errors = ws.active_errors[cam_on]
    log_det_extra = 0.0
    status, energy = _kernel.perception_step(
        z,
        belief.covariance,
        model.transition,
        (
            motion_noise
            if motion_noise is not None
            else model.motion_noise_at(
                episode.command.change, channels.tracking_variance, ws.motion_noise
            )
        ),
        np.asarray(obs["joint_angle_rad"], dtype=float),
        np.asarray(obs["joint_velocity_rad_s"], dtype=float),
        _efference(episode),
        pq,
        pv,
        pm,
        pc,
        tip,
        J,
        cam_on,
        np.asarray(obs["tip_pixel_px"], dtype=float) if cam_on else ws.zero2,
        np.asarray(obs["target_position_m"], dtype=float),
        episode.target.velocity,
        episode.command.home,
        model.camera_pose,
        model.camera_intrinsics,
        model.limits,
        model.goal_mode,
        model.kernel_constants,
        ws.cov_prior,
        ws.prior_precision,
        ws.f,
        ws.F,
        ws.g_cam,
        ws.err,
        ws.vec,
        ws.work,
        not model.extra_terms,
        ws.z_out,
        ws.cov_out,
        ws.sd_out,
    )
    if model.extra_terms and status == _kernel.OK:
        # User terms at the predicted belief z-, added to the kernel's gradient and
        # curvature before the same compiled solve.
        H = ws.work[:, :N]
        grad = ws.vec[1]
        body = BodyState(tip, J)
        zg = ws.vec[0].reshape(belief.shape).copy()
        errors, log_errors = dict(errors), dict(log_errors)
        for term in model.extra_terms:
            t = term.evaluate(obs, zg, body)
            if t is None:
                continue
            P = np.asarray(t.precision, dtype=float)
            gtp = t.jacobian.T * P
            H += gtp @ t.jacobian  # G' P G
            grad -= gtp @ t.error  # -G' P e
            energy += 0.5 * float(t.error @ (P * t.error))
            log_det_extra += float(np.log(P).sum())
            errors[term.name] = log_errors[term.name] = t.error
        status = _kernel.solve(
            ws.work, ws.vec, n, energy, model.kernel_constants[3], ws.z_out, ws.cov_out, ws.sd_out
        )
    if status not in (_kernel.OK, _kernel.NOT_FINITE, _kernel.EXPLODED):
        raise np.linalg.LinAlgError(f"{_NOT_PD[status - 1]} is not positive definite")
    energy -= 0.5 * (_log_det(model, ws, cam_on, pq, pv, pm, pc) + log_det_extra)
    new = None
    if status == _kernel.OK:
        new = Belief(ws.z_out, ws.cov_out, belief.shape, ws.sd_out)
        # the old belief's arrays become the next step's output buffers
        ws.z_out, ws.cov_out = belief.mean, belief.covariance
        ws.sd_out = belief.sd if belief.sd is not None else np.zeros(N)
    return {
        "status": status,
        "belief": new,
        "free_energy": energy,
        "errors": errors,
        "log_errors": log_errors,
        "cov_prior": ws.cov_prior,
        "g_cam": ws.g_cam if cam_on else None,
        "attractor_velocity": ws.f,
        "z_prior": ws.vec[0],
        "prior_precision": ws.prior_precision,
    }


def _log_det(model, ws, cam_on, pq, pv, pm, pc) -> float:
    """``sum ln P`` of the built-in terms (cached while the precisions are fixed)."""
    cached = ws._log_det
    if not cached or model.precision_changing:
        n = model.n
        value = float(np.log(pq).sum() + np.log(pv).sum())
        if model.goal_mode:
            value += n * np.log(model.kernel_constants[1])
        cached["encoders, goal"] = value
        cached["camera"] = float(np.log(pc).sum()) if model.camera is not None else 0.0
    if model.kernel_constants[0] > 0 and ("motor" not in cached or model.motor_learned):
        cached["motor"] = float(np.log(pm).sum())
    motor = cached.get("motor", 0.0) if model.kernel_constants[0] > 0 else 0.0
    return cached["encoders, goal"] + motor + (cached["camera"] if cam_on else 0.0)


def act(model: GenerativeModel, belief: Belief, command: CommandState) -> np.ndarray:
    """Newton step of the action on F through the predicted sensations.

    Velocity control: ``F_a = 1/2 P (y_v(a) - v*)^2`` with ``y_v(a) = a``, so the step is
    ``a += action_fraction (v* - a)``, ``v*`` the believed velocity (``goal="prior"``) or the
    attractor's (``goal="reference"``). Torque control: ``q''(tau) = inv(M)(tau - h)``; the
    Newton step gives ``tau = h + M q''_wanted``, ``q''_wanted = k_v (f - q')`` with the
    attractor's velocity ``f`` scaled into ``TORQUE_REFERENCE_SPEED_FRACTION`` of the
    velocity limits (see
    :func:`blanket.agent.arm.torque_action_free_energy`), less the believed disturbance.
    Clipped to the command limits of the description.
    """
    d = model.description
    opts = model.options
    n = model.n
    z = belief.mean
    q, v = z[:n], z[n : 2 * n]
    frac = opts["action_fraction"]
    f = command.attractor_velocity
    if model.control == "velocity":
        wanted = v if opts["goal"] == "prior" else f
        a = wanted.copy() if frac == 1.0 else command.command + frac * (wanted - command.command)
        lim = d.velocity_limit_rad_s
        return np.minimum(np.maximum(a, -lim, out=a), lim, out=a)
    if opts["goal"] == "prior":
        qdd = z[2 * n : 3 * n]
    else:
        # the reference velocity within the joints' speed limits, its direction kept (as
        # under velocity control, where the command is clipped to them): a reference beyond
        # them only drives the joints into the safety wrapper's velocity limit
        ratio = float(np.max(np.abs(f) / d.velocity_limit_rad_s))
        if ratio > TORQUE_REFERENCE_SPEED_FRACTION:
            f = f * (TORQUE_REFERENCE_SPEED_FRACTION / ratio)
        qdd = opts["velocity_gain_1_s"] * (f - v)
    h = model.body.nonlinear_effects(q, v)
    M = model.body.mass_matrix(q)
    tau = h + M @ qdd
    td = opts["disturbance_time_constant_s"]
    if td > 0:
        # Hidden cause: an unmodelled joint torque d (payload, contact, friction), believed
        # slowly varying. Its prediction error is the gap between the acceleration the
        # velocity belief went through and the forward model's under the last torque,
        # M q'' - (tau_prev - h) (a disturbance observer, Ohnishi, Shibata & Murakami
        # 1996, IEEE/ASME Trans Mech 1(1)).
        if command.last_velocity_belief is not None:
            beta = min(1.0, model.dt / td)
            qdd_seen = (v - command.last_velocity_belief) / model.dt
            seen = M @ qdd_seen - (command.command - h)
            command.disturbance += beta * (seen - command.disturbance)
        command.last_velocity_belief = v.copy()
        tau = tau - command.disturbance
    a = command.command + frac * (tau - command.command)
    return np.clip(a, -d.torque_limit_n_m, d.torque_limit_n_m)


def safe_stop(
    model: GenerativeModel, episode: EpisodeState, reason: str
) -> tuple[np.ndarray, dict[str, Any]]:
    """The agent's own safe stop: zero velocity, or gravity compensation at the last finite
    posture under torque control."""
    episode.safe_stop_reason = reason
    if model.control == "torque":
        action = model.body.gravity_torque(episode.command.last_finite_q)
    else:
        action = np.zeros(model.n)
    return action, {"safe_stop": True, "safe_stop_reason": reason}


def step(
    model: GenerativeModel,
    belief: Belief | None,
    obs: Mapping[str, Any],
    episode: EpisodeState,
    workspace: CompiledWorkspace | None = None,
) -> tuple[Belief, np.ndarray, dict[str, Any]]:
    """predict -> perceive -> act (-> detect faults, learn precisions): one control step.

    ``belief`` None starts the episode from ``obs``. ``episode`` (command, target track,
    channel monitor) is updated in place. ``workspace`` selects the compiled backend.

    Returns ``(belief, action, diagnostics)``; ``diagnostics`` holds ``free_energy``,
    ``prediction_error`` (per channel; views of the workspace on the compiled backend),
    ``safe_stop`` and ``safe_stop_reason``. On a safe stop the belief is returned unchanged.
    """
    if belief is None:
        belief = Belief.from_observation(model, obs, episode.channels.precision)
        episode.command.start(model, obs)
        if workspace is not None and model.guarded:
            workspace._log_det.clear()  # the guard starts each episode at the nominal
    else:
        episode.command.sense_applied(obs)
    episode.target.update(obs["target_position_m"])
    episode.channels.track_motor(obs, episode.command.command)
    bias = episode.bias
    try:
        if episode.channels.pending_inflation is not None:
            episode.channels.inflate(belief)
        W = model.motion_noise_at(
            episode.command.change,
            episode.channels.tracking_variance,
            None if workspace is None else workspace.motion_noise,
        )
        if bias is not None:
            channels = episode.channels
            bias.predict(
                model,
                W,
                channels.tracking_variance,
                channels.precision["joint_velocity"],
                belief.mean[model.n : 2 * model.n],
            )
        if workspace is None:
            out = _perceive_reference(model, belief, obs, episode, W)
        else:
            out = _perceive_compiled(model, belief, obs, episode, workspace, W)
        if bias is not None and out["status"] == _kernel.OK:
            bias.update(
                out["prior_precision"],
                out["belief"],
                out["z_prior"],
                episode.channels.motor_precision,
                out["errors"]["motor"],
            )
    except (np.linalg.LinAlgError, FloatingPointError, ValueError) as exc:
        action, diag = safe_stop(model, episode, f"numerical failure: {exc}")
        return belief, action, diag
    status = out["status"]
    if status == _kernel.NOT_FINITE:
        action, diag = safe_stop(model, episode, "belief or free energy is not finite")
        return belief, action, diag
    if status == _kernel.EXPLODED:
        action, diag = safe_stop(model, episode, "belief velocity exploded")
        return belief, action, diag
    new = out["belief"]
    if model.precision_changing:
        seen = Innovations(out["errors"], out["cov_prior"], out["g_cam"], belief)
        episode.channels.update(seen, new)
    elif model.guarded:
        change = episode.command.change if model.control == "velocity" else None
        if episode.channels.guard(obs, change, out["errors"], out["g_cam"], new):
            if workspace is not None:
                workspace._log_det.clear()  # the precisions' log-determinant changed
    command = episode.command
    command.attractor_velocity = out["attractor_velocity"].copy()
    # a view: the compiled backend reuses this buffer only after the next successful step
    command.last_finite_q = new.mean[: model.n]
    action = act(model, new, command)
    np.subtract(action, command.command, out=command.change)
    command.command = action
    diag = {
        "free_energy": out["free_energy"],
        "prediction_error": out["log_errors"],
        "safe_stop": False,
        "safe_stop_reason": "",
    }
    return new, action, diag
