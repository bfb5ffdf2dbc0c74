"""Wheel odometry: measured wheel speeds (and an optional gyro yaw rate), with noise.

The wheel speeds are the simulated joint speeds of the driven wheels plus white Gaussian noise;
for a skid-steer base the two wheels of each side are averaged. Wheel slip is not modelled here:
it comes from the simulation (the wheels turn, the base slides), which is exactly what an encoder
cannot see. The gyro reports the base's true yaw rate plus white Gaussian noise.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from blanket.errors import ConfigError
from blanket.planar_motion import body_velocity, integrate_pose

__all__ = ["WheelOdometry", "dead_reckoning"]


class WheelOdometry:
    """Encoder wheel speeds and an optional gyro, read from a pybullet body.

    Parameters
    ----------
    client : pybullet_utils.bullet_client.BulletClient
        The env's physics client.
    robot_body_id : int
        The base's body id.
    left_joints, right_joints : sequence of int
        Joint indices of the driven wheels on each side.
    wheel_speed_noise_rad_s : float
        Standard deviation of the wheel-speed noise (>= 0).
    use_gyro : bool
        Whether a yaw-rate gyro is fitted.
    yaw_rate_noise_rad_s : float
        Standard deviation of the gyro noise (>= 0).
    """

    def __init__(
        self,
        client: Any,
        robot_body_id: int,
        left_joints: Sequence[int],
        right_joints: Sequence[int],
        wheel_speed_noise_rad_s: float,
        use_gyro: bool = False,
        yaw_rate_noise_rad_s: float = 0.01,
    ) -> None:
        if not (np.isfinite(wheel_speed_noise_rad_s) and wheel_speed_noise_rad_s >= 0):
            raise ConfigError(
                f"wheel_speed_noise_rad_s must be >= 0 rad/s, got {wheel_speed_noise_rad_s!r}"
            )
        if not (np.isfinite(yaw_rate_noise_rad_s) and yaw_rate_noise_rad_s >= 0):
            raise ConfigError(
                f"yaw_rate_noise_rad_s must be >= 0 rad/s, got {yaw_rate_noise_rad_s!r}"
            )
        self.client = client
        self.robot_body_id = int(robot_body_id)
        self.left_joints = list(left_joints)
        self.right_joints = list(right_joints)
        self.wheel_speed_noise_rad_s = float(wheel_speed_noise_rad_s)
        self.use_gyro = bool(use_gyro)
        self.yaw_rate_noise_rad_s = float(yaw_rate_noise_rad_s)

    def true_wheel_speeds(self) -> np.ndarray:
        """Noise-free ``(left, right)`` wheel speeds (side averages), rad/s."""
        states = self.client.getJointStates(
            self.robot_body_id, self.left_joints + self.right_joints
        )
        speeds = np.array([s[1] for s in states])
        n = len(self.left_joints)
        return np.array([speeds[:n].mean(), speeds[n:].mean()])

    def true_yaw_rate(self) -> float:
        """The base's true yaw rate (world z angular velocity), rad/s."""
        _, ang = self.client.getBaseVelocity(self.robot_body_id)
        return float(ang[2])

    def read(self, rng: np.random.Generator) -> tuple[np.ndarray, float | None]:
        """Noisy wheel speeds ``(left, right)`` and the gyro yaw rate (None without a gyro)."""
        w = self.true_wheel_speeds() + self.wheel_speed_noise_rad_s * rng.standard_normal(2)
        if not self.use_gyro:
            return w, None
        return w, self.true_yaw_rate() + self.yaw_rate_noise_rad_s * float(rng.standard_normal())


def dead_reckoning(
    start_pose: np.ndarray,
    wheel_speed_rad_s: np.ndarray,
    dt: float,
    wheel_radius_m: float,
    track_m: float,
    yaw_rate_rad_s: np.ndarray | None = None,
) -> np.ndarray:
    """Integrate odometry alone into a pose track (exact arcs per sample).

    Parameters
    ----------
    start_pose : numpy.ndarray
        ``(x, y, heading)`` at the first sample.
    wheel_speed_rad_s : numpy.ndarray
        Shape ``(n, 2)``, ``(left, right)`` per control step.
    dt : float
        Sample interval (s).
    wheel_radius_m, track_m : float
        Kinematic parameters (use the effective track for a skid-steer base).
    yaw_rate_rad_s : numpy.ndarray or None
        Gyro yaw rate per step; when given it replaces the wheel-derived yaw rate.

    Returns
    -------
    numpy.ndarray
        Shape ``(n + 1, 3)``: the start pose and the pose after each step.
    """
    w = np.asarray(wheel_speed_rad_s, dtype=float).reshape(-1, 2)
    v, om = body_velocity(w, wheel_radius_m, track_m)
    if yaw_rate_rad_s is not None:
        om = np.asarray(yaw_rate_rad_s, dtype=float).reshape(-1)
    out = np.zeros((len(w) + 1, 3))
    out[0] = start_pose
    for k in range(len(w)):
        out[k + 1] = integrate_pose(out[k], float(v[k]), float(om[k]), dt)
    return out
