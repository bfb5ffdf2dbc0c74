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

``info``: ``distance_m``, ``heading_error_rad``, ``inside_tolerance``, ``success``,
``time_to_success_s`` (None until success), ``time_s``, ``contact`` (the base touched a bench
during this step), ``contact_count`` (steps with contact so far), ``sim_step_us``, and the
truth under ``external``: ``base_pose`` (x_m, y_m, heading_rad), ``base_velocity``
(x'_m_s, y'_m_s, yaw_rate_rad_s, world frame), ``wheel_speed_rad_s`` (true, left/right).

Skid-steer calibration: :func:`calibrate_effective_track` spins the base in place in an empty
world and compares the yaw rate with ``r (w_R - w_L) / track``; the ratio is the effective-track
factor stored in :data:`ROBOTS` (and re-measured by the tests).
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, replace
from typing import Any

import gymnasium as gym
import numpy as np
import pybullet
import pybullet_data
from gymnasium import spaces
from pybullet_utils import bullet_client

from blanket.base_description import BaseDescription
from blanket.body.diff_drive import wrap_angle
from blanket.errors import ConfigError
from blanket.sensors.landmarks import LandmarkSensor
from blanket.sensors.wheel_odometry import WheelOdometry
from blanket_envs.greenhouse_rows import (
    GreenhouseLayout,
    box_distance,
    build_world,
    default_layout,
    sample_start_pose,
    validate_layout,
)

__all__ = ["RobotSpec", "ROBOTS", "BaseGotoEnv", "calibrate_effective_track", "PHYSICS_HZ"]

PHYSICS_HZ = 240
_ASSETS = os.path.join(os.path.dirname(__file__), "assets")


@dataclass(frozen=True)
class RobotSpec:
    """Fixed facts about a simulated base (geometry from its URDF, limits our choice)."""

    urdf: str
    left_joints: tuple[str, ...]
    right_joints: tuple[str, ...]
    wheel_radius_m: float
    track_m: float
    effective_track_factor: float
    icr_offset_m: float
    wheel_speed_limit_rad_s: float
    wheel_torque_limit_n_m: float
    camera_offset_m: float
    camera_height_m: float
    half_length_m: float
    half_width_m: float
    has_gyro: bool


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


class _Base:
    """A base loaded into a client: joint indices, frame conversion, wheel motors."""

    def __init__(self, client: Any, spec: RobotSpec) -> None:
        self.client = client
        self.robot_spec = spec
        self.body = client.loadURDF(
            spec.urdf, [0, 0, 0.3], flags=pybullet.URDF_USE_INERTIA_FROM_FILE
        )
        names = {}
        for j in range(client.getNumJoints(self.body)):
            info = client.getJointInfo(self.body, j)
            names[info[1].decode()] = j
        self.left = [names[n] for n in spec.left_joints]
        self.right = [names[n] for n in spec.right_joints]
        self.wheels = self.left + self.right
        # Links without an <inertial> get 1 kg and unit inertia from pybullet; make them light.
        for link in range(-1, client.getNumJoints(self.body)):
            dyn = client.getDynamicsInfo(self.body, link)
            if abs(dyn[0] - 1.0) < 1e-12 and np.allclose(dyn[2], 1.0):
                client.changeDynamics(self.body, link, mass=0.01, localInertiaDiagonal=[1e-5] * 3)
        dyn = client.getDynamicsInfo(self.body, -1)
        self.com_in_link = (tuple(dyn[3]), tuple(dyn[4]))
        # Height of the link origin above the floor when standing: the wheel axle for the rover
        # (wheel radius), the floor for the husky's base_footprint.
        self.stand_z = spec.wheel_radius_m if spec.urdf.endswith("rover.urdf") else 0.0

    def link_pose(self) -> tuple[np.ndarray, np.ndarray]:
        """World position and quaternion of the base *link* frame (not its inertial frame)."""
        pos, orn = self.client.getBasePositionAndOrientation(self.body)
        inv_pos, inv_orn = self.client.invertTransform(*self.com_in_link)
        p, q = self.client.multiplyTransforms(pos, orn, inv_pos, inv_orn)
        return np.array(p), np.array(q)

    def planar_pose(self) -> np.ndarray:
        p, q = self.link_pose()
        yaw = self.client.getEulerFromQuaternion(q)[2]
        return np.array([p[0], p[1], yaw])

    def planar_velocity(self) -> np.ndarray:
        """World-frame ``(x', y', yaw rate)`` of the link origin."""
        lin, ang = self.client.getBaseVelocity(self.body)
        com, _ = self.client.getBasePositionAndOrientation(self.body)
        p, _ = self.link_pose()
        v = np.array(lin) + np.cross(np.array(ang), p - np.array(com))
        return np.array([v[0], v[1], ang[2]])

    def reset_pose(self, pose: np.ndarray) -> None:
        q = self.client.getQuaternionFromEuler([0.0, 0.0, float(pose[2])])
        p, qq = self.client.multiplyTransforms(
            [float(pose[0]), float(pose[1]), self.stand_z + 0.002], q, *self.com_in_link
        )
        self.client.resetBasePositionAndOrientation(self.body, p, qq)
        self.client.resetBaseVelocity(self.body, [0, 0, 0], [0, 0, 0])
        for j in self.wheels:
            self.client.resetJointState(self.body, j, 0.0, 0.0)

    def command(self, left: float, right: float) -> None:
        n_l, n_r = len(self.left), len(self.right)
        self.client.setJointMotorControlArray(
            self.body,
            self.wheels,
            pybullet.VELOCITY_CONTROL,
            targetVelocities=[left] * n_l + [right] * n_r,
            forces=[self.robot_spec.wheel_torque_limit_n_m] * (n_l + n_r),
        )


def calibrate_effective_track(
    robot: str = "husky", wheel_speed_rad_s: float = 2.0, duration_s: float = 4.0
) -> dict[str, float]:
    """Measure the effective-track factor and ICR offset of a base by a spin in place.

    Commands ``(-w, +w)`` in an empty world, discards the first second and averages the yaw rate
    ``omega`` and the lateral velocity ``u`` of the base origin. The factor is
    ``(r (w_R - w_L) / track) / omega`` (1 for a base that does not slip) and the ICR offset is
    ``-u / omega`` (Martinez et al. 2005, Int J Robot Res 24(10)).

    Returns
    -------
    dict
        ``factor``, ``icr_offset_m``, ``yaw_rate_rad_s`` (measured) and
        ``predicted_yaw_rate_rad_s`` (two-wheel relation with the geometric track).
    """
    if robot not in ROBOTS:
        raise ConfigError(f"robot must be one of {sorted(ROBOTS)}, got {robot!r}")
    spec = ROBOTS[robot]
    client = bullet_client.BulletClient(connection_mode=pybullet.DIRECT)
    try:
        client.setGravity(0, 0, -9.81)
        client.setPhysicsEngineParameter(fixedTimeStep=1.0 / PHYSICS_HZ)
        client.loadURDF(os.path.join(pybullet_data.getDataPath(), "plane.urdf"))
        base = _Base(client, spec)
        base.reset_pose(np.zeros(3))
        base.command(0.0, 0.0)
        for _ in range(PHYSICS_HZ // 2):
            client.stepSimulation()
        base.command(-wheel_speed_rad_s, wheel_speed_rad_s)
        rates, lateral = [], []
        for k in range(int(duration_s * PHYSICS_HZ)):
            client.stepSimulation()
            if k >= PHYSICS_HZ:
                vel = base.planar_velocity()
                h = base.planar_pose()[2]
                rates.append(vel[2])
                lateral.append(-np.sin(h) * vel[0] + np.cos(h) * vel[1])
    finally:
        client.disconnect()
    omega = float(np.mean(rates))
    predicted = spec.wheel_radius_m * 2.0 * wheel_speed_rad_s / spec.track_m
    return {
        "factor": predicted / omega,
        "icr_offset_m": -float(np.mean(lateral)) / omega,
        "yaw_rate_rad_s": omega,
        "predicted_yaw_rate_rad_s": predicted,
    }


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
    wheel_radius_m, effective_track_factor : float or None
        What the description reports (default: the robot's true values); set them to test an
        agent against a miscalibrated model.
    terminate_on_success : bool
        End the episode when ``success`` first becomes true (default True).
    measure_step_time : bool
        Report the wall time of the physics substeps as ``info["sim_step_us"]`` (default True);
        False reports 0.0, which makes ``info`` bit-reproducible (gymnasium's ``check_env``
        compares the info of repeated seeded steps).
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
        wheel_radius_m: float | None = None,
        effective_track_factor: float | None = None,
        terminate_on_success: bool = True,
        measure_step_time: bool = True,
        render_mode: str | None = None,
    ) -> None:
        super().__init__()
        if robot not in ROBOTS:
            raise ConfigError(f"robot must be one of {sorted(ROBOTS)}, got {robot!r}")
        spec = ROBOTS[robot]
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

        layout = default_layout()
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

        mode = pybullet.GUI if render_mode == "human" else pybullet.DIRECT
        self._client = bullet_client.BulletClient(connection_mode=mode)
        c = self._client
        c.setGravity(0, 0, -9.81)
        c.setPhysicsEngineParameter(fixedTimeStep=1.0 / PHYSICS_HZ)
        self.world = build_world(c, layout, os.path.join(pybullet_data.getDataPath(), "plane.urdf"))
        self._base = _Base(c, spec)
        self._odometry = WheelOdometry(
            c,
            self._base.body,
            self._base.left,
            self._base.right,
            wheel_speed_noise_rad_s,
            use_gyro=use_gyro,
            yaw_rate_noise_rad_s=yaw_rate_noise_rad_s,
        )
        self._camera = LandmarkSensor(
            c,
            layout.landmarks_m,
            self.world.posts,
            self._base.body,
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
        self.measure_step_time = bool(measure_step_time)
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
        self._hold_steps = int(np.ceil(self.description.success_hold_s * control_hz - 1e-9))
        # A snapshot of the settled world (base standing on the dock): every reset restores it
        # before placing the base, so contact caches are identical and steps are deterministic
        # (pybullet's advice for deterministic resets, bullet3 issue #3285).
        self._base.reset_pose(self.description.dock_pose)
        self._base.command(0.0, 0.0)
        for _ in range(PHYSICS_HZ // 4):
            c.stepSimulation()
        self._snapshot = c.saveState()
        self._reset_state()

    # ------------------------------------------------------------------ internals
    def _reset_state(self) -> None:
        L = len(self.layout.landmarks_m)
        self._step = 0
        self._last_bearing = np.zeros(L)
        self._last_range = np.zeros(L)
        self._visible = np.zeros(L, dtype=np.int8)
        self._inside_count = 0
        self._success = False
        self._time_to_success: float | None = None
        self._contact_count = 0
        self._last_step_us = 0.0

    def _observe(self, fresh: bool) -> dict[str, Any]:
        rng = self.np_random
        wheels, yaw_rate = self._odometry.read(rng)
        if fresh:
            frame = self._camera.read(self._base.planar_pose(), rng)
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

    def _contact(self) -> bool:
        body = self._base.body
        for bench in self.world.benches:
            if self._client.getContactPoints(bodyA=body, bodyB=bench):
                return True
        return False

    def _info(self, contact: bool) -> dict[str, Any]:
        pose = self._base.planar_pose()
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
            "success": self._success,
            "time_to_success_s": self._time_to_success,
            "time_s": self._step / self.control_hz,
            "contact": bool(contact),
            "contact_count": self._contact_count,
            "sim_step_us": self._last_step_us,
            "external": {
                "base_pose": pose,
                "base_velocity": self._base.planar_velocity(),
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
            start = sample_start_pose(self.np_random, self.layout, clearance)
        self._reset_state()
        self._client.restoreState(stateId=self._snapshot)
        self._base.reset_pose(start)
        self._base.command(0.0, 0.0)
        for _ in range(self.substeps):
            self._client.stepSimulation()
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
        self._base.command(float(a[0]), float(a[1]))
        contact = False
        t0 = time.perf_counter()
        for _ in range(self.substeps):
            self._client.stepSimulation()
            contact = contact or self._contact()
        self._last_step_us = (time.perf_counter() - t0) * 1e6 if self.measure_step_time else 0.0
        self._step += 1
        self._contact_count += int(contact)
        fresh = self._camera.is_frame_step(self._step)
        obs = self._observe(fresh)
        info = self._info(contact)
        self._inside_count = self._inside_count + 1 if info["inside_tolerance"] else 0
        if not self._success and self._inside_count >= self._hold_steps:
            self._success = True
            self._time_to_success = self._step / self.control_hz
        info["success"] = self._success
        info["time_to_success_s"] = self._time_to_success
        reward = -info["distance_m"] / self.control_hz - float(contact)
        terminated = bool(self._success and self.terminate_on_success)
        truncated = bool(self._step >= round(self.episode_s * self.control_hz))
        return obs, float(reward), terminated, truncated, info

    def render(self) -> np.ndarray | None:
        if self.render_mode != "rgb_array":
            return None
        pose = self._base.planar_pose()
        view = self._client.computeViewMatrixFromYawPitchRoll(
            cameraTargetPosition=[pose[0] * 0.3, pose[1] * 0.3, 0.0],
            distance=12.0,
            yaw=0.0,
            pitch=-70.0,
            roll=0.0,
            upAxisIndex=2,
        )
        proj = self._client.computeProjectionMatrixFOV(
            fov=60.0, aspect=4 / 3, nearVal=0.1, farVal=40
        )
        w, h = 320, 240
        img = self._client.getCameraImage(w, h, view, proj, renderer=pybullet.ER_TINY_RENDERER)[2]
        return np.asarray(img, dtype=np.uint8).reshape(h, w, 4)[:, :, :3]

    def close(self) -> None:
        if getattr(self, "_client", None) is not None:
            try:
                self._client.disconnect()
            except pybullet.error:
                pass
            self._client = None
