"""Static description a mobile-base env gives an agent: what a robot builder would know.

An agent may read an env's :class:`BaseDescription` (kinematics, limits, camera, noise settings,
rates, the known map of benches and landmarks, the dock pose) and its observations, never the
simulator's state. Every field is fixed for the life of the env.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from blanket.success import HOLD_S

__all__ = ["BaseDescription"]


@dataclass(frozen=True)
class BaseDescription:
    """What an agent may know of a mobile-base env.

    Attributes
    ----------
    robot : str
        ``"rover"`` (two wheels and a caster) or ``"husky"`` (four-wheel skid steer).
    wheel_radius_m : float
        Wheel radius.
    track_m : float
        Geometric track (distance between left and right wheel centres).
    effective_track_m : float
        Track that turns wheel speeds into yaw rate, ``factor * track_m`` (the factor is 1 for
        the rover and calibrated by a spin in place for a skid-steer base).
    icr_offset_m : float
        Body-x position of the instantaneous centres of rotation (0 for the rover).
    wheel_speed_limit_rad_s : float
        Bound of both action components.
    half_length_m, half_width_m : float
        Half extents of the base footprint (for planning clearance).
    control_hz : float
        Control (and odometry) rate.
    wheel_speed_noise_rad_s : float
        Odometry noise standard deviation per wheel.
    use_gyro : bool
        Whether ``yaw_rate_rad_s`` is observed; ``yaw_rate_noise_rad_s`` its noise.
    camera_hz, camera_fov_rad, camera_range_m, camera_offset_m : float
        Landmark-camera rate, horizontal field of view, maximum range and lens position ahead
        of the base origin.
    bearing_noise_rad : float
        Bearing noise standard deviation.
    range_noise_m : float or None
        Range noise standard deviation, or None for a bearing-only camera.
    landmarks_m : numpy.ndarray
        Known landmark (row-end post) positions, shape ``(L, 2)``.
    bench_boxes_m : numpy.ndarray
        Known obstacles as axis-aligned boxes ``(x_min, y_min, x_max, y_max)``, shape ``(n, 4)``.
    world_bounds_m : numpy.ndarray
        ``(x_min, y_min, x_max, y_max)`` of the floor.
    dock_pose : numpy.ndarray
        Goal pose ``(x_m, y_m, heading_rad)``.
    episode_s, success_distance_m, success_heading_rad, success_hold_s : float
        Task settings (the hold time is the one success rule's, :data:`blanket.success.HOLD_S`).
    start_pose : numpy.ndarray or None
        Nominal start ``(x_m, y_m, heading_rad)`` where the layout has one (``"dark-aisle"``),
        else None (starts anywhere in the start regions; the agent localises from posts).
    start_pose_sd : numpy.ndarray or None
        Standard deviations ``(x_m, y_m, heading_rad)`` of the true start around ``start_pose``
        (zeros: exactly there); None when there is no nominal start.
    """

    robot: str
    wheel_radius_m: float
    track_m: float
    effective_track_m: float
    icr_offset_m: float
    wheel_speed_limit_rad_s: float
    half_length_m: float
    half_width_m: float
    control_hz: float
    wheel_speed_noise_rad_s: float
    use_gyro: bool
    yaw_rate_noise_rad_s: float
    camera_hz: float
    camera_fov_rad: float
    camera_range_m: float
    camera_offset_m: float
    bearing_noise_rad: float
    range_noise_m: float | None
    landmarks_m: np.ndarray
    bench_boxes_m: np.ndarray
    world_bounds_m: np.ndarray
    dock_pose: np.ndarray
    episode_s: float
    success_distance_m: float = 0.10
    success_heading_rad: float = float(np.deg2rad(10.0))
    success_hold_s: float = HOLD_S
    start_pose: np.ndarray | None = None
    start_pose_sd: np.ndarray | None = None

    @property
    def n_landmarks(self) -> int:
        return int(len(self.landmarks_m))

    @property
    def control_dt(self) -> float:
        return 1.0 / self.control_hz
