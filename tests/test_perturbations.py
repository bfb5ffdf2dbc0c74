"""Perturbation and fault wrappers: each does what it says, reproducibly, with truth in info."""

from __future__ import annotations

import warnings

import gymnasium
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env
from scipy import stats

import blanket  # noqa: F401  (registers the envs)
from blanket.errors import ConfigError
from blanket.wrappers.perturbations import (
    CameraDelay,
    CameraDropout,
    EncoderBias,
    FrozenEncoder,
    MovingTarget,
    NoiseBurst,
    Payload,
    RandomPushes,
    SensorNoiseScale,
)


@pytest.fixture(scope="module")
def planar():
    env = gymnasium.make("blanket/planar-2link-v0", episode_s=2.0).unwrapped
    yield env
    env.close()


class Spy(gymnasium.Wrapper):
    """Keeps the raw observations the wrapper above it receives."""

    def __init__(self, env):
        super().__init__(env)
        self.raw = []

    def reset(self, **kw):
        obs, info = self.env.reset(**kw)
        self.raw = [obs]
        return obs, info

    def step(self, action):
        out = self.env.step(action)
        self.raw.append(out[0])
        return out


def _rollout(env, seed, steps, action=None, rng=None):
    obs, info = env.reset(seed=seed)
    out = [(obs, info)]
    for _ in range(steps):
        if rng is not None:
            a = rng.uniform(env.action_space.low, env.action_space.high) * 0.3
        else:
            a = np.zeros(env.action_space.shape) if action is None else action
        obs, _, _, _, info = env.step(a)
        out.append((obs, info))
    return out


def _std_interval(samples: np.ndarray, level: float = 0.999) -> tuple[float, float]:
    """Confidence interval of a normal std from the chi-square law of (n-1) s^2 / sigma^2
    (textbook result, e.g. Montgomery & Runger, Applied Statistics and Probability for
    Engineers, sec. 8.3); the mean is known to be 0 here so n degrees of freedom."""
    n = samples.size
    ss = float(np.sum(samples**2))
    lo = np.sqrt(ss / stats.chi2.ppf(0.5 + level / 2, n))
    hi = np.sqrt(ss / stats.chi2.ppf(0.5 - level / 2, n))
    return lo, hi


def test_sensor_noise_scale_total_std_is_factor_times_nominal(planar):
    d = planar.description
    env = SensorNoiseScale(planar, factor=3.0)
    steps = _rollout(env, seed=4, steps=479)
    angle_err = np.array(
        [o["joint_angle_rad"] - i["external"]["joint_angle_rad"] for o, i in steps]
    )
    vel_err = np.array(
        [o["joint_velocity_rad_s"] - i["external"]["joint_velocity_rad_s"] for o, i in steps]
    )
    lo, hi = _std_interval(angle_err)
    assert lo < 3.0 * d.encoder_angle_noise_rad < hi
    lo, hi = _std_interval(vel_err)
    assert lo < 3.0 * d.encoder_velocity_noise_rad_s < hi
    # Pixels: fresh frames where the tip is seen, against the pinhole projection of the truth.
    pix = np.array(
        [
            o["tip_pixel_px"] - d.camera.project(i["external"]["tip_position_m"])
            for o, i in steps
            if o["camera_fresh"] and o["tip_visible"]
        ]
    )
    assert len(pix) > 40
    lo, hi = _std_interval(pix)
    assert lo < 3.0 * d.camera.pixel_noise_px < hi
    # The agent's description still says nominal noise.
    assert env.unwrapped.description.encoder_angle_noise_rad == d.encoder_angle_noise_rad
    assert all(i["external"]["disturbance_noise_factor"] == 3.0 for _, i in steps)


def test_draws_do_not_depend_on_actions(planar):
    # Same seed, different actions: the injected noise (reading minus truth) is identical.
    env = SensorNoiseScale(planar, factor=2.0)
    a = _rollout(env, seed=11, steps=100)
    b = _rollout(env, seed=11, steps=100, rng=np.random.default_rng(3))
    assert not np.allclose(
        a[-1][1]["external"]["joint_angle_rad"], b[-1][1]["external"]["joint_angle_rad"]
    )
    for (oa, ia), (ob, ib) in zip(a, b, strict=True):
        np.testing.assert_allclose(
            oa["joint_angle_rad"] - ia["external"]["joint_angle_rad"],
            ob["joint_angle_rad"] - ib["external"]["joint_angle_rad"],
            atol=1e-12,
        )
    c = _rollout(env, seed=12, steps=5)
    assert not np.allclose(a[1][0]["joint_angle_rad"], c[1][0]["joint_angle_rad"])


def test_camera_dropout_rate_and_held_pixels(planar):
    env = CameraDropout(planar, probability=0.3)
    dropped = delivered = 0
    for seed in range(3):
        steps = _rollout(env, seed=seed, steps=479)
        last = steps[0][0]
        for obs, info in steps[1:]:
            if info["external"]["fault_camera_dropout"]:
                dropped += 1
                assert obs["camera_fresh"] == 0
                np.testing.assert_array_equal(obs["tip_pixel_px"], last["tip_pixel_px"])
            elif obs["camera_fresh"]:
                delivered += 1
            last = obs
    # Dropped among fresh frames ~ Binomial(n, 0.3): exact binomial test (scipy).
    assert stats.binomtest(dropped, dropped + delivered, 0.3).pvalue > 1e-3
    rerun = _rollout(env, seed=0, steps=479)
    again = _rollout(env, seed=0, steps=479)
    assert [i["external"]["fault_camera_dropout"] for _, i in rerun] == [
        i["external"]["fault_camera_dropout"] for _, i in again
    ]


def test_camera_delay_delivers_frames_late(planar):
    spy = Spy(planar)
    env = CameraDelay(spy, frames=2)
    rng = np.random.default_rng(0)
    steps = _rollout(env, seed=2, steps=200, rng=rng)
    raw_frames = [r["tip_pixel_px"] for r in spy.raw if r["camera_fresh"]]
    got = [o["tip_pixel_px"] for o, _ in steps if o["camera_fresh"]]
    assert len(got) == len(raw_frames) > 10
    for k in range(2, len(got)):
        np.testing.assert_array_equal(got[k], raw_frames[k - 2])
    np.testing.assert_array_equal(got[1], raw_frames[0])  # queue starts with the reset frame
    # Between frames the delivered pixels hold.
    for (o0, _), (o1, _) in zip(steps[:-1], steps[1:], strict=True):
        if not o1["camera_fresh"]:
            np.testing.assert_array_equal(o0["tip_pixel_px"], o1["tip_pixel_px"])
    assert all(i["external"]["fault_camera_delay_frames"] == 2 for _, i in steps)


def test_moving_target_moves_at_constant_velocity(planar):
    env = MovingTarget(planar, speed_m_s=0.05)
    steps = _rollout(env, seed=1, steps=240)
    p0 = steps[0][0]["target_position_m"]
    p1 = steps[-1][0]["target_position_m"]
    # x(t) = x0 + v t, with t = 240 steps / 240 Hz = 1 s (kinematics of uniform motion).
    np.testing.assert_allclose(p1 - p0, [0.0, 0.05, 0.0], atol=1e-9)
    np.testing.assert_allclose(
        steps[-1][1]["external"]["disturbance_target_velocity_m_s"], [0.0, 0.05, 0.0]
    )
    rand = MovingTarget(planar, speed_m_s=0.05, direction="random")
    signs = {
        np.sign(rand.reset(seed=s)[1]["external"]["disturbance_target_velocity_m_s"][1])
        for s in range(12)
    }
    assert signs == {-1.0, 1.0}
    planar.set_target_velocity(np.zeros(3))


def test_frozen_encoder_holds_last_reading(planar):
    env = FrozenEncoder(planar, joint=1, start_s=0.5)
    action = np.array([0.0, 0.5])
    steps = _rollout(env, seed=3, steps=240, action=action)
    k0 = 120  # first observation at t >= 0.5 s
    held = steps[k0 - 1][0]["joint_angle_rad"][1]
    for k, (obs, info) in enumerate(steps):
        assert info["external"]["fault_frozen_joint"] == (1 if k >= k0 else -1)
        if k >= k0:
            assert obs["joint_angle_rad"][1] == held
    truth = (
        steps[-1][1]["external"]["joint_angle_rad"][1]
        - steps[k0][1]["external"]["joint_angle_rad"][1]
    )
    assert truth > 0.2  # the joint kept moving
    assert steps[-1][0]["joint_angle_rad"][0] != steps[-2][0]["joint_angle_rad"][0]


def test_encoder_bias_step(planar):
    env = EncoderBias(planar, joint=0, bias_rad=0.2, start_s=0.5)
    steps = _rollout(env, seed=5, steps=240)
    err = np.array(
        [o["joint_angle_rad"][0] - i["external"]["joint_angle_rad"][0] for o, i in steps]
    )
    sd = planar.description.encoder_angle_noise_rad
    # Mean of 120 readings: within 5 standard errors of the bias (and of zero before).
    assert abs(err[120:].mean() - 0.2) < 5 * sd / np.sqrt(121)
    assert abs(err[:120].mean()) < 5 * sd / np.sqrt(120)
    np.testing.assert_array_equal(steps[130][1]["external"]["fault_encoder_bias_rad"], [0.2, 0])


def test_noise_burst_only_inside_window(planar):
    env = NoiseBurst(planar, channel="joint_velocity", factor=10.0, start_s=0.5, duration_s=0.5)
    steps = _rollout(env, seed=6, steps=479)
    flags = np.array([i["external"]["fault_noise_burst_joint_velocity"] for _, i in steps])
    np.testing.assert_array_equal(np.flatnonzero(flags), np.arange(120, 240))
    err = np.array(
        [o["joint_velocity_rad_s"] - i["external"]["joint_velocity_rad_s"] for o, i in steps]
    )
    sd = planar.description.encoder_velocity_noise_rad_s
    lo, hi = _std_interval(err[120:240])
    assert lo < 10 * sd < hi
    lo, hi = _std_interval(err[240:])
    assert lo < sd < hi


def test_random_pushes_schedule_and_effect(planar):
    env = RandomPushes(planar, force_n=30.0, rate_hz=2.0, duration_s=0.1)
    # Renewal process with gaps Exp(rate) + duration: mean count ~ T / (1/rate + duration)
    # (elementary renewal theorem; Ross, Stochastic Processes, 2nd ed., Prop. 3.3.1).
    counts = []
    for s in range(40):
        env.reset(seed=s)
        counts.append(len(env.schedule))
        starts = [k for k, _ in env.schedule]
        assert all(b - a >= 24 for a, b in zip(starts, starts[1:], strict=False))
        assert all(abs(np.linalg.norm(f) - 30.0) < 1e-9 and f[2] == 0 for _, f in env.schedule)
    env.reset(seed=3)
    again = [(k, f.copy()) for k, f in env.schedule]
    env.reset(seed=3)
    assert [k for k, _ in again] == [k for k, _ in env.schedule]
    np.testing.assert_array_equal([f for _, f in again], [f for _, f in env.schedule])
    expected = 2.0 / (1 / 2.0 + 0.1)
    assert abs(np.mean(counts) - expected) < 0.6
    # Torque mode with zero torque: the planar arm floats (gravity is along its joint axes),
    # so a push moves it.
    floating = gymnasium.make("blanket/planar-2link-v0", episode_s=2.0, control="torque").unwrapped
    env = RandomPushes(floating, force_n=30.0, rate_hz=2.0, duration_s=0.1)
    steps = _rollout(env, seed=7, steps=479)
    first = env.schedule[0][0]
    forces = np.array([i["external"]["disturbance_push_n"] for _, i in steps])
    np.testing.assert_array_equal(forces[first + 1], env.schedule[0][1])
    assert np.count_nonzero(np.linalg.norm(forces[first + 1 : first + 25], axis=1)) == 24
    assert np.all(forces[: first + 1] == 0)
    # Against the same seed without pushes: identical until the push, then the tip moves.
    calm = _rollout(floating, seed=7, steps=479)
    floating.close()
    tip = np.array([i["external"]["tip_position_m"] for _, i in steps])
    tip0 = np.array([i["external"]["tip_position_m"] for _, i in calm])
    np.testing.assert_allclose(tip[: first + 1], tip0[: first + 1], atol=1e-12)
    assert np.max(np.linalg.norm(tip - tip0, axis=1)) > 1e-3


def test_payload_sags_arm_under_gravity_compensation():
    # iiwa in torque mode holding its posture with the body model's gravity torque (no
    # payload): with a 1.5 kg payload at the tip it sags. ArmModel's gravity torque is
    # checked against pybullet in tests/test_body.py.
    from blanket.body import ArmModel

    env = gymnasium.make(
        "blanket/arm-reach-v0", robot="iiwa", control="torque", episode_s=0.5
    ).unwrapped
    try:
        d = env.description
        model = ArmModel.from_urdf(d.urdf_path, d.end_effector, joint_names=d.joint_names)
        drops = {}
        for mass in (0.0, 1.5):
            wrapped = Payload(env, mass_kg=mass)
            obs, info = wrapped.reset(seed=0)
            z0 = info["external"]["tip_position_m"][2]
            for _ in range(60):
                q = info["external"]["joint_angle_rad"]
                obs, _, _, _, info = wrapped.step(model.gravity_torque(q))
            drops[mass] = z0 - info["external"]["tip_position_m"][2]
            assert info["external"]["disturbance_payload_kg"] == mass
            assert env.world.payload_kg == mass
        assert abs(drops[0.0]) < 2e-3
        assert drops[1.5] > 5e-3
    finally:
        env.close()


@pytest.mark.parametrize(
    "make",
    [
        lambda e: SensorNoiseScale(e, 3.0),
        lambda e: CameraDropout(e, 0.3),
        lambda e: CameraDelay(e, 2),
        lambda e: Payload(e, 1.5),
        lambda e: RandomPushes(e, rate_hz=5.0),
        lambda e: MovingTarget(e, 0.05),
        lambda e: FrozenEncoder(e, 1, 0.0),
        lambda e: EncoderBias(e, 0, 0.1, 0.0),
        lambda e: NoiseBurst(e, "camera", 5.0, 0.0, 1.0),
    ],
)
def test_gymnasium_check_env_passes_on_wrapped_env(planar, make):
    env = make(planar)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        check_env(env, skip_render_check=True, skip_close_check=True)
    assert env.spec is None or env.unwrapped.spec is not None
    key = env.truth_keys[0]
    assert key in env.reset(seed=0)[1]["external"]
    assert key in env.step(np.zeros(2))[4]["external"]
    planar.set_payload(0.0)
    planar.set_target_velocity(np.zeros(3))


@pytest.mark.parametrize(
    "make, field",
    [
        (lambda e: SensorNoiseScale(e, 0.5), "factor"),
        (lambda e: SensorNoiseScale(e, 2.0, channels=("sonar",)), "channels"),
        (lambda e: CameraDropout(e, 1.5), "probability"),
        (lambda e: CameraDelay(e, -1), "frames"),
        (lambda e: Payload(e, -1.0), "mass_kg"),
        (lambda e: RandomPushes(e, rate_hz=0.0), "rate_hz"),
        (lambda e: MovingTarget(e, direction="up"), "direction"),
        (lambda e: FrozenEncoder(e, joint=2), "joint"),
        (lambda e: EncoderBias(e, joint=0, bias_rad=float("nan")), "bias_rad"),
        (lambda e: NoiseBurst(e, channel="lidar"), "channel"),
    ],
)
def test_bad_arguments_raise_one_line_config_error(planar, make, field):
    with pytest.raises(ConfigError, match=field) as exc:
        make(planar)
    assert "\n" not in str(exc.value)
