"""Imported by the sweep pool's fork server: loads the agent's compiled kernel once.

The arm agent's perception step is compiled by numba and cached on disk; loading it costs
each new process ~0.2-0.5 s on its first step. The fork server imports this module before
it forks any worker, so a two-link arm agent (built from the planar URDF alone, with no
simulator: forking a process that holds a pybullet connection is unsafe) runs two steps
here and every worker inherits the loaded kernel.
"""

from __future__ import annotations

import numpy as np


def warm_kernels() -> None:
    """Run the arm agent's compiled step on a synthetic observation (values irrelevant)."""
    from blanket.agent.arm import ArmAgent
    from blanket.description import ArmDescription
    from blanket.sensors.camera import look_at, pinhole_camera
    from blanket.sim.urdf_limits import read_joint_limits
    from blanket_envs.arm_reach import PLANAR_URDF

    limits = list(read_joint_limits(PLANAR_URDF).values())
    camera = pinhole_camera(
        look_at(np.array([0.5, -1.0, 1.0]), np.zeros(3)), 640, 480, np.deg2rad(60.0), 30.0, 1.0
    )
    description = ArmDescription(
        urdf_path=PLANAR_URDF,
        end_effector="tool_tip",
        joint_names=tuple(j.name for j in limits),
        lower_rad=np.array([j.lower for j in limits]),
        upper_rad=np.array([j.upper for j in limits]),
        velocity_limit_rad_s=np.array([j.velocity for j in limits]),
        torque_limit_n_m=np.array([j.effort for j in limits]),
        control="velocity",
        control_hz=240.0,
        encoder_angle_noise_rad=1e-3,
        encoder_velocity_noise_rad_s=1e-2,
        camera=camera,
        gravity_m_s2=np.array([0.0, 0.0, -9.81]),
        episode_s=1.0,
        tolerance_m=0.01,
    )
    agent = ArmAgent(description)
    obs = {
        "joint_angle_rad": np.array([0.3, 0.6]),
        "joint_velocity_rad_s": np.zeros(2),
        "target_position_m": np.array([0.4, 0.2, 0.0]),
        "tip_pixel_px": np.array([320.0, 240.0]),
        "tip_visible": 1,
        "target_pixel_px": np.array([300.0, 250.0]),
        "target_visible": 1,
        "camera_fresh": 1,
    }
    agent.act(obs)
    agent.act(obs)


try:
    warm_kernels()
except Exception:  # noqa: BLE001 - a failed warm-up only costs the workers that time
    pass
