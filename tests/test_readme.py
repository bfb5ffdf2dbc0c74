"""Every Python snippet of the README runs as written, in order, in one empty folder."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

README = Path(__file__).resolve().parents[1] / "README.md"
SNIPPETS = re.findall(r"```python\n(.*?)```", README.read_text(), re.S)


def test_readme_has_snippets():
    assert len(SNIPPETS) >= 5


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return tmp_path_factory.mktemp("readme")


@pytest.mark.parametrize("index", range(len(SNIPPETS)))
def test_readme_snippet_runs(index, folder):
    # in order in one folder: a later snippet may read what an earlier one wrote
    path = folder / f"snippet_{index}.py"
    path.write_text(SNIPPETS[index])
    env = {**os.environ, "MPLBACKEND": "Agg"}
    done = subprocess.run(
        [sys.executable, path.name],
        cwd=folder,
        capture_output=True,
        text=True,
        env=env,
        timeout=300,
    )
    assert done.returncode == 0, f"snippet {index}:\n{SNIPPETS[index]}\n{done.stderr[-2000:]}"


def test_a_logging_loop_that_fails_before_its_first_episode_can_run_again(tmp_path):
    # A loop that logged the agent's full diagnostics (a text field) failed at its first row;
    # its folder then held only run.json and was refused as "not empty" on the rerun.
    import gymnasium

    import blanket  # noqa: F401 - registers the env ids
    from blanket.agent import ArmAgent
    from blanket.logs import RunWriter, read_run

    env = gymnasium.make("blanket/planar-2link-v0", episode_s=0.05)
    agent = ArmAgent.from_env(env)
    obs, info = env.reset(seed=0)
    action = agent.act(obs)
    writer = RunWriter(tmp_path / "run", {"seed": 0})
    writer.begin_episode(0)
    with pytest.raises(ValueError, match="safe_stop_reason.*diagnostics\\(copy=False\\)"):
        writer.record(
            0,
            0.0,
            external={},
            sensory=obs,
            active={"action": action},
            internal=agent.diagnostics(),
        )
    writer.close()
    with RunWriter(tmp_path / "run", {"seed": 0}) as again:  # no overwrite needed
        again.begin_episode(0)
        internal = agent.diagnostics(copy=False)
        again.record(0, 0.0, external={}, sensory=obs, active={"action": action}, internal=internal)
        again.end_episode()
    assert len(read_run(tmp_path / "run")) == 1
    with pytest.raises(ValueError, match="not empty"):  # now it holds an episode
        RunWriter(tmp_path / "run", {"seed": 0})
