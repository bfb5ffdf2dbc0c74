"""Trajectory logs: writer, reader, crash safety, determinism, errors, Recorder, inspection.

Outside references: the files are read back by Apache Arrow's own readers
(``pyarrow.parquet``, ``pyarrow.dataset`` discovery), by pandas (``read_parquet``) and, when
installed, by polars and duckdb; kinematic consistency of logged truth is checked against the
textbook planar two-link forward kinematics x = l1 cos q1 + l2 cos(q1 + q2),
y = l1 sin q1 + l2 sin(q1 + q2) (e.g. Spong, Hutchinson & Vidyasagar, "Robot Modeling and
Control", 2006, sec. 3.1).
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import gymnasium as gym
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

from blanket.cli import main as main_cli
from blanket.errors import ConfigError
from blanket.logs import LogError, RunWriter, open_dataset, read_metadata, read_run
from blanket.logs.cli import add_inspect_parser, add_plot_parser, run_inspect
from blanket.logs.repair import repair_run
from blanket.logs.run_summary import inspect_text, summarize_run
from blanket.logs.schema import SCHEMA_VERSION, component_labels, unit_for_key
from blanket.wrappers import Recorder

JOINTS = ["shoulder", "elbow"]
L1_M, L2_M = 0.4, 0.3


def planar_tip(q: np.ndarray) -> np.ndarray:
    """Textbook planar two-link forward kinematics (Spong et al. 2006, sec. 3.1), z = 0.05 m."""
    return np.array(
        [
            L1_M * np.cos(q[0]) + L2_M * np.cos(q[0] + q[1]),
            L1_M * np.sin(q[0]) + L2_M * np.sin(q[0] + q[1]),
            0.05,
        ]
    )


def write_demo_run(run_dir: Path, episodes: int = 2, steps: int = 50, seed: int = 0, **kw) -> dict:
    """A small potting-bench run with all four groups; returns the raw data per episode."""
    rng = np.random.default_rng(seed)
    raw: dict = {}
    meta = {
        "scenario": "tray-cell-b3",
        "seed": seed,
        "robot": "planar_2link",
        "joint_names": JOINTS,
        "action_low": [-3.0, -3.0],
        "action_high": [3.0, 3.0],
        "tolerance_m": 0.01,
    }
    with RunWriter(run_dir, meta, **kw) as writer:
        for ep in range(episodes):
            writer.begin_episode(ep, max_steps=steps)
            q = rng.uniform(-1, 1, 2)
            target = planar_tip(np.array([0.6, 0.9]))
            rows = []
            for k in range(steps):
                belief = np.vstack([q + 0.01 * k, np.full(2, 0.1 * k), np.zeros(2)])
                row = dict(
                    external={
                        "joint_angle_rad": q.copy(),
                        "tip_position_m": planar_tip(q),
                        "target_position_m": target,
                        "distance_m": float(np.linalg.norm(planar_tip(q) - target)),
                        "success": k >= steps - 5,
                    },
                    sensory={
                        "joint_angle_rad": q + rng.normal(0, 0.01, 2),
                        "tip_pixel_px": rng.uniform(0, 320, 2),
                        "tip_visible": np.int64(k % 2),
                    },
                    active={"joint_velocity_rad_s": rng.uniform(-3, 3, 2)},
                    internal={
                        "belief": belief,
                        "free_energy": float(k),
                        "prediction_error": {"camera": rng.normal(size=2)},
                    },
                )
                writer.record(k, k / 240.0, **row)
                rows.append(row)
                q = q + 0.01
            writer.end_episode({"seed": seed + ep})
            raw[ep] = rows
    return raw


# --------------------------------------------------------------------------- naming and units
def test_column_names_follow_the_documented_pattern(tmp_path: Path) -> None:
    write_demo_run(tmp_path / "run", episodes=1, steps=3)
    frame = read_run(tmp_path / "run")
    assert list(frame.columns) == [
        "episode",
        "step",
        "t",
        "external.joint_angle_rad.shoulder",
        "external.joint_angle_rad.elbow",
        "external.tip_position_m.x",
        "external.tip_position_m.y",
        "external.tip_position_m.z",
        "external.target_position_m.x",
        "external.target_position_m.y",
        "external.target_position_m.z",
        "external.distance_m",
        "external.success",
        "sensory.joint_angle_rad.shoulder",
        "sensory.joint_angle_rad.elbow",
        "sensory.tip_pixel_px.u",
        "sensory.tip_pixel_px.v",
        "sensory.tip_visible",
        "active.joint_velocity_rad_s.shoulder",
        "active.joint_velocity_rad_s.elbow",
        "internal.belief.order0.shoulder",
        "internal.belief.order0.elbow",
        "internal.belief.order1.shoulder",
        "internal.belief.order1.elbow",
        "internal.belief.order2.shoulder",
        "internal.belief.order2.elbow",
        "internal.free_energy",
        "internal.prediction_error.camera.u",
        "internal.prediction_error.camera.v",
    ]


def test_component_name_rules() -> None:
    joints = ["a1", "a2", "a3"]
    assert component_labels(("external", "tip_position_m"), 3, joints, None) == ["x", "y", "z"]
    assert component_labels(("sensory", "joint_angle_rad"), 3, joints, None) == joints
    assert component_labels(("sensory", "target_pixel_px"), 2, joints, None) == ["u", "v"]
    assert component_labels(("internal", "prediction_error", "camera"), 4, None, None) == [
        "u0",
        "v0",
        "u1",
        "v1",
    ]
    assert component_labels(("internal", "camera"), 3, joints, None) == ["c0", "c1", "c2"]
    assert component_labels(("external", "base_pose"), 3, None, None) == ["x", "y", "yaw"]
    assert component_labels(("internal", "precision"), 4, joints, None) == ["c0", "c1", "c2", "c3"]
    names = {"prediction_error.camera": ["tip_u", "tip_v"], "_wheel_rad_s": ["left", "right"]}
    assert component_labels(("internal", "prediction_error", "camera"), 2, None, names) == [
        "tip_u",
        "tip_v",
    ]
    assert component_labels(("active", "drive_wheel_rad_s"), 2, None, names) == ["left", "right"]
    with pytest.raises(ValueError, match="component_names"):
        component_labels(("internal", "prediction_error", "camera"), 3, None, names)


def test_component_names_option_and_units_in_schema(tmp_path: Path) -> None:
    with RunWriter(tmp_path / "r", {}, component_names={"camera": ["u_tip", "v_tip"]}) as w:
        w.begin_episode(0)
        w.record(
            0,
            0.0,
            external={"joint_torque_n_m": np.zeros(2), "step_time_us": 3.0},
            sensory={"camera": np.zeros(2)},
            active={"wheel_speed_rad_s": np.ones(2)},
        )
        path = w.end_episode()
    schema = pq.read_schema(path)  # reference: Arrow's own Parquet schema reader
    assert schema.names[3:] == [
        "external.joint_torque_n_m.c0",
        "external.joint_torque_n_m.c1",
        "external.step_time_us",
        "sensory.camera.u_tip",
        "sensory.camera.v_tip",
        "active.wheel_speed_rad_s.c0",
        "active.wheel_speed_rad_s.c1",
    ]
    units = {f.name: (f.metadata or {}).get(b"unit", b"").decode() for f in schema}
    assert units["t"] == "s"
    assert units["external.joint_torque_n_m.c1"] == "N m"
    assert units["external.step_time_us"] == "us"
    assert units["active.wheel_speed_rad_s.c0"] == "rad/s"
    assert units["sensory.camera.u_tip"] == ""
    assert json.loads(schema.metadata[b"blanket.units"])["external.joint_torque_n_m.c0"] == "N m"
    run = json.loads((tmp_path / "r" / "run.json").read_text())
    assert run["units"]["active.wheel_speed_rad_s.c1"] == "rad/s"


@pytest.mark.parametrize(
    ("key", "unit"),
    [
        ("tip_position_m", "m"),
        ("joint_velocity_rad_s", "rad/s"),
        ("joint_angle_rad", "rad"),
        ("joint_torque_n_m", "N m"),
        ("tip_pixel_px", "px"),
        ("time_s", "s"),
        ("sim_step_us", "us"),
        ("free_energy", None),
        ("belief", None),
    ],
)
def test_unit_from_key_suffix(key: str, unit: str | None) -> None:
    assert unit_for_key(key) == unit


# --------------------------------------------------------------------------- round trip
def test_values_round_trip_through_independent_readers(tmp_path: Path) -> None:
    raw = write_demo_run(tmp_path / "run", episodes=2, steps=40)
    frame = read_run(tmp_path / "run")
    assert len(frame) == 80
    row = raw[1][17]
    got = frame[(frame.episode == 1) & (frame.step == 17)].iloc[0]
    assert got["t"] == pytest.approx(17 / 240.0)
    np.testing.assert_array_equal(
        got[["internal.belief.order1.shoulder", "internal.belief.order1.elbow"]].to_numpy(float),
        row["internal"]["belief"][1],
    )
    np.testing.assert_array_equal(
        got[["sensory.tip_pixel_px.u", "sensory.tip_pixel_px.v"]].to_numpy(float),
        row["sensory"]["tip_pixel_px"],
    )
    assert got["sensory.tip_visible"] == 1 and got["external.success"] == np.False_
    # The same folder through Arrow's discovery (dot files skipped) and pandas.
    table = ds.dataset(tmp_path / "run" / "episodes", format="parquet").to_table()
    assert table.num_rows == 80
    pandas_frame = pd.read_parquet(tmp_path / "run" / "episodes")
    np.testing.assert_array_equal(
        np.sort(pandas_frame["active.joint_velocity_rad_s.elbow"].to_numpy()),
        np.sort(frame["active.joint_velocity_rad_s.elbow"].to_numpy()),
    )
    assert open_dataset(tmp_path / "run").count_rows() == 80
    one = read_run(tmp_path / "run" / "episodes" / "episode-00001.parquet")
    assert set(one.episode) == {1} and len(one) == 40
    assert read_metadata(tmp_path / "run" / "episodes" / "episode-00001.parquet")["episode"] == {
        "episode": 1,
        "rows": 40,
        "extra": {"seed": 1},
    }


def test_polars_reads_the_folder(tmp_path: Path) -> None:
    pl = pytest.importorskip("polars")
    write_demo_run(tmp_path / "run", episodes=2, steps=10)
    frame = pl.read_parquet(str(tmp_path / "run" / "episodes" / "*.parquet"))
    assert frame.height == 20 and "internal.belief.order2.elbow" in frame.columns


def test_duckdb_reads_the_folder(tmp_path: Path) -> None:
    duckdb = pytest.importorskip("duckdb")
    write_demo_run(tmp_path / "run", episodes=2, steps=10)
    pattern = str(tmp_path / "run" / "episodes" / "*.parquet")
    count = duckdb.sql(f"SELECT count(*) FROM read_parquet('{pattern}')").fetchall()[0][0]
    assert count == 20


def test_same_data_written_twice_gives_identical_files(tmp_path: Path) -> None:
    write_demo_run(tmp_path / "a", episodes=2, steps=30, seed=4)
    write_demo_run(tmp_path / "b", episodes=2, steps=30, seed=4)
    for name in ("episode-00000.parquet", "episode-00001.parquet"):
        assert (tmp_path / "a" / "episodes" / name).read_bytes() == (
            tmp_path / "b" / "episodes" / name
        ).read_bytes()
    run_a = json.loads((tmp_path / "a" / "run.json").read_text())
    run_b = json.loads((tmp_path / "b" / "run.json").read_text())
    run_a.pop("started_at")
    run_b.pop("started_at")
    assert run_a == run_b
    meta = pq.read_schema(tmp_path / "a" / "episodes" / "episode-00000.parquet").metadata
    assert "started_at" not in json.loads(meta[b"blanket.run"])


def test_buffers_grow_without_max_steps_and_keys_may_come_and_go(tmp_path: Path) -> None:
    with RunWriter(tmp_path / "r", {"joint_names": JOINTS}) as w:
        w.begin_episode(3)
        for k in range(2500):  # beyond the initial capacity of 1024: two doublings
            internal = {"free_energy": float(k)}
            if k >= 2000:
                internal["fault"] = {"camera": k % 3 == 0}
            external = {"joint_angle_rad": np.array([k, -k], float)}
            if k != 10:
                external["payload_kg"] = 0.2
            w.record(
                k,
                k * 0.01,
                external=external,
                sensory={"count": k if k < 100 else k + 0.5},
                active={},
                internal=internal,
            )
        w.end_episode()
    frame = read_run(tmp_path / "r")
    assert len(frame) == 2500 and set(frame.episode) == {3}
    np.testing.assert_array_equal(frame["internal.free_energy"], np.arange(2500.0))
    np.testing.assert_array_equal(frame["external.joint_angle_rad.elbow"], -np.arange(2500.0))
    assert frame["external.payload_kg"].isna().sum() == 1 and np.isnan(
        frame.loc[10, "external.payload_kg"]
    )
    assert frame["internal.fault.camera"].isna().sum() == 2000
    assert frame.loc[2001, "internal.fault.camera"] == True  # noqa: E712
    assert frame.loc[2002, "internal.fault.camera"] == False  # noqa: E712
    # An int key that later receives a float is stored as float, early values kept.
    assert frame["sensory.count"].dtype == np.float64
    assert frame.loc[99, "sensory.count"] == 99.0 and frame.loc[100, "sensory.count"] == 100.5


def test_new_keys_mid_episode_keep_every_earlier_value_in_place(tmp_path: Path) -> None:
    # A key that first appears in an early group (external) after later groups hold arrays
    # moves those groups' places in the row buffer; every value must stay with its column.
    with RunWriter(tmp_path / "r", {"joint_names": JOINTS}) as w:
        w.begin_episode(0, max_steps=8)
        for k in range(12):  # beyond max_steps: one doubling after the new keys
            external = {"joint_angle_rad": np.array([k, 10.0 + k])}
            if k >= 5:
                external["push_force_n"] = np.array([k, -k, 2.0 * k])
                external["payload_kg"] = 0.1 * k
            internal = {"belief": np.full((2, 2), float(k)), "free_energy": -float(k)}
            if k >= 7:
                internal["prediction_error"] = {"camera": np.array([k, k + 0.5])}
            w.record(
                k,
                0.01 * k,
                external=external,
                sensory={"tip_pixel_px": np.array([k, 2.0 * k])},
                active={"action": np.array([-k, -2.0 * k])},
                internal=internal,
            )
        w.end_episode()
    f = read_run(tmp_path / "r")
    ks = np.arange(12.0)
    np.testing.assert_array_equal(f["external.joint_angle_rad.elbow"], 10.0 + ks)
    np.testing.assert_array_equal(f["sensory.tip_pixel_px.v"], 2.0 * ks)
    np.testing.assert_array_equal(f["active.action.elbow"], -2.0 * ks)
    np.testing.assert_array_equal(f["internal.belief.order1.elbow"], ks)
    np.testing.assert_array_equal(f["internal.free_energy"], -ks)
    push = f["external.push_force_n.y"]
    assert push[:5].isna().all() and np.array_equal(push[5:], -ks[5:])
    assert f["external.payload_kg"][:5].isna().all()
    np.testing.assert_allclose(f["external.payload_kg"][5:], 0.1 * ks[5:])
    cam = f["internal.prediction_error.camera.v"]
    assert cam[:7].isna().all() and np.array_equal(cam[7:], ks[7:] + 0.5)


@pytest.mark.parametrize(
    ("value", "message"),
    [
        (None, "external.x: value is None"),
        ("near", "external.x: values of type str"),
        (np.zeros((2, 2, 2)), "3 dimensions"),
        (np.array(["a"]), "dtype"),
    ],
)
def test_bad_values_raise_one_line(tmp_path: Path, value: object, message: str) -> None:
    w = RunWriter(tmp_path / "r", {})
    w.begin_episode(0)
    with pytest.raises(ValueError, match=message) as info:
        w.record(0, 0.0, external={"x": value}, sensory={}, active={})
    assert "\n" not in str(info.value)


def test_shape_change_mid_episode_raises(tmp_path: Path) -> None:
    w = RunWriter(tmp_path / "r", {})
    w.begin_episode(0)
    w.record(0, 0.0, external={"q_rad": np.zeros(2)}, sensory={}, active={})
    with pytest.raises(ValueError, match=r"external.q_rad: shape \(1,\) at row 1"):
        w.record(1, 0.1, external={"q_rad": np.zeros(1)}, sensory={}, active={})
    with pytest.raises(ValueError, match="shape"):
        w.record(1, 0.1, external={"q_rad": 1.0}, sensory={}, active={})


def test_writer_protocol_errors(tmp_path: Path) -> None:
    w = RunWriter(tmp_path / "r", {})
    with pytest.raises(ValueError, match="no open episode"):
        w.record(0, 0.0, external={}, sensory={}, active={})
    with pytest.raises(ValueError, match="no open episode"):
        w.end_episode()
    with pytest.raises(ValueError, match="episode"):
        w.begin_episode(-1)
    w.begin_episode(0)
    with pytest.raises(ValueError, match="still open"):
        w.begin_episode(1)
    w.record(0, 0.0, external={"a": 1.0}, sensory={}, active={})
    w.end_episode()
    with pytest.raises(ValueError, match="already written"):
        w.begin_episode(0)
    with pytest.raises(ValueError, match="not JSON"):
        RunWriter(tmp_path / "other", {"thing": object()})


def test_non_empty_folder_needs_overwrite(tmp_path: Path) -> None:
    write_demo_run(tmp_path / "run", episodes=3, steps=5)
    with pytest.raises(ConfigError, match="not empty.*overwrite=True") as info:
        RunWriter(tmp_path / "run", {})
    assert "\n" not in str(info.value)
    write_demo_run(tmp_path / "run", episodes=1, steps=5, overwrite=True)
    assert sorted(set(read_run(tmp_path / "run").episode)) == [0]


def test_exception_inside_context_discards_the_open_episode(tmp_path: Path) -> None:
    with pytest.raises(RuntimeError):
        with RunWriter(tmp_path / "r", {}) as w:
            w.begin_episode(0)
            w.record(0, 0.0, external={"a": 1.0}, sensory={}, active={})
            w.end_episode()
            w.begin_episode(1)
            w.record(0, 0.0, external={"a": 1.0}, sensory={}, active={})
            raise RuntimeError("sim crashed")
    assert sorted(p.name for p in (tmp_path / "r" / "episodes").iterdir()) == [
        "episode-00000.parquet"
    ]


# --------------------------------------------------------------------------- crash safety
_CHILD = textwrap.dedent(
    """
    import os, sys, time
    import numpy as np
    import blanket.logs.writer as writer_module
    from blanket.logs import RunWriter

    mode = sys.argv[2]
    w = RunWriter(sys.argv[1], {"scenario": "kill-test", "joint_names": ["shoulder", "elbow"]})
    real_replace = writer_module.os.replace

    def stuck_replace(src, dst):  # episode 2's temporary is written, not renamed
        if ".episode-00002.parquet." in str(src):
            print("READY", flush=True)
            time.sleep(120)
        real_replace(src, dst)

    if mode == "writing":
        writer_module.os.replace = stuck_replace
    for ep in range(3):
        w.begin_episode(ep)
        for k in range(200):
            w.record(k, k / 240, external={"joint_angle_rad": np.array([k, ep], float)},
                     sensory={"tip_pixel_px": np.array([1.0, 2.0])},
                     active={"joint_velocity_rad_s": np.zeros(2)})
            if ep == 2 and k == 100 and mode == "recording":
                print("READY", flush=True)
                time.sleep(120)
        w.end_episode()
    print("READY", flush=True)  # ended: killed right after end_episode(2) returned
    time.sleep(120)
    """
)


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


def _refuse_writes(monkeypatch: pytest.MonkeyPatch) -> None:
    """Make Python-level file changes raise, as in a read-only folder (also for root, whom
    file modes do not stop)."""
    import builtins

    def refuse(*args, **kwargs):
        raise PermissionError(30, "Read-only file system")

    real_open = builtins.open

    def read_only_open(file, mode="r", *args, **kwargs):
        if any(c in mode for c in "wax+"):
            refuse()
        return real_open(file, mode, *args, **kwargs)

    for name in ("replace", "rename", "unlink", "remove", "rmdir", "mkdir", "truncate"):
        monkeypatch.setattr(os, name, refuse)
    monkeypatch.setattr(builtins, "open", read_only_open)
    for name in ("unlink", "write_bytes", "write_text", "touch", "mkdir"):
        monkeypatch.setattr(Path, name, refuse)
    monkeypatch.setattr(pq, "write_table", refuse)


@pytest.mark.parametrize("mode", ["recording", "writing", "ended"])
def test_sigkill_keeps_every_ended_episode(tmp_path: Path, mode: str) -> None:
    """recording: killed while episode 2 records; writing: killed with episode 2's Parquet
    file complete in its hidden temporary, not renamed (end_episode had not returned);
    ended: killed right after end_episode(2) returned. Every ended episode is a complete
    visible file, nothing else is visible, and repair removes the hidden temporary."""
    script = tmp_path / "child.py"
    script.write_text(_CHILD)
    run_dir = tmp_path / "run"
    proc = subprocess.Popen(
        [sys.executable, str(script), str(run_dir), mode],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        words = proc.stdout.readline().split()
        assert words and words[0] == "READY", proc.stderr.read()
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == -signal.SIGKILL
    episodes = run_dir / "episodes"
    ended = 3 if mode == "ended" else 2
    visible = sorted(p.name for p in episodes.iterdir() if not p.name.startswith("."))
    assert visible == [f"episode-{ep:05d}.parquet" for ep in range(ended)]
    hidden = sorted(p.name for p in episodes.iterdir() if p.name.startswith("."))
    if mode == "writing":  # the unended episode's complete temporary, never read
        assert len(hidden) == 1 and hidden[0].startswith(f".episode-00002.parquet.{proc.pid}-")
    else:
        assert hidden == []
    before = _snapshot(run_dir)
    frame = read_run(run_dir)
    assert _snapshot(run_dir) == before  # the reader changed nothing
    assert sorted(set(frame.episode)) == list(range(ended)) and len(frame) == 200 * ended
    np.testing.assert_array_equal(
        frame["external.joint_angle_rad.elbow"], np.repeat(np.arange(ended, dtype=float), 200)
    )
    np.testing.assert_array_equal(frame["step"], np.tile(np.arange(200), ended))
    assert ds.dataset(episodes, format="parquet").count_rows() == 200 * ended
    assert open_dataset(run_dir).count_rows() == 200 * ended
    report = repair_run(run_dir)
    assert [p.name for p in report.temporaries_removed] == hidden and not report.problems
    assert sorted(p.name for p in episodes.iterdir()) == visible
    assert repair_run(run_dir).lines() == ["nothing to repair"]  # idempotent


def test_writer_fsyncs_per_episode_only_when_durable(tmp_path: Path, monkeypatch) -> None:
    """durable=True: each episode file is fsynced before end_episode returns; otherwise every
    file once, at close."""
    import blanket.logs.writer as writer_module

    for durable in (False, True):
        synced: list[str] = []
        real = writer_module._fsync_file
        monkeypatch.setattr(
            writer_module,
            "_fsync_file",
            lambda p, real=real, synced=synced: (synced.append(p.name), real(p)),
        )
        w = RunWriter(tmp_path / f"r{durable}", {"joint_names": JOINTS}, durable=durable)
        for ep in range(3):
            w.begin_episode(ep)
            w.record(0, 0.0, external={"a_m": 1.0}, sensory={}, active={})
            w.end_episode()
            assert len([n for n in synced if "episode-" in n]) == (ep + 1 if durable else 0)
        w.close()
        files = [f"episode-{ep:05d}.parquet" for ep in range(3)]
        assert sorted(n for n in synced if n.startswith("episode-")) == files
        assert "run.json" in synced
        monkeypatch.undo()


# --------------------------------------------------------------------------- repair
def _legacy_journal(table: pa.Table, journal: Path, compression: bytes = b"snappy") -> None:
    """A journal as earlier blanket writers left them: the episode's Arrow table as an Arrow
    IPC file, the Parquet compression in its metadata (the format is Arrow's own)."""
    with pa.ipc.new_file(
        str(journal), table.schema, metadata={b"blanket.compression": compression}
    ) as out:
        out.write_table(table)


def _damage(path: Path, how: str) -> None:
    data = path.read_bytes()
    if how == "missing":
        path.unlink()
    elif how == "zero-byte":
        path.write_bytes(b"")
    elif how == "truncated":
        path.write_bytes(data[: len(data) * 2 // 3])
    elif how == "overwritten":
        mid = len(data) // 3
        path.write_bytes(data[:mid] + bytes(64) + data[mid + 64 :])


@pytest.mark.parametrize(
    "episode_file", ["missing", "zero-byte", "truncated", "overwritten", "intact"]
)
def test_repair_finishes_a_journal_only_through_a_verified_file(
    tmp_path: Path, episode_file: str, capsys
) -> None:
    """Every pairing of an intact journal with its episode file: readers change nothing and
    report the episode; repair writes the file when needed, removes the journal only once a
    file that reads back equal is in place, and a second repair does nothing."""
    run = tmp_path / "run"
    write_demo_run(run, episodes=2, steps=40)
    final = run / "episodes" / "episode-00001.parquet"
    intact_bytes = final.read_bytes()
    table = pq.read_table(final)
    journal = run / "episodes" / ".episode-00001.journal.arrow"
    _legacy_journal(table, journal)
    _damage(final, episode_file)
    before = _snapshot(run)
    if episode_file == "intact":
        assert len(read_run(run)) == 80
    else:
        with pytest.raises(LogError, match="episode-00001") as info:
            read_run(run)
        assert "\n" not in str(info.value)
        frame, problems = read_run(run, on_error="skip")
        assert sorted(set(frame.episode)) == [0] and len(problems) == 1
        assert "episode-00001" in str(problems[0])
    assert _snapshot(run) == before  # readers never change the folder
    assert main_cli(["logs", "repair", str(run)]) == 0
    out = capsys.readouterr().out
    assert f"removed {journal}" in out
    assert (f"wrote {final} from its journal" in out) == (episode_file != "intact")
    assert not journal.exists()
    assert final.read_bytes() == intact_bytes  # the same bytes the writer wrote
    assert len(read_run(run)) == 80
    after = _snapshot(run)
    assert repair_run(run).lines() == ["nothing to repair"] and _snapshot(run) == after


def test_repair_keeps_the_journal_when_the_new_file_does_not_verify(
    tmp_path: Path, monkeypatch
) -> None:
    import blanket.logs.repair as repair_module

    run = tmp_path / "run"
    write_demo_run(run, episodes=1, steps=20)
    final = run / "episodes" / "episode-00000.parquet"
    journal = final.with_name(".episode-00000.journal.arrow")
    _legacy_journal(pq.read_table(final), journal)
    final.write_bytes(b"")

    def bad_write(table, path, compression="snappy", durable=False):  # a disk that lies
        path.write_bytes(b"PAR1" + bytes(100) + b"PAR1")

    monkeypatch.setattr(repair_module, "write_episode_file", bad_write)
    report = repair_run(run)
    assert journal.exists() and not report.journals_removed
    assert any("did not verify" in p for p in report.problems)
    monkeypatch.undo()
    assert repair_run(run).journals_removed == [journal] and len(read_run(run)) == 20


def test_repair_reports_what_it_cannot_fix_and_changes_nothing_then(tmp_path: Path) -> None:
    run = tmp_path / "run"
    write_demo_run(run, episodes=2, steps=10)
    episodes = run / "episodes"
    (episodes / ".episode-00002.journal.arrow").write_bytes(b"not arrow")
    _damage(episodes / "episode-00001.parquet", "truncated")
    live = episodes / f".episode-00003.parquet.{os.getpid()}-1.tmp"  # a live writer's
    live.write_bytes(b"PAR1")
    before = _snapshot(run)
    report = repair_run(run)
    assert len(report.problems) == 2 and not report.written and not report.temporaries_removed
    assert "unreadable journal, kept" in report.problems[0]
    assert "episode-00001.parquet" in report.problems[1] and "left as it is" in report.problems[1]
    assert _snapshot(run) == before
    assert main_cli(["logs", "repair", str(run)]) == 1


def test_a_read_only_run_folder_reads(tmp_path: Path, monkeypatch) -> None:
    run = tmp_path / "run"
    write_demo_run(run, episodes=2, steps=10)
    journal = run / "episodes" / ".episode-00002.journal.arrow"
    _legacy_journal(pq.read_table(run / "episodes" / "episode-00001.parquet"), journal)
    (run / "episodes" / ".episode-00003.parquet.999999999-1.tmp").write_bytes(b"PAR1")
    before = _snapshot(run)
    with monkeypatch.context() as patch:
        _refuse_writes(patch)
        frame, problems = read_run(run, on_error="skip")
        assert len(frame) == 20 and "logs repair" in str(problems[0])
        assert open_dataset(run / "episodes" / "episode-00000.parquet").count_rows() == 10
        table, problems = summarize_run(run, on_error="skip")
        assert list(table.index) == [0, 1] and len(problems) == 1
        assert read_metadata(run)["scenario"] == "tray-cell-b3"
        with pytest.raises(LogError, match="cannot be finished here.*writable"):
            repair_run(run)
    assert _snapshot(run) == before


# --------------------------------------------------------------------------- errors
def _one_line_log_error(path: Path, match: str) -> None:
    with pytest.raises(LogError, match=match) as info:
        read_run(path)
    assert isinstance(info.value, ValueError)
    assert "\n" not in str(info.value)


def test_truncated_file_is_refused(tmp_path: Path) -> None:
    write_demo_run(tmp_path / "run", episodes=2, steps=30)
    path = tmp_path / "run" / "episodes" / "episode-00001.parquet"
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    _one_line_log_error(tmp_path / "run", "episode-00001.parquet: not a readable Parquet file")
    # the intact episode still reads on its own
    assert len(read_run(tmp_path / "run" / "episodes" / "episode-00000.parquet")) == 30


def test_corrupt_footer_is_refused(tmp_path: Path) -> None:
    write_demo_run(tmp_path / "run", episodes=1, steps=30)
    path = tmp_path / "run" / "episodes" / "episode-00000.parquet"
    data = bytearray(path.read_bytes())
    data[-40:-8] = b"\x07" * 32  # footer metadata garbled, magic bytes intact
    path.write_bytes(bytes(data))
    _one_line_log_error(tmp_path / "run", "episode-00000.parquet: not a readable Parquet file")


def test_foreign_parquet_and_other_files_are_refused(tmp_path: Path) -> None:
    folder = tmp_path / "foreign"
    folder.mkdir()
    pd.DataFrame({"a": [1, 2]}).to_parquet(folder / "data.parquet")
    _one_line_log_error(folder, "not a blanket log")
    text = tmp_path / "notes.csv"
    text.write_text("t,q\n0,1\n")
    _one_line_log_error(text, "not a readable Parquet file")


def test_newer_schema_is_refused(tmp_path: Path) -> None:
    folder = tmp_path / "future" / "episodes"
    folder.mkdir(parents=True)
    table = pa.table({"episode": [0], "step": [0], "t": [0.0]}).replace_schema_metadata(
        {b"blanket.schema_version": b"2.1", b"blanket.run": b"{}"}
    )
    pq.write_table(table, folder / "episode-00000.parquet")
    _one_line_log_error(
        tmp_path / "future",
        f"written by a newer blanket schema 2.1; this reader knows {SCHEMA_VERSION}",
    )


def test_empty_or_missing_folder_is_refused(tmp_path: Path) -> None:
    (tmp_path / "empty").mkdir()
    _one_line_log_error(tmp_path / "empty", "no episode files")
    _one_line_log_error(tmp_path / "missing", "no such file or folder")
    with pytest.raises(LogError):
        open_dataset(tmp_path / "empty")


def test_dot_files_are_never_read(tmp_path: Path) -> None:
    write_demo_run(tmp_path / "run", episodes=1, steps=5)
    (tmp_path / "run" / "episodes" / ".episode-00001.parquet.99.tmp").write_bytes(b"PAR1 partial")
    (tmp_path / "run" / "episodes" / ".episode-00002.parquet").write_bytes(b"garbage")
    assert len(read_run(tmp_path / "run")) == 5
    assert ds.dataset(tmp_path / "run" / "episodes", format="parquet").count_rows() == 5
    with pytest.raises(LogError, match="hidden"):
        read_run(tmp_path / "run" / "episodes" / ".episode-00002.parquet")


# --------------------------------------------------------------------------- damaged files
def _damaged_run_reads_the_rest(run: Path, damaged: Path, intact: pd.DataFrame) -> str:
    """``damaged`` is refused with one line naming it by every read path; the other
    episodes still read with on_error="skip". Returns the message."""
    with pytest.raises(LogError) as info:
        read_run(run)
    message = str(info.value)
    assert damaged.name in message and "\n" not in message
    frame, problems = read_run(run, on_error="skip")
    pd.testing.assert_frame_equal(frame, intact)
    assert [damaged.name in str(p) for p in problems] == [True]
    with pytest.raises(LogError, match=damaged.name):  # a file is checked whole
        read_run(run, columns=["external.distance_m"])
    # pyarrow.dataset through open_dataset verifies the page checksums too
    with pytest.raises((LogError, pa.ArrowException, OSError)):
        open_dataset(run).to_table()
    return message


def test_random_overwrites_truncations_and_foreign_files_are_all_detected(
    tmp_path: Path, capsys
) -> None:
    """A seeded sweep of 50 random 64-byte in-place overwrites of a finished episode file,
    then truncations, a zero-byte file and foreign files in its place: every one is refused
    (page checksums, the footer digest, the Parquet footer itself) and the intact episode of
    the same run still reads, is inspected and plots."""
    run = tmp_path / "run"
    write_demo_run(run, episodes=2, steps=60)
    damaged = run / "episodes" / "episode-00001.parquet"
    good = damaged.read_bytes()
    intact = read_run(run / "episodes" / "episode-00000.parquet")
    rng = np.random.default_rng(2031)
    for offset in rng.integers(0, len(good) - 64, 50):
        data = bytearray(good)
        data[offset : offset + 64] = rng.integers(0, 256, 64, dtype=np.uint8).tobytes()
        assert data != good
        damaged.write_bytes(bytes(data))
        _damaged_run_reads_the_rest(run, damaged, intact)
    for keep in (0, 4, 100, len(good) // 2, len(good) - 9, len(good) - 1):
        damaged.write_bytes(good[:keep])
        _damaged_run_reads_the_rest(run, damaged, intact)
    foreign = tmp_path / "foreign.parquet"
    pd.DataFrame({"episode": [1], "step": [0], "t": [0.0]}).to_parquet(foreign)
    for data, reason in (
        (foreign.read_bytes(), "not a blanket log"),
        (b"t,q\n0,1\n", "not a readable Parquet file"),
    ):
        damaged.write_bytes(data)
        assert reason in _damaged_run_reads_the_rest(run, damaged, intact)
    # inspect and plot skip the damaged episode (one stderr line), or --strict refuses it
    damaged.write_bytes(good[: len(good) // 2])
    assert main_cli(["inspect", str(run)]) == 0
    captured = capsys.readouterr()
    assert "episode-00001.parquet" in captured.err and "skipped" in captured.err
    assert "1 of 1 episodes" in captured.out  # the intact one alone
    assert main_cli(["inspect", str(run), "--strict"]) == 2
    assert "episode-00001.parquet" in capsys.readouterr().err
    assert main_cli(["plot", str(run), "--out", str(tmp_path / "fig"), "--episode", "0"]) == 0
    assert main_cli(["plot", str(run), "--episode", "1"]) == 2
    assert "episode-00001.parquet" in capsys.readouterr().err
    assert main_cli(["plot", str(run), "--out", str(tmp_path / "f"), "--strict"]) == 2
    pngs = sorted(p.name for p in (tmp_path / "fig").iterdir())
    assert pngs and all(n.startswith("episode-00000-") for n in pngs)


def test_page_checksums_and_digest_are_written(tmp_path: Path) -> None:
    """Every data page carries a CRC (checked here by pyarrow's own verifying reader, not
    ours) and the footer digest matches what the file holds."""
    from blanket.logs.schema import footer_digest

    write_demo_run(tmp_path / "run", episodes=1, steps=20)
    path = tmp_path / "run" / "episodes" / "episode-00000.parquet"
    handle = pq.ParquetFile(path, page_checksum_verification=True)
    meta = handle.schema_arrow.metadata
    assert (
        meta[b"blanket.digest"]
        == footer_digest(handle.schema_arrow, 20, handle.metadata.created_by).encode()
    )
    # flip one bit of the first data page's values: pyarrow's reader refuses the page
    data = bytearray(path.read_bytes())
    table = handle.read()
    column = handle.metadata.row_group(0).column(2)  # "t": plain float64 values
    start = column.data_page_offset + column.total_compressed_size - 8
    data[start] ^= 0x01
    path.write_bytes(bytes(data))
    with pytest.raises(OSError, match="(?i)crc|checksum"):
        pq.ParquetFile(path, page_checksum_verification=True).read(columns=["t"])
    assert table.num_rows == 20


def test_on_error_takes_raise_or_skip(tmp_path: Path) -> None:
    write_demo_run(tmp_path / "run", episodes=1, steps=5)
    with pytest.raises(ConfigError, match="on_error.*did you mean skip"):
        read_run(tmp_path / "run", on_error="skp")


def test_cli_bounds_what_it_echoes_and_catches_resource_errors(
    tmp_path: Path, capsys, monkeypatch
) -> None:
    """A 10 MB scenario name and an exhausted allocator each end in one bounded line, exit 2."""
    scenario = tmp_path / "huge.toml"
    scenario.write_text(f'env = "blanket/planar-2link-v0"\nname = "{"b" * 10_000_000}"\n')
    assert main_cli(["run", str(scenario), "--out", str(tmp_path / "out"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and len(err) < 400 and "10000000" in err
    write_demo_run(tmp_path / "run", episodes=1, steps=5)
    import blanket.logs.run_summary as run_summary

    for error in (MemoryError(), pa.ArrowCapacityError("array cannot contain more than 2^31")):

        def exhausted(*args, error=error, **kwargs):
            raise error

        monkeypatch.setattr(run_summary, "summarize_run", exhausted)
        assert main_cli(["inspect", str(tmp_path / "run")]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "out of resources" in err, err


# --------------------------------------------------------------------------- Recorder
class _CounterEnv(gym.Env):
    """A physics-free env: the observation counts steps, truth goes in info['external']."""

    observation_space = gym.spaces.Dict(
        {"count": gym.spaces.Box(0, 100, (1,)), "seen": gym.spaces.Discrete(2)}
    )
    action_space = gym.spaces.Box(-1.0, 1.0, (2,))

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.k = 0
        return self._obs(), self._info()

    def step(self, action):
        self.k += 1
        applied = np.clip(np.asarray(action) * 0.5, -1, 1)
        info = self._info()
        info["action_applied"] = applied
        return self._obs(), 0.0, False, self.k >= 4, info

    def _obs(self):
        return {"count": np.array([float(self.k)]), "seen": self.k % 2}

    def _info(self):
        return {
            "time_s": self.k * 0.5,
            "distance_m": 1.0 / (1 + self.k),
            "success": self.k >= 3,
            "external": {"position_m": np.array([self.k, 0.0, 0.0]), "label": "bench-3"},
        }


def test_recorder_aligns_sensation_action_and_truth(tmp_path: Path) -> None:
    env = Recorder(_CounterEnv(), tmp_path / "run", metadata={"scenario": "counter"})
    actions = {}
    with pytest.warns(UserWarning, match="external.label"):
        for ep in range(2):
            env.reset(seed=ep)
            done = False
            k = 0
            while not done:
                a = np.array([k + 1.0, -(k + 1.0)]) / 10
                actions[(ep, k)] = a
                *_, term, trunc, _ = env.step(a)
                done = term or trunc
                k += 1
    env.close()
    frame = read_run(tmp_path / "run")
    assert sorted(set(frame.episode)) == [0, 1]
    ep0 = frame[frame.episode == 0].reset_index(drop=True)
    assert len(ep0) == 5  # 4 actions + the final state
    np.testing.assert_array_equal(ep0["sensory.count.c0"], [0, 1, 2, 3, 4])
    np.testing.assert_array_equal(ep0["external.position_m.x"], [0, 1, 2, 3, 4])
    np.testing.assert_allclose(ep0["t"], [0, 0.5, 1.0, 1.5, 2.0])
    # the runner's column names (one builder: blanket.logs.groups)
    np.testing.assert_allclose(ep0["active.action.c0"][:4], [0.1, 0.2, 0.3, 0.4])
    np.testing.assert_allclose(ep0["active.action_applied.c1"][:4], [-0.05, -0.1, -0.15, -0.2])
    assert np.isnan(ep0["active.action.c0"][4])
    assert list(ep0["external.success"]) == [False, False, False, True, True]
    assert not any(c.startswith("internal.") for c in frame.columns)
    meta = read_metadata(tmp_path / "run")
    assert meta["scenario"] == "counter" and meta["action_high"] == [1.0, 1.0]
    info = read_metadata(tmp_path / "run" / "episodes" / "episode-00001.parquet")["episode"]
    assert info["extra"] == {
        "seed": 1,
        "actions": 4,
        "terminated": False,
        "truncated": True,
        "success": True,
        "time_to_success_s": None,  # this env reports no time
    }
    table = summarize_run(tmp_path / "run")
    # no time in the env's report: inspect leaves it unknown rather than derive one
    assert table.loc[0, "success"] and np.isnan(table.loc[0, "time_to_success_s"])
    assert table.loc[0, "final_error_m"] == pytest.approx(0.2)


def test_recorder_on_the_planar_env_logs_consistent_truth(tmp_path: Path) -> None:
    env = Recorder(gym.make("blanket/planar-2link-v0"), tmp_path / "run")
    env.reset(seed=3)
    for _ in range(60):
        env.step(np.array([1.0, -0.5]))
    env.close()
    frame = read_run(tmp_path / "run")
    meta = read_metadata(tmp_path / "run")
    assert meta["joint_names"] == ["shoulder", "elbow"] and Path(meta["urdf_path"]).is_file()
    assert len(frame) == 61
    q = frame[["external.joint_angle_rad.shoulder", "external.joint_angle_rad.elbow"]].to_numpy()
    tip = frame[[f"external.tip_position_m.{c}" for c in "xyz"]].to_numpy()
    # Logged truth columns of one row agree with textbook planar forward kinematics.
    np.testing.assert_allclose(tip, np.array([planar_tip(r) for r in q]), atol=1e-6)
    dist = np.linalg.norm(
        tip - frame[[f"external.target_position_m.{c}" for c in "xyz"]].to_numpy(), axis=1
    )
    np.testing.assert_allclose(frame["external.distance_m"], dist, atol=1e-9)
    np.testing.assert_allclose(frame["active.action.shoulder"][:60], 1.0)
    assert {"sensory.tip_pixel_px.u", "sensory.tip_visible", "sensory.camera_fresh"} <= set(
        frame.columns
    )


# --------------------------------------------------------------------------- inspect and CLI
def test_summarize_run_against_direct_computation(tmp_path: Path) -> None:
    raw = write_demo_run(tmp_path / "run", episodes=2, steps=40)
    table = summarize_run(tmp_path / "run")
    assert list(table.index) == [0, 1]
    for ep, rows in raw.items():
        last = rows[-1]["external"]
        expected = np.linalg.norm(last["tip_position_m"] - last["target_position_m"])
        assert table.loc[ep, "final_error_m"] == pytest.approx(expected)
        assert bool(table.loc[ep, "success"])
        assert table.loc[ep, "time_to_success_s"] == pytest.approx(35 / 240.0)
        assert table.loc[ep, "mean_free_energy"] == pytest.approx(np.mean(np.arange(40.0)))
    text = inspect_text(tmp_path / "run")
    assert "tray-cell-b3" in text and "2 of 2 episodes reached the target" in text


def test_summary_without_distance_or_success_columns_uses_positions_and_tolerance(
    tmp_path: Path,
) -> None:
    # rows 0.05 s apart: the hold of blanket.success (0.25 s) is 5 steps
    with RunWriter(tmp_path / "r", {"tolerance_m": 0.05}) as w:
        for episode, leaves_at in ((0, None), (1, 12)):
            w.begin_episode(episode)
            for k in range(20):
                y = max(0.3 - 0.03 * k, 0.02)
                if leaves_at is not None and k >= leaves_at:
                    y = 0.2  # left the ball after 3 steps inside: never held
                w.record(
                    k,
                    0.05 * k,
                    external={
                        "tip_position_m": np.array([0.0, y, 0.0]),
                        "target_position_m": np.zeros(3),
                    },
                    sensory={},
                    active={},
                )
            w.end_episode()
    table = summarize_run(tmp_path / "r")
    assert table.loc[0, "final_error_m"] == pytest.approx(0.02)
    # inside from row 9 on (0.3 - 0.27 <= 0.05) and held: entered at 9 x 0.05 s
    assert bool(table.loc[0, "success"])
    assert table.loc[0, "time_to_success_s"] == pytest.approx(0.45)
    assert not bool(table.loc[1, "success"]) and np.isnan(table.loc[1, "time_to_success_s"])
    assert np.isnan(table.loc[0, "mean_free_energy"])


def test_cli_inspect_prints_and_refuses_bad_folders(tmp_path: Path, capsys) -> None:
    write_demo_run(tmp_path / "run", episodes=2, steps=10)
    parser = argparse.ArgumentParser(prog="blanket")
    sub = parser.add_subparsers(dest="command", required=True)
    add_plot_parser(sub)
    add_inspect_parser(sub)
    args = parser.parse_args(["inspect", str(tmp_path / "run"), "--csv", str(tmp_path / "s.csv")])
    assert args.handler(args) == 0
    out = capsys.readouterr().out
    assert "episode" in out and "final_error_cm" in out
    assert pd.read_csv(tmp_path / "s.csv")["steps"].tolist() == [10, 10]
    (tmp_path / "empty").mkdir()
    with pytest.raises(ValueError, match="no episode files"):
        run_inspect(parser.parse_args(["inspect", str(tmp_path / "empty")]))
    with pytest.raises(SystemExit):
        parser.parse_args(["plot", str(tmp_path / "run"), "--episode", "-2"])


def test_wall_clock_metadata_stays_out_of_episode_files(tmp_path: Path) -> None:
    """One wall-clock field in run.json (the caller's start time, under either name), the
    per-episode timings in timings.jsonl; the episode files are byte-identical."""
    paths = []
    for name, stamp, seen in (("a", "2031-04-01T08:00:00", 3.5), ("b", "2031-04-02T09:30", 9.0)):
        meta = {"scenario": "tray-a1", "start_time": stamp, "versions": {"pybullet": "unknown"}}
        with RunWriter(tmp_path / name, meta) as w:
            w.begin_episode(0)
            w.record(0, 0.0, external={"distance_m": 0.2}, sensory={}, active={})
            paths.append(
                w.end_episode({"success": True, "agent_step_us": seen, "sim_step_us": 1.0})
            )
        run = json.loads((tmp_path / name / "run.json").read_text())
        assert run["started_at"] == stamp
        assert not set(run) & {"start_time", "end_time", "finished_at", "wall_time_s"}
        assert run["versions"]["pybullet"] not in (None, "unknown")  # the installed version
        lines = (tmp_path / name / "timings.jsonl").read_text().splitlines()
        assert [json.loads(x) for x in lines] == [
            {"episode": 0, "agent_step_us": seen, "sim_step_us": 1.0}
        ]
    assert paths[0].read_bytes() == paths[1].read_bytes()
    info = read_metadata(paths[0])["episode"]
    assert info["extra"] == {"success": True}


def test_arrays_are_copied_so_callers_may_reuse_them(tmp_path: Path) -> None:
    belief = np.zeros((2, 2))  # an agent that updates its belief in place
    with RunWriter(tmp_path / "r", {"joint_names": JOINTS}) as w:
        w.begin_episode(0)
        for k in range(5):
            belief += 1.0
            w.record(k, k * 0.1, external={}, sensory={}, active={}, internal={"belief": belief})
        w.end_episode()
    frame = read_run(tmp_path / "r")
    np.testing.assert_array_equal(frame["internal.belief.order1.elbow"], [1, 2, 3, 4, 5])


def test_arrays_of_any_dtype_or_memory_order_keep_their_values(tmp_path: Path) -> None:
    """The fast row copy joins raw bytes; rows whose arrays are not native C-ordered float64
    must still store the numbers, not reinterpreted bits."""
    base = np.array([[1.5, -2.0], [3.25, 4.0]])
    rows = [
        base,  # float64, C order: the layout
        base.astype(np.float32),  # 4-byte floats: half the bytes
        np.array([[1, 2], [3, 4]], dtype=np.int64),  # 8 bytes each, not float bits
        np.asfortranarray(base),  # other memory order
        base.astype(">f8"),  # big-endian doubles
        np.arange(8.0).reshape(2, 4)[:, ::2],  # a strided view
        np.array([[True, False], [False, True]]),
        base * 2,  # float64 again
    ]
    with RunWriter(tmp_path / "r", {"joint_names": JOINTS}) as w:
        w.begin_episode(0)
        for k, value in enumerate(rows):
            w.record(
                k,
                k * 0.1,
                external={"joint_angle_rad": value[0].copy()},
                sensory={"tip_pixel_px": np.array([float(k), 0.0])},
                active={},
                internal={"belief": value},
            )
        w.end_episode()
    frame = read_run(tmp_path / "r")
    for k, value in enumerate(rows):
        expected = np.asarray(value, dtype=float)
        got = frame.loc[k, [f"internal.belief.order{i}.{j}" for i in (0, 1) for j in JOINTS]]
        np.testing.assert_array_equal(got.to_numpy(float), expected.reshape(-1))
        np.testing.assert_array_equal(
            frame.loc[k, [f"external.joint_angle_rad.{j}" for j in JOINTS]].to_numpy(float),
            expected[0],
        )
    np.testing.assert_array_equal(frame["sensory.tip_pixel_px.u"], np.arange(len(rows)))


def test_flag_and_integer_arrays_keep_their_values_and_types_on_every_row(tmp_path: Path) -> None:
    # rows after the first take the writer's fast path, which must store flag and integer
    # arrays as the first (checked) row does: same values, typed back as bool / int64
    rng = np.random.default_rng(3)
    flags = rng.random((50, 4)) < 0.5
    counts = rng.integers(-5, 5, size=(50, 3))
    with RunWriter(tmp_path / "r", {}) as w:
        w.begin_episode(0)
        for k in range(50):
            w.record(
                k,
                k / 10,
                external={"x": np.full(2, float(k))},
                sensory={},
                active={},
                internal={"flags": {"custom": flags[k].copy()}, "count": counts[k].copy()},
            )
        path = w.end_episode()
    table = pq.read_table(path)  # reference: pyarrow's own Parquet reader
    got_flags = np.column_stack([table[f"internal.flags.custom.c{i}"].to_numpy() for i in range(4)])
    got_counts = np.column_stack([table[f"internal.count.c{i}"].to_numpy() for i in range(3)])
    assert got_flags.dtype == bool and np.array_equal(got_flags, flags)
    assert got_counts.dtype == np.int64 and np.array_equal(got_counts, counts)


@pytest.mark.parametrize(
    ("value", "message"),
    [
        (None, "external.x: value is None"),
        ("1.5", "external.x: values of type str"),
        (np.zeros(2), r"external.x: shape \(2,\) at row 1"),
    ],
)
def test_a_bad_scalar_after_the_first_row_raises_one_line(
    tmp_path: Path, value: object, message: str
) -> None:
    # rows after the first are stored by the writer's fast path (one struct pack of the
    # scalars); it must refuse what the checked first row refuses, not store a number
    # (common practice, no source)
    w = RunWriter(tmp_path / "r", {})
    w.begin_episode(0)
    w.record(0, 0.0, external={"x": 1.0, "q_rad": np.zeros(2)}, sensory={}, active={})
    with pytest.raises(ValueError, match=message) as info:
        w.record(1, 0.1, external={"x": value, "q_rad": np.zeros(2)}, sensory={}, active={})
    assert "\n" not in str(info.value)
    with pytest.raises(ValueError, match="record: step must be an int, got str"):
        w.record("2", 0.2, external={"x": 1.0, "q_rad": np.zeros(2)}, sensory={}, active={})
    w.record(1, 0.1, external={"x": 2.0, "q_rad": np.ones(2)}, sensory={}, active={})
    w.end_episode()
    table = pq.read_table(w.episodes_dir / "episode-00000.parquet")  # pyarrow's own reader
    assert table["external.x"].to_pylist() == [1.0, 2.0]
    assert table["step"].to_pylist() == [0, 1]


def test_keys_with_quotes_and_backslashes_keep_their_values(tmp_path: Path) -> None:
    # the fast path reads a row through a function generated from the keys; keys that
    # look like code must stay plain keys (common practice, no source)
    keys = ["it's", 'say "hi"', "back\\slash", "two\nlines", "x']); import os; ('"]
    with RunWriter(tmp_path / "r", {}) as w:
        w.begin_episode(0)
        for k in range(4):
            values = {key: float(10 * i + k) for i, key in enumerate(keys)}
            w.record(k, k * 0.1, external=values, sensory={"n": {keys[0]: k}}, active={})
        path = w.end_episode()
    table = pq.read_table(path)  # pyarrow's own reader
    for i, key in enumerate(keys):
        assert table[f"external.{key}"].to_pylist() == [10.0 * i + k for k in range(4)]
    assert table[f"sensory.n.{keys[0]}"].to_pylist() == [0, 1, 2, 3]
