"""A camera that renders its frames and finds coloured markers in the pixels.

:class:`RenderedCamera` has the interface of :class:`blanket.sensors.camera.PointCamera`
(``reset``, ``advance``, ``pixel_px``, ``visible``), but each frame is an RGB image (from a
render callback: the env renders the scene headless with pybullet's TinyRenderer) in which
:class:`MarkerDetector` finds each watched marker by its colour and reports the centroid of its
pixels. Its errors come from image formation: the marker's size in pixels, partial occlusion,
the image border. A marker counts as seen when at least :data:`MIN_MARKER_PIXELS` pixels of its
colour were found and none lies on the image border (a cut-off marker's centroid is biased).

The detection error of a whole marker depends on its apparent radius in pixels;
:data:`DETECTION_ERROR_PX` holds it as measured by ``scripts/calibrate_markers.py`` and
:func:`detection_sd_px` reads it, so that the agent's camera precision is measured, not
assumed.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np

from blanket.description import CameraDescription
from blanket.errors import ConfigError
from blanket.sensors.camera import frame_period_steps

__all__ = [
    "MARKER_RADIUS_M",
    "MIN_MARKER_PIXELS",
    "TIP_MARKER_RGBA",
    "TARGET_MARKER_RGBA",
    "TINY_RENDERER_SAMPLE_PX",
    "DETECTION_ERROR_PX",
    "MarkerDetector",
    "RenderedCamera",
    "detection_sd_px",
    "marker_radius_px",
]

#: Radius of the marker spheres at the tool point and on the target (m).
MARKER_RADIUS_M = 0.015
#: Fewest pixels of a marker's colour that count as seeing it.
MIN_MARKER_PIXELS = 4
#: Colour of the tool-point marker (magenta) and of the target marker (green): colours no
#: other part of the scene has, so one threshold separates them.
TIP_MARKER_RGBA = (1.0, 0.0, 1.0, 1.0)
TARGET_MARKER_RGBA = (0.0, 1.0, 0.0, 1.0)
#: A pixel belongs to a marker when its weakest "on" channel exceeds twice its strongest "off"
#: channel by this much (0..255): shading scales the marker's channels, never mixes them in
#: TinyRenderer, and nothing else in the scene comes within 64 of the margin.
COLOUR_MARGIN = 64
#: Where in a pixel TinyRenderer samples the scene, in the camera's convention (pixel ``(i, j)``
#: spans ``[i, i + 1) x [j, j + 1)``): pixel ``(i, j)`` shows the scene at ``(i, j + 1)``. The
#: detected centroid of an unoccluded marker was offset by (+0.505, -0.500) px from the true
#: projection of its centre with pixel centres at ``i + 0.5`` (``scripts/calibrate_markers.py
#: --sample 0.5 0.5``, 1200 frames), so the detector takes the pixel positions at this offset.
TINY_RENDERER_SAMPLE_PX = (0.0, 1.0)

#: Detection error against the marker's apparent radius: ``(radius_px, rms_px)`` rows, the
#: per-axis root mean square error of the detected centroid about the true projection of the
#: marker centre, whole marker, at 320x240, 60 degrees vertical field of view, distances
#: 3.4 .. 0.4 m. Measured with ``python scripts/calibrate_markers.py --frames 400`` (the larger
#: markers err more: their shaded side falls under the colour threshold).
DETECTION_ERROR_PX: tuple[tuple[float, float], ...] = (
    (0.92, 0.159),
    (1.20, 0.125),
    (1.56, 0.117),
    (2.08, 0.101),
    (2.83, 0.091),
    (3.90, 0.079),
    (5.20, 0.093),
    (7.79, 0.152),
)


def marker_radius_px(camera: CameraDescription, distance_m: float, radius_m: float) -> float:
    """Apparent radius (px) of a sphere of ``radius_m`` at ``distance_m`` from the camera
    (pinhole, small-angle: ``f r / d``; common practice, no source)."""
    return float(camera.fy_px * radius_m / max(distance_m, 1e-9))


def detection_sd_px(radius_px: float) -> float:
    """Per-axis detection error (px) of a marker of apparent radius ``radius_px``, linear in
    :data:`DETECTION_ERROR_PX` and held at its ends."""
    table = np.asarray(DETECTION_ERROR_PX)
    return float(np.interp(radius_px, table[:, 0], table[:, 1]))


class MarkerDetector:
    """Finds one colour in RGB(A) frames of a fixed size; buffers are allocated once.

    Parameters
    ----------
    width_px, height_px : int
        Frame size.
    rgba : tuple of float
        The marker's colour; channels >= 0.5 are "on", the others "off" (at least one each).
    min_pixels : int
        Fewest pixels that count as a detection.
    sample_px : (float, float)
        Position inside a pixel at which the renderer samples the scene
        (:data:`TINY_RENDERER_SAMPLE_PX`).
    """

    def __init__(
        self,
        width_px: int,
        height_px: int,
        rgba: tuple[float, ...],
        min_pixels: int = MIN_MARKER_PIXELS,
        sample_px: tuple[float, float] = TINY_RENDERER_SAMPLE_PX,
    ) -> None:
        self.on = tuple(i for i in range(3) if rgba[i] >= 0.5)
        self.off = tuple(i for i in range(3) if rgba[i] < 0.5)
        if not self.on or not self.off:
            raise ConfigError(f"marker rgba: needs on and off channels, got {rgba}")
        self.shape = (int(height_px), int(width_px))
        self.min_pixels = int(min_pixels)
        self._weak = np.empty(self.shape, dtype=np.int16)
        self._strong = np.empty(self.shape, dtype=np.int16)
        self._mask = np.empty(self.shape, dtype=bool)
        self._cols = np.arange(self.shape[1], dtype=float) + float(sample_px[0])
        self._rows = np.arange(self.shape[0], dtype=float) + float(sample_px[1])

    def mask(self, image: np.ndarray) -> np.ndarray:
        """The detector's own boolean mask of the marker's pixels in ``image`` (h, w, >= 3)."""
        weak, strong, mask = self._weak, self._strong, self._mask
        np.copyto(weak, image[:, :, self.on[0]], casting="unsafe")
        for i in self.on[1:]:
            np.minimum(weak, image[:, :, i], out=weak)
        np.copyto(strong, image[:, :, self.off[0]], casting="unsafe")
        for i in self.off[1:]:
            np.maximum(strong, image[:, :, i], out=strong)
        np.left_shift(strong, 1, out=strong)
        np.add(strong, COLOUR_MARGIN, out=strong)
        np.greater_equal(weak, strong, out=mask)
        return mask

    def detect(self, image: np.ndarray) -> tuple[np.ndarray | None, int, bool]:
        """``(centroid, pixel_count, cut_off)``: the sub-pixel centroid ``(u, v)`` of the
        marker's pixels (each at its sample position), or None when fewer than
        ``min_pixels`` were found; ``cut_off`` when some lie on the image border."""
        if image.shape[:2] != self.shape:
            raise ValueError(f"image: expected {self.shape} pixels, got {image.shape[:2]}")
        mask = self.mask(image)
        cols = mask.sum(axis=0)
        count = int(cols.sum())
        if count < self.min_pixels:
            return None, count, False
        rows = mask.sum(axis=1)
        cut_off = bool(cols[0] or cols[-1] or rows[0] or rows[-1])
        centroid = np.array([cols @ self._cols, rows @ self._rows]) / count
        return centroid, count, cut_off


class RenderedCamera:
    """Fixed camera that renders a frame at its own rate and detects coloured markers.

    Parameters
    ----------
    camera : CameraDescription
        Intrinsics (they match the rendered frames), pose, rate; ``pixel_noise_px`` is not
        used here (see ``sensor_noise_px``).
    control_hz : float
        Rate of :meth:`advance` calls; a frame every ``round(control_hz / camera.rate_hz)``.
    render : callable ``() -> numpy.ndarray``
        The current view as an (height, width, 3 or 4) uint8 array.
    markers : mapping of str to rgba
        Watched markers by name and colour.
    sensor_noise_px : float
        Standard deviation (px) of Gaussian noise added to each detected centroid.
    """

    def __init__(
        self,
        camera: CameraDescription,
        control_hz: float,
        render: Callable[[], np.ndarray],
        markers: Mapping[str, tuple[float, ...]],
        sensor_noise_px: float = 0.0,
    ) -> None:
        self.camera = camera
        self.period_steps = frame_period_steps(control_hz, camera.rate_hz)
        self._render = render
        self.detectors = {
            name: MarkerDetector(camera.width_px, camera.height_px, rgba)
            for name, rgba in markers.items()
        }
        self.sensor_noise_px = float(sensor_noise_px)
        self._steps = 0
        self._pixel: dict[str, np.ndarray] = {}
        self._visible: dict[str, bool] = {}
        self.pixel_count: dict[str, int] = {}
        self.last_image: np.ndarray | None = None

    @property
    def centre_m(self) -> np.ndarray:
        """Camera centre in the base frame."""
        return self.camera.base_from_camera[:3, 3].copy()

    @property
    def pixel_px(self) -> dict[str, np.ndarray]:
        """Last detected (noisy) centroid of each marker (the camera's own arrays)."""
        return self._pixel

    @property
    def visible(self) -> dict[str, bool]:
        """Whether each marker was detected in the latest frame (the camera's own dict)."""
        return self._visible

    def reset(self, points_m: Mapping[str, np.ndarray], rng: np.random.Generator) -> None:
        """Start a new episode: take a frame now; unseen markers report the principal point."""
        self._steps = 0
        principal = np.array([self.camera.cx_px, self.camera.cy_px])
        self._pixel = {name: principal.copy() for name in self.detectors}
        self._visible = dict.fromkeys(self.detectors, False)
        self._update(rng)

    def advance(self, points_m: Mapping[str, np.ndarray], rng: np.random.Generator) -> bool:
        """Advance one control step, rendering and detecting when a frame is due."""
        self._steps += 1
        if self._steps % self.period_steps == 0:
            self._update(rng)
            return True
        return False

    def _update(self, rng: np.random.Generator) -> None:
        image = self._render()
        self.last_image = image
        for name, detector in self.detectors.items():
            centroid, count, cut_off = detector.detect(image)
            # one draw per marker per frame, seen or not: the random stream does not depend
            # on what was seen
            draw = rng.normal(0.0, 1.0, size=2) * self.sensor_noise_px
            seen = centroid is not None and not cut_off
            if seen:
                self._pixel[name] = centroid + draw
            self._visible[name] = seen
            self.pixel_count[name] = count
