"""``blanket/base-goto-v0``: drive a mobile base between greenhouse bench rows to its charging dock.

The base (our two-wheel ``rover`` or pybullet_data's four-wheel skid-steer ``husky``) starts at a
seeded pose in an aisle or the east headland and must reach the dock pose (within 10 cm and
10 degrees, held for 0.25 s) without touching a bench. Physics runs at 240 Hz in its own
``BulletClient`` (DIRECT, or GUI for ``render_mode="human"``); the control rate divides 240.

Action: ``(left, right)`` wheel angular speeds in rad/s, each within
``+-wheel_speed_limit_rad_s`` (clipped), applied by pybullet's wheel velocity motors; for the
husky each side's command drives both wheels of that side.

Observation (Dict):
``wheel_speed_rad_s`` (2), ``yaw_rate_rad_s`` (1, only with ``use_gyro``),
``landmark_bearing_rad`` (L), ``landmark_range_m`` (L, only when ``range_noise_m`` is not None),
``landmark_visible`` (MultiBinary L, from the latest frame), ``camera_fresh`` (Discrete 2: a frame
arrived this step). Unseen landmarks keep their last value.

``info``: ``distance_m``, ``heading_error_rad``, ``inside_tolerance``, ``success`` and
``time_to_success_s`` (the one success rule, :class:`blanket.success.HeldInside`: inside the
tolerance for ``success_hold_s``; the time is the entry time of the stay that was held, None
until then), ``time_s``, ``contact`` (the base touched a bench during this step),
``contact_count`` (steps with contact so far), and the truth under ``external``: ``base_pose``
(x_m, y_m, heading_rad), ``base_velocity`` (x'_m_s, y'_m_s, yaw_rate_rad_s, world frame),
``wheel_speed_rad_s`` (true, left/right), ``dock_pose``. No wall-clock value: ``info`` repeats
exactly for a repeated seed.

The simulation itself is :class:`blanket.sim.base_world.BaseWorld`; this module holds the task
(dock, success, reward), the sensors' settings and the robots' configuration :data:`ROBOTS`.

Skid-steer calibration: :func:`calibrate_effective_track` spins the base in place in an empty
world and compares the yaw rate with ``r (w_R - w_L) / track``; the ratio is the effective-track
factor stored in :data:`ROBOTS` (and re-measured by the tests).
"""

from __future__ import annotations

import os
from dataclasses import replace
from typing import Any

import gymnasium as gym
import numpy as np
import pybullet_data
from gymnasium import spaces

from blanket.base_description import BaseDescription
from blanket.errors import ConfigError, did_you_mean
from blanket.planar_motion import wrap_angle
from blanket.sensors.landmarks import LandmarkSensor
from blanket.sensors.wheel_odometry import WheelOdometry
from blanket.sim.base_world import PHYSICS_HZ, BaseWorld, RobotSpec, spin_in_place
from blanket.success import HeldInside
from blanket_envs.greenhouse_rows import (
    LAYOUTS,
    GreenhouseLayout,
    box_distance,
    sample_start_pose,
    validate_layout,
)

__all__ = ["RobotSpec", "ROBOTS", "BaseGotoEnv", "calibrate_effective_track", "PHYSICS_HZ"]

_ASSETS = os.path.join(os.path.dirname(__file__), "assets")

ROBOTS: dict[str, RobotSpec] = {
    # Our URDF: r = 0.06 m, wheels at y = +-0.15 m.
    "rover": RobotSpec(
        urdf=os.path.join(_ASSETS, "rover.urdf"),
        left_joints=("left_wheel_joint",),
        right_joints=("right_wheel_joint",),
        wheel_radius_m=0.06,
        track_m=0.30,
        effective_track_factor=1.0,
        icr_offset_m=0.0,
        wheel_speed_limit_rad_s=8.0,
        wheel_torque_limit_n_m=2.0,
        camera_offset_m=0.12,
        camera_height_m=0.25,
        half_length_m=0.23,
        half_width_m=0.17,
        has_gyro=False,
    ),
    # pybullet_data husky/husky.urdf: wheel cylinders r = 0.17775 m, wheels at y = +-0.2854 m.
    # effective_track_factor and icr_offset_m: mean of calibrate_effective_track("husky", w) over
    # w = 1, 2, 3, 4 rad/s (factors 3.17, 2.75, 3.56, 2.90; ICR -0.21 m throughout), printed by
    # scripts/bench_base.py and re-checked in tests/test_base.py. pybullet's skid steer slips far
    # more than a real Husky, hence the large factor.
    "husky": RobotSpec(
        urdf=os.path.join(pybullet_data.getDataPath(), "husky", "husky.urdf"),
        left_joints=("front_left_wheel", "rear_left_wheel"),
        right_joints=("front_right_wheel", "rear_right_wheel"),
        wheel_radius_m=0.17775,
        track_m=0.5708,
        effective_track_factor=3.1,
        icr_offset_m=-0.21,
        wheel_speed_limit_rad_s=4.0,
        wheel_torque_limit_n_m=60.0,
        camera_offset_m=0.35,
        camera_height_m=0.45,
        half_length_m=0.55,
        half_width_m=0.35,
        has_gyro=True,  # the URDF carries an imu_link; the default fit includes its yaw gyro
    ),
}


def _check_positive(name: str, value: Any, unit: str, allow_zero: bool = False) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{name} must be a number of {unit}, got {value!r}") from None
    ok = np.isfinite(v) and (v >= 0 if allow_zero else v > 0)
    if not ok:
        raise ConfigError(f"{name} must be {'>= 0' if allow_zero else '> 0'} {unit}, got {value!r}")
    return v


def _robot_spec(robot: str) -> RobotSpec:
    if robot not in ROBOTS:
        raise ConfigError(f"robot must be one of {sorted(ROBOTS)}, got {robot!r}")
    return ROBOTS[robot]


def calibrate_effective_track(
    robot: str = "husky", wheel_speed_rad_s: float = 2.0, duration_s: float = 4.0
) -> dict[str, float]:
    """Measure the effective-track factor and ICR offset of a base by a spin in place.

    :func:`blanket.sim.base_world.spin_in_place` for the robot called ``robot`` (see there:
    ``factor``, ``icr_offset_m``, ``yaw_rate_rad_s``, ``predicted_yaw_rate_rad_s``).
    """
    return spin_in_place(_robot_spec(robot), wheel_speed_rad_s, duration_s)


class BaseGotoEnv(gym.Env):
    """Drive a differential-drive or skid-steer base to the greenhouse charging dock.

    Parameters
    ----------
    robot : {"rover", "husky"}
        Which base.
    control_hz : float
        Control rate; must divide 240 (default 40: six physics substeps per step).
    episode_s : float
        Episode length (truncation), default 60 s.
    wheel_speed_noise_rad_s : float
        Odometry noise per wheel (default 0.1 rad/s).
    use_gyro : bool or None
        Fit a yaw-rate gyro (observation ``yaw_rate_rad_s``); None (default) means the robot's
        standard fit: no gyro on the rover, the IMU's gyro on the husky. ``yaw_rate_noise_rad_s``
        is its noise.
    bearing_noise_rad, range_noise_m : float, float or None
        Landmark-camera noise; ``range_noise_m=None`` makes the camera bearing-only.
    camera_hz, camera_fov_rad, camera_range_m : float
        Camera frame rate (divides ``control_hz``), horizontal field of view and range.
    landmarks : array_like (L, 2) or None
        Custom landmark (post) positions; default the greenhouse posts.
    dock_pose : array_like (3,) or None
        Custom goal ``(x_m, y_m, heading_rad)``; default the greenhouse dock.
    layout : {"rows", "dark-aisle"}
        ``"rows"`` (default): the three bench rows with all posts, seeded starts in the aisles
        and the east headland. ``"dark-aisle"``: posts only at the ends of the south aisle and a
        nominal start in the east headland facing the dark north aisle
        (:func:`blanket_envs.greenhouse_rows.dark_aisle_layout`).
    start_pose_sd : array_like (3,) or None
        Only with a nominal start (``"dark-aisle"``): standard deviations ``(x_m, y_m,
        heading_rad)`` of the true start around it, each in [0, 1]; the description tells the
        agent the nominal pose and these spreads. None (default) starts exactly at the nominal.
    wheel_radius_m, effective_track_factor : float or None
        What the description reports (default: the robot's true values); set them to test an
        agent against a miscalibrated model.
    terminate_on_success : bool
        End the episode when ``success`` first becomes true (default True).
    measure_step_time : bool
        Deprecated, no effect (accepted so that existing scenario files keep working): the env
        reports no wall-clock ``sim_step_us``, so ``info`` repeats exactly for a repeated seed.
    render_mode : {"rgb_array", "human"} or None
        ``"human"`` opens pybullet's GUI.
    """

    metadata = {"render_modes": ["rgb_array", "human"], "render_fps": 20}

    def __init__(
        self,
        robot: str = "rover",
        control_hz: float = 40.0,
        episode_s: float = 60.0,
        wheel_speed_noise_rad_s: float = 0.1,
        use_gyro: bool | None = None,
        yaw_rate_noise_rad_s: float = 0.01,
        bearing_noise_rad: float = 0.02,
        range_noise_m: float | None = 0.05,
        camera_hz: float = 10.0,
        camera_fov_rad: float = float(np.deg2rad(100.0)),
        camera_range_m: float = 8.0,
        landmarks: Any = None,
        dock_pose: Any = None,
        layout: str = "rows",
        start_pose_sd: Any = None,
        wheel_radius_m: float | None = None,
        effective_track_factor: float | None = None,
        terminate_on_success: bool = True,
        measure_step_time: bool = True,
        render_mode: str | None = None,
    ) -> None:
        super().__init__()
        spec = _robot_spec(robot)
        if use_gyro is None:
            use_gyro = spec.has_gyro
        control_hz = _check_positive("control_hz", control_hz, "Hz")
        if control_hz < 1.0:
            raise ConfigError(
                f"control_hz must divide {PHYSICS_HZ} Hz and be >= 1, got {control_hz}"
            )
        substeps = PHYSICS_HZ / control_hz
        if abs(substeps - round(substeps)) > 1e-9:
            raise ConfigError(
                f"control_hz must divide {PHYSICS_HZ} Hz (e.g. 40, 48, 60), got {control_hz}"
            )
        self.substeps = int(round(substeps))
        self.control_hz = control_hz
        self.episode_s = _check_positive("episode_s", episode_s, "s")
        if self.episode_s > 3600.0:
            raise ConfigError(f"episode_s must be in (0, 3600] s, got {episode_s}")
        camera_hz = _check_positive("camera_hz", camera_hz, "Hz")
        if camera_hz > control_hz:
            raise ConfigError(f"camera_hz must be in (0, control_hz={control_hz}], got {camera_hz}")
        for name, val in (
            ("wheel_speed_noise_rad_s", wheel_speed_noise_rad_s),
            ("yaw_rate_noise_rad_s", yaw_rate_noise_rad_s),
            ("bearing_noise_rad", bearing_noise_rad),
        ):
            _check_positive(name, val, "rad or rad/s", allow_zero=True)
        if range_noise_m is not None:
            _check_positive("range_noise_m", range_noise_m, "m (or None for bearing-only)", True)
        fov = _check_positive("camera_fov_rad", camera_fov_rad, "rad")
        if fov > 2 * np.pi:
            raise ConfigError(f"camera_fov_rad must be in (0, 2 pi], got {camera_fov_rad}")
        _check_positive("camera_range_m", camera_range_m, "m")
        radius_known = spec.wheel_radius_m
        if wheel_radius_m is not None:
            radius_known = _check_positive("wheel_radius_m", wheel_radius_m, "m")
        factor = spec.effective_track_factor
        if effective_track_factor is not None:
            factor = _check_positive("effective_track_factor", effective_track_factor, "")
        if render_mode is not None and render_mode not in self.metadata["render_modes"]:
            raise ConfigError(
                f"render_mode must be one of {self.metadata['render_modes']} or None, "
                f"got {render_mode!r}"
            )
        self.render_mode = render_mode

        if layout not in LAYOUTS:
            raise ConfigError(f"layout {layout!r} is unknown; {did_you_mean(layout, LAYOUTS)}")
        self.layout_name = layout
        layout = LAYOUTS[layout]()
        if start_pose_sd is not None:
            if layout.start_pose is None:
                raise ConfigError(
                    "start_pose_sd needs a layout with a nominal start (layout='dark-aisle')"
                )
            try:
                sd = np.asarray(start_pose_sd, dtype=float).reshape(-1)
            except (TypeError, ValueError):
                sd = np.full(1, np.nan)
            if sd.shape != (3,) or not np.all((sd >= 0) & (sd <= 1)):
                raise ConfigError(
                    "start_pose_sd must be 3 numbers (x_m, y_m, heading_rad) in [0, 1], "
                    f"got {start_pose_sd!r}"
                )
            start_pose_sd = sd
        elif layout.start_pose is not None:
            start_pose_sd = np.zeros(3)
        self.start_pose_sd = start_pose_sd
        if landmarks is not None:
            lm = np.asarray(landmarks, dtype=float)
            if lm.ndim != 2 or lm.shape[1] != 2 or len(lm) == 0:
                raise ConfigError(
                    f"landmarks must be a non-empty (L, 2) list of x_m, y_m, got {landmarks!r}"
                )
            layout = replace(layout, landmarks_m=lm)
        if dock_pose is not None:
            layout = replace(layout, dock_pose=np.asarray(dock_pose, dtype=float).reshape(-1))
        validate_layout(layout, clearance_m=spec.half_width_m)
        self.layout: GreenhouseLayout = layout
        self.robot_spec = spec
        self.robot = robot

        self.world = BaseWorld(
            spec, layout, gui=render_mode == "human", rest_pose=np.asarray(layout.dock_pose)
        )
        w = self.world
        self._odometry = WheelOdometry(
            w.client,
            w.body,
            w.left_joints,
            w.right_joints,
            wheel_speed_noise_rad_s,
            use_gyro=use_gyro,
            yaw_rate_noise_rad_s=yaw_rate_noise_rad_s,
        )
        self._camera = LandmarkSensor(
            w.client,
            layout.landmarks_m,
            w.bodies.posts,
            w.body,
            fov_rad=fov,
            max_range_m=float(camera_range_m),
            bearing_noise_rad=float(bearing_noise_rad),
            range_noise_m=None if range_noise_m is None else float(range_noise_m),
            rate_hz=camera_hz,
            control_hz=control_hz,
            camera_offset_m=spec.camera_offset_m,
            camera_height_m=spec.camera_height_m,
        )
        self.terminate_on_success = bool(terminate_on_success)
        self.description = BaseDescription(
            robot=robot,
            wheel_radius_m=radius_known,
            track_m=spec.track_m,
            effective_track_m=spec.track_m * factor,
            icr_offset_m=spec.icr_offset_m,
            wheel_speed_limit_rad_s=spec.wheel_speed_limit_rad_s,
            half_length_m=spec.half_length_m,
            half_width_m=spec.half_width_m,
            control_hz=control_hz,
            wheel_speed_noise_rad_s=float(wheel_speed_noise_rad_s),
            use_gyro=bool(use_gyro),
            yaw_rate_noise_rad_s=float(yaw_rate_noise_rad_s),
            camera_hz=camera_hz,
            camera_fov_rad=fov,
            camera_range_m=float(camera_range_m),
            camera_offset_m=spec.camera_offset_m,
            bearing_noise_rad=float(bearing_noise_rad),
            range_noise_m=None if range_noise_m is None else float(range_noise_m),
            landmarks_m=np.array(layout.landmarks_m, dtype=float),
            bench_boxes_m=np.array(layout.bench_boxes_m, dtype=float),
            world_bounds_m=np.array(layout.world_bounds_m, dtype=float),
            dock_pose=np.array(layout.dock_pose, dtype=float),
            episode_s=self.episode_s,
            start_pose=None if layout.start_pose is None else np.array(layout.start_pose),
            start_pose_sd=None if start_pose_sd is None else np.array(start_pose_sd),
        )
        L = len(layout.landmarks_m)
        lim = spec.wheel_speed_limit_rad_s
        self.action_space = spaces.Box(-lim, lim, shape=(2,), dtype=np.float32)
        self._wheel_obs_bound = np.float32(3.0 * lim + 1.0)
        obs = {
            "wheel_speed_rad_s": spaces.Box(
                -self._wheel_obs_bound, self._wheel_obs_bound, shape=(2,), dtype=np.float32
            ),
            "landmark_bearing_rad": spaces.Box(
                -np.float32(np.pi), np.float32(np.pi), shape=(L,), dtype=np.float32
            ),
            "landmark_visible": spaces.MultiBinary(L),
            "camera_fresh": spaces.Discrete(2),
        }
        if use_gyro:
            obs["yaw_rate_rad_s"] = spaces.Box(-20.0, 20.0, shape=(1,), dtype=np.float32)
        if range_noise_m is not None:
            self._range_bound = np.float32(2.0 * camera_range_m)
            obs["landmark_range_m"] = spaces.Box(
                np.float32(0.0), self._range_bound, shape=(L,), dtype=np.float32
            )
        self.observation_space = spaces.Dict(obs)
        self._success_rule = HeldInside(1.0 / control_hz, self.description.success_hold_s)
        self._reset_state()

    # ------------------------------------------------------------------ internals
    def _reset_state(self) -> None:
        L = len(self.layout.landmarks_m)
        self._step = 0
        self._last_bearing = np.zeros(L)
        self._last_range = np.zeros(L)
        self._visible = np.zeros(L, dtype=np.int8)
        self._success_rule.reset()
        self._contact_count = 0

    def _observe(self, fresh: bool) -> dict[str, Any]:
        rng = self.np_random
        wheels, yaw_rate = self._odometry.read(rng)
        if fresh:
            frame = self._camera.read(self.world.planar_pose(), rng)
            seen = frame["visible"].astype(bool)
            self._last_bearing[seen] = frame["bearing_rad"][seen]
            self._last_range[seen] = frame["range_m"][seen]
            self._visible = frame["visible"]
        obs: dict[str, Any] = {
            "wheel_speed_rad_s": np.clip(
                wheels, -self._wheel_obs_bound, self._wheel_obs_bound
            ).astype(np.float32),
            "landmark_bearing_rad": np.clip(self._last_bearing, -np.pi, np.pi).astype(np.float32),
            "landmark_visible": self._visible.copy(),
            "camera_fresh": int(fresh),
        }
        if yaw_rate is not None:
            obs["yaw_rate_rad_s"] = np.clip([yaw_rate], -20.0, 20.0).astype(np.float32)
        if self.description.range_noise_m is not None:
            obs["landmark_range_m"] = np.clip(self._last_range, 0.0, self._range_bound).astype(
                np.float32
            )
        return obs

    def _info(self, contact: bool) -> dict[str, Any]:
        pose = self.world.planar_pose()
        dock = self.description.dock_pose
        distance = float(np.hypot(*(dock[:2] - pose[:2])))
        heading_error = float(wrap_angle(dock[2] - pose[2]))
        inside = (
            distance <= self.description.success_distance_m
            and abs(heading_error) <= self.description.success_heading_rad
        )
        return {
            "distance_m": distance,
            "heading_error_rad": heading_error,
            "inside_tolerance": bool(inside),
            "success": self._success_rule.success,
            "time_to_success_s": self._success_rule.time_to_success_s,
            "time_s": self._step / self.control_hz,
            "contact": bool(contact),
            "contact_count": self._contact_count,
            "external": {
                "base_pose": pose,
                "base_velocity": self.world.planar_velocity(),
                "wheel_speed_rad_s": self._odometry.true_wheel_speeds(),
                "dock_pose": np.array(dock, dtype=float),
            },
        }

    # ------------------------------------------------------------------ gym API
    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[dict[str, Any], dict[str, Any]]:
        """Place the base at a seeded start pose (or ``options["start_pose"]``) and settle it."""
        super().reset(seed=seed)
        clearance = float(np.hypot(self.robot_spec.half_length_m, self.robot_spec.half_width_m))
        if options and options.get("start_pose") is not None:
            start = np.asarray(options["start_pose"], dtype=float).reshape(-1)
            if start.shape != (3,) or not np.all(np.isfinite(start)):
                raise ConfigError(
                    f"start_pose must be (x_m, y_m, heading_rad), got {options['start_pose']!r}"
                )
            gap = np.min(box_distance(start[:2], self.layout.bench_boxes_m))
            if gap < self.robot_spec.half_width_m:
                raise ConfigError(
                    f"start_pose {tuple(start[:2])} lies inside an obstacle: it must be >= "
                    f"{self.robot_spec.half_width_m:.2f} m from every bench"
                )
        else:
            start = sample_start_pose(
                self.np_random, self.layout, clearance, start_pose_sd=self.start_pose_sd
            )
        self._reset_state()
        self.world.reset(start)
        self.world.step(self.substeps)
        obs = self._observe(fresh=True)
        return obs, self._info(contact=False)

    def step(self, action: Any) -> tuple[dict[str, Any], float, bool, bool, dict[str, Any]]:
        a = np.asarray(action, dtype=float)
        if a.shape != (2,):
            raise ValueError(
                f"action must have shape (2,) (left, right wheel speed rad/s), got {a.shape}"
            )
        if not np.all(np.isfinite(a)):
            raise ValueError(f"action must be finite wheel speeds in rad/s, got {a.tolist()}")
        lim = self.robot_spec.wheel_speed_limit_rad_s
        a = np.clip(a, -lim, lim)
        self.world.command(float(a[0]), float(a[1]))
        contact = self.world.step(self.substeps)
        self._step += 1
        self._contact_count += int(contact)
        fresh = self._camera.is_frame_step(self._step)
        obs = self._observe(fresh)
        info = self._info(contact)
        info["success"] = self._success_rule.update(info["inside_tolerance"])
        info["time_to_success_s"] = self._success_rule.time_to_success_s
        reward = -info["distance_m"] / self.control_hz - float(contact)
        terminated = bool(info["success"] and self.terminate_on_success)
        truncated = bool(self._step >= round(self.episode_s * self.control_hz))
        return obs, float(reward), terminated, truncated, info

    def render(self) -> np.ndarray | None:
        """An RGB overhead image for ``render_mode="rgb_array"``; None otherwise."""
        if self.render_mode != "rgb_array":
            return None
        return self.world.render()

    def close(self) -> None:
        if getattr(self, "world", None) is not None:
            self.world.close()
            self.world = None
