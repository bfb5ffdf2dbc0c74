"""Two Gaussian cues of one quantity: the fused precision is the sum of the precisions.

Ernst & Banks 2002 ("Humans integrate visual and haptic information in a statistically
optimal fashion", Nature 415) -- the maximum-likelihood combination of two cues has precision
1/s1^2 + 1/s2^2 and mean (y1/s1^2 + y2/s2^2) / (1/s1^2 + 1/s2^2).
"""

from __future__ import annotations

import numpy as np
import pytest

import blanket  # noqa: F401
from blanket.estimation import LinearSystem, run_filter


@pytest.mark.parametrize("s1, s2", [(0.5, 0.5), (0.2, 1.0), (1e-2, 3e-2)])
def test_fused_precision_is_the_sum_of_cue_precisions(s1, s2):
    # A static state seen by two sensors at once (C = [1, 1]'), with a broad prior of
    # precision 1/P0 that adds to the cues' (the cues dominate it by 1e3 or more).
    system = LinearSystem(
        A=np.zeros((1, 1)),
        C=np.ones((2, 1)),
        Q=np.zeros((1, 1)),
        R=np.diag([s1**2, s2**2]),
        dt=0.01,
    )
    y = np.array([[0.3, -0.1]])
    p0 = 1e-3
    result = run_filter(system, y, order=0, x0=np.zeros(1), P0=np.array([[1.0 / p0]]))
    p1, p2 = 1 / s1**2, 1 / s2**2
    fused_precision = 1.0 / result.covariances[0, 0, 0]
    assert fused_precision == pytest.approx(p0 + p1 + p2, rel=1e-6)
    assert result.means[0, 0] == pytest.approx((p1 * 0.3 + p2 * -0.1) / (p0 + p1 + p2), rel=1e-6)


def test_agent_posterior_precision_adds_encoder_and_camera():
    # On the planar arm the agent's curvature after one update is the prior precision plus the
    # encoder precision plus G' P_camera G: the camera adds precision along the directions it
    # sees and nothing elsewhere (Ernst & Banks 2002, in the joint space of the arm).
    import gymnasium

    from blanket.agent import ArmAgent

    env = gymnasium.make("blanket/planar-2link-v0", episode_s=0.5)
    try:
        obs, _ = env.reset(seed=1)
        obs = dict(obs, camera_fresh=1, tip_visible=1)
        with_camera = ArmAgent.from_env(env)
        without = ArmAgent.from_env(env)
        with_camera.backend = without.backend = "numpy"
        with_camera.act(obs)
        without.act(dict(obs, camera_fresh=0))
        n = with_camera.n
        added = (
            np.linalg.inv(with_camera.state.covariance)[:n, :n]
            - np.linalg.inv(without.state.covariance)[:n, :n]
        )
        q = with_camera.state.mean[:n]
        tip, J = with_camera.body.tip_position_and_jacobian(q)
        G = with_camera.camera.project_jacobian(tip) @ J
        expected = G.T @ np.diag(with_camera.precision["camera"]) @ G
        np.testing.assert_allclose(added, expected, rtol=0.05, atol=1e-6 * np.abs(expected).max())
    finally:
        env.close()
