"""A fixed pinhole camera that reports noisy pixel coordinates of named points.

The camera does not render: it projects known 3-D points with the pinhole model of
:class:`blanket.description.CameraDescription` (Hartley & Zisserman 2004, "Multiple View
Geometry in Computer Vision", 2nd ed., eq. 6.1 / 6.7, with the OpenCV axis convention:
x right, y down, z along the optical axis), checks the field of view and asks a
line-of-sight callback (a ray test in the simulator) whether something blocks the point.
Frames come at the camera's own rate; between frames, and when a point is not seen, the
reported pixel keeps its last value.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from blanket.description import CameraDescription
from blanket.errors import ConfigError

__all__ = [
    "CameraFrame",
    "PointCamera",
    "look_at",
    "pinhole_camera",
    "in_view",
    "frame_period_steps",
    "opengl_matrices",
]

#: Points closer than this in front of the camera are treated as behind it (m).
NEAR_M = 0.01


def look_at(
    eye_m: np.ndarray, target_m: np.ndarray, up: np.ndarray = (0.0, 0.0, 1.0)
) -> np.ndarray:
    """4x4 pose of a camera at ``eye_m`` looking at ``target_m`` (OpenCV camera axes).

    The optical axis z points at the target, x is ``z cross up`` (image right) and y is
    ``z cross x`` (image down).
    """
    eye = np.asarray(eye_m, dtype=float)
    z = np.asarray(target_m, dtype=float) - eye
    if np.linalg.norm(z) == 0.0:
        raise ConfigError("camera: eye and target must differ")
    z /= np.linalg.norm(z)
    x = np.cross(z, np.asarray(up, dtype=float))
    if np.linalg.norm(x) < 1e-9:
        raise ConfigError("camera: up direction must not be parallel to the viewing direction")
    x /= np.linalg.norm(x)
    y = np.cross(z, x)
    pose = np.eye(4)
    pose[:3, 0], pose[:3, 1], pose[:3, 2], pose[:3, 3] = x, y, z, eye
    return pose


def pinhole_camera(
    base_from_camera: np.ndarray,
    width_px: int = 640,
    height_px: int = 480,
    vertical_fov_rad: float = np.deg2rad(60.0),
    rate_hz: float = 30.0,
    pixel_noise_px: float = 2.0,
) -> CameraDescription:
    """A square-pixel camera with its principal point at the image centre.

    Pixel coordinates follow the convention that pixel ``(i, j)`` spans ``[i, i + 1)``, so its
    centre is at ``i + 0.5``; the image centre is then ``(width / 2, height / 2)`` and
    ``fy = (height / 2) / tan(fov / 2)`` (common practice, no source).
    """
    if not (isinstance(width_px, int | np.integer) and width_px > 0):
        raise ConfigError(f"camera width_px: must be a positive integer, got {width_px}")
    if not (isinstance(height_px, int | np.integer) and height_px > 0):
        raise ConfigError(f"camera height_px: must be a positive integer, got {height_px}")
    if not 0.0 < vertical_fov_rad < np.pi:
        raise ConfigError(f"camera vertical_fov_rad: must be in (0, pi), got {vertical_fov_rad}")
    if not (np.isfinite(rate_hz) and rate_hz > 0.0):
        raise ConfigError(f"camera_hz: must be > 0, got {rate_hz}")
    if not (np.isfinite(pixel_noise_px) and pixel_noise_px >= 0.0):
        raise ConfigError(f"camera_noise_px: must be >= 0, got {pixel_noise_px}")
    focal = 0.5 * height_px / np.tan(0.5 * vertical_fov_rad)
    return CameraDescription(
        width_px=int(width_px),
        height_px=int(height_px),
        fx_px=float(focal),
        fy_px=float(focal),
        cx_px=0.5 * width_px,
        cy_px=0.5 * height_px,
        base_from_camera=np.array(base_from_camera, dtype=float),
        rate_hz=float(rate_hz),
        pixel_noise_px=float(pixel_noise_px),
    )


def in_view(camera: CameraDescription, point_m: np.ndarray) -> tuple[np.ndarray, bool]:
    """Projected pixel of a base-frame point and whether it lies in the image, in front.

    Returns ``(pixel, inside)``; ``pixel`` is NaN when the point is behind the camera.
    """
    pose = camera.base_from_camera
    depth = float(pose[:3, 2] @ (np.asarray(point_m, dtype=float) - pose[:3, 3]))
    if depth < NEAR_M:
        return np.full(2, np.nan), False
    pixel = camera.project(point_m)
    inside = bool(0.0 <= pixel[0] < camera.width_px and 0.0 <= pixel[1] < camera.height_px)
    return pixel, inside


def opengl_matrices(
    camera: CameraDescription, near_m: float = 0.02, far_m: float = 20.0
) -> tuple[list[float], list[float]]:
    """pybullet view and projection matrices (column-major, 16 floats) for ``camera``.

    The view matrix is the inverse of the camera pose with its axes turned to OpenGL's
    (x right, y up, z backwards); the projection maps the intrinsics to normalized device
    coordinates so that rendered pixel ``(u, v)`` matches :meth:`CameraDescription.project`
    (common practice, no source; checked against ``computeProjectionMatrixFOV`` in the tests).
    """
    gl_from_cv = np.diag([1.0, -1.0, -1.0, 1.0])
    world_from_gl = np.asarray(camera.base_from_camera, dtype=float) @ gl_from_cv
    view = np.linalg.inv(world_from_gl)
    w, h = camera.width_px, camera.height_px
    proj = np.zeros((4, 4))
    proj[0, 0] = 2.0 * camera.fx_px / w
    proj[0, 2] = 1.0 - 2.0 * camera.cx_px / w
    proj[1, 1] = 2.0 * camera.fy_px / h
    proj[1, 2] = 2.0 * camera.cy_px / h - 1.0
    proj[2, 2] = -(far_m + near_m) / (far_m - near_m)
    proj[2, 3] = -2.0 * far_m * near_m / (far_m - near_m)
    proj[3, 2] = -1.0
    # Column-major: the row-major flattening of the transpose.
    return view.T.flatten().tolist(), proj.T.flatten().tolist()


def frame_period_steps(control_hz: float, camera_hz: float) -> int:
    """Control steps between camera frames: ``round(control_hz / camera_hz)``, at least 1."""
    return max(1, int(round(control_hz / camera_hz)))


@dataclass(frozen=True)
class CameraFrame:
    """What the camera reports at one control step.

    Attributes
    ----------
    pixel_px : dict of str to numpy.ndarray
        Last seen (noisy) pixel of each watched point, shape (2,).
    visible : dict of str to bool
        Whether each point was seen in the latest frame.
    fresh : bool
        Whether a new frame arrived at this step.
    """

    pixel_px: dict[str, np.ndarray]
    visible: dict[str, bool]
    fresh: bool


class PointCamera:
    """Fixed camera watching named points, at its own frame rate.

    Parameters
    ----------
    camera : CameraDescription
        Intrinsics, pose, rate and pixel noise.
    control_hz : float
        Rate at which :meth:`observe` is called; a frame arrives every
        ``round(control_hz / camera.rate_hz)`` calls (the first at :meth:`reset`).
    line_of_sight : callable ``(name, point_m) -> bool``
        Whether the ray from the camera centre reaches the named point unblocked.
    """

    def __init__(
        self,
        camera: CameraDescription,
        control_hz: float,
        line_of_sight: Callable[[str, np.ndarray], bool],
    ) -> None:
        self.camera = camera
        self.period_steps = frame_period_steps(control_hz, camera.rate_hz)
        self._line_of_sight = line_of_sight
        self._steps = 0
        self._pixel: dict[str, np.ndarray] = {}
        self._visible: dict[str, bool] = {}

    @property
    def centre_m(self) -> np.ndarray:
        """Camera centre in the base frame."""
        return self.camera.base_from_camera[:3, 3].copy()

    def reset(self, points_m: Mapping[str, np.ndarray], rng: np.random.Generator) -> CameraFrame:
        """Start a new episode: take a frame now; unseen points report the principal point."""
        self._steps = 0
        principal = np.array([self.camera.cx_px, self.camera.cy_px])
        self._pixel = {name: principal.copy() for name in points_m}
        self._visible = dict.fromkeys(points_m, False)
        return self._take(points_m, rng)

    @property
    def pixel_px(self) -> dict[str, np.ndarray]:
        """Last seen (noisy) pixel of each watched point (the camera's own arrays: copy them
        to keep them; a frame replaces, never changes, them)."""
        return self._pixel

    @property
    def visible(self) -> dict[str, bool]:
        """Whether each point was seen in the latest frame (the camera's own dict)."""
        return self._visible

    def advance(self, points_m: Mapping[str, np.ndarray], rng: np.random.Generator) -> bool:
        """Advance one control step, taking a frame when one is due; whether one was taken.

        The cheap form of :meth:`observe` for an env that reads :attr:`pixel_px` and
        :attr:`visible` itself: no per-step copies, no ray test between frames.
        """
        self._steps += 1
        if self._steps % self.period_steps == 0:
            self._update(points_m, rng)
            return True
        return False

    def observe(self, points_m: Mapping[str, np.ndarray], rng: np.random.Generator) -> CameraFrame:
        """Advance one control step; take a frame when one is due."""
        fresh = self.advance(points_m, rng)
        return CameraFrame(
            pixel_px={k: v.copy() for k, v in self._pixel.items()},
            visible=dict(self._visible),
            fresh=fresh,
        )

    def _take(self, points_m: Mapping[str, np.ndarray], rng: np.random.Generator) -> CameraFrame:
        self._update(points_m, rng)
        return CameraFrame(
            pixel_px={k: v.copy() for k, v in self._pixel.items()},
            visible=dict(self._visible),
            fresh=True,
        )

    def _update(self, points_m: Mapping[str, np.ndarray], rng: np.random.Generator) -> None:
        noise = self.camera.pixel_noise_px
        for name, point in points_m.items():
            pixel, inside = in_view(self.camera, point)
            seen = inside and self._line_of_sight(name, np.asarray(point, dtype=float))
            # Draw the noise for every point in every frame so the random stream does not
            # depend on visibility.
            draw = rng.normal(0.0, 1.0, size=2) * noise
            if seen:
                self._pixel[name] = pixel + draw
            self._visible[name] = bool(seen)
