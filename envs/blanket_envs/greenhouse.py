"""The greenhouse potting bench: a bench in front of the arm, two seedling trays, cell targets.

Everything here is our own invented scenario. The layout is scaled by the arm's reach so
every cell target is reachable: the bench starts a little in front of the base, the two
trays sit side by side at about half the reach, and a target is a point a few centimetres
above a cell centre.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "TrayLayout",
    "BenchLayout",
    "bench_layout_for_reach",
    "horizontal_reach_m",
    "build_bench",
]

#: Height of a seedling tray (m).
TRAY_HEIGHT_M = 0.04
#: Height of a cell target above the tray top (m).
TARGET_ABOVE_CELL_M = 0.06


@dataclass(frozen=True)
class TrayLayout:
    """A seedling tray: ``rows`` x ``columns`` cells at ``pitch_m``, top centre at ``centre_m``."""

    centre_m: tuple[float, float, float]
    rows: int
    columns: int
    pitch_m: float

    @property
    def half_extents_m(self) -> np.ndarray:
        return np.array(
            [0.5 * self.rows * self.pitch_m, 0.5 * self.columns * self.pitch_m, 0.5 * TRAY_HEIGHT_M]
        )

    def cell_centres_m(self) -> np.ndarray:
        """Centres of the cells on the tray top, shape (rows * columns, 3), row-major."""
        cx, cy, cz = self.centre_m
        rows = (np.arange(self.rows) - 0.5 * (self.rows - 1)) * self.pitch_m
        cols = (np.arange(self.columns) - 0.5 * (self.columns - 1)) * self.pitch_m
        grid = np.array([(cx + r, cy + c, cz) for r in rows for c in cols])
        return grid


@dataclass(frozen=True)
class BenchLayout:
    """The potting bench (a box whose top is at ``top_z_m``) and the trays on it."""

    bench_centre_m: tuple[float, float, float]
    bench_half_extents_m: tuple[float, float, float]
    trays: tuple[TrayLayout, ...]
    target_above_cell_m: float = TARGET_ABOVE_CELL_M

    @property
    def top_z_m(self) -> float:
        return self.bench_centre_m[2] + self.bench_half_extents_m[2]

    def cell_targets_m(self) -> np.ndarray:
        """Every cell target (a point above a cell centre), shape (n_cells, 3), tray by tray."""
        cells = np.vstack([tray.cell_centres_m() for tray in self.trays])
        return cells + np.array([0.0, 0.0, self.target_above_cell_m])

    @property
    def workspace_centre_m(self) -> np.ndarray:
        """Centre of the cell targets."""
        return self.cell_targets_m().mean(axis=0)


def horizontal_reach_m(tip_positions_m: np.ndarray, height_m: float, band_m: float = 0.05) -> float:
    """Reach of the tool tip in the horizontal plane near ``height_m``.

    The 95th percentile of the horizontal distance from the base axis over sampled tip
    positions whose height lies within ``band_m`` of ``height_m``.
    """
    points = np.asarray(tip_positions_m, dtype=float)
    near = np.abs(points[:, 2] - height_m) < band_m
    if near.sum() < 10:
        near = np.ones(len(points), dtype=bool)
    return float(np.quantile(np.hypot(points[near, 0], points[near, 1]), 0.95))


def bench_layout_for_reach(
    reach_m: float, rows: int = 4, columns: int = 6, bench_top_z_m: float = 0.0
) -> BenchLayout:
    """The bench layout for an arm whose horizontal reach at tray height is ``reach_m``.

    The two trays sit side by side (along y) with their centres at 0.55 reach in front of the
    base (along x); the cell pitch is 5 cm, smaller for short arms (reach / 15), so the
    farthest cell lies within about 0.75 of the reach and the nearest beyond 0.4 of it.
    """
    pitch = min(0.05, reach_m / 15.0)
    gap = 0.4 * pitch
    distance = 0.55 * reach_m
    tray_top = bench_top_z_m + TRAY_HEIGHT_M
    half_width = 0.5 * columns * pitch
    trays = tuple(
        TrayLayout(
            centre_m=(distance, side * (half_width + 0.5 * gap), tray_top),
            rows=rows,
            columns=columns,
            pitch_m=pitch,
        )
        for side in (1.0, -1.0)
    )
    near_x = 0.2 * reach_m
    far_x = 1.1 * reach_m
    half_y = max(2.0 * half_width + gap, 0.5 * reach_m) + 0.05
    bench_height = 0.8
    return BenchLayout(
        bench_centre_m=(0.5 * (near_x + far_x), 0.0, bench_top_z_m - 0.5 * bench_height),
        bench_half_extents_m=(0.5 * (far_x - near_x), half_y, 0.5 * bench_height),
        trays=trays,
    )


def build_bench(world, layout: BenchLayout) -> dict[str, int]:
    """Add the bench and trays to an :class:`blanket.sim.ArmWorld`; returns name -> body id.

    Contacts with them are reported as ``"bench"``, ``"tray0"``, ``"tray1"``, ...
    """
    bodies = {
        "bench": world.add_box(
            "bench",
            np.array(layout.bench_half_extents_m),
            np.array(layout.bench_centre_m),
            rgba=(0.55, 0.42, 0.3, 1.0),
        )
    }
    for k, tray in enumerate(layout.trays):
        centre = np.array(tray.centre_m) - np.array([0.0, 0.0, 0.5 * TRAY_HEIGHT_M])
        bodies[f"tray{k}"] = world.add_box(
            f"tray{k}", tray.half_extents_m, centre, rgba=(0.15, 0.15, 0.15, 1.0)
        )
    return bodies
