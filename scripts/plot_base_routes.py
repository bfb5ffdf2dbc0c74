"""Figure: the EFE planner's candidate routes on the dark-aisle map, with the belief's ellipses.

Two panels, a confident start and an uncertain one (``start_pose_sd`` of the
``blanket/base-goto-v0`` env with ``layout="dark-aisle"``). Each shows the benches, the four
row-end posts, the dock, every candidate route's predicted mean path and its 2-sigma position
ellipses every 2 s (:func:`blanket.agent.efe.predict_route`), the chosen route drawn solid.

Usage: ``python scripts/plot_base_routes.py [--out docs/img/base_routes.png] [--robot rover]``.
"""

from __future__ import annotations

import argparse

import gymnasium as gym
import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.patches import Ellipse, Rectangle  # noqa: E402

import blanket  # noqa: E402, F401  (registers the env ids)
from blanket.agent.mobile_base import BaseAgent  # noqa: E402


def ellipse(mean: np.ndarray, cov: np.ndarray, color: str) -> Ellipse:
    """The 2-sigma ellipse of a 2-D Gaussian (eigen-decomposition of its covariance)."""
    vals, vecs = np.linalg.eigh(cov)
    angle = float(np.degrees(np.arctan2(vecs[1, 1], vecs[0, 1])))
    w, h = 2 * 2 * np.sqrt(np.maximum(vals[::-1], 0.0))
    return Ellipse(mean, w, h, angle=angle, fill=False, color=color, lw=0.8)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default="docs/img/base_routes.png")
    parser.add_argument("--robot", default="rover")
    parser.add_argument("--sds", nargs=2, type=float, default=[0.01, 0.15])
    args = parser.parse_args()
    fig, axes = plt.subplots(1, 2, figsize=(12, 5.7), sharey=True)
    colors = ["tab:blue", "tab:orange", "tab:green"]
    for ax, sd in zip(axes, args.sds, strict=True):
        env = gym.make(
            "blanket/base-goto-v0", robot=args.robot, layout="dark-aisle", start_pose_sd=[sd] * 3
        )
        agent = BaseAgent.from_env(env, planner="efe")
        d = env.unwrapped.description
        env.close()
        for x0, y0, x1, y1 in d.bench_boxes_m:
            ax.add_patch(Rectangle((x0, y0), x1 - x0, y1 - y0, color="saddlebrown", alpha=0.5))
        ax.plot(*d.landmarks_m.T, "o", color="goldenrod", ms=6, label="row-end posts")
        ax.plot(*d.dock_pose[:2], "s", color="tab:blue", ms=9, alpha=0.5, label="dock")
        ax.plot(*d.start_pose[:2], "k^", ms=8, label="nominal start")
        step = max(1, int(round(2.0 * d.camera_hz)))
        for k, route in enumerate(agent.routes):
            chosen = k == agent.route_index
            c = colors[k % len(colors)]
            s = route.scores
            label = (
                f"G = {s['expected_free_energy']:.0f} (risk {s['risk']:.0f}, ambiguity "
                f"{s['ambiguity']:.0f}; info gain {s['information_gain']:.0f}, "
                f"arrives {s['arrival_s']:.0f} s)" + (" -- chosen" if chosen else "")
            )
            path = np.vstack([d.start_pose[:2], route.means[:, :2]])
            ax.plot(*path.T, "-" if chosen else "--", color=c, lw=2 if chosen else 1.2, label=label)
            for m, cov in zip(route.means[::step], route.covariances[::step], strict=True):
                ax.add_patch(ellipse(m[:2], cov[:2, :2], c))
            ax.add_patch(ellipse(route.means[-1, :2], route.covariances[-1, :2, :2], c))
        b = d.world_bounds_m
        ax.set_xlim(b[0], b[2])
        ax.set_ylim(b[1], b[3])
        ax.set_aspect("equal")
        ax.set_title(f"start sd {sd} (m, m, rad); 2-sigma ellipses every 2 s", fontsize=10)
        ax.set_xlabel("x (m)")
        ax.legend(loc="lower left", fontsize=7)
    axes[0].set_ylabel("y (m)")
    fig.suptitle(
        f"dark-aisle, {args.robot}: expected free energy of the candidate routes "
        "(north aisle dark, south aisle with row-end posts)"
    )
    fig.tight_layout()
    fig.savefig(args.out, dpi=110)
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
