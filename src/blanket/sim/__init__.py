"""pybullet worlds, one ``BulletClient`` per env, and URDF limit parsing.

``blanket.sim.urdf_limits`` needs no pybullet; ``ArmWorld`` (a fixed-base arm) and ``BaseWorld``
(a wheeled base between bench rows) are imported lazily so that reading limits stays light.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from blanket.sim.urdf_limits import JointLimit, read_joint_limits, read_link_names

if TYPE_CHECKING:
    from blanket.sim.arm_world import ArmWorld, Contact
    from blanket.sim.base_world import BaseWorld

__all__ = ["ArmWorld", "BaseWorld", "Contact", "JointLimit", "read_joint_limits", "read_link_names"]


def __getattr__(name: str) -> Any:
    if name in ("ArmWorld", "Contact"):
        from blanket.sim import arm_world

        return getattr(arm_world, name)
    if name == "BaseWorld":
        from blanket.sim.base_world import BaseWorld

        return BaseWorld
    raise AttributeError(f"module 'blanket.sim' has no attribute {name!r}")
