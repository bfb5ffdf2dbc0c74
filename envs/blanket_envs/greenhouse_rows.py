"""The greenhouse-rows world: parallel bench rows, row-end posts, a charging dock.

Default layout (all invented for blanket's greenhouse scenario; metres, world frame x east,
y north, z up, the floor is z = 0):

- three bench rows along x, each a box 6.0 m long, 0.8 m wide and 0.8 m tall, centred at
  y = -2.6, 0, +2.6, spanning x in [-3, 3]; the two inner aisles (centre lines y = -1.3 and
  +1.3) are 1.8 m wide -- wide enough for the husky (0.69 m wide, 1.0 m long) to turn on the
  spot, which in pybullet it does about a point 0.21 m behind its centre -- and the outer
  strips lead to the floor edge;
- headlands 2.6 m deep at both ends (x in [-5.6, -3] and [3, 5.6]);
- landmarks: a thin post (radius 0.04 m, 1.4 m tall) at each end of each bench, 0.1 m past the
  end and 0.45 m either side of its centre line, i.e. at the aisle edges (12 row-end posts),
  and four posts at each headland's far edge (x = +-5.3, y = +-0.8, +-1.8);
- the charging dock at the west end of the north aisle, ``(-4.4, 1.3, pi)``: the base drives
  out of the aisle and stops facing the west headland posts;
- start poses are drawn in the two inner aisles (within 5 cm of the aisle centre line) and in
  the east headland, with a uniform heading.

The ``"dark-aisle"`` layout (:func:`dark_aisle_layout`) keeps the benches and the dock but
leaves only the four row-end posts of the south aisle: the north aisle, the short way from the
east headland to the dock, is dark; the south aisle, 5.2 m longer, has posts at both ends. The
base starts at a nominal pose in the east headland facing the north aisle, ``(4.4, 1.3, pi)``;
an env option spreads the true start around it (``start_pose_sd``) and tells the agent the
spread, which is what makes the longer, lit way worth taking.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from blanket.errors import ConfigError
from blanket.sim.base_world import WorldIds, build_world  # re-exported: built by BaseWorld

__all__ = [
    "GreenhouseLayout",
    "WorldIds",
    "default_layout",
    "validate_layout",
    "box_distance",
    "build_world",
    "sample_start_pose",
    "dark_aisle_layout",
    "LAYOUTS",
]


def _default_benches() -> np.ndarray:
    return np.array([[-3.0, yc - 0.4, 3.0, yc + 0.4] for yc in (-2.6, 0.0, 2.6)])


def _default_landmarks() -> np.ndarray:
    posts = []
    for yc in (-2.6, 0.0, 2.6):
        for x in (-3.1, 3.1):
            for dy in (-0.45, 0.45):
                posts.append((x, yc + dy))
    for x in (-5.3, 5.3):
        for y in (-1.8, -0.8, 0.8, 1.8):
            posts.append((x, y))
    return np.array(posts, dtype=float)


@dataclass(frozen=True)
class GreenhouseLayout:
    """Geometry of the greenhouse rows.

    Attributes
    ----------
    bench_boxes_m : numpy.ndarray
        Axis-aligned benches ``(x_min, y_min, x_max, y_max)``, shape ``(n, 4)``.
    bench_height_m : float
        Bench height.
    landmarks_m : numpy.ndarray
        Post positions, shape ``(L, 2)``.
    post_radius_m, post_height_m : float
        Post geometry.
    dock_pose : numpy.ndarray
        ``(x_m, y_m, heading_rad)`` of the charging dock.
    world_bounds_m : numpy.ndarray
        ``(x_min, y_min, x_max, y_max)`` of the floor.
    start_regions_m : numpy.ndarray
        Boxes ``(x_min, y_min, x_max, y_max)`` start positions are drawn from, shape ``(k, 4)``.
    start_pose : numpy.ndarray or None
        A nominal start ``(x_m, y_m, heading_rad)``; when set, starts are drawn around it (see
        :func:`sample_start_pose`) instead of in ``start_regions_m``.
    """

    bench_boxes_m: np.ndarray = field(default_factory=_default_benches)
    bench_height_m: float = 0.8
    landmarks_m: np.ndarray = field(default_factory=_default_landmarks)
    post_radius_m: float = 0.04
    post_height_m: float = 1.4
    dock_pose: np.ndarray = field(default_factory=lambda: np.array([-4.4, 1.3, np.pi]))
    world_bounds_m: np.ndarray = field(default_factory=lambda: np.array([-5.6, -4.4, 5.6, 4.4]))
    start_regions_m: np.ndarray = field(
        default_factory=lambda: np.array(
            [
                [-2.2, 1.25, 2.5, 1.35],
                [-2.2, -1.35, 2.5, -1.25],
                [3.9, -2.4, 4.6, 2.4],
            ]
        )
    )
    start_pose: np.ndarray | None = None


def default_layout() -> GreenhouseLayout:
    """The default three-row greenhouse (see the module docstring)."""
    return GreenhouseLayout()


def dark_aisle_layout() -> GreenhouseLayout:
    """The default benches and dock, posts only at the ends of the south aisle, a nominal
    start in the east headland facing the dark north aisle (module docstring)."""
    posts = np.array([(x, y) for x in (-3.1, 3.1) for y in (-0.85, -1.75)], dtype=float)
    return GreenhouseLayout(landmarks_m=posts, start_pose=np.array([4.4, 1.3, np.pi]))


#: Named layouts of the ``layout`` env option.
LAYOUTS = {"rows": default_layout, "dark-aisle": dark_aisle_layout}


def box_distance(point_xy: np.ndarray, boxes: np.ndarray) -> np.ndarray:
    """Signed distance from a point to each axis-aligned box (negative inside), shape ``(n,)``."""
    p = np.asarray(point_xy, dtype=float)
    b = np.asarray(boxes, dtype=float).reshape(-1, 4)
    dx = np.maximum(b[:, 0] - p[0], p[0] - b[:, 2])
    dy = np.maximum(b[:, 1] - p[1], p[1] - b[:, 3])
    outside = np.hypot(np.maximum(dx, 0.0), np.maximum(dy, 0.0))
    inside = np.minimum(np.maximum(dx, dy), 0.0)
    return outside + inside


def _inside_bounds(p: np.ndarray, bounds: np.ndarray) -> bool:
    return bool(bounds[0] <= p[0] <= bounds[2] and bounds[1] <= p[1] <= bounds[3])


def validate_layout(layout: GreenhouseLayout, clearance_m: float = 0.0) -> None:
    """Raise :class:`~blanket.errors.ConfigError` (one line) for an impossible layout.

    Checks: bench boxes well formed and inside the world, landmarks inside the world and not
    inside a bench, the dock pose finite, inside the world and at least ``clearance_m`` from
    every bench.
    """
    bounds = np.asarray(layout.world_bounds_m, dtype=float)
    if bounds.shape != (4,) or not (bounds[0] < bounds[2] and bounds[1] < bounds[3]):
        raise ConfigError(f"world_bounds_m must be (x_min, y_min, x_max, y_max), got {bounds}")
    boxes = np.asarray(layout.bench_boxes_m, dtype=float)
    if boxes.ndim != 2 or boxes.shape[1] != 4 or not np.all(np.isfinite(boxes)):
        raise ConfigError(f"bench_boxes_m must have shape (n, 4) of finite numbers, got {boxes}")
    if np.any(boxes[:, 2] <= boxes[:, 0]) or np.any(boxes[:, 3] <= boxes[:, 1]):
        raise ConfigError("bench_boxes_m rows must satisfy x_min < x_max and y_min < y_max")
    lm = np.asarray(layout.landmarks_m, dtype=float)
    if lm.ndim != 2 or lm.shape[1] != 2 or len(lm) == 0 or not np.all(np.isfinite(lm)):
        raise ConfigError(f"landmarks must be a non-empty (L, 2) array of x_m, y_m, got {lm!r}")
    for i, p in enumerate(lm):
        if not _inside_bounds(p, bounds):
            raise ConfigError(
                f"landmarks[{i}] = {tuple(p)} lies outside the world "
                f"x in [{bounds[0]}, {bounds[2]}], y in [{bounds[1]}, {bounds[3]}]"
            )
        if len(boxes) and np.min(box_distance(p, boxes)) < 0:
            raise ConfigError(f"landmarks[{i}] = {tuple(p)} lies inside a bench")
    dock = np.asarray(layout.dock_pose, dtype=float)
    if dock.shape != (3,) or not np.all(np.isfinite(dock)):
        raise ConfigError(f"dock_pose must be (x_m, y_m, heading_rad), got {layout.dock_pose!r}")
    if not _inside_bounds(dock[:2], bounds):
        raise ConfigError(f"dock_pose {tuple(dock)} lies outside the world bounds {tuple(bounds)}")
    if len(boxes) and np.min(box_distance(dock[:2], boxes)) < clearance_m:
        raise ConfigError(
            f"dock_pose {tuple(dock[:2])} lies inside an obstacle: it must be >= "
            f"{clearance_m:.2f} m from every bench"
        )


def sample_start_pose(
    rng: np.random.Generator,
    layout: GreenhouseLayout,
    clearance_m: float,
    start_pose_sd: np.ndarray | None = None,
) -> np.ndarray:
    """Draw a start pose ``(x, y, heading)`` in the start regions, ``clearance_m`` from obstacles.

    A region is chosen with probability proportional to its area; the heading is uniform. A
    layout with a nominal ``start_pose`` draws ``start_pose + N(0, diag(start_pose_sd^2))``
    instead (exactly the nominal pose when ``start_pose_sd`` is None), redrawn until clear.
    """
    boxes = np.asarray(layout.bench_boxes_m, dtype=float)
    if layout.start_pose is not None:
        nominal = np.asarray(layout.start_pose, dtype=float)
        sd = np.zeros(3) if start_pose_sd is None else np.asarray(start_pose_sd, dtype=float)
        for _ in range(1000):
            pose = nominal + sd * rng.standard_normal(3)
            if len(boxes) == 0 or np.min(box_distance(pose[:2], boxes)) >= clearance_m:
                pose[2] = (pose[2] + np.pi) % (2 * np.pi) - np.pi
                return pose
        raise ConfigError(f"start_pose_sd {tuple(sd)} leaves no start {clearance_m:.2f} m clear")
    regions = np.asarray(layout.start_regions_m, dtype=float).reshape(-1, 4)
    area = (regions[:, 2] - regions[:, 0]) * (regions[:, 3] - regions[:, 1])
    posts = np.asarray(layout.landmarks_m, dtype=float).reshape(-1, 2)
    for _ in range(1000):
        k = int(rng.choice(len(regions), p=area / area.sum()))
        x0, y0, x1, y1 = regions[k]
        p = np.array([rng.uniform(x0, x1), rng.uniform(y0, y1)])
        heading = rng.uniform(-np.pi, np.pi)
        bench_ok = len(boxes) == 0 or np.min(box_distance(p, boxes)) >= clearance_m
        post_ok = np.min(np.hypot(*(posts - p).T)) >= clearance_m + layout.post_radius_m
        if bench_ok and post_ok:
            return np.array([p[0], p[1], heading])
    raise ConfigError(f"start_regions_m leave no position {clearance_m:.2f} m clear of the benches")
