"""Figures and replay video of logged episodes.

Outside references: PNG and GIF files are decoded by imageio (Pillow); figure geometry is read
back from matplotlib's own artists; the believed-tip marker position is checked against the
textbook planar two-link forward kinematics x = l1 cos q1 + l2 cos(q1 + q2),
y = l1 sin q1 + l2 sin(q1 + q2) (Spong, Hutchinson & Vidyasagar, "Robot Modeling and Control",
2006, sec. 3.1) through pybullet's own forward kinematics.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import imageio.v3 as iio
import matplotlib.pyplot as plt
import numpy as np
import pytest

from blanket.logs import LogError, RunWriter
from blanket.logs.cli import add_plot_parser
from blanket.logs.plots import build_figures, load_episode, plot_run
from blanket.logs.reader import read_metadata
from blanket.logs.video import replay_video

JOINTS = ["shoulder", "elbow"]
URDF = (
    Path(__file__).resolve().parents[1] / "envs" / "blanket_envs" / "assets" / "planar_2link.urdf"
)


def planar_tip(q: np.ndarray) -> np.ndarray:
    """Planar two-link forward kinematics (Spong et al. 2006, sec. 3.1), l1 = 0.4, l2 = 0.3."""
    return np.array(
        [
            0.4 * np.cos(q[0]) + 0.3 * np.cos(q[0] + q[1]),
            0.4 * np.sin(q[0]) + 0.3 * np.sin(q[0] + q[1]),
            0.05,
        ]
    )


def write_reach_run(
    run_dir: Path, *, internal: bool = True, steps: int = 240, episodes: int = 1
) -> None:
    """A bench-arm reach toward tray cell C4 with a converging belief (invented numbers)."""
    meta = {
        "scenario": "tray-cell-c4",
        "seed": 11,
        "joint_names": JOINTS,
        "urdf_path": str(URDF),
        "end_effector": "tool_tip",
        "action_low": [-3.0, -2.0],
        "action_high": [3.0, 2.0],
        "tolerance_m": 0.01,
    }
    rng = np.random.default_rng(5)
    dt = 1 / 240
    with RunWriter(run_dir, meta) as w:
        for ep in range(episodes):
            w.begin_episode(ep, steps)
            q, q_goal = np.array([0.1, 0.4]), np.array([0.8, 1.2])
            target = planar_tip(q_goal)
            mu, sd = np.zeros((2, 2)), np.full((2, 2), 0.3)
            for k in range(steps):
                a = np.clip(5 * (q_goal - q), [-3, -2], [3, 2])
                tip = planar_tip(q)
                y = q + rng.normal(0, 0.01, 2)
                row = dict(
                    external={
                        "joint_angle_rad": q.copy(),
                        "joint_velocity_rad_s": a,
                        "tip_position_m": tip,
                        "target_position_m": target,
                        "distance_m": float(np.linalg.norm(tip - target)),
                        "success": bool(np.linalg.norm(tip - target) < 0.01),
                    },
                    sensory={"joint_angle_rad": y, "tip_pixel_px": 100 * tip[:2] + 160},
                    active={"joint_velocity_rad_s": a},
                )
                if internal:
                    row["internal"] = {
                        "belief": mu.copy(),
                        "belief_sd": sd.copy(),
                        "free_energy": float(50 * np.sum((y - mu[0]) ** 2)),
                        "prediction_error": {
                            "encoder": np.vstack([y - mu[0], a - mu[1]]),
                            "camera": rng.normal(0, 1, 2),
                        },
                    }
                w.record(k, k * dt, **row)
                mu = mu + dt * np.vstack([mu[1] + 25 * (y - mu[0]), 40 * (a - mu[1])])
                sd = 0.98 * sd + 0.001
                q = q + dt * a
            w.end_episode()


@pytest.fixture(scope="module")
def reach_run(tmp_path_factory) -> Path:
    run_dir = tmp_path_factory.mktemp("plots") / "run"
    write_reach_run(run_dir, episodes=2)
    return run_dir


def _visible_axes(fig) -> list:
    return [ax for ax in fig.axes if ax.get_visible()]


def test_figures_have_the_expected_panels(reach_run: Path) -> None:
    frame, episode = load_episode(reach_run, 1)
    figures = build_figures(frame, read_metadata(reach_run), episode)
    try:
        assert list(figures) == ["tip-path", "belief", "free-energy", "commands"]
        assert len(_visible_axes(figures["tip-path"])) == 3  # top, front, side views
        # 2 joints x (angle, velocity, angle error against the +-2 sigma band)
        assert len(_visible_axes(figures["belief"])) == 6
        assert len(_visible_axes(figures["free-energy"])) == 3  # free energy + 2 channels
        assert len(_visible_axes(figures["commands"])) == 2  # one per joint
        for fig in figures.values():
            assert "episode 1" in fig._suptitle.get_text()
            for ax in _visible_axes(fig):
                assert ax.get_xlabel() or ax is not _visible_axes(fig)[-1]
        belief_axes = _visible_axes(figures["belief"])
        assert belief_axes[0].get_ylabel() == "q (rad)"
        assert belief_axes[-1].get_xlabel() == "t (s)"
    finally:
        for fig in figures.values():
            plt.close(fig)


def test_belief_band_is_two_sigma_and_limits_come_from_metadata(reach_run: Path) -> None:
    frame, episode = load_episode(reach_run, 0)
    figures = build_figures(frame, read_metadata(reach_run), episode)
    try:
        ax = _visible_axes(figures["belief"])[0]  # shoulder angle
        band = ax.collections[0].get_paths()[0].vertices
        mu = frame["internal.belief.order0.shoulder"].to_numpy()
        sd = frame["internal.belief_sd.order0.shoulder"].to_numpy()
        assert band[:, 1].max() == pytest.approx((mu + 2 * sd).max())
        assert band[:, 1].min() == pytest.approx((mu - 2 * sd).min())
        # the error panel: the band is +-2 sd around zero and fills a visible share of the
        # panel's height after the first 0.25 s (it was a hairline beside the angles)
        error_ax = figures["belief"].axes[2]  # row 0 (shoulder), column 2 (angle error)
        band = error_ax.collections[0].get_paths()[0].vertices
        assert band[:, 1].max() == pytest.approx((2 * sd).max())
        low, high = error_ax.get_ylim()
        settled = frame["t"].to_numpy() >= frame["t"].iloc[0] + 0.25
        assert 4 * sd[settled].mean() > 0.1 * (high - low)
        elbow_cmd = _visible_axes(figures["commands"])[1]
        levels = sorted(
            line.get_ydata()[0] for line in elbow_cmd.get_lines() if len(set(line.get_ydata())) == 1
        )
        assert levels == [-2.0, 2.0]  # action_low / action_high of the elbow
    finally:
        for fig in figures.values():
            plt.close(fig)


def test_plot_run_writes_pngs(reach_run: Path, tmp_path: Path) -> None:
    paths = plot_run(reach_run, out_dir=tmp_path / "figs", episode=0)
    assert [p.name for p in paths] == [
        "episode-00000-tip-path.png",
        "episode-00000-belief.png",
        "episode-00000-free-energy.png",
        "episode-00000-commands.png",
    ]
    for path in paths:
        assert path.stat().st_size > 20_000
        image = iio.imread(path)
        assert image.ndim == 3 and image.shape[0] > 300 and image.shape[1] > 500
        assert image[..., :3].std() > 10  # not a blank canvas


def test_recorder_style_log_skips_internal_panels(tmp_path: Path) -> None:
    write_reach_run(tmp_path / "run", internal=False, steps=60)
    paths = plot_run(tmp_path / "run")
    assert [p.name for p in paths] == ["episode-00000-tip-path.png", "episode-00000-commands.png"]
    assert all(p.parent == tmp_path / "run" / "figures" for p in paths)


def test_base_log_plots_xy_path_against_dock(tmp_path: Path) -> None:
    with RunWriter(tmp_path / "rover", {"scenario": "row-3-to-dock"}) as w:
        w.begin_episode(0)
        for k in range(50):
            w.record(
                k,
                0.05 * k,
                external={
                    "base_pose": np.array([0.02 * k, 0.01 * k, 0.1]),
                    "dock_position_m": np.array([1.0, 0.5, 0.0]),
                },
                sensory={},
                active={"wheel_speed_rad_s": np.array([1.0, 1.2])},
            )
        w.end_episode()
    frame, episode = load_episode(tmp_path / "rover")
    figures = build_figures(frame, read_metadata(tmp_path / "rover"), episode)
    try:
        assert list(figures) == ["tip-path", "commands"]
        (ax,) = _visible_axes(figures["tip-path"])
        xs = np.concatenate([line.get_xdata() for line in ax.get_lines()])
        assert xs.max() == pytest.approx(1.0)  # the dock marker at x = 1 m
    finally:
        for fig in figures.values():
            plt.close(fig)


def test_unknown_episode_is_a_one_line_error(reach_run: Path) -> None:
    with pytest.raises(LogError, match=r"episode: 7 is not in .*episodes \[0, 1\]") as info:
        plot_run(reach_run, episode=7)
    assert "\n" not in str(info.value)


def test_replay_video_frames_and_believed_tip(tmp_path: Path) -> None:
    write_reach_run(tmp_path / "run", steps=120)  # 0.5 s at 240 Hz
    out = replay_video(tmp_path / "run", episode=0, out=tmp_path / "replay.gif", fps=20)
    assert out == tmp_path / "replay.gif"
    frames = iio.imread(out, index=None)
    assert frames.shape == (10, 240, 320, 3)  # 0.5 s x 20 fps, from t = 0 to t <= 0.4958 s
    # The target marker (sky blue) is drawn; the frames change as the arm moves.
    blue = (frames[..., 2] > 180) & (frames[..., 0] < 110) & (frames[..., 1] > 90)
    assert blue[0].sum() > 5
    assert np.abs(frames[0].astype(int) - frames[-1].astype(int)).mean() > 0.5


def test_replay_needs_urdf_metadata(tmp_path: Path) -> None:
    with RunWriter(tmp_path / "r", {}) as w:
        w.begin_episode(0)
        w.record(0, 0.0, external={"joint_angle_rad": np.zeros(2)}, sensory={}, active={})
        w.end_episode()
    with pytest.raises(LogError, match="urdf_path"):
        replay_video(tmp_path / "r")
    with pytest.raises(ValueError, match="fps"):
        replay_video(tmp_path / "r", fps=0)


def test_cli_plot_writes_figures_and_video(tmp_path: Path, capsys) -> None:
    write_reach_run(tmp_path / "run", steps=48)
    parser = argparse.ArgumentParser(prog="blanket")
    add_plot_parser(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(
        ["plot", str(tmp_path / "run"), "--out", str(tmp_path / "o"), "--video", "--fps", "10"]
    )
    assert args.handler(args) == 0
    printed = capsys.readouterr().out.split()
    assert len(printed) == 5 and all(Path(p).is_file() for p in printed)
    assert Path(printed[-1]).name.startswith("episode-00000-replay.")


def test_believed_tip_uses_urdf_forward_kinematics() -> None:
    from blanket.logs.video import tip_positions

    angles = np.array([[0.0, 0.0], [0.8, 1.2], [-1.1, 2.3], [np.pi / 2, -np.pi / 2]])
    got = tip_positions(URDF, JOINTS, "tool_tip", angles)
    np.testing.assert_allclose(got, np.array([planar_tip(q) for q in angles]), atol=1e-9)
    np.testing.assert_allclose(got[0], [0.7, 0.0, 0.05], atol=1e-12)  # URDF comment: q = 0


def test_runner_style_applied_command_is_overlaid(tmp_path: Path) -> None:
    meta = {
        "scenario": {"name": "tray-c4", "env": "blanket/planar-2link-v0"},
        "joint_names": JOINTS,
        "action_low": [-1.0, -1.0],
        "action_high": [1.0, 1.0],
    }
    with RunWriter(tmp_path / "r", meta) as w:
        w.begin_episode(0)
        for k in range(20):
            cmd = np.array([0.1 * k, -0.1 * k])
            w.record(
                k,
                k / 240,
                external={},
                sensory={},
                active={"action": cmd, "action_applied": np.clip(cmd, -1, 1)},
            )
        w.end_episode()
    frame, episode = load_episode(tmp_path / "r")
    figures = build_figures(frame, read_metadata(tmp_path / "r"), episode)
    try:
        axes = _visible_axes(figures["commands"])
        assert len(axes) == 2  # applied values overlaid, not extra panels
        applied = [ln for ln in axes[0].get_lines() if ln.get_label() == "applied"]
        assert applied and max(applied[0].get_ydata()) == pytest.approx(1.0)
        assert any("tray-c4" in t.get_text() for t in figures["commands"].texts)
    finally:
        for fig in figures.values():
            plt.close(fig)


def test_replay_of_the_demo_shows_the_trays_and_the_whole_arm(tmp_path: Path) -> None:
    from blanket.cli import main
    from blanket.logs import read_metadata

    run = tmp_path / "demo"
    assert main(["demo", "--episodes", "1", "--out", str(run), "--quiet"]) == 0
    trays = [b for b in read_metadata(run)["scene_boxes"] if b["name"].startswith("tray")]
    assert len(trays) == 2
    frames = iio.imread(replay_video(run, out=tmp_path / "r.gif", fps=5), index=None)
    rgb = frames.astype(int)
    # trays: near-black boxes (rgba 0.15) on the bench, in every frame
    dark = (rgb.max(axis=-1) < 60) & (np.ptp(rgb, axis=-1) < 12)
    assert (dark[:, :-3].reshape(len(frames), -1).sum(axis=1) > 300).all()
    # the arm (pybullet_data's iiwa: blue links, orange joints) never touches the top, left
    # or right edge of the picture: the camera frames it whole
    arm = ((rgb[..., 2] - rgb[..., 0]) > 60) | ((rgb[..., 0] - rgb[..., 2]) > 120)
    assert arm.any(axis=(1, 2)).all()
    assert not arm[:, 0, :].any() and not arm[:, :, 0].any() and not arm[:, :, -1].any()


def test_bench_chart_marks_zero_bars(tmp_path: Path, monkeypatch) -> None:
    # a 0 % bar has no length; the chart marks it so it differs from a policy not run
    from matplotlib.figure import Figure

    from blanket.bench.report import plot_success

    saved = []
    monkeypatch.setattr(Figure, "savefig", lambda fig, *a, **k: saved.append(fig))
    records = [
        {"policy": p, "condition": c, "success_5cm": v, "success_5cm_ci95": (v, v)}
        for p, c, v in (
            ("active-inference", "nominal", 1.0),
            ("active-inference", "control-120hz", 1.0),
            ("ppo", "nominal", 0.45),
            ("ppo", "control-120hz", 0.0),
        )
    ]
    plot_success(records, tmp_path / "s.png")
    (ax,) = saved[0].axes
    marks = [line for line in ax.get_lines() if line.get_gid() == "zero-bar"]
    assert len(marks) == 1 and list(marks[0].get_xdata()) == [0.0]
    assert [t.get_text() for t in ax.texts] == ["0"]
