"""One vocabulary of conditions: scenario tables, benchmark presets and sweeps use the same
parameters, checked at load time, applied as wrappers and visible in ``info["external"]``."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

import blanket  # noqa: F401  (registers the envs)
from blanket import wrappers
from blanket.cli import main
from blanket.conditions import (
    PARAMETERS,
    PRESETS,
    apply_conditions,
    check_conditions,
    condition_env_options,
    parse_condition,
)
from blanket.errors import ConfigError
from blanket.scenario import load_scenario, scenario_from_dict

PLANAR = "blanket/planar-2link-v0"
ARM = "blanket/arm-reach-v0"

#: A value inside the range of every parameter (push details need push_magnitude_n).
VALID = {
    "payload_kg": 0.3,
    "sensor_noise_scale": 2.0,
    "camera_dropout_probability": 0.2,
    "camera_delay_frames": 1,
    "push_magnitude_n": 5.0,
    "push_rate_hz": 2.0,
    "push_duration_s": 0.1,
    "target_speed_m_s": 0.02,
    "control_hz": 120.0,
    "model_length_scale": 1.02,
}


def test_every_parameter_has_a_test_value_in_range():
    assert set(VALID) == set(PARAMETERS)
    assert check_conditions(VALID) == VALID


def test_scenario_with_a_payload_loads_and_the_arm_env_reports_it(tmp_path):
    path = tmp_path / "bench-with-pot.toml"
    path.write_text(
        'name = "tray with a filled pot"\nenv = "blanket/arm-reach-v0"\n\n'
        "[env_options]\nepisode_s = 1.0\n\n[conditions]\npayload_kg = 0.3\n",
        encoding="utf-8",
    )
    scenario = load_scenario(path)
    assert scenario.conditions == {"payload_kg": 0.3}
    assert load_scenario_text(tmp_path, scenario.to_toml()).conditions == {"payload_kg": 0.3}
    env = gym.make(scenario.env, **scenario.env_options, **condition_env_options({}))
    try:
        wrapped, model_options = apply_conditions(env, scenario.conditions)
        assert model_options == {}
        _obs, info = wrapped.reset(seed=0)
        assert info["external"]["payload_kg"] == 0.3
        _obs, _r, _term, _trunc, info = wrapped.step(np.zeros(wrapped.action_space.shape))
        assert info["external"]["payload_kg"] == 0.3
        assert env.unwrapped.world.payload_kg == 0.3  # the simulated arm carries it
    finally:
        env.close()


def load_scenario_text(tmp_path, text: str):
    path = tmp_path / "written.toml"
    path.write_text(text, encoding="utf-8")
    return load_scenario(path)


def test_unknown_condition_key_is_one_line_with_a_suggestion():
    with pytest.raises(ConfigError) as exc:
        scenario_from_dict({"env": ARM, "conditions": {"payload": 0.3}}, where="pot.toml")
    text = str(exc.value)
    assert "\n" not in text
    assert "payload" in text and "did you mean payload_kg?" in text


@pytest.mark.parametrize(
    "conditions, words",
    [
        ({"payload_kg": -0.1}, ["payload_kg", "[0, 50]"]),
        ({"payload_kg": "heavy"}, ["payload_kg"]),
        ({"camera_dropout_probability": 1.5}, ["camera_dropout_probability", "1]"]),
        ({"camera_delay_frames": 1.5}, ["camera_delay_frames", "whole"]),
        ({"camera_delay_frames": True}, ["camera_delay_frames", "whole"]),
        ({"sensor_noise_scale": float("nan")}, ["sensor_noise_scale"]),
        ({"push_rate_hz": 1.0}, ["push_rate_hz", "push_magnitude_n"]),
        ({"push_magnitude_n": 5.0, "push_duration_s": 0.0}, ["push_duration_s", "(0"]),
        ({"control_hz": 5.0}, ["control_hz", "[10, 2000]"]),
        ({"model_length_scale": 3.0}, ["model_length_scale"]),
    ],
)
def test_bad_values_are_one_line_errors_naming_the_range(conditions, words):
    with pytest.raises(ConfigError) as exc:
        scenario_from_dict({"env": PLANAR, "conditions": conditions})
    text = str(exc.value)
    assert "\n" not in text
    for w in words:
        assert w in text, text


@pytest.mark.parametrize(
    "table, conditions",
    [
        ({"env_options": {"control_hz": 240.0}}, {"control_hz": 120.0}),
        ({"agent": {"length_scale": 1.0}}, {"model_length_scale": 1.03}),
    ],
)
def test_a_setting_lives_in_one_table_only(table, conditions):
    with pytest.raises(ConfigError, match="keep one"):
        scenario_from_dict({"env": PLANAR, **table, "conditions": conditions})


def test_every_applied_value_appears_in_external():
    values = dict(VALID)
    env = gym.make(PLANAR, episode_s=0.5, **condition_env_options(values))
    try:
        wrapped, model_options = apply_conditions(env, values)
        assert model_options == {"length_scale": 1.02}
        _obs, info = wrapped.reset(seed=1)
        assert {k: info["external"][k] for k in values} == values
        _obs, _r, _term, _trunc, info = wrapped.step(np.zeros(2))
        assert {k: info["external"][k] for k in values} == values
        assert env.unwrapped.description.control_hz == 120.0
    finally:
        env.close()


def test_an_env_made_at_another_rate_is_refused():
    env = gym.make(PLANAR)
    try:
        with pytest.raises(ConfigError, match="control_hz"):
            apply_conditions(env, {"control_hz": 120.0})
    finally:
        env.close()


# The wrappers the benchmark's named conditions were built from before they became mappings
# of parameters: the same wrappers with the same arguments must give the same episodes.
_DIRECT = {
    "sensor-noise-x3": lambda e: wrappers.SensorNoiseScale(e, factor=3.0),
    "camera-dropout-30": lambda e: wrappers.CameraDropout(e, probability=0.3),
    "camera-delay-2": lambda e: wrappers.CameraDelay(e, frames=2),
    "payload-1.5kg": lambda e: wrappers.Payload(e, mass_kg=1.5),
    "random-pushes": lambda e: wrappers.RandomPushes(e, force_n=20.0, rate_hz=0.5, duration_s=0.2),
    "moving-target": lambda e: wrappers.MovingTarget(e, speed_m_s=0.05),
}


def _trace(env: gym.Env, seed: int, steps: int) -> list[np.ndarray]:
    obs, _ = env.reset(seed=seed)
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(steps):
        flat = np.concatenate([np.ravel(np.asarray(v, dtype=float)) for v in obs.values()])
        out.append(flat)
        action = rng.uniform(-0.5, 0.5, size=env.action_space.shape)
        obs, *_ = env.step(action)
    return out


@pytest.mark.parametrize("name", sorted(_DIRECT))
def test_presets_behave_as_the_wrappers_they_replace(name):
    preset = PRESETS[name]
    a, b, c = (gym.make(PLANAR, episode_s=1.0) for _ in range(3))
    try:
        via_preset = _trace(preset.wrap(a), seed=7, steps=120)
        direct = _trace(_DIRECT[name](b), seed=7, steps=120)
        nominal = _trace(c, seed=7, steps=120)
    finally:
        for env in (a, b, c):
            env.close()
    assert all(np.array_equal(x, y) for x, y in zip(via_preset, direct, strict=True))
    assert not all(np.array_equal(x, y) for x, y in zip(via_preset, nominal, strict=True))


def test_presets_without_wrappers_set_env_and_model_options():
    assert PRESETS["nominal"].parameters == {}
    assert PRESETS["control-120hz"].env_options == {"control_hz": 120.0}
    assert PRESETS["miscalibrated-lengths"].model_options == {"length_scale": 1.03}
    assert set(PRESETS) == {
        "nominal",
        "sensor-noise-x3",
        "camera-dropout-30",
        "camera-delay-2",
        "payload-1.5kg",
        "miscalibrated-lengths",
        "random-pushes",
        "control-120hz",
        "moving-target",
    }


def test_condition_text_is_a_preset_or_parameter_assignments():
    assert parse_condition(None).parameters == {}
    assert parse_condition("payload-1.5kg").parameters == {"payload_kg": 1.5}
    parsed = parse_condition("payload_kg=0.3, camera_delay_frames=2")
    assert parsed.parameters == {"payload_kg": 0.3, "camera_delay_frames": 2}
    for bad, word in (
        ("payload-1.5", "did you mean payload-1.5kg?"),
        ("payload=0.3", "did you mean payload_kg?"),
        ("payload_kg=heavy", "must be a number"),
        ("payload_kg=", "NAME=VALUE"),
    ):
        with pytest.raises(ConfigError, match=word.replace("?", r"\?").replace("[", r"\[")):
            parse_condition(bad)


def test_sweeps_apply_the_scenarios_conditions_with_the_named_one():
    from blanket.tune.engines import condition_parts

    env_options, wrap, model_options = condition_parts("control-120hz", {"payload_kg": 0.3})
    assert env_options == {"control_hz": 120.0} and model_options == {}
    env = gym.make(PLANAR, episode_s=0.5, **env_options)
    try:
        _obs, info = wrap(env).reset(seed=0)
        assert info["external"]["payload_kg"] == 0.3 and info["external"]["control_hz"] == 120.0
    finally:
        env.close()
    with pytest.raises(ConfigError, match="payload_kg"):
        condition_parts("payload-1.5kg", {"payload_kg": 0.3})


def test_blanket_run_with_an_unknown_condition_exits_2_with_one_line(tmp_path, capsys):
    path = tmp_path / "typo.toml"
    path.write_text(f'env = "{ARM}"\n\n[conditions]\npayload_kgs = 0.3\n', encoding="utf-8")
    code = main(["run", str(path), "--episodes", "1", "--no-log", "--quiet", "--out", "o"])
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if line.strip()]
    assert code == 2
    assert "Traceback" not in err
    assert len(lines) == 1 and lines[0].startswith("blanket: error: ")
    assert "payload_kgs" in lines[0] and "did you mean payload_kg?" in lines[0]


def test_blanket_tune_with_an_unknown_condition_exits_2(tmp_path, capsys):
    path = tmp_path / "planar.toml"
    path.write_text(f'env = "{PLANAR}"\n', encoding="utf-8")
    args = ["tune", str(path), "--vary", "agent.order=1,2", "--out", str(tmp_path / "sweep")]
    assert main([*args, "--condition", "camera_dropout=0.3"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "did you mean camera_dropout_probability?" in err


def test_shipped_scenarios_load_and_apply_their_conditions():
    from pathlib import Path

    import blanket_envs

    folder = Path(blanket_envs.__file__).parent / "scenarios"
    paths = sorted(folder.glob("*.toml"))
    assert any(load_scenario(p).conditions for p in paths)
    for path in paths:
        scenario = load_scenario(path)
        options = {**scenario.env_options, **condition_env_options(scenario.conditions)}
        env = gym.make(scenario.env, **options)
        try:
            wrapped, _ = apply_conditions(env, scenario.conditions)
            _obs, info = wrapped.reset(seed=0)
            for key, value in scenario.conditions.items():
                assert info["external"][key] == value, (path.name, key)
        finally:
            env.close()
