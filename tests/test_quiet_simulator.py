"""pybullet's console noise is silenced at its cause (issue 22, item 5): no ``pybullet build
time`` line from its import and no ``argv[0]=`` line from its connect, on any command; other
output written while the import was quiet still comes through."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
NOISE = ("pybullet build time", "argv[0]=")


def _run(code: str, *args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(
        [str(ROOT / "src"), str(ROOT / "envs"), env.get("PYTHONPATH", "")]
    )
    env["MPLBACKEND"] = "Agg"
    return subprocess.run(
        [sys.executable, "-c", code, *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        env=env,
        timeout=600,
    )


def _assert_quiet(done: subprocess.CompletedProcess, expected: str) -> None:
    assert done.returncode == 0, done.stderr
    assert expected in done.stdout  # the command ran and reported
    for line in NOISE:
        assert line not in done.stdout and line not in done.stderr


def test_blanket_demo_prints_no_simulator_noise(tmp_path):
    done = _run(
        "import sys; from blanket.cli import main; sys.exit(main())",
        "demo",
        "--episodes",
        "1",
        "--no-log",
        "--quiet",
        "--out",
        str(tmp_path / "run"),
        cwd=tmp_path,
    )
    _assert_quiet(done, "reached")


def test_arm_and_base_worlds_connect_quietly(tmp_path):
    done = _run(
        "import gymnasium, blanket\n"
        "for env_id in ('blanket/arm-reach-v0', 'blanket/base-goto-v0'):\n"
        "    env = gymnasium.make(env_id)\n"
        "    env.reset(seed=0)\n"
        "    env.close()\n"
        "print('made both')\n",
        cwd=tmp_path,
    )
    _assert_quiet(done, "made both")


def test_quiet_fd_keeps_other_output(tmp_path):
    done = _run(
        "import os\n"
        "from blanket.sim.bullet import quiet_fd\n"
        "with quiet_fd(2):\n"
        "    os.write(2, b'pybullet build time: today\\n')\n"
        "    os.write(2, b'a real warning\\n')\n"
        "os.write(2, b'after\\n')\n",
        cwd=tmp_path,
    )
    assert done.returncode == 0, done.stderr
    assert done.stderr.splitlines() == ["a real warning", "after"]


def test_bench_on_a_process_pool_prints_no_simulator_noise(tmp_path):
    # the pool's fork server imports the simulator before any worker connects
    done = _run(
        "import sys; from blanket.cli import main; sys.exit(main())",
        "bench",
        "--policies",
        "classical",
        "--conditions",
        "nominal,payload-1.5kg",
        "--episodes",
        "1",
        "--episode-s",
        "0.3",
        "--workers",
        "2",
        "--out",
        str(tmp_path / "bench"),
        cwd=tmp_path,
    )
    _assert_quiet(done, "results:")
