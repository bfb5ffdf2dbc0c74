"""Reinforcement-learning baselines: SAC and PPO from stable-baselines3 on the reaching env.

The RL policy sees the same observation as every other policy, flattened into one vector
and normalised with fixed scales taken from the env's static description (joint limits,
velocity limits, image size) -- no running statistics, so a saved policy needs nothing but
its zip. It commands the same actions, rescaled to ``[-1, 1]``. It may decide only every
``action_repeat`` control steps and hold its command in between (a property of the policy,
like a slower controller; the env and its control rate stay exactly those of the benchmark).

Training reward (per decision, averaged over the repeated control steps)::

    r = -distance_m / distance_scale_m + tolerance_bonus * [distance_m <= tolerance_m]
        - effort_weight * mean(a_normalised^2)

The benchmark never reads rewards: it scores every policy with :mod:`blanket.bench.metrics`.

stable-baselines3 and torch are the ``rl`` extra; install torch first from the CPU wheel
(``pip install torch==2.13.0``), then ``pip install stable-baselines3``.
"""

from __future__ import annotations

import json
import time
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, ClassVar

import gymnasium as gym
import numpy as np

from blanket.errors import ConfigError

__all__ = [
    "ALGORITHMS",
    "TrainSettings",
    "ObservationScales",
    "flatten_observation",
    "ReachVectorObservation",
    "ActionRepeat",
    "ReachReward",
    "make_training_env",
    "make_bench_env",
    "BENCH_TASKS",
    "SB3Policy",
    "train",
    "sb3_available",
]

ALGORITHMS = ("sac", "ppo")

#: Observation keys, in the order they appear in the flat vector.
FLAT_KEYS = (
    "joint_angle_rad",
    "joint_velocity_rad_s",
    "target_position_m",
    "tip_pixel_px",
    "target_pixel_px",
    "tip_visible",
    "target_visible",
    "camera_fresh",
)
#: The benchmark's tasks and their env ids (the planar arm reaches only).
BENCH_TASKS = {"reach": "blanket/arm-reach-v0", "hold": "blanket/arm-hold-v0"}

#: The flat, normalised observation is clipped into +-this.
FLAT_BOUND = 10.0


def sb3_available() -> bool:
    """Whether stable-baselines3 (and torch) import."""
    try:
        import stable_baselines3  # noqa: F401
    except Exception:  # noqa: BLE001 - torch may fail to load in several ways
        return False
    return True


def _require_sb3() -> None:
    if not sb3_available():
        raise ConfigError(
            "RL baselines need stable-baselines3: pip install torch==2.13.0 (CPU build) first, "
            "then pip install stable-baselines3"
        )


@dataclass(frozen=True)
class ObservationScales:
    """Fixed centres and scales that map each observation part to about [-1, 1]."""

    angle_centre: np.ndarray
    angle_scale: np.ndarray
    velocity_scale: np.ndarray
    position_scale_m: float
    pixel_centre: np.ndarray
    pixel_scale: np.ndarray

    @classmethod
    def from_description(cls, description: Any, position_scale_m: float = 1.0) -> ObservationScales:
        lo = np.asarray(description.lower_rad, dtype=float)
        hi = np.asarray(description.upper_rad, dtype=float)
        finite = np.isfinite(lo) & np.isfinite(hi)
        centre = np.where(finite, 0.5 * (lo + hi), 0.0)
        scale = np.where(finite, 0.5 * (hi - lo), np.pi)
        cam = description.camera
        pc = np.array([cam.cx_px, cam.cy_px]) if cam is not None else np.zeros(2)
        ps = np.array([0.5 * cam.width_px, 0.5 * cam.height_px]) if cam is not None else np.ones(2)
        return cls(
            angle_centre=centre,
            angle_scale=np.maximum(scale, 1e-6),
            velocity_scale=np.maximum(np.asarray(description.velocity_limit_rad_s, float), 1e-6),
            position_scale_m=float(position_scale_m),
            pixel_centre=pc,
            pixel_scale=ps,
        )

    def size(self) -> int:
        n = self.angle_centre.size
        return 2 * n + 3 + 4 + 3


def flatten_observation(obs: Mapping[str, Any], scales: ObservationScales) -> np.ndarray:
    """The reaching observation as one normalised float32 vector (order of ``FLAT_KEYS``)."""
    parts = [
        (np.asarray(obs["joint_angle_rad"], float) - scales.angle_centre) / scales.angle_scale,
        np.asarray(obs["joint_velocity_rad_s"], float) / scales.velocity_scale,
        np.asarray(obs["target_position_m"], float) / scales.position_scale_m,
        (np.asarray(obs["tip_pixel_px"], float) - scales.pixel_centre) / scales.pixel_scale,
        (np.asarray(obs["target_pixel_px"], float) - scales.pixel_centre) / scales.pixel_scale,
        np.array(
            [float(obs["tip_visible"]), float(obs["target_visible"]), float(obs["camera_fresh"])]
        ),
    ]
    flat = np.concatenate(parts)
    return np.clip(flat, -FLAT_BOUND, FLAT_BOUND).astype(np.float32)


class ReachVectorObservation(gym.ObservationWrapper, gym.utils.RecordConstructorArgs):
    """Flatten and normalise the reaching env's Dict observation (see module docstring)."""

    def __init__(self, env: gym.Env, position_scale_m: float = 1.0) -> None:
        gym.utils.RecordConstructorArgs.__init__(self, position_scale_m=position_scale_m)
        gym.ObservationWrapper.__init__(self, env)
        self.scales = ObservationScales.from_description(
            env.unwrapped.description, position_scale_m
        )
        self.observation_space = gym.spaces.Box(
            -FLAT_BOUND, FLAT_BOUND, shape=(self.scales.size(),), dtype=np.float32
        )

    def observation(self, observation: Mapping[str, Any]) -> np.ndarray:
        return flatten_observation(observation, self.scales)


class ReachReward(gym.Wrapper, gym.utils.RecordConstructorArgs):
    """Training reward (module docstring) from ``info["distance_m"]`` and the action."""

    def __init__(
        self,
        env: gym.Env,
        distance_scale_m: float = 0.1,
        tolerance_bonus: float = 1.0,
        effort_weight: float = 0.01,
    ) -> None:
        gym.utils.RecordConstructorArgs.__init__(
            self,
            distance_scale_m=distance_scale_m,
            tolerance_bonus=tolerance_bonus,
            effort_weight=effort_weight,
        )
        gym.Wrapper.__init__(self, env)
        self.distance_scale_m = float(distance_scale_m)
        self.tolerance_bonus = float(tolerance_bonus)
        self.effort_weight = float(effort_weight)
        d = env.unwrapped.description
        self._tolerance = float(d.tolerance_m)
        self._low = np.asarray(env.action_space.low, float)
        self._high = np.asarray(env.action_space.high, float)

    def step(self, action: Any):
        obs, _, terminated, truncated, info = self.env.step(action)
        a = np.asarray(action, float)
        a_norm = 2.0 * (a - self._low) / (self._high - self._low) - 1.0
        d = float(info["distance_m"])
        reward = (
            -d / self.distance_scale_m
            + self.tolerance_bonus * float(d <= self._tolerance)
            - self.effort_weight * float(np.mean(a_norm**2))
        )
        return obs, reward, terminated, truncated, info


class ActionRepeat(gym.Wrapper, gym.utils.RecordConstructorArgs):
    """Hold each action for ``repeat`` env steps; the reward is their mean."""

    def __init__(self, env: gym.Env, repeat: int = 8) -> None:
        gym.utils.RecordConstructorArgs.__init__(self, repeat=repeat)
        gym.Wrapper.__init__(self, env)
        if not isinstance(repeat, int) or repeat < 1:
            raise ConfigError(f"action_repeat: must be a whole number >= 1, got {repeat!r}")
        self.repeat = repeat

    def step(self, action: Any):
        total, count = 0.0, 0
        while True:
            obs, reward, terminated, truncated, info = self.env.step(action)
            total += float(reward)
            count += 1
            if terminated or truncated or count == self.repeat:
                break
        return obs, total / count, terminated, truncated, info


@dataclass
class TrainSettings:
    """Everything that defines an RL training run (saved in the JSON beside the zip)."""

    #: The ``algo`` values these settings train.
    algorithms: ClassVar[tuple[str, ...]] = ALGORITHMS

    algo: str = "sac"
    steps: int = 200_000
    seed: int = 0
    robot: str = "iiwa"
    control: str = "velocity"
    episode_s: float = 4.0
    action_repeat: int = 8
    distance_scale_m: float = 0.1
    tolerance_bonus: float = 1.0
    effort_weight: float = 0.01
    position_scale_m: float = 1.0
    eval_every: int = 10_000
    eval_episodes: int = 10
    eval_seed: int = 100_000
    torch_threads: int = 1
    hyperparameters: dict[str, Any] = field(default_factory=dict)
    task: str = "reach"

    def validate(self) -> None:
        if self.algo not in self.algorithms:
            raise ConfigError(
                f"--algo must be one of {', '.join(self.algorithms)}, got {self.algo!r}"
            )
        check_task(self.task, self.robot)
        keys = ("steps", "action_repeat", "eval_every", "eval_episodes", "torch_threads")
        for key in keys + (("n_envs",) if hasattr(self, "n_envs") else ()):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, int) or v < 1:
                raise ConfigError(f"{key} must be a whole number >= 1, got {v!r}")


def make_bench_env(
    robot: str = "iiwa",
    control: str = "velocity",
    episode_s: float = 4.0,
    conditions: Mapping[str, Any] | None = None,
    task: str = "reach",
    **env_options: Any,
) -> gym.Env:
    """The benchmark's env of ``task``: ``blanket/arm-reach-v0`` (or the planar arm), or
    ``blanket/arm-hold-v0`` (``task="hold"``, see :data:`BENCH_TASKS`).

    Built the way ``blanket run`` builds its env, for every policy alike: the bare env (with
    the condition's env options), the condition's perturbation wrappers
    (:func:`blanket.conditions.apply_conditions`), and the safety wrapper outermost
    (:func:`blanket.runner.with_safety`), directly under the policy. A learner's observation
    and action-scaling wrappers go on top (:func:`make_training_env`).

    Parameters
    ----------
    robot, control, episode_s
        The arm (``planar`` for the planar 2-link arm), its control mode and episode length.
    conditions : mapping, optional
        Condition parameters (:data:`blanket.conditions.PARAMETERS`).
    **env_options
        Further env constructor keywords.
    """
    import blanket  # noqa: F401  (registers the ids)
    from blanket.conditions import apply_conditions, condition_env_options
    from blanket.runner import with_safety

    check_task(task, robot)
    options = {**env_options, **condition_env_options(conditions)}
    if task != "reach":
        env = gym.make(
            BENCH_TASKS[task], robot=robot, control=control, episode_s=episode_s, **options
        )
    elif robot == "planar":
        env = gym.make("blanket/planar-2link-v0", control=control, episode_s=episode_s, **options)
    else:
        env = gym.make(
            "blanket/arm-reach-v0", robot=robot, control=control, episode_s=episode_s, **options
        )
    try:
        env, _model_options = apply_conditions(env, conditions)
        return with_safety(env)
    except BaseException:
        env.close()
        raise


def check_task(task: str, robot: str) -> None:
    """A one-line :class:`ConfigError` for a task the benchmark does not know (or a planar
    arm asked to do anything but reach)."""
    if task not in BENCH_TASKS:
        raise ConfigError(f"--task must be one of {', '.join(BENCH_TASKS)}, got {task!r}")
    if task != "reach" and robot == "planar":
        raise ConfigError(f"--task {task}: needs a 3-D arm (iiwa, panda, xarm6), not planar")


def make_training_env(settings: TrainSettings, monitor: bool = True) -> gym.Env:
    """The env as the RL learner sees it: bench env + reward + flat obs + [-1, 1] actions."""
    env = make_bench_env(settings.robot, settings.control, settings.episode_s, task=settings.task)
    env = ReachReward(
        env, settings.distance_scale_m, settings.tolerance_bonus, settings.effort_weight
    )
    env = ReachVectorObservation(env, settings.position_scale_m)
    env = gym.wrappers.RescaleAction(env, -1.0, 1.0)
    env = gym.wrappers.TransformAction(
        env,
        lambda a: np.asarray(a, dtype=np.float64),
        gym.spaces.Box(-1.0, 1.0, shape=env.action_space.shape, dtype=np.float32),
    )
    if settings.action_repeat > 1:
        env = ActionRepeat(env, settings.action_repeat)
    if monitor:
        from stable_baselines3.common.monitor import Monitor

        env = Monitor(env)
    return env


class SB3Policy:
    """A trained SB3 model as a benchmark policy on the Dict observation.

    Flattens each observation like :class:`ReachVectorObservation`, maps the model's
    ``[-1, 1]`` action to the env's bounds, and holds it for ``action_repeat`` steps.
    Stateful: pass ``episode_start=True`` (or call :meth:`reset`) at each episode start.
    """

    def __init__(
        self,
        model: Any,
        description: Any,
        action_repeat: int = 1,
        position_scale_m: float = 1.0,
        name: str = "rl",
        training: Mapping[str, Any] | None = None,
    ) -> None:
        self.model = model
        self.scales = ObservationScales.from_description(description, position_scale_m)
        self.control = description.control
        self.action_repeat = int(action_repeat)
        self.name = name
        self.training = dict(training or {})
        bound = (
            description.velocity_limit_rad_s
            if description.control == "velocity"
            else description.torque_limit_n_m
        )
        self._high = np.asarray(bound, dtype=float)
        self.reset()

    @classmethod
    def load(cls, path: str | Path, description: Any) -> SB3Policy:
        """Load ``<algo>.zip`` and its ``<algo>.json`` settings."""
        _require_sb3()
        path = Path(path)
        meta_path = path.with_suffix(".json")
        meta = json.loads(meta_path.read_text()) if meta_path.is_file() else {}
        settings = meta.get("settings", {})
        algo = settings.get("algo", path.stem)
        if settings.get("control", "velocity") != description.control:
            raise ConfigError(
                f"RL model {path.name} was trained for {settings.get('control')} control, "
                f"env is {description.control}"
            )
        from stable_baselines3 import PPO, SAC

        model = {"sac": SAC, "ppo": PPO}[algo].load(str(path), device="cpu")
        return cls(
            model,
            description,
            settings.get("action_repeat", 1),
            settings.get("position_scale_m", 1.0),
            name=algo,
            training=meta,
        )

    def reset(self) -> None:
        self._count = 0
        self._action = np.zeros_like(self._high)

    def act(self, obs: Mapping[str, Any]) -> np.ndarray:
        if self._count % self.action_repeat == 0:
            a, _ = self.model.predict(flatten_observation(obs, self.scales), deterministic=True)
            self._action = np.clip(np.asarray(a, dtype=float), -1.0, 1.0) * self._high
        self._count += 1
        return self._action.copy()

    def predict(
        self,
        observation: Mapping[str, Any],
        state: Any = None,
        episode_start: Any = None,
        deterministic: bool = True,
    ) -> tuple[np.ndarray, Any]:
        if episode_start is not None and bool(np.any(episode_start)):
            self.reset()
        return self.act(observation), state


def _build_model(settings: TrainSettings, env: gym.Env) -> Any:
    from stable_baselines3 import PPO, SAC

    hp = dict(settings.hyperparameters)
    if settings.algo == "sac":
        defaults = {
            "learning_starts": min(1000, max(10, settings.steps // 10)),
            "buffer_size": 1_000_000,
            "batch_size": 256,
            "gamma": 0.98,
        }
        defaults.update(hp)
        return SAC(
            "MlpPolicy", env, seed=settings.seed, device="cpu", verbose=0, **defaults
        ), defaults
    defaults = {"n_steps": 2048, "batch_size": 64, "gamma": 0.98}
    defaults["n_steps"] = min(defaults["n_steps"], max(64, settings.steps))
    defaults.update(hp)
    return PPO("MlpPolicy", env, seed=settings.seed, device="cpu", verbose=0, **defaults), defaults


def evaluate_policy_success(policy: Any, settings: TrainSettings) -> dict[str, float]:
    """Success at 1 and 5 cm and median final error of ``policy`` on the eval seeds."""
    from blanket.bench.evaluate import run_policy_episode
    from blanket.bench.metrics import episode_metrics

    env = make_bench_env(settings.robot, settings.control, settings.episode_s, task=settings.task)
    try:
        rows = []
        for i in range(settings.eval_episodes):
            trace = run_policy_episode(env, policy, settings.eval_seed + i)
            rows.append(episode_metrics(trace))
    finally:
        env.close()
    return {
        "success_1cm": float(np.mean([r["success_1cm"] for r in rows])),
        "success_5cm": float(np.mean([r["success_5cm"] for r in rows])),
        "final_error_m": float(np.median([r["final_error_m"] for r in rows])),
    }


def train(settings: TrainSettings, out_dir: str | Path, progress: bool = False) -> dict[str, Any]:
    """Train one RL baseline; write ``<algo>.zip``, ``<algo>.json`` and return the JSON.

    The JSON records the settings, the SB3 hyperparameters, policy decisions and control
    steps trained, wall time, and the learning curve: eval success vs training steps on
    ``eval_episodes`` seeds starting at ``eval_seed`` (disjoint from the benchmark's seeds).
    """
    settings.validate()
    _require_sb3()
    import torch
    from stable_baselines3.common.callbacks import BaseCallback

    torch.set_num_threads(settings.torch_threads)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    env = make_training_env(settings)
    model, hyper = _build_model(settings, env)
    description = env.unwrapped.description
    curve: list[dict[str, Any]] = []
    start = time.perf_counter()
    log_path = out / f"{settings.algo}-progress.jsonl"
    log_path.write_text("")

    eval_wall = [0.0]

    def evaluate(steps: int) -> None:
        t_eval = time.perf_counter()
        policy = SB3Policy(
            model,
            description,
            settings.action_repeat,
            settings.position_scale_m,
            name=settings.algo,
        )
        row = {
            "policy_steps": steps,
            "control_steps": steps * settings.action_repeat,
            "wall_s": time.perf_counter() - start,
            **evaluate_policy_success(policy, settings),
        }
        rewards = env.get_episode_rewards()[-20:] if hasattr(env, "get_episode_rewards") else []
        row["mean_episode_reward_last20"] = float(np.mean(rewards)) if len(rewards) else None
        curve.append(row)
        eval_wall[0] += time.perf_counter() - t_eval
        with log_path.open("a") as fh:
            fh.write(json.dumps(row) + "\n")
        if progress:
            print(
                f"  {settings.algo} {steps:>8d} steps  {row['wall_s']:7.0f} s  "
                f"reached 1 cm {row['success_1cm'] * 100:3.0f} %  5 cm "
                f"{row['success_5cm'] * 100:3.0f} %  final error "
                f"{row['final_error_m'] * 100:.1f} cm",
                flush=True,
            )

    zip_path = out / f"{settings.algo}.zip"
    import stable_baselines3

    def write(finished: bool, wall: float) -> dict[str, Any]:
        model.save(str(zip_path))
        meta = {
            "settings": asdict(settings),
            "sb3_hyperparameters": {k: v for k, v in hyper.items() if _jsonable(v)},
            "finished": finished,
            "policy_steps": int(model.num_timesteps),
            "control_steps": int(model.num_timesteps) * settings.action_repeat,
            "wall_time_s": wall,
            "eval_wall_s": eval_wall[0],
            "steps_per_s": model.num_timesteps / max(wall - eval_wall[0], 1e-9),
            "learning_curve": curve,
            "versions": {
                "stable_baselines3": stable_baselines3.__version__,
                "torch": torch.__version__,
            },
            "model": zip_path.name,
        }
        zip_path.with_suffix(".json").write_text(json.dumps(meta, indent=2) + "\n")
        return meta

    class _Curve(BaseCallback):
        def _on_step(self) -> bool:
            if self.num_timesteps % settings.eval_every == 0:
                evaluate(self.num_timesteps)
                write(False, time.perf_counter() - start)  # a checkpoint a crash keeps
            return True

    try:
        model.learn(total_timesteps=settings.steps, callback=_Curve())
        wall = time.perf_counter() - start
        if not curve or curve[-1]["policy_steps"] != model.num_timesteps:
            evaluate(int(model.num_timesteps))
    finally:
        env.close()
    meta = write(True, wall)
    return meta


def _jsonable(v: Any) -> bool:
    try:
        json.dumps(v)
    except TypeError:
        return False
    return True
