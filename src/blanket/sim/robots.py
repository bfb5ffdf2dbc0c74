"""Built-in arms: pybullet_data URDFs with their tool tip link and home posture.

The tool tip is always a URDF link origin, so an agent holding the URDF and the link name
knows exactly where it is. Home postures are our own choice (elbow bent, tool pointing
down over the bench), not a maker's default.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from blanket.errors import ConfigError

__all__ = ["BuiltinRobot", "BUILTIN_ROBOTS", "builtin_robot", "pybullet_data_path"]


@dataclass(frozen=True)
class BuiltinRobot:
    """A built-in arm.

    Attributes
    ----------
    name : str
        Name accepted by ``robot=``.
    urdf_relative : str
        URDF path inside ``pybullet_data``.
    end_effector : str
        Tool tip link.
    home_rad : tuple of float
        Home posture of the controlled joints.
    controlled_joints : tuple of str or None
        Controlled joints (None: every movable joint).
    held_joint_positions : dict of str to float
        Other movable joints held fixed (e.g. fingers).
    tip_view_margin_m : float
        The camera counts the tool tip as seen when its ray gets this close to the tip: the
        tip link origin sits inside the wrist geometry around it (deepest on the iiwa, whose
        link_7 origin lies inside the wrist housing).
    """

    name: str
    urdf_relative: str
    end_effector: str
    home_rad: tuple[float, ...]
    controlled_joints: tuple[str, ...] | None = None
    held_joint_positions: dict[str, float] = field(default_factory=dict)
    tip_view_margin_m: float = 0.08

    @property
    def urdf_path(self) -> str:
        return str(Path(pybullet_data_path()) / self.urdf_relative)


def pybullet_data_path() -> str:
    """Folder of the URDFs shipped with pybullet (``pybullet_data.getDataPath()``)."""
    import pybullet_data

    return str(pybullet_data.getDataPath())


BUILTIN_ROBOTS: dict[str, BuiltinRobot] = {
    "iiwa": BuiltinRobot(
        name="iiwa",
        urdf_relative="kuka_iiwa/model.urdf",
        end_effector="lbr_iiwa_link_7",
        home_rad=(0.0, 0.6, 0.0, -1.4, 0.0, 1.1, 0.0),
        tip_view_margin_m=0.17,
    ),
    "panda": BuiltinRobot(
        name="panda",
        urdf_relative="franka_panda/panda.urdf",
        end_effector="panda_grasptarget",
        home_rad=(0.0, -0.3, 0.0, -2.2, 0.0, 1.9, 0.785),
        controlled_joints=tuple(f"panda_joint{i}" for i in range(1, 8)),
        held_joint_positions={"panda_finger_joint1": 0.0, "panda_finger_joint2": 0.0},
    ),
    "xarm6": BuiltinRobot(
        name="xarm6",
        urdf_relative="xarm/xarm6_robot.urdf",
        end_effector="link6",
        home_rad=(0.0, 0.0, -1.0, 0.0, 1.0, 0.0),
    ),
}


def builtin_robot(name: str) -> BuiltinRobot:
    """The built-in arm called ``name``; ConfigError listing the valid names otherwise."""
    if name not in BUILTIN_ROBOTS:
        raise ConfigError(
            f"robot: unknown robot {name!r}; valid names: {', '.join(BUILTIN_ROBOTS)}"
        )
    return BUILTIN_ROBOTS[name]


def default_home(lower_rad: np.ndarray, upper_rad: np.ndarray) -> np.ndarray:
    """Home posture for an arm without one: zero where allowed, else mid-range."""
    lower = np.asarray(lower_rad, dtype=float)
    upper = np.asarray(upper_rad, dtype=float)
    mid = np.where(np.isfinite(lower) & np.isfinite(upper), 0.5 * (lower + upper), 0.0)
    return np.where((lower <= 0.0) & (upper >= 0.0), 0.0, mid)
