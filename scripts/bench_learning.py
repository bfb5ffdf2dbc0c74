"""Body learning (``learn_body``) on every arm: reach after a warm-up, and the learned values.

Usage::

    python scripts/bench_learning.py [--episodes 20] [--warmup 5]
                                     [--arms iiwa,panda,xarm6,own,seedling]
                                     [--parts lengths,image,single,payload,timing]

Every episode runs through the one loop (:func:`blanket.rollout.rollout`, by way of
:func:`blanket.bench.evaluate.run_policy_episodes`) in the bench's env
(:func:`blanket.bench.rl.make_bench_env`: the condition's wrappers, the safety wrapper
outermost), with the bench's policies (:data:`blanket.bench.policies.POLICIES`). A row builds
its agent once, so what it learns carries over its episodes: the first ``--warmup`` episodes
are the warm-up, the next ``--episodes`` are measured. Both rows of a comparison see the same
seeds. ``own`` is the project's 3-DoF potting arm (``assets/potting_arm_3dof.urdf``),
``seedling`` a 4-DoF arm nothing was tuned on (``tests/data/seedling_picker_4dof.urdf``).

Part ``lengths``: the body model's link lengths 3 % long (condition ``model_length_scale =
1.03``), velocity control; rows ``active-inference`` (no learning) and
``active-inference+learn``. The learned factors should be ``1 / 1.03`` on every link: the
script prints the error of the shared scale and of each segment's factor (placements that
point the same way in every posture share one; see ``collinear_length_segments``), with its
posterior sd, in per cent of the true length.

Part ``image``: the same miscalibration without learning, the Cartesian goal (row
``active-inference``) against the goal in the image (``active-inference+image``,
``goal_space = "image"``), and the image goal with 30 % of the camera frames dropped
(condition ``camera_dropout_probability = 0.3``).

Part ``single``: one link wrong -- the body model's longest placement 3 % long, every other
right (``link_length_scales``) -- with ``learn_body``; prints each segment's error after the
warm-up and the learned spread (the camera's own accuracy, without a uniform error for the
two-level prior to share). Not in the default ``--parts``.

Part ``payload``: the own arm under torque control with an unmodelled 1.5 kg payload (condition
``payload_kg = 1.5``). Rows: ``active-inference-torque`` (no learning);
``active-inference-torque+learn`` in the bench env; and calibrate-then-reload -- the warm-up
episodes learn in the same env without the safety wrapper, the learned values are saved as
``[agent]`` options (``ArmAgent.learned_options``) and a fresh agent built from them runs the
measured episodes behind the safety wrapper. The wrapper turns a command it clamps back into a
torque with the simulator's payload-free dynamics, so behind it the command the agent sent is
not the torque that moved the arm (see the printed note).

Part ``timing``: the agent's step with and without ``learn_body`` (median ``agent_step_us``
that the loop reports), episodes alternated, on the own arm under both controls; prints the
ratio against the step without learning measured in the same run.

Prints one line per row. Run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

import gymnasium as gym
import numpy as np

import blanket  # noqa: F401  (registers the env ids)
from blanket.agent import ArmAgent
from blanket.bench.evaluate import run_policy_episodes
from blanket.bench.metrics import episode_metrics
from blanket.bench.policies import resolve_policy
from blanket.bench.rl import make_bench_env
from blanket.conditions import apply_conditions, condition_model_options
from blanket.rollout import rollout

OWN_ARM = dict(
    urdf=str(
        Path(__file__).resolve().parents[1]
        / "envs"
        / "blanket_envs"
        / "assets"
        / "potting_arm_3dof.urdf"
    ),
    end_effector="tool_tip",
)
#: a 4-DoF arm no setting of the project was tuned on (tests/data)
SEEDLING_ARM = dict(
    urdf=str(Path(__file__).resolve().parents[1] / "tests" / "data" / "seedling_picker_4dof.urdf"),
    end_effector="picker_tip",
)
URDF_ARMS = {"own": OWN_ARM, "seedling": SEEDLING_ARM}
LENGTH_ERROR = 1.03
PAYLOAD_KG = 1.5
EPISODE_S = 4.0


def _env(arm: str, control: str, conditions: dict[str, Any], safety: bool = True) -> gym.Env:
    world = {k: v for k, v in conditions.items() if k != "model_length_scale"}
    if arm in URDF_ARMS:
        kw = URDF_ARMS[arm]
        if safety:
            return make_bench_env("iiwa", control, EPISODE_S, conditions=world, **kw)
        bare = gym.make("blanket/arm-reach-v0", control=control, episode_s=EPISODE_S, **kw)
        return apply_conditions(bare, world)[0]
    if safety:
        return make_bench_env(arm, control, EPISODE_S, conditions=world)
    bare = gym.make("blanket/arm-reach-v0", robot=arm, control=control, episode_s=EPISODE_S)
    return apply_conditions(bare, world)[0]


def _measure(env: gym.Env, policy: Any, seeds: list[int]) -> dict[str, Any]:
    traces = run_policy_episodes(env, policy, seeds)
    rows = [episode_metrics(t) for t in traces]
    finals = [r["final_error_m"] for r in rows]
    camera = env.unwrapped.description.camera
    # the seen tip's final distance from the target in the image (px, noise-free)
    gaps = [
        float(np.linalg.norm(camera.project(t.tip_m[-1]) - camera.project(t.target_start_m)))
        for t in traces
    ]
    return {
        "n": len(rows),
        "reached_1cm": sum(bool(r["success_1cm"]) for r in rows),
        "median_final_cm": 100 * float(np.median(finals)) if finals else float("nan"),
        "median_pixel_gap": float(np.median(gaps)) if gaps else float("nan"),
    }


def _reach_text(m: dict[str, Any]) -> str:
    return (
        f"within 1 cm {m['reached_1cm']:3d}/{m['n']:<3d} ({100 * m['reached_1cm'] / m['n']:5.1f} %)"
        f"  median final {m['median_final_cm']:5.2f} cm"
    )


#: ``body_calibration_episodes`` of the learning rows (``--calibrate``)
CALIBRATE = {"episodes": 0}


def _build(name: str, env: gym.Env, conditions: dict[str, Any]) -> Any:
    spec = resolve_policy(name)
    options = dict(condition_model_options(conditions))
    if name.endswith("+learn") and CALIBRATE["episodes"]:
        options["body_calibration_episodes"] = CALIBRATE["episodes"]
    return spec.build(env, options, {})


def _compare(
    env: gym.Env,
    label: str,
    plain: str,
    learning: str,
    conditions: dict,
    warmup: int,
    n: int,
    truth: float | None = None,
) -> tuple[Any, dict[str, Any], dict[str, Any]]:
    """Print the row without learning; warm up the learning agent, measure it; return the
    agent, its measurement and what it had learned after the warm-up (``[agent]`` options).
    With the segments' true ``truth`` factor, print what was learned after the warm-up."""
    seeds = list(range(warmup, warmup + n))
    m = _measure(env, _build(plain, env, conditions), seeds)
    print(f"  {label:<6} {plain:<30} {_reach_text(m)}", flush=True)
    agent = _build(learning, env, conditions)
    if warmup:
        run_policy_episodes(env, agent, list(range(warmup)))
    agent.reset()  # the spreads re-estimated, as the next episode starts from them
    warm = agent.learned_options()
    if truth is not None:
        text, worst = _segments_text(agent.body_learning, truth)
        print(
            f"         after the {warmup} warm-up episodes: worst segment {worst:.2f} %; {text}",
            flush=True,
        )
    return agent, _measure(env, agent, seeds), warm


def _tip_errors_mm(env: gym.Env, body: Any, postures: int = 500) -> np.ndarray:
    """|fk_body(q) - fk_true(q)| (mm) at random postures within the joint limits (|q| <= pi)."""
    from blanket.body import ArmModel

    d = env.unwrapped.description
    truth = ArmModel.from_urdf(d.urdf_path, d.end_effector, d.joint_names)
    lo, hi = np.maximum(d.lower_rad, -np.pi), np.minimum(d.upper_rad, np.pi)
    rng = np.random.default_rng(0)
    qs = rng.uniform(lo, hi, size=(postures, d.n_joints))
    return np.array(
        [1e3 * np.linalg.norm(body.tip_position(q) - truth.tip_position(q)) for q in qs]
    )


def _segments_text(learner: Any, truth: float) -> tuple[str, float]:
    """Each segment's error (% of the true length), posterior sd, the data's own sd and
    |error| / sd; and the worst error (%)."""
    parts, worst = [], 0.0
    for r in learner.segment_report():
        err = 100 * (r["factor"] / truth - 1.0)
        worst = max(worst, abs(err))
        data = f"{100 * r['data_sd']:.2f}" if np.isfinite(r["data_sd"]) else "inf"
        parts.append(
            f"{r['name']} {err:+.2f} (sd {100 * r['sd']:.2f}, data sd {data}, "
            f"|err|/sd {abs(err) / (100 * r['sd']):.1f}{'' if r['informed'] else ', not informed'})"
        )
    return "; ".join(parts), worst


def lengths(arm: str, warmup: int, episodes: int) -> None:
    conditions = {"model_length_scale": LENGTH_ERROR}
    env = _env(arm, "velocity", conditions)
    try:
        agent, m, _ = _compare(
            env,
            arm,
            "active-inference",
            "active-inference+learn",
            conditions,
            warmup,
            episodes,
            1.0 / LENGTH_ERROR,
        )
        learner = agent.body_learning
        agent.reset()  # writes everything learned into the body model
        g, g_sd = learner.shared_length_scale()
        seg, worst = _segments_text(learner, 1.0 / LENGTH_ERROR)
        before, after = (
            _tip_errors_mm(env, body)
            for body in (_build("active-inference", env, conditions).body, agent.body)
        )
        print(
            f"  {arm:<6} {'active-inference+learn':<30} {_reach_text(m)}\n"
            f"         learned after all {warmup + episodes} episodes: shared scale error "
            f"{100 * (g * LENGTH_ERROR - 1):+.2f} % (sd {100 * g_sd:.2f} %); worst segment "
            f"{worst:.2f} %; {seg}\n"
            f"         tip error of the body model at 500 random postures, median / 95th "
            f"percentile: {np.median(before):.1f} / {np.percentile(before, 95):.1f} mm before, "
            f"{np.median(after):.1f} / {np.percentile(after, 95):.1f} mm learned",
            flush=True,
        )
    finally:
        env.close()


def single(arm: str, warmup: int, episodes: int) -> None:
    """One link wrong: the body model's longest placement 3 % long, the rest right; learn_body
    from the start. Truth: every factor 1 (relative to the URDF)."""
    env = _env(arm, "velocity", {})
    try:
        body = env.unwrapped.description
        from blanket.body import ArmModel

        nominal = ArmModel.from_urdf(body.urdf_path, body.end_effector, body.joint_names)
        lengths_m = np.linalg.norm(nominal.tip_length_jacobian(np.zeros(body.n_joints))[1], axis=0)
        model = np.ones(lengths_m.size)
        wrong = int(np.argmax(lengths_m))
        model[wrong] = LENGTH_ERROR
        agent = ArmAgent.from_env(
            env,
            learn_body=True,
            link_length_scales=model.tolist(),
            body_calibration_episodes=CALIBRATE["episodes"],
        )
        if warmup:
            run_policy_episodes(env, agent, list(range(warmup)))
        agent.reset()
        learner = agent.body_learning
        text, worst = _segments_text(learner, 1.0)
        m = _measure(env, agent, list(range(warmup, warmup + episodes)))
        agent.reset()
        _, final = _segments_text(learner, 1.0)
        print(
            f"  {arm:<6} {nominal.length_parameter_names[wrong]} 3 % long, learn_body "
            f"{_reach_text(m)}\n         after the {warmup} warm-up episodes: worst segment "
            f"{worst:.2f} % ({final:.2f} % after the measured ones); {text}",
            flush=True,
        )
    finally:
        env.close()


def image(arm: str, warmup: int, episodes: int) -> None:
    """Lengths 3 % long, no learning: the Cartesian goal against the image goal, then the
    image goal with 30 % of the camera frames dropped; the same seeds as part ``lengths``'
    measured episodes (the image goal has nothing to warm up)."""
    seeds = list(range(warmup, warmup + episodes))
    for extra, names in (
        ({}, ("active-inference", "active-inference+image")),
        ({"camera_dropout_probability": 0.3}, ("active-inference+image",)),
    ):
        conditions = {"model_length_scale": LENGTH_ERROR, **extra}
        env = _env(arm, "velocity", conditions)
        try:
            for name in names:
                m = _measure(env, _build(name, env, conditions), seeds)
                label = name + (" (30 % frames dropped)" if extra else "")
                print(
                    f"  {arm:<6} {label:<44} {_reach_text(m)}  median final gap in the image "
                    f"{m['median_pixel_gap']:.1f} px",
                    flush=True,
                )
        finally:
            env.close()


def payload(warmup: int, episodes: int) -> None:
    conditions = {"payload_kg": PAYLOAD_KG}
    warm = list(range(warmup))
    seeds = list(range(warmup, warmup + episodes))
    env = _env("own", "torque", conditions)
    learning = "active-inference-torque+learn"
    try:
        agent, m, _ = _compare(
            env, "own", "active-inference-torque", learning, conditions, warmup, episodes
        )
        mass, _ = agent.body_learning.payload()
        print(
            f"  own    {learning:<30} {_reach_text(m)}\n"
            f"         learned behind the safety wrapper: payload {mass:.3f} kg "
            f"({100 * (mass / PAYLOAD_KG - 1):+.1f} %), "
            f"{agent.body_learning.rejected} sensations refused by the gate",
            flush=True,
        )
        bare = _env("own", "torque", conditions, safety=False)
        try:
            calibrating = _build(learning, bare, conditions)
            if warm:
                run_policy_episodes(bare, calibrating, warm)
            learned = calibrating.learned_options()
            mass_sd, _ = calibrating.body_learning.payload_sd()
        finally:
            bare.close()
        reloaded = ArmAgent.from_env(env, **learned)
        m = _measure(env, reloaded, seeds)
        mass = learned["payload_kg"]
        print(
            f"  own    {'calibrate, save, reload':<30} {_reach_text(m)}\n"
            f"         learned without the wrapper in {warmup} episodes: payload {mass:.3f} kg "
            f"({100 * (mass / PAYLOAD_KG - 1):+.1f} %, sd {mass_sd:.3f} kg), centre of mass "
            f"{learned['payload_com_m']} m; [agent] {learned}",
            flush=True,
        )
    finally:
        env.close()


def timing(rounds: int) -> None:
    for control in ("velocity", "torque"):
        env = _env("own", control, {})
        try:
            agents = {learn: ArmAgent.from_env(env, learn_body=learn) for learn in (False, True)}
            times: dict[bool, list[float]] = {False: [], True: []}
            for i in range(rounds):
                for learn, agent in agents.items():
                    times[learn] += [r.agent_step_us for r in rollout(env, agent, 1, seed=i)]
            plain, learning = (float(np.median(times[k])) for k in (False, True))
            print(
                f"  own    {control:<8} agent step {plain:7.1f} us, with learn_body "
                f"{learning:7.1f} us: ratio {learning / plain:.2f} ({rounds} episodes each)",
                flush=True,
            )
        finally:
            env.close()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", type=int, default=20, help="measured episodes per row")
    parser.add_argument("--warmup", type=int, default=5, help="warm-up episodes per row")
    parser.add_argument("--arms", default="iiwa,panda,xarm6,own,seedling")
    parser.add_argument("--parts", default="lengths,image,payload,timing")
    parser.add_argument(
        "--calibrate",
        type=int,
        default=0,
        help="body_calibration_episodes of the learning rows (parts lengths, single), "
        "at most --warmup",
    )
    args = parser.parse_args(argv)
    if args.episodes < 1 or args.warmup < 0:
        parser.error("--episodes must be >= 1 and --warmup >= 0")
    if not 0 <= args.calibrate <= args.warmup:
        parser.error(f"--calibrate must be in 0..--warmup ({args.warmup}), got {args.calibrate}")
    CALIBRATE["episodes"] = args.calibrate
    parts = args.parts.split(",")
    unknown = set(parts) - {"lengths", "image", "single", "payload", "timing"}
    if unknown:
        parser.error(
            f"--parts: unknown {sorted(unknown)}; choose from lengths, image, single, payload, "
            "timing"
        )
    wrong = f"link lengths {100 * (LENGTH_ERROR - 1):.0f} % long"
    for part, run, title in (
        ("lengths", lengths, f"{wrong}, velocity control, {args.warmup} warm-up +"),
        ("image", image, f"{wrong}, no learning, goal_space cartesian against image,"),
        (
            "single",
            single,
            f"one link {100 * (LENGTH_ERROR - 1):.0f} % long, {args.warmup} warm-up +",
        ),
    ):
        if part in parts:
            print(f"{title} {args.episodes} measured episodes of {EPISODE_S:g} s")
            for arm in args.arms.split(","):
                run(arm, args.warmup, args.episodes)
    if "payload" in parts:
        print(
            f"unmodelled {PAYLOAD_KG} kg payload, own 3-DoF arm, torque control, "
            f"{args.warmup} warm-up + {args.episodes} measured episodes"
        )
        payload(args.warmup, args.episodes)
    if "timing" in parts:
        print("the agent's step with and without learn_body (median over steps)")
        timing(max(1, args.episodes // 4))
    return 0


if __name__ == "__main__":
    sys.exit(main())
