"""Shipped RL weights: plain arrays + JSON, checked on load; damage gives one-line errors."""

from __future__ import annotations

import json
import pickle
from pathlib import Path

import numpy as np
import pytest

from blanket.bench.rl import make_bench_env
from blanket.bench.rl_goal import DEFAULT_MODELS_DIR, MlpActor, load_goal_policy
from blanket.errors import ConfigError


def _save(folder: Path, n_joints: int = 2, repeat: int = 4) -> Path:
    rng = np.random.default_rng(1)
    sizes = [2 * n_joints + 6, 8, n_joints]
    weights = [rng.normal(size=(b, a)) for a, b in zip(sizes[:-1], sizes[1:], strict=True)]
    actor = MlpActor(weights, [np.zeros(w.shape[0]) for w in weights], "relu", "tanh")
    meta = {"settings": {"control": "velocity", "action_repeat": repeat}}
    return actor.save(folder / "sac-her", meta)


@pytest.fixture()
def planar():
    env = make_bench_env("planar", "velocity", 0.5)
    yield env.unwrapped.description
    env.close()


def _one_line_error(folder: Path, description) -> str:
    with pytest.raises(ConfigError) as info:
        load_goal_policy("sac-her", description, folder)
    message = str(info.value)
    assert "\n" not in message and len(message) < 300
    return message


def test_saved_weights_round_trip(tmp_path, planar):
    _save(tmp_path)
    policy = load_goal_policy("sac-her", planar, tmp_path)
    original, _ = MlpActor.load(tmp_path / "sac-her.json")
    x = np.linspace(-1, 1, 10)
    np.testing.assert_array_equal(policy.actor(x), original(x))
    assert policy.action_repeat == 4


def test_tampered_json_gives_one_line_errors(tmp_path, planar):
    path = _save(tmp_path)
    good = json.loads(path.read_text())
    cases = {
        "not json": "{ this is not json",
        "wrong format": json.dumps({**good, "format": "sb3-zip"}),
        "path escape": json.dumps({**good, "weights": "../elsewhere.npz"}),
        "layers": json.dumps({**good, "layers": 10**9}),
        "layers bool": json.dumps({**good, "layers": True}),
        "activation": json.dumps({**good, "activation": "__import__('os')"}),
        "repeat": json.dumps({**good, "settings": {"control": "velocity", "action_repeat": 3}}),
        "control": json.dumps({**good, "settings": {"control": "torque", "action_repeat": 4}}),
        "settings": json.dumps({**good, "settings": [1, 2]}),
        "hash": json.dumps({**good, "weights_sha256": "0" * 64}),
    }
    for case, text in cases.items():
        path.write_text(text)
        message = _one_line_error(tmp_path, planar)
        assert "sac-her" in message or "action_repeat" in message, case


def test_tampered_weight_file_gives_one_line_errors(tmp_path, planar):
    import hashlib

    path = _save(tmp_path)
    npz = tmp_path / "sac-her.npz"
    good = json.loads(path.read_text())

    def rehash(data: bytes) -> None:  # an attacker who also fixes the hash in the JSON
        npz.write_bytes(data)
        path.write_text(json.dumps({**good, "weights_sha256": hashlib.sha256(data).hexdigest()}))

    original = npz.read_bytes()
    npz.write_bytes(original[:-1] + bytes([original[-1] ^ 1]))
    assert "weights_sha256" in _one_line_error(tmp_path, planar)
    rehash(original[: len(original) // 2])  # truncated
    assert "not a plain array file" in _one_line_error(tmp_path, planar)
    rehash(pickle.dumps({"w0": np.zeros((8, 10))}))  # a pickle stream instead of arrays
    assert "not a plain array file" in _one_line_error(tmp_path, planar)
    obj = tmp_path / "obj.npz"
    np.savez(obj, w0=np.array([object()], dtype=object), b0=np.zeros(1))
    rehash(obj.read_bytes())  # arrays of Python objects (which would need unpickling)
    assert "not a plain array file" in _one_line_error(tmp_path, planar)
    wrong = tmp_path / "wrong.npz"
    np.savez(
        wrong, w0=np.full((2, 10), np.nan), b0=np.zeros(2), w1=np.zeros((2, 2)), b1=np.zeros(2)
    )
    rehash(wrong.read_bytes())
    assert "not finite" in _one_line_error(tmp_path, planar)
    np.savez(wrong, w0=np.zeros((3, 10)), b0=np.zeros(3), w1=np.zeros((2, 8)), b1=np.zeros(2))
    rehash(wrong.read_bytes())
    assert "layer 1" in _one_line_error(tmp_path, planar)
    (tmp_path / "sac-her.npz").unlink()
    assert "missing weights file" in _one_line_error(tmp_path, planar)


def test_weights_for_another_arm_are_refused(tmp_path, planar):
    _save(tmp_path, n_joints=7)
    assert "does not fit a 2-joint arm" in _one_line_error(tmp_path, planar)


def test_bench_cli_turns_damaged_weights_into_exit_2(tmp_path, capsys):
    from blanket.cli import main

    (tmp_path / "models").mkdir()
    path = _save(tmp_path / "models")
    path.write_text("[]")
    args = ["bench", "--policies", "sac-her", "--robot", "planar", "--conditions", "nominal"]
    args += ["--episodes", "1", "--episode-s", "0.5", "--quiet", "--out", str(tmp_path / "o")]
    assert main([*args, "--rl-models", str(tmp_path / "models")]) == 2
    err = capsys.readouterr().err.strip()
    assert "format" in err and "\n" not in err


def test_shipped_sac_her_weights_load_and_act_on_the_iiwa():
    path = DEFAULT_MODELS_DIR / "sac-her.json"
    assert path.is_file(), "models/sac-her.json is shipped with the project"
    env = make_bench_env("iiwa", "velocity", 0.5)
    try:
        policy = load_goal_policy("sac-her", env.unwrapped.description)
        obs, _ = env.reset(seed=0)
        action = policy.act(obs)
    finally:
        env.close()
    doc = json.loads(path.read_text())
    assert doc["settings"]["robot"] == "iiwa" and doc["control_steps"] > 0
    assert doc["learning_curve"] and doc["versions"]["stable_baselines3"]
    assert action.shape == (7,) and np.all(np.isfinite(action))


def test_bench_row_of_sac_her_carries_its_training_cost(tmp_path):
    from blanket.bench.suite import BenchSettings, run_benchmark

    path = _save(tmp_path)
    doc = json.loads(path.read_text())
    curve = [
        {
            "policy_steps": 10,
            "control_steps": 40,
            "wall_s": 5.0,
            "success_1cm": 0.0,
            "success_5cm": 0.5,
            "final_error_m": 0.04,
        }
    ]
    doc |= {
        "policy_steps": 10,
        "control_steps": 40,
        "wall_time_s": 5.0,
        "learning_curve": curve,
        "seed": 2,
        "seeds_trained": [0, 1, 2],
        "seeds_wall_time_s": 7200.0,
    }
    path.write_text(json.dumps(doc))  # the hash covers the arrays, not the record
    settings = BenchSettings.from_cli(
        policies=["sac-her", "classical"],
        conditions=["nominal"],
        episodes=1,
        robot="planar",
        episode_s=0.5,
        rl_models=str(tmp_path),
    )
    summary = run_benchmark(settings, tmp_path / "bench", progress=False)
    record, classical = summary["records"]
    assert record["policy"] == "sac-her" and record["training_steps"] == 40
    assert record["training_wall_s"] == 5.0
    report = (tmp_path / "bench" / "report.md").read_text()
    assert "## RL training" in report
    # the cost table: RL's training beside the model-based policy's zero
    assert "| sac-her | 40 | 10 | 0.00 (all seeds 2.00) | 3 (0, 1, 2) |" in report
    assert "| classical | 0 | 0 | 0 | none (a body model, no training) |" in report
    assert (tmp_path / "bench" / "rl_learning_curves.png").stat().st_size > 1000


def test_default_bench_takes_goal_policies_whose_weights_exist(tmp_path):
    from blanket.bench.suite import BenchSettings

    empty = BenchSettings.from_cli(rl_models=str(tmp_path))
    if not (DEFAULT_MODELS_DIR / "ppo-vec.json").is_file():
        assert "ppo-vec" not in empty.policies
        assert any(x.startswith("ppo-vec: no ") for x in empty.left_out)
    assert "sac-her" in empty.policies  # shipped in models/
    path = _save(tmp_path)
    path.rename(tmp_path / "ppo-vec.json")
    (tmp_path / "sac-her.npz").rename(tmp_path / "ppo-vec.npz")
    doc = json.loads((tmp_path / "ppo-vec.json").read_text())
    doc["weights"] = "ppo-vec.npz"
    (tmp_path / "ppo-vec.json").write_text(json.dumps(doc))
    found = BenchSettings.from_cli(rl_models=str(tmp_path))
    assert "ppo-vec" in found.policies and "sac-her" in found.policies
    planar = BenchSettings.from_cli(robot="planar", rl_models=str(tmp_path))
    assert "ppo-vec" not in planar.policies and "sac-her" not in planar.policies
    assert any(x.startswith("ppo-vec: the shipped weights") for x in planar.left_out)
