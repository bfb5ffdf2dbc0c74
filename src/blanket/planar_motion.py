"""Planar motion geometry shared by the world side and the agent side (pure functions).

Both the simulated sensors (odometry, the landmark camera) and the agent's body model need the
same few formulas of a base moving on the floor; they live here so that neither side imports
the other. Nothing here touches a simulator or holds state.

Conventions
-----------
- The pose is ``(x_m, y_m, heading_rad)`` of the base frame in the world (floor) frame; the
  heading is measured from the world +x axis, counter-clockwise positive, wrapped to
  ``[-pi, pi)``.
- Wheel speeds are ordered ``(left, right)`` in rad/s; a positive speed rolls the base forward.
- Body velocity is ``(v, omega)``: forward speed (m/s) and yaw rate (rad/s).

The differential-drive relations are those of Siegwart, Nourbakhsh & Scaramuzza, *Introduction
to Autonomous Mobile Robots*, 2nd ed., 2011, sec. 3.2; the range-bearing observation model is
that of Thrun, Burgard & Fox 2005, *Probabilistic Robotics*, eq. 6.40, with a sensor offset.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "wrap_angle",
    "body_velocity",
    "wheel_speeds",
    "pose_rate",
    "integrate_pose",
    "camera_position",
    "bearing_range",
    "bearing_range_jacobian",
    "segment_hits_box",
]


def wrap_angle(angle: np.ndarray | float) -> np.ndarray | float:
    """Wrap angles to ``[-pi, pi)`` (so a heading error of 350 degrees becomes -10 degrees).

    ``wrap(a) = ((a + pi) mod 2 pi) - pi``.
    """
    wrapped = (np.asarray(angle, dtype=float) + np.pi) % (2.0 * np.pi) - np.pi
    return float(wrapped) if np.ndim(wrapped) == 0 else wrapped


def body_velocity(
    wheel_speed_rad_s: np.ndarray, wheel_radius_m: float, track_m: float
) -> tuple[np.ndarray | float, np.ndarray | float]:
    """Forward speed and yaw rate from ``(left, right)`` wheel speeds.

    ``v = r (w_R + w_L) / 2``, ``omega = r (w_R - w_L) / track`` (Siegwart et al. 2011, sec. 3.2).

    Parameters
    ----------
    wheel_speed_rad_s : numpy.ndarray
        Shape ``(..., 2)``, ``(left, right)``.
    wheel_radius_m, track_m : float
        Wheel radius and (effective) track.

    Returns
    -------
    (numpy.ndarray or float, numpy.ndarray or float)
        ``v`` (m/s) and ``omega`` (rad/s), each of shape ``(...)``.
    """
    w = np.asarray(wheel_speed_rad_s, dtype=float)
    v = wheel_radius_m * (w[..., 1] + w[..., 0]) / 2.0
    omega = wheel_radius_m * (w[..., 1] - w[..., 0]) / track_m
    return v, omega


def wheel_speeds(
    v_m_s: np.ndarray | float,
    omega_rad_s: np.ndarray | float,
    wheel_radius_m: float,
    track_m: float,
) -> np.ndarray:
    """Inverse of :func:`body_velocity`: ``w_L, w_R = (v -+ omega T / 2) / r``.

    Returns
    -------
    numpy.ndarray
        Shape ``(..., 2)``, ``(left, right)``.
    """
    v = np.asarray(v_m_s, dtype=float)
    om = np.asarray(omega_rad_s, dtype=float)
    left = (v - om * track_m / 2.0) / wheel_radius_m
    right = (v + om * track_m / 2.0) / wheel_radius_m
    return np.stack([left, right], axis=-1)


def pose_rate(
    pose: np.ndarray, v_m_s: float, omega_rad_s: float, lateral_m_s: float = 0.0
) -> np.ndarray:
    """World-frame pose rate ``(x', y', heading')`` of a base moving with body velocity.

    ``x' = v cos(h) - u sin(h)``, ``y' = v sin(h) + u cos(h)``, ``heading' = omega`` with ``u`` the
    lateral (body y) speed, zero for an ideal differential drive (Siegwart et al. 2011, eq. 3.9).
    """
    h = float(np.asarray(pose, dtype=float)[2])
    c, s = np.cos(h), np.sin(h)
    return np.array([v_m_s * c - lateral_m_s * s, v_m_s * s + lateral_m_s * c, omega_rad_s])


def integrate_pose(pose: np.ndarray, v_m_s: float, omega_rad_s: float, dt: float) -> np.ndarray:
    """Exact pose after moving with constant ``(v, omega)`` for ``dt`` seconds (a circular arc).

    With ``dh = omega dt`` and radius ``R = v / omega``:
    ``x += R (sin(h + dh) - sin h)``, ``y -= R (cos(h + dh) - cos h)``, ``h += dh``; for
    ``|dh| < 1e-9`` the straight-line limit ``(v dt cos(h + dh/2), v dt sin(h + dh/2))`` is used.
    Heading is wrapped.
    """
    x, y, h = np.asarray(pose, dtype=float)
    dh = omega_rad_s * dt
    if abs(dh) < 1e-9:
        dx = v_m_s * dt * np.cos(h + dh / 2.0)
        dy = v_m_s * dt * np.sin(h + dh / 2.0)
    else:
        radius = v_m_s / omega_rad_s
        dx = radius * (np.sin(h + dh) - np.sin(h))
        dy = -radius * (np.cos(h + dh) - np.cos(h))
    return np.array([x + dx, y + dy, wrap_angle(h + dh)])


def camera_position(pose: np.ndarray, camera_offset_m: float = 0.0) -> np.ndarray:
    """Floor-plane position of a lens ``d`` ahead of the base: ``(x + d cos h, y + d sin h)``."""
    x, y, h = np.asarray(pose, dtype=float)
    return np.array([x + camera_offset_m * np.cos(h), y + camera_offset_m * np.sin(h)])


def bearing_range(
    pose: np.ndarray, landmarks_m: np.ndarray, camera_offset_m: float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """Predicted bearings (rad, wrapped) and ranges (m) of landmarks ``(L, 2)`` from a pose.

    With the lens at ``c`` (:func:`camera_position`):
    ``bearing = wrap(atan2(ly - cy, lx - cx) - h)``, ``range = |l - c|`` (Thrun et al. 2005,
    eq. 6.40, with the sensor offset).
    """
    lm = np.asarray(landmarks_m, dtype=float).reshape(-1, 2)
    c = camera_position(pose, camera_offset_m)
    delta = lm - c
    bearing = wrap_angle(np.arctan2(delta[:, 1], delta[:, 0]) - float(pose[2]))
    rng = np.hypot(delta[:, 0], delta[:, 1])
    return np.atleast_1d(bearing), rng


def bearing_range_jacobian(
    pose: np.ndarray, landmarks_m: np.ndarray, camera_offset_m: float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """Analytic Jacobians of :func:`bearing_range` w.r.t. the pose ``(x, y, h)``.

    With ``delta = l - c`` and ``q = |delta|^2``:
    ``d bearing / d(x, y) = (delta_y, -delta_x) / q``,
    ``d bearing / dh = -d (delta_y sin h + delta_x cos h) / q - 1``,
    ``d range / d(x, y) = -delta / range``,
    ``d range / dh = d (delta_x sin h - delta_y cos h) / range``.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Bearing and range Jacobians, each of shape ``(L, 3)``.
    """
    lm = np.asarray(landmarks_m, dtype=float).reshape(-1, 2)
    h = float(pose[2])
    d = camera_offset_m
    c = camera_position(pose, d)
    dx = lm[:, 0] - c[0]
    dy = lm[:, 1] - c[1]
    q = dx * dx + dy * dy
    rng = np.sqrt(q)
    sh, ch = np.sin(h), np.cos(h)
    jb = np.stack([dy / q, -dx / q, -d * (dy * sh + dx * ch) / q - 1.0], axis=1)
    jr = np.stack([-dx / rng, -dy / rng, d * (dx * sh - dy * ch) / rng], axis=1)
    return jb, jr


def segment_hits_box(p: np.ndarray, q: np.ndarray, box: np.ndarray) -> bool:
    """Whether the segment ``p -> q`` passes through the open box ``(x0, y0, x1, y1)`` (slabs)."""
    t0, t1 = 0.0, 1.0
    d = np.asarray(q, dtype=float) - np.asarray(p, dtype=float)
    for axis in range(2):
        lo, hi = box[axis], box[axis + 2]
        if abs(d[axis]) < 1e-12:
            if not (lo < p[axis] < hi):
                return False
            continue
        ta = (lo - p[axis]) / d[axis]
        tb = (hi - p[axis]) / d[axis]
        if ta > tb:
            ta, tb = tb, ta
        t0, t1 = max(t0, ta), min(t1, tb)
        if t0 >= t1:
            return False
    return True
