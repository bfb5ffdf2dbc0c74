"""The agent's kinematic body model of a differential-drive (or skid-steer) base.

The planar relations both sides need -- ``wrap_angle``, ``body_velocity``, ``wheel_speeds``,
``pose_rate``, ``integrate_pose`` -- live in :mod:`blanket.planar_motion` (the world's sensors
use them too) and are re-exported here; their conventions are stated there: pose
``(x_m, y_m, heading_rad)``, wheel speeds ``(left, right)`` rad/s, body velocity ``(v, omega)``
with ``v = r (w_R + w_L) / 2``, ``omega = r (w_R - w_L) / track`` (Siegwart, Nourbakhsh &
Scaramuzza, *Introduction to Autonomous Mobile Robots*, 2nd ed., 2011, sec. 3.2).

Skid-steer bases (four wheels, no steering) turn by slipping, so their yaw rate is smaller than
the two-wheel relation predicts: we use an *effective track* ``track_eff = factor * track``
(factor >= 1, calibrated by a spin in place) and an offset ``icr_offset_m`` of the line of
instantaneous centres of rotation along the body x axis (Martinez, Mandow, Morales, Pedraza &
Garcia-Cerezo 2005, "Approximating kinematics for tracked mobile robots", Int J Robot Res
24(10)), which gives the base origin a lateral velocity ``-icr_offset_m * omega``. For an ideal
two-wheel base ``factor = 1`` and ``icr_offset_m = 0``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from blanket.errors import ConfigError
from blanket.planar_motion import (
    body_velocity,
    integrate_pose,
    pose_rate,
    wheel_speeds,
    wrap_angle,
)

__all__ = [
    "DiffDriveModel",
    "polar_coordinates",
    # re-exported from blanket.planar_motion (their home since the world side needs them too)
    "wrap_angle",
    "body_velocity",
    "wheel_speeds",
    "pose_rate",
    "integrate_pose",
]


def polar_coordinates(pose: np.ndarray, goal_pose: np.ndarray) -> tuple[float, float, float]:
    """Polar error coordinates of a pose relative to a goal pose.

    ``rho`` is the distance to the goal, ``alpha = wrap(atan2(dy, dx) - heading)`` the bearing of
    the goal seen from the base and ``beta = wrap(goal_heading - heading - alpha)`` the remaining
    rotation once there, as in Astolfi 1999 ("Exponential stabilization of a wheeled mobile robot
    via discontinuous control", J Dyn Syst Meas Control 121) and Siegwart et al. 2011, sec. 3.6.2.4
    (whose ``beta`` is measured against a goal frame at heading zero).
    """
    x, y, h = np.asarray(pose, dtype=float)
    gx, gy, gh = np.asarray(goal_pose, dtype=float)
    dx, dy = gx - x, gy - y
    rho = float(np.hypot(dx, dy))
    alpha = float(wrap_angle(np.arctan2(dy, dx) - h)) if rho > 0 else 0.0
    beta = float(wrap_angle(gh - h - alpha))
    return rho, alpha, beta


@dataclass(frozen=True)
class DiffDriveModel:
    """Kinematic body model of a differential-drive (or skid-steer) base.

    Attributes
    ----------
    wheel_radius_m : float
        Wheel radius (> 0).
    track_m : float
        Effective track used for the yaw rate (> 0): geometric track times the effective-track
        factor for a skid-steer base.
    icr_offset_m : float
        Body-x position of the line of instantaneous centres of rotation (0 for two wheels).
    """

    wheel_radius_m: float
    track_m: float
    icr_offset_m: float = 0.0

    def __post_init__(self) -> None:
        if not (np.isfinite(self.wheel_radius_m) and self.wheel_radius_m > 0):
            raise ConfigError(f"wheel_radius_m must be > 0 m, got {self.wheel_radius_m!r}")
        if not (np.isfinite(self.track_m) and self.track_m > 0):
            raise ConfigError(f"track_m must be > 0 m, got {self.track_m!r}")
        if not np.isfinite(self.icr_offset_m):
            raise ConfigError(f"icr_offset_m must be a finite number, got {self.icr_offset_m!r}")

    def body_velocity(self, wheel_speed_rad_s: np.ndarray) -> tuple[float, float]:
        """``(v, omega)`` from ``(left, right)`` wheel speeds (see :func:`body_velocity`)."""
        v, om = body_velocity(wheel_speed_rad_s, self.wheel_radius_m, self.track_m)
        return float(v), float(om)

    def wheel_speeds(self, v_m_s: float, omega_rad_s: float) -> np.ndarray:
        """``(left, right)`` wheel speeds for a body velocity (see :func:`wheel_speeds`)."""
        return wheel_speeds(v_m_s, omega_rad_s, self.wheel_radius_m, self.track_m)

    def predict_wheel_speeds(self, heading_rad: float, rate: np.ndarray) -> np.ndarray:
        """Wheel speeds implied by a world-frame pose rate ``(x', y', heading')``.

        ``v = cos(h) x' + sin(h) y'`` projects the world velocity on the body x axis; then
        :func:`wheel_speeds`.
        """
        c, s = np.cos(heading_rad), np.sin(heading_rad)
        v = c * rate[0] + s * rate[1]
        return self.wheel_speeds(v, rate[2])

    def predict_wheel_speeds_jacobian(self, heading_rad: float, rate: np.ndarray) -> np.ndarray:
        """Jacobian (2, 4) of :meth:`predict_wheel_speeds` w.r.t. ``(h, x', y', h')``."""
        r, T = self.wheel_radius_m, self.track_m
        c, s = np.cos(heading_rad), np.sin(heading_rad)
        dv = np.array([-s * rate[0] + c * rate[1], c, s, 0.0]) / r
        dom = np.array([0.0, 0.0, 0.0, T / (2.0 * r)])
        return np.stack([dv - dom, dv + dom])

    def lateral_residual(self, heading_rad: float, rate: np.ndarray) -> float:
        """Body-y velocity of the base origin minus what the model allows, ``u + icr * omega``.

        ``u = -sin(h) x' + cos(h) y'``; zero for motion that satisfies the no-side-slip constraint
        (Siegwart et al. 2011, eq. 3.13), shifted by the ICR offset for a skid-steer base.
        """
        c, s = np.cos(heading_rad), np.sin(heading_rad)
        return float(-s * rate[0] + c * rate[1] + self.icr_offset_m * rate[2])

    def lateral_residual_jacobian(self, heading_rad: float, rate: np.ndarray) -> np.ndarray:
        """Jacobian of :meth:`lateral_residual` w.r.t. ``(heading, x', y', heading')``, (4,)."""
        c, s = np.cos(heading_rad), np.sin(heading_rad)
        return np.array([-c * rate[0] - s * rate[1], -s, c, self.icr_offset_m])
