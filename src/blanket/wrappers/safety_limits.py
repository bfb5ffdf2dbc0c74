"""``SafetyLimits``: clamp every command to a robot safety profile before it reaches the motors.

On by default in ``blanket demo`` / ``run`` / ``bench`` (the runner wraps the env);
``gymnasium.make`` gives the bare env, which only clips to the URDF limits and rejects
non-finite actions with a ``ValueError``.

What the wrapper does, each step (arm envs):

1. **Protective stop.** A non-finite command (NaN, inf), a command beyond
   ``divergence_factor`` times the profile limit (a diverging controller), or -- with
   ``stop_on_contact`` -- an arm contact with the bench, a tray or itself reported after the
   previous step, replaces the command by the *stop command*: zero joint velocity (velocity
   control), or the braking torque ``tau = h(q, q') - k_brake M(q) q'`` (torque control:
   gravity and Coriolis terms ``h`` and mass matrix ``M`` from the simulator's own
   rigid-body model, ``ArmWorld.inverse_dynamics`` and ``ArmWorld.mass_matrix`` (pybullet's,
   as loaded, without a payload), on the true joint state -- the wrapper is part of the
   world and never uses the agent's body model -- clipped to the profile torque). With
   ``latch_stop`` (default) the stop holds until
   ``reset()``, like a robot controller's protective stop.
2. Otherwise the joint-velocity command ``v`` goes through these checks, in order:

   a. **workspace box** (``workspace_box_m``): when the tool tip is outside the box, ``v``
      loses the part that moves the tip further out (projection through the damped
      pseudo-inverse of the outward rows of the tip Jacobian);
   b. **joint position margin** (``joint_margin_rad``): a joint within the margin of a
      position limit gets no velocity further into the limit (zeroed), and outside the margin
      its speed toward the limit is cut so that one control step cannot enter the margin;
   c. **joint velocity limit** of the profile: a command above a joint's limit scales the
      whole command down together (the joint-space direction is kept);
   d. **tool-speed cap** (``tool_speed_cap_m_s``, e.g.
      :data:`blanket.robot_limits.REDUCED_SPEED_M_S`,
      the 250 mm/s reduced speed of ISO 10218-1:2011, 5.6): ``v`` is scaled down until the
      tool-tip speed ``|J(q) v|`` is at most the cap.

   Under torque control the torque is first clipped per joint to the profile torque; then
   the velocity it would produce one step later, ``v+ = q' + dt inv(M)(tau - h)``, goes
   through a-d, and a changed ``v+`` is turned back into a torque by inverse dynamics
   (``tau = M (v+ - q')/dt + h``), clipped again to the profile torque. The torque limit
   always holds; the velocity, margin, box and speed checks hold as far as the torque limit
   and the world model's accuracy allow (a payload the model does not know, or a contact,
   makes them approximate). This is the "restoring or zeroing" choice for torque mode: a
   joint in the margin is driven to zero velocity toward the limit, not pushed back out.

**The applied command as a sensation.** A real drive reports the setpoint it applied, and
the wrapper knows it: an arm env's Dict observation gains the key ``applied_command`` (the
command that reached the env on the step that led to this observation; zeros after
``reset()``, before any command). Its space is the env's action space. An agent that treats
its own last command as what moved the arm (the efference copy of velocity control, the
disturbance observer and the payload learning of torque control) reads it instead, so a
clamped or stopped command does not leave it believing in a motion that did not happen.

Every command is logged: ``info["action_applied"]`` is the command sent to the env, and
``info["safety"]`` is ``dict(clamped, reason, safe_stop, safe_stop_reason, contact_stops,
profile, joint_speed_ratio)``; ``info["external"]["safe_stop"]`` and ``["safety_clamped"]``
carry the flags into the trajectory logs. ``contact_stops`` counts contact stops since the
wrapper was made. ``joint_speed_ratio`` is the largest ``|true joint velocity| / velocity
limit`` over the joints after the step (the profile's limits; for a mobile base the true
wheel speeds over the action bounds, NaN when the env reports none): the measured outcome of
the velocity limit, 1.0 at the limit.

The wrapper's ``action_space`` is the bare env's (the URDF bounds), but :meth:`step` accepts any
array of the right shape, NaN and inf included; a command that is not an array of numbers of
that shape raises ``ValueError``.

For a non-arm env (the mobile bases) the wrapper applies 1 and 2c only, to the env's action
bounds (wheel speeds), with zero as the stop command.

Wrapper order: the safety wrapper sits directly under the policy, outermost on the action
path -- around any perturbation wrappers (:func:`blanket.conditions.apply_conditions`), and
under any wrapper that only rescales or reshapes what a learner sees (RL observation and
action-scaling wrappers), so the command it checks is the one in physical units.
"""

from __future__ import annotations

import math
from typing import Any, SupportsFloat

import gymnasium as gym
import numpy as np

from blanket.description import ArmDescription
from blanket.errors import ConfigError
from blanket.robot_limits import SafetyProfile, profile_for, profile_named
from blanket.sensors.clip import clip_values
from blanket.wrappers.perturbations import number_in_range

__all__ = ["SafetyLimits", "APPLIED_COMMAND_KEY"]

#: Observation key of the command that reached the env (arm envs with a Dict observation).
APPLIED_COMMAND_KEY = "applied_command"

#: Damping of the tip-Jacobian pseudo-inverse used for the workspace projection (m).
_WORKSPACE_DAMPING_M = 1e-3


class SafetyLimits(gym.Wrapper, gym.utils.RecordConstructorArgs):
    """Clamp commands to a robot safety profile; stop on non-finite commands and contacts.

    See the module docstring for what is checked and in which order.

    Parameters
    ----------
    env : gymnasium.Env
        A blanket arm env (``blanket/arm-reach-v0``, ``blanket/planar-2link-v0``) or any env
        with a bounded Box action space of velocity-like commands.
    profile : SafetyProfile or str, optional
        The limits; default :func:`blanket.robot_limits.profile_for` of the env's description. A
        name from :data:`blanket.robot_limits.PROFILE_NAMES` is accepted.
    joint_margin_rad : float
        Margin before the joint position limits (>= 0).
    workspace_box_m : array_like, shape (2, 3), optional
        ``[[x_min, y_min, z_min], [x_max, y_max, z_max]]`` of the tool tip, base frame.
    tool_speed_cap_m_s : float, optional
        Largest tool-tip speed (> 0).
    stop_on_contact : bool
        Protective stop when the arm touches the bench, a tray or itself.
    divergence_factor : float
        A command beyond this many times the profile limit (> 1) is treated as a diverging
        controller: protective stop.
    latch_stop : bool
        Hold a protective stop until ``reset()`` (else only on the steps that trigger it).
    brake_gain_1_s : float
        Velocity-damping rate of the braking torque (> 0), 1/s; with 60 1/s at 240 Hz a joint
        speed falls by a quarter each step when the torque limit allows.
    """

    def __init__(
        self,
        env: gym.Env,
        profile: SafetyProfile | str | None = None,
        joint_margin_rad: float = 0.05,
        workspace_box_m: Any = None,
        tool_speed_cap_m_s: float | None = None,
        stop_on_contact: bool = True,
        divergence_factor: float = 100.0,
        latch_stop: bool = True,
        brake_gain_1_s: float = 60.0,
    ) -> None:
        gym.utils.RecordConstructorArgs.__init__(
            self,
            profile=profile,
            joint_margin_rad=joint_margin_rad,
            workspace_box_m=workspace_box_m,
            tool_speed_cap_m_s=tool_speed_cap_m_s,
            stop_on_contact=stop_on_contact,
            divergence_factor=divergence_factor,
            latch_stop=latch_stop,
            brake_gain_1_s=brake_gain_1_s,
        )
        gym.Wrapper.__init__(self, env)
        self.joint_margin_rad = number_in_range("joint_margin_rad", joint_margin_rad, 0.0)
        self.divergence_factor = number_in_range(
            "divergence_factor", divergence_factor, 1.0, low_open=True
        )
        self.brake_gain_1_s = number_in_range("brake_gain_1_s", brake_gain_1_s, 0.0, low_open=True)
        self.tool_speed_cap_m_s = (
            None
            if tool_speed_cap_m_s is None
            else number_in_range("tool_speed_cap_m_s", tool_speed_cap_m_s, 0.0, low_open=True)
        )
        self.stop_on_contact = bool(stop_on_contact)
        self.latch_stop = bool(latch_stop)
        self.workspace_box_m = self._check_box(workspace_box_m)

        self._base = env.unwrapped  # the bare env, found once (the wrapper chain is fixed)
        description = getattr(self._base, "description", None)
        self._arm = isinstance(description, ArmDescription) and hasattr(self._base, "world")
        space = env.action_space
        if not isinstance(space, gym.spaces.Box) or len(space.shape) != 1:
            raise ConfigError(
                f"SafetyLimits: needs a 1-D Box action space, got {type(space).__name__}"
            )
        self._shape = space.shape
        if self._arm:
            self.control = description.control
            if isinstance(profile, str):
                profile = profile_named(profile, description)
            elif profile is None:
                profile = profile_for(description)
            elif not isinstance(profile, SafetyProfile):
                raise ConfigError(
                    f"profile: must be a SafetyProfile, a profile name or None, got {profile!r}"
                )
            if profile.n_joints != description.n_joints:
                raise ConfigError(
                    f"profile: {profile.name} has {profile.n_joints} joints, the arm has "
                    f"{description.n_joints}"
                )
            self.profile: SafetyProfile | None = profile
            self.velocity_limit_rad_s = np.minimum(
                np.asarray(profile.velocity_limit_rad_s), description.velocity_limit_rad_s
            )
            self.torque_limit_n_m = np.minimum(
                np.asarray(profile.torque_limit_n_m), description.torque_limit_n_m
            )
            self.command_limit = (
                self.velocity_limit_rad_s if self.control == "velocity" else self.torque_limit_n_m
            )
            self._lower = np.asarray(description.lower_rad, dtype=float)
            self._upper = np.asarray(description.upper_rad, dtype=float)
            # The joint-position margin's edges; with finite limits (the usual case) the room
            # to them needs no check for infinities.
            self._margin_upper = self._upper - self.joint_margin_rad
            self._margin_lower = self._lower + self.joint_margin_rad
            self._finite_limits = bool(
                np.all(np.isfinite(self._upper)) and np.all(np.isfinite(self._lower))
            )
            self._dt = 1.0 / float(description.control_hz)
            self._profile_name = profile.name
            # Velocity motors push with at most the profile's torques, not the URDF efforts.
            world = getattr(env.unwrapped, "world", None)
            if world is not None and hasattr(world, "set_velocity_motor_force"):
                world.set_velocity_motor_force(self.torque_limit_n_m)
        else:
            if profile is not None:
                raise ConfigError("profile: only arm envs take a safety profile")
            if self.workspace_box_m is not None or self.tool_speed_cap_m_s is not None:
                raise ConfigError(
                    "workspace_box_m / tool_speed_cap_m_s: only arm envs have a tool tip"
                )
            high = np.asarray(space.high, dtype=float)
            if not np.all(np.isfinite(high)) or np.any(high <= 0.0):
                raise ConfigError(
                    f"SafetyLimits: needs finite action bounds > 0, got high={high.tolist()}"
                )
            self.profile = None
            self.control = "velocity"
            self.command_limit = np.minimum(high, -np.asarray(space.low, dtype=float))
            self._profile_name = "action space"
        # The applied command as a sensation (arm envs with a Dict observation).
        obs_space = env.observation_space
        self._sense_applied = bool(
            self._arm
            and isinstance(obs_space, gym.spaces.Dict)
            and APPLIED_COMMAND_KEY not in obs_space.spaces
        )
        if self._sense_applied:
            self.observation_space = gym.spaces.Dict(
                {
                    **obs_space.spaces,
                    APPLIED_COMMAND_KEY: gym.spaces.Box(
                        space.low, space.high, shape=space.shape, dtype=space.dtype
                    ),
                }
            )
        self.contact_stops = 0
        self._stop_reason = ""
        self._contact_pending = False

    # ------------------------------------------------------------------ setup
    @staticmethod
    def _check_box(box: Any) -> np.ndarray | None:
        if box is None:
            return None
        try:
            arr = np.asarray(box, dtype=float)
        except (TypeError, ValueError):
            arr = np.zeros(0)
        if arr.shape != (2, 3) or not np.all(np.isfinite(arr)) or not np.all(arr[0] < arr[1]):
            raise ConfigError(
                "workspace_box_m: expected [[x_min, y_min, z_min], [x_max, y_max, z_max]] "
                f"(finite, min < max, m), got {box!r}"
            )
        return arr

    @property
    def _world(self) -> Any:
        """The simulator (:class:`blanket.sim.ArmWorld`): the wrapper is part of the world."""
        return self._base.world

    def _state(self) -> tuple[np.ndarray, np.ndarray]:
        """True joint angles and velocities (the wrapper is part of the world, not the agent)."""
        return self._world.joint_state()

    def _speed_ratio(self, info: dict[str, Any]) -> float:
        """Largest |true joint (or wheel) speed| / limit over the joints, after a step."""
        if self._arm:
            speed = np.abs(self._state()[1])
            return float((speed / self.velocity_limit_rad_s).max())
        wheels = info.get("external", {}).get("wheel_speed_rad_s")
        if wheels is None or np.shape(wheels) != self._shape:
            return float("nan")
        return float(np.max(np.abs(np.asarray(wheels, dtype=float)) / self.command_limit))

    # ------------------------------------------------------------------ gym API
    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[Any, dict[str, Any]]:
        obs, info = self.env.reset(seed=seed, options=options)
        self._stop_reason = ""
        self._contact_pending = bool(info.get("contact", False))
        info = dict(info)
        info["safety"] = self._safety_info(False, "", False, "", self._speed_ratio(info))
        external = dict(info.get("external", {}))
        external["safe_stop"] = False
        external["safety_clamped"] = False
        info["external"] = external
        return self._with_applied(obs, np.zeros(self._shape)), info

    def _with_applied(self, obs: Any, applied: np.ndarray) -> Any:
        """The observation with the applied command added (arm envs with a Dict observation)."""
        if not self._sense_applied:
            return obs
        out = dict(obs)
        out[APPLIED_COMMAND_KEY] = applied
        return out

    def step(self, action: Any) -> tuple[Any, SupportsFloat, bool, bool, dict[str, Any]]:
        requested = self._parse(action)
        applied, reasons, stop_reason = self.filter_command(requested)
        obs, reward, terminated, truncated, info = self.env.step(applied)
        self._contact_pending = bool(info.get("contact", False))
        # applied and requested have one shape and, without a stop, finite values
        clamped = bool(stop_reason) or bool((applied != requested).any())
        info = dict(info)
        info["action_applied"] = applied.copy()
        info["safety"] = self._safety_info(
            clamped, "; ".join(reasons), bool(stop_reason), stop_reason, self._speed_ratio(info)
        )
        external = dict(info.get("external", {}))
        external["safe_stop"] = bool(stop_reason)
        external["safety_clamped"] = clamped
        info["external"] = external
        return self._with_applied(obs, applied.copy()), reward, terminated, truncated, info

    def _safety_info(
        self, clamped: bool, reason: str, safe_stop: bool, stop_reason: str, speed_ratio: float
    ) -> dict[str, Any]:
        return {
            "clamped": clamped,
            "reason": reason,
            "safe_stop": safe_stop,
            "safe_stop_reason": stop_reason,
            "contact_stops": self.contact_stops,
            "profile": self._profile_name,
            "joint_speed_ratio": speed_ratio,
        }

    def _parse(self, action: Any) -> np.ndarray:
        try:
            command = np.array(action, dtype=float)
        except (TypeError, ValueError, OverflowError):
            raise ValueError(
                f"action: expected {self._shape[0]} numbers, got {type(action).__name__}"
            ) from None
        if command.shape != self._shape:
            raise ValueError(f"action: expected shape {self._shape}, got {command.shape}")
        return command

    # ------------------------------------------------------------------ the filter
    def filter_command(self, requested: np.ndarray) -> tuple[np.ndarray, list[str], str]:
        """The command to send for ``requested`` in the current state.

        Returns
        -------
        applied : numpy.ndarray
            The command after every check (what reaches the env).
        reasons : list of str
            The checks that changed it.
        stop_reason : str
            Why a protective stop is active this step ("" when none).
        """
        stop_reason = ""
        if self.latch_stop and self._stop_reason:
            stop_reason = self._stop_reason
        elif not all(map(math.isfinite, requested.tolist())):
            stop_reason = "non-finite command"
        elif (np.abs(requested) > self.divergence_factor * self.command_limit).any():
            stop_reason = f"command beyond {self.divergence_factor:g} x the profile limit"
        elif self.stop_on_contact and self._contact_pending:
            stop_reason = "contact: " + self._contact_text()
            self.contact_stops += 1
        if stop_reason:
            self._stop_reason = stop_reason
            return self.stop_command(), ["protective stop"], stop_reason
        reasons: list[str] = []
        if not self._arm:
            applied = self._scale_to_limit(requested, self.command_limit, reasons)
        elif self.control == "velocity":
            applied = self._filter_velocity(requested, reasons)
        else:
            applied = self._filter_torque(requested, reasons)
        return applied, reasons, ""

    def stop_command(self) -> np.ndarray:
        """Zero velocity, or the braking torque ``g(q) - k_brake M(q) q'`` (torque control)."""
        if not self._arm or self.control == "velocity":
            return np.zeros(self._shape)
        q, qd = self._state()
        return self._brake(q, qd)

    def _contact_text(self) -> str:
        contacts_fn = getattr(self.env.unwrapped, "contacts", None)
        if contacts_fn is None:
            return "reported by the env"
        contacts = contacts_fn()
        if not contacts:
            return "reported by the env"
        first = contacts[0]
        return f"{first.arm_link} with {first.other}"

    def _bias_torque(self, q: np.ndarray, qd: np.ndarray) -> np.ndarray:
        """``h(q, q')``: gravity, Coriolis and centrifugal torques (the world's model)."""
        return self._world.inverse_dynamics(q, qd, np.zeros(q.shape))

    def _brake(self, q: np.ndarray, qd: np.ndarray) -> np.ndarray:
        tau = self._bias_torque(q, qd) - self.brake_gain_1_s * (self._world.mass_matrix(q) @ qd)
        return clip_values(tau, -self.torque_limit_n_m, self.torque_limit_n_m)

    @staticmethod
    def _scale_to_limit(command: np.ndarray, limit: np.ndarray, reasons: list[str]) -> np.ndarray:
        ratio = (np.abs(command) / limit).max()
        if ratio > 1.0:
            reasons.append("joint velocity limit")
            command = clip_values(command / ratio, -limit, limit)
        return command

    def _outward(self, tip: np.ndarray) -> np.ndarray:
        """+1 where the tip is above a box face, -1 below, 0 inside, per axis."""
        box = self.workspace_box_m
        assert box is not None
        return np.where(tip > box[1], 1.0, np.where(tip < box[0], -1.0, 0.0))

    def _filter_velocity(self, command: np.ndarray, reasons: list[str]) -> np.ndarray:
        q, _ = self._state()
        return self._velocity_checks(command, q, reasons)

    def _velocity_checks(
        self, command: np.ndarray, q: np.ndarray, reasons: list[str]
    ) -> np.ndarray:
        """Workspace box, joint position margin, joint velocity limit, tool-speed cap."""
        command = command.copy()
        J = None
        tip = None
        if self.workspace_box_m is not None:
            tip, J = self._world.tip_position(), self._world.tip_jacobian(q)
            out = self._outward(tip)
            if np.any(out):
                axes = np.flatnonzero(out)
                speed_out = out[axes] * (J[axes] @ command)
                moving_out = speed_out > 0.0
                if np.any(moving_out):
                    rows = J[axes[moving_out]]
                    excess = rows @ command  # the outward tip velocity to remove
                    gram = rows @ rows.T + _WORKSPACE_DAMPING_M**2 * np.eye(len(rows))
                    command = command - rows.T @ np.linalg.solve(gram, excess)
                    reasons.append("workspace box")
        # Joint position margin: no motion further into a limit inside the margin, and no
        # step from outside into it.
        upper_room = self._margin_upper - q
        lower_room = self._margin_lower - q
        if self._finite_limits:
            v_max = np.maximum(upper_room / self._dt, 0.0)
            v_min = np.minimum(lower_room / self._dt, 0.0)
        else:
            with np.errstate(invalid="ignore"):
                v_max = np.where(
                    np.isfinite(upper_room), np.maximum(upper_room / self._dt, 0.0), np.inf
                )
                v_min = np.where(
                    np.isfinite(lower_room), np.minimum(lower_room / self._dt, 0.0), -np.inf
                )
        margin_clipped = clip_values(command, v_min, v_max)
        if not (margin_clipped == command).all():
            reasons.append("joint position margin")
            command = margin_clipped
        if tip is not None and J is not None:
            if np.any(self._outward(tip) * (J @ command) > 1e-12):
                command = np.zeros_like(command)  # the margin undid the projection: stop
                reasons.append("workspace box")
        command = self._scale_to_limit(command, self.velocity_limit_rad_s, reasons)
        if self.tool_speed_cap_m_s is not None:
            if J is None:
                J = self._world.tip_jacobian(q)
            speed = float(np.linalg.norm(J @ command))
            if speed > self.tool_speed_cap_m_s:
                command = command * (self.tool_speed_cap_m_s / speed)
                reasons.append("tool speed cap")
        return command

    def _filter_torque(self, command: np.ndarray, reasons: list[str]) -> np.ndarray:
        """Check a torque through the joint velocity it produces one step later.

        ``v+ = q' + dt inv(M) (tau - h)`` (the world model's forward dynamics, semi-implicit
        Euler as pybullet steps) goes through :meth:`_velocity_checks`; a changed ``v+`` is
        turned back into a torque by inverse dynamics, ``tau = M (v+ - q') / dt + h``, and
        the result is clipped to the profile torque (always the last step).
        """
        q, qd = self._state()
        limit = self.torque_limit_n_m
        clipped = clip_values(command, -limit, limit)
        if not (clipped == command).all():
            reasons.append("joint torque limit")
        M = self._world.mass_matrix(q)
        h = self._bias_torque(q, qd)
        v_next = qd + self._dt * np.linalg.solve(M, clipped - h)
        n_reasons = len(reasons)
        v_safe = self._velocity_checks(v_next, q, reasons)
        if len(reasons) == n_reasons:
            return clipped
        tau = M @ (v_safe - qd) / self._dt + h
        return clip_values(tau, -limit, limit)
