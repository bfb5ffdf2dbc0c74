"""Holding env: keep a watering lance's nozzle over a tray cell while random forces push it.

``ArmHoldEnv`` (``blanket/arm-hold-v0``) is the reaching env of :mod:`blanket_envs.arm_reach`
with a different start and a forcing on the tool. The arm starts with its tool tip on the
preferred point (a few centimetres above a seedling tray cell, where the lance must water)
and the task is to stay within ``tolerance_m`` of it while the tool is pushed by

- a random force: an Ornstein-Uhlenbeck (Langevin) process per world axis, of stationary
  standard deviation ``force_sd_n`` and correlation time ``force_correlation_s`` (gusts from
  the greenhouse vents, a hose tugging at the lance), and
- occasional shoves: a Poisson process of rate ``shove_rate_hz``, each a horizontal force of
  ``shove_force_n`` in a uniformly random direction lasting ``shove_duration_s`` (a cart or a
  person bumping the lance).

Sensor noise is the reach env's. The forcing of a whole episode is drawn at reset from the
env's one generator (``reset(seed=s)``), before any step, so every policy meets the same
forces for the same seed whatever it does. ``info["external"]`` reports the forces that acted
during the last step (``disturbance_force_n``, ``disturbance_shove_n``; zeros at reset).

The task defaults to torque control: pybullet's velocity motors hold their commanded speed
against any force below the joint effort limits (a 30 N, 0.2 s push moved an iiwa tip held
by the classical baseline 0.04 mm under velocity control, 8.7 cm under torque control), so
under velocity control there is little to hold against.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from blanket.errors import ConfigError
from blanket_envs.arm_reach import ArmReachEnv, _non_negative, _positive

__all__ = ["ArmHoldEnv", "ornstein_uhlenbeck_path", "shove_schedule"]

#: Damping of the damped least-squares solve that puts the tip on the preferred point (m).
IK_DAMPING_M = 0.01
#: The start posture must put the tip this close to the preferred point (m).
IK_TOLERANCE_M = 1e-4


def ornstein_uhlenbeck_path(
    rng: np.random.Generator,
    steps: int,
    dim: int,
    dt: float,
    correlation_s: float,
    sd: float,
) -> np.ndarray:
    """A stationary Ornstein-Uhlenbeck path sampled every ``dt``, shape ``(steps, dim)``.

    The process ``dx = -x / tau dt + sd sqrt(2 / tau) dW`` (Uhlenbeck & Ornstein 1930, Phys.
    Rev. 36, 823) has the exact discretisation

        x_{k+1} = x_k e^{-dt/tau} + sd sqrt(1 - e^{-2 dt/tau}) xi_k,  xi_k ~ N(0, I)

    (Gardiner, *Stochastic Methods*, 4th ed. 2009, sec. 3.8.4, the conditional
    distribution of the OU process; section number from memory). ``x_0`` is drawn from the
    stationary law N(0, sd^2 I), so the path is stationary from its first sample:
    ``E[x_k x_{k+m}] = sd^2 e^{-m dt / tau}``. All ``steps * dim`` normals are drawn at once.
    """
    from scipy.signal import lfilter

    a = float(np.exp(-dt / correlation_s))
    xi = rng.standard_normal((steps, dim))
    if steps == 0:
        return xi
    drive = sd * np.sqrt(1.0 - a * a) * xi
    drive[0] = sd * xi[0]  # x_0 from the stationary law
    # x_k = a x_{k-1} + drive_k, x_0 = drive_0: a first-order recursive filter along time
    return lfilter([1.0], [1.0, -a], drive, axis=0)


def shove_schedule(
    rng: np.random.Generator,
    steps: int,
    control_hz: float,
    rate_hz: float,
    force_n: float,
    duration_s: float,
) -> np.ndarray:
    """The shove force of every control step, shape ``(steps, 3)`` (N, world frame).

    Shove starts form a Poisson process of rate ``rate_hz``: exponential gaps (mean
    ``1 / rate_hz``), each counted from the end of the previous shove so shoves never overlap
    (and at least one step without a shove parts two).
    Each shove is ``force_n`` in a uniformly random horizontal direction for
    ``max(1, round(duration_s * control_hz))`` steps. ``rate_hz = 0``: no shoves.
    """
    out = np.zeros((steps, 3))
    if rate_hz <= 0.0 or force_n <= 0.0:
        return out
    length = max(1, int(round(duration_s * control_hz)))
    t, free = 0.0, 0  # free: the first step after the last shove (one quiet step between)
    while True:
        t += float(rng.exponential(1.0 / rate_hz))
        start = max(int(round(t * control_hz)), free)
        free = start + length + 1
        if start >= steps:
            return out
        angle = 2.0 * np.pi * float(rng.random())
        out[start : start + length] = force_n * np.array([np.cos(angle), np.sin(angle), 0.0])
        t = (start + length) / control_hz


class ArmHoldEnv(ArmReachEnv):
    """Hold the tool tip on a preferred point above a tray cell against random forcing.

    Keywords are those of :class:`~blanket_envs.arm_reach.ArmReachEnv` (``control`` defaults
    to ``"torque"``, ``episode_s`` to 8 s, ``tolerance_m`` to 2 cm), plus the forcing:

    Parameters
    ----------
    force_sd_n : float
        Stationary standard deviation of the random force on each world axis, >= 0 N.
    force_correlation_s : float
        Correlation time of the random force (Ornstein-Uhlenbeck), > 0 s.
    shove_rate_hz : float
        Mean shoves per second, >= 0 (0: none).
    shove_force_n : float
        Magnitude of a shove, >= 0 N (horizontal, random direction).
    shove_duration_s : float
        Length of a shove, > 0 s.

    ``reset`` options are the reach env's: ``target_position_m`` fixes the preferred point
    (the start posture is then solved to put the tip on it), ``joint_angle_rad`` the start
    posture.
    """

    def __init__(
        self,
        robot: str = "iiwa",
        urdf: str | None = None,
        end_effector: str | None = None,
        control: str = "torque",
        episode_s: float = 8.0,
        tolerance_m: float = 0.02,
        control_hz: float = 240.0,
        camera_hz: float = 30.0,
        encoder_angle_noise_rad: float = 0.01,
        encoder_velocity_noise_rad_s: float = 0.05,
        camera_noise_px: float = 2.0,
        targets: str | None = None,
        render_mode: str | None = None,
        force_sd_n: float = 4.0,
        force_correlation_s: float = 0.5,
        shove_rate_hz: float = 0.25,
        shove_force_n: float = 25.0,
        shove_duration_s: float = 0.1,
    ) -> None:
        # the forcing is checked first, so a bad value leaves no simulator behind
        self.force_sd_n = _non_negative("force_sd_n", force_sd_n)
        self.force_correlation_s = _positive("force_correlation_s", force_correlation_s)
        self.shove_rate_hz = _non_negative("shove_rate_hz", shove_rate_hz)
        self.shove_force_n = _non_negative("shove_force_n", shove_force_n)
        self.shove_duration_s = _positive("shove_duration_s", shove_duration_s)
        self._force = np.zeros((0, 3))
        self._shove = np.zeros((0, 3))
        self._acting_force = np.zeros(3)
        self._acting_shove = np.zeros(3)
        super().__init__(
            robot=robot,
            urdf=urdf,
            end_effector=end_effector,
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

    # ============================================================ gym API
    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[dict[str, Any], dict[str, Any]]:
        """Start an episode with the tip on the preferred point; draw the episode's forcing."""
        options = dict(options or {})
        self._acting_force = np.zeros(3)
        self._acting_shove = np.zeros(3)
        obs, info = super().reset(seed=seed, options=options)  # the preferred point
        if "joint_angle_rad" not in options:
            start = {"target_position_m": self._target.copy()}
            start["joint_angle_rad"] = self._posture_for(self._target)
            # the same generator continues: the draws stay a function of the seed
            obs, info = super().reset(options=start)
        rng = self.np_random
        dt = 1.0 / self.control_hz
        self._force = ornstein_uhlenbeck_path(
            rng, self.max_steps, 3, dt, self.force_correlation_s, self.force_sd_n
        )
        self._shove = shove_schedule(
            rng,
            self.max_steps,
            self.control_hz,
            self.shove_rate_hz,
            self.shove_force_n,
            self.shove_duration_s,
        )
        return obs, info

    def step(self, action: np.ndarray) -> tuple[dict[str, Any], float, bool, bool, dict[str, Any]]:
        """Apply this step's forcing at the tool tip, then the reach env's step."""
        world = self._world()
        k = self._step_count
        if k < len(self._force):
            self._acting_force = self._force[k]
            self._acting_shove = self._shove[k]
        else:  # stepping on after the episode's horizon: no forcing drawn
            self._acting_force = self._acting_shove = np.zeros(3)
        world.apply_tool_force(self._acting_force + self._acting_shove)
        try:
            return super().step(action)
        except BaseException:
            world.apply_tool_force(np.zeros(3))  # a refused action sends no force either
            raise

    # ============================================================ helpers
    @property
    def shove_starts_s(self) -> np.ndarray:
        """Start times (s) of this episode's shoves (the step whose force first acts, / Hz)."""
        on = np.any(self._shove != 0.0, axis=1)
        starts = np.flatnonzero(on & ~np.concatenate([[False], on[:-1]]))
        return starts / self.control_hz

    def _posture_for(self, point: np.ndarray) -> np.ndarray:
        """Joint angles that put the tool tip on ``point``: damped least squares from home
        (Wampler 1986, IEEE Trans. SMC 16(1)), clipped to the joint limits."""
        world = self._world()
        q = self.home_rad.copy()
        eye = np.eye(3) * IK_DAMPING_M**2
        for _ in range(200):
            error = point - world.tip_positions_for(q[None, :])[0]
            if float(np.linalg.norm(error)) < IK_TOLERANCE_M:
                return q
            J = world.tip_jacobian(q)
            q = np.clip(
                q + J.T @ np.linalg.solve(J @ J.T + eye, error), world.lower_rad, world.upper_rad
            )
        raise ConfigError(
            f"target_position_m: no posture puts the tool tip within {IK_TOLERANCE_M} m of "
            f"{np.round(point, 3).tolist()} (out of reach?)"
        )

    def _info(
        self, angle: np.ndarray, velocity: np.ndarray, tip: np.ndarray, distance: float
    ) -> dict[str, Any]:
        info = super()._info(angle, velocity, tip, distance)
        info["external"]["disturbance_force_n"] = np.array(self._acting_force, dtype=float)
        info["external"]["disturbance_shove_n"] = np.array(self._acting_shove, dtype=float)
        return info
