"""The docking-reliability rules of the base agent: open aisle mouths, the fix-quality gate,
the turn that holds its spot, stern-first waypoints."""

from __future__ import annotations

import numpy as np
import pytest

from blanket.agent.mobile_base import BaseAgent, attractor_velocity, plan_waypoints
from blanket_envs.base_goto import BaseGotoEnv
from blanket_envs.greenhouse_rows import box_distance, default_layout


@pytest.fixture(scope="module", params=["rover", "husky"])
def agent(request):
    env = BaseGotoEnv(robot=request.param)
    try:
        yield BaseAgent(env.description)
    finally:
        env.close()


def test_posts_leave_the_aisle_mouths_open(agent):
    """From the south aisle to the dock the plan runs through the aisle's west mouth, between
    its row-end posts, and every segment keeps the base's half width from benches and posts."""
    d = agent.description
    start = np.array([2.0, -1.3])
    path = plan_waypoints(start, np.array([-3.6, 1.3]), agent._obstacles(), agent._inflation())
    pts = np.vstack([start, *path])
    assert len(pts) >= 3  # not the straight-line fallback through the middle bench
    posts = d.landmarks_m
    for p, q in zip(pts[:-1], pts[1:], strict=True):
        for t in np.linspace(0, 1, 100):
            x = p + t * (q - p)
            assert np.min(box_distance(x, d.bench_boxes_m)) > d.half_width_m
            assert np.min(np.hypot(*(posts - x).T)) > d.half_width_m + 0.04


def test_planning_waits_for_a_tight_fix(agent):
    agent.reset()
    agent.localised = True
    agent.mu[0] = [4.0, -1.3, np.pi]
    agent.covariance[:2, :2] = np.diag([0.02, 0.3]) ** 2  # loose across the line of sight
    agent._plan_when_fixed()
    assert agent.waypoints == []
    assert agent._desired_body_velocity(agent.mu[0])[0] == 0.0  # keeps turning on the spot
    agent.covariance[:2, :2] = np.diag([0.02, 0.05]) ** 2
    agent._plan_when_fixed()
    assert len(agent.waypoints) >= 2
    agent.reset()


def test_turn_on_the_spot_holds_its_spot(agent):
    agent.reset()
    pose = np.array([0.0, -1.3, 0.0])
    assert agent._hold_spot(pose, 0.0, 0.3) == 0.0  # anchors here
    crept = np.array([0.05, -1.3, 0.1])  # 5 cm along the heading
    v = agent._hold_spot(crept, 0.0, 0.3)
    along = 0.05 * np.cos(0.1)
    assert v == pytest.approx(-2.0 * agent.options["gains"][0] * along)
    assert agent._hold_spot(crept, 0.2, 0.0) == 0.2  # driving: no hold, anchor dropped
    assert agent._turn_anchor is None


def test_waypoint_behind_is_approached_stern_first():
    gains = (0.8, 2.5, -0.8)
    pose = np.array([0.0, 0.0, 0.0])
    behind = np.array([-2.0, 0.05, 0.0])  # ~178 degrees off the bow
    v, om = attractor_velocity(pose, behind, False, gains, 0.3, 1.0, reverse_beyond_rad=2.2)
    assert v < 0 and abs(om) < 0.2  # reverse, barely turning
    v0, om0 = attractor_velocity(pose, behind, False, gains, 0.3, 1.0)
    assert v0 == 0.0 and abs(om0) == pytest.approx(1.0)  # bow first: a half turn on the spot
    aside = np.array([0.0, -2.0, 0.0])  # 90 degrees: bow first either way
    v1, om1 = attractor_velocity(pose, aside, False, gains, 0.3, 1.0, reverse_beyond_rad=2.2)
    assert v1 == 0.0 and om1 < 0


def test_default_layout_unchanged_by_the_dark_aisle_option():
    env = BaseGotoEnv()
    try:
        assert env.description.start_pose is None and env.description.start_pose_sd is None
        np.testing.assert_allclose(env.description.landmarks_m, default_layout().landmarks_m)
    finally:
        env.close()
