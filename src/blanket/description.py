"""Static descriptions an env hands to an agent: what a robot builder would know.

An agent may read an env's :class:`ArmDescription` (URDF, limits, camera, noise settings,
rates) and its observations, never the simulator's state. Every field is fixed for the
life of the env (targets and true states travel in observations and ``info``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["CameraDescription", "ArmDescription"]


@dataclass(frozen=True)
class CameraDescription:
    """A fixed pinhole camera (OpenCV convention: x right, y down, z along the optical axis).

    Attributes
    ----------
    width_px, height_px : int
        Image size in pixels.
    fx_px, fy_px, cx_px, cy_px : float
        Intrinsics in pixels (focal lengths and principal point).
    base_from_camera : numpy.ndarray
        4x4 homogeneous pose of the camera frame in the robot's base frame.
    rate_hz : float
        Frame rate; frames arrive every ``round(control_hz / rate_hz)`` control steps.
    pixel_noise_px : float
        Standard deviation of the Gaussian pixel noise, per axis.
    """

    width_px: int
    height_px: int
    fx_px: float
    fy_px: float
    cx_px: float
    cy_px: float
    base_from_camera: np.ndarray
    rate_hz: float
    pixel_noise_px: float

    def project(self, point_base: np.ndarray) -> np.ndarray:
        """Pixel coordinates ``(u, v)`` of a point given in the base frame."""
        R = self.base_from_camera[:3, :3]
        t = self.base_from_camera[:3, 3]
        pc = R.T @ (np.asarray(point_base, dtype=float) - t)
        return np.array(
            [self.fx_px * pc[0] / pc[2] + self.cx_px, self.fy_px * pc[1] / pc[2] + self.cy_px]
        )

    def project_with_jacobian(self, point_base: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Pixel ``(u, v)`` of a base-frame point and ``d(u, v)/d(point)``, shape (2, 3)."""
        R = self.base_from_camera[:3, :3]
        pc = (np.asarray(point_base, dtype=float) - self.base_from_camera[:3, 3]) @ R
        x, y, z = pc
        iz = 1.0 / z
        fx, fy = self.fx_px, self.fy_px
        pixel = np.array([fx * x * iz + self.cx_px, fy * y * iz + self.cy_px])
        dpix = np.array([[fx * iz, 0.0, -fx * x * iz * iz], [0.0, fy * iz, -fy * y * iz * iz]])
        return pixel, dpix @ R.T

    def project_jacobian(self, point_base: np.ndarray) -> np.ndarray:
        """Jacobian ``d(u, v) / d(point_base)``, shape (2, 3), of :meth:`project`."""
        R = self.base_from_camera[:3, :3]
        t = self.base_from_camera[:3, 3]
        pc = R.T @ (np.asarray(point_base, dtype=float) - t)
        x, y, z = pc
        dpix_dpc = np.array(
            [
                [self.fx_px / z, 0.0, -self.fx_px * x / (z * z)],
                [0.0, self.fy_px / z, -self.fy_px * y / (z * z)],
            ]
        )
        return dpix_dpc @ R.T


@dataclass(frozen=True)
class ArmDescription:
    """What an agent may know of an arm env, fixed for the env's life.

    Attributes
    ----------
    urdf_path : str
        Absolute path of the URDF the simulation loaded.
    end_effector : str
        URDF link name of the tool tip.
    joint_names : tuple of str
        Controlled (movable, non-fixed) joints, in action and observation order.
    lower_rad, upper_rad : numpy.ndarray
        Joint position limits in force (soft limits where the URDF gives them).
    velocity_limit_rad_s, torque_limit_n_m : numpy.ndarray
        Command limits in force (the action-space bounds in the matching control mode).
    control : str
        ``"velocity"`` (action = joint velocity, rad/s) or ``"torque"`` (action = N m).
    control_hz : float
        Control (and encoder) rate.
    encoder_angle_noise_rad, encoder_velocity_noise_rad_s : float
        Standard deviations of the encoder noise.
    camera : CameraDescription or None
        The fixed camera, or None when the env has none.
    gravity_m_s2 : numpy.ndarray
        Gravity in the base frame.
    episode_s, tolerance_m : float
        Episode length and success tolerance of the task.
    """

    urdf_path: str
    end_effector: str
    joint_names: tuple[str, ...]
    lower_rad: np.ndarray
    upper_rad: np.ndarray
    velocity_limit_rad_s: np.ndarray
    torque_limit_n_m: np.ndarray
    control: str
    control_hz: float
    encoder_angle_noise_rad: float
    encoder_velocity_noise_rad_s: float
    camera: CameraDescription | None
    gravity_m_s2: np.ndarray = field(default_factory=lambda: np.array([0.0, 0.0, -9.81]))
    episode_s: float = 4.0
    tolerance_m: float = 0.01

    @property
    def n_joints(self) -> int:
        return len(self.joint_names)

    @property
    def control_dt(self) -> float:
        return 1.0 / self.control_hz
