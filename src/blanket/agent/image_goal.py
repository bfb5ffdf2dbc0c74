"""The goal in the camera's image: ``goal_space = "image"``.

With ``goal_space = "cartesian"`` (the default) the goal is the target's position, and the
body model's forward kinematics decides where the tool tip is; a wrong body model leaves the
real tip off the target by the model's error. With ``goal_space = "image"`` the goal is that
the tip's pixel sits on the target's pixel: on each fresh camera frame where both are seen,
the agent measures how far the seen tip lies from where its model puts it, *in the image*, and
moves its Cartesian goal by that amount, so the camera corrects a model error directly
(image-based visual servoing in the form of a corrected position goal; Hutchinson, Hager &
Corke 1996, "A tutorial on visual servo control", IEEE Trans Robot Autom 12(5), sec. IV-V).

The image fixes two of the tip's three coordinates; the third, the depth along the camera's
ray, comes from the model. Back-projecting a pixel ``y`` to the camera depth ``z_c`` of a
model point gives the point on ``y``'s ray at that depth (the inverse of the pinhole
projection at a known depth; Hartley & Zisserman 2004, *Multiple View Geometry*, 2nd ed.,
eq. 6.1). The goal offset is::

    delta = [B(y_target, x_target) - x_target] - [B(y_tip, x_tip) - x_tip]

with ``x_tip = fk(q)`` the model's tip at the belief and ``x_target`` the target position the
observation gives; the Cartesian goal becomes ``x_target + delta``. Where the model's tip
reaches it, ``B(y_tip, x_tip) = B(y_target, x_target)``: the seen tip's pixel is the target's
pixel. The model's depth error along the ray stays (the trade-off against learning the body).

``delta`` is averaged over frames (time constant :data:`OFFSET_TIME_CONSTANT_S`) and held
while the tip is out of sight, or between frames; before the first frame of an episode it is
zero (the Cartesian goal). A target out of sight (the arm often hides it once the tip is on
it) counts as seen where the observation's ``target_position_m`` projects.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["back_project", "image_goal_offset", "ImageGoal", "OFFSET_TIME_CONSTANT_S"]

#: Averaging time of the goal offset over camera frames (s): about 15 frames at 30 Hz, so the
#: pixel noise (2 px, some 7 mm at the bench's distance) averages down to about 1 mm, while the
#: offset, which changes slowly with the posture, still settles well within an episode.
#: Measured on the own 3-DoF arm, lengths 3 % long, 8 episodes: final errors 0.17-1.8 cm
#: with 0.5 s against 0.65-1.7 cm with 0.1 s; with learn_body as well 0.13-0.39 cm against
#: 0.18-0.83 cm.
OFFSET_TIME_CONSTANT_S = 0.5


def back_project(
    base_from_camera: np.ndarray, intrinsics: np.ndarray, pixel: np.ndarray, point: np.ndarray
) -> np.ndarray:
    """The point on pixel ``(u, v)``'s ray at the camera depth of ``point`` (base frame).

    With the camera pose ``(R, t)`` and ``z_c`` the depth of ``point`` in the camera frame
    (``p_c = R' (point - t)``), the ray's point is ``t + R (z_c (u - cx) / fx,
    z_c (v - cy) / fy, z_c)``: the pinhole projection ``u = fx x_c / z_c + cx`` solved for
    ``x_c`` at known depth (Hartley & Zisserman 2004, eq. 6.1). ``intrinsics`` is
    ``(fx, fy, cx, cy)``. :func:`blanket.description.pinhole_projection` of the result is
    ``pixel``.
    """
    T = np.asarray(base_from_camera, dtype=float)
    R, t = T[:3, :3], T[:3, 3]
    fx, fy, cx, cy = (float(v) for v in intrinsics)
    z = float(R[:, 2] @ (np.asarray(point, dtype=float) - t))
    u, v = (float(p) for p in pixel)
    return t + R @ np.array([z * (u - cx) / fx, z * (v - cy) / fy, z])


def image_goal_offset(
    base_from_camera: np.ndarray,
    intrinsics: np.ndarray,
    tip_model: np.ndarray,
    tip_pixel: np.ndarray,
    target: np.ndarray,
    target_pixel: np.ndarray,
) -> np.ndarray:
    """``delta = [B(y_target, x_target) - x_target] - [B(y_tip, x_tip) - x_tip]`` (m, base
    frame): how far to move the Cartesian goal so that, with the model's depths, the seen tip
    lands on the seen target (see the module docstring)."""
    seen_tip = back_project(base_from_camera, intrinsics, tip_pixel, tip_model)
    seen_target = back_project(base_from_camera, intrinsics, target_pixel, target)
    return (seen_target - np.asarray(target, dtype=float)) - (
        seen_tip - np.asarray(tip_model, dtype=float)
    )


class ImageGoal:
    """The episode's goal offset for ``goal_space = "image"``: average of
    :func:`image_goal_offset` over fresh frames, held between them.

    Attributes
    ----------
    offset : numpy.ndarray
        ``delta`` in force (m, base frame), (3,).
    frames : int
        Frames averaged this episode.
    """

    def __init__(self, camera: Any) -> None:
        self.camera = camera
        self._pose = np.asarray(camera.base_from_camera, dtype=float)
        self._intrinsics = np.array([camera.fx_px, camera.fy_px, camera.cx_px, camera.cy_px])
        self._gain = 1.0 - float(np.exp(-1.0 / (camera.rate_hz * OFFSET_TIME_CONSTANT_S)))
        self.reset()

    def reset(self) -> None:
        """A new episode: the offset starts at zero (the Cartesian goal)."""
        self.offset = np.zeros(3)
        self.frames = 0

    def goal_observation(
        self, obs: Mapping[str, Any], tip_model: np.ndarray | None
    ) -> Mapping[str, Any]:
        """``obs`` with ``target_position_m`` moved by the offset (a new dict), after
        averaging in this step's frame if it is fresh and shows both the tip and the target.

        ``tip_model`` is the model's tip at the current belief (None before the first
        belief: the frame is not used)."""
        if tip_model is not None and obs.get("camera_fresh", 0) and obs.get("tip_visible", 0):
            target = obs["target_position_m"]
            # a target hidden (often by the arm on top of it) is where the observation says
            target_pixel = (
                obs["target_pixel_px"]
                if obs.get("target_visible", 0)
                else self.camera.project(np.asarray(target, dtype=float))
            )
            new = image_goal_offset(
                self._pose, self._intrinsics, tip_model, obs["tip_pixel_px"], target, target_pixel
            )
            gain = 1.0 if self.frames == 0 else self._gain
            self.offset = self.offset + gain * (new - self.offset)
            self.frames += 1
        out = dict(obs)
        out["target_position_m"] = np.asarray(obs["target_position_m"], dtype=float) + self.offset
        return out
