"""Goal-conditioned RL baselines: SAC with hindsight relabelling (HER) and PPO on vector envs.

Goal-conditioned view
---------------------
:class:`ReachGoalView` turns the benchmark's reaching env into the goal-conditioned form of
hindsight experience replay (Andrychowicz et al. 2017, *Hindsight Experience Replay*, NeurIPS):
a Dict observation with

``observation``
    joint angles and velocities from the encoders, normalised with the fixed scales of
    :class:`blanket.bench.rl.ObservationScales` (joint limits, velocity limits);
``achieved_goal``
    the tool tip **from the encoders through forward kinematics** of the calibrated body model
    (:class:`blanket.body.ArmModel`): what a real robot has, never the simulator's tip;
``desired_goal``
    the target position the env reports.

The policy decides every ``action_repeat`` control steps (1, 2, 4 or 8) and holds its command in
between. The encoder readings of the control steps since the previous decision are averaged
(one reading at an episode start), which cuts the encoder noise by ``sqrt(action_repeat)``;
:class:`GoalPolicy` does the same on the benchmark, step by step. Actions are normalised to
``[-1, 1]`` (velocity or torque limits). The camera is not used.

Reward (a function of the goals only, as relabelling needs; :func:`reach_goal_reward`)::

    r = -d / distance_scale_m + tolerance_bonus * [d <= tol] + near_bonus * exp(-d / tol)

with ``d = |achieved - desired|``. The last term (off by default) is sharper near the goal than
the linear one: its slope at ``d = tol`` is ``near_bonus / (e * tol)`` against
``1 / distance_scale_m``, so that a critic can tell 5 mm from 15 mm apart.

Shipped weights
---------------
A trained actor is exported to plain arrays (:class:`MlpActor`): ``<name>.npz`` read with
``numpy.load(allow_pickle=False)`` and ``<name>.json`` (architecture, hyper-parameters, steps,
wall time, seed, versions, learning curve and the SHA-256 of the ``.npz``). Loading unpickles
nothing and needs neither torch nor stable-baselines3; the benchmark runs the actor in numpy.
"""

from __future__ import annotations

import hashlib
import json
import math
import time
import zipfile
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, ClassVar

import gymnasium as gym
import numpy as np

from blanket.bench.rl import TrainSettings
from blanket.errors import ConfigError, shorten

__all__ = [
    "GOAL_ALGORITHMS",
    "ACTION_REPEATS",
    "GoalTrainSettings",
    "reach_goal_reward",
    "goal_observation",
    "ReachGoalView",
    "make_goal_env",
    "MlpActor",
    "GoalPolicy",
    "load_goal_policy",
    "goal_weights_path",
    "train_goal",
    "DEFAULT_MODELS_DIR",
]

GOAL_ALGORITHMS = ("sac-her", "ppo-vec")
ACTION_REPEATS = (1, 2, 4, 8)
#: Bound (m) of the goal boxes (the targets and the tips of every shipped arm lie well inside).
GOAL_BOUND_M = 3.0
#: The shipped models: ``models/`` at the top of the source tree.
DEFAULT_MODELS_DIR = Path(__file__).resolve().parents[3] / "models"
#: Format tag written into (and required from) the JSON of shipped weights.
WEIGHTS_FORMAT = "blanket-mlp-actor-1"
_ACTIVATIONS = ("relu", "tanh")
_SQUASHES = ("tanh", "clip")


# ----------------------------------------------------------------------------- kernels
def reach_goal_reward(
    achieved: np.ndarray,
    desired: np.ndarray,
    tolerance_m: float,
    distance_scale_m: float = 0.1,
    tolerance_bonus: float = 1.0,
    near_bonus: float = 0.0,
) -> np.ndarray:
    """Dense reaching reward of the module docstring, vectorised over leading axes.

    Dense negative distance plus a bonus inside the tolerance (the dense variant of the HER
    reward; Andrychowicz et al. 2017 use the sparse ``-[d > tol]``) plus an optional smooth
    bonus ``near_bonus * exp(-d / tol)`` near the goal. Returns float32 of shape
    ``achieved.shape[:-1]`` (a 0-d array for single goals).
    """
    d = np.linalg.norm(np.asarray(achieved, float) - np.asarray(desired, float), axis=-1)
    r = -d / distance_scale_m + tolerance_bonus * (d <= tolerance_m)
    if near_bonus:
        r = r + near_bonus * np.exp(-d / tolerance_m)
    return np.asarray(r, dtype=np.float32)


def goal_observation(
    angle_rad: np.ndarray,
    velocity_rad_s: np.ndarray,
    target_m: np.ndarray,
    scales: Any,
    body: Any,
) -> dict[str, np.ndarray]:
    """The goal-conditioned observation from (averaged) encoder readings and the target."""
    angle = np.asarray(angle_rad, float)
    obs = np.concatenate(
        [
            (angle - scales.angle_centre) / scales.angle_scale,
            np.asarray(velocity_rad_s, float) / scales.velocity_scale,
        ]
    )
    return {
        "achieved_goal": np.clip(body.tip_position(angle), -GOAL_BOUND_M, GOAL_BOUND_M).astype(
            np.float32
        ),
        "desired_goal": np.clip(np.asarray(target_m, float), -GOAL_BOUND_M, GOAL_BOUND_M).astype(
            np.float32
        ),
        "observation": np.clip(obs, -10.0, 10.0).astype(np.float32),
    }


def _check_repeat(repeat: Any) -> int:
    if isinstance(repeat, bool) or not isinstance(repeat, int) or repeat not in ACTION_REPEATS:
        raise ConfigError(
            f"action_repeat: must be one of {', '.join(map(str, ACTION_REPEATS))}, got {repeat!r}"
        )
    return int(repeat)


def _body_and_scales(description: Any) -> tuple[Any, Any]:
    from blanket.bench.rl import ObservationScales
    from blanket.body import ArmModel

    body = ArmModel.from_urdf(
        description.urdf_path, description.end_effector, joint_names=description.joint_names
    )
    return body, ObservationScales.from_description(description)


def _action_bound(description: Any) -> np.ndarray:
    bound = (
        description.velocity_limit_rad_s
        if description.control == "velocity"
        else description.torque_limit_n_m
    )
    return np.asarray(bound, dtype=float)


# ----------------------------------------------------------------------------- the view
class ReachGoalView(gym.Wrapper, gym.utils.RecordConstructorArgs):
    """Goal-conditioned view of a reaching env (module docstring); HER-ready.

    Parameters
    ----------
    env : gym.Env
        The benchmark env (:func:`blanket.bench.rl.make_bench_env`).
    action_repeat : {1, 2, 4, 8}
        Control steps per decision; the readings in between are averaged.
    distance_scale_m, tolerance_bonus, near_bonus : float
        Reward terms of :func:`reach_goal_reward`; the tolerance is the env's.
    """

    def __init__(
        self,
        env: gym.Env,
        action_repeat: int = 8,
        distance_scale_m: float = 0.1,
        tolerance_bonus: float = 1.0,
        near_bonus: float = 0.0,
    ) -> None:
        gym.utils.RecordConstructorArgs.__init__(
            self,
            action_repeat=action_repeat,
            distance_scale_m=distance_scale_m,
            tolerance_bonus=tolerance_bonus,
            near_bonus=near_bonus,
        )
        gym.Wrapper.__init__(self, env)
        self.action_repeat = _check_repeat(action_repeat)
        if not distance_scale_m > 0:
            raise ConfigError(f"distance_scale_m: must be > 0, got {distance_scale_m!r}")
        self.distance_scale_m = float(distance_scale_m)
        self.tolerance_bonus = float(tolerance_bonus)
        if not (math.isfinite(near_bonus) and near_bonus >= 0):
            raise ConfigError(f"near_bonus: must be a finite number >= 0, got {near_bonus!r}")
        self.near_bonus = float(near_bonus)
        description = env.unwrapped.description
        self.tolerance_m = float(description.tolerance_m)
        self.body, self.scales = _body_and_scales(description)
        self._bound = _action_bound(description)
        n = description.n_joints
        goal = gym.spaces.Box(-GOAL_BOUND_M, GOAL_BOUND_M, shape=(3,), dtype=np.float32)
        self.observation_space = gym.spaces.Dict(
            {
                "achieved_goal": goal,
                "desired_goal": goal,
                "observation": gym.spaces.Box(-10.0, 10.0, shape=(2 * n,), dtype=np.float32),
            }
        )
        self.action_space = gym.spaces.Box(-1.0, 1.0, shape=(n,), dtype=np.float32)

    def _view(self, readings: Sequence[Mapping[str, Any]]) -> dict[str, np.ndarray]:
        angle = np.mean([r["joint_angle_rad"] for r in readings], axis=0)
        velocity = np.mean([r["joint_velocity_rad_s"] for r in readings], axis=0)
        return goal_observation(
            angle, velocity, readings[-1]["target_position_m"], self.scales, self.body
        )

    def reset(self, *, seed: int | None = None, options: dict[str, Any] | None = None):
        obs, info = self.env.reset(seed=seed, options=options)
        return self._view([obs]), info

    def step(self, action: Any):
        a = np.clip(np.asarray(action, dtype=float), -1.0, 1.0) * self._bound
        readings = []
        for _ in range(self.action_repeat):
            obs, _r, terminated, truncated, info = self.env.step(a)
            readings.append(obs)
            if terminated or truncated:
                break
        view = self._view(readings)
        reward = float(self.compute_reward(view["achieved_goal"], view["desired_goal"], info))
        return view, reward, terminated, truncated, info

    def compute_reward(self, achieved_goal: Any, desired_goal: Any, info: Any) -> np.ndarray:
        """Vectorised reward (``info`` unused), as SB3's ``HerReplayBuffer`` calls it."""
        return reach_goal_reward(
            achieved_goal,
            desired_goal,
            self.tolerance_m,
            self.distance_scale_m,
            self.tolerance_bonus,
            self.near_bonus,
        )


# ----------------------------------------------------------------------------- settings
@dataclass
class GoalTrainSettings(TrainSettings):
    """A goal-conditioned training run (saved in its JSON); the reward is the view's.

    ``effort_weight`` and ``position_scale_m`` of the flat baselines are not used.
    """

    algorithms: ClassVar[tuple[str, ...]] = GOAL_ALGORITHMS

    algo: str = "sac-her"
    near_bonus: float = 0.0
    eval_every: int = 5_000
    eval_episodes: int = 30
    n_envs: int = 4

    def validate(self) -> None:
        super().validate()
        _check_repeat(self.action_repeat)
        if self.eval_seed < 10_000:
            raise ConfigError(
                f"eval_seed must be >= 10000 (held out from the bench seeds), got {self.eval_seed}"
            )

    def defaults(self) -> dict[str, Any]:
        """The SB3 hyper-parameters of this algorithm, with ``hyperparameters`` on top.

        ``learning_rate_end`` (not an SB3 keyword) makes the learning rate fall linearly from
        ``learning_rate`` to it over the budget (:class:`LinearRate`).

        SAC + HER: 2 x 256 ReLU networks, learning rate 1e-3, batch 256, gamma 0.95, one gradient
        step every 2 decisions, 4 relabelled goals per transition from the future of the episode
        (the future strategy with k = 4 of Plappert et al. 2018, arXiv 1802.09464, sec. 2, who
        use 3 x 256 networks; 2 x 256 and half an update per decision cut the CPU cost per
        decision about threefold on one core). PPO: SB3's defaults with ``n_envs``
        environments of 512 steps each per update, gamma 0.98.
        """
        if self.algo == "sac-her":
            hp: dict[str, Any] = {
                "learning_rate": 1e-3,
                "buffer_size": min(1_000_000, self.steps),
                "batch_size": 256,
                "gamma": 0.95,
                "tau": 0.005,
                "learning_starts": None,  # 1000, at least one episode (set by the trainer)
                "train_freq": 2,
                "gradient_steps": 1,
                "net_arch": [256, 256],
                "n_sampled_goal": 4,
            }
        else:
            hp = {
                "learning_rate": 3e-4,
                "n_steps": min(512, max(16, self.steps // self.n_envs)),
                "batch_size": 256,
                "n_epochs": 10,
                "gamma": 0.98,
                "net_arch": [256, 256],
            }
        hp.update(self.hyperparameters)
        for key in ("learning_rate_end", "target_entropy_end", "actor_ema"):
            value = hp.get(key)
            if value is not None and (
                isinstance(value, bool)
                or not isinstance(value, (int, float))
                or not math.isfinite(value)
            ):
                raise ConfigError(f"{key}: must be a finite number, got {shorten(repr(value))}")
        return hp


def make_goal_env(settings: GoalTrainSettings, monitor: bool = True) -> gym.Env:
    """The goal-conditioned training env on the benchmark env."""
    from blanket.bench.rl import make_bench_env

    env = make_bench_env(settings.robot, settings.control, settings.episode_s)
    try:
        env = ReachGoalView(
            env,
            settings.action_repeat,
            settings.distance_scale_m,
            settings.tolerance_bonus,
            settings.near_bonus,
        )
    except BaseException:
        env.close()
        raise
    if monitor:
        from stable_baselines3.common.monitor import Monitor

        env = Monitor(env)
    return env


# ----------------------------------------------------------------------------- the actor
def _sb3_actor_layers(model: Any) -> tuple[list[Any], str, str]:
    """The deterministic actor's ``torch.nn.Linear`` layers, activation and squash."""
    import torch

    def linears(module: Any) -> list[Any]:
        return [m for m in module.modules() if isinstance(m, torch.nn.Linear)]

    policy = model.policy
    if hasattr(policy, "actor"):  # SAC: latent_pi -> mu -> tanh
        layers = linears(policy.actor.latent_pi) + [policy.actor.mu]
        squash = "tanh"
        act_fn = policy.actor.latent_pi
    else:  # PPO: mlp_extractor.policy_net -> action_net, clipped to the action bounds
        layers = linears(policy.mlp_extractor.policy_net) + [policy.action_net]
        squash = "clip"
        act_fn = policy.mlp_extractor.policy_net
    names = {type(m).__name__ for m in act_fn.modules()}
    return layers, ("tanh" if "Tanh" in names else "relu"), squash


class ActorAverage:
    """Polyak (exponential moving) average of the deterministic actor's weights.

    ``avg <- decay * avg + (1 - decay) * theta`` after every decision (Polyak and Juditsky 1992,
    SIAM J. Control Optim. 30(4), averaging of stochastic-approximation iterates; the same
    update as SAC's target networks with ``tau = 1 - decay``). Evaluating and shipping the
    average instead of the last iterate damps the swing of the actor between checkpoints.
    """

    def __init__(self, model: Any, decay: float) -> None:
        if not 0.0 < decay < 1.0:
            raise ConfigError(f"actor_ema: must be in (0, 1), got {decay!r}")
        self.decay = float(decay)
        self.layers, self.activation, self.squash = _sb3_actor_layers(model)
        self.params = [p for layer in self.layers for p in (layer.weight, layer.bias)]
        self.average = [p.detach().clone() for p in self.params]

    def update(self) -> None:
        import torch

        with torch.no_grad():
            for avg, p in zip(self.average, self.params, strict=True):
                avg.mul_(self.decay).add_(p.detach(), alpha=1.0 - self.decay)

    def actor(self) -> MlpActor:
        arrays = [a.cpu().numpy().copy() for a in self.average]
        return MlpActor(arrays[0::2], arrays[1::2], self.activation, self.squash)

    def save(self, path: Path) -> None:
        """Plain arrays (``numpy.savez``) so that a resumed run keeps its average."""
        tmp = path.with_name(path.name + ".tmp.npz")
        np.savez(tmp, *[a.cpu().numpy() for a in self.average])
        tmp.replace(path)

    def load(self, path: Path) -> None:
        import torch

        with np.load(path, allow_pickle=False) as data:
            arrays = [data[f"arr_{i}"] for i in range(len(self.average))]
        for avg, arr in zip(self.average, arrays, strict=True):
            avg.copy_(torch.as_tensor(arr))


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


class MlpActor:
    """A deterministic MLP actor in numpy: ``squash(W_L act(... act(W_1 x + b_1)) + b_L)``.

    ``x`` concatenates the goal observation's keys in sorted order (``achieved_goal``,
    ``desired_goal``, ``observation``), as SB3's ``CombinedExtractor`` does.
    """

    def __init__(
        self,
        weights: Sequence[np.ndarray],
        biases: Sequence[np.ndarray],
        activation: str,
        squash: str,
    ) -> None:
        if activation not in _ACTIVATIONS or squash not in _SQUASHES:
            raise ConfigError(
                f"actor: activation must be one of {_ACTIVATIONS} and squash one of "
                f"{_SQUASHES}, got {activation!r}, {squash!r}"
            )
        if len(weights) != len(biases) or not weights:
            raise ConfigError("actor: needs as many weight matrices as bias vectors (>= 1)")
        for i, (w, b) in enumerate(zip(weights, biases, strict=True)):
            if w.ndim != 2 or b.shape != (w.shape[0],):
                raise ConfigError(f"actor: layer {i} has weight {w.shape} and bias {b.shape}")
            if i and w.shape[1] != weights[i - 1].shape[0]:
                raise ConfigError(
                    f"actor: layer {i} takes {w.shape[1]} inputs, gets {weights[i - 1].shape[0]}"
                )
            if not (np.all(np.isfinite(w)) and np.all(np.isfinite(b))):
                raise ConfigError(f"actor: layer {i} holds values that are not finite")
        self.weights = [np.asarray(w, dtype=np.float64) for w in weights]
        self.biases = [np.asarray(b, dtype=np.float64) for b in biases]
        self.activation = activation
        self.squash = squash

    @property
    def n_inputs(self) -> int:
        return self.weights[0].shape[1]

    @property
    def n_outputs(self) -> int:
        return self.weights[-1].shape[0]

    def __call__(self, x: np.ndarray) -> np.ndarray:
        h = np.asarray(x, dtype=np.float64)
        last = len(self.weights) - 1
        for i, (w, b) in enumerate(zip(self.weights, self.biases, strict=True)):
            h = w @ h + b
            if i < last:
                h = np.maximum(h, 0.0) if self.activation == "relu" else np.tanh(h)
        return np.tanh(h) if self.squash == "tanh" else np.clip(h, -1.0, 1.0)

    @classmethod
    def from_sb3(cls, model: Any) -> MlpActor:
        """The deterministic actor of an SB3 SAC or PPO model (Box actions in [-1, 1])."""
        import torch

        def linears(module: Any) -> list[Any]:
            return [m for m in module.modules() if isinstance(m, torch.nn.Linear)]

        layers, activation, squash = _sb3_actor_layers(model)
        return cls(
            [layer.weight.detach().cpu().numpy() for layer in layers],
            [layer.bias.detach().cpu().numpy() for layer in layers],
            activation,
            squash,
        )

    def save(self, stem: str | Path, meta: Mapping[str, Any]) -> Path:
        """Write ``<stem>.npz`` and ``<stem>.json`` (``meta``, format, hash); the JSON path."""
        stem = Path(stem)
        arrays = {f"w{i}": w.astype(np.float32) for i, w in enumerate(self.weights)}
        arrays |= {f"b{i}": b.astype(np.float32) for i, b in enumerate(self.biases)}
        npz = stem.with_suffix(".npz")
        tmp = npz.with_name(npz.name + ".tmp.npz")
        np.savez(tmp, **arrays)
        tmp.replace(npz)
        doc = {
            **meta,
            "format": WEIGHTS_FORMAT,
            "weights": npz.name,
            "weights_sha256": _sha256(npz),
            "layers": len(self.weights),
            "activation": self.activation,
            "squash": self.squash,
        }
        path = stem.with_suffix(".json")
        path.write_text(json.dumps(doc, indent=1) + "\n")
        return path

    @classmethod
    def load(cls, json_path: str | Path) -> tuple[MlpActor, dict[str, Any]]:
        """Read weights written by :meth:`save`; one-line :class:`ConfigError` on any damage."""
        json_path = Path(json_path)
        where = json_path.name
        try:
            doc = json.loads(json_path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise ConfigError(
                f"RL weights {where}: not readable JSON ({shorten(str(exc))})"
            ) from None
        if not isinstance(doc, dict) or doc.get("format") != WEIGHTS_FORMAT:
            raise ConfigError(f"RL weights {where}: 'format' must be {WEIGHTS_FORMAT!r}")
        name = doc.get("weights")
        layers = doc.get("layers")
        if not isinstance(name, str) or Path(name).name != name or not name.endswith(".npz"):
            raise ConfigError(f"RL weights {where}: 'weights' must be a file name ending .npz")
        if isinstance(layers, bool) or not isinstance(layers, int) or not 1 <= layers <= 16:
            raise ConfigError(f"RL weights {where}: 'layers' must be a whole number in [1, 16]")
        npz = json_path.with_name(name)
        if not npz.is_file():
            raise ConfigError(f"RL weights {where}: missing weights file {name}")
        if _sha256(npz) != doc.get("weights_sha256"):
            raise ConfigError(
                f"RL weights {where}: {name} does not match its weights_sha256 (changed or damaged)"
            )
        try:
            with np.load(npz, allow_pickle=False) as data:
                weights = [np.array(data[f"w{i}"]) for i in range(layers)]
                biases = [np.array(data[f"b{i}"]) for i in range(layers)]
        except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile) as exc:
            raise ConfigError(
                f"RL weights {name}: not a plain array file ({shorten(str(exc))})"
            ) from None
        for arr in weights + biases:
            if arr.dtype.kind != "f":
                raise ConfigError(f"RL weights {name}: arrays must be floating point")
        try:
            actor = cls(weights, biases, str(doc.get("activation")), str(doc.get("squash")))
        except ConfigError as exc:
            raise ConfigError(f"RL weights {where}: {shorten(str(exc))}") from None
        return actor, doc


# ----------------------------------------------------------------------------- bench policy
class GoalPolicy:
    """A goal-conditioned actor as a benchmark policy on the env's Dict observation.

    Decides every ``action_repeat`` steps on the mean of the readings since its last decision
    (as :class:`ReachGoalView`), scales ``[-1, 1]`` to the action bounds and holds the command.
    """

    def __init__(
        self,
        actor: Any,
        description: Any,
        action_repeat: int,
        name: str = "sac-her",
        training: Mapping[str, Any] | None = None,
    ) -> None:
        self.actor = actor
        self.action_repeat = _check_repeat(action_repeat)
        self.control = description.control
        self.name = name
        self.training = dict(training or {})
        self.body, self.scales = _body_and_scales(description)
        self._bound = _action_bound(description)
        n = description.n_joints
        if (
            getattr(actor, "n_outputs", n) != n
            or getattr(actor, "n_inputs", 2 * n + 6) != 2 * n + 6
        ):
            raise ConfigError(
                f"RL policy {name}: the actor does not fit a {n}-joint arm "
                f"({actor.n_inputs} inputs, {actor.n_outputs} outputs)"
            )
        self.reset()

    def reset(self) -> None:
        self._count = 0
        self._angles: list[np.ndarray] = []
        self._velocities: list[np.ndarray] = []
        self._action = np.zeros_like(self._bound)

    def act(self, obs: Mapping[str, Any]) -> np.ndarray:
        self._angles.append(np.asarray(obs["joint_angle_rad"], float))
        self._velocities.append(np.asarray(obs["joint_velocity_rad_s"], float))
        if self._count % self.action_repeat == 0:
            view = goal_observation(
                np.mean(self._angles, axis=0),
                np.mean(self._velocities, axis=0),
                obs["target_position_m"],
                self.scales,
                self.body,
            )
            x = np.concatenate([view[k] for k in sorted(view)])
            self._action = np.clip(self.actor(x), -1.0, 1.0) * self._bound
            self._angles, self._velocities = [], []
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


def goal_weights_path(name: str, folder: str | Path | None = None) -> Path:
    """``folder/<name>.json`` when that file exists, else the shipped ``models/<name>.json``."""
    if folder is not None and (Path(folder) / f"{name}.json").is_file():
        return Path(folder) / f"{name}.json"
    return DEFAULT_MODELS_DIR / f"{name}.json"


def load_goal_policy(name: str, description: Any, folder: str | Path | None = None) -> GoalPolicy:
    """``<name>.json`` + ``<name>.npz`` (:func:`goal_weights_path`) as a benchmark policy."""
    path = goal_weights_path(name, folder)
    if not path.is_file():
        raise ConfigError(
            f"policy {name!r} needs {path} (train one with: blanket train-rl --algo {name} "
            "--steps N --out DIR, then copy DIR/best/* there)"
        )
    actor, doc = MlpActor.load(path)
    settings = doc.get("settings", {})
    if not isinstance(settings, dict):
        raise ConfigError(f"RL weights {path.name}: 'settings' must be an object")
    if settings.get("control") != description.control:
        raise ConfigError(
            f"RL weights {path.name}: trained for {settings.get('control')!r} control, the env "
            f"uses {description.control!r}"
        )
    return GoalPolicy(actor, description, settings.get("action_repeat"), name=name, training=doc)


# ----------------------------------------------------------------------------- training
def _evaluate(actor: MlpActor, description: Any, settings: GoalTrainSettings) -> dict[str, float]:
    from blanket.bench.rl import evaluate_policy_success

    policy = GoalPolicy(actor, description, settings.action_repeat, name=settings.algo)
    return evaluate_policy_success(policy, settings)  # type: ignore[arg-type]


def _score(row: Mapping[str, Any]) -> tuple[float, float, float]:
    """Best-checkpoint order: share within 1 cm, then 5 cm, then the lower median error."""
    return (row["success_1cm"], row["success_5cm"], -row["final_error_m"])


@dataclass(frozen=True)
class LinearRate:
    """A learning rate falling linearly from ``start`` to ``end`` over the training budget.

    Called by SB3 with the remaining share of the budget (1 at the start, 0 at ``steps``); a
    resumed run continues the same schedule when ``--steps`` stays the same.
    """

    start: float
    end: float

    def __call__(self, remaining: float) -> float:
        return self.end + (self.start - self.end) * remaining


#: ``hyperparameters`` keys that the trainer applies itself (not SB3 keywords):
#: ``target_entropy_end`` (SAC: the entropy target falls linearly from SB3's ``-dim(actions)``,
#: or ``target_entropy``, to it over the budget) and ``actor_ema`` (the decay of
#: :class:`ActorAverage`; the averaged actor is the one evaluated and saved).
_TRAINER_KEYS = ("target_entropy_end", "actor_ema")


def _build(settings: GoalTrainSettings, hp: dict[str, Any]) -> tuple[Any, Any]:
    from stable_baselines3 import PPO, SAC, HerReplayBuffer
    from stable_baselines3.common.vec_env import DummyVecEnv

    hp = dict(hp)
    net_arch = hp.pop("net_arch")
    for key in _TRAINER_KEYS:  # read by train_goal, not SB3 keywords
        hp.pop(key, None)
    end = hp.pop("learning_rate_end", None)
    if end is not None:  # linear from learning_rate to learning_rate_end over the whole budget
        hp["learning_rate"] = LinearRate(float(hp["learning_rate"]), float(end))
    if settings.algo == "sac-her":
        k = hp.pop("n_sampled_goal")
        env = DummyVecEnv([lambda: make_goal_env(settings)])
        if hp["learning_starts"] is None:  # relabelling samples finished episodes only
            d = env.envs[0].unwrapped.description
            per_episode = math.ceil(settings.episode_s / d.control_dt / settings.action_repeat)
            hp["learning_starts"] = max(min(1_000, settings.steps // 10), per_episode + 1)
        model = SAC(
            "MultiInputPolicy",
            env,
            replay_buffer_class=HerReplayBuffer,
            replay_buffer_kwargs={"n_sampled_goal": k, "goal_selection_strategy": "future"},
            policy_kwargs={"net_arch": net_arch},
            seed=settings.seed,
            device="cpu",
            verbose=0,
            **hp,
        )
    else:
        env = DummyVecEnv([lambda: make_goal_env(settings) for _ in range(settings.n_envs)])
        model = PPO(
            "MultiInputPolicy",
            env,
            policy_kwargs={"net_arch": net_arch},
            seed=settings.seed,
            device="cpu",
            verbose=0,
            **hp,
        )
    return model, env


def _versions() -> dict[str, str]:
    import platform

    import stable_baselines3
    import torch

    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "gymnasium": gym.__version__,
        "stable_baselines3": stable_baselines3.__version__,
        "torch": torch.__version__,
    }


def train_goal(
    settings: GoalTrainSettings,
    out_dir: str | Path,
    resume: bool = False,
    progress: bool = False,
) -> dict[str, Any]:
    """Train a goal-conditioned baseline; write curves, checkpoints and the best weights.

    Every ``eval_every`` decisions the deterministic actor runs ``eval_episodes`` benchmark
    episodes on seeds ``eval_seed, eval_seed + 1, ...`` (held out: the bench uses seeds from 0).
    Writes into ``out_dir``:

    - ``curve.parquet`` and ``progress.log``: one row per evaluation (decisions, control
      steps, training wall time, shares within 1 and 5 cm, median final error);
    - ``checkpoint/``: SB3's own checkpoint (model and replay buffer) for ``resume`` -- SB3
      reads it by unpickling, so resume only your own runs;
    - ``best/<algo>.npz`` + ``best/<algo>.json``: the best evaluation so far (share within
      1 cm, then 5 cm, then median error), in the shipped, pickle-free format;
    - ``last/<algo>.npz`` + ``.json``: the latest evaluation.

    ``steps`` is the total budget in decisions; a resumed run continues to it (its replay
    buffer keeps the size set by the first run's budget).
    """
    settings.validate()
    from blanket.bench.rl import _require_sb3

    _require_sb3()
    import torch
    from stable_baselines3.common.callbacks import BaseCallback

    torch.set_num_threads(settings.torch_threads)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    ckpt = out / "checkpoint"
    state_path = out / "state.json"
    hp = settings.defaults()
    model, env = _build(settings, hp)
    if "learning_starts" in hp:
        hp["learning_starts"] = int(model.learning_starts)
    description = env.envs[0].unwrapped.description
    curve: list[dict[str, Any]] = []
    wall_before = 0.0
    if resume:
        if not (ckpt / "model.zip").is_file() or not state_path.is_file():
            raise ConfigError(f"--resume: no checkpoint in {out} (checkpoint/model.zip)")
        state = json.loads(state_path.read_text())
        saved, now = state.get("settings", {}), asdict(settings)
        differ = sorted(k for k in saved if k != "steps" and saved[k] != now.get(k))
        if differ:
            raise ConfigError(
                f"--resume: settings differ from the checkpoint's in {out}/state.json: "
                f"{shorten(', '.join(differ))} (only --steps may change)"
            )
        cls = type(model)
        model = cls.load(str(ckpt / "model.zip"), env=env, device="cpu")
        if settings.algo == "sac-her":
            model.load_replay_buffer(str(ckpt / "replay_buffer.pkl"))
        curve = list(state["curve"])
        wall_before = float(state["wall_s"])
    average = ActorAverage(model, float(hp["actor_ema"])) if hp.get("actor_ema") else None
    if average is not None and resume and (ckpt / "actor_ema.npz").is_file():
        average.load(ckpt / "actor_ema.npz")
    entropy_end = hp.get("target_entropy_end")
    if entropy_end is not None:
        if settings.algo != "sac-her":
            raise ConfigError("target_entropy_end: applies to sac-her only")
        start_entropy = hp.get("target_entropy", "auto")
        if start_entropy == "auto":
            start_entropy = -float(np.prod(env.action_space.shape))
        entropy_span = (float(start_entropy), float(entropy_end))
    log = (out / "progress.log").open("a")
    start = time.perf_counter()
    best = [max((_score(r) for r in curve), default=None)]

    def wall() -> float:
        return wall_before + time.perf_counter() - start

    def meta(steps: int) -> dict[str, Any]:
        return {
            "name": settings.algo,
            "settings": asdict(settings),
            "sb3_hyperparameters": hp,
            "policy_steps": steps,
            "control_steps": steps * settings.action_repeat,
            "finished": steps >= settings.steps,
            "wall_time_s": round(wall(), 1),
            "seed": settings.seed,
            "versions": _versions(),
            "learning_curve": curve,
        }

    def checkpoint() -> None:
        ckpt.mkdir(exist_ok=True)
        model.save(str(ckpt / "model.zip"))
        if settings.algo == "sac-her":
            model.save_replay_buffer(str(ckpt / "replay_buffer.pkl"))
        if average is not None:
            average.save(ckpt / "actor_ema.npz")
        state = {"settings": asdict(settings), "curve": curve, "wall_s": wall()}
        tmp = state_path.with_suffix(".tmp")
        tmp.write_text(json.dumps(state) + "\n")
        tmp.replace(state_path)

    def evaluate(steps: int) -> None:
        actor = MlpActor.from_sb3(model)
        t0 = time.perf_counter()
        row = {
            "policy_steps": steps,
            "control_steps": steps * settings.action_repeat,
            "wall_s": round(wall(), 1),
        }
        if average is not None:  # the average is evaluated and saved; the last iterate beside
            raw = _evaluate(actor, description, settings)
            actor = average.actor()
            row |= _evaluate(actor, description, settings)
            row |= {f"raw_{k}": v for k, v in raw.items()}
        else:
            row |= _evaluate(actor, description, settings)
        if entropy_end is not None:
            row["target_entropy"] = float(model.target_entropy)
        row["eval_s"] = round(time.perf_counter() - t0, 1)
        curve.append(row)
        _write_curve(curve, out / "curve.parquet")
        for sub in ("last", "best"):
            if sub == "best":
                if best[0] is not None and _score(row) <= best[0]:
                    continue
                best[0] = _score(row)
            (out / sub).mkdir(exist_ok=True)
            actor.save(out / sub / settings.algo, meta(steps))
        log.write(
            f"{time.strftime('%H:%M:%S')} {settings.algo} decisions {steps} control steps "
            f"{row['control_steps']} wall {row['wall_s']:.0f} s: 1 cm "
            f"{row['success_1cm']:.0%}, 5 cm {row['success_5cm']:.0%}, median error "
            f"{row['final_error_m'] * 100:.2f} cm (eval {row['eval_s']:.0f} s)\n"
        )
        log.flush()
        if progress:
            print(
                f"  {settings.algo} {steps:>8d} decisions  {row['wall_s']:7.0f} s  1 cm "
                f"{row['success_1cm']:4.0%}  5 cm {row['success_5cm']:4.0%}  median "
                f"{row['final_error_m'] * 100:.2f} cm",
                flush=True,
            )

    every = settings.eval_every

    class _Curve(BaseCallback):
        def __init__(self) -> None:
            super().__init__()
            self._next = (model.num_timesteps // every + 1) * every

        def _on_step(self) -> bool:
            if average is not None:
                average.update()
            if entropy_end is not None:
                share = min(1.0, self.num_timesteps / settings.steps)
                model.target_entropy = entropy_span[0] + (entropy_span[1] - entropy_span[0]) * share
            if self.num_timesteps >= self._next:
                self._next += every
                evaluate(int(self.num_timesteps))
                checkpoint()
            return True

    try:
        remaining = settings.steps - int(model.num_timesteps)
        if remaining > 0:
            model.learn(
                total_timesteps=remaining,
                callback=_Curve(),
                reset_num_timesteps=not resume,
            )
        if not curve or curve[-1]["policy_steps"] != model.num_timesteps:
            evaluate(int(model.num_timesteps))
            checkpoint()
    finally:
        env.close()
        log.close()
    return meta(int(model.num_timesteps))


def _write_curve(curve: Sequence[Mapping[str, Any]], path: Path) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    keys = list(dict.fromkeys(k for r in curve for k in r))
    table = pa.table({k: [r.get(k) for r in curve] for k in keys})
    tmp = path.with_name(path.name + ".tmp")
    pq.write_table(table, tmp)
    tmp.replace(path)
