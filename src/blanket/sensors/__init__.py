"""Sensor models: joint encoders and a fixed pinhole camera reporting pixel coordinates."""

from __future__ import annotations

from blanket.sensors.camera import (
    CameraFrame,
    PointCamera,
    frame_period_steps,
    in_view,
    look_at,
    opengl_matrices,
    pinhole_camera,
)
from blanket.sensors.encoders import JointEncoders

__all__ = [
    "CameraFrame",
    "JointEncoders",
    "PointCamera",
    "frame_period_steps",
    "in_view",
    "look_at",
    "opengl_matrices",
    "pinhole_camera",
]
