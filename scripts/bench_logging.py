"""Overhead of trajectory logging: the loop ``blanket demo`` runs, and a bare env loop.

``--loop runner`` (the acceptance loop): the iiwa reach scenario with the ArmAgent behind
the safety wrapper, recording all four groups with the Parquet writes inside the timed
region. It prints two estimates, see :func:`runner_loop`: the time attributed to the logging
calls within the same logged rounds (robust to machine-speed drift, with a breakdown by
call) and an A/B comparison of the fastest rounds with and without logging (which also sees
indirect costs).

``--instructions``: the same runner loop counted in machine instructions under valgrind's
cachegrind, with and without logging, as a ratio. Instruction counts do not depend on the
machine's speed, so this estimate is free of the timing noise of a shared VM (the counts
still varied by ~2 % between runs here; it does not see cache misses). Needs
``valgrind`` on the PATH (``apt-get install valgrind``); takes some minutes.

``--loop planar``: ``blanket/planar-2link-v0`` for N control steps with a proportional
task-space controller (joint velocity = gain * J(q)^T (target - tip(q)), analytic planar
kinematics, clipped to the action bounds), without and with ``RunWriter.record`` on every
step: a stress case, since the loop itself does almost nothing.

Acceptance: logging is at most 10 % of the loop's time with recording on.

Usage::

    python scripts/bench_logging.py [--loop runner|planar|both|pairs] [--rounds 16] [--pairs 40]
    python scripts/bench_logging.py --instructions
"""

from __future__ import annotations

import argparse
import functools
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import gymnasium as gym
import numpy as np

import blanket  # noqa: F401  (registers the env ids)
from blanket.logs import RunWriter, read_run
from blanket.logs.groups import active_group, external_group

L1_M, L2_M = 0.4, 0.3  # link lengths of planar_2link.urdf
GAIN = 6.0


def policy(obs: dict, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Jacobian-transpose step toward the target, from the sensed joint angles only."""
    q1, q2 = obs["joint_angle_rad"]
    s1, c1 = np.sin(q1), np.cos(q1)
    s12, c12 = np.sin(q1 + q2), np.cos(q1 + q2)
    tip = np.array([L1_M * c1 + L2_M * c12, L1_M * s1 + L2_M * s12])
    jacobian = np.array(
        [[-L1_M * s1 - L2_M * s12, -L2_M * s12], [L1_M * c1 + L2_M * c12, L2_M * c12]]
    )
    error = obs["target_position_m"][:2] - tip
    return np.clip(GAIN * jacobian.T @ error, low, high)


def run_loop(env: gym.Env, steps: int, writer: RunWriter | None, seed: int) -> tuple[float, float]:
    """Seconds for ``steps`` control steps, and the part spent in ``end_episode``."""
    writing = 0.0
    low, high = env.action_space.low, env.action_space.high
    obs, info = env.reset(seed=seed)
    episode = 0
    step = 0
    if writer is not None:
        writer.begin_episode(episode, max_steps=1024)
    start = time.perf_counter()
    for _ in range(steps):
        action = policy(obs, low, high)
        if writer is not None:
            external = external_group(info)
        obs_before = obs
        obs, _reward, terminated, truncated, info = env.step(action)
        if writer is not None:
            # the rows of the loop's log (blanket.logs.groups), written by this bare loop
            writer.record(
                step,
                step / env.unwrapped.control_hz,
                external=external,
                sensory=obs_before,
                active=active_group(action, info),
            )
        step += 1
        if terminated or truncated:
            if writer is not None:
                tick = time.perf_counter()
                writer.end_episode({"seed": seed})
                writing += time.perf_counter() - tick
            episode += 1
            step = 0
            obs, info = env.reset()
            if writer is not None:
                writer.begin_episode(episode, max_steps=1024)
    if writer is not None:
        tick = time.perf_counter()
        writer.end_episode({"seed": seed})
        writing += time.perf_counter() - tick
    return time.perf_counter() - start, writing


class _Stopwatch:
    """Accumulates the time spent inside the calls it wraps (nanoseconds, per call name)."""

    def __init__(self) -> None:
        self.by_name: dict[str, int] = {}
        self.calls: dict[str, int] = {}

    @property
    def ns(self) -> int:
        return sum(self.by_name.values())

    def wrap(self, fn):
        name = fn.__name__
        self.by_name.setdefault(name, 0)
        self.calls.setdefault(name, 0)

        @functools.wraps(fn)  # keeps the signature, so the runner still asks for views
        def timed(*args, **kwargs):
            t0 = time.perf_counter_ns()
            try:
                return fn(*args, **kwargs)
            finally:
                self.by_name[name] += time.perf_counter_ns() - t0
                self.calls[name] += 1

        return timed


class _TimedWriter:
    """A RunWriter whose begin/record/end calls are timed by a stopwatch."""

    def __init__(self, writer: RunWriter, watch: _Stopwatch) -> None:
        self.begin_episode = watch.wrap(writer.begin_episode)
        self.record = watch.wrap(writer.record)
        self.end_episode = watch.wrap(writer.end_episode)


def _stopwatch_cost_ns() -> float:
    """Nanoseconds the stopwatch itself adds to one timed call (a wrapped no-op)."""
    watch = _Stopwatch()

    def noop(*args, **kwargs):
        return None

    timed = watch.wrap(noop)
    for _ in range(200_000):
        timed(1, key=2)
    return watch.by_name["noop"] / 200_000


def _iiwa_loop(name: str) -> tuple[Any, Any, dict[str, Any]]:
    """The setup ``blanket demo`` runs: the iiwa reach env behind the safety wrapper, its
    ArmAgent, and the run metadata a writer needs (scenario ``name``)."""
    from blanket.agent import ArmAgent
    from blanket.runner import _run_metadata, with_safety
    from blanket.scenario import Scenario, make_env

    scenario = Scenario(env="blanket/arm-reach-v0", env_options={"robot": "iiwa"}, name=name)
    env = with_safety(make_env(scenario.env, scenario.env_options))
    return env, ArmAgent.from_env(env), _run_metadata(scenario, env, 0)


def runner_loop(rounds: int, episodes: int) -> bool:
    """The loop ``blanket demo`` runs (iiwa, ArmAgent, safety wrapper), with and without
    recording all four groups (the Parquet writes inside the timed region).

    Two estimates of the overhead:

    * attributed: in each logged round, the time spent in the logging calls themselves (the
      writer, the agent's diagnostics view, the runner's group building) against the rest of
      the same loop. Both parts run interleaved, step by step, so a change of machine speed
      between rounds (seen here: +-40 % on a shared VM) affects both alike.
    * A/B: rounds without logging and with it (no stopwatch), in rotating order, fastest
      of each compared. It also sees indirect costs (caches, the file writes). The
      fastest of 16 rounds is stable here (an A/A comparison of two plain series agreed to
      0.1 %) where means and medians of rounds scatter by +-15 %.

    Acceptance holds when both put logging at <= 10 % of the loop with recording on.
    """
    import blanket.logs.groups as groups
    from blanket.runner import run_episodes

    env, agent, meta = _iiwa_loop("bench-logging-runner")
    plain, plain_2, logged, shares = [], [], [], []
    parts: dict[str, int] = {}
    calls = [0]
    # the loop's log observer (blanket.rollout.RunLog) takes the group builders when it is made
    original = (groups.external_group, groups.active_group, agent.diagnostics)

    def timed(seed: int, run_dir: Path | None, watched: bool = True) -> float:
        if run_dir is None:
            t0 = time.perf_counter()
            run_episodes(env, agent, episodes, seed, progress=False)
            return time.perf_counter() - t0
        if not watched:
            with RunWriter(run_dir, meta) as writer:
                t0 = time.perf_counter()
                run_episodes(env, agent, episodes, seed, writer=writer, progress=False)
                return time.perf_counter() - t0
        watch = _Stopwatch()
        groups.external_group = watch.wrap(original[0])
        groups.active_group = watch.wrap(original[1])
        agent.diagnostics = watch.wrap(original[2])
        try:
            with RunWriter(run_dir, meta) as writer:
                t0 = time.perf_counter()
                run_episodes(
                    env, agent, episodes, seed, writer=_TimedWriter(writer, watch), progress=False
                )
                total = time.perf_counter() - t0
        finally:
            groups.external_group, groups.active_group = original[:2]
            del agent.diagnostics
        shares.append((watch.ns * 1e-9, total))
        for name, ns in watch.by_name.items():
            parts[name] = parts.get(name, 0) + ns
        calls[0] += sum(watch.calls.values())
        return total

    with tempfile.TemporaryDirectory() as tmp:
        timed(0, Path(tmp) / "warm-up")
        timed(0, Path(tmp) / "warm-up-2", watched=False)
        timed(0, None)
        shares.clear()
        parts.clear()
        calls[0] = 0
        for r in range(rounds):
            # each kind in each position equally often (a change of machine speed within a
            # round then favours none of them)
            kinds = ("plain", "logged", "watched", "plain-2")
            for kind in kinds[r % 4 :] + kinds[: r % 4]:
                if kind == "plain":
                    plain.append(timed(r, None))
                elif kind == "plain-2":  # an A/A control: the noise floor of the A/B
                    plain_2.append(timed(r, None))
                elif kind == "logged":
                    logged.append(timed(r, Path(tmp) / f"run-{r}", watched=False))
                else:
                    timed(r, Path(tmp) / f"watched-{r}")
        columns = read_run(Path(tmp) / "run-0").shape[1]
    env.close()
    steps = episodes * env.unwrapped.max_steps
    t_plain, t_logged = min(plain), min(logged)
    t_plain2, t_logged2 = sorted(plain)[1], sorted(logged)[1]
    spent = sum(s for s, _ in shares)
    total = sum(t for _, t in shares)
    attributed = spent / (total - spent)
    per_round = sorted(s / (t - s) for s, t in shares)
    ab = 1.0 - t_plain / t_logged  # share of the loop with recording on
    ab2 = 1.0 - t_plain2 / t_logged2
    print(f"runner loop (iiwa, agent, safety): {steps} steps per round, {rounds} rounds")
    print(f"columns logged            {columns}")
    print(
        f"attributed: logging calls {spent / (rounds * steps) * 1e6:.1f} us/step of "
        f"{total / (rounds * steps) * 1e6:.1f} us/step with recording on"
    )
    print(
        f"  overhead                {attributed * 100:.1f} % of the loop without them "
        f"({spent / total * 100:.1f} % of the loop with recording on; rounds "
        f"{per_round[0] * 100:.1f} .. {per_round[-1] * 100:.1f} %)"
    )
    print(
        "  by call                 "
        + ", ".join(f"{k} {v / (rounds * steps) / 1e3:.1f}" for k, v in parts.items())
        + " us/step"
    )
    watch_s = _stopwatch_cost_ns() * calls[0] * 1e-9
    print(
        f"  of which the stopwatch  {watch_s / (rounds * steps) * 1e6:.1f} us/step "
        f"({calls[0] / (rounds * steps):.1f} timed calls a step); without it "
        f"{(spent - watch_s) / (total - watch_s) * 100:.1f} % of the loop with recording on"
    )
    print(
        f"A/B: fastest round        {t_plain / steps * 1e6:.1f} us/step without, "
        f"{t_logged / steps * 1e6:.1f} us/step with logging (no stopwatch)"
    )
    aa = abs(1.0 - min(plain) / min(plain_2))
    print(
        f"  overhead                {ab * 100:.1f} % of the loop with recording on "
        f"({(t_logged / t_plain - 1) * 100:.1f} % added to the loop without; second-fastest "
        f"rounds {ab2 * 100:.1f} %)"
    )
    print(f"  A/A control             {aa * 100:.1f} % between two plain series (the noise floor)")
    rest = min(t - s for s, t in shares)  # the fastest watched round outside the logging calls
    print(
        f"  indirect                {(rest - t_plain) / steps * 1e6:+.1f} us/step: the loop "
        "outside the logging calls (fastest watched round) against the plain loop"
    )
    share = spent / total
    ok = share <= 0.10 and ab <= 0.10
    print(
        "acceptance (logging <= 10 % of the loop with recording on, attributed "
        f"{share * 100:.1f} % and A/B {ab * 100:.1f} %): {'PASS' if ok else 'FAIL'}"
    )
    return ok


def paired_episodes(pairs: int) -> None:
    """Adjacent single episodes without and with logging (one writer for the logged ones; the
    episode's Parquet write is inside its timing), alternating which comes first: the median
    of the per-pair ratios, with a bootstrap 95 % interval. Adjacent episodes see the same
    machine speed, which min-of-rounds comparisons cannot rely on here. The same for the CPU
    time of the loop's thread (``time.thread_time``): on a shared machine it leaves out the
    time other processes held the core (the wall-clock line is the acceptance figure)."""
    from blanket.runner import run_episode

    env, agent, meta = _iiwa_loop("bench-logging-pairs")
    with tempfile.TemporaryDirectory() as tmp:
        writer = RunWriter(Path(tmp) / "run", meta)
        episode = [0]

        def one(logged: bool, seed: int) -> tuple[float, float]:
            t0, c0 = time.perf_counter(), time.thread_time()
            run_episode(env, agent, seed, episode[0], writer=writer if logged else None)
            elapsed, cpu = time.perf_counter() - t0, time.thread_time() - c0
            episode[0] += logged
            return elapsed, cpu

        one(True, 0)
        one(False, 0)
        ratios, cpu_ratios = [], []
        for r in range(pairs):
            if r % 2 == 0:
                plain = one(False, r)
                logged = one(True, r)
            else:
                logged = one(True, r)
                plain = one(False, r)
            ratios.append(logged[0] / plain[0])
            cpu_ratios.append(logged[1] / plain[1])
        writer.close()
    env.close()
    rng = np.random.default_rng(0)
    for name, values in (("", ratios), ("  CPU time of the loop's thread: ", cpu_ratios)):
        ratio = np.array(values)
        boot = np.median(rng.choice(ratio, (4000, ratio.size)), axis=1)
        lo, hi = np.percentile(boot, [2.5, 97.5])
        med = float(np.median(ratio))
        print(
            f"{name or f'paired episodes ({pairs} pairs): '}logged/plain median {med:.3f} "
            f"(95 % CI {lo:.3f} .. {hi:.3f}); logging {(1 - 1 / med) * 100:.1f} % of the loop "
            f"with recording on (CI {(1 - 1 / lo) * 100:.1f} .. {(1 - 1 / hi) * 100:.1f} %)"
        )


def _instruction_child(mode: str, episodes: int) -> None:
    """The runner loop for ``episodes`` episodes (seeds 0, 1, ...), logged or not: the
    program valgrind counts (see :func:`instruction_counts`). Prints the steps it ran."""
    from blanket.runner import run_episodes

    env, agent, meta = _iiwa_loop("bench-logging-ir")
    with tempfile.TemporaryDirectory() as tmp:
        if mode == "logged":
            with RunWriter(Path(tmp) / "run", meta) as writer:
                results = run_episodes(env, agent, episodes, 0, writer=writer, progress=False)
        else:
            results = run_episodes(env, agent, episodes, 0, progress=False)
    env.close()
    print(f"steps {sum(r.steps for r in results)}")


def _count(mode: str, episodes: int, tmp: str) -> subprocess.Popen:
    out = Path(tmp) / f"cg.{mode}.{episodes}"
    command = [
        "valgrind",
        "--tool=cachegrind",
        "--cache-sim=no",
        f"--cachegrind-out-file={out}",
        sys.executable,
        __file__,
        "--instruction-child",
        mode,
        str(episodes),
    ]
    # a fixed hash seed: the same dict layouts, so the same instructions, in every run
    environment = {**os.environ, "PYTHONHASHSEED": "0", "MPLBACKEND": "Agg"}
    return subprocess.Popen(
        command, env=environment, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )


def _counted(process: subprocess.Popen, what: str) -> tuple[int, int] | None:
    """Wait for one valgrind run: (instructions, steps), or None (and the error shown)."""
    out, err = process.communicate()
    instructions = re.search(r"I\s+refs:\s+([\d,]+)", err)
    steps = re.search(r"^steps (\d+)$", out, re.MULTILINE)
    if process.returncode != 0 or instructions is None or steps is None:
        print(f"valgrind run {what} failed:\n{err[-2000:]}")
        return None
    return int(instructions.group(1).replace(",", "")), int(steps.group(1))


def instruction_counts(episodes: int) -> bool:
    """Instructions per episode of the runner loop with and without logging.

    Each configuration runs twice, for 1 and for ``1 + episodes`` episodes; the difference
    removes start-up and the first (warm-up) episode, leaving ``episodes`` steady episodes.
    Two runs go at a time (one per core). Returns whether logging is <= 10 % of the logged
    loop's instructions.
    """
    if shutil.which("valgrind") is None:
        print("--instructions needs valgrind on the PATH (apt-get install valgrind)")
        return False
    counts: dict[tuple[str, int], tuple[int, int]] = {}
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        # one uncounted run under valgrind first: numba sees valgrind's CPU model, not the
        # machine's, so its first run under valgrind compiles the kernels and caches them
        # (measured: otherwise the 1-episode runs, counted first, came out larger than the
        # 3-episode runs)
        if _counted(_count("plain", 1, tmp), "warm-up") is None:
            return False
        print(f"  warm-up run ({time.perf_counter() - t0:.0f} s)", flush=True)
        jobs = [(m, n) for n in (1, 1 + episodes) for m in ("plain", "logged")]
        for i in range(0, len(jobs), 2):
            running = {job: _count(*job, tmp) for job in jobs[i : i + 2]}
            for job, process in running.items():
                counted = _counted(process, f"{job[0]} x{job[1]}")
                if counted is None:
                    return False
                counts[job] = counted
            print(
                f"  counted {', '.join(f'{m} x{n}' for m, n in running)} "
                f"({time.perf_counter() - t0:.0f} s so far)",
                flush=True,
            )

    def per_step(mode: str) -> float:
        (i_1, s_1), (i_n, s_n) = counts[mode, 1], counts[mode, 1 + episodes]
        return (i_n - i_1) / (s_n - s_1)

    plain, logged = per_step("plain"), per_step("logged")
    if plain <= 0 or logged <= 0:
        print(f"inconsistent counts (a run did extra one-off work): {counts}")
        return False
    share = 1.0 - plain / logged
    print(f"instructions (cachegrind), runner loop, {episodes} steady episodes after a warm-up")
    print(f"  without logging         {plain / 1e3:.1f} k instructions/step")
    print(f"  with logging            {logged / 1e3:.1f} k instructions/step")
    print(
        f"  overhead                {share * 100:.1f} % of the loop with recording on "
        f"({(logged / plain - 1) * 100:.1f} % added to the loop without)"
    )
    ok = share <= 0.10
    print(
        f"acceptance (logging <= 10 % of the loop's instructions with recording on): "
        f"{'PASS' if ok else 'FAIL'}"
    )
    return ok


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=4800)
    parser.add_argument("--rounds", type=int, default=16)
    parser.add_argument(
        "--loop",
        choices=("planar", "runner", "both", "pairs"),
        default="both",
        help="planar: a bare env loop; runner: the loop blanket demo runs; pairs: only the "
        "paired episodes of the runner loop (with --pairs N)",
    )
    parser.add_argument(
        "--episodes",
        type=int,
        default=2,
        help="episodes per runner round (2+: an episode's encoding runs beside the next)",
    )
    parser.add_argument(
        "--pairs",
        type=int,
        default=0,
        help="also time N pairs of adjacent episodes without/with logging (runner loop)",
    )
    parser.add_argument(
        "--instructions",
        action="store_true",
        help="count the runner loop's instructions under valgrind instead of timing it",
    )
    parser.add_argument("--instruction-child", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args()
    for option in ("steps", "rounds", "episodes"):
        if getattr(args, option) < 1:
            parser.error(f"--{option}: expected an int >= 1, got {getattr(args, option)}")
    if args.pairs < 0:
        parser.error(f"--pairs: expected an int >= 0, got {args.pairs}")
    if args.instruction_child:
        _instruction_child(args.instruction_child[0], int(args.instruction_child[1]))
        return
    if args.instructions:
        instruction_counts(args.episodes)
        return
    if args.loop == "pairs":
        paired_episodes(args.pairs or 40)
        return
    if args.loop in ("runner", "both"):
        runner_loop(args.rounds, args.episodes)
        if args.pairs:
            paired_episodes(args.pairs)
        if args.loop == "runner":
            return
        print()
    env = gym.make("blanket/planar-2link-v0")
    metadata = {
        "scenario": "bench-logging",
        "seed": 0,
        "robot": "planar_2link",
        "joint_names": list(env.unwrapped.description.joint_names),
    }
    plain: list[float] = []
    logged: list[tuple[float, float]] = []
    with tempfile.TemporaryDirectory() as tmp:
        # Warm-up of both paths (the first Parquet write initialises pyarrow's writer).
        run_loop(env, 1000, None, seed=0)
        with RunWriter(Path(tmp) / "warm-up", metadata) as writer:
            run_loop(env, 1000, writer, seed=0)
        for r in range(args.rounds):
            plain.append(run_loop(env, args.steps, None, seed=r)[0])
            with RunWriter(Path(tmp) / f"run-{r}", metadata) as writer:
                logged.append(run_loop(env, args.steps, writer, seed=r))
        frame = read_run(Path(tmp) / "run-0")
        n_files = len(list((Path(tmp) / "run-0" / "episodes").glob("*.parquet")))
    env.close()
    t_plain = min(plain)
    t_logged, t_files = min(logged)
    overhead = t_logged / t_plain - 1.0
    per_step_us = (t_logged - t_plain) / args.steps * 1e6
    print(f"steps per round           {args.steps}  ({args.rounds} rounds, fastest kept)")
    print(f"loop without logging      {t_plain:.3f} s  ({t_plain / args.steps * 1e6:.1f} us/step)")
    print(
        f"loop with logging         {t_logged:.3f} s  ({t_logged / args.steps * 1e6:.1f} us/step)"
    )
    print(
        f"logging cost              {per_step_us:.1f} us/step "
        f"(of which file writes {t_files / args.steps * 1e6:.1f} us/step)"
    )
    print(f"overhead ratio            {overhead * 100:.1f} %  (acceptance: <= 10 %)")
    print(f"log check                 {len(frame)} rows, {frame.shape[1]} columns, {n_files} files")
    print("PASS" if overhead <= 0.10 else "FAIL")


if __name__ == "__main__":
    main()
