"""Reaching envs: put the tool tip on a target over the greenhouse potting bench.

``ArmReachEnv`` (``blanket/arm-reach-v0``) drives a fixed-base 3-D arm (built-in ``iiwa``,
``panda``, ``xarm6`` or any URDF) over a bench with two seedling trays; ``PlanarReachEnv``
(``blanket/planar-2link-v0``) drives the 2-link planar arm in the horizontal plane, watched
from above. Actions are joint velocities (rad/s) or torques (N m), in physical units and
bounded by the URDF limits; observations are what the encoders and the fixed camera report.
"""

from __future__ import annotations

import dataclasses
import math
import os
import sys
import weakref
from pathlib import Path
from typing import Any

import gymnasium as gym
import numpy as np
from gymnasium import spaces

from blanket.description import ArmDescription, CameraDescription
from blanket.errors import ConfigError, shorten
from blanket.sensors.camera import PointCamera, look_at, opengl_matrices, pinhole_camera
from blanket.sensors.clip import clip_values as _clip
from blanket.sensors.encoders import JointEncoders
from blanket.sensors.render import (
    MARKER_RADIUS_M,
    TARGET_MARKER_RGBA,
    TIP_MARKER_RGBA,
    RenderedCamera,
    detection_sd_px,
    marker_radius_px,
)
from blanket.sim.arm_world import CONTROL_MODES, ArmWorld
from blanket.sim.bullet import pybullet
from blanket.sim.robots import builtin_robot, default_home
from blanket.sim.urdf_limits import read_joint_limits
from blanket.success import HOLD_S, HeldInside
from blanket_envs.greenhouse import (
    TARGET_ABOVE_CELL_M,
    TRAY_HEIGHT_M,
    BenchLayout,
    bench_layout_for_reach,
    build_bench,
    horizontal_reach_m,
)
from blanket_envs.tool import tool_urdf

__all__ = ["ArmReachEnv", "PlanarReachEnv", "PLANAR_URDF", "SUCCESS_HOLD_S"]

#: The planar 2-link arm shipped with the env suite.
PLANAR_URDF = str(Path(__file__).resolve().parent / "assets" / "planar_2link.urdf")
#: Random targets come from joint configurations within this distance of home (rad).
RANDOM_TARGET_SPREAD_RAD = 1.2
#: The tip must stay inside the tolerance ball this long for success (s): the one rule of
#: :mod:`blanket.success`.
SUCCESS_HOLD_S = HOLD_S
#: Half-width of the uniform noise added to the home posture at reset (rad).
HOME_NOISE_RAD = 0.1
#: Reward added on each step the tip has been held inside the tolerance for SUCCESS_HOLD_S.
SUCCESS_BONUS = 1.0
#: The tool tip counts as seen when the camera ray gets this close to it (m), for a custom
#: URDF (built-in robots carry their own): the tip link origin often lies inside the wrist.
TIP_VIEW_MARGIN_M = 0.05
#: Observation bound of the target position (m); targets are clipped into it.
TARGET_BOUND_M = 100.0
#: Joint-configuration samples used to measure an arm's reach (fixed seed: not per episode).
REACH_SAMPLES = 2000

TARGET_MODES = ("bench", "random")
#: How the camera sees: project the marker centres (a keypoint model with Gaussian noise and a
#: ray test) or render frames and detect the markers in the pixels.
CAMERA_MODES = ("projected", "rendered")
#: Frame size (width, height) of each camera mode when ``camera_size_px`` is not given.
DEFAULT_CAMERA_SIZE_PX = {"projected": (640, 480), "rendered": (320, 240)}
#: Tool length (m, along the end-effector link's z axis) in rendered mode when ``tool_m`` is
#: not given: the shortest of 0.03, 0.06, 0.09, 0.12 m at which the marker was seen in most
#: random postures from the default camera (the iiwa's link origin lies inside the wrist).
ROBOT_TOOL_M = {"iiwa": 0.12, "panda": 0.03, "xarm6": 0.06}
#: Side of the square ``image`` observation when ``image_px`` is True.
IMAGE_PX = 84
#: The occluding tray of ``camera_occluder``: half extents (m) of a seedling tray on a shelf,
#: and how far along the line from the cells' centre to the camera it stands (0 .. 1).
OCCLUDER_HALF_EXTENTS_M = (0.15, 0.10, 0.01)
OCCLUDER_FRACTION = 0.3


def _positive(name: str, value: float) -> float:
    if not (isinstance(value, int | float | np.number) and np.isfinite(value) and value > 0):
        raise ConfigError(f"{name}: must be a finite number > 0, got {value!r}")
    return float(value)


def _in_range(name: str, value: float, low: float, high: float, unit: str) -> float:
    if not (
        isinstance(value, int | float | np.number)
        and not isinstance(value, bool)
        and np.isfinite(value)
        and low <= value <= high
    ):
        raise ConfigError(f"{name}: must be a number in [{low:g}, {high:g}] {unit}, got {value!r}")
    return float(value)


def _non_negative(name: str, value: float) -> float:
    if not (isinstance(value, int | float | np.number) and np.isfinite(value) and value >= 0):
        raise ConfigError(f"{name}: must be a finite number >= 0, got {value!r}")
    return float(value)


def _weak_method(method: Any) -> Any:
    """A callable that holds its object weakly, so an env is freed (and its pybullet client
    disconnected) as soon as the last outside reference goes, without waiting for the cyclic
    garbage collector."""
    ref = weakref.WeakMethod(method)

    def call(*args: Any, **kwargs: Any) -> Any:
        bound = ref()
        if bound is None:
            raise ReferenceError("the env behind this camera is gone")
        return bound(*args, **kwargs)

    return call


class ArmReachEnv(gym.Env):
    """Reach a target with the tool tip of a fixed-base arm over the potting bench.

    Parameters
    ----------
    robot : {"iiwa", "panda", "xarm6"}
        Built-in arm (ignored when ``urdf`` is given).
    urdf : str, optional
        Path of a custom fixed-base arm URDF; needs ``end_effector``.
    end_effector : str, optional
        Tool tip link (default: the built-in robot's).
    control : {"velocity", "torque"}
        Action = joint velocities (rad/s) or joint torques (N m).
    episode_s : float
        Episode length; the episode truncates after ``round(episode_s * control_hz)`` steps.
    tolerance_m : float
        Radius of the success ball around the target.
    control_hz, camera_hz : float
        Control/encoder rate and camera frame rate (``camera_hz <= control_hz``).
    encoder_angle_noise_rad, encoder_velocity_noise_rad_s, camera_noise_px : float
        Noise standard deviations.
    targets : {"bench", "random"}, optional
        Cell targets over the seedling trays, or tip positions of random joint configurations
        (default ``"bench"`` for built-in robots, ``"random"`` for a custom URDF).
    render_mode : {None, "rgb_array", "human"}
        ``rgb_array`` renders the scenario camera's view; ``human`` opens a pybullet GUI.
    camera : {"projected", "rendered"}
        ``projected``: the marker centres are projected through the pinhole model, with
        ``camera_noise_px`` Gaussian noise and a ray test for occlusion. ``rendered``: each
        camera frame is rendered headless (TinyRenderer) and the magenta tool-point marker and
        the green target marker are found by colour (:mod:`blanket.sensors.render`); the
        agent is told the measured detection error combined with ``camera_noise_px``, which
        is added to each detected centre.
    camera_size_px : (int, int), optional
        Frame width and height (default 640x480 projected, 320x240 rendered).
    tool_m : float, optional
        A straight tool of this length (m) along the end-effector link's z axis; its end, the
        tool point, becomes the tip (link ``tool_point`` of a generated URDF). Default 0 (the
        end-effector link origin) in projected mode and, in rendered mode, the built-in arm's
        :data:`ROBOT_TOOL_M` (the iiwa's link origin lies inside its wrist).
    image_px : bool or int, optional
        Add an ``image`` observation: the camera's view as (side, side, 3) uint8, side 84 for
        True, updated on camera frames.
    camera_occluder : bool
        Put a seedling tray on a shelf between the camera and the cells, hiding part of them.
    """

    metadata = {"render_modes": ["rgb_array", "human"], "render_fps": 30}

    def __init__(
        self,
        robot: str = "iiwa",
        urdf: str | None = None,
        end_effector: str | None = None,
        control: str = "velocity",
        episode_s: float = 4.0,
        tolerance_m: float = 0.01,
        control_hz: float = 240.0,
        camera_hz: float = 30.0,
        encoder_angle_noise_rad: float = 0.01,
        encoder_velocity_noise_rad_s: float = 0.05,
        camera_noise_px: float = 2.0,
        targets: str | None = None,
        render_mode: str | None = None,
        camera: str = "projected",
        camera_size_px: tuple[int, int] | None = None,
        tool_m: float | None = None,
        image_px: int | bool | None = None,
        camera_occluder: bool = False,
    ) -> None:
        super().__init__()
        if urdf is None:
            spec = builtin_robot(robot)
            urdf_path = spec.urdf_path
            tip = spec.end_effector if end_effector is None else end_effector
            controlled = spec.controlled_joints
            held = spec.held_joint_positions
            home: np.ndarray | None = np.array(spec.home_rad)
            margin = spec.tip_view_margin_m
            targets = "bench" if targets is None else targets
            if tool_m is None:
                tool_m = ROBOT_TOOL_M.get(robot, 0.0) if camera == "rendered" else 0.0
        else:
            urdf_path = str(Path(urdf).expanduser().resolve())
            if not Path(urdf_path).is_file():
                raise ConfigError(f"urdf: file not found: {urdf}")
            if end_effector is None:
                raise ConfigError("end_effector: required with a custom urdf (a URDF link name)")
            tip, controlled, held, home = end_effector, None, {}, None
            margin = TIP_VIEW_MARGIN_M
            targets = "random" if targets is None else targets
            tool_m = 0.0 if tool_m is None else tool_m
        self._setup(
            urdf_path=urdf_path,
            end_effector=tip,
            controlled_joints=controlled,
            held_joint_positions=held,
            home_rad=home,
            control=control,
            episode_s=episode_s,
            tolerance_m=tolerance_m,
            control_hz=control_hz,
            camera_hz=camera_hz,
            encoder_angle_noise_rad=encoder_angle_noise_rad,
            encoder_velocity_noise_rad_s=encoder_velocity_noise_rad_s,
            camera_noise_px=camera_noise_px,
            targets=targets,
            render_mode=render_mode,
            tip_view_margin_m=margin,
            camera=camera,
            camera_size_px=camera_size_px,
            tool_m=tool_m,
            image_px=image_px,
            camera_occluder=camera_occluder,
        )

    # ================================================================== setup
    def _setup(
        self,
        urdf_path: str,
        end_effector: str,
        controlled_joints: tuple[str, ...] | None,
        held_joint_positions: dict[str, float],
        home_rad: np.ndarray | None,
        control: str,
        episode_s: float,
        tolerance_m: float,
        control_hz: float,
        camera_hz: float,
        encoder_angle_noise_rad: float,
        encoder_velocity_noise_rad_s: float,
        camera_noise_px: float,
        targets: str,
        render_mode: str | None,
        tip_view_margin_m: float = TIP_VIEW_MARGIN_M,
        camera: str = "projected",
        camera_size_px: tuple[int, int] | None = None,
        tool_m: float = 0.0,
        image_px: int | bool | None = None,
        camera_occluder: bool = False,
    ) -> None:
        self.world: ArmWorld | None = None
        self.tip_view_margin_m = float(tip_view_margin_m)
        if camera not in CAMERA_MODES:
            raise ConfigError(
                f"camera: must be one of {', '.join(CAMERA_MODES)}, got {shorten(camera)}"
            )
        self.camera_mode = camera
        self.camera_size_px = _camera_size(camera, camera_size_px)
        self.tool_m = _in_range("tool_m", tool_m, 0.0, 0.5, "m")
        self.image_px = _image_px(image_px)
        if not isinstance(camera_occluder, bool | np.bool_):
            raise ConfigError(
                f"camera_occluder: must be true or false, got {shorten(camera_occluder)}"
            )
        if control not in CONTROL_MODES:
            raise ConfigError(
                f"control: must be one of {', '.join(CONTROL_MODES)}, got {control!r}"
            )
        if targets not in self._target_modes():
            raise ConfigError(
                f"targets: must be one of {', '.join(self._target_modes())}, got {targets!r}"
            )
        if render_mode is not None and render_mode not in self.metadata["render_modes"]:
            raise ConfigError(
                f"render_mode: must be None or one of {', '.join(self.metadata['render_modes'])},"
                f" got {render_mode!r}"
            )
        if (
            render_mode == "human"
            and sys.platform.startswith("linux")
            and not (os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))
        ):
            raise ConfigError("render_mode: 'human' needs a display (DISPLAY is not set)")
        self.control = control
        # Bounds keep a run finite and the physics step meaningful (common practice, no source).
        self.episode_s = _in_range("episode_s", episode_s, 0.01, 3600.0, "s")
        self.tolerance_m = _positive("tolerance_m", tolerance_m)
        self.control_hz = _in_range("control_hz", control_hz, 10.0, 2000.0, "Hz")
        camera_hz = _positive("camera_hz", camera_hz)
        if camera_hz > self.control_hz:
            raise ConfigError(
                f"camera_hz: must be <= control_hz ({self.control_hz}), got {camera_hz}"
            )
        self._encoders = JointEncoders(
            _non_negative("encoder_angle_noise_rad", encoder_angle_noise_rad),
            _non_negative("encoder_velocity_noise_rad_s", encoder_velocity_noise_rad_s),
        )
        camera_noise_px = _non_negative("camera_noise_px", camera_noise_px)
        self.targets = targets
        self.render_mode = render_mode
        read_joint_limits(urdf_path)  # fail early, with a one-line message, on a bad URDF
        if self.tool_m > 0.0:
            # the marker sits on a tool point outside the wrist: the tool link is the new tip
            urdf_path, end_effector = tool_urdf(urdf_path, end_effector, self.tool_m)
            self.tip_view_margin_m = MARKER_RADIUS_M

        world = ArmWorld(
            urdf_path,
            end_effector,
            control_hz=self.control_hz,
            controlled_joints=controlled_joints,
            held_joint_positions=held_joint_positions,
            gui=render_mode == "human",
        )
        self.world = world
        n = len(world.joint_names)
        self.home_rad = (
            default_home(world.lower_rad, world.upper_rad)
            if home_rad is None
            else np.clip(np.asarray(home_rad, dtype=float), world.lower_rad, world.upper_rad)
        )
        if self.home_rad.shape != (n,):
            raise ConfigError(f"home posture: expected {n} joint angles, got {self.home_rad}")
        world.exclude_touching_self_pairs(np.clip(np.zeros(n), world.lower_rad, world.upper_rad))
        world.exclude_touching_self_pairs(self.home_rad)

        self._sample_lower = np.maximum(world.lower_rad, -np.pi)
        self._sample_upper = np.minimum(world.upper_rad, np.pi)
        reach_rng = np.random.default_rng(0)
        self._reach_samples = world.tip_positions_for(
            reach_rng.uniform(self._sample_lower, self._sample_upper, size=(REACH_SAMPLES, n))
        )
        self._build_scenery()
        self.camera: CameraDescription = self._default_camera(camera_hz, camera_noise_px)
        if camera == "rendered":
            self.camera = dataclasses.replace(
                self.camera, pixel_noise_px=self._rendered_noise_px(camera_noise_px)
            )
        self._target_marker = world.add_marker(
            "target", MARKER_RADIUS_M, self._reach_samples[0], TARGET_MARKER_RGBA
        )
        self._tip_marker = world.add_marker(
            "tool point", MARKER_RADIUS_M, world.tip_position(), TIP_MARKER_RGBA
        )
        self._view_matrix, self._projection_matrix = opengl_matrices(self.camera)
        if camera_occluder:
            self._add_occluder()
        self._camera: PointCamera | RenderedCamera
        if camera == "rendered":
            self._camera = RenderedCamera(
                self.camera,
                self.control_hz,
                _weak_method(self._render_frame),
                {"tip": TIP_MARKER_RGBA, "target": TARGET_MARKER_RGBA},
                sensor_noise_px=camera_noise_px,
            )
        else:
            self._camera = PointCamera(
                self.camera, self.control_hz, _weak_method(self._line_of_sight)
            )
        self._image_camera: CameraDescription | None = None
        if self.image_px is not None:
            pose = self.camera.base_from_camera
            fov = 2.0 * np.arctan(0.5 * self.camera.height_px / self.camera.fy_px)
            self._image_camera = pinhole_camera(
                pose, self.image_px, self.image_px, fov, camera_hz, 0.0
            )
            self._image_matrices = opengl_matrices(self._image_camera)
            self._image = np.zeros((self.image_px, self.image_px, 3), dtype=np.uint8)

        self.description = ArmDescription(
            urdf_path=world.urdf_path,
            end_effector=end_effector,
            joint_names=world.joint_names,
            lower_rad=world.lower_rad.copy(),
            upper_rad=world.upper_rad.copy(),
            velocity_limit_rad_s=world.velocity_limit_rad_s.copy(),
            torque_limit_n_m=world.torque_limit_n_m.copy(),
            control=control,
            control_hz=self.control_hz,
            encoder_angle_noise_rad=self._encoders.angle_noise_rad,
            encoder_velocity_noise_rad_s=self._encoders.velocity_noise_rad_s,
            camera=self.camera,
            gravity_m_s2=world.gravity_m_s2.copy(),
            episode_s=self.episode_s,
            tolerance_m=self.tolerance_m,
        )

        bound = world.velocity_limit_rad_s if control == "velocity" else world.torque_limit_n_m
        self.action_space = spaces.Box(low=-bound, high=bound, shape=(n,), dtype=np.float64)
        self._obs_angle_low, self._obs_angle_high = self._angle_bounds()
        velocity_bound = 10.0 * world.velocity_limit_rad_s + 10.0 * (
            self._encoders.velocity_noise_rad_s + 1.0
        )
        pixel_margin = 10.0 * camera_noise_px + 1.0
        self._pixel_low = np.array([-pixel_margin, -pixel_margin])
        self._pixel_high = np.array(
            [self.camera.width_px + pixel_margin, self.camera.height_px + pixel_margin]
        )
        self._velocity_bound = velocity_bound
        self.observation_space = spaces.Dict(
            {
                "joint_angle_rad": spaces.Box(
                    self._obs_angle_low, self._obs_angle_high, shape=(n,), dtype=np.float64
                ),
                "joint_velocity_rad_s": spaces.Box(
                    -velocity_bound, velocity_bound, shape=(n,), dtype=np.float64
                ),
                "target_position_m": spaces.Box(
                    -TARGET_BOUND_M, TARGET_BOUND_M, shape=(3,), dtype=np.float64
                ),
                "tip_pixel_px": spaces.Box(
                    self._pixel_low, self._pixel_high, shape=(2,), dtype=np.float64
                ),
                "tip_visible": spaces.Discrete(2),
                "target_pixel_px": spaces.Box(
                    self._pixel_low, self._pixel_high, shape=(2,), dtype=np.float64
                ),
                "target_visible": spaces.Discrete(2),
                "camera_fresh": spaces.Discrete(2),
            }
        )
        if self.image_px is not None:
            self.observation_space.spaces["image"] = spaces.Box(
                0, 255, shape=(self.image_px, self.image_px, 3), dtype=np.uint8
            )
        # the hot path's precomputed pieces (step, _observation, _info)
        self._action_low = np.asarray(self.action_space.low, dtype=float)
        self._action_high = np.asarray(self.action_space.high, dtype=float)
        self._action_shape = self.action_space.shape
        self._neg_velocity_bound = -velocity_bound
        self.max_steps = max(1, int(round(self.episode_s * self.control_hz)))
        self._success = HeldInside(1.0 / self.control_hz, SUCCESS_HOLD_S)
        self._target_velocity = np.zeros(3)
        self._target_moving = False
        self._set_target(self._reach_samples[0].copy())
        self._step_count = 0
        self._last_action = np.zeros(n)
        self._last_obs: dict[str, Any] | None = None

    def _angle_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        world = self.world
        assert world is not None
        margin = 1.0 + 10.0 * self._encoders.angle_noise_rad
        low = np.where(np.isfinite(world.lower_rad), world.lower_rad - margin, -1e3)
        high = np.where(np.isfinite(world.upper_rad), world.upper_rad + margin, 1e3)
        return low, high

    # ------------------------------------------------------ scenario hooks
    @staticmethod
    def _target_modes() -> tuple[str, ...]:
        return TARGET_MODES

    def _build_scenery(self) -> None:
        """Bench and trays scaled to the arm's reach at tray height."""
        world = self.world
        assert world is not None
        # Targets sit high enough above the cells that the tip link's own geometry clears the
        # tray: the radius of its collision box around the link origin, plus 3 cm (the iiwa's
        # link_7 origin lies inside its wrist housing, ~11 cm from the housing's far corner).
        lo, hi = world.client.getAABB(world.robot, world.tip_link)
        corners = np.array(np.meshgrid(*zip(lo, hi, strict=True))).reshape(3, -1).T
        tip_radius = float(np.max(np.linalg.norm(corners - world.tip_position(), axis=1)))
        above_cell = max(TARGET_ABOVE_CELL_M, tip_radius + 0.03)
        target_height = TRAY_HEIGHT_M + above_cell
        self.reach_m = horizontal_reach_m(self._reach_samples, target_height)
        self.layout: BenchLayout | None = dataclasses.replace(
            bench_layout_for_reach(self.reach_m), target_above_cell_m=above_cell
        )
        self._bench_bodies = build_bench(world, self.layout)
        self.cell_targets_m = self.layout.cell_targets_m()
        self._workspace_centre = self.layout.workspace_centre_m

    def _default_camera(self, camera_hz: float, noise_px: float) -> CameraDescription:
        """Front-side, above: looks from beyond the trays back at the arm and the bench."""
        centre = np.array([0.45 * self.reach_m, 0.0, 0.2 * self.reach_m])
        direction = np.array([1.0, -0.8, 0.5])
        eye = centre + 2.0 * self.reach_m * direction / np.linalg.norm(direction)
        width, height = self.camera_size_px
        pose = look_at(eye, centre)
        return pinhole_camera(pose, width, height, np.deg2rad(60.0), camera_hz, noise_px)

    def _add_occluder(self) -> None:
        """A seedling tray on a shelf between the camera and the cells: its edge lies on the
        line of sight to the cells' centre, so it hides part of the view of the targets (and
        of the tool-point marker near them) in both camera modes (it has a collision shape,
        so the projected camera's ray test meets it too)."""
        world = self._world()
        cells = self.cell_targets_m if len(self.cell_targets_m) else self._workspace_centre[None]
        centre = np.mean(cells, axis=0)
        eye = self.camera.base_from_camera[:3, 3]
        point = centre + OCCLUDER_FRACTION * (eye - centre)
        half = np.array(OCCLUDER_HALF_EXTENTS_M)
        # the tray's top face through the line of sight; its -y edge on the line
        position = point + np.array([0.0, half[1], -half[2]])
        world.add_box("occluding tray", half, position, (0.1, 0.1, 0.1, 1.0))

    def _rendered_noise_px(self, sensor_noise_px: float) -> float:
        """The rendered camera's pixel noise as the agent is told it: the measured detection
        error of a marker at the workspace centre's distance (:func:`detection_sd_px`) and the
        added sensor noise, independent, so their variances add."""
        distance = float(
            np.linalg.norm(self.camera.base_from_camera[:3, 3] - self._workspace_centre)
        )
        radius = marker_radius_px(self.camera, distance, MARKER_RADIUS_M)
        return float(np.hypot(detection_sd_px(radius), sensor_noise_px))

    def _render_frame(self) -> np.ndarray:
        """The camera's view now, (height, width, 4) uint8 RGBA (TinyRenderer, headless; no
        segmentation mask); the tool-point marker is moved onto the tip first."""
        return self._render_view(
            self.camera.width_px, self.camera.height_px, self._view_matrix, self._projection_matrix
        )

    def _render_view(
        self, width: int, height: int, view: list[float], projection: list[float]
    ) -> np.ndarray:
        world = self._world()
        world.move_body(self._tip_marker, world.tip_position())
        rgba = world.client.getCameraImage(
            width,
            height,
            viewMatrix=view,
            projectionMatrix=projection,
            renderer=pybullet.ER_TINY_RENDERER,
            flags=pybullet.ER_NO_SEGMENTATION_MASK,
        )[2]
        return np.asarray(rgba, dtype=np.uint8).reshape(height, width, 4)

    def _render_image(self) -> None:
        """The ``image`` observation: a small RGB frame of the same camera (updated on camera
        frames only)."""
        view, projection = self._image_matrices
        side = self._image.shape[0]
        np.copyto(self._image, self._render_view(side, side, view, projection)[:, :, :3])

    def _sample_target(self) -> np.ndarray:
        if self.targets == "bench":
            return self.cell_targets_m[int(self.np_random.integers(len(self.cell_targets_m)))]
        assert self.layout is not None
        min_height = self.layout.top_z_m + TRAY_HEIGHT_M + 0.05
        return self._random_reachable_point(min_height=min_height, min_radius=0.25 * self.reach_m)

    def _random_reachable_point(self, min_height: float, min_radius: float) -> np.ndarray:
        """Tip position of a random joint configuration inside the limits (rejection).

        Configurations are drawn within ``RANDOM_TARGET_SPREAD_RAD`` of the home posture
        (clipped to the limits), so a target never asks for a different arm configuration
        (an elbow or base flip), which is a planning problem rather than a reach.
        """
        world = self.world
        assert world is not None
        low = np.maximum(self._sample_lower, self.home_rad - RANDOM_TARGET_SPREAD_RAD)
        high = np.minimum(self._sample_upper, self.home_rad + RANDOM_TARGET_SPREAD_RAD)
        for _ in range(1000):
            q = self.np_random.uniform(low, high)
            point = world.tip_positions_for(q[None, :])[0]
            if point[2] >= min_height and np.hypot(point[0], point[1]) >= min_radius:
                return point
        raise ConfigError(
            "targets: no random reachable point above the bench found in 1000 tries; "
            "check the URDF's limits or use targets='bench'"
        )

    def _line_of_sight(self, name: str, point: np.ndarray) -> bool:
        world = self.world
        assert world is not None
        if name == "tip":
            return world.line_of_sight(
                self._camera.centre_m,
                point,
                own=(world.robot, world.tip_link),
                margin_m=self.tip_view_margin_m,
            )
        return world.line_of_sight(self._camera.centre_m, point)

    # ============================================================ gym API
    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[dict[str, Any], dict[str, Any]]:
        """Start an episode: a new target and the home posture plus seeded noise.

        ``options`` may hold ``target_position_m`` (3,) and/or ``joint_angle_rad`` (n,) to
        fix the target or the initial posture.
        """
        super().reset(seed=seed)
        world = self._world()
        options = dict(options or {})
        unknown = set(options) - {"target_position_m", "joint_angle_rad"}
        if unknown:
            raise ConfigError(
                f"options: unknown keys {sorted(unknown)}; allowed: joint_angle_rad, "
                "target_position_m"
            )
        target = self._sample_target()
        noise = self.np_random.uniform(-HOME_NOISE_RAD, HOME_NOISE_RAD, size=self.home_rad.shape)
        q0 = np.clip(self.home_rad + noise, world.lower_rad, world.upper_rad)
        if "target_position_m" in options:
            target = np.asarray(options["target_position_m"], dtype=float)
            if target.shape != (3,) or not np.all(np.isfinite(target)):
                raise ConfigError(
                    f"options target_position_m: expected 3 finite values (m), got {target}"
                )
        if "joint_angle_rad" in options:
            q0 = np.asarray(options["joint_angle_rad"], dtype=float)
            if q0.shape != self.home_rad.shape or not np.all(np.isfinite(q0)):
                raise ConfigError(
                    f"options joint_angle_rad: expected {self.home_rad.size} finite angles, "
                    f"got {q0}"
                )
        self._set_target(np.array(target, dtype=float))
        world.reset_joints(q0)
        world.move_body(self._target_marker, self._target)
        self._last_action = np.zeros(len(world.joint_names))
        world.send_command(self.control, self._last_action)
        self._step_count = 0
        self._success.reset()
        angle, velocity = world.joint_state()
        tip = world.tip_position()
        self._camera.reset(self._camera_points(tip), self.np_random)
        if self._image_camera is not None:
            self._render_image()
        obs = self._observation(angle, velocity, True)
        info = self._info(angle, velocity, tip, _distance(tip, self._target))
        return obs, info

    def step(self, action: np.ndarray) -> tuple[dict[str, Any], float, bool, bool, dict[str, Any]]:
        """Send one command, advance ``1 / control_hz`` s, read the sensors."""
        world = self.world
        if world is None:
            raise RuntimeError("env is closed")
        try:
            command = np.asarray(action, dtype=float)
        except (TypeError, ValueError) as exc:
            raise ValueError(
                f"action: expected {self.action_space.shape[0]} numbers, got {action!r}"
            ) from exc
        if command.shape != self._action_shape:
            raise ValueError(
                f"action: expected shape {self.action_space.shape}, got {command.shape}"
            )
        if not all(map(math.isfinite, command.tolist())):
            raise ValueError(f"action: must be finite, got {command.tolist()}")
        command = _clip(command, self._action_low, self._action_high)
        self._last_action = command

        world.send_command(self.control, command)
        world.step()
        if self._target_moving:
            self._set_target(self._target + self._target_velocity / self.control_hz)
            world.move_body(self._target_marker, self._target)
        angle, velocity = world.joint_state()
        tip = world.tip_position()
        fresh = self._camera.advance(self._camera_points(tip), self.np_random)
        if fresh and self._image_camera is not None:
            self._render_image()
        obs = self._observation(angle, velocity, fresh)

        self._step_count += 1
        distance = _distance(tip, self._target)
        self._success.update(distance <= self.tolerance_m)
        reward = -distance + (SUCCESS_BONUS if self._success.held else 0.0)
        info = self._info(angle, velocity, tip, distance)
        truncated = self._step_count >= self.max_steps
        return obs, float(reward), False, bool(truncated), info

    def render(self) -> np.ndarray | None:
        """The scenario camera's view (rgb_array) as (height, width, 3) uint8; None for human."""
        if self.render_mode != "rgb_array":
            return None
        world = self._world()
        world.move_body(self._tip_marker, world.tip_position())
        view, projection = self._view_matrix, self._projection_matrix
        return world.render(view, projection, self.camera.width_px, self.camera.height_px)

    def close(self) -> None:
        """Disconnect the pybullet client (safe to call more than once)."""
        world = getattr(self, "world", None)
        if world is not None:
            world.close()
            self.world = None

    def __del__(self) -> None:
        try:
            self.close()
        except Exception:  # noqa: BLE001  (interpreter shutdown: modules may be gone)
            pass

    # ================================================== perturbation hooks
    def set_payload(self, mass_kg: float) -> None:
        """Add ``mass_kg`` at the tool tip link, in the simulation only (lasts until changed)."""
        self._world().set_payload(mass_kg)

    def apply_push(self, force_n: np.ndarray, duration_s: float) -> None:
        """Push the tool tip with a world-frame force (N) over the next ``duration_s`` seconds."""
        self._world().apply_push(force_n, duration_s)

    def set_target_velocity(self, velocity_m_s: np.ndarray) -> None:
        """Move the target linearly at this velocity (m/s) each step (lasts until changed)."""
        velocity = np.asarray(velocity_m_s, dtype=float)
        if velocity.shape != (3,) or not np.all(np.isfinite(velocity)):
            raise ConfigError(f"velocity_m_s: expected 3 finite values (m/s), got {velocity_m_s!r}")
        self._target_velocity = velocity.copy()
        self._target_moving = bool(np.any(velocity))

    def contacts(self) -> list:
        """Arm contacts with the bench, trays and itself (``blanket.sim.Contact`` list)."""
        return self._world().contacts()

    # ============================================================ helpers
    def _world(self) -> ArmWorld:
        if self.world is None:
            raise RuntimeError("env is closed")
        return self.world

    def _set_target(self, target: np.ndarray) -> None:
        """The target, its clipped copy for the observation and its true pixel for the log
        (made once per change)."""
        self._target = target
        self._target_obs = _clip(target, -TARGET_BOUND_M, TARGET_BOUND_M)
        self._target_true_px = self.camera.project(target)

    def _camera_points(self, tip: np.ndarray) -> dict[str, np.ndarray]:
        return {"tip": tip, "target": self._target}

    def _observation(self, angle: np.ndarray, velocity: np.ndarray, fresh: bool) -> dict[str, Any]:
        read_angle, read_velocity = self._encoders.read(angle, velocity, self.np_random)
        camera = self._camera
        if fresh:  # the clipped pixels change only with a frame
            pixel = camera.pixel_px
            self._tip_pixel = _clip(pixel["tip"], self._pixel_low, self._pixel_high)
            self._target_pixel = _clip(pixel["target"], self._pixel_low, self._pixel_high)
        visible = camera.visible
        obs = {
            "joint_angle_rad": _clip(read_angle, self._obs_angle_low, self._obs_angle_high),
            "joint_velocity_rad_s": _clip(
                read_velocity, self._neg_velocity_bound, self._velocity_bound
            ),
            "target_position_m": self._target_obs.copy(),
            "tip_pixel_px": self._tip_pixel.copy(),
            "tip_visible": int(visible["tip"]),
            "target_pixel_px": self._target_pixel.copy(),
            "target_visible": int(visible["target"]),
            "camera_fresh": int(fresh),
        }
        if self._image_camera is not None:
            obs["image"] = self._image.copy()
        return obs

    def _info(
        self, angle: np.ndarray, velocity: np.ndarray, tip: np.ndarray, distance: float
    ) -> dict[str, Any]:
        world = self.world
        assert world is not None
        return {
            "distance_m": distance,
            "inside_tolerance": distance <= self.tolerance_m,
            "success": self._success.success,
            "time_to_success_s": self._success.time_to_success_s,
            "time_s": self._step_count / self.control_hz,
            "contact": world.in_contact(),
            "external": {
                "joint_angle_rad": angle.copy(),
                "joint_velocity_rad_s": velocity.copy(),
                "tip_position_m": tip.copy(),
                "target_position_m": self._target.copy(),
                # the true projection of the marker centres, in every camera mode
                "tip_pixel_px": self.camera.project(tip),
                "target_pixel_px": self._target_true_px.copy(),
                "commanded_action": self._last_action.copy(),
                "payload_kg": world.payload_kg,
                "push_force_n": world.push_force_n,
                "target_velocity_m_s": self._target_velocity.copy(),
            },
        }


def _camera_size(camera: str, size: Any) -> tuple[int, int]:
    """``camera_size_px`` checked: (width, height), each an integer in [16, 4096]."""
    if size is None:
        return DEFAULT_CAMERA_SIZE_PX[camera]
    try:
        width, height = size
    except (TypeError, ValueError):
        raise ConfigError(
            f"camera_size_px: expected (width, height) in pixels, got {shorten(size)}"
        ) from None
    for value in (width, height):
        if isinstance(value, bool) or not isinstance(value, int | np.integer):
            raise ConfigError(
                f"camera_size_px: width and height must be integers in [16, 4096], got {size!r}"
            )
        if not 16 <= value <= 4096:
            raise ConfigError(
                f"camera_size_px: width and height must be integers in [16, 4096], got {size!r}"
            )
    return int(width), int(height)


def _image_px(value: Any) -> int | None:
    """``image_px`` checked: None/False (no image), True (:data:`IMAGE_PX`) or a side in
    [16, 512]."""
    if value is None or value is False:
        return None
    if value is True:
        return IMAGE_PX
    if not isinstance(value, int | np.integer) or not 16 <= value <= 512:
        raise ConfigError(
            f"image_px: must be true, false or an integer side in [16, 512], got {shorten(value)}"
        )
    return int(value)


def _distance(a: np.ndarray, b: np.ndarray) -> float:
    """``float(np.linalg.norm(a - b))`` for 3-vectors, bit for bit (``sqrt`` of the dot product,
    as numpy's 2-norm of a 1-D float array), without the general norm's dispatch."""
    d = a - b
    return float(np.sqrt(d.dot(d)))


class PlanarReachEnv(ArmReachEnv):
    """Reach a point in the horizontal plane with the 2-link planar arm, watched from above.

    Same keywords as :class:`ArmReachEnv` except the arm, which is fixed to
    ``assets/planar_2link.urdf`` (tool tip ``tool_tip``); targets are tip positions of random
    joint configurations at least 0.15 m from the base. Gravity (-z) is along the joint
    axes, so it does not load the joints.
    """

    #: Home posture (rad): elbow bent, away from the stretched-out singularity.
    HOME_RAD = (0.3, 1.2)
    #: Targets closer to the base than this are rejected (m).
    MIN_TARGET_RADIUS_M = 0.15

    def __init__(
        self,
        control: str = "velocity",
        episode_s: float = 4.0,
        tolerance_m: float = 0.01,
        control_hz: float = 240.0,
        camera_hz: float = 30.0,
        encoder_angle_noise_rad: float = 0.01,
        encoder_velocity_noise_rad_s: float = 0.05,
        camera_noise_px: float = 2.0,
        targets: str = "random",
        render_mode: str | None = None,
    ) -> None:
        gym.Env.__init__(self)
        self._setup(
            urdf_path=PLANAR_URDF,
            end_effector="tool_tip",
            controlled_joints=None,
            held_joint_positions={},
            home_rad=np.array(self.HOME_RAD),
            control=control,
            episode_s=episode_s,
            tolerance_m=tolerance_m,
            control_hz=control_hz,
            camera_hz=camera_hz,
            encoder_angle_noise_rad=encoder_angle_noise_rad,
            encoder_velocity_noise_rad_s=encoder_velocity_noise_rad_s,
            camera_noise_px=camera_noise_px,
            targets=targets,
            render_mode=render_mode,
        )

    @staticmethod
    def _target_modes() -> tuple[str, ...]:
        return ("random",)

    def _build_scenery(self) -> None:
        """No bench: the arm moves in a horizontal plane; only self-contact is reported."""
        samples = self._reach_samples
        self.reach_m = float(np.max(np.hypot(samples[:, 0], samples[:, 1])))
        self.plane_z_m = float(np.median(samples[:, 2]))
        self.layout = None
        self.cell_targets_m = np.zeros((0, 3))
        self._workspace_centre = np.array([0.0, 0.0, self.plane_z_m])

    def _default_camera(self, camera_hz: float, noise_px: float) -> CameraDescription:
        """Straight above the base, looking down; the whole reach disc is in view."""
        fov = np.deg2rad(60.0)
        height = 1.1 * self.reach_m / np.tan(0.5 * fov)
        eye = self._workspace_centre + np.array([0.0, 0.0, height])
        pose = look_at(eye, self._workspace_centre, up=(1.0, 0.0, 0.0))
        width, height = self.camera_size_px
        return pinhole_camera(pose, width, height, fov, camera_hz, noise_px)

    def _sample_target(self) -> np.ndarray:
        return self._random_reachable_point(min_height=-np.inf, min_radius=self.MIN_TARGET_RADIUS_M)
