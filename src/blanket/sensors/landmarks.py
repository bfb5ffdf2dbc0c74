"""Onboard camera that reports the bearing (and optionally the range) of known landmarks.

The camera sits on the base's x axis, ``camera_offset_m`` ahead of the base origin, looking
forward. For a landmark at ``l = (lx, ly)`` and a base pose ``(x, y, h)`` the camera is at
``c = (x + d cos h, y + d sin h)`` and

    bearing = wrap(atan2(ly - cy, lx - cx) - h),     range = |l - c|,

the usual range-bearing observation model of planar localisation (Thrun, Burgard & Fox 2005,
*Probabilistic Robotics*, eq. 6.40, with the sensor offset). The formulas and their Jacobians
live in :mod:`blanket.planar_motion`, shared with the agent, and are re-exported here.

A landmark is seen when its bearing lies within half the field of view, its range is within
``max_range_m`` and the straight ray from the lens to it (at lens height) hits the landmark
first (occlusion by benches is tested with pybullet's ``rayTestBatch``). Frames arrive at
``rate_hz``; each carries independent Gaussian noise on bearing and range.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from blanket.errors import ConfigError
from blanket.planar_motion import (
    bearing_range,
    bearing_range_jacobian,
    camera_position,
    wrap_angle,
)

__all__ = [
    "camera_position",
    "bearing_range",
    "bearing_range_jacobian",
    "in_field_of_view",
    "LandmarkSensor",
]


def in_field_of_view(
    bearing_rad: np.ndarray, range_m: np.ndarray, fov_rad: float, max_range_m: float
) -> np.ndarray:
    """Boolean mask of landmarks inside the horizontal field of view and the range limit."""
    b = np.asarray(bearing_rad, dtype=float)
    r = np.asarray(range_m, dtype=float)
    return (np.abs(b) <= fov_rad / 2.0) & (r <= max_range_m) & (r > 1e-6)


class LandmarkSensor:
    """Simulated landmark camera with its own frame rate, noise and occlusion.

    Parameters
    ----------
    client : pybullet_utils.bullet_client.BulletClient
        The env's physics client (used only for occlusion rays).
    landmarks_m : numpy.ndarray
        Known landmark positions, shape ``(L, 2)``.
    landmark_body_ids : sequence of int
        Body id of each landmark in the simulation (a ray hitting it first means "seen").
    robot_body_id : int
        The robot's own body (hits on it never occlude).
    fov_rad, max_range_m : float
        Horizontal field of view (0, 2 pi] and maximum range (> 0).
    bearing_noise_rad : float
        Bearing noise standard deviation (>= 0).
    range_noise_m : float or None
        Range noise standard deviation (>= 0), or None for a bearing-only camera.
    rate_hz, control_hz : float
        Frame rate and the env's control rate; frames arrive every
        ``round(control_hz / rate_hz)`` control steps, starting with the reset.
    camera_offset_m, camera_height_m : float
        Lens position ahead of the base origin and above the floor.
    """

    def __init__(
        self,
        client: Any,
        landmarks_m: np.ndarray,
        landmark_body_ids: Sequence[int],
        robot_body_id: int,
        fov_rad: float,
        max_range_m: float,
        bearing_noise_rad: float,
        range_noise_m: float | None,
        rate_hz: float,
        control_hz: float,
        camera_offset_m: float,
        camera_height_m: float,
    ) -> None:
        if not (0 < fov_rad <= 2 * np.pi):
            raise ConfigError(f"camera_fov_rad must be in (0, 2 pi], got {fov_rad!r}")
        if not (max_range_m > 0):
            raise ConfigError(f"camera_range_m must be > 0 m, got {max_range_m!r}")
        if not (bearing_noise_rad >= 0):
            raise ConfigError(f"bearing_noise_rad must be >= 0 rad, got {bearing_noise_rad!r}")
        if range_noise_m is not None and not (range_noise_m >= 0):
            raise ConfigError(f"range_noise_m must be >= 0 m or None, got {range_noise_m!r}")
        if not (0 < rate_hz <= control_hz):
            raise ConfigError(f"camera_hz must be in (0, control_hz={control_hz}], got {rate_hz!r}")
        self.client = client
        self.landmarks_m = np.asarray(landmarks_m, dtype=float).reshape(-1, 2)
        self.landmark_body_ids = list(landmark_body_ids)
        self.robot_body_id = int(robot_body_id)
        self.fov_rad = float(fov_rad)
        self.max_range_m = float(max_range_m)
        self.bearing_noise_rad = float(bearing_noise_rad)
        self.range_noise_m = None if range_noise_m is None else float(range_noise_m)
        self.period_steps = max(1, int(round(control_hz / rate_hz)))
        self.camera_offset_m = float(camera_offset_m)
        self.camera_height_m = float(camera_height_m)

    def is_frame_step(self, step_index: int) -> bool:
        """True when a frame arrives at this control step (step 0 is the reset)."""
        return step_index % self.period_steps == 0

    def occluded(self, pose: np.ndarray) -> np.ndarray:
        """Mask of landmarks whose ray from the lens hits something else first."""
        c = camera_position(pose, self.camera_offset_m)
        z = self.camera_height_m
        starts = [[c[0], c[1], z]] * len(self.landmarks_m)
        ends = [[lx, ly, z] for lx, ly in self.landmarks_m]
        hits = self.client.rayTestBatch(starts, ends)
        out = np.zeros(len(self.landmarks_m), dtype=bool)
        for i, hit in enumerate(hits):
            body = hit[0]
            out[i] = body not in (-1, self.landmark_body_ids[i], self.robot_body_id)
        return out

    def read(self, pose: np.ndarray, rng: np.random.Generator) -> dict[str, np.ndarray]:
        """One frame from the true pose: noisy bearings, ranges and the visibility mask.

        Returns
        -------
        dict
            ``bearing_rad`` (L,), ``range_m`` (L,) (zeros for a bearing-only camera) and
            ``visible`` (L,) int8. Values of unseen landmarks are NaN (the env keeps their
            last value).
        """
        b, r = bearing_range(pose, self.landmarks_m, self.camera_offset_m)
        visible = in_field_of_view(b, r, self.fov_rad, self.max_range_m)
        if visible.any():
            visible &= ~self.occluded(pose)
        nb = b + self.bearing_noise_rad * rng.standard_normal(b.shape)
        if self.range_noise_m is None:
            nr = np.zeros_like(r)
        else:
            nr = np.maximum(r + self.range_noise_m * rng.standard_normal(r.shape), 0.0)
        nb = np.where(visible, wrap_angle(nb), np.nan)
        nr = np.where(visible, nr, np.nan)
        return {"bearing_rad": nb, "range_m": nr, "visible": visible.astype(np.int8)}
