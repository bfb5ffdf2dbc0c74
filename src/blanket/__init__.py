"""blanket: test active-inference sensorimotor controllers on simulated robots, without ROS.

Importing blanket registers the environment suite (``blanket/arm-reach-v0`` and friends)
with gymnasium. The entry points are strings, so nothing of the env suite (``blanket_envs``,
which imports blanket, never the other way round) nor anything heavy (pybullet, pinocchio) is
imported until an env is made. Only gymnasium's public ``register`` is used -- the same route a
user's own package would take.
"""

from __future__ import annotations

from gymnasium import register, registry

__version__ = "0.1.0"

#: The env ids of the suite and their entry points (in the ``blanket_envs`` package).
ENV_IDS = {
    "blanket/arm-reach-v0": "blanket_envs.arm_reach:ArmReachEnv",
    "blanket/planar-2link-v0": "blanket_envs.arm_reach:PlanarReachEnv",
    "blanket/base-goto-v0": "blanket_envs.base_goto:BaseGotoEnv",
    "blanket/arm-hold-v0": "blanket_envs.arm_hold:ArmHoldEnv",
}

for _env_id, _entry_point in ENV_IDS.items():
    if _env_id not in registry:
        register(id=_env_id, entry_point=_entry_point)

__all__ = ["ENV_IDS", "__version__"]
