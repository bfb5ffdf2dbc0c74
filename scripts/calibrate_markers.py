"""Measure the rendered camera's marker detection error against the marker's apparent size.

A marker sphere (``blanket.sensors.render.MARKER_RADIUS_M``, the tool-point colour) is placed
alone in front of the camera (320x240, 60 degrees vertical field of view) at random positions
inside the image, at distances from 0.4 to 4 m; each frame is rendered with pybullet's
TinyRenderer and the marker is detected as the env's rendered camera does. For each distance
band the script prints the marker's apparent radius (px), the mean offset of the detected
centroid from the true projection of the centre (u, v) and the per-axis root mean square
error about the truth: the rows of ``DETECTION_ERROR_PX`` (radius_px, sd_px) and the renderer's
``SAMPLE_OFFSET_PX``.

    python scripts/calibrate_markers.py [--frames 400]
"""

from __future__ import annotations

import argparse

import numpy as np

from blanket.sensors.camera import look_at, opengl_matrices, pinhole_camera
from blanket.sensors.render import (
    MARKER_RADIUS_M,
    TINY_RENDERER_SAMPLE_PX,
    TIP_MARKER_RGBA,
    MarkerDetector,
)
from blanket.sim.bullet import Client, pybullet

DISTANCES_M = (0.4, 0.6, 0.8, 1.1, 1.5, 2.0, 2.6, 3.4)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=400, help="placements per distance")
    parser.add_argument("--width", type=int, default=320)
    parser.add_argument("--height", type=int, default=240)
    parser.add_argument(
        "--sample",
        type=float,
        nargs=2,
        default=TINY_RENDERER_SAMPLE_PX,
        metavar=("U", "V"),
        help="sample position inside a pixel (default: the detector's)",
    )
    args = parser.parse_args()
    camera = pinhole_camera(
        look_at(np.zeros(3), np.array([1.0, 0.0, 0.0])),
        args.width,
        args.height,
        np.deg2rad(60.0),
    )
    view, projection = opengl_matrices(camera)
    client = Client(pybullet.DIRECT)
    marker = client.createMultiBody(
        baseMass=0.0,
        baseCollisionShapeIndex=-1,
        baseVisualShapeIndex=client.createVisualShape(
            pybullet.GEOM_SPHERE, radius=MARKER_RADIUS_M, rgbaColor=list(TIP_MARKER_RGBA)
        ),
    )
    detector = MarkerDetector(
        args.width, args.height, TIP_MARKER_RGBA, min_pixels=1, sample_px=tuple(args.sample)
    )
    rng = np.random.default_rng(0)
    pose = camera.base_from_camera
    print(
        f"{'distance_m':>10} {'radius_px':>9} {'found':>6} {'bias_u':>7} {'bias_v':>7} "
        f"{'rms_px':>6}"
    )
    all_offsets = []
    for distance in DISTANCES_M:
        radius = camera.fy_px * MARKER_RADIUS_M / distance
        offsets = []
        for _ in range(args.frames):
            margin = radius + 3.0
            u = rng.uniform(margin, args.width - margin)
            v = rng.uniform(margin, args.height - margin)
            ray = np.array(
                [(u - camera.cx_px) / camera.fx_px, (v - camera.cy_px) / camera.fy_px, 1.0]
            )
            point = pose[:3, :3] @ (distance * ray / np.linalg.norm(ray)) + pose[:3, 3]
            client.resetBasePositionAndOrientation(marker, point.tolist(), [0, 0, 0, 1])
            rgba = client.getCameraImage(
                args.width,
                args.height,
                viewMatrix=view,
                projectionMatrix=projection,
                renderer=pybullet.ER_TINY_RENDERER,
                flags=pybullet.ER_NO_SEGMENTATION_MASK,
            )[2]
            image = np.asarray(rgba, dtype=np.uint8).reshape(args.height, args.width, 4)
            centroid, _, _ = detector.detect(image)
            if centroid is not None:
                offsets.append(centroid - camera.project(point))
        offsets_a = np.array(offsets)
        all_offsets.append(offsets_a)
        bias = offsets_a.mean(axis=0)
        sd = float(np.sqrt(np.mean(offsets_a**2)))  # about the truth, per axis
        print(
            f"{distance:10.2f} {radius:9.2f} {len(offsets):6d} {bias[0]:7.3f} {bias[1]:7.3f} "
            f"{sd:6.3f}"
        )
    pooled = np.concatenate(all_offsets).mean(axis=0)
    print(f"pooled bias (u, v): ({pooled[0]:.3f}, {pooled[1]:.3f}) px")


if __name__ == "__main__":
    main()
