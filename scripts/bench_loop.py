"""The closed loop's cost as ratios to pybullet's own step, all measured in one run.

For each built-in arm and control mode, four loops run interleaved in rounds (so the shared
machine's drift hits all of them alike), each timed per block of steps:

- ``bare``: pybullet called directly in the env's own client (the same URDF, bench bodies,
  motors and fixed command): ``setJointMotorControlArray``, ``stepSimulation`` and one
  ``getJointStates`` read -- the physical floor of the loop;
- ``floor`` (printed as a ratio): ``bare`` plus the other queries an env step needs (the
  tool tip's link state, the contact query, two ray tests per camera frame);
- ``env``: ``env.step`` of the bare env (``gymnasium.make(...).unwrapped``) with the same
  fixed command;
- ``env+agent``: the bare env with :class:`blanket.agent.ArmAgent` (order 2, encoders and
  camera) in the loop;
- ``demo loop``: what ``blanket demo`` runs per step: the safety wrapper, the agent, the one
  rollout loop and the Parquet log (whole episodes, resets and episode ends included).

The fixed command is zero joint velocity (velocity control) or the bias torque that holds the
home posture (torque control). Times are this thread's CPU time (``--wall``: the wall clock;
the demo loop's Parquet encoding runs in its own process and is not counted in either).
Every number printed is a median of the rounds; ratios are
against ``bare`` of the same arm and mode. Then, for the agent alone (report only): its step
at embedding orders 1..6 (iiwa, velocity) and on iiwa chains cut to 2..7 joints (order 2).

    python scripts/bench_loop.py                         # all arms, both modes, tables
    python scripts/bench_loop.py --robots iiwa --controls velocity --rounds 5 --no-agent-tables
"""

from __future__ import annotations

import argparse
import re
import tempfile
import time
from pathlib import Path

import gymnasium
import numpy as np

import blanket  # noqa: F401  (registers the envs)
from blanket.agent import ArmAgent
from blanket.logs import RunWriter
from blanket.rollout import RunLog, rollout
from blanket.runner import with_safety
from blanket.sim.bullet import pybullet
from blanket.sim.robots import builtin_robot

BLOCK = 240  # steps per timed block (1 s of control at 240 Hz)
#: The clock: this thread's CPU time (a shared machine's other processes do not count), or
#: the wall clock with --wall.
CLOCK = time.thread_time_ns


def fixed_command(env) -> np.ndarray:
    base = env.unwrapped
    if base.control == "velocity":
        return np.zeros(len(base.home_rad))
    q = base.home_rad
    return base.world.inverse_dynamics(q, np.zeros_like(q), np.zeros_like(q))


class Loops:
    """The four loops of one arm and control mode, each advancing one block per call."""

    def __init__(self, robot: str, control: str, urdf: str | None = None, tip: str | None = None):
        kw = {"control": control}
        kw.update({"urdf": urdf, "end_effector": tip} if urdf else {"robot": robot})
        self.env = gymnasium.make("blanket/arm-reach-v0", **kw).unwrapped
        self.demo_env = with_safety(gymnasium.make("blanket/arm-reach-v0", **kw))
        self.command = fixed_command(self.env)
        self.agent = ArmAgent.from_env(self.env, order=2)
        self.demo_agent = ArmAgent.from_env(self.demo_env, order=2)
        self.tmp = tempfile.TemporaryDirectory(prefix="bench_loop_")
        meta = {"scenario": "bench_loop", "robot": robot, "control": control}
        self.writer = RunWriter(Path(self.tmp.name) / "run", meta, overwrite=True)
        self.seed = 0
        self.episode = 0
        self._obs = None
        self._bare_ready = False

    def close(self) -> None:
        self.writer.close()
        self.env.close()
        self.demo_env.close()
        self.tmp.cleanup()

    def _reset(self):
        self.seed += 1
        obs, _ = self.env.reset(seed=self.seed)
        return obs

    def bare(self) -> float:
        env = self.env
        self._reset()
        world = env.world
        cid = world.client._client
        robot, joints = world.robot, list(world.joint_indices)
        command = self.command.tolist()
        motor = pybullet.setJointMotorControlArray
        step, read = pybullet.stepSimulation, pybullet.getJointStates
        if env.control == "velocity":
            mode, forces = pybullet.VELOCITY_CONTROL, list(world._velocity_motor_force)
            t0 = CLOCK()
            for _ in range(BLOCK):
                motor(
                    robot,
                    joints,
                    mode,
                    targetVelocities=command,
                    forces=forces,
                    physicsClientId=cid,
                )
                step(physicsClientId=cid)
                read(robot, joints, physicsClientId=cid)
        else:
            env.step(self.command)  # releases the velocity motors (torque mode is set up)
            mode = pybullet.TORQUE_CONTROL
            t0 = CLOCK()
            for _ in range(BLOCK):
                motor(robot, joints, mode, forces=command, physicsClientId=cid)
                step(physicsClientId=cid)
                read(robot, joints, physicsClientId=cid)
        return (CLOCK() - t0) / 1e3 / BLOCK

    def queries(self) -> float:
        """``bare`` plus the other pybullet queries an env step needs: the tool-tip link state,
        the contact query, and two ray tests per camera frame (the env's floor)."""
        env = self.env
        self._reset()
        world = env.world
        cid = world.client._client
        robot, joints, tip_link = world.robot, list(world.joint_indices), world.tip_link
        command = self.command.tolist()
        motor, step = pybullet.setJointMotorControlArray, pybullet.stepSimulation
        read, link = pybullet.getJointStates, pybullet.getLinkState
        contacts, ray = pybullet.getContactPoints, pybullet.rayTest
        centre = env._camera.centre_m.tolist()
        target = env._target.tolist()
        period = env._camera.period_steps
        if env.control == "velocity":
            mode, kw = pybullet.VELOCITY_CONTROL, {"targetVelocities": command}
            kw["forces"] = list(world._velocity_motor_force)
        else:
            env.step(self.command)
            mode, kw = pybullet.TORQUE_CONTROL, {"forces": command}
        t0 = CLOCK()
        for k in range(BLOCK):
            motor(robot, joints, mode, physicsClientId=cid, **kw)
            step(physicsClientId=cid)
            read(robot, joints, physicsClientId=cid)
            tip = link(robot, tip_link, computeForwardKinematics=True, physicsClientId=cid)[4]
            contacts(bodyA=robot, physicsClientId=cid)
            if k % period == 0:
                ray(centre, tip, physicsClientId=cid)
                ray(centre, target, physicsClientId=cid)
        return (CLOCK() - t0) / 1e3 / BLOCK

    def env_step(self) -> float:
        env, command = self.env, self.command
        self._reset()
        t0 = CLOCK()
        for _ in range(BLOCK):
            env.step(command)
        return (CLOCK() - t0) / 1e3 / BLOCK

    def env_agent(self) -> float:
        env, agent = self.env, self.agent
        obs = self._reset()
        agent.reset()
        agent.act(obs)  # the first call initialises the belief
        t0 = CLOCK()
        for _ in range(BLOCK):
            obs = env.step(agent.act(obs))[0]
        return (CLOCK() - t0) / 1e3 / BLOCK

    def demo(self) -> float:
        self.seed += 1
        t0 = CLOCK()
        results = rollout(
            self.demo_env,
            self.demo_agent,
            seeds=[self.seed],
            observers=[RunLog(self.writer)],
            first_episode=self.episode,
        )
        self.episode += 1
        return (CLOCK() - t0) / 1e3 / results[0].steps


def measure(robot: str, control: str, rounds: int) -> dict[str, float]:
    loops = Loops(robot, control)
    names = {
        "bare": loops.bare,
        "queries": loops.queries,
        "env": loops.env_step,
        "env+agent": loops.env_agent,
    }
    times: dict[str, list[float]] = {k: [] for k in (*names, "demo loop")}
    try:
        loops.env_agent()  # warm-up: compiles and caches
        for r in range(rounds):
            for name, fn in names.items():
                times[name].append(fn())
            if r % 4 == 0:  # a demo episode is 960 steps: fewer of them
                times["demo loop"].append(loops.demo())
    finally:
        loops.close()
    return {k: float(np.median(v)) for k, v in times.items()}


def cut_iiwa(joints: int, folder: Path) -> tuple[str, str]:
    """The iiwa URDF cut after ``joints`` joints (its tip: the last link kept)."""
    source = Path(builtin_robot("iiwa").urdf_path)
    text = source.read_text()
    for k in range(joints + 1, 8):
        text = re.sub(rf'\s*<joint name="lbr_iiwa_joint_{k}".*?</joint>', "", text, flags=re.S)
        text = re.sub(rf'\s*<link name="lbr_iiwa_link_{k}">.*?</link>', "", text, flags=re.S)
    text = re.sub(r'\s*<joint name="[^"]*ee[^"]*".*?</joint>', "", text, flags=re.S)
    text = re.sub(r'\s*<link name="[^"]*ee[^"]*".*?</link>', "", text, flags=re.S)
    text = text.replace('filename="meshes/', f'filename="{source.parent}/meshes/')
    path = folder / f"iiwa_{joints}dof.urdf"
    path.write_text(text)
    return str(path), f"lbr_iiwa_link_{joints}"


def agent_us(env, agent, steps: int, seed: int) -> float:
    obs, _ = env.reset(seed=seed)
    agent.reset()
    agent.act(obs)
    samples = []
    for _ in range(steps):
        t0 = CLOCK()
        action = agent.act(obs)
        samples.append((CLOCK() - t0) / 1e3)
        obs = env.step(action)[0]
    return float(np.median(samples))


def agent_tables(rounds: int) -> None:
    print("\nagent step alone (median us; report only), iiwa, velocity, by embedding order:")
    env = gymnasium.make("blanket/arm-reach-v0", robot="iiwa").unwrapped
    agents = {order: ArmAgent.from_env(env, order=order) for order in range(1, 7)}
    t = {order: [] for order in agents}
    for r in range(rounds):
        for order, agent in agents.items():
            t[order].append(agent_us(env, agent, BLOCK, r))
    env.close()
    first = np.median(t[1])
    for order in agents:
        m = np.median(t[order])
        print(f"  order {order}: {m:7.1f} us  ({m / first:.2f} x order 1)")
    print("by degrees of freedom (iiwa cut after 2..7 joints, order 2):")
    with tempfile.TemporaryDirectory() as folder:
        envs = {}
        for dof in range(2, 8):
            urdf, tip = cut_iiwa(dof, Path(folder))
            envs[dof] = gymnasium.make(
                "blanket/arm-reach-v0", urdf=urdf, end_effector=tip, targets="random"
            ).unwrapped
        agents = {dof: ArmAgent.from_env(e, order=2) for dof, e in envs.items()}
        t = {dof: [] for dof in envs}
        for r in range(rounds):
            for dof in envs:
                t[dof].append(agent_us(envs[dof], agents[dof], BLOCK, r))
        for e in envs.values():
            e.close()
    first = np.median(t[2])
    for dof in t:
        m = np.median(t[dof])
        print(f"  {dof} joints: {m:7.1f} us  ({m / first:.2f} x 2 joints, {m / dof:5.1f} us/joint)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--robots", default="iiwa,panda,xarm6")
    parser.add_argument("--controls", default="velocity,torque")
    parser.add_argument("--rounds", type=int, default=12, help="timed blocks per loop")
    parser.add_argument("--no-agent-tables", action="store_true")
    parser.add_argument("--wall", action="store_true", help="time with the wall clock")
    args = parser.parse_args()
    global CLOCK
    if args.wall:
        CLOCK = time.perf_counter_ns
    print(f"{BLOCK} steps per block, median of {args.rounds} blocks (demo: of its episodes)")
    print(
        f"{'arm':6s} {'control':8s} {'bare us':>8s} {'floor':>6s} {'env us':>8s} {'ratio':>6s} "
        f"{'+agent us':>9s} {'ratio':>6s} {'demo us':>8s} {'ratio':>6s} {'loops/s':>8s}"
    )
    for robot in args.robots.split(","):
        for control in args.controls.split(","):
            m = measure(robot, control, args.rounds)
            b = m["bare"]
            print(
                f"{robot:6s} {control:8s} {b:8.1f} {m['queries'] / b:6.2f} {m['env']:8.1f} "
                f"{m['env'] / b:6.2f} "
                f"{m['env+agent']:9.1f} {m['env+agent'] / b:6.2f} {m['demo loop']:8.1f} "
                f"{m['demo loop'] / b:6.2f} {1e6 / m['env+agent']:8.0f}",
                flush=True,
            )
    print("floor: bare + the tip link state, contact query and ray tests an env step needs")
    print("acceptance (issue 22): env <= 1.5 x bare, env+agent <= 2.0 x bare")
    if not args.no_agent_tables:
        agent_tables(max(3, args.rounds // 3))


if __name__ == "__main__":
    main()
