"""The rendered camera: markers on the arm, detection in the pixels, pixel observations."""

from __future__ import annotations

import warnings

import gymnasium as gym
import numpy as np
import pybullet
import pytest

import blanket  # noqa: F401  (registers the env ids)
from blanket.errors import ConfigError
from blanket.sensors.render import (
    MIN_MARKER_PIXELS,
    TIP_MARKER_RGBA,
    MarkerDetector,
    detection_sd_px,
)
from blanket_envs.arm_reach import ArmReachEnv

ARMS = ("iiwa", "panda", "xarm6")


def reference_pixel(camera, point_m: np.ndarray) -> np.ndarray:
    """Pixel of a world point by pybullet's own camera matrices, the reference library:
    ``computeViewMatrix`` (eye, target, up) and ``computeProjectionMatrixFOV`` (vertical field
    of view, aspect), then OpenGL's viewport mapping (NDC x, y in [-1, 1] to [0, width] x
    [height, 0]; common practice, no source)."""
    pose = camera.base_from_camera
    eye = pose[:3, 3]
    view = pybullet.computeViewMatrix(
        eye.tolist(), (eye + pose[:3, 2]).tolist(), (-pose[:3, 1]).tolist()
    )
    fov_deg = np.rad2deg(2.0 * np.arctan(0.5 * camera.height_px / camera.fy_px))
    projection = pybullet.computeProjectionMatrixFOV(
        fov_deg, camera.width_px / camera.height_px, 0.02, 20.0
    )
    # pybullet's matrices are column-major 16-tuples
    v = np.asarray(view).reshape(4, 4).T
    p = np.asarray(projection).reshape(4, 4).T
    clip = p @ v @ np.append(point_m, 1.0)
    ndc = clip[:3] / clip[3]
    return np.array(
        [(ndc[0] + 1.0) * 0.5 * camera.width_px, (1.0 - ndc[1]) * 0.5 * camera.height_px]
    )


def marker_in_segmentation(env: ArmReachEnv, body: int) -> bool:
    """Whether pybullet's segmentation mask shows the marker body whole enough to be seen:
    at least ``MIN_MARKER_PIXELS`` pixels, none on the image border."""
    cam = env.camera
    seg = env.world.client.getCameraImage(
        cam.width_px,
        cam.height_px,
        viewMatrix=env._view_matrix,
        projectionMatrix=env._projection_matrix,
        renderer=pybullet.ER_TINY_RENDERER,
    )[4]
    mask = np.asarray(seg).reshape(cam.height_px, cam.width_px) == body
    border = mask[0].any() or mask[-1].any() or mask[:, 0].any() or mask[:, -1].any()
    return bool(mask.sum() >= MIN_MARKER_PIXELS and not border)


@pytest.mark.parametrize("robot", ARMS)
def test_detected_markers_match_pybullets_projection_of_their_centres(robot):
    env = ArmReachEnv(robot=robot, camera="rendered", camera_noise_px=0.0)
    assert (env.camera.width_px, env.camera.height_px) == (320, 240)
    rng = np.random.default_rng(3)
    errors, agree, flags, seen = [], 0, 0, 0
    frames = 40
    for k in range(frames):
        q = np.clip(
            env.home_rad + rng.uniform(-0.6, 0.6, env.home_rad.size),
            env.world.lower_rad,
            env.world.upper_rad,
        )
        obs, info = env.reset(seed=k, options={"joint_angle_rad": q})
        truth = info["external"]
        points = {"tip": truth["tip_position_m"], "target": truth["target_position_m"]}
        bodies = {"tip": env._tip_marker, "target": env._target_marker}
        for name, point in points.items():
            ref = reference_pixel(env.camera, point)
            # the env's logged truth is the same projection (pybullet's matrices are float32)
            np.testing.assert_allclose(truth[f"{name}_pixel_px"], ref, atol=1e-3)
            visible = bool(obs[f"{name}_visible"])
            agree += visible == marker_in_segmentation(env, bodies[name])
            flags += 1
            if visible:
                seen += name == "tip"
                errors.append(np.linalg.norm(obs[f"{name}_pixel_px"] - ref))
    env.close()
    errors = np.asarray(errors)
    assert seen >= frames // 2, f"{robot}: tool-point marker seen in only {seen} frames"
    assert np.median(errors) <= 1.0, f"{robot}: median {np.median(errors):.2f} px"
    assert np.percentile(errors, 95) <= 2.0, f"{robot}: 95th pct {np.percentile(errors, 95):.2f}"
    assert agree >= 0.99 * flags, f"{robot}: visibility agreed in {agree}/{flags}"


def _disk_image(centre, radius, shape=(60, 80), rgba=TIP_MARKER_RGBA, supersample=8):
    """An RGBA image with an antialiasing-free disk: pixel (i, j) is marker colour when its
    sample point (i, j + 1) (TinyRenderer's, as the detector assumes) lies in the disk."""
    h, w = shape
    image = np.full((h, w, 4), 255, dtype=np.uint8)
    jj, ii = np.mgrid[0:h, 0:w]
    inside = (ii - centre[0]) ** 2 + (jj + 1.0 - centre[1]) ** 2 <= radius**2
    image[inside, :3] = (np.asarray(rgba[:3]) * 200).astype(np.uint8)
    return image


def test_detector_finds_a_disk_centre_and_flags_cut_off_and_tiny_blobs():
    detector = MarkerDetector(80, 60, TIP_MARKER_RGBA)
    rng = np.random.default_rng(0)
    for _ in range(20):
        centre = rng.uniform(15.0, 45.0, size=2)
        centroid, count, cut = detector.detect(_disk_image(centre, 5.0))
        # the centroid of a sampled disk is its centre to within the sampling error
        assert centroid is not None and not cut and abs(count - np.pi * 25) < 12
        assert np.linalg.norm(centroid - centre) < 0.3
    centroid, count, cut = detector.detect(_disk_image((2.0, 30.0), 5.0))
    assert cut and centroid is not None
    centroid, count, _ = detector.detect(_disk_image((40.0, 30.0), 0.9))
    assert centroid is None and count < MIN_MARKER_PIXELS
    # a grey or white image has no marker
    assert detector.detect(np.full((60, 80, 4), 128, np.uint8))[0] is None
    with pytest.raises(ValueError, match="image"):
        detector.detect(np.zeros((10, 10, 4), np.uint8))


def test_calibration_gives_the_agent_the_measured_detection_error():
    env = ArmReachEnv(robot="panda", camera="rendered", camera_noise_px=0.0)
    sd = env.description.camera.pixel_noise_px
    env.close()
    assert 0.05 < sd < 0.2  # the table's range
    assert detection_sd_px(100.0) == detection_sd_px(7.79)  # held at its ends
    noisy = ArmReachEnv(robot="panda", camera="rendered", camera_noise_px=1.0)
    assert noisy.description.camera.pixel_noise_px == pytest.approx(np.hypot(sd, 1.0))
    noisy.close()


def test_projected_mode_keeps_its_tip_and_logs_the_true_projection():
    plain = ArmReachEnv(robot="iiwa")
    assert plain.description.end_effector == "lbr_iiwa_link_7" and plain.camera.width_px == 640
    obs, info = plain.reset(seed=1)
    np.testing.assert_allclose(
        info["external"]["tip_pixel_px"],
        reference_pixel(plain.camera, info["external"]["tip_position_m"]),
        atol=1e-3,
    )
    plain.close()
    tooled = ArmReachEnv(robot="iiwa", tool_m=0.12)
    rendered = ArmReachEnv(robot="iiwa", camera="rendered")
    assert tooled.description.end_effector == rendered.description.end_effector == "tool_point"
    a = tooled.reset(seed=1)[1]["external"]["tip_position_m"]
    b = rendered.reset(seed=1)[1]["external"]["tip_position_m"]
    np.testing.assert_allclose(a, b, atol=1e-12)  # one tool point for both camera modes
    tooled.close()
    rendered.close()


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        (dict(camera="photo"), "camera"),
        (dict(camera_size_px=(320,)), "camera_size_px"),
        (dict(camera_size_px=(8, 240)), "camera_size_px"),
        (dict(tool_m=-0.1), "tool_m"),
        (dict(image_px=3), "image_px"),
    ],
)
def test_bad_camera_options_name_the_field(kwargs, field):
    with pytest.raises(ConfigError, match=field) as err:
        ArmReachEnv(robot="panda", **kwargs)
    assert "\n" not in str(err.value)


def test_image_observation_passes_both_env_checkers():
    from gymnasium.utils.env_checker import check_env
    from stable_baselines3.common.env_checker import check_env as sb3_check_env

    env = gym.make("blanket/arm-reach-v0", robot="panda", image_px=True, episode_s=0.2)
    space = env.observation_space["image"]
    assert space.shape == (84, 84, 3) and space.dtype == np.uint8
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*Box.*action.*")
        warnings.filterwarnings("ignore", message=".*symmetric.*")
        warnings.filterwarnings("ignore", message=".*normalized.*")
        check_env(env.unwrapped, skip_render_check=True)
        sb3_check_env(env.unwrapped, warn=False)
    obs, _ = env.reset(seed=0)
    # the image shows the scene (not blank) and the magenta tool-point marker is in it
    image = obs["image"]
    assert image.std() > 10
    assert MarkerDetector(84, 84, TIP_MARKER_RGBA, min_pixels=1).detect(image)[1] > 0
    env.close()


def test_cnn_policy_runs_on_the_image(tmp_path):
    from stable_baselines3 import PPO

    env = gym.make("blanket/arm-reach-v0", robot="panda", image_px=True, episode_s=0.5)
    image_only = gym.wrappers.TransformObservation(
        env, lambda obs: obs["image"], env.observation_space["image"]
    )
    model = PPO("CnnPolicy", image_only, n_steps=128, batch_size=64, n_epochs=1, seed=0)
    model.learn(total_timesteps=256)
    assert model.num_timesteps >= 256
    obs, _ = image_only.reset(seed=1)
    action, _ = model.predict(obs, deterministic=True)
    assert image_only.action_space.contains(action.astype(np.float64))
    image_only.close()


def test_the_occluding_tray_hides_targets_in_both_camera_modes():
    seen = {}
    for mode in ("projected", "rendered"):
        for occluder in (False, True):
            env = ArmReachEnv(
                robot="iiwa", camera=mode, camera_occluder=occluder, camera_noise_px=0.0
            )
            seen[mode, occluder] = sum(env.reset(seed=k)[0]["target_visible"] for k in range(16))
            env.close()
    for mode in ("projected", "rendered"):
        assert seen[mode, False] == 16, seen
        assert 0 < seen[mode, True] < 16, seen  # part of the cells hidden, not all
    with pytest.raises(ConfigError, match="camera_occluder"):
        ArmReachEnv(robot="iiwa", camera_occluder="yes")


@pytest.mark.slow
@pytest.mark.parametrize(("robot", "control"), [("iiwa", "velocity"), ("xarm6", "velocity")])
def test_demo_with_the_rendered_camera_reaches(robot, control, tmp_path):
    import json

    from blanket.cli import main

    out = tmp_path / "run"
    args = ["demo", "--robot", robot, "--control", control, "--camera", "rendered"]
    assert main([*args, "--episodes", "5", "--out", str(out), "--no-log", "--quiet"]) == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["success_rate"] >= 0.8


@pytest.mark.parametrize("robot", ARMS)
def test_the_tool_point_is_where_the_agent_models_the_tip(robot):
    from pathlib import Path

    from blanket.body import ArmModel
    from blanket.sim.robots import builtin_robot
    from blanket_envs.arm_reach import ROBOT_TOOL_M

    env = ArmReachEnv(robot=robot, camera="rendered")
    again = ArmReachEnv(robot=robot, tool_m=ROBOT_TOOL_M[robot])
    d = env.description
    assert d.end_effector == "tool_point" and again.description.urdf_path == d.urdf_path
    package = Path(blanket.__file__).resolve().parents[2]
    assert package not in Path(d.urdf_path).resolve().parents  # generated outside the package
    model = ArmModel.from_urdf(d.urdf_path, d.end_effector, joint_names=d.joint_names)
    world = env.world
    link = world.client.getJointInfo(world.robot, world.tip_link)[16]  # the tool's parent
    assert world.client.getJointInfo(world.robot, link)[12].decode() == (
        builtin_robot(robot).end_effector
    )
    for seed in range(3):
        _, info = env.reset(seed=seed)
        truth = info["external"]
        np.testing.assert_allclose(
            model.tip_position(truth["joint_angle_rad"]), truth["tip_position_m"], atol=1e-6
        )
        state = world.client.getLinkState(world.robot, link, computeForwardKinematics=True)
        axis = np.array(world.client.getMatrixFromQuaternion(state[5])).reshape(3, 3)[:, 2]
        expected = np.array(state[4]) + ROBOT_TOOL_M[robot] * axis
        np.testing.assert_allclose(truth["tip_position_m"], expected, atol=1e-9)
    env.close()
    again.close()


def test_demo_camera_flag_refuses_bad_values(tmp_path, capsys):
    from blanket.cli import main

    assert main(["demo", "--camera", "photo", "--out", str(tmp_path / "a")]) == 2
    assert "--camera" in capsys.readouterr().err
    assert main(["demo", "--robot", "rover", "--camera", "rendered"]) == 2
    assert "--camera" in capsys.readouterr().err
