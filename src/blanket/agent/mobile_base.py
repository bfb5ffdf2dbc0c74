"""Active-inference agent for a differential-drive base driving to a dock between bench rows.

Generative model
----------------
The belief is the planar pose ``(x, y, heading)`` in generalized coordinates, an array
``(order + 1, 3)`` (order-major, :mod:`blanket.gcoords`): row 0 the pose, row 1 its world-frame
rate, row 2 (``order=2``) its acceleration. Sensory channels and priors:

- ``odometry`` (velocity order): wheel speeds ``g = wheel_speeds(cos h x' + sin h y', h')``
  with the effective track (:class:`blanket.body.diff_drive.DiffDriveModel`), precision
  ``1 / wheel_speed_noise^2``;
- ``gyro`` (velocity order, optional): ``g = h'``;
- ``lateral_slip`` (velocity order): the no-side-slip constraint ``-sin h x' + cos h y' +
  icr h' = 0``, a prior of the body model with a small standard deviation;
- ``landmark_bearing`` / ``landmark_range`` (pose order, at each fresh camera frame, visible
  posts only): the range-bearing model of :mod:`blanket.sensors.landmarks` with its analytic
  Jacobians, precisions ``1 / noise^2``;
- prediction: the previous belief carried forward by the shift operator, ``expm(D dt) mu~``
  (the generalized motion ``D mu~``), with precision from the previous curvature of the free
  energy deflated by random accelerations (Laplace assumption: the conditional covariance is
  the inverse curvature);
- ``goal`` (the attractor, velocity order): prior dynamics ``x' = f(x)``, the world-frame rate
  that the polar-coordinate law of Astolfi 1999 (J Dyn Syst Meas Control 121, "Exponential
  stabilization of a wheeled mobile robot via discontinuous control"; gains as in Siegwart,
  Nourbakhsh & Scaramuzza 2011, sec. 3.6.2.4: ``v = k_rho rho``, ``omega = k_alpha alpha +
  k_beta beta``) asks for at the believed pose. A differential drive cannot be stabilised to a
  pose by smooth time-invariant feedback (Brockett 1983), so the law is discontinuous at the
  goal and staged: *localise* (turn on the spot until enough posts are seen), *travel* along
  waypoints, *approach* the dock with the polar law, *align* the heading on the spot.

Perception descends the Laplace-encoded free energy (Friston 2008, "Hierarchical models in the
brain", PLoS Comput Biol, eqs. 7-9; Buckley et al. 2017, J Math Psychol, sec. 5)
``F = 1/2 sum_m e_m' P_m e_m + 1/2 e_p' P_p e_p + 1/2 e_f' P_f e_f - 1/2 sum ln|P|``
with steps scaled by its curvature (Gauss-Newton: ``d mu = -H^-1 dF/dmu``, ``H = sum J' P J``),
which is stable for any precision. The goal term is differentiated only through the rate (the
attractor's dependence on the pose is held fixed) so the goal never drags the pose belief
towards the dock; it is also left out of the reported belief covariance.

Action descends the same free energy through the sensations it changes: with wheel-velocity
control ``dy/da = I`` for the odometry channel, so ``da = -gain H_a^-1 P_o e_o`` where ``H_a``
is the curvature of F in the action once the belief has relaxed (a Schur complement,
``P_o - P_o G H^-1 G' P_o``). Since the relaxed belief leans towards the attractor, the
precision-weighted odometry error is the attractor's pull seen in wheel space; action cancels it.

Obstacles: the map's benches (and posts) are inflated by the half width plus a margin and a
shortest path through their corners (a visibility graph, Lozano-Perez & Wesley 1979, Commun
ACM 22) gives the waypoints the attractor follows; planning happens once, when the base first
localises. Limits: axis-aligned boxes only; no replanning around unmapped obstacles; the start
must leave the base's own clearance; a bearing-only camera needs three visible posts to localise
(two with ranges); waypoint corners are cut by at most ``waypoint_radius_m``.

Route choice (``planner``): ``"direct"`` takes the shortest path; ``"efe"`` scores the shortest
path and the shortest path through each aisle by expected free energy (risk plus ambiguity,
from this same linearised model: :mod:`blanket.agent.efe`) and takes the least. A fix from
posts is used for planning only once the position is known to ``fix_sd_m``; until then the
base keeps turning on the spot and fusing frames. With a nominal start in the description
(layout ``"dark-aisle"``) the belief starts there with the given spread instead.

Docking reliability (measured on the husky, seeds 0-49): pybullet's skid steer creeps along
its heading while it turns on the spot, and a base turning in an aisle towards a bench drove
its nose into it. Two rules keep the turn where it began: while the attractor asks for a pure
turn the believed offset along the heading is fed back as a forward speed
(:meth:`BaseAgent._hold_spot`), and a waypoint more than ``reverse_beyond_rad`` off the bow is
approached stern first (a smaller turn).
"""

from __future__ import annotations

import heapq
from typing import Any

import numpy as np
from scipy.linalg import expm

from blanket.agent._policy import PredictMixin
from blanket.base_description import BaseDescription
from blanket.body.diff_drive import DiffDriveModel, polar_coordinates, pose_rate, wrap_angle
from blanket.errors import ConfigError, did_you_mean
from blanket.free_energy import belief_curvature, belief_gradient, free_energy
from blanket.gcoords import shift_operator
from blanket.planar_motion import bearing_range, bearing_range_jacobian, segment_hits_box

__all__ = ["BaseAgent", "plan_waypoints", "segment_hits_box", "attractor_velocity"]


def plan_waypoints(
    start_xy: np.ndarray,
    goal_xy: np.ndarray,
    boxes: np.ndarray,
    inflation_m: float | np.ndarray,
) -> list[np.ndarray]:
    """Shortest path from start to goal around inflated boxes, through their corners.

    Nodes are the corners of the boxes grown by ``inflation_m`` (one value, or one per box;
    nudged 1 mm outwards); edges
    join nodes whose segment crosses no grown box (boxes that contain an end point are ignored
    for that edge, so a start inside a margin can leave it). Dijkstra's algorithm on the
    visibility graph. Returns the waypoints after the start, ending with the goal.
    """
    b = np.asarray(boxes, dtype=float).reshape(-1, 4)
    grown = b + np.array([-1, -1, 1, 1]) * np.broadcast_to(
        np.asarray(inflation_m, dtype=float).reshape(-1, 1), (len(b), 1)
    )
    corners = []
    for x0, y0, x1, y1 in grown + np.array([-1, -1, 1, 1]) * 1e-3:
        corners += [(x0, y0), (x1, y0), (x1, y1), (x0, y1)]
    nodes = [np.asarray(start_xy, float), np.asarray(goal_xy, float)]
    for c in corners:
        c = np.array(c)
        inside = np.any(
            (grown[:, 0] < c[0])
            & (c[0] < grown[:, 2])
            & (grown[:, 1] < c[1])
            & (c[1] < grown[:, 3])
        )
        if not inside:
            nodes.append(c)

    def contains(box: np.ndarray, p: np.ndarray) -> bool:
        return bool(box[0] < p[0] < box[2] and box[1] < p[1] < box[3])

    def free(i: int, j: int) -> bool:
        p, q = nodes[i], nodes[j]
        for box in grown:
            if contains(box, p) or contains(box, q):
                continue
            if segment_hits_box(p, q, box):
                return False
        return True

    n = len(nodes)
    dist = np.full(n, np.inf)
    prev = np.full(n, -1)
    dist[0] = 0.0
    heap = [(0.0, 0)]
    done = np.zeros(n, dtype=bool)
    while heap:
        d, i = heapq.heappop(heap)
        if done[i]:
            continue
        done[i] = True
        if i == 1:
            break
        for j in range(n):
            if done[j] or j == i:
                continue
            nd = d + float(np.hypot(*(nodes[j] - nodes[i])))
            if nd < dist[j] and free(i, j):
                dist[j] = nd
                prev[j] = i
                heapq.heappush(heap, (nd, j))
    if not np.isfinite(dist[1]):
        return [nodes[1]]
    path = []
    k = 1
    while k != 0:
        path.append(nodes[k])
        k = int(prev[k])
    return path[::-1]


def _drop_collinear(points: np.ndarray, tol_m: float = 0.01) -> np.ndarray:
    """The polyline without interior points that lie on the segment joining their neighbours."""
    keep = [points[0]]
    for i in range(1, len(points) - 1):
        a, b, c = keep[-1], points[i], points[i + 1]
        ab, ac = b - a, c - a
        cross = abs(ab[0] * ac[1] - ab[1] * ac[0]) / max(float(np.hypot(*ac)), 1e-12)
        between = 0.0 <= float(ab @ ac) <= float(ac @ ac)
        if not (cross < tol_m and between):
            keep.append(b)
    keep.append(points[-1])
    return np.array(keep)


def attractor_velocity(
    pose: np.ndarray,
    target: np.ndarray,
    final: bool,
    gains: tuple[float, float, float],
    speed_m_s: float,
    turn_rad_s: float,
    align_radius_m: float = 0.25,
    reverse_beyond_rad: float | None = None,
) -> tuple[float, float]:
    """Desired body velocity ``(v, omega)`` towards a waypoint or the final pose.

    Waypoints: turn on the spot while the target bearing exceeds 0.5 rad, otherwise drive with
    ``v = min(speed, k_rho rho + 0.1)`` and ``omega = k_alpha alpha``. The final pose: the polar
    law ``v = k_rho rho``, ``omega = k_alpha alpha + k_beta beta`` (Astolfi 1999; Siegwart et al.
    2011, sec. 3.6.2.4, stable for ``k_rho > 0``, ``k_beta < 0``, ``k_alpha > k_rho``), after first
    turning on the spot to face the goal when its bearing exceeds 0.6 rad, and inside
    ``align_radius_m`` a pure heading alignment (the staged goal that sidesteps
    Brockett's condition) that also creeps along the heading line onto the goal.

    With ``reverse_beyond_rad`` set, a waypoint further off the bow than that is approached
    stern first (the same law with the bearing from the stern, ``alpha - pi``, and ``v < 0``):
    a smaller turn on the spot, which matters in an aisle barely wider than the base's sweep.
    """
    k_rho, k_alpha, k_beta = gains
    if not final:
        rho, alpha, _ = polar_coordinates(pose, np.r_[target[:2], 0.0])
        if reverse_beyond_rad is not None and abs(alpha) > reverse_beyond_rad:
            a_r = float(wrap_angle(alpha - np.pi))
            om = float(np.clip(k_alpha * a_r, -turn_rad_s, turn_rad_s))
            if abs(a_r) > 0.5:
                return 0.0, om
            return float(-min(speed_m_s, k_rho * rho + 0.1) * np.cos(a_r)), om
        if abs(alpha) > 0.5:
            return 0.0, float(np.clip(k_alpha * alpha, -turn_rad_s, turn_rad_s))
        v = min(speed_m_s, k_rho * rho + 0.1) * np.cos(alpha)
        return float(v), float(np.clip(k_alpha * alpha, -turn_rad_s, turn_rad_s))
    rho, alpha, beta = polar_coordinates(pose, target)
    if rho < align_radius_m:
        # close: align the heading on the spot while creeping along the heading line onto the
        # goal (forwards or backwards), never turning round to face it
        err = float(wrap_angle(target[2] - pose[2]))
        along = rho * np.cos(alpha)
        v = float(np.clip(k_rho * along, -speed_m_s, speed_m_s)) if abs(along) > 0.015 else 0.0
        om = float(np.clip(1.5 * err, -turn_rad_s, turn_rad_s)) if abs(err) > 0.02 else 0.0
        return v, om
    if abs(alpha) > 0.6:  # goal far off the bow: face it first (staged, no reversing)
        return 0.0, float(np.clip(k_alpha * alpha, -turn_rad_s, turn_rad_s))
    v = min(speed_m_s, k_rho * rho)
    omega = k_alpha * alpha + k_beta * beta
    return float(v), float(np.clip(omega, -turn_rad_s, turn_rad_s))


OPTION_DEFAULTS: dict[str, Any] = {
    "embedding_order": 1,
    "goal_precision": 400.0,
    "acceleration_sd_m_s2": 2.0,
    "yaw_acceleration_sd_rad_s2": 4.0,
    "pose_drift_sd_m": 0.002,
    "lateral_slip_sd_m_s": None,
    "slip_sd_rad_s": None,
    "perception_iterations": 2,
    "action_gain": 0.6,
    "cruise_fraction": 0.7,
    "turn_fraction": None,
    "gains": (0.8, 2.5, -0.8),
    "waypoint_radius_m": 0.2,
    "clearance_margin_m": 0.25,
    "dock_approach_m": 0.8,
    "search_turn_fraction": 0.5,
    "fix_sd_m": 0.08,
    "reverse_beyond_rad": 2.2,
    "planner": "direct",
    "preferred_sd": None,
    "preferred_arrival_sd_s": 2.0,
}

#: Route planners of the ``planner`` option.
PLANNERS = ("direct", "efe")


class BaseAgent(PredictMixin):
    """Active-inference controller for ``blanket/base-goto-v0`` (see the module docstring).

    Parameters
    ----------
    description : BaseDescription
        The env's static description (the only thing besides observations the agent reads).
    **options
        Any of ``embedding_order`` (1 or 2), ``goal_precision`` (attractor precision on the
        velocity order, (m/s)^-2), ``acceleration_sd_m_s2``, ``yaw_acceleration_sd_rad_s2``
        (random accelerations of the prediction), ``pose_drift_sd_m`` (per-step pose noise),
        ``lateral_slip_sd_m_s`` (default 0.02 for the rover, 0.1 for a skid steer),
        ``slip_sd_rad_s`` (common, differential) unmodelled wheel slip per wheel (default (0, 0)
        for a two-wheel base, (0.3, 1.0) for a skid steer),
        ``perception_iterations``, ``action_gain`` (0, 1], ``cruise_fraction`` (of the top speed),
        ``turn_fraction`` (of the top turn rate; default 0.7, 0.35 for a skid steer, whose
        spins in place slip and drift),
        ``gains`` (k_rho, k_alpha, k_beta), ``waypoint_radius_m``, ``clearance_margin_m``,
        ``dock_approach_m`` (pre-dock waypoint distance), ``search_turn_fraction``,
        ``fix_sd_m`` (after a fix from posts the base keeps turning on the spot, fusing frames,
        until the believed position's standard deviation is below this; a fix from two far
        posts seen almost in line leaves the position across that line loose),
        ``reverse_beyond_rad`` (a waypoint further off the bow than this is approached stern
        first; None: always bow first),
        ``planner`` (``"direct"``: the shortest path; ``"efe"``: the candidate route -- the
        shortest, and the shortest through each aisle -- of least expected free energy,
        :mod:`blanket.agent.efe`), ``preferred_sd`` (x_m, y_m, heading_rad) of the preferred
        dock density (default half the dock tolerance) and ``preferred_arrival_sd_s`` (spread of
        the preferred arrival time about zero: how much arriving later costs), both for
        ``"efe"``.

    When the description has a nominal ``start_pose`` (layout ``"dark-aisle"``) the belief
    starts there with the given ``start_pose_sd`` instead of localising from posts.
    """

    def __init__(self, description: BaseDescription, **options: Any) -> None:
        unknown = sorted(set(options) - set(OPTION_DEFAULTS))
        if unknown:
            hint = did_you_mean(unknown[0], OPTION_DEFAULTS)
            raise ConfigError(f"unknown BaseAgent option {unknown[0]!r}; {hint}")
        opts = {**OPTION_DEFAULTS, **options}
        order = opts["embedding_order"]
        if order not in (1, 2):
            raise ConfigError(f"embedding_order must be 1 or 2, got {order!r}")
        if not (0 < float(opts["action_gain"]) <= 1):
            raise ConfigError(f"action_gain must be in (0, 1], got {opts['action_gain']!r}")
        if opts["planner"] not in PLANNERS:
            hint = did_you_mean(str(opts["planner"]), PLANNERS)
            raise ConfigError(f"planner {opts['planner']!r} is unknown; {hint}")
        if opts["preferred_sd"] is None:
            opts["preferred_sd"] = (
                description.success_distance_m / 2,
                description.success_distance_m / 2,
                description.success_heading_rad / 2,
            )
        psd = np.asarray(opts["preferred_sd"], dtype=float).reshape(-1)
        if psd.shape != (3,) or not np.all(psd > 0):
            raise ConfigError(
                f"preferred_sd must be 3 numbers > 0 (x_m, y_m, heading_rad), "
                f"got {opts['preferred_sd']!r}"
            )
        if not (float(opts["preferred_arrival_sd_s"]) > 0):
            raise ConfigError(
                f"preferred_arrival_sd_s must be > 0 s, got {opts['preferred_arrival_sd_s']!r}"
            )
        if not (float(opts["goal_precision"]) > 0):
            raise ConfigError(f"goal_precision must be > 0, got {opts['goal_precision']!r}")
        self.description = description
        self.options = opts
        d = description
        self.model = DiffDriveModel(d.wheel_radius_m, d.effective_track_m, d.icr_offset_m)
        self.order = int(order)
        self.n = 3 * (self.order + 1)
        self.dt = 1.0 / d.control_hz
        D = shift_operator(self.order, 3)
        self.transition = expm(D * self.dt)
        skid = not (d.icr_offset_m == 0.0 and d.effective_track_m == d.track_m)
        slip = opts["lateral_slip_sd_m_s"]
        if slip is None:
            slip = 0.1 if skid else 0.02
        self.lateral_precision = 1.0 / float(slip) ** 2
        # Odometry in the (common, differential) wheel-speed basis: noise on each wheel plus the
        # unmodelled slip of a skid steer, which hits the common mode (forward speed) and, much
        # more, the differential mode (yaw rate).
        slip_common, slip_diff = (
            opts["slip_sd_rad_s"]
            if opts["slip_sd_rad_s"] is not None
            else ((0.0, 0.0) if skid is False else (0.3, 1.0))
        )
        self.odometry_basis = np.array([[1.0, 1.0], [-1.0, 1.0]]) / np.sqrt(2.0)
        w2 = max(d.wheel_speed_noise_rad_s, 1e-3) ** 2
        self.odometry_precision = np.array(
            [1.0 / (w2 + 2 * slip_common**2), 1.0 / (w2 + 2 * slip_diff**2)]
        )
        self.gyro_precision = 1.0 / max(d.yaw_rate_noise_rad_s, 1e-4) ** 2
        self.bearing_precision = 1.0 / max(d.bearing_noise_rad, 1e-4) ** 2
        self.range_precision = (
            None if d.range_noise_m is None else 1.0 / max(d.range_noise_m, 1e-4) ** 2
        )
        acc = np.array(
            [opts["acceleration_sd_m_s2"]] * 2 + [opts["yaw_acceleration_sd_rad_s2"]], dtype=float
        )
        q = np.zeros(self.n)
        q[:3] = float(opts["pose_drift_sd_m"]) ** 2
        if self.order == 1:
            q[3:6] = (acc * self.dt) ** 2
        else:
            q[3:6] = (0.1 * acc * self.dt) ** 2
            q[6:9] = (10.0 * acc * self.dt) ** 2
        self.process_covariance = np.diag(q)
        self.speed_m_s = (
            float(opts["cruise_fraction"]) * d.wheel_radius_m * d.wheel_speed_limit_rad_s
        )
        turn_fraction = opts["turn_fraction"]
        if turn_fraction is None:
            turn_fraction = 0.35 if skid else 0.7
        self.turn_rad_s = (
            float(turn_fraction)
            * 2
            * d.wheel_radius_m
            * d.wheel_speed_limit_rad_s
            / d.effective_track_m
        )
        half_gap = self._min_gap(d) / 2.0
        self.inflation_m = min(d.half_width_m + float(opts["clearance_margin_m"]), half_gap - 0.05)
        self.reset()

    @classmethod
    def from_env(cls, env: Any, **options: Any) -> BaseAgent:
        """Build from ``env.unwrapped.description`` (a :class:`BaseDescription`)."""
        desc = getattr(env.unwrapped, "description", None)
        if not isinstance(desc, BaseDescription):
            raise ConfigError("env.unwrapped.description must be a BaseDescription (a base env)")
        return cls(desc, **options)

    @staticmethod
    def _min_gap(d: BaseDescription) -> float:
        b = d.bench_boxes_m
        gaps = []
        for i in range(len(b)):
            for j in range(len(b)):
                if i != j:
                    gx = max(b[j, 0] - b[i, 2], b[i, 0] - b[j, 2], 0.0)
                    gy = max(b[j, 1] - b[i, 3], b[i, 1] - b[j, 3], 0.0)
                    g = float(np.hypot(gx, gy))
                    if g > 0:
                        gaps.append(g)
        return min(gaps) if gaps else 10.0

    # ------------------------------------------------------------------ lifecycle
    def reset(self) -> None:
        """Forget the episode: belief back to an uninformed pose, action zero, no plan."""
        self.mu = np.zeros((self.order + 1, 3))
        self.covariance = np.diag(np.r_[[100.0] * 3, [1e-2] * (self.n - 3)])
        self.action = np.zeros(2)
        self.localised = False
        self.waypoints: list[np.ndarray] = []
        self.waypoint_index = 0
        self.stage = "localise"
        self.goal_pose: np.ndarray | None = None
        self._diag: dict[str, Any] = {}
        self._free_energy = 0.0
        self.routes: list[Any] = []
        self.route_index = 0
        self._turn_anchor: np.ndarray | None = None
        d = self.description
        if d.start_pose is not None:
            # a nominal start with a known spread: start the belief there, no search
            sd = np.maximum(np.asarray(d.start_pose_sd, dtype=float), 1e-3)
            self.mu[0] = np.asarray(d.start_pose, dtype=float)
            self.covariance[:3, :3] = np.diag(sd**2)
            self.localised = True
            self.stage = "travel"
            self._plan(d.dock_pose)

    # ------------------------------------------------------------------ perception
    def _obs(self, obs: dict[str, Any]) -> dict[str, Any]:
        L = self.description.n_landmarks
        out = {
            "wheel": np.asarray(obs["wheel_speed_rad_s"], dtype=float).reshape(2),
            "fresh": bool(int(np.asarray(obs.get("camera_fresh", 0)))),
            "visible": np.asarray(obs.get("landmark_visible", np.zeros(L)), dtype=bool).reshape(L),
            "bearing": np.asarray(
                obs.get("landmark_bearing_rad", np.zeros(L)), dtype=float
            ).reshape(L),
            "range": None,
            "gyro": None,
        }
        if self.range_precision is not None and "landmark_range_m" in obs:
            out["range"] = np.asarray(obs["landmark_range_m"], dtype=float).reshape(L)
        if self.description.use_gyro and "yaw_rate_rad_s" in obs:
            out["gyro"] = float(np.asarray(obs["yaw_rate_rad_s"]).reshape(-1)[0])
        return out

    def _landmark_terms(
        self, pose: np.ndarray, y: dict[str, Any]
    ) -> list[tuple[str, np.ndarray, np.ndarray, np.ndarray]]:
        """(channel, error, Jacobian of the prediction w.r.t. the pose, precision) per channel."""
        d = self.description
        vis = y["visible"]
        if not (y["fresh"] and vis.any()):
            return []
        lm = d.landmarks_m[vis]
        b, r = bearing_range(pose, lm, d.camera_offset_m)
        jb, jr = bearing_range_jacobian(pose, lm, d.camera_offset_m)
        terms = [
            (
                "landmark_bearing",
                np.asarray(wrap_angle(y["bearing"][vis] - b)),
                jb,
                np.full(len(lm), self.bearing_precision),
            )
        ]
        if y["range"] is not None:
            terms.append(
                ("landmark_range", y["range"][vis] - r, jr, np.full(len(lm), self.range_precision))
            )
        return terms

    def _velocity_terms(
        self, mu_flat: np.ndarray, y: dict[str, Any]
    ) -> list[tuple[str, np.ndarray, np.ndarray, np.ndarray]]:
        """Odometry, gyro and no-side-slip terms; Jacobians w.r.t. the full flattened belief."""
        h = mu_flat[2]
        rate = mu_flat[3:6]
        idx = [2, 3, 4, 5]
        g = self.model.predict_wheel_speeds(h, rate)
        G = np.zeros((2, self.n))
        G[:, idx] = self.model.predict_wheel_speeds_jacobian(h, rate)
        R = self.odometry_basis
        terms = [("odometry", R @ (y["wheel"] - g), R @ G, self.odometry_precision)]
        if y["gyro"] is not None:
            Jg = np.zeros((1, self.n))
            Jg[0, 5] = 1.0
            terms.append(
                ("gyro", np.array([y["gyro"] - rate[2]]), Jg, np.array([self.gyro_precision]))
            )
        Jl = np.zeros((1, self.n))
        Jl[0, idx] = self.model.lateral_residual_jacobian(h, rate)
        terms.append(
            (
                "lateral_slip",
                np.array([-self.model.lateral_residual(h, rate)]),
                Jl,
                np.array([self.lateral_precision]),
            )
        )
        return terms

    def _goal_rate(self, pose: np.ndarray) -> np.ndarray:
        """Attractor ``f(x)`` on the velocity order, world frame."""
        v, om = self._desired_body_velocity(pose)
        return pose_rate(pose, v, om, lateral_m_s=-self.model.icr_offset_m * om)

    def _desired_body_velocity(self, pose: np.ndarray) -> tuple[float, float]:
        d = self.description
        if not self.localised or self.waypoints == []:
            turn = float(self.options["search_turn_fraction"]) * self.turn_rad_s
            return 0.0, turn
        # advance along the waypoints
        while self.waypoint_index < len(self.waypoints) - 1:
            wp = self.waypoints[self.waypoint_index]
            if np.hypot(*(wp[:2] - pose[:2])) < float(self.options["waypoint_radius_m"]):
                self.waypoint_index += 1
            else:
                break
        final = self.waypoint_index == len(self.waypoints) - 1
        target = self.waypoints[self.waypoint_index]
        self.stage = "travel" if not final else "approach"
        if final and np.hypot(*(target[:2] - pose[:2])) < 0.25:
            self.stage = "align"
        v, om = attractor_velocity(
            pose,
            target if final else np.r_[target[:2], 0.0],
            final,
            tuple(self.options["gains"]),
            self.speed_m_s,
            self.turn_rad_s,
            reverse_beyond_rad=self.options["reverse_beyond_rad"],
        )
        v = self._hold_spot(pose, v, om)
        # keep both wheels inside the limit (scale v and omega together: same curvature)
        w = self.model.wheel_speeds(v, om)
        peak = float(np.max(np.abs(w)))
        cap = 0.95 * d.wheel_speed_limit_rad_s
        if peak > cap:
            v, om = v * cap / peak, om * cap / peak
        return v, om

    def _hold_spot(self, pose: np.ndarray, v: float, om: float) -> float:
        """Forward speed that holds a turn on the spot where it began.

        A skid steer turning on the spot in pybullet creeps along its heading (5-9 cm/s at
        0.3 rad/s, measured on the husky), enough to put its nose into a bench in a 1.8 m
        aisle. While the attractor asks for a pure turn, the believed position's offset from
        the turn's starting point along the heading is fed back, ``v = -2 k_rho along``
        (the lateral part cannot be driven by a differential drive and is left alone).
        """
        if v != 0.0 or om == 0.0:
            self._turn_anchor = None
            return v
        if self._turn_anchor is None:
            self._turn_anchor = np.asarray(pose[:2], dtype=float).copy()
        along = float((pose[:2] - self._turn_anchor) @ [np.cos(pose[2]), np.sin(pose[2])])
        k = 2.0 * float(self.options["gains"][0])
        return float(np.clip(-k * along, -self.speed_m_s, self.speed_m_s))

    def _localise(self, y: dict[str, Any]) -> bool:
        """Global pose from one frame: grid search over positions, then Gauss-Newton refinement."""
        d = self.description
        vis = y["visible"]
        need = 2 if y["range"] is not None else 3
        if not (y["fresh"] and vis.sum() >= need):
            return False
        lm = d.landmarks_m[vis]
        bounds = d.world_bounds_m
        gx, gy = np.meshgrid(
            np.arange(bounds[0], bounds[2], 0.1), np.arange(bounds[1], bounds[3], 0.1)
        )
        cam = np.stack([gx.ravel(), gy.ravel()], axis=1)  # candidate lens positions
        delta = lm[None, :, :] - cam[:, None, :]
        headings = np.arctan2(delta[..., 1], delta[..., 0]) - y["bearing"][vis][None, :]
        hbar = np.arctan2(np.sin(headings).mean(1), np.cos(headings).mean(1))
        cost = self.bearing_precision * np.sum(wrap_angle(headings - hbar[:, None]) ** 2, axis=1)
        if y["range"] is not None:
            rr = np.hypot(delta[..., 0], delta[..., 1])
            cost = cost + self.range_precision * np.sum(
                (rr - y["range"][vis][None, :]) ** 2, axis=1
            )
        best = None
        for k in np.argsort(cost)[:5]:
            pose = np.array(
                [
                    cam[k, 0] - d.camera_offset_m * np.cos(hbar[k]),
                    cam[k, 1] - d.camera_offset_m * np.sin(hbar[k]),
                    hbar[k],
                ]
            )
            for _ in range(8):
                H = np.zeros((3, 3))
                grad = np.zeros(3)
                for _, e, J, p in self._landmark_terms(pose, y):
                    H += J.T @ (p[:, None] * J)
                    grad -= J.T @ (p * e)
                step = -np.linalg.solve(H + 1e-6 * np.eye(3), grad)
                pose = pose + step
                pose[2] = wrap_angle(pose[2])
            chi2 = sum(float(np.sum(p * e * e)) for _, e, _, p in self._landmark_terms(pose, y))
            if best is None or chi2 < best[0]:
                best = (chi2, pose, H)
        chi2, pose, H = best
        dof = int(vis.sum()) * (2 if y["range"] is not None else 1) - 3
        if chi2 > 3.0 * max(dof, 1) + 10.0:
            return False
        self.mu[0] = pose
        body_v, body_om = self.model.body_velocity(y["wheel"])
        self.mu[1] = pose_rate(pose, body_v, body_om)
        if self.order == 2:
            self.mu[2] = 0.0
        cov = np.diag(np.r_[[1.0] * 3, [1e-2] * (self.n - 3)])
        cov[:3, :3] = np.linalg.inv(H + 1e-6 * np.eye(3))
        self.covariance = cov
        self.localised = True
        self._plan_when_fixed()
        return True

    def _plan_when_fixed(self) -> None:
        """Plan once the position is known to ``fix_sd_m`` (largest standard deviation)."""
        sd = float(np.sqrt(np.max(np.linalg.eigvalsh(self.covariance[:2, :2]))))
        if sd < float(self.options["fix_sd_m"]):
            d = self.description
            self._plan(d.dock_pose if self.goal_pose is None else self.goal_pose)

    def _plan(self, goal_pose: np.ndarray) -> None:
        """Waypoints from the believed position to a pre-goal point, then the goal pose.

        ``planner="direct"``: the shortest path. ``"efe"``: the candidate routes of
        :meth:`candidate_routes` scored by :meth:`score_routes`, the least expected free energy
        taken (kept in ``routes`` and ``route_index``).
        """
        goal = np.asarray(goal_pose, dtype=float)
        if self.options["planner"] == "efe":
            self.routes = self.score_routes(self.candidate_routes(goal), goal)
            g = [r.scores["expected_free_energy"] for r in self.routes]
            self.route_index = int(np.argmin(g))
            path = [p for p in self.routes[self.route_index].waypoints[:-1]]
        else:
            path = self.candidate_routes(goal)[0][:-1]
        self.waypoints = [np.r_[p, 0.0] for p in path] + [goal.copy()]
        self.waypoint_index = 0

    def _obstacles(self) -> np.ndarray:
        d = self.description
        post_boxes = np.c_[d.landmarks_m - 0.05, d.landmarks_m + 0.05]
        return np.vstack([d.bench_boxes_m, post_boxes])

    def _inflation(self) -> np.ndarray:
        """Per obstacle growth: benches by ``inflation_m``; posts (boxes 5 cm round the post)
        by as much but at most so that a 4 cm gap stays between the grown boxes of the two
        closest posts -- the row-end posts at an aisle mouth stand 0.9 m apart, and growing
        them by the full bench margin would close the aisle to the planner."""
        d = self.description
        lm = d.landmarks_m
        gap = np.inf
        if len(lm) > 1:
            dist = np.hypot(*(lm[:, None, :] - lm[None, :, :]).transpose(2, 0, 1))
            gap = float(np.min(dist[np.triu_indices(len(lm), 1)]))
        post = max(min(self.inflation_m, gap / 2 - 0.05 - 0.02), d.half_width_m)
        return np.r_[np.full(len(d.bench_boxes_m), self.inflation_m), np.full(len(lm), post)]

    def candidate_routes(self, goal_pose: np.ndarray) -> list[np.ndarray]:
        """Routes ``(k, 2)`` from the believed position to the goal's position: the shortest
        path (first) through the pre-goal point ``dock_approach_m`` before the goal, then the
        shortest through each aisle centre (:func:`blanket.agent.efe.aisle_centres`), without
        repeats."""
        from blanket.agent.efe import aisle_centres

        goal = np.asarray(goal_pose, dtype=float)
        approach = goal[:2] - float(self.options["dock_approach_m"]) * np.array(
            [np.cos(goal[2]), np.sin(goal[2])]
        )
        boxes, grow = self._obstacles(), self._inflation()
        start = self.mu[0, :2].copy()
        first = plan_waypoints(start, approach, boxes, grow)
        routes = [_drop_collinear(np.array([start] + first + [goal[:2]]))[1:]]
        d = self.description
        for via in aisle_centres(d.bench_boxes_m):
            # the aisle is driven end to end on its centre line, from a point a base length
            # clear of its benches and posts at each end: a long base turns out there, not
            # beside the row-end posts
            near = np.abs(d.bench_boxes_m[:, [1, 3]] - via[1]).min(axis=1) < 1.0
            xs = np.r_[d.bench_boxes_m[near][:, [0, 2]].ravel(), via[0]]
            posts = d.landmarks_m[np.abs(d.landmarks_m[:, 1] - via[1]) < 1.0]
            xs = np.r_[xs, posts[:, 0]] if len(posts) else xs
            margin = 2.0 * d.half_length_m + 0.1
            ends = [np.array([xs.min() - margin, via[1]]), np.array([xs.max() + margin, via[1]])]
            ends.sort(key=lambda e: float(np.hypot(*(e - start))))
            legs = [start, ends[0], ends[1], approach]
            on_line = abs(approach[1] - via[1]) < 0.5
            if on_line and min(ends[0][0], ends[1][0]) <= approach[0] <= max(
                ends[0][0], ends[1][0]
            ):
                legs = [start, ends[0], approach]  # the approach point is on this aisle's line
            pts = [
                p
                for a, b in zip(legs[:-1], legs[1:], strict=True)
                for p in plan_waypoints(a, b, boxes, grow)
            ]
            r = _drop_collinear(np.array([start] + pts + [goal[:2]]))[1:]
            if not any(len(r) == len(o) and np.allclose(r, o) for o in routes):
                routes.append(r)
        return routes

    def route_drift_var_per_s(self) -> np.ndarray:
        """Dead-reckoning variance per second of ``(x, y, heading)`` in the agent's own model.

        The pose drift prior (``pose_drift_sd_m`` per control step) plus the odometry noise
        carried into the pose: ``var(v) = r^2 / (2 P_common)``, ``var(omega) = 2 r^2 /
        (T^2 P_diff)`` (combined with the gyro's precision when fitted), each white over a
        control step, so ``var dt`` per second.
        """
        d = self.description
        r, T, dt = d.wheel_radius_m, d.effective_track_m, self.dt
        var_v = r**2 / (2.0 * self.odometry_precision[0])
        var_w = 2.0 * r**2 / (T**2 * self.odometry_precision[1])
        if d.use_gyro:
            var_w = 1.0 / (1.0 / var_w + self.gyro_precision)
        drift = float(self.options["pose_drift_sd_m"]) ** 2 / dt
        return np.array([drift + var_v * dt, drift + var_v * dt, drift + var_w * dt])

    def score_routes(self, routes: list[np.ndarray], goal_pose: np.ndarray) -> list[Any]:
        """Predict the belief along each route over one horizon and score its expected free
        energy (:func:`blanket.agent.efe.predict_route`,
        :func:`blanket.agent.efe.expected_free_energy`); returns the
        :class:`~blanket.agent.efe.RoutePrediction` objects with ``scores`` filled in."""
        from blanket.agent.efe import expected_free_energy, predict_route

        d = self.description
        goal = np.asarray(goal_pose, dtype=float)
        drift = self.route_drift_var_per_s()
        bvar = 1.0 / self.bearing_precision
        rvar = None if self.range_precision is None else 1.0 / self.range_precision
        kw = dict(
            speed_m_s=self.speed_m_s,
            turn_rad_s=self.turn_rad_s,
            frame_dt_s=1.0 / d.camera_hz,
            drift_var_per_s=drift,
            landmarks_m=d.landmarks_m,
            bench_boxes_m=d.bench_boxes_m,
            camera_offset_m=d.camera_offset_m,
            fov_rad=d.camera_fov_rad,
            max_range_m=d.camera_range_m,
            bearing_var=bvar,
            range_var=rvar,
        )
        mean, cov = self.mu[0].copy(), self.covariance[:3, :3].copy()
        alone = [predict_route(mean, cov, r, goal[2], **kw) for r in routes]
        horizon = max(p.arrival_s for p in alone)
        preds = [predict_route(mean, cov, r, goal[2], horizon_s=horizon, **kw) for r in routes]
        pref_cov = np.diag(np.asarray(self.options["preferred_sd"], dtype=float) ** 2)
        for p in preds:
            arrival_var = drift[0] * p.arrival_s / self.speed_m_s**2
            expected_free_energy(
                p,
                goal,
                pref_cov,
                float(self.options["preferred_arrival_sd_s"]),
                max(arrival_var, 1e-6),
                bvar,
                rvar,
                d.camera_range_m,
            )
        return preds

    def set_goal(self, goal_pose: np.ndarray) -> None:
        """Replace the goal pose ``(x_m, y_m, heading_rad)`` (default: the dock) and replan.

        Planning uses the current belief; before the base has localised the goal is stored
        and planned for at localisation.
        """
        goal = np.asarray(goal_pose, dtype=float).reshape(-1)
        if goal.shape != (3,) or not np.all(np.isfinite(goal)):
            raise ConfigError(f"goal_pose must be (x_m, y_m, heading_rad), got {goal_pose!r}")
        self.goal_pose = goal
        if self.localised and self.waypoints:
            self._plan(goal)

    def perceive(self, obs: dict[str, Any]) -> None:
        """One perception update from an observation (prediction, then curvature-scaled descent)."""
        y = self._obs(obs)
        # prediction by the generalized motion D mu~ (exact for the linear shift: expm(D dt))
        flat_prev = self.mu.ravel()
        pred = self.transition @ flat_prev
        pred[2] = wrap_angle(pred[2])
        cov_pred = self.transition @ self.covariance @ self.transition.T + self.process_covariance
        prior_precision = np.linalg.inv(cov_pred)
        if not self.localised and self._localise(y):
            pred = self.mu.ravel().copy()
            prior_precision = np.linalg.inv(self.covariance)
        m = pred.copy()
        goal_P = float(self.options["goal_precision"])
        H_evidence = prior_precision
        for _ in range(int(self.options["perception_iterations"])):
            terms = self._velocity_terms(m, y)
            if self.localised:
                for name, e, Jp, p in self._landmark_terms(m[:3], y):
                    J = np.zeros((len(e), self.n))
                    J[:, :3] = Jp
                    terms.append((name, e, J, p))
            errors = [e for _, e, _, _ in terms]
            jacobians = [-J for _, _, J, _ in terms]  # d e / d mu = -dg/dmu
            precisions = [p for _, _, _, p in terms]  # diagonal, as vectors
            grad = belief_gradient(errors, jacobians, precisions)  # sum J'Pe
            H = belief_curvature(jacobians, precisions)  # sum J'PJ (Gauss-Newton)
            dm = m - pred
            dm[2] = wrap_angle(dm[2])
            grad += prior_precision @ dm
            H += prior_precision
            H_evidence = H.copy()
            f = self._goal_rate(m[:3])
            grad[3:6] += goal_P * (m[3:6] - f)
            H[3:6, 3:6] += goal_P * np.eye(3)
            step = -np.linalg.solve(H, grad)
            m = m + step
            m[2] = wrap_angle(m[2])
        self.mu = m.reshape(self.order + 1, 3)
        self.covariance = np.linalg.inv(H_evidence)
        self.covariance = 0.5 * (self.covariance + self.covariance.T)
        self._last_H = H
        if self.localised and not self.waypoints:
            self._plan_when_fixed()
        # diagnostics: errors and free energy at the new belief
        terms = self._velocity_terms(m, y)
        if self.localised:
            terms += [(n, e, J, p) for n, e, J, p in self._landmark_terms(m[:3], y)]
        f = self._goal_rate(m[:3])
        e_goal = m[3:6] - f
        dm = m - pred
        dm[2] = wrap_angle(dm[2])
        F = 0.5 * float(dm @ prior_precision @ dm) + 0.5 * goal_P * float(e_goal @ e_goal)
        L = self.description.n_landmarks
        diag: dict[str, Any] = {}
        for name in ("landmark_bearing", "landmark_range"):
            diag[f"prediction_error.{name}"] = np.full(L, np.nan)
            diag[f"precision.{name}"] = np.zeros(L)
        F += free_energy([e for _, e, _, _ in terms], [p for _, _, _, p in terms])
        for name, e, _, p in terms:
            if name.startswith("landmark"):
                diag[f"prediction_error.{name}"][y["visible"]] = e
                diag[f"precision.{name}"][y["visible"]] = p
            else:
                diag[f"prediction_error.{name}"] = e
                diag[f"precision.{name}"] = p
        diag["prediction_error.goal"] = e_goal
        diag["precision.goal"] = np.full(3, goal_P)
        self._free_energy = F
        self._diag = diag
        self._y = y

    # ------------------------------------------------------------------ action
    def _update_action(self) -> np.ndarray:
        """Curvature-scaled descent of F in the wheel speeds.

        The sensations that action changes are the odometry (velocity control: ``dy/da = I``,
        here in the rotated basis ``R``) and the gyro (``d omega / da = (-r/T, r/T)``). With
        ``A`` their action Jacobians, ``G`` their belief Jacobians and the belief relaxed, the
        curvature in the action is the Schur complement
        ``H_a = A' P A - A' P G H^-1 G' P A`` and the step ``da = -gain H_a^-1 A' P e``.
        """
        y = self._y
        m = self.mu.ravel()
        d = self.description
        E, G, P, A = [], [], [], []
        for name, e, J, p in self._velocity_terms(m, y):
            if name == "odometry":
                E.append(e), G.append(J), P.append(p), A.append(self.odometry_basis)
            elif name == "gyro":
                k = d.wheel_radius_m / d.effective_track_m
                E.append(e), G.append(J), P.append(p), A.append(np.array([[-k, k]]))
        e, Gm, p, Am = np.concatenate(E), np.vstack(G), np.concatenate(P), np.vstack(A)
        PA = p[:, None] * Am
        H_a = Am.T @ PA - PA.T @ Gm @ np.linalg.solve(self._last_H, Gm.T @ PA)
        dF_da = PA.T @ e
        step = -np.linalg.solve(H_a + 1e-9 * np.eye(2), dF_da)
        lim = d.wheel_speed_limit_rad_s
        self.action = np.clip(y["wheel"] + float(self.options["action_gain"]) * step, -lim, lim)
        if not self.localised:
            # searching: no pose yet, the attractor is a turn on the spot in body terms
            _, om = self._desired_body_velocity(m[:3])
            self.action = self.model.wheel_speeds(0.0, om)
        return self.action

    def act(self, obs: dict[str, Any]) -> np.ndarray:
        """Perceive, then act: returns ``(left, right)`` wheel speeds in rad/s (float32)."""
        self.perceive(obs)
        return self._update_action().astype(np.float32)

    def diagnostics(self) -> dict[str, Any]:
        """Internal state for logs: belief, belief_sd, free_energy, errors and precisions."""
        sd = np.sqrt(np.clip(np.diag(self.covariance), 0.0, None)).reshape(self.order + 1, 3)
        out: dict[str, Any] = {
            "belief": self.mu.copy(),
            "belief_sd": sd,
            "free_energy": float(self._free_energy),
            "localised": bool(self.localised),
            "stage": self.stage,
            "waypoint_index": int(self.waypoint_index),
        }
        out.update({k: np.array(v, dtype=float) for k, v in self._diag.items()})
        return out


def run_base_episode(env: Any, agent: BaseAgent, seed: int | None = None) -> dict[str, Any]:
    """One episode through :func:`blanket.rollout.rollout`; summary of the outcome.

    Returns
    -------
    dict
        ``success``, ``time_to_success_s``, ``final_error_m``, ``final_heading_error_rad``
        (absolute), ``contact`` (any bench contact), ``steps``.
    """
    from blanket.rollout import rollout

    result = rollout(env, agent, seeds=[seed])[0]
    return {
        "success": result.success,
        "time_to_success_s": result.time_to_success_s,
        "final_error_m": result.final_error_m,
        "final_heading_error_rad": result.final_heading_error_rad,
        "contact": result.contact,
        "steps": result.steps,
    }


__all__ += ["run_base_episode"]
