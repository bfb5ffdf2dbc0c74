"""`blanket demo`: what it writes, what it says next, and its one-line errors."""

from __future__ import annotations

from blanket.cli import main


def test_demo_writes_its_figure_and_names_the_next_commands(tmp_path, capsys):
    out = tmp_path / "run"
    assert main(["demo", "--episodes", "1", "--out", str(out), "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert (out / "figures" / "reach.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert f"blanket inspect {out}" in printed and f"blanket plot {out}" in printed


def test_control_is_refused_for_the_bases(capsys):
    assert main(["demo", "--robot", "rover", "--control", "torque"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--control" in err and "Traceback" not in err
    assert main(["demo", "--control", "x" * 500]) == 2
    assert len(capsys.readouterr().err) < 200  # a long value is cut
