"""Joint encoders: true joint angles and velocities plus white Gaussian noise.

Read at the control rate. The noise comes from the caller's generator (the env's seeded
``np_random``), so a seeded reset replays the same readings.
"""

from __future__ import annotations

import numpy as np

from blanket.errors import ConfigError

__all__ = ["JointEncoders"]


class JointEncoders:
    """Angle and velocity encoders on every controlled joint.

    Parameters
    ----------
    angle_noise_rad : float
        Standard deviation of the angle noise (rad), >= 0.
    velocity_noise_rad_s : float
        Standard deviation of the velocity noise (rad/s), >= 0.
    """

    def __init__(self, angle_noise_rad: float, velocity_noise_rad_s: float) -> None:
        if not (np.isfinite(angle_noise_rad) and angle_noise_rad >= 0.0):
            raise ConfigError(f"encoder_angle_noise_rad: must be >= 0, got {angle_noise_rad}")
        if not (np.isfinite(velocity_noise_rad_s) and velocity_noise_rad_s >= 0.0):
            raise ConfigError(
                f"encoder_velocity_noise_rad_s: must be >= 0, got {velocity_noise_rad_s}"
            )
        self.angle_noise_rad = float(angle_noise_rad)
        self.velocity_noise_rad_s = float(velocity_noise_rad_s)

    def read(
        self, angle_rad: np.ndarray, velocity_rad_s: np.ndarray, rng: np.random.Generator
    ) -> tuple[np.ndarray, np.ndarray]:
        """Noisy readings ``(angle_rad, velocity_rad_s)`` of the true joint state."""
        angle = np.asarray(angle_rad, dtype=float)
        velocity = np.asarray(velocity_rad_s, dtype=float)
        noise = rng.normal(0.0, 1.0, size=(2, angle.size))
        return (
            angle + self.angle_noise_rad * noise[0],
            velocity + self.velocity_noise_rad_s * noise[1],
        )
