"""Replay a logged episode as a small video, rendered headless by pybullet.

The logged true joint angles (``external.joint_angle_rad.<joint>``) are set on the URDF in a
``DIRECT`` client and rendered with ``ER_TINY_RENDERER`` at 320 x 240, subsampled to the
requested frame rate. The target is a sky-blue sphere; when the log has the agent's
belief (``internal.belief.order0.<joint>``) the believed tool tip, computed by pybullet
forward kinematics of the belief in a second, unrendered client (:func:`tip_positions`), is a
yellow sphere. The potting bench and its seedling trays are drawn from the run metadata's
``scene_boxes`` (a flat board when it has none). The camera frames the whole arm over the
episode (every link origin), the trays, the tool tip and the targets. A thin
bar along the bottom edge shows the elapsed fraction of the episode.

MP4 needs the ``imageio-ffmpeg`` plugin; without it the video is written as a GIF (same
name, ``.gif``). The run metadata must name ``urdf_path`` and ``joint_names``.
"""

from __future__ import annotations

import importlib.util
import os
from collections.abc import Sequence
from pathlib import Path

import imageio
import numpy as np
import pandas as pd

from blanket.logs.plots import load_episode
from blanket.logs.reader import read_metadata
from blanket.logs.schema import LogError
from blanket.sim.bullet import Client as BulletClient
from blanket.sim.bullet import pybullet

__all__ = ["replay_video", "has_mp4_writer", "tip_positions"]

_TARGET_RGBA = (0.20, 0.55, 0.95, 1.0)
_BELIEF_RGBA = (0.98, 0.85, 0.10, 1.0)
_BENCH_RGBA = (0.62, 0.52, 0.40, 1.0)
_TRAY_RGBA = (0.15, 0.15, 0.15, 1.0)


def has_mp4_writer() -> bool:
    """Whether imageio can write MP4 here (the ``imageio_ffmpeg`` package is installed)."""
    return importlib.util.find_spec("imageio_ffmpeg") is not None


def _joint_indices(client: BulletClient, body: int, names: Sequence[str]) -> list[int]:
    found: dict[str, int] = {}
    for j in range(client.getNumJoints(body)):
        found[client.getJointInfo(body, j)[1].decode()] = j
    missing = [n for n in names if n not in found]
    if missing:
        raise LogError(f"joint_names: {missing} are not joints of the URDF; it has {list(found)}")
    return [found[n] for n in names]


def _link_index(client: BulletClient, body: int, link: str | None) -> int:
    last = client.getNumJoints(body) - 1
    if link is None:
        return last
    for j in range(client.getNumJoints(body)):
        if client.getJointInfo(body, j)[12].decode() == link:
            return j
    raise LogError(f"end_effector: {link!r} is not a link of the URDF")


def tip_positions(
    urdf_path: str | os.PathLike[str],
    joint_names: Sequence[str],
    end_effector: str | None,
    angles_rad: np.ndarray,
) -> np.ndarray:
    """Tool-tip positions (base frame, m) of joint angle rows, by pybullet forward kinematics.

    Parameters
    ----------
    urdf_path : path
        The arm's URDF (fixed base at the origin).
    joint_names : sequence of str
        Joints the columns of ``angles_rad`` belong to.
    end_effector : str or None
        Link whose origin is the tool tip (None: the last link).
    angles_rad : numpy.ndarray
        Shape (rows, len(joint_names)); non-finite angles are taken as 0.

    Returns
    -------
    numpy.ndarray
        Shape (rows, 3).
    """
    angles = np.atleast_2d(np.asarray(angles_rad, dtype=float))
    client = BulletClient(connection_mode=pybullet.DIRECT)
    try:
        body = client.loadURDF(
            str(urdf_path), [0, 0, 0], useFixedBase=True, flags=pybullet.URDF_USE_INERTIA_FROM_FILE
        )
        joints = _joint_indices(client, body, joint_names)
        link = _link_index(client, body, end_effector)
        out = np.empty((angles.shape[0], 3))
        for i, row in enumerate(np.nan_to_num(angles, nan=0.0, posinf=0.0, neginf=0.0)):
            for j, q in zip(joints, row, strict=True):
                client.resetJointState(body, j, float(q))
            out[i] = client.getLinkState(body, link, computeForwardKinematics=True)[4]
    finally:
        client.disconnect()
    return out


def _positions(frame: pd.DataFrame, prefix: str) -> np.ndarray | None:
    cols = [f"{prefix}.{c}" for c in ("x", "y", "z")]
    if all(c in frame.columns for c in cols):
        return frame[cols].to_numpy(dtype=float)
    return None


def _marker(client: BulletClient, radius: float, rgba: tuple[float, ...]) -> int:
    shape = client.createVisualShape(pybullet.GEOM_SPHERE, radius=radius, rgbaColor=rgba)
    return client.createMultiBody(
        baseMass=0.0, baseVisualShapeIndex=shape, basePosition=[0.0, 0.0, -10.0]
    )


def replay_video(
    run_dir: str | os.PathLike[str],
    episode: int = 0,
    out: str | os.PathLike[str] | None = None,
    fps: int = 30,
    *,
    width_px: int = 320,
    height_px: int = 240,
) -> Path:
    """Render one logged episode and write it as MP4 (GIF without imageio-ffmpeg).

    Parameters
    ----------
    run_dir : path
        A run folder written by :class:`~blanket.logs.RunWriter` or the Recorder.
    episode : int
        Episode number.
    out : path, optional
        Output file; default ``RUN_DIR/figures/episode-NNNNN-replay.mp4``. A ``.gif``
        suffix always writes a GIF.
    fps : int
        Frames per second of the video (log rows are subsampled to it), 1 to 120.
    width_px, height_px : int
        Frame size.

    Returns
    -------
    pathlib.Path
        The file written (its suffix tells whether MP4 or GIF).
    """
    if isinstance(fps, bool) or not isinstance(fps, (int, np.integer)) or not 1 <= fps <= 120:
        raise ValueError(f"fps: expected an int in [1, 120], got {fps!r}")
    run_dir = Path(run_dir)
    metadata = read_metadata(run_dir)
    urdf_path = metadata.get("urdf_path")
    joint_names = metadata.get("joint_names")
    if not urdf_path or not joint_names:
        raise LogError(f"{run_dir}: replay needs 'urdf_path' and 'joint_names' in the run metadata")
    if not Path(urdf_path).is_file():
        raise LogError(f"urdf_path: {urdf_path} does not exist")
    frame, episode = load_episode(run_dir, episode)
    angle_cols = [f"external.joint_angle_rad.{n.replace('.', '_')}" for n in joint_names]
    if not all(c in frame.columns for c in angle_cols):
        raise LogError(f"{run_dir}: episode {episode} has no external.joint_angle_rad.* columns")
    belief_cols = [f"internal.belief.order0.{n.replace('.', '_')}" for n in joint_names]
    has_belief = all(c in frame.columns for c in belief_cols)

    t = frame["t"].to_numpy(dtype=float)
    sample_t = np.arange(t[0], t[-1] + 1e-12, 1.0 / fps) if len(t) else np.zeros(0)
    rows = np.clip(np.searchsorted(t, sample_t, side="left"), 0, max(len(t) - 1, 0))
    angles = frame[angle_cols].to_numpy(dtype=float)
    beliefs = frame[belief_cols].to_numpy(dtype=float) if has_belief else None
    targets = _positions(frame, "external.target_position_m")
    if targets is None:
        targets = _positions(frame, "sensory.target_position_m")
    tips = _positions(frame, "external.tip_position_m")

    believed_tips = (
        tip_positions(urdf_path, joint_names, metadata.get("end_effector"), beliefs[rows])
        if beliefs is not None
        else None
    )
    scene = BulletClient(connection_mode=pybullet.DIRECT)
    try:
        flags = pybullet.URDF_USE_INERTIA_FROM_FILE
        robot = scene.loadURDF(str(urdf_path), [0, 0, 0], useFixedBase=True, flags=flags)
        joints = _joint_indices(scene, robot, joint_names)
        boxes = metadata.get("scene_boxes") or []
        for box in boxes:
            shape = scene.createVisualShape(
                pybullet.GEOM_BOX,
                halfExtents=[float(v) for v in box["half_extents_m"]],
                rgbaColor=_BENCH_RGBA if box.get("name") == "bench" else _TRAY_RGBA,
            )
            scene.createMultiBody(
                baseMass=0.0,
                baseVisualShapeIndex=shape,
                basePosition=[float(v) for v in box["centre_m"]],
            )
        if not boxes:
            bench = scene.createVisualShape(
                pybullet.GEOM_BOX, halfExtents=[0.9, 0.9, 0.005], rgbaColor=_BENCH_RGBA
            )
            scene.createMultiBody(
                baseMass=0.0, baseVisualShapeIndex=bench, basePosition=[0.0, 0.0, -0.006]
            )
        target_marker = _marker(scene, 0.02, _TARGET_RGBA) if targets is not None else None
        belief_marker = _marker(scene, 0.015, _BELIEF_RGBA) if has_belief else None

        # Frame what the episode used: every link of the arm over the episode, the base, the
        # trays (not the whole bench), the tool tip and the targets.
        points = [p for p in (tips, targets) if p is not None]
        links = list(range(scene.getNumJoints(robot)))
        for row in rows[:: max(1, len(rows) // 20)]:
            for j, q in zip(joints, angles[row], strict=True):
                scene.resetJointState(robot, j, float(q))
            states = scene.getLinkStates(robot, links, computeForwardKinematics=True)
            points.append(np.array([state[4] for state in states], dtype=float).reshape(-1, 3))
        for box in boxes:
            if box.get("name") != "bench":
                centre = np.asarray(box["centre_m"], dtype=float)
                half = np.asarray(box["half_extents_m"], dtype=float)
                points.append(
                    centre + half * np.array([[sx, sy, 1] for sx in (-1, 1) for sy in (-1, 1)])
                )
        cloud = np.vstack([p[np.all(np.isfinite(p), axis=1)] for p in points] + [np.zeros((1, 3))])
        center = 0.5 * (cloud.min(axis=0) + cloud.max(axis=0))
        radius = float(np.max(np.linalg.norm(cloud - center, axis=1)))
        fov_deg = 50.0  # vertical; the sphere round the cloud fits with 15 % to spare
        distance = max(0.4, 1.15 * radius / np.sin(np.radians(0.5 * fov_deg)))
        view = scene.computeViewMatrixFromYawPitchRoll(
            cameraTargetPosition=center.tolist(),
            distance=distance,
            yaw=35.0,
            pitch=-30.0,
            roll=0.0,
            upAxisIndex=2,
        )
        projection = scene.computeProjectionMatrixFOV(
            fov=fov_deg, aspect=width_px / height_px, nearVal=0.02, farVal=20.0
        )
        frames: list[np.ndarray] = []
        for k, row in enumerate(rows):
            for j, q in zip(joints, angles[row], strict=True):
                scene.resetJointState(robot, j, float(q))
            if target_marker is not None and np.all(np.isfinite(targets[row])):
                scene.resetBasePositionAndOrientation(
                    target_marker, targets[row].tolist(), [0, 0, 0, 1]
                )
            if believed_tips is not None and belief_marker is not None:
                scene.resetBasePositionAndOrientation(
                    belief_marker, believed_tips[k].tolist(), [0, 0, 0, 1]
                )
            _, _, rgba, _, _ = scene.getCameraImage(
                width_px, height_px, view, projection, renderer=pybullet.ER_TINY_RENDERER
            )
            image = np.reshape(np.asarray(rgba, dtype=np.uint8), (height_px, width_px, 4))[..., :3]
            image = image.copy()
            done = int(round(width_px * (k + 1) / max(len(rows), 1)))
            image[-3:, :done] = (47, 107, 58)
            image[-3:, done:] = (221, 214, 198)
            frames.append(image)
    finally:
        scene.disconnect()

    if out is None:
        out = run_dir / "figures" / f"episode-{episode:05d}-replay.mp4"
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    if out.suffix.lower() != ".gif" and not has_mp4_writer():
        out = out.with_suffix(".gif")
    if out.suffix.lower() == ".gif":
        imageio.v3.imwrite(out, np.stack(frames), duration=1000.0 / fps, loop=0)
    else:  # pragma: no cover - needs imageio-ffmpeg
        imageio.v2.mimwrite(out, frames, fps=fps)
    return out
