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


def test_scenarios_lists_and_copies_a_runnable_scenario(tmp_path, capsys, monkeypatch):
    from blanket.scenario import builtin_scenarios

    assert main(["scenarios"]) == 0
    listed = capsys.readouterr().out
    assert all(name in listed for name in builtin_scenarios())
    monkeypatch.chdir(tmp_path)
    assert main(["scenarios", "copy", "potting-arm-3dof", "mine.toml"]) == 0
    assert "blanket run mine.toml" in capsys.readouterr().out
    assert (tmp_path / "potting_arm_3dof.urdf").is_file()
    # refused the second time (no silent overwrite), with a did-you-mean for a typo
    assert main(["scenarios", "copy", "potting-arm-3dof", "mine.toml"]) == 2
    assert main(["scenarios", "copy", "potting-arm"]) == 2
    assert "did you mean potting-arm-3dof" in capsys.readouterr().err
    # the copy runs as it is, from another folder too (its URDF is found beside it)
    (tmp_path / "sub").mkdir()
    monkeypatch.chdir(tmp_path / "sub")
    # (--out absolute: the log writer's helper process keeps the cwd it started in)
    args = ["run", "../mine.toml", "--episodes", "1", "--out", str(tmp_path / "r"), "--quiet"]
    assert main(args) == 0
    printed = capsys.readouterr().out
    assert "free energy, median (settled level)" in printed


def test_inspect_gives_cm_and_the_median_free_energy(tmp_path, capsys):
    import json

    import numpy as np

    from blanket.logs import read_run

    out = tmp_path / "run"
    assert main(["demo", "--robot", "iiwa", "--episodes", "1", "--out", str(out), "--quiet"]) == 0
    summary = json.loads((out / "summary.json").read_text())
    free_energy = read_run(out)["internal.free_energy"].to_numpy(float)
    # the median of the logged column; the mean is far above it (the first steps' transient)
    episode = summary["per_episode"][0]
    assert episode["median_free_energy"] == np.median(free_energy[np.isfinite(free_energy)])
    assert episode["mean_free_energy"] > episode["median_free_energy"] + 10
    capsys.readouterr()
    assert main(["inspect", str(out)]) == 0
    text = capsys.readouterr().out
    assert "final_error_cm" in text and "median_free_energy" in text
    assert "mean_free_energy" not in text
    cm = 100.0 * summary["final_error_m"]
    assert f"median final error {cm:.3g} cm" in text


def test_progress_bar_gives_no_eta_from_a_slow_first_step():
    # The first step of a first run loads (or compiles) the agent's kernel: seconds, while
    # later steps take microseconds. An ETA from that step read "9 hours" for a 1-minute run.
    import io
    import time

    import gymnasium as gym
    import numpy as np

    from blanket.rollout import Observer, ProgressBar, rollout

    class Line(gym.Env):
        metadata = {"control_hz": 10.0}
        observation_space = gym.spaces.Box(-1.0, 1.0, (1,))
        action_space = gym.spaces.Box(-1.0, 1.0, (1,))
        max_steps = 400

        def reset(self, *, seed=None, options=None):
            super().reset(seed=seed)
            self.k = 0
            return np.zeros(1), {}

        def step(self, action):
            self.k += 1
            return np.zeros(1), 0.0, False, self.k >= self.max_steps, {}

    class SlowFirst:
        def __init__(self):
            self.calls = 0

        def act(self, obs):
            self.calls += 1
            if self.calls == 1:
                time.sleep(1.0)
            return np.zeros(1)

    bar = ProgressBar("tray", file=io.StringIO())
    seen = {}

    class Look(Observer):
        def on_step(self, step):
            if step.step in (0, 60) and step.step not in seen:
                seen[step.step] = (str(bar.bar), bar.bar.format_dict)

    rollout(Line(), SlowFirst(), 2, observers=[Look(), bar])
    first_text, _ = seen[0]
    assert "<" not in first_text  # no ETA shown right after the slow step
    text, fmt = seen[60]
    assert "<" in text
    # remaining time from the steps after the first: far below the first step's 1 s per step
    remaining = (fmt["total"] - fmt["n"]) / (fmt["n"] / max(fmt["elapsed"], 1e-9))
    assert remaining < 0.1 * (fmt["total"] - fmt["n"])


def test_bench_quiet_still_names_the_policies_it_leaves_out(tmp_path, capsys, monkeypatch):
    # --quiet drops progress lines, not the notice that SAC and PPO did not run, and why
    from blanket.bench import rl, suite

    monkeypatch.setattr(rl, "sb3_available", lambda: False)
    ran = {}

    def run_benchmark(settings, out, progress=True, **engine_options):
        ran["policies"] = list(settings.policies)
        return {"records": [], "wall_s": 0.0}

    monkeypatch.setattr(suite, "run_benchmark", run_benchmark)
    args = ["bench", "--quick", "--quiet", "--out", str(tmp_path / "b")]
    assert main(args) == 0
    printed = capsys.readouterr().out
    assert "sac" not in ran["policies"] and "ppo" not in ran["policies"]
    assert "left out sac: stable-baselines3 is not installed" in printed
    assert "left out ppo: stable-baselines3 is not installed" in printed
