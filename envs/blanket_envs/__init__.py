"""The blanket environment suite.

Importing this package registers its env ids with gymnasium, using string entry points so
nothing heavy (pybullet, pinocchio) is imported until an env is made. It uses only
gymnasium's public ``register`` -- the same route a user's own package would take.
"""

from __future__ import annotations

from gymnasium import register, registry

_ENVS = {
    "blanket/arm-reach-v0": "blanket_envs.arm_reach:ArmReachEnv",
    "blanket/planar-2link-v0": "blanket_envs.arm_reach:PlanarReachEnv",
    "blanket/base-goto-v0": "blanket_envs.base_goto:BaseGotoEnv",
}

for _env_id, _entry_point in _ENVS.items():
    if _env_id not in registry:
        register(id=_env_id, entry_point=_entry_point)

__all__: list[str] = []
