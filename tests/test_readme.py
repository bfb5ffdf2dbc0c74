"""Every Python snippet of the README and of docs/*.md runs as written, each on its own in an
empty folder."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PAGES = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]
SNIPPETS = [
    (page.relative_to(ROOT).as_posix(), k, code)
    for page in PAGES
    for k, code in enumerate(re.findall(r"```python\n(.*?)```", page.read_text(), re.S))
]


def test_readme_has_an_example_per_use():
    readme = [code for page, _, code in SNIPPETS if page == "README.md"]
    uses = {
        "test a controller": "rollout(",
        "tune precisions": "run_sweep(",
        "record and analyse a run": "read_run(",
        "safety limits": "SafetyLimits(",
    }
    for use, call in uses.items():
        assert any(call in code for code in readme), use


@pytest.mark.parametrize(
    ("page", "index"), [(page, k) for page, k, _ in SNIPPETS], ids=lambda v: str(v)
)
def test_snippet_runs_on_its_own_in_an_empty_folder(page, index, tmp_path):
    code = next(c for p, k, c in SNIPPETS if p == page and k == index)
    path = tmp_path / "snippet.py"
    path.write_text(code)
    env = {**os.environ, "MPLBACKEND": "Agg"}
    done = subprocess.run(
        [sys.executable, path.name],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        env=env,
        timeout=300,
    )
    assert done.returncode == 0, f"{page} snippet {index}:\n{code}\n{done.stderr[-2000:]}"
    assert "Traceback" not in done.stderr


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
