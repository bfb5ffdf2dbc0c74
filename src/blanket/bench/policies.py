"""Benchmark policies: the active-inference agent, classical baselines, RL, or your own.

Classical baseline
------------------
Joint encoders are filtered by a per-joint constant-velocity Kalman filter
(:class:`JointKalmanFilter`) whose measurement noise is the env description's encoder noise.
The filtered angles drive resolved-rate control with the damped least-squares inverse of the
tip Jacobian (Wampler 1986, IEEE Trans SMC 16(1); Nakamura & Hanafusa 1986, J Dyn Syst Meas
Control 108)::

    qd_ref = J+ k sat(x_target - fk(q)) + k_null (I - J+ J)(q_home - q)

In velocity mode the command is ``qd_ref``; in torque mode a computed-torque velocity loop with
gravity, Coriolis and centrifugal compensation from the body model (Craig 2005, *Introduction to
Robotics*, 3rd ed., sec. 10.6): ``tau = M(q) k_v (qd_ref - qd) + C(q, qd) qd + g(q)``.
The camera is not used. The same task-space law is the active-inference agent's attractor, so
the comparison isolates estimation and the way action is derived.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from blanket.errors import ConfigError, did_you_mean
from blanket.scenario import load_object

__all__ = [
    "JointKalmanFilter",
    "ClassicalReach",
    "PolicySpec",
    "POLICIES",
    "resolve_policy",
    "constant_velocity_model",
]


def constant_velocity_model(
    dt: float, acceleration_intensity: float
) -> tuple[np.ndarray, np.ndarray]:
    """Transition ``F`` and process covariance ``Q`` of one joint's (angle, velocity) state.

    Continuous white-noise acceleration of intensity ``q`` (rad^2/s^3) sampled at ``dt``:
    ``F = [[1, dt], [0, 1]]``, ``Q = q [[dt^3/3, dt^2/2], [dt^2/2, dt]]`` (Bar-Shalom, Li &
    Kirubarajan 2001, *Estimation with Applications to Tracking and Navigation*, eq. 6.2.2-12).
    """
    F = np.array([[1.0, dt], [0.0, 1.0]])
    Q = acceleration_intensity * np.array([[dt**3 / 3.0, dt**2 / 2.0], [dt**2 / 2.0, dt]])
    return F, Q


class JointKalmanFilter:
    """Independent constant-velocity Kalman filters, one per joint, on encoder readings.

    Each joint's state ``x = (q, qd)`` is measured directly (``H = I``) with noise
    ``R = diag(sigma_q^2, sigma_v^2)``. Textbook names: ``x``, ``P`` (posterior), ``F``, ``Q``,
    ``H``, ``R``, ``K``. Arrays hold all joints: ``x`` (n, 2), ``P`` (n, 2, 2).

    Parameters
    ----------
    n : int
        Number of joints.
    dt : float
        Sample time (s).
    angle_noise_rad, velocity_noise_rad_s : float
        Encoder noise stds (> 0; zero is floored to 1e-6).
    acceleration_intensity : float
        Process noise intensity ``q`` of :func:`constant_velocity_model`.
    """

    def __init__(
        self,
        n: int,
        dt: float,
        angle_noise_rad: float,
        velocity_noise_rad_s: float,
        acceleration_intensity: float = 200.0,
    ) -> None:
        if dt <= 0 or acceleration_intensity <= 0:
            raise ConfigError(
                f"dt and acceleration_intensity must be > 0, got {dt}, {acceleration_intensity}"
            )
        self.n = int(n)
        self.F, self.Q = constant_velocity_model(dt, acceleration_intensity)
        self.H = np.eye(2)
        self.R = np.diag([max(angle_noise_rad, 1e-6) ** 2, max(velocity_noise_rad_s, 1e-6) ** 2])
        self.x: np.ndarray | None = None
        self.P = np.zeros((self.n, 2, 2))

    def reset(self) -> None:
        self.x = None

    def update(self, angle_rad: np.ndarray, velocity_rad_s: np.ndarray) -> np.ndarray:
        """Predict over one step, then correct with the readings; returns ``x`` (n, 2)."""
        z = np.stack([np.asarray(angle_rad, float), np.asarray(velocity_rad_s, float)], axis=1)
        if self.x is None:  # first reading: the measurement itself, with its covariance
            self.x = z.copy()
            self.P = np.broadcast_to(self.R, (self.n, 2, 2)).copy()
            return self.x.copy()
        F, Q, H, R = self.F, self.Q, self.H, self.R
        x_prior = self.x @ F.T  # x- = F x
        P_prior = F @ self.P @ F.T + Q  # P- = F P F' + Q
        S = H @ P_prior @ H.T + R  # innovation covariance
        K = P_prior @ H.T @ np.linalg.inv(S)  # K = P- H' inv(S)
        innovation = z - x_prior @ H.T
        self.x = x_prior + np.einsum("nij,nj->ni", K, innovation)  # x = x- + K (z - H x-)
        self.P = (np.eye(2) - K @ H) @ P_prior  # P = (I - K H) P-
        return self.x.copy()


class ClassicalReach:
    """Resolved-rate (velocity) or computed-torque (torque) reaching on Kalman-filtered encoders.

    See the module docstring. Build with :meth:`from_env`.

    Parameters
    ----------
    description : ArmDescription
        The env's static description (URDF, limits, noise, rate, control mode).
    length_scale : float
        Factor on the body model's link lengths (1 = calibrated).
    tip_gain_1_s, max_tip_speed_m_s, damping_m, posture_gain_1_s : float
        Task-space gain, tip speed limit, DLS damping, null-space posture gain.
    velocity_gain_1_s : float
        Torque mode: gain of the joint velocity loop.
    acceleration_intensity : float
        Kalman filter process noise intensity (rad^2/s^3).
    """

    def __init__(
        self,
        description: Any,
        length_scale: float = 1.0,
        tip_gain_1_s: float = 4.0,
        max_tip_speed_m_s: float = 0.6,
        damping_m: float = 0.02,
        posture_gain_1_s: float = 0.5,
        velocity_gain_1_s: float = 25.0,
        acceleration_intensity: float = 200.0,
    ) -> None:
        from blanket.body import ArmModel

        self.description = description
        self.control = description.control
        self.body = ArmModel.from_urdf(
            description.urdf_path,
            description.end_effector,
            joint_names=description.joint_names,
            length_scale=float(length_scale),
        )
        self.n = description.n_joints
        self.gains = {
            "tip_gain_1_s": float(tip_gain_1_s),
            "max_tip_speed_m_s": float(max_tip_speed_m_s),
            "damping_m": float(damping_m),
            "posture_gain_1_s": float(posture_gain_1_s),
            "velocity_gain_1_s": float(velocity_gain_1_s),
        }
        self.filter = JointKalmanFilter(
            self.n,
            description.control_dt,
            description.encoder_angle_noise_rad,
            description.encoder_velocity_noise_rad_s,
            acceleration_intensity,
        )
        bound = (
            description.velocity_limit_rad_s
            if self.control == "velocity"
            else description.torque_limit_n_m
        )
        self._bound = np.asarray(bound, dtype=float)
        self.reset()

    @classmethod
    def from_env(cls, env: Any, **options: Any) -> ClassicalReach:
        return cls(env.unwrapped.description, **options)

    def reset(self) -> None:
        self.filter.reset()
        self._home: np.ndarray | None = None
        self._estimate = np.zeros((self.n, 2))

    def reference_velocity(self, q: np.ndarray, target: np.ndarray) -> np.ndarray:
        """``qd_ref`` of the module docstring at joint angles ``q``."""
        from blanket.agent.attractor import damped_least_squares_attractor

        g = self.gains
        q = np.asarray(q, dtype=float)
        x, J = self.body.tip_position_and_jacobian(q)
        home = q if self._home is None else self._home
        params = np.array(
            [
                g["tip_gain_1_s"],
                g["max_tip_speed_m_s"],
                g["damping_m"] ** 2,
                g["posture_gain_1_s"],
                0.0,
            ]
        )
        f, F = np.empty(self.n), np.empty((self.n, self.n))
        unused = np.zeros(self.n)  # joint-limit weighting is off for this baseline
        if not damped_least_squares_attractor(
            np.ascontiguousarray(J),
            x,
            np.asarray(target, float),
            np.zeros(3),
            q,
            home,
            unused,
            unused,
            params,
            f,
            F,
        ):
            raise np.linalg.LinAlgError("damped Jacobian product is not positive definite")
        return f

    def act(self, obs: Mapping[str, Any]) -> np.ndarray:
        """Filter the encoders and return the next command."""
        est = self.filter.update(obs["joint_angle_rad"], obs["joint_velocity_rad_s"])
        self._estimate = est
        q, qd = est[:, 0], est[:, 1]
        if self._home is None:
            self._home = q.copy()
        qd_ref = self.reference_velocity(q, obs["target_position_m"])
        if self.control == "velocity":
            command = qd_ref
        else:
            M = self.body.mass_matrix(q)
            h = self.body.nonlinear_effects(q, qd)
            command = M @ (self.gains["velocity_gain_1_s"] * (qd_ref - qd)) + h
        return np.clip(command, -self._bound, self._bound)

    def diagnostics(self) -> dict[str, Any]:
        """``belief``: the filtered (angle, velocity), shape (2, n)."""
        return {"belief": self._estimate.T.copy()}


# ------------------------------------------------------------------------------ registry
@dataclass(frozen=True)
class PolicySpec:
    """A named policy: its control mode and how to build it on an env.

    ``build(env, model_options, context)`` returns an object with ``act`` or ``predict``.
    ``model_options`` carries a condition's body-model options (``length_scale``) for
    model-based policies; ``context`` holds ``rl_models`` (a folder) and ``rl_meta``.
    """

    name: str
    summary: str
    control: str
    build: Callable[[Any, Mapping[str, Any], Mapping[str, Any]], Any]
    model_based: bool = True
    rl_algo: str | None = None


def _agent(control: str, **fixed: Any) -> Callable[..., Any]:
    def build(env: Any, model_options: Mapping[str, Any], context: Mapping[str, Any]) -> Any:
        from blanket.agent import ArmAgent

        return ArmAgent.from_env(env, **fixed, **dict(model_options))

    return build


def _classical(env: Any, model_options: Mapping[str, Any], context: Mapping[str, Any]) -> Any:
    return ClassicalReach.from_env(env, **dict(model_options))


def rl_model_path(algo: str, context: Mapping[str, Any]) -> Path:
    folder = context.get("rl_models")
    if folder is None or not (Path(folder) / f"{algo}.zip").is_file():
        raise ConfigError(
            f"policy {algo!r} needs --rl-models DIR holding {algo}.zip "
            f"(train one with: blanket train-rl --algo {algo} --steps N --out DIR)"
        )
    return Path(folder) / f"{algo}.zip"


def rl_meta_path(spec: PolicySpec, rl_models: str | None) -> Path | None:
    """The JSON with an RL policy's training record (steps, wall time, curve); None if none."""
    from blanket.bench.rl_goal import GOAL_ALGORITHMS, goal_weights_path

    if spec.rl_algo is not None:
        return Path(rl_models or ".") / f"{spec.rl_algo}.json"
    if spec.name in GOAL_ALGORITHMS:
        return goal_weights_path(spec.name, rl_models)
    return None


def _rl(algo: str) -> Callable[..., Any]:
    def build(env: Any, model_options: Mapping[str, Any], context: Mapping[str, Any]) -> Any:
        from blanket.bench.rl import SB3Policy

        return SB3Policy.load(rl_model_path(algo, context), env.unwrapped.description)

    return build


def _goal_rl(name: str) -> Callable[..., Any]:
    def build(env: Any, model_options: Mapping[str, Any], context: Mapping[str, Any]) -> Any:
        from blanket.bench.rl_goal import load_goal_policy

        return load_goal_policy(name, env.unwrapped.description, context.get("rl_models"))

    return build


POLICIES: dict[str, PolicySpec] = {
    s.name: s
    for s in (
        PolicySpec(
            "active-inference",
            "ArmAgent (defaults), velocity control, goal as a reference seen only by action",
            "velocity",
            _agent("velocity"),
        ),
        PolicySpec(
            "active-inference-torque", "ArmAgent, torque control", "torque", _agent("torque")
        ),
        PolicySpec(
            "active-inference+learn",
            "ArmAgent, velocity control, learning its link lengths from the camera (learn_body;"
            " one agent per row, so what it learns carries over the row's episodes)",
            "velocity",
            _agent("velocity", learn_body=True),
        ),
        PolicySpec(
            "active-inference-torque+learn",
            "ArmAgent, torque control, learning link lengths and payload (learn_body)",
            "torque",
            _agent("torque", learn_body=True),
        ),
        PolicySpec(
            "active-inference+image",
            "ArmAgent, velocity control, goal in the camera image (goal_space='image': the "
            "seen tip's pixel onto the target's, depth from the model)",
            "velocity",
            _agent("velocity", goal_space="image"),
        ),
        PolicySpec(
            "active-inference-prior",
            "ArmAgent, velocity control, goal as prior dynamics (biases the belief)",
            "velocity",
            _agent("velocity", goal="prior"),
        ),
        PolicySpec(
            "classical",
            "Kalman-filtered encoders + damped least-squares resolved rate",
            "velocity",
            _classical,
        ),
        PolicySpec(
            "classical-torque",
            "Kalman-filtered encoders + computed torque with gravity compensation",
            "torque",
            _classical,
        ),
        PolicySpec(
            "sac",
            "stable-baselines3 SAC (needs --rl-models)",
            "velocity",
            _rl("sac"),
            model_based=False,
            rl_algo="sac",
        ),
        PolicySpec(
            "ppo",
            "stable-baselines3 PPO (needs --rl-models)",
            "velocity",
            _rl("ppo"),
            model_based=False,
            rl_algo="ppo",
        ),
        PolicySpec(
            "sac-her",
            "goal-conditioned SAC + HER, shipped weights in models/ (iiwa, velocity control)",
            "velocity",
            _goal_rl("sac-her"),
            model_based=False,
        ),
        PolicySpec(
            "ppo-vec",
            "goal-conditioned PPO trained on vector envs, shipped weights in models/ or "
            "--rl-models DIR (iiwa, velocity control)",
            "velocity",
            _goal_rl("ppo-vec"),
            model_based=False,
        ),
    )
}


def _external(path: str) -> PolicySpec:
    try:
        obj = load_object(path, "policy")
    except ConfigError as exc:
        raise ConfigError(f"{exc}; built-in policies: {', '.join(POLICIES)}") from None
    control = getattr(obj, "control", "velocity")
    if control not in ("velocity", "torque"):
        control = "velocity"

    def build(env: Any, model_options: Mapping[str, Any], context: Mapping[str, Any]) -> Any:
        if inspect.isclass(obj):
            made = obj.from_env(env) if hasattr(obj, "from_env") else obj(env)
        elif hasattr(obj, "act") or hasattr(obj, "predict"):
            made = obj
        elif callable(obj):
            made = obj(env)
        else:
            made = obj
        if not (hasattr(made, "act") or hasattr(made, "predict")):
            raise ConfigError(
                f"policy {path!r} has neither act(obs) nor predict(obs, state, episode_start, "
                "deterministic)"
            )
        return made

    return PolicySpec(path, f"user policy {path}", control, build, model_based=False)


def resolve_policy(name: str) -> PolicySpec:
    """A built-in policy by name or a user's ``package.module:Name``; one-line errors."""
    if name in POLICIES:
        return POLICIES[name]
    if ":" in name:
        return _external(name)
    hint = did_you_mean(name, POLICIES, n=1, list_valid=True)
    raise ConfigError(
        f"--policies: unknown policy {name!r}; {hint} or an import path 'package.module:Name'"
    )
