"""Joint-angle error of the arm agent's belief against a tuned EKF on the same sensations.

For each arm (planar 2-link, iiwa) and goal mode, records reaching episodes of the agent
(encoders, camera pixels with visibility/fresh flags, commands, true joint angles from
``info["external"]``), then runs the textbook EKF of ``tests/reference_ekf.py`` offline on
the recorded sensations with its process-noise intensity scanned (best taken, with the
truth), in two variants: encoders + camera, and encoders + camera + the command as a
measurement of the joint velocity (what the agent's efference copy uses). Prints the RMSEs
and the ratio agent / EKF (acceptance: <= 1.2).

    python scripts/bench_arm_estimation.py [--episodes 3]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

INTENSITIES = (0.003, 0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0, 300.0)
COMMAND_INTENSITIES = (0.001, 0.01, 0.1, 1.0, 10.0, 100.0, 1e3, 1e4)
COMMAND_SDS = (0.0005, 0.001, 0.002, 0.005, 0.01, 0.025)


def main() -> None:
    import gymnasium

    import blanket  # noqa: F401  (registers the envs)
    from blanket.agent import ArmAgent
    from blanket.body import ArmModel
    from reference_ekf import best_ekf, record_run

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", type=int, default=3)
    args = parser.parse_args()
    if args.episodes < 1:
        raise SystemExit("--episodes must be >= 1")
    head = f"{'arm':<8}{'goal':<11}{'encoder':>9}{'agent':>9}{'EKF':>9}{'ratio':>7}"
    print(head + f"{'EKF+cmd':>9}{'ratio':>7}  tuning (q_a; q_a, command sd)")
    for label, env_id, kwargs in (
        ("planar", "blanket/planar-2link-v0", {}),
        ("iiwa", "blanket/arm-reach-v0", {"robot": "iiwa"}),
    ):
        env = gymnasium.make(env_id, **kwargs)
        d = env.unwrapped.description
        body = ArmModel.from_urdf(d.urdf_path, d.end_effector, joint_names=d.joint_names)
        for goal in ("prior", "reference"):
            agent = ArmAgent.from_env(env, goal=goal)
            recs = [record_run(env, agent, seed=s) for s in range(args.episodes)]
            agent_rmse = float(
                np.sqrt(np.mean([np.mean((r.belief - r.true_angle) ** 2) for r in recs]))
            )
            enc = float(
                np.sqrt(np.mean([np.mean((r.joint_angle - r.true_angle) ** 2) for r in recs]))
            )
            plain, t1 = best_ekf(recs, d, body, INTENSITIES)
            cmd, t2 = best_ekf(recs, d, body, COMMAND_INTENSITIES, COMMAND_SDS)
            edge = ""
            if t1["acceleration_intensity"] in (INTENSITIES[0], INTENSITIES[-1]):
                edge += " (EKF best on grid edge)"
            if t2["command_sd"] in (COMMAND_SDS[0], COMMAND_SDS[-1]) or t2[
                "acceleration_intensity"
            ] in (COMMAND_INTENSITIES[0], COMMAND_INTENSITIES[-1]):
                edge += " (EKF+cmd best on grid edge)"
            print(
                f"{label:<8}{goal:<11}{enc:>9.5f}{agent_rmse:>9.5f}{plain:>9.5f}"
                f"{agent_rmse / plain:>7.2f}{cmd:>9.5f}{agent_rmse / cmd:>7.2f}  "
                f"{t1['acceleration_intensity']:g}; {t2['acceleration_intensity']:g}, "
                f"{t2['command_sd']:g}{edge}",
                flush=True,
            )
        env.close()


if __name__ == "__main__":
    main()
