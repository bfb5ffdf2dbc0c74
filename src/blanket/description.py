"""Static descriptions an env hands to an agent: what a robot builder would know.

An agent may read an env's :class:`ArmDescription` (URDF, limits, camera, noise settings,
rates) and its observations, never the simulator's state. Every field is fixed for the
life of the env (targets and true states travel in observations and ``info``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = [
    "CameraDescription",
    "ArmDescription",
    "pinhole_projection",
    "compiled_pinhole_projection",
]

_COMPILED: dict[str, Any] = {}


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
        return self.project_with_jacobian(point_base)[0]

    def project_with_jacobian(self, point_base: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Pixel ``(u, v)`` of a base-frame point and ``d(u, v)/d(point)``, shape (2, 3)."""
        return compiled_pinhole_projection()(
            self.base_from_camera,
            self.fx_px,
            self.fy_px,
            self.cx_px,
            self.cy_px,
            np.asarray(point_base, dtype=float),
        )

    def project_jacobian(self, point_base: np.ndarray) -> np.ndarray:
        """Jacobian ``d(u, v) / d(point_base)``, shape (2, 3), of :meth:`project`."""
        return self.project_with_jacobian(point_base)[1]


def pinhole_projection(
    base_from_camera: np.ndarray,
    fx: float,
    fy: float,
    cx: float,
    cy: float,
    point: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Pinhole projection of a base-frame point and its Jacobian (pure; numba-compilable).

    With the camera pose ``(R, t)`` (``base_from_camera``), the point in the camera frame is
    ``p_c = R' (x - t)`` and its pixel ``u = fx x_c / z_c + cx``, ``v = fy y_c / z_c + cy``
    (Hartley & Zisserman 2004, *Multiple View Geometry*, 2nd ed., eq. 6.1 and sec. 6.1); the
    Jacobian is ``d(u, v)/dx = [[fx / z_c, 0, -fx x_c / z_c^2], [0, fy / z_c, -fy y_c / z_c^2]]
    R'``. Written with scalars only so that numba compiles it: the camera sensor and the
    agent (its kernel and its numpy step) all call :func:`compiled_pinhole_projection`.

    Returns
    -------
    pixel : numpy.ndarray
        ``(u, v)``, shape (2,).
    jacobian : numpy.ndarray
        ``d(u, v) / d(point)``, shape (2, 3).
    """
    T = base_from_camera
    d0 = point[0] - T[0, 3]
    d1 = point[1] - T[1, 3]
    d2 = point[2] - T[2, 3]
    x = T[0, 0] * d0 + T[1, 0] * d1 + T[2, 0] * d2
    y = T[0, 1] * d0 + T[1, 1] * d1 + T[2, 1] * d2
    z = T[0, 2] * d0 + T[1, 2] * d1 + T[2, 2] * d2
    pixel = np.empty(2)
    pixel[0] = fx * x / z + cx
    pixel[1] = fy * y / z + cy
    iz = 1.0 / z
    a = fx * iz  # d u / d x_c
    b = -fx * x * iz * iz  # d u / d z_c
    c = fy * iz  # d v / d y_c
    d = -fy * y * iz * iz  # d v / d z_c
    jacobian = np.empty((2, 3))
    for col in range(3):
        jacobian[0, col] = a * T[col, 0] + b * T[col, 2]
        jacobian[1, col] = c * T[col, 1] + d * T[col, 2]
    return pixel, jacobian


def compiled_pinhole_projection() -> Any:
    """:func:`pinhole_projection` compiled by numba (on first use; cached on disk).

    One compiled function for the camera sensor and the agent: about 1 us a call from
    Python, and callable from other compiled code. numba is imported only here, so an env
    without a camera never loads it.
    """
    if "pinhole" not in _COMPILED:
        from numba import njit

        _COMPILED["pinhole"] = njit(cache=True)(pinhole_projection)
    return _COMPILED["pinhole"]


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
