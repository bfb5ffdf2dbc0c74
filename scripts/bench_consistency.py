"""Is the agent's joint-angle belief honest? Worst-joint mean NEES and reach rate per arm.

For each arm (iiwa, panda, xarm6 and our 3-DoF potting arm, a URDF that is not built in),
each bench condition (:data:`blanket.conditions.PRESETS`) and each control mode, runs the
default :class:`~blanket.agent.ArmAgent` in the benchmark's env (perturbations inside, the
safety wrapper outermost: :func:`blanket.bench.rl.make_bench_env`) through the one rollout
loop with the bench's observer (:func:`blanket.bench.evaluate.run_policy_episodes`), and prints
per row:

* ``NEES med / max``: the worst joint's mean NEES ``((belief - truth) / belief_sd)^2`` after
  the first :data:`blanket.consistency.SETTLE_S` of each episode (1 for an honest belief;
  :func:`blanket.consistency.worst_component_check`), median and max over the episodes;
* ``ratio``: that max over the acceptance bound 3 (<= 1 passes);
* ``honest``: episodes whose mean lies inside the 95 % chi-square region (Bar-Shalom, Li &
  Kirubarajan 2001, sec. 5.4.2);
* ``reached``: episodes reached within the env's 1 cm tolerance (held 0.25 s), and the median
  final error.

``--env-option KEY=VALUE`` (repeatable) passes env keywords (e.g. ``--env-option
camera=rendered --env-option camera_occluder=true``). ``--option KEY=VALUE`` (repeatable)
passes agent options: ``--option learn_motor_precision=false
--option velocity_step_sd_rad_s=0 --option velocity_step_gain=0`` is the model before issue 17
(a fixed efference copy, white-jerk motion only); ``--option learn_precision=true`` learns the
sensors' precisions (what ``sensor-noise-x3`` needs). pybullet prints its own warnings on
stderr (e.g. the xarm6's inertias); ``2>/dev/null`` hides them.

    python scripts/bench_consistency.py [--episodes 10] [--arms iiwa,arm3]
        [--conditions nominal,payload-1.5kg] [--controls velocity,torque]

``--timing BASE`` instead times the agent's step (``act``, median over steps) with the
``--option`` values against the same agent with the options ``BASE`` (``KEY=VALUE,...``),
episodes of the two alternated in one run on each arm and control of the first condition,
and prints the ratio: ``--timing robust_precision=false`` is the cost of the noise guard.
"""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path

import numpy as np

ASSETS = Path(__file__).resolve().parents[1] / "envs" / "blanket_envs" / "assets"
#: Arm label -> env keywords of ``blanket/arm-reach-v0``.
ARMS = {
    "iiwa": {"robot": "iiwa"},
    "panda": {"robot": "panda"},
    "xarm6": {"robot": "xarm6"},
    "arm3": {"urdf": str(ASSETS / "potting_arm_3dof.urdf"), "end_effector": "tool_tip"},
}
NEES_BOUND = 3.0


def _value(text: str) -> object:
    for cast in (int, float):
        try:
            return cast(text)
        except ValueError:
            pass
    return {"true": True, "false": False}.get(text.lower(), text)


def main() -> None:
    from blanket.agent import ArmAgent
    from blanket.bench.evaluate import run_policy_episodes
    from blanket.bench.metrics import episode_metrics
    from blanket.bench.rl import make_bench_env
    from blanket.conditions import PRESETS, resolve_conditions

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", type=int, default=10)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--episode-s", type=float, default=4.0)
    parser.add_argument("--arms", default=",".join(ARMS))
    parser.add_argument("--conditions", default=",".join(PRESETS))
    parser.add_argument("--controls", default="velocity,torque")
    parser.add_argument("--option", action="append", default=[], metavar="KEY=VALUE")
    parser.add_argument(
        "--env-option", action="append", default=[], metavar="KEY=VALUE", help="env keyword"
    )
    parser.add_argument("--per-episode", action="store_true", help="print every episode's NEES")
    parser.add_argument("--timing", metavar="KEY=VALUE,...", help="time against these options")
    args = parser.parse_args()
    if args.episodes < 1:
        raise SystemExit("--episodes must be >= 1")
    arms = [a for a in args.arms.split(",") if a]
    for a in arms:
        if a not in ARMS:
            raise SystemExit(f"--arms: unknown arm {a!r}; choose from {', '.join(ARMS)}")
    controls = [c for c in args.controls.split(",") if c]
    for c in controls:
        if c not in ("velocity", "torque"):
            raise SystemExit(f"--controls: velocity or torque, got {c!r}")
    conditions = resolve_conditions([c for c in args.conditions.split(",") if c])
    options: dict[str, object] = {}
    env_options: dict[str, object] = {}
    for flag, items, into in (
        ("--option", args.option, options),
        ("--env-option", args.env_option, env_options),
    ):
        for item in items:
            key, sep, raw = item.partition("=")
            if not sep:
                raise SystemExit(f"{flag}: expected KEY=VALUE, got {item!r}")
            into[key.strip()] = _value(raw.strip())

    seeds = [args.seed + i for i in range(args.episodes)]
    if args.timing is not None:
        base: dict[str, object] = {}
        for item in filter(None, args.timing.split(",")):
            key, _, raw = item.partition("=")
            base[key.strip()] = _value(raw.strip())
        _timing(arms, controls, conditions[0], options, base, seeds, args.episode_s)
        return
    print(
        f"episodes {args.episodes} (seeds {seeds[0]}..{seeds[-1]}), options {options or '{}'}, "
        f"env options {env_options or '{}'}"
    )
    print(
        f"{'arm':<6}{'control':<9}{'condition':<23}{'NEES med':>9}{'max':>9}{'ratio':>7}"
        f"{'honest':>8}{'reached':>9}{'final cm':>9}{'s':>6}"
    )
    worst = 0.0
    for arm in arms:
        for control in controls:
            for condition in conditions:
                t0 = time.perf_counter()
                env = make_bench_env(
                    "iiwa" if "robot" not in ARMS[arm] else ARMS[arm]["robot"],
                    control,
                    args.episode_s,
                    conditions=condition.parameters,
                    **{k: v for k, v in ARMS[arm].items() if k != "robot"},
                    **env_options,
                )
                try:
                    agent = ArmAgent.from_env(env, **{**condition.model_options, **options})
                    rows = [episode_metrics(t) for t in run_policy_episodes(env, agent, seeds)]
                finally:
                    env.close()
                nees = np.array(
                    [r["belief_nees"] if r["belief_nees"] is not None else math.nan for r in rows]
                )
                honest = sum(bool(r["belief_consistent"]) for r in rows)
                reached = sum(bool(r["success_1cm"]) for r in rows)
                final = np.median([r["final_error_m"] for r in rows]) * 100
                worst = max(worst, float(np.nanmax(nees)))
                print(
                    f"{arm:<6}{control:<9}{condition.name:<23}{np.nanmedian(nees):>9.2f}"
                    f"{np.nanmax(nees):>9.3g}{np.nanmax(nees) / NEES_BOUND:>7.2f}"
                    f"{honest:>5}/{len(rows):<2}{reached:>6}/{len(rows):<2}{final:>9.2f}"
                    f"{time.perf_counter() - t0:>6.0f}",
                    flush=True,
                )
                if args.per_episode:
                    print("      " + " ".join(f"{v:.3g}" for v in nees))
    print(f"worst episode NEES / {NEES_BOUND:g}: {worst / NEES_BOUND:.2f}")


def _timing(arms, controls, condition, options, base, seeds, episode_s) -> None:
    """Median ``act`` time with ``options`` over that with ``base``, episodes alternated."""
    from blanket.agent import ArmAgent
    from blanket.bench.rl import make_bench_env

    print(f"timing: {options or '{}'} against {base}; condition {condition.name}")
    print(f"{'arm':<6}{'control':<9}{'base us':>9}{'new us':>9}{'ratio':>7}")
    for arm in arms:
        for control in controls:
            env = make_bench_env(
                "iiwa" if "robot" not in ARMS[arm] else ARMS[arm]["robot"],
                control,
                episode_s,
                conditions=condition.parameters,
                **{k: v for k, v in ARMS[arm].items() if k != "robot"},
            )
            try:
                agents = [
                    ArmAgent.from_env(env, **{**condition.model_options, **o})
                    for o in (base, options)
                ]
                times: list[list[float]] = [[], []]
                for seed in seeds:
                    for k, agent in enumerate(agents):
                        obs, _ = env.reset(seed=seed)
                        agent.reset()
                        done = False
                        while not done:
                            t0 = time.perf_counter()
                            action = agent.act(obs)
                            times[k].append(time.perf_counter() - t0)
                            obs, _, term, trunc, _ = env.step(action)
                            done = term or trunc
            finally:
                env.close()
            a, b = (float(np.median(t)) * 1e6 for t in times)
            print(f"{arm:<6}{control:<9}{a:>9.1f}{b:>9.1f}{b / a:>7.2f}", flush=True)


if __name__ == "__main__":
    main()
