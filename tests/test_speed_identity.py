"""The env, sensors, safety and perturbation wrappers and the rollout loop behave bit for bit
as before the hot-path rewrite (issue 22), for the same seeds.

The reference fingerprints were written by the code before the rewrite (see
``tests/speed_identity_runs.py``); a rerun must reproduce every column byte for byte.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))

import speed_identity_runs as runs  # noqa: E402

REFERENCE = json.loads(runs.REFERENCE.read_text())


def test_reference_covers_every_run():
    assert sorted(REFERENCE) == sorted(runs.RUNS)


@pytest.mark.parametrize("name", sorted(runs.RUNS))
def test_seeded_run_is_bit_identical_to_the_reference(name):
    got = runs.fingerprint(name)
    expected = REFERENCE[name]
    assert sorted(got) == sorted(expected), "columns differ"
    changed = sorted(key for key in expected if got[key] != expected[key])
    assert not changed, f"{name}: columns changed: {changed}"
