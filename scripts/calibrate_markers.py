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

``--scenes iiwa panda xarm6`` measures instead in the arm env's own scene (rendered camera,
no added noise, postures within 0.6 rad of home, bench targets): the error of each detected
marker against the true projection of its centre over the frames it was seen (median, 95th
percentile), how often each marker was seen, and how often the env's visibility flag agrees
with pybullet's segmentation mask (the marker body in >= 4 pixels, none on the border).

    python scripts/calibrate_markers.py --scenes iiwa panda xarm6 [--frames 200]
"""

from __future__ import annotations

import argparse

import numpy as np

from blanket.sensors.camera import look_at, opengl_matrices, pinhole_camera
from blanket.sensors.render import (
    MARKER_RADIUS_M,
    MIN_MARKER_PIXELS,
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
    parser.add_argument("--scenes", nargs="*", default=None, metavar="ROBOT")
    args = parser.parse_args()
    if args.scenes:
        for robot in args.scenes:
            scene_accuracy(robot, args.frames)
        return
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


def scene_accuracy(robot: str, frames: int) -> None:
    from blanket_envs.arm_reach import ArmReachEnv

    env = ArmReachEnv(robot=robot, camera="rendered", camera_noise_px=0.0)
    cam = env.camera
    rng = np.random.default_rng(3)
    errors: dict[str, list[float]] = {"tip": [], "target": []}
    agree = flags = 0
    bodies = {"tip": env._tip_marker, "target": env._target_marker}
    for k in range(frames):
        q = np.clip(
            env.home_rad + rng.uniform(-0.6, 0.6, env.home_rad.size),
            env.world.lower_rad,
            env.world.upper_rad,
        )
        obs, info = env.reset(seed=k, options={"joint_angle_rad": q})
        seg = env.world.client.getCameraImage(
            cam.width_px,
            cam.height_px,
            env._view_matrix,
            env._projection_matrix,
            renderer=pybullet.ER_TINY_RENDERER,
        )[4]
        seg = np.asarray(seg).reshape(cam.height_px, cam.width_px)
        for name in errors:
            mask = seg == bodies[name]
            edge = mask[0].any() or mask[-1].any() or mask[:, 0].any() or mask[:, -1].any()
            in_mask = bool(mask.sum() >= MIN_MARKER_PIXELS and not edge)
            agree += bool(obs[f"{name}_visible"]) == in_mask
            flags += 1
            if obs[f"{name}_visible"]:
                truth = info["external"][f"{name}_pixel_px"]
                errors[name].append(float(np.linalg.norm(obs[f"{name}_pixel_px"] - truth)))
    env.close()
    both = np.array(errors["tip"] + errors["target"])
    print(
        f"{robot:<6} frames {frames}: tip seen {len(errors['tip'])}, target seen "
        f"{len(errors['target'])}; error median {np.median(both):.3f} px, 95th pct "
        f"{np.percentile(both, 95):.3f} px, max {both.max():.3f} px; visibility agrees with "
        f"the segmentation mask in {agree}/{flags} ({100 * agree / flags:.1f} %)",
        flush=True,
    )


if __name__ == "__main__":
    main()
