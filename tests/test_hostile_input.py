"""Hostile scenario files through the CLI: exit code 2, one line on stderr, no traceback.

Also the input hygiene rules: configs through tomllib only, no eval/exec, no pickle, and plugin
classes only from an import path the user wrote.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

from blanket.cli import main
from blanket.errors import ConfigError
from blanket.scenario import load_object, load_scenario, make_env

ROOT = Path(__file__).resolve().parents[1]

PLANAR = 'env = "blanket/planar-2link-v0"\n'
ARM = 'env = "blanket/arm-reach-v0"\n'

HOSTILE = {
    "unknown_top_key": PLANAR + 'colour = "red"\n',
    "unknown_env_option": PLANAR + "[env_options]\nspeed = 3\n",
    "wrong_type_option": PLANAR + '[env_options]\nepisode_s = "four"\n',
    "wrong_type_bool": PLANAR + "[env_options]\ntolerance_m = true\n",
    "wrong_type_env": "env = 5\n",
    "wrong_type_targets": ARM + "[env_options]\ntargets = 5\n",
    "env_options_not_table": PLANAR + "env_options = 3\n",
    "missing_env": 'name = "no env here"\n',
    "unregistered_env": 'env = "blanket/nothing-v0"\n',
    "missing_urdf": ARM + '[env_options]\nurdf = "nothere.urdf"\nend_effector = "tip"\n',
    "urdf_without_end_effector": ARM + '[env_options]\nurdf = "arm.urdf"\n',
    "missing_end_effector": ARM + '[env_options]\nrobot = "panda"\nend_effector = "no_link"\n',
    "nan_episode": PLANAR + "[env_options]\nepisode_s = nan\n",
    "inf_tolerance": PLANAR + "[env_options]\ntolerance_m = inf\n",
    "overflowing_number": PLANAR + "[env_options]\nepisode_s = 1e400\n",
    "nan_noise": PLANAR + "[env_options]\ncamera_noise_px = nan\n",
    "negative_control_rate": PLANAR + "[env_options]\ncontrol_hz = -240.0\n",
    "negative_camera_rate": PLANAR + "[env_options]\ncamera_hz = -30.0\n",
    "zero_control_rate": PLANAR + "[env_options]\ncontrol_hz = 0\n",
    "camera_faster_than_control": PLANAR + "[env_options]\ncamera_hz = 1000.0\n",
    "negative_episode": PLANAR + "[env_options]\nepisode_s = -4.0\n",
    "negative_noise": PLANAR + "[env_options]\nencoder_angle_noise_rad = -0.01\n",
    "unknown_robot": ARM + '[env_options]\nrobot = "r2d2"\n',
    "unknown_control": PLANAR + '[env_options]\ncontrol = "position"\n',
    "negative_episodes": PLANAR + "episodes = -3\n",
    "not_toml": PLANAR + 'name = "unterminated\n',
    "agent_class_missing": PLANAR + '[agent]\nclass = "no.such.module:Agent"\n',
    "agent_class_not_a_path": PLANAR + '[agent]\nclass = "__import__"\n',
    "agent_class_wrong_callable": PLANAR + '[agent]\nclass = "os:system"\n',
    "agent_unknown_option": PLANAR + "[agent]\nflavour = 1\n",
    "agent_nan_gain": PLANAR + "[agent]\nattractor_gain_1_s = nan\n",
    "agent_bad_order": PLANAR + '[agent]\norder = "two"\n',
    "human_render_headless": PLANAR + '[env_options]\nrender_mode = "human"\n',
    "unknown_condition": ARM + "[conditions]\npayload = 0.3\n",
    "condition_out_of_range": PLANAR + "[conditions]\ncamera_dropout_probability = 2.0\n",
    "condition_not_a_number": PLANAR + '[conditions]\npayload_kg = "heavy"\n',
    "condition_nan": PLANAR + "[conditions]\nsensor_noise_scale = nan\n",
    "condition_fraction_of_a_frame": PLANAR + "[conditions]\ncamera_delay_frames = 0.5\n",
    "conditions_not_table": PLANAR + "conditions = 3\n",
    "nested_past_the_parser": PLANAR + "[agent]\nx = " + "[" * 5000 + "]" * 5000 + "\n",
    "nested_past_the_limit": PLANAR + "[agent]\nx = " + "[" * 12 + "]" * 12 + "\n",
    "agent_class_stdlib_with_side_effects": PLANAR + '[agent]\nclass = "this:s"\n',
    "agent_class_not_identifiers": PLANAR + '[agent]\nclass = "a b:c"\n',
    "base_agent_unknown_option": 'env = "blanket/base-goto-v0"\n[agent]\nembeding_order = 2\n',
    "condition_and_env_option_both": PLANAR
    + "[env_options]\ncontrol_hz = 240.0\n[conditions]\ncontrol_hz = 120.0\n",
}


def _write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    (tmp_path / "arm.urdf").write_text("<robot name='x'></robot>\n")  # for relative-path cases
    return path


def _run_cli(path: Path, tmp_path: Path) -> list[str]:
    args = ["run", str(path), "--episodes", "1", "--no-log", "--quiet"]
    return args + ["--out", str(tmp_path / "out"), "--overwrite"]


@pytest.mark.parametrize("case", sorted(HOSTILE))
def test_hostile_scenario_exits_2_with_one_line(case, tmp_path, capsys, monkeypatch) -> None:
    monkeypatch.delenv("DISPLAY", raising=False)
    monkeypatch.delenv("WAYLAND_DISPLAY", raising=False)
    path = _write(tmp_path, case, HOSTILE[case])
    code = main(_run_cli(path, tmp_path))
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if line.strip()]
    assert code == 2, err
    assert "Traceback" not in err
    assert len(lines) == 1 and lines[0].startswith("blanket: error: "), lines


def test_binary_file_as_scenario_exits_2(tmp_path, capsys) -> None:
    path = tmp_path / "pickled.toml"
    path.write_bytes(b"\x80\x04\x95\x10\x00\x00\x00\x00\x00\x00\x00}\x94.")  # a pickle stream
    assert main(_run_cli(path, tmp_path)) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_missing_scenario_file_exits_2(tmp_path, capsys) -> None:
    assert main(_run_cli(tmp_path / "absent.toml", tmp_path)) == 2
    assert "does not exist" in capsys.readouterr().err


def test_python_dash_m_cli_prints_no_traceback(tmp_path) -> None:
    path = _write(tmp_path, "nan", HOSTILE["nan_episode"])
    proc = subprocess.run(
        [sys.executable, "-m", "blanket.cli", *_run_cli(path, tmp_path)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    error_lines = [line for line in proc.stderr.splitlines() if line.startswith("blanket:")]
    assert len(error_lines) == 1
    assert "episode_s" in error_lines[0] and "nan" in error_lines[0]


def test_non_string_urdf_is_a_config_error() -> None:
    with pytest.raises(ConfigError, match="urdf must be a string"):
        make_env("blanket/arm-reach-v0", {"urdf": 5, "end_effector": "x"})


@pytest.mark.parametrize(
    "options",
    [
        {"episode_s": 1e12},  # 2.4e14 control steps: the run never ends
        {"control_hz": 1e12},  # 4e12 steps of 1e-12 s
        {"control_hz": 1e-9, "camera_hz": 1e-10},  # one physics step of 1e9 s
    ],
)
def test_absurd_durations_and_rates_are_config_errors(options) -> None:
    with pytest.raises(ConfigError, match="must be a number in"):
        env = make_env("blanket/planar-2link-v0", options)
        env.close()


def test_relative_urdf_resolves_against_the_scenario_folder(tmp_path) -> None:
    path = _write(tmp_path, "rel", ARM + '[env_options]\nurdf = "arm.urdf"\nend_effector = "t"\n')
    scenario = load_scenario(path)
    assert scenario.env_options["urdf"] == str((tmp_path / "arm.urdf").resolve())


# ----------------------------------------------------------------------- hygiene
def _python_files() -> list[Path]:
    files = list((ROOT / "src").rglob("*.py")) + list((ROOT / "envs").rglob("*.py"))
    assert files
    return files


def test_no_eval_exec_or_pickle_in_the_package() -> None:
    banned_calls = {"eval", "exec", "compile", "__import__"}
    banned_modules = {"pickle", "cPickle", "dill", "marshal", "shelve", "yaml", "cloudpickle"}
    found = []
    for path in _python_files():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                if node.func.id in banned_calls:
                    found.append(f"{path.name}:{node.lineno} {node.func.id}()")
            if isinstance(node, ast.Import):
                found += [
                    f"{path.name}:{node.lineno} import {a.name}"
                    for a in node.names
                    if a.name.split(".")[0] in banned_modules
                ]
            if isinstance(node, ast.ImportFrom) and node.module:
                if node.module.split(".")[0] in banned_modules:
                    found.append(f"{path.name}:{node.lineno} from {node.module}")
    assert found == []


def test_array_and_tensor_loads_in_the_package_refuse_pickles() -> None:
    # the RL weights path: numpy.load only with allow_pickle=False, torch.load only with
    # weights_only=True (no SB3 .load of shipped models either)
    found = []
    for path in _python_files():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if not (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)):
                continue
            owner = ast.unparse(node.func.value)
            keywords = {k.arg: ast.unparse(k.value) for k in node.keywords}
            if node.func.attr == "load" and owner in ("np", "numpy"):
                if keywords.get("allow_pickle") != "False":
                    found.append(f"{path.name}:{node.lineno} {owner}.load")
            if node.func.attr == "load" and owner == "torch":
                if keywords.get("weights_only") != "True":
                    found.append(f"{path.name}:{node.lineno} torch.load")
    assert found == []


def test_loading_and_running_rl_weights_unpickles_nothing(tmp_path, monkeypatch) -> None:
    import pickle

    import numpy as np

    from blanket.bench.rl import make_bench_env
    from blanket.bench.rl_goal import MlpActor, load_goal_policy

    rng = np.random.default_rng(0)
    weights = [rng.normal(size=(8, 10)), rng.normal(size=(2, 8))]
    actor = MlpActor(weights, [np.zeros(8), np.zeros(2)], "relu", "tanh")
    actor.save(tmp_path / "sac-her", {"settings": {"control": "velocity", "action_repeat": 2}})
    env = make_bench_env("planar", "velocity", 0.5)

    def refuse(*args, **kwargs):
        raise AssertionError("unpickling on the RL weights path")

    try:
        obs, _ = env.reset(seed=0)  # (numba's compile cache may unpickle: not the RL path)
        with monkeypatch.context() as patch:
            for name in ("load", "loads", "Unpickler"):
                patch.setattr(pickle, name, refuse)
            policy = load_goal_policy("sac-her", env.unwrapped.description, tmp_path)
            assert np.all(np.isfinite(policy.act(obs)))
    finally:
        env.close()


def test_scenario_files_are_read_with_tomllib() -> None:
    tree = ast.parse((ROOT / "src" / "blanket" / "scenario.py").read_text(encoding="utf-8"))
    imported = {a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
    assert "tomllib" in imported


def test_load_object_takes_only_explicit_import_paths(tmp_path, monkeypatch) -> None:
    import os.path

    assert load_object("os.path:join") is os.path.join
    (tmp_path / "broken_plugin.py").write_text("raise RuntimeError('boom at import')\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    for bad in (
        "os.path.join",
        "",
        "no_such_module_xyz:Thing",
        "os:no_such_attr",
        "broken_plugin:Agent",
        42,
    ):
        with pytest.raises(ConfigError) as info:
            load_object(bad, "agent class")
        message = str(info.value)
        assert "\n" not in message and "agent class" in message
    assert "boom at import" in str(
        pytest.raises(ConfigError, load_object, "broken_plugin:Agent").value
    )


def test_agent_errors_leave_no_folder_and_import_nothing(tmp_path, capsys) -> None:
    # the stdlib module `this` prints a poem when imported: refused before any import
    for case, hint in (
        ("agent_class_stdlib_with_side_effects", "standard library module 'this'"),
        ("agent_unknown_option", "unknown agent option 'flavour'"),
        ("base_agent_unknown_option", "did you mean embedding_order"),
    ):
        path = _write(tmp_path, case, HOSTILE[case])
        out = tmp_path / f"run-{case}"
        assert main(["run", str(path), "--out", str(out), "--quiet"]) == 2
        captured = capsys.readouterr()
        assert hint in captured.err
        assert "Beautiful is better" not in captured.out
        assert not out.exists()  # validated before the run folder is made


def test_agent_class_must_name_a_class(tmp_path, monkeypatch, capsys) -> None:
    (tmp_path / "greenhouse_plugin.py").write_text("NOT_A_CLASS = 'compost'\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    path = _write(tmp_path, "c", PLANAR + '[agent]\nclass = "greenhouse_plugin:NOT_A_CLASS"\n')
    assert main(_run_cli(path, tmp_path)) == 2
    assert "is a str, not a class" in capsys.readouterr().err
