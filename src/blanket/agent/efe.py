"""Expected free energy of candidate routes for a mobile base (pure functions).

A route is scored by the expected free energy of the policy "drive along this route to the
dock", in its risk-plus-ambiguity form (Friston, Rigoli, Ognibene, Mathys, Fitzgerald & Pezzulo
2015, "Active inference and epistemic value", Cogn Neurosci 6(4); risk over hidden states as in
Da Costa, Parr, Sajid, Veselic, Neacsu & Friston 2020, "Active inference on discrete
state-spaces: a synthesis", J Math Psychol 99), here with Gaussian densities:

    G(pi) = KL[q(s_T|pi) || p*(s)] + KL[q(t_a|pi) || p*(t)] + sum_k KL[q(o_k|pi) || p*(o)]
            + sum_k E_{q(s_k|pi)} H[p(o_k|s_k)]

the first three terms the risk, the last the ambiguity (:func:`expected_free_energy`).

- ``q(s_k|pi) = N(m_k, Sigma_k)`` is the predicted belief over the pose ``(x, y, heading)``
  at camera frame ``k``, from the linearised Gaussian model the agent filters with: an
  extended-Kalman predict step with the motion Jacobian and the agent's dead-reckoning noise,
  and an update with the range-bearing Jacobians
  (:func:`blanket.planar_motion.bearing_range_jacobian`) of the posts that would be in view
  from the predicted mean (Thrun, Burgard & Fox 2005, *Probabilistic Robotics*, table 3.3);
  :func:`predict_route`. All candidates are compared over one horizon (the longest route's
  arrival; a shorter one stands at the dock for the rest).
- ``p*(s) = N(dock, Sigma*)``: the preferred (dock) density; the risk is taken at the horizon,
  after the information gathered on the way has shaped ``Sigma_T``. ``p*(t) = N(0, sd*^2)``
  over the arrival time ``t_a``: a preference for arriving soon. Without it nothing in ``G``
  prices time, and a route with posts in view always wins, however sure the start.
- outcomes: at every frame the camera reports a bearing and a range for each mapped post. A
  post in view is read with Gaussian noise, ``H[p(o|s)] = 1/2 ln(2 pi e sigma^2)``; a post
  out of view tells nothing about the pose, its report spread uniformly over the sensor's span
  (entropy ``ln(2 pi)`` for a bearing, ``ln(range_max)`` for a range). The preferred outcome
  density ``p*(o)`` is that flat one: the base has no wish about what the camera sees.

For a linear-Gaussian measurement the expected information gain is
``1/2 ln(det Sigma_prior / det Sigma_post)`` (:func:`information_gain`), the mutual information
of a Gaussian channel (Cover & Thomas 2006, *Elements of Information Theory*, 2nd ed.,
sec. 9.1), and equals ``H[q(o)] - E_q H[p(o|s)]``. So per frame the camera's two terms add up
to ``L H_out - IG_k``, and on one horizon routes differ by
``KL_pose + KL_time - sum_k IG_k``: a route earns its length back in information gain only
when the belief is unsure (the tests check this decomposition and every formula against
sampling).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from blanket.planar_motion import (
    bearing_range,
    bearing_range_jacobian,
    camera_position,
    segment_hits_box,
    wrap_angle,
)

__all__ = [
    "gaussian_entropy",
    "gaussian_kl",
    "gaussian_kl_mean_gradient",
    "information_gain",
    "update_covariance",
    "motion_jacobian",
    "visible_posts",
    "aisle_centres",
    "uniform_entropy",
    "RoutePrediction",
    "predict_route",
    "expected_free_energy",
]


def gaussian_entropy(cov: np.ndarray) -> float:
    """Differential entropy of ``N(m, Sigma)``: ``H = 1/2 ln det(2 pi e Sigma)`` (nats).

    Cover & Thomas 2006, *Elements of Information Theory*, 2nd ed., theorem 8.4.1.
    """
    c = np.atleast_2d(np.asarray(cov, dtype=float))
    sign, logdet = np.linalg.slogdet(2.0 * np.pi * np.e * c)
    if sign <= 0:
        raise ValueError("covariance must be positive definite")
    return 0.5 * float(logdet)


def uniform_entropy(width: float) -> float:
    """Differential entropy of a uniform density on an interval of ``width``: ``ln(width)``.

    Cover & Thomas 2006, example 8.1.1.
    """
    return float(np.log(width))


def gaussian_kl(
    mean_q: np.ndarray, cov_q: np.ndarray, mean_p: np.ndarray, cov_p: np.ndarray
) -> float:
    """``KL[N(m_q, S_q) || N(m_p, S_p)]`` in nats.

    ``KL = 1/2 [ tr(S_p^-1 S_q) + (m_p - m_q)' S_p^-1 (m_p - m_q) - k + ln(det S_p / det S_q) ]``
    (Rasmussen & Williams 2006, *Gaussian Processes for Machine Learning*, eq. A.23). A heading
    component should be wrapped by the caller (``mean_q - mean_p`` is used as given).
    """
    mq, mp = np.atleast_1d(mean_q).astype(float), np.atleast_1d(mean_p).astype(float)
    sq, sp = np.atleast_2d(cov_q).astype(float), np.atleast_2d(cov_p).astype(float)
    k = len(mq)
    d = mp - mq
    sp_inv_sq = np.linalg.solve(sp, sq)
    maha = float(d @ np.linalg.solve(sp, d))
    _, ld_p = np.linalg.slogdet(sp)
    _, ld_q = np.linalg.slogdet(sq)
    return 0.5 * (float(np.trace(sp_inv_sq)) + maha - k + ld_p - ld_q)


def gaussian_kl_mean_gradient(
    mean_q: np.ndarray, mean_p: np.ndarray, cov_p: np.ndarray
) -> np.ndarray:
    """Gradient of :func:`gaussian_kl` in ``m_q``: ``S_p^-1 (m_q - m_p)`` (from the quadratic)."""
    d = np.atleast_1d(mean_q).astype(float) - np.atleast_1d(mean_p).astype(float)
    return np.linalg.solve(np.atleast_2d(cov_p).astype(float), d)


def update_covariance(cov: np.ndarray, jacobian: np.ndarray, noise_var: np.ndarray) -> np.ndarray:
    """Posterior covariance of a linear(ised) Gaussian measurement, information form.

    ``Sigma_post = (Sigma^-1 + J' R^-1 J)^-1`` with ``R = diag(noise_var)`` (the Kalman update
    of the covariance, Thrun et al. 2005, table 3.3, written with the information matrix).
    """
    P = np.linalg.inv(np.asarray(cov, dtype=float))
    J = np.atleast_2d(np.asarray(jacobian, dtype=float))
    r = np.atleast_1d(np.asarray(noise_var, dtype=float))
    post = np.linalg.inv(P + J.T @ (J / r[:, None]))
    return 0.5 * (post + post.T)


def information_gain(cov: np.ndarray, jacobian: np.ndarray, noise_var: np.ndarray) -> float:
    """Expected information gain of a linear-Gaussian measurement ``o = J s + e, e ~ N(0, R)``.

    ``IG = I(s; o) = 1/2 ln det(I + R^-1 J Sigma J')`` which equals
    ``1/2 ln(det Sigma_prior / det Sigma_post)`` (the mutual information of a Gaussian channel,
    Cover & Thomas 2006, sec. 9.1; the determinant identity is Sylvester's).
    """
    S = np.asarray(cov, dtype=float)
    J = np.atleast_2d(np.asarray(jacobian, dtype=float))
    r = np.atleast_1d(np.asarray(noise_var, dtype=float))
    M = np.eye(len(r)) + (J @ S @ J.T) / r[:, None]
    return 0.5 * float(np.linalg.slogdet(M)[1])


def motion_jacobian(heading: float, distance_m: float) -> np.ndarray:
    """Jacobian of ``(x + d cos h, y + d sin h, h + dh)`` in the pose ``(x, y, h)``.

    ``[[1, 0, -d sin h], [0, 1, d cos h], [0, 0, 1]]`` (Thrun et al. 2005, eq. 7.8, the straight
    step of the velocity motion model).
    """
    return np.array(
        [
            [1.0, 0.0, -distance_m * np.sin(heading)],
            [0.0, 1.0, distance_m * np.cos(heading)],
            [0.0, 0.0, 1.0],
        ]
    )


def visible_posts(
    pose: np.ndarray,
    landmarks_m: np.ndarray,
    bench_boxes_m: np.ndarray,
    camera_offset_m: float,
    fov_rad: float,
    max_range_m: float,
) -> np.ndarray:
    """Mask of posts the camera would see from ``pose``: inside the field of view and range and
    not behind a bench (the lens-to-post segment crosses no bench box)."""
    b, r = bearing_range(pose, landmarks_m, camera_offset_m)
    mask = (np.abs(b) <= fov_rad / 2.0) & (r <= max_range_m) & (r > 1e-6)
    lens = camera_position(pose, camera_offset_m)
    for i in np.flatnonzero(mask):
        for box in np.asarray(bench_boxes_m, dtype=float).reshape(-1, 4):
            if segment_hits_box(lens, landmarks_m[i], box):
                mask[i] = False
                break
    return mask


def aisle_centres(bench_boxes_m: np.ndarray) -> np.ndarray:
    """Centres ``(x, y)`` of the gaps between benches that overlap along x, shape ``(n, 2)``.

    Two benches bound an aisle when their x spans overlap and nothing lies between them in y;
    the centre is the middle of the shared x span and of the gap.
    """
    b = np.asarray(bench_boxes_m, dtype=float).reshape(-1, 4)
    out = []
    for i in range(len(b)):
        for j in range(len(b)):
            lo, hi = b[i], b[j]
            if lo[3] >= hi[1]:
                continue
            x0, x1 = max(lo[0], hi[0]), min(lo[2], hi[2])
            if x1 <= x0:
                continue
            between = [
                k
                for k in range(len(b))
                if k not in (i, j)
                and b[k][1] < hi[1]
                and b[k][3] > lo[3]
                and min(b[k][2], x1) > max(b[k][0], x0)
            ]
            if not between:
                out.append(((x0 + x1) / 2, (lo[3] + hi[1]) / 2))
    return np.array(out, dtype=float).reshape(-1, 2)


@dataclass
class RoutePrediction:
    """The predicted belief along one route, one row per camera frame."""

    waypoints: np.ndarray
    means: np.ndarray  # (K, 3)
    covariances: np.ndarray  # (K, 3, 3), after the frame's update
    visible: np.ndarray  # (K, L) bool
    information_gain: np.ndarray  # (K,) nats
    outcome_entropy: np.ndarray  # (K,) entropy of the predicted in-view readings, nats
    noise_entropy: np.ndarray  # (K,) entropy of the in-view readings given the pose, nats
    arrival_s: float  # time of arrival at the route's end (before any wait)
    duration_s: float  # arrival plus the wait
    length_m: float
    scores: dict[str, float] = field(default_factory=dict)


def predict_route(
    start_mean: np.ndarray,
    start_cov: np.ndarray,
    waypoints: np.ndarray,
    final_heading: float,
    *,
    speed_m_s: float,
    turn_rad_s: float,
    frame_dt_s: float,
    drift_var_per_s: np.ndarray,
    landmarks_m: np.ndarray,
    bench_boxes_m: np.ndarray,
    camera_offset_m: float,
    fov_rad: float,
    max_range_m: float,
    bearing_var: float,
    range_var: float | None,
    horizon_s: float | None = None,
) -> RoutePrediction:
    """Predict the pose belief along a route, frame by frame (EKF predict and update).

    The base turns on the spot to face each leg, drives it at ``speed_m_s``, turns to
    ``final_heading`` and then stands until ``horizon_s`` (default: its arrival), so routes of
    different lengths are compared over one horizon of ``ceil(horizon_s / frame_dt_s)``
    camera frames. Between frames the mean moves along the route and
    ``Sigma <- F Sigma F' + Q t_moving`` with ``F`` the motion Jacobian
    (:func:`motion_jacobian`) of the distance driven since the last frame and
    ``Q = diag(drift_var_per_s)`` the dead-reckoning noise per second of motion; then the
    posts in view from the predicted mean (:func:`visible_posts`) update the covariance
    (:func:`update_covariance`). Per frame it records the information gain
    (:func:`information_gain`), the entropy of the predicted readings ``H[N(., J Sigma J' + R)]``
    and that of the readings given the pose ``H[N(., R)]`` (:func:`gaussian_entropy`).
    """
    pts = np.asarray(waypoints, dtype=float).reshape(-1, 2)
    lm = np.asarray(landmarks_m, dtype=float).reshape(-1, 2)
    q = np.diag(np.asarray(drift_var_per_s, dtype=float))
    mean = np.asarray(start_mean, dtype=float).copy()
    cov = np.asarray(start_cov, dtype=float).copy()
    # motion primitives (kind, amount, duration): turn by an angle, drive a distance
    prims: list[tuple[str, float, float]] = []
    pos, head = mean[:2].copy(), float(mean[2])
    length = 0.0
    for p in pts:
        d = p - pos
        dist = float(np.hypot(*d))
        if dist < 1e-9:
            continue
        want = float(np.arctan2(d[1], d[0]))
        turn = float(wrap_angle(want - head))
        prims += [("turn", turn, abs(turn) / turn_rad_s), ("drive", dist, dist / speed_m_s)]
        pos, head = p, want
        length += dist
    turn = float(wrap_angle(final_heading - head))
    prims.append(("turn", turn, abs(turn) / turn_rad_s))
    arrival = float(sum(p[2] for p in prims))
    horizon = arrival if horizon_s is None else max(float(horizon_s), arrival)
    n_frames = max(1, int(np.ceil(horizon / frame_dt_s - 1e-9)))
    means, covs, vis, gains, h_pred, h_noise = [], [], [], [], [], []
    k_prim, t_in_prim = 0, 0.0
    for _ in range(n_frames):
        # advance the mean by one frame through the primitives, accumulating the motion
        left = frame_dt_s
        moving = 0.0
        h0 = float(mean[2])
        driven = 0.0
        while left > 1e-12 and k_prim < len(prims):
            kind, amount, dur = prims[k_prim]
            take = min(left, dur - t_in_prim)
            frac = take / dur if dur > 0 else 1.0
            if kind == "turn":
                mean[2] = wrap_angle(mean[2] + amount * frac)
            else:
                step = amount * frac
                mean[:2] += step * np.array([np.cos(mean[2]), np.sin(mean[2])])
                driven += step
            moving += take
            left -= take
            t_in_prim += take
            if t_in_prim >= dur - 1e-12:
                k_prim, t_in_prim = k_prim + 1, 0.0
        F = motion_jacobian(h0, driven)
        cov = F @ cov @ F.T + q * moving
        mask = visible_posts(mean, lm, bench_boxes_m, camera_offset_m, fov_rad, max_range_m)
        ig = hp = hn = 0.0
        if mask.any():
            jb, jr = bearing_range_jacobian(mean, lm[mask], camera_offset_m)
            J, r = jb, np.full(int(mask.sum()), bearing_var)
            if range_var is not None:
                J = np.vstack([jb, jr])
                r = np.r_[r, np.full(int(mask.sum()), range_var)]
            ig = information_gain(cov, J, r)
            hp = gaussian_entropy(J @ cov @ J.T + np.diag(r))
            hn = gaussian_entropy(np.diag(r))
            cov = update_covariance(cov, J, r)
        means.append(mean.copy())
        covs.append(cov.copy())
        vis.append(mask)
        gains.append(ig)
        h_pred.append(hp)
        h_noise.append(hn)
    return RoutePrediction(
        waypoints=pts,
        means=np.array(means).reshape(-1, 3),
        covariances=np.array(covs).reshape(-1, 3, 3),
        visible=np.array(vis, dtype=bool).reshape(len(means), len(lm)),
        information_gain=np.array(gains),
        outcome_entropy=np.array(h_pred),
        noise_entropy=np.array(h_noise),
        arrival_s=arrival,
        duration_s=n_frames * frame_dt_s,
        length_m=length,
    )


def expected_free_energy(
    route: RoutePrediction,
    preferred_mean: np.ndarray,
    preferred_cov: np.ndarray,
    preferred_arrival_sd_s: float,
    arrival_var_s2: float,
    bearing_var: float,
    range_var: float | None,
    max_range_m: float,
) -> dict[str, float]:
    """``G = risk + ambiguity`` of a predicted route (module docstring), in nats.

    Hidden states at the horizon: the pose ``s_T`` and the arrival time ``t_a``; outcomes: a
    bearing (and range) for every mapped post at every frame.

    - ``risk = KL[N(m_T, Sigma_T) || N(dock, Sigma*)] + KL[N(t_a, var_a) || N(0, sd*^2)]
      + sum_k KL[q(o_k) || U]``: the predicted pose against the dock density
      (:func:`gaussian_kl`, heading difference wrapped), the arrival time against a preference
      for arriving soon, and the predicted readings against a flat preference ``U`` over the
      sensor's span (bearing ``2 pi``, range ``range_max``): ``n_in H_out - H[q(o_in)]`` for the
      posts in view, 0 for those out of view (their readings are already spread over the span);
    - ``ambiguity = sum_k sum_l [v_kl H_in + (1 - v_kl) H_out]`` with ``H_in`` the entropy of a
      reading given the pose (:func:`gaussian_entropy` of the noise) and ``H_out``
      (:func:`uniform_entropy`) that of a post out of view.

    Per frame the camera's share is ``L H_out - IG_k`` (``H[q(o_in)] - H_in = IG_k``), so over
    one horizon routes differ by ``risk_pose + risk_time - sum_k IG_k``. Also returned:
    ``information_gain`` (the sum), ``risk_pose``, ``risk_time``, ``risk_outcomes``.
    """
    m_T = route.means[-1].copy()
    pm = np.asarray(preferred_mean, dtype=float)
    m_T[2] = pm[2] + wrap_angle(m_T[2] - pm[2])
    risk_pose = gaussian_kl(m_T, route.covariances[-1], pm, preferred_cov)
    risk_time = gaussian_kl(
        np.array([route.arrival_s]),
        np.array([[arrival_var_s2]]),
        np.zeros(1),
        np.array([[preferred_arrival_sd_s**2]]),
    )
    h_out = uniform_entropy(2.0 * np.pi)
    if range_var is not None:
        h_out += uniform_entropy(max_range_m)
    n_in = route.visible.sum(axis=1)
    n_out = route.visible.shape[1] - n_in
    risk_outcomes = float(np.sum(n_in * h_out - route.outcome_entropy))
    ambiguity = float(np.sum(route.noise_entropy + n_out * h_out))
    risk = risk_pose + risk_time + risk_outcomes
    scores = {
        "risk": float(risk),
        "ambiguity": ambiguity,
        "expected_free_energy": float(risk + ambiguity),
        "risk_pose": float(risk_pose),
        "risk_time": float(risk_time),
        "risk_outcomes": risk_outcomes,
        "information_gain": float(route.information_gain.sum()),
        "arrival_s": float(route.arrival_s),
        "length_m": float(route.length_m),
    }
    route.scores = scores
    return scores
