"""Robot safety profiles: the joint velocity and torque limits a safety wrapper enforces.

A URDF's ``<limit>`` tags are not always the robot's real limits. pybullet_data's
``kuka_iiwa/model.urdf`` has the geometry of the KUKA LBR iiwa 14 R820 yet lists 10 rad/s and
300 N m on every joint, several times what the real arm allows; for such arms a profile carries
the maker's published figures instead. :func:`profile_for` picks the profile of an arm from its
:class:`~blanket.description.ArmDescription` (by the URDF's joint names), falling back to the
URDF's own limits.

The limits :class:`blanket.wrappers.safety_limits.SafetyLimits` enforces are the element-wise
minimum of the profile and the URDF (the env clips to the URDF anyway).

These profiles are for simulation. Before any hardware use, take the limits from the maker's
current documentation for the exact robot variant, not from this file.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from blanket.errors import ConfigError

__all__ = [
    "SafetyProfile",
    "profile_for",
    "profile_named",
    "urdf_profile",
    "PROFILE_NAMES",
    "IIWA14_R820",
    "PANDA",
    "REDUCED_SPEED_M_S",
]

#: Reduced speed of the tool centre point, m/s: 250 mm/s, ISO 10218-1:2011, clause 5.6
#: ("Reduced speed control"). A figure of the standard, offered as ``tool_speed_cap_m_s``.
REDUCED_SPEED_M_S = 0.25


@dataclass(frozen=True)
class SafetyProfile:
    """Per-joint command limits of one robot, and where they come from.

    Attributes
    ----------
    name : str
        Short profile name (``"kuka-lbr-iiwa-14-r820"``, ``"franka-panda"``, ``"urdf"``, ...).
    velocity_limit_rad_s : tuple of float
        Largest joint speed, per joint (rad/s, or m/s for a prismatic joint).
    torque_limit_n_m : tuple of float
        Largest joint torque, per joint (N m, or N for a prismatic joint).
    source : str
        Where the numbers come from, in one line.
    """

    name: str
    velocity_limit_rad_s: tuple[float, ...]
    torque_limit_n_m: tuple[float, ...]
    source: str

    def __post_init__(self) -> None:
        velocity = tuple(float(v) for v in self.velocity_limit_rad_s)
        torque = tuple(float(v) for v in self.torque_limit_n_m)
        if len(velocity) != len(torque) or not velocity:
            raise ConfigError(
                f"safety profile {self.name}: velocity_limit_rad_s and torque_limit_n_m need the "
                f"same non-zero length, got {len(velocity)} and {len(torque)}"
            )
        for field_name, values in (
            ("velocity_limit_rad_s", velocity),
            ("torque_limit_n_m", torque),
        ):
            if not all(math.isfinite(v) and v > 0.0 for v in values):
                raise ConfigError(
                    f"safety profile {self.name}: {field_name} must be finite and > 0, got "
                    f"{list(values)}"
                )
        object.__setattr__(self, "velocity_limit_rad_s", velocity)
        object.__setattr__(self, "torque_limit_n_m", torque)

    @property
    def n_joints(self) -> int:
        return len(self.velocity_limit_rad_s)


# KUKA LBR iiwa 14 R820 axis data, FROM MEMORY: verify against the KUKA "LBR iiwa 7 R800,
# LBR iiwa 14 R820" specification (maximum speeds per axis and maximum torques per axis)
# before relying on them.
_IIWA14_SPEED_DEG_S = (85.0, 85.0, 100.0, 75.0, 130.0, 135.0, 135.0)
_IIWA14_TORQUE_N_M = (320.0, 320.0, 176.0, 176.0, 110.0, 40.0, 40.0)

IIWA14_R820 = SafetyProfile(
    name="kuka-lbr-iiwa-14-r820",
    velocity_limit_rad_s=tuple(math.radians(v) for v in _IIWA14_SPEED_DEG_S),
    torque_limit_n_m=_IIWA14_TORQUE_N_M,
    source="KUKA LBR iiwa 14 R820 specification, axis speeds and torques (values from memory; "
    "verify against the maker's document)",
)

# Franka Emika Panda joint limits, FROM MEMORY: verify against the Franka Emika Panda
# datasheet / control interface limits (joint velocity 2.1750 rad/s for joints 1-4 and
# 2.6100 rad/s for 5-7; torque 87 N m for joints 1-4 and 12 N m for 5-7).
PANDA = SafetyProfile(
    name="franka-panda",
    velocity_limit_rad_s=(2.1750, 2.1750, 2.1750, 2.1750, 2.6100, 2.6100, 2.6100),
    torque_limit_n_m=(87.0, 87.0, 87.0, 87.0, 12.0, 12.0, 12.0),
    source="Franka Emika Panda datasheet, joint velocity and torque limits (values from "
    "memory; verify against the maker's document)",
)

_IIWA_JOINTS = tuple(f"lbr_iiwa_joint_{i}" for i in range(1, 8))
_PANDA_JOINTS = tuple(f"panda_joint{i}" for i in range(1, 8))
_XARM6_JOINTS = tuple(f"joint{i}" for i in range(1, 7))

#: Names accepted by :func:`profile_named` (``"urdf"`` and ``"xarm6-urdf"`` read the URDF).
PROFILE_NAMES = (IIWA14_R820.name, PANDA.name, "xarm6-urdf", "urdf")


def urdf_profile(description: Any, name: str = "urdf") -> SafetyProfile:
    """The profile of the URDF's own ``<limit velocity effort>`` values (in the description)."""
    return SafetyProfile(
        name=name,
        velocity_limit_rad_s=tuple(np.asarray(description.velocity_limit_rad_s, dtype=float)),
        torque_limit_n_m=tuple(np.asarray(description.torque_limit_n_m, dtype=float)),
        source=f"URDF <limit> tags of {Path(description.urdf_path).name}",
    )


def profile_for(description: Any) -> SafetyProfile:
    """The safety profile for an arm, chosen by its URDF's controlled joints.

    * joints ``lbr_iiwa_joint_1..7`` (pybullet_data's ``kuka_iiwa`` models): the maker's
      figures for the KUKA LBR iiwa 14 R820 (:data:`IIWA14_R820`), since the URDF lists
      10 rad/s and 300 N m on every joint;
    * joints ``panda_joint1..7``: the Franka Emika Panda's published limits (:data:`PANDA`);
    * joints ``joint1..6`` of a URDF in an ``xarm`` folder: the URDF's limits (``xarm6-urdf``);
    * anything else: the URDF's limits (``urdf``).

    Parameters
    ----------
    description : ArmDescription
        The env's description (``env.unwrapped.description``).
    """
    joints = tuple(description.joint_names)
    if joints == _IIWA_JOINTS:
        return IIWA14_R820
    if joints == _PANDA_JOINTS:
        return PANDA
    if joints == _XARM6_JOINTS and "xarm" in Path(description.urdf_path).parent.name.lower():
        return urdf_profile(description, "xarm6-urdf")
    return urdf_profile(description)


def profile_named(name: str, description: Any) -> SafetyProfile:
    """A profile by name (see :data:`PROFILE_NAMES`), checked against the arm's joint count."""
    if name == IIWA14_R820.name:
        profile = IIWA14_R820
    elif name == PANDA.name:
        profile = PANDA
    elif name in ("urdf", "xarm6-urdf"):
        profile = urdf_profile(description, name)
    else:
        raise ConfigError(
            f"profile: unknown safety profile {name!r}; valid: {', '.join(PROFILE_NAMES)}"
        )
    if profile.n_joints != len(description.joint_names):
        raise ConfigError(
            f"profile: {profile.name} has {profile.n_joints} joints, the arm has "
            f"{len(description.joint_names)}"
        )
    return profile
