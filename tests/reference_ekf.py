"""A textbook extended Kalman filter for arm joint states, and a recorder of agent runs.

The EKF is the reference the arm agent's estimation is measured against; it shares no code
with the agent's filter. State ``x = (q, q')`` (2n); the motion model is the discretized
continuous white-noise acceleration (constant velocity) model,

    x_k = F x_{k-1} + w,   F = [[I, dt I], [0, I]],
    Q = q_a [[dt^3/3, dt^2/2], [dt^2/2, dt]] kron I

(Bar-Shalom, Li & Kirubarajan 2001, *Estimation with Applications to Tracking and
Navigation*, sec. 6.2.2, eq. 6.2.2-12). Measurements: encoder angles ``q + v_q``, encoder
velocities ``q' + v_v``, the tool tip's pixel ``pi(fk(q)) + v_px`` on fresh frames where
the tip is visible (linearised with ``d pi / d q = d pi / d x  J(q)``), and, in the
``command`` variant, the last velocity command as a measurement of ``q'``. The update is the
EKF update with the Joseph-form covariance (Bar-Shalom et al. 2001, sec. 10.3.2 and eq.
5.2.3-18; Simon 2006, *Optimal State Estimation*, sec. 13.2).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["ArmEkf", "Recording", "record_run", "run_ekf", "best_ekf", "rmse"]


@dataclass
class Recording:
    """What an agent saw, commanded and believed in one episode, plus the truth.

    Row ``k`` of each array belongs to observation ``k`` (``k = 0`` is the reset one):
    ``command[k]`` is the command applied in the step that produced observation ``k`` (zero
    for ``k = 0``), ``belief[k]`` the agent's order-0 belief after processing it.
    """

    dt: float
    joint_angle: np.ndarray
    joint_velocity: np.ndarray
    tip_pixel: np.ndarray
    camera_on: np.ndarray
    command: np.ndarray
    true_angle: np.ndarray
    belief: np.ndarray
    success: bool
    diagnostics: list[dict[str, Any]] = field(default_factory=list, repr=False)


def record_run(
    env: Any, agent: Any, seed: int, keep_diagnostics: bool = False, steps: int | None = None
) -> Recording:
    """Run one episode of ``agent`` on ``env`` and record sensations, commands and beliefs."""
    obs, info = env.reset(seed=seed)
    agent.reset()
    dt = 1.0 / env.unwrapped.description.control_hz
    rows: dict[str, list] = {k: [] for k in ("q", "v", "px", "cam", "u", "true", "belief")}
    diags = []
    command = np.zeros(len(obs["joint_angle_rad"]))
    success = False
    k = 0
    while True:
        rows["q"].append(np.array(obs["joint_angle_rad"], dtype=float))
        rows["v"].append(np.array(obs["joint_velocity_rad_s"], dtype=float))
        rows["px"].append(np.array(obs["tip_pixel_px"], dtype=float))
        rows["cam"].append(bool(obs["camera_fresh"]) and bool(obs["tip_visible"]))
        rows["u"].append(command.copy())
        rows["true"].append(np.array(info["external"]["joint_angle_rad"], dtype=float))
        action = agent.act(obs)
        diag = agent.diagnostics()
        rows["belief"].append(np.array(diag["belief"][0], dtype=float))
        if keep_diagnostics:
            diags.append(diag)
        command = np.clip(action, env.action_space.low, env.action_space.high)
        obs, _r, terminated, truncated, info = env.step(action)
        success = success or bool(info.get("success", False))
        k += 1
        if terminated or truncated or (steps is not None and k >= steps):
            break
    return Recording(
        dt=dt,
        joint_angle=np.array(rows["q"]),
        joint_velocity=np.array(rows["v"]),
        tip_pixel=np.array(rows["px"]),
        camera_on=np.array(rows["cam"]),
        command=np.array(rows["u"]),
        true_angle=np.array(rows["true"]),
        belief=np.array(rows["belief"]),
        success=success,
        diagnostics=diags,
    )


class ArmEkf:
    """Extended Kalman filter on ``(q, q')`` with encoder, camera and command measurements.

    Parameters
    ----------
    body : blanket.body.ArmModel
        Forward kinematics and tip Jacobian.
    camera : blanket.description.CameraDescription or None
        The fixed camera (``project_with_jacobian``).
    dt : float
        Step (s).
    acceleration_intensity : float
        ``q_a`` of the white-noise acceleration model (rad^2 / s^3).
    angle_sd, velocity_sd, pixel_sd : float
        Measurement noise standard deviations.
    command_sd : float or None
        Standard deviation of the command as a measurement of ``q'``; None ignores commands.
    """

    def __init__(
        self,
        body: Any,
        camera: Any,
        dt: float,
        acceleration_intensity: float,
        angle_sd: float,
        velocity_sd: float,
        pixel_sd: float,
        command_sd: float | None = None,
    ) -> None:
        self.body = body
        self.camera = camera
        self.dt = dt
        self.q_a = float(acceleration_intensity)
        self.r_angle = angle_sd**2
        self.r_velocity = velocity_sd**2
        self.r_pixel = pixel_sd**2
        self.r_command = None if command_sd is None else command_sd**2

    def _matrices(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        dt, eye = self.dt, np.eye(n)
        F = np.block([[eye, dt * eye], [np.zeros((n, n)), eye]])
        Qt = self.q_a * np.array([[dt**3 / 3.0, dt**2 / 2.0], [dt**2 / 2.0, dt]])
        return F, np.kron(Qt, eye)

    def run(self, rec: Recording) -> np.ndarray:
        """Filtered joint angles for every observation of ``rec``, shape (steps, n)."""
        n = rec.joint_angle.shape[1]
        F, Q = self._matrices(n)
        eye2 = np.eye(2 * n)
        x = np.concatenate([rec.joint_angle[0], rec.joint_velocity[0]])
        P = np.diag(np.concatenate([np.full(n, self.r_angle), np.full(n, self.r_velocity)]))
        out = np.empty((len(rec.joint_angle), n))
        H_enc = np.eye(2 * n)
        R_enc = np.diag(np.concatenate([np.full(n, self.r_angle), np.full(n, self.r_velocity)]))
        H_cmd = np.hstack([np.zeros((n, n)), np.eye(n)])
        for k in range(len(rec.joint_angle)):
            if k > 0:
                x = F @ x
                P = F @ P @ F.T + Q
            # stacked measurement: encoders, then the command and the camera when present
            Hs, rs, ys, hs = [H_enc], [np.diag(R_enc)], [], []
            ys.append(np.concatenate([rec.joint_angle[k], rec.joint_velocity[k]]))
            hs.append(x.copy())
            if self.r_command is not None and k > 0:
                Hs.append(H_cmd)
                rs.append(np.full(n, self.r_command))
                ys.append(rec.command[k])
                hs.append(x[n:])
            if self.camera is not None and rec.camera_on[k]:
                tip, J = self.body.tip_position_and_jacobian(x[:n])
                pix, dpix = self.camera.project_with_jacobian(tip)
                Hs.append(np.hstack([dpix @ J, np.zeros((2, n))]))
                rs.append(np.full(2, self.r_pixel))
                ys.append(rec.tip_pixel[k])
                hs.append(pix)
            H = np.vstack(Hs)
            R = np.diag(np.concatenate(rs))
            nu = np.concatenate(ys) - np.concatenate(hs)
            S = H @ P @ H.T + R
            K = np.linalg.solve(S, H @ P).T  # P H' inv(S), S symmetric
            x = x + K @ nu
            A = eye2 - K @ H
            P = A @ P @ A.T + K @ R @ K.T  # Joseph form
            out[k] = x[:n]
        self.covariance = P
        return out


def rmse(estimate: np.ndarray, truth: np.ndarray) -> float:
    """Root mean square error over every step and joint."""
    return float(np.sqrt(np.mean((np.asarray(estimate) - np.asarray(truth)) ** 2)))


def run_ekf(rec: Recording, description: Any, body: Any, **kwargs: Any) -> np.ndarray:
    """Run an :class:`ArmEkf` with the env's nominal noise levels on ``rec``."""
    cam = description.camera
    ekf = ArmEkf(
        body,
        cam,
        rec.dt,
        angle_sd=description.encoder_angle_noise_rad,
        velocity_sd=description.encoder_velocity_noise_rad_s,
        pixel_sd=cam.pixel_noise_px if cam is not None else 1.0,
        **kwargs,
    )
    return ekf.run(rec)


def best_ekf(
    recordings: Sequence[Recording],
    description: Any,
    body: Any,
    intensities: Sequence[float],
    command_sds: Sequence[float | None] = (None,),
) -> tuple[float, Mapping[str, Any]]:
    """Smallest RMSE over a grid of process-noise intensities (and command noise levels).

    The RMSE is pooled over all ``recordings``: one tuning for all of them, as a user would
    tune a filter, chosen with the truth (so the reference is at its best).
    """
    best = (np.inf, {})
    for q_a in intensities:
        for c_sd in command_sds:
            sq = 0.0
            count = 0
            for rec in recordings:
                est = run_ekf(rec, description, body, acceleration_intensity=q_a, command_sd=c_sd)
                sq += float(np.sum((est - rec.true_angle) ** 2))
                count += est.size
            value = float(np.sqrt(sq / count))
            if value < best[0]:
                best = (value, {"acceleration_intensity": q_a, "command_sd": c_sd})
    return best
