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
    assert summary["episodes"] == 2 and 0.0 <= summary["success_rate"] <= 1.0
