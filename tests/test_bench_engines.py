"""``blanket bench`` on the sweep engines (issue 22, item 5): the same results.json in this
process, on a local process pool and on a local Ray instance, and a resume after a kill that
does not run finished cells again."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from blanket.bench.suite import CELLS, BenchSettings, run_benchmark, without_timing
from blanket.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]
GRID = {
    "policies": ["classical", "classical-torque"],
    "conditions": ["nominal", "payload-1.5kg", "camera-delay-2"],
    "episodes": 1,
    "episode_s": 0.5,
}


def _settings() -> BenchSettings:
    return BenchSettings.from_cli(**GRID)


def _reproducible(path: Path) -> str:
    """results.json without the fields measured on the clock."""
    return json.dumps(without_timing(json.loads(path.read_text())), sort_keys=True)


@pytest.fixture(scope="module")
def in_process(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("in-process")
    run_benchmark(_settings(), out, progress=False)
    return out


def test_local_pool_gives_the_in_process_results(in_process, tmp_path):
    run_benchmark(_settings(), tmp_path, progress=False, engine="local", workers=2)
    records = json.loads((tmp_path / "results.json").read_text())
    assert [(r["condition"], r["policy"]) for r in records] == [
        (c, p) for c in GRID["conditions"] for p in GRID["policies"]
    ]
    assert _reproducible(tmp_path / "results.json") == _reproducible(in_process / "results.json")


def test_resume_after_a_kill_runs_only_the_missing_cells(in_process, tmp_path):
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(
        [str(ROOT / "src"), str(ROOT / "envs"), env.get("PYTHONPATH", "")]
    )
    env["MPLBACKEND"] = "Agg"
    args = ["--policies", ",".join(GRID["policies"]), "--conditions"]
    args += [",".join(GRID["conditions"]), "--episodes", "1", "--episode-s", "0.5"]
    proc = subprocess.Popen(
        [sys.executable, "-c", "import sys; from blanket.cli import main; sys.exit(main())"]
        + ["bench", *args, "--out", str(tmp_path), "--quiet"],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    journal = tmp_path / CELLS
    deadline = time.monotonic() + 300
    try:
        while time.monotonic() < deadline and proc.poll() is None:
            if journal.is_file() and journal.read_text().count("\n") >= 1:
                break
            time.sleep(0.02)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    before = journal.read_text().splitlines()
    assert 1 <= len(before) < 6, "the kill should leave some cells unfinished"
    assert not (tmp_path / "results.json").exists()

    with pytest.raises(ConfigError, match="different benchmark"):
        other = BenchSettings.from_cli(**{**GRID, "episodes": 2})
        run_benchmark(other, tmp_path, progress=False, resume=True)
    run_benchmark(_settings(), tmp_path, progress=False, resume=True)
    after = journal.read_text().splitlines()
    assert after[: len(before)] == before  # finished cells kept as they were
    assert len(after) == 6  # and each missing cell ran once
    assert len({json.loads(line)["key"] for line in after}) == 6
    assert _reproducible(tmp_path / "results.json") == _reproducible(in_process / "results.json")


def test_cli_resume_needs_out_and_address_needs_ray(tmp_path, capsys):
    from blanket.cli import main

    assert main(["bench", "--resume", "--episodes", "1"]) == 2
    assert "--resume needs --out" in capsys.readouterr().err
    assert main(["bench", "--address", "auto", "--out", str(tmp_path)]) == 2
    assert "--engine ray" in capsys.readouterr().err


@pytest.mark.slow
def test_ray_local_instance_gives_the_in_process_results(in_process, tmp_path):
    pytest.importorskip("ray")  # the optional cluster extra
    run_benchmark(_settings(), tmp_path, progress=False, engine="ray", workers=2)
    assert _reproducible(tmp_path / "results.json") == _reproducible(in_process / "results.json")
