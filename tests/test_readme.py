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
