"""Calibration motions for ``learn_body``: ``body_calibration_episodes``.

A robot that learns its body from what its camera sees of the tool tip learns only what its
postures show. Reaching for targets over one bench, an arm keeps similar postures, and two
links can point nearly the same way in all of them (the panda's base offset and upper arm
when the shoulder is nearly upright): the camera then sees their sum but not how it splits.
With ``body_calibration_episodes = N`` the agent spends its first ``N`` episodes calibrating
instead of reaching for the target: it moves the tip to a few postures chosen so that the
camera informs every segment's length factor, and holds each for
:data:`CALIBRATION_HOLD_S`, learning all the while (``learn_body``).

The postures are an optimal experimental design (Fedorov 1972, *Theory of Optimal
Experiments*; Pukelsheim 2006, *Optimal Design of Experiments*, SIAM, ch. 6): the tip's pixel
is linear in the segments' factors ``s`` (:meth:`blanket.body.ArmModel.tip_length_jacobian`),
so a frame at posture ``q`` adds Fisher information ``G(q)' R^-1 G(q)`` with
``G = d pi / dx . D(q) B`` and ``R`` the pixel noise. The design maximises the smallest
eigenvalue of the information accumulated so far plus the new postures' (E-optimality: the
largest posterior variance of any unit combination of the factors, so of the worst
segment's, is made smallest; Pukelsheim 2006, sec. 6.4), in factor units, so every segment
is learned to about the same relative accuracy. :func:`e_optimal_design` picks greedily and
then exchanges single points while the criterion grows (Fedorov's exchange algorithm, 1972,
ch. 2).

The candidates are random postures inside the joint limits (a tenth of each joint's range
kept clear) whose tip the camera sees well inside the image and that keep the tip above the
arm's base, with its wrist and tip clear of its first links (a folded arm hits itself).
The agent reaches a Cartesian goal, not a posture: the target is the tip at the candidate
posture, and the attractor's null-space term pulls towards the candidate posture (its home
posture while the hold lasts), but a redundant arm still lands where its attractor takes it
within the hold. Each candidate is therefore followed with the model's own attractor
(:func:`blanket.agent.attractor.damped_least_squares_attractor`) from where the previous
posture left the arm, and the information is computed at the posture reached, counting
the frames after the simulated tip settles fully and those on the way a third. Each episode
plans its postures from its first observation, with the information learned so far; the
random candidates come from a generator seeded once per agent (deterministic runs).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from blanket.agent.attractor import damped_least_squares_attractor
from blanket.errors import ConfigError

__all__ = [
    "CALIBRATION_HOLD_S",
    "BodyCalibration",
    "e_optimal_design",
    "skeleton_clearance",
    "smallest_eigenvalue",
]

#: Time each calibration posture is held (s), the move to it included: about 1 s to arrive
#: and settle, then still frames, which weigh most (moving frames weigh less in learning).
CALIBRATION_HOLD_S = 1.3
#: Random candidate postures per episode's plan.
CALIBRATION_CANDIDATES = 200
#: Fraction of each joint's range kept clear of its limits by the candidates.
_LIMIT_MARGIN = 0.1
#: Fraction of the image's width and height kept clear at its edges by the candidates' tips.
_IMAGE_MARGIN = 0.1
#: Least height of a candidate's tip above the base (m).
_MIN_TIP_HEIGHT_M = 0.05
#: Time step of the attractor's simulated approach to a candidate (s).
_SIM_DT_S = 0.02
#: Least distance of the wrist and the tip from the links two or more joints before them
#: (m): a folded arm can hit itself (a proxy for a collision check, common practice, no
#: source).
_MIN_CLEARANCE_M = 0.2
#: Largest distance from a candidate's target at which the simulated approach counts as
#: arrived (m).
_ARRIVED_M = 0.02
#: Distance from the target at which the tip counts as still (m): the frames after it count
#: fully in a candidate's information.
_SETTLED_M = 0.005


def _segment_distance(p: np.ndarray, a: np.ndarray, b: np.ndarray) -> float:
    """Distance from point ``p`` to the segment ``[a, b]``."""
    ab = b - a
    t = float(np.clip((p - a) @ ab / max(float(ab @ ab), 1e-12), 0.0, 1.0))
    return float(np.linalg.norm(p - (a + t * ab)))


def skeleton_clearance(points: np.ndarray) -> float:
    """Least distance of the last two points of an arm's skeleton (wrist and tip) from the
    segments between the points before them, the two segments next to each left out.

    ``points`` are the joint origins along the chain and the tip, (k + 1, 3)
    (:meth:`blanket.body.ArmModel.chain_points`); the skeleton starts at the base's origin
    and counts coincident points once. ``inf`` when no pair is far enough apart in the
    chain."""
    P = np.vstack([np.zeros(3), np.asarray(points, dtype=float)])  # from the base's origin
    # coincident points (joints at one place) are one point of the skeleton
    keep = np.r_[True, np.linalg.norm(np.diff(P, axis=0), axis=1) > 1e-6]
    P = P[keep]
    k = len(P) - 1
    best = np.inf
    for end, last in ((k, k - 3), (k - 1, k - 4)):
        for i in range(0, last + 1):
            best = min(best, _segment_distance(P[end], P[i], P[i + 1]))
    return best


def smallest_eigenvalue(information: np.ndarray) -> float:
    """The E-optimality criterion: the smallest eigenvalue of a symmetric information
    matrix (Pukelsheim 2006, sec. 6.4)."""
    return float(np.linalg.eigvalsh(0.5 * (information + information.T))[0])


def e_optimal_design(information: np.ndarray, candidates: np.ndarray, count: int) -> list[int]:
    """``count`` distinct candidates whose information, added to ``information``,
    maximises the smallest eigenvalue of the sum (E-optimality).

    Greedy: each point is the one that raises the criterion most given those already chosen;
    then Fedorov's exchange (Fedorov 1972, *Theory of Optimal Experiments*, ch. 2): a chosen
    point is swapped for an unchosen one while that raises the criterion, until no swap does.

    Parameters
    ----------
    information : numpy.ndarray
        Information already held (the prior's and the data's), (k, k).
    candidates : numpy.ndarray
        Each candidate's information, (c, k, k).
    count : int
        Points to choose, ``1 <= count <= c``.

    Returns
    -------
    list of int
        Indices into ``candidates``, in the order chosen.
    """
    M0 = np.asarray(information, dtype=float)
    C = np.asarray(candidates, dtype=float)
    if not 1 <= count <= len(C):
        raise ValueError(f"count must be in 1..{len(C)}, got {count}")
    chosen: list[int] = []
    M = M0.copy()
    for _ in range(count):
        scores = [-np.inf if i in chosen else smallest_eigenvalue(M + C[i]) for i in range(len(C))]
        best = int(np.argmax(scores))
        chosen.append(best)
        M = M + C[best]
    value = smallest_eigenvalue(M)
    improved = True
    while improved:
        improved = False
        for slot in range(count):
            without = M - C[chosen[slot]]
            for i in range(len(C)):
                if i in chosen:
                    continue
                trial = smallest_eigenvalue(without + C[i])
                if trial > value * (1.0 + 1e-9) + 1e-300:
                    chosen[slot], M, value, improved = i, without + C[i], trial, True
                    without = M - C[chosen[slot]]
    return chosen


class BodyCalibration:
    """The calibration motions of the first ``episodes`` episodes (see the module docstring).

    Attributes
    ----------
    remaining : int
        Episodes of calibration still to come (the current one included while it runs).
    plan : numpy.ndarray or None
        The current episode's targets (m, base frame), (p, 3), once planned.
    postures : numpy.ndarray or None
        The postures the plan expects the arm to reach, (p, n).
    homes : numpy.ndarray or None
        The candidate postures whose tips are the targets, (p, n).
    home : numpy.ndarray or None
        The posture the attractor's null-space term pulls towards now (the current
        candidate's: a redundant arm turns its wrist towards it as well).
    """

    def __init__(self, model: Any, episodes: int, seed: int = 0) -> None:
        if model.camera is None:
            raise ConfigError("agent option body_calibration_episodes needs an env with a camera")
        self.remaining = int(episodes)
        self._rng = np.random.default_rng(seed)
        self._hold_steps = max(1, round(CALIBRATION_HOLD_S / model.dt))
        self._per_episode = max(1, int(model.description.episode_s // CALIBRATION_HOLD_S))
        self.plan: np.ndarray | None = None
        self.postures: np.ndarray | None = None
        self.homes: np.ndarray | None = None
        self.home: np.ndarray | None = None
        self._steps = 0

    @property
    def active(self) -> bool:
        """Whether this episode calibrates."""
        return self.remaining > 0

    def new_episode(self) -> None:
        """An episode ends: one fewer to calibrate if this one did."""
        if self.plan is not None:
            self.remaining -= 1
        self.plan = None
        self.postures = None
        self.homes = None
        self.home = None
        self._steps = 0

    def goal_observation(
        self, obs: Mapping[str, Any], model: Any, learner: Any
    ) -> Mapping[str, Any]:
        """``obs`` with ``target_position_m`` replaced by the current calibration target (a
        new dict); ``obs`` itself when calibration is over."""
        if not self.active:
            return obs
        if self.plan is None:
            q0 = np.asarray(obs["joint_angle_rad"], dtype=float)
            self.plan, self.postures, self.homes = self._design(model, learner, q0)
        i = min(self._steps // self._hold_steps, len(self.plan) - 1)
        self._steps += 1
        self.home = self.homes[i]
        out = dict(obs)
        out["target_position_m"] = self.plan[i].copy()
        return out

    # -- the design ------------------------------------------------------------------------
    def _candidates(self, model: Any) -> np.ndarray:
        d = model.description
        lo = np.maximum(d.lower_rad, -np.pi)
        hi = np.minimum(d.upper_rad, np.pi)
        pad = _LIMIT_MARGIN * (hi - lo)
        qs = self._rng.uniform(lo + pad, hi - pad, size=(CALIBRATION_CANDIDATES, d.n_joints))
        return np.array([q for q in qs if self._usable(model, q)])

    @staticmethod
    def _usable(model: Any, q: np.ndarray) -> bool:
        """A posture whose tip the camera sees well inside the image, above the base, with
        the wrist and tip clear of the arm's first links, inside the limits' margin."""
        d = model.description
        lo = np.maximum(d.lower_rad, -np.pi)
        hi = np.minimum(d.upper_rad, np.pi)
        pad = 0.5 * _LIMIT_MARGIN * (hi - lo)
        if np.any(q < lo + pad) or np.any(q > hi - pad):
            return False
        points = model.body.chain_points(q)
        tip = points[-1]
        if tip[2] < _MIN_TIP_HEIGHT_M or skeleton_clearance(points) < _MIN_CLEARANCE_M:
            return False
        camera = model.camera
        T = np.asarray(camera.base_from_camera, dtype=float)
        if float(T[:3, 2] @ (tip - T[:3, 3])) <= 0.05:  # behind or at the camera
            return False
        u, v = camera.project(tip)
        mu, mv = _IMAGE_MARGIN * camera.width_px, _IMAGE_MARGIN * camera.height_px
        return bool(mu <= u <= camera.width_px - mu and mv <= v <= camera.height_px - mv)

    def _reach(
        self, model: Any, q: np.ndarray, home: np.ndarray, target: np.ndarray
    ) -> tuple[np.ndarray, float]:
        """Where the model's attractor takes the arm from ``q`` towards ``target`` within the
        hold time (joint limits clamped), and when the tip comes within
        :data:`_SETTLED_M` of the target (s; the hold time if it never does)."""
        body = model.body
        lo, hi = model.limits
        params = model.kernel_constants[4:9]
        f, F = np.empty(model.n), np.empty((model.n, model.n))
        q = q.copy()
        zero = np.zeros(3)
        arrival = CALIBRATION_HOLD_S
        steps = int(CALIBRATION_HOLD_S / _SIM_DT_S)
        for k in range(steps):
            tip, J = body.tip_position_and_jacobian(q)
            if arrival == CALIBRATION_HOLD_S and np.linalg.norm(tip - target) < _SETTLED_M:
                arrival = k * _SIM_DT_S
            ok = damped_least_squares_attractor(
                np.ascontiguousarray(J), tip, target, zero, q, home, lo, hi, params, f, F
            )
            if not ok:
                break
            q = np.clip(q + _SIM_DT_S * f, lo, hi)
        return q, arrival

    def _information(
        self, model: Any, learner: Any, q: np.ndarray, arrival_s: float
    ) -> np.ndarray | None:
        """Fisher information on the segments' factors of one hold at ``q`` reached after
        ``arrival_s`` (None when the tip would not be seen): the still frames count fully,
        those on the way a third (moving frames weigh less in learning; a third is about
        their weight at the tip's usual speed, measured, from the frame-time term)."""
        if not self._usable(model, q):
            return None
        tip, D = model.body.tip_length_jacobian(q)
        _, dpix = model.camera.project_with_jacobian(tip)
        B = learner.length_map[:, 1:]
        G = dpix @ D @ B
        frames = model.camera.rate_hz * (CALIBRATION_HOLD_S - arrival_s + arrival_s / 3.0)
        return frames * G.T @ G / model.camera.pixel_noise_px**2

    def _design(
        self, model: Any, learner: Any, q0: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The episode's targets and the postures expected: greedy E-optimal from the
        information held, each candidate's information where the attractor lands from the
        previous posture."""
        K = learner.n_length - 1
        C = np.hstack([np.ones((K, 1)), np.eye(K)])
        # information on the segments' factors: the data's and the user's prior (not the
        # re-estimated spreads, which would let a segment pruned to the shared scale go
        # unexamined)
        n = learner.n_length
        info = (learner.precision - learner.prior_precision + learner.initial_prior_precision)[
            :n, :n
        ]
        held = np.linalg.inv(C @ np.linalg.inv(info) @ C.T)
        candidates = self._candidates(model)
        targets, postures, homes = [], [], []
        q = q0
        for _ in range(self._per_episode):
            infos, reached, goals, used = [], [], [], []
            for qc in candidates:
                goal = model.body.tip_position(qc)
                qr, arrival = self._reach(model, q, qc, goal)
                if np.linalg.norm(model.body.tip_position(qr) - goal) > _ARRIVED_M:
                    continue
                info = self._information(model, learner, qr, arrival)
                if info is not None:
                    infos.append(info)
                    reached.append(qr)
                    goals.append(goal)
                    used.append(qc)
            if not infos:
                break
            best = e_optimal_design(held, np.array(infos), 1)[0]
            held = held + infos[best]
            targets.append(goals[best])
            postures.append(reached[best])
            homes.append(used[best])
            q = reached[best]
        if not targets:  # nothing usable: hold still where the episode started
            return model.body.tip_position(q0)[None, :], q0[None, :], q0[None, :]
        return np.array(targets), np.array(postures), np.array(homes)
