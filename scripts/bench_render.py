"""The rendered camera's cost, as ratios to pybullet's bare ``getCameraImage`` in the same run.

Per frame size (``--sizes``, default 160x120, 320x240 and 640x480), on one arm's scene, two
calls run interleaved in rounds (so the shared machine's drift hits both alike):

- ``bare``: ``getCameraImage`` with the rendered camera's arguments (TinyRenderer, no
  segmentation mask, the env's view and projection), nothing else;
- ``rendered``: one rendered-camera frame of the env: the tool-point marker moved onto the
  tip, the same ``getCameraImage`` call, the pixels wrapped as an array and both markers
  detected (colour threshold and centroid).

Then the loop: ``env.step`` with the agent (:class:`blanket.agent.ArmAgent`) in the loop and a
fixed command, projected against rendered camera (320x240 frames at 30 Hz, the tool of the
rendered mode in both, so the kinematics are the same), in interleaved blocks of one second
of control. Times are this thread's CPU time (``--wall``: the wall clock); every number is a
median over the rounds.

    python scripts/bench_render.py [--robot iiwa] [--rounds 30] [--loop-rounds 4]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

import blanket  # noqa: F401  (registers the envs)
from blanket.agent import ArmAgent
from blanket.sim.bullet import pybullet
from blanket_envs.arm_reach import ROBOT_TOOL_M, ArmReachEnv

CLOCK = time.thread_time_ns
TINY = pybullet.ER_TINY_RENDERER
BLOCK = 240


def _size(text: str) -> tuple[int, int]:
    width, height = text.lower().split("x")
    return int(width), int(height)


def frame_costs(robot: str, size: tuple[int, int], rounds: int) -> tuple[float, float]:
    """Median ms of the bare call and of a rendered-camera frame at ``size``."""
    env = ArmReachEnv(robot=robot, camera="rendered", camera_size_px=size, camera_noise_px=0.0)
    env.reset(seed=0)
    camera = env._camera
    client = env.world.client
    view, projection = env._view_matrix, env._projection_matrix
    width, height = size

    def bare() -> None:
        flags = pybullet.ER_NO_SEGMENTATION_MASK
        client.getCameraImage(width, height, view, projection, renderer=TINY, flags=flags)

    rng = np.random.default_rng(0)

    def rendered() -> None:
        camera.reset({}, rng)  # takes one frame: render and detect

    times: dict[str, list[float]] = {"bare": [], "rendered": []}
    for call in (bare, rendered):  # warm up
        call()
    for _ in range(rounds):
        for name, call in (("bare", bare), ("rendered", rendered)):
            start = CLOCK()
            call()
            times[name].append((CLOCK() - start) / 1e6)
    env.close()
    return float(np.median(times["bare"])), float(np.median(times["rendered"]))


def loop_costs(robot: str, rounds: int) -> dict[str, float]:
    """Median ms per control step of env + agent, projected and rendered camera."""
    tool = ROBOT_TOOL_M.get(robot, 0.0)
    loops = {}
    for mode in ("projected", "rendered"):
        env = ArmReachEnv(
            robot=robot, camera=mode, tool_m=tool, camera_size_px=(320, 240), episode_s=3600.0
        )
        agent = ArmAgent.from_env(env)
        obs, _ = env.reset(seed=0)
        agent.reset()
        loops[mode] = (env, agent, [obs])
    times: dict[str, list[float]] = {mode: [] for mode in loops}
    for k in range(rounds + 1):
        for mode, (env, agent, last) in loops.items():
            obs = last[0]
            start = CLOCK()
            for _ in range(BLOCK):
                obs = env.step(agent.act(obs))[0]
            elapsed = (CLOCK() - start) / 1e6 / BLOCK
            last[0] = obs
            if k:  # the first round warms up (compiled kernels, caches)
                times[mode].append(elapsed)
    for env, _, _ in loops.values():
        env.close()
    return {mode: float(np.median(t)) for mode, t in times.items()}


def main() -> None:
    global CLOCK
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--robot", default="iiwa")
    parser.add_argument("--sizes", nargs="+", default=["160x120", "320x240", "640x480"])
    parser.add_argument("--rounds", type=int, default=30, help="frames per call and size")
    parser.add_argument("--loop-rounds", type=int, default=4, help="1-s blocks per camera mode")
    parser.add_argument("--wall", action="store_true", help="time the wall clock")
    args = parser.parse_args()
    if args.wall:
        CLOCK = time.perf_counter_ns
    print(
        f"rendered camera on {args.robot}: ms per frame, median of {args.rounds} "
        f"({'wall' if args.wall else 'CPU'} time)"
    )
    print(f"{'size':>9} {'bare ms':>8} {'rendered ms':>12} {'ratio':>6}")
    for text in args.sizes:
        bare, rendered = frame_costs(args.robot, _size(text), args.rounds)
        print(f"{text:>9} {bare:8.2f} {rendered:12.2f} {rendered / bare:6.3f}")
    if args.loop_rounds > 0:
        loop = loop_costs(args.robot, args.loop_rounds)
        ratio = loop["rendered"] / loop["projected"]
        print(
            f"env + agent loop, 320x240 at 30 Hz, ms per control step: projected "
            f"{loop['projected']:.3f}, rendered {loop['rendered']:.3f}, slowdown {ratio:.2f}x"
        )


if __name__ == "__main__":
    main()
