"""End-to-end run folders: the same scenario and seed give the same log content."""

from __future__ import annotations

import json

import pandas as pd
import pyarrow.dataset as ds

from blanket.logs import read_run
from blanket.runner import run_scenario
from blanket.scenario import Scenario


def _run(out):
    scenario = Scenario(
        env="blanket/planar-2link-v0", env_options={"episode_s": 0.5}, name="determinism"
    )
    return run_scenario(scenario, episodes=2, seed=7, out_dir=out, progress=False)


def test_same_scenario_and_seed_give_identical_logs(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    _run(a)
    _run(b)
    frame_a, frame_b = read_run(a), read_run(b)
    # The episode files themselves are byte-identical (no wall-clock value inside).
    for name in ("episode-00000.parquet", "episode-00001.parquet"):
        assert (a / "episodes" / name).read_bytes() == (b / "episodes" / name).read_bytes()
    # run.json has one wall-clock field; the timings are in timings.jsonl
    run_a, run_b = (json.loads((x / "run.json").read_text()) for x in (a, b))
    assert run_a.pop("started_at") and run_b.pop("started_at") and run_a == run_b
    timings = [json.loads(x) for x in (a / "timings.jsonl").read_text().splitlines()]
    assert [t["episode"] for t in timings] == [0, 1] and timings[0]["agent_step_us"] > 0
    assert len(frame_a) == 2 * 120
    # Every data column agrees exactly; wall-clock values live only in run.json/summary.json.
    pd.testing.assert_frame_equal(frame_a, frame_b)
    for group in ("external.", "sensory.", "active.", "internal."):
        assert any(c.startswith(group) for c in frame_a.columns), group
    assert not any("_us" in c for c in frame_a.columns)
    # The folder opens as one pyarrow dataset too, and run.json carries the units.
    assert ds.dataset(a / "episodes").count_rows() == len(frame_a)
    meta = json.loads((a / "run.json").read_text())
    assert meta["units"]["external.tip_position_m.x"] == "m"
    summary = json.loads((a / "summary.json").read_text())
    # success as summary.json reports it is the one success rule applied to the logged
    # distances (row k is the state before step k; the last state is final_error_m)
    from blanket.success import time_to_success

    per_episode = summary["per_episode"]
    assert summary["episodes"] == len(per_episode) == 2
    for episode in per_episode:
        rows = frame_a[frame_a["episode"] == episode["episode"]]
        after = list(rows["external.distance_m"].iloc[1:]) + [episode["final_error_m"]]
        held = time_to_success([d <= meta["tolerance_m"] for d in after], 1.0 / 240.0)
        assert episode["success"] == (held is not None)
        assert episode["time_to_success_s"] == held
    assert summary["success_rate"] == sum(e["success"] for e in per_episode) / 2


def test_time_to_success_is_identical_in_summary_inspect_csv_and_bench(tmp_path):
    """One success rule, reported once: summary.json, `blanket inspect` (and its CSV) and the
    benchmark's per-episode records give the same time to success, episode by episode."""
    import argparse
    import math

    from blanket.bench.evaluate import run_policy_episodes
    from blanket.bench.metrics import episode_metrics
    from blanket.logs.cli import add_inspect_parser, run_inspect
    from blanket.logs.run_summary import summarize_run
    from blanket.runner import build_agent, with_safety
    from blanket.scenario import make_env

    scenario = Scenario(
        env="blanket/planar-2link-v0", env_options={"episode_s": 2.0}, name="one-rule"
    )
    out = tmp_path / "run"
    summary = run_scenario(scenario, episodes=4, seed=11, out_dir=out, progress=False)
    from_summary = [e["time_to_success_s"] for e in summary["per_episode"]]
    assert sum(t is not None for t in from_summary) >= 2  # the comparison has substance

    table = summarize_run(out)
    parser = argparse.ArgumentParser()
    add_inspect_parser(parser.add_subparsers(dest="command"))
    csv = tmp_path / "inspect.csv"
    run_inspect(parser.parse_args(["inspect", str(out), "--csv", str(csv)]))
    from_csv = pd.read_csv(csv, index_col="episode")

    env = with_safety(make_env(scenario.env, scenario.env_options))
    try:
        traces = run_policy_episodes(env, build_agent(env, {}), seeds=[11, 12, 13, 14])
    finally:
        env.close()
    from_bench = [episode_metrics(t)["time_to_success_1cm_s"] for t in traces]

    for episode, expected in enumerate(from_summary):
        if expected is None:
            assert math.isnan(table.loc[episode, "time_to_success_s"])
            assert math.isnan(from_csv.loc[episode, "time_to_success_s"])
            assert from_bench[episode] is None
        else:
            assert table.loc[episode, "time_to_success_s"] == expected
            assert from_csv.loc[episode, "time_to_success_s"] == expected
            assert from_bench[episode] == expected
        assert bool(table.loc[episode, "success"]) == (expected is not None)


def test_scenario_conditions_are_applied_and_logged(tmp_path):
    # A scenario's [conditions] reach the world and its log: the payload as external.payload_kg,
    # the dropped camera frames as fewer fresh frames than the nominal run.
    from blanket.scenario import load_scenario

    path = tmp_path / "wet.toml"
    path.write_text(
        'env = "blanket/planar-2link-v0"\nname = "wet pot"\n[env_options]\nepisode_s = 0.5\n'
        "[conditions]\npayload_kg = 0.3\ncamera_dropout_probability = 0.5\n"
    )
    scenario = load_scenario(path)
    assert scenario.conditions == {"payload_kg": 0.3, "camera_dropout_probability": 0.5}
    run_scenario(scenario, episodes=1, seed=3, out_dir=tmp_path / "wet", progress=False)
    wet = read_run(tmp_path / "wet")
    assert (wet["external.payload_kg"] == 0.3).all()
    _run(tmp_path / "dry")
    dry = read_run(tmp_path / "dry")
    dry = dry[dry["episode"] == 0]
    assert wet["sensory.camera_fresh"].sum() < 0.75 * dry["sensory.camera_fresh"].sum()


def test_inspect_judges_the_beliefs_consistency(tmp_path):
    from blanket.logs.run_summary import inspect_text, summarize_run

    _run(tmp_path / "a")
    table = summarize_run(tmp_path / "a")
    assert set(table["belief"]) <= {"consistent", "overconfident", "underconfident"}
    assert (table["belief_nees"] > 0).all()
    line = [x for x in inspect_text(tmp_path / "a").splitlines() if x.startswith("belief")]
    assert len(line) == 1 and "of 2 episodes" in line[0] and "expected 1" in line[0]
