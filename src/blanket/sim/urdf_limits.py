"""Joint limits read straight from a URDF file (hard ``<limit>`` and soft ``<safety_controller>``).

pybullet and pinocchio both ignore a URDF's ``<safety_controller>`` soft limits, so this module
parses the XML itself (``xml.etree``). The limits *in force* are the soft ones where a joint
gives them, else the hard ones; velocity and effort limits always come from ``<limit>``.
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path

from blanket.errors import ConfigError

__all__ = ["JointLimit", "read_joint_limits", "read_link_names", "MOVABLE_JOINT_TYPES"]

#: URDF joint types that have a degree of freedom pybullet can drive.
MOVABLE_JOINT_TYPES = ("revolute", "continuous", "prismatic")


@dataclass(frozen=True)
class JointLimit:
    """Limits of one movable URDF joint (radians or metres, per second, N m or N).

    Attributes
    ----------
    name, joint_type : str
        URDF joint name and type (``revolute``, ``continuous`` or ``prismatic``).
    lower, upper : float
        Hard position limits from ``<limit>`` (``-inf``/``inf`` for continuous joints).
    soft_lower, soft_upper : float or None
        Soft limits from ``<safety_controller>``, None when absent.
    velocity, effort : float
        Velocity and effort limits from ``<limit>``.
    """

    name: str
    joint_type: str
    lower: float
    upper: float
    soft_lower: float | None
    soft_upper: float | None
    velocity: float
    effort: float

    @property
    def lower_in_force(self) -> float:
        """Soft lower limit where the URDF gives one, else the hard one."""
        return self.lower if self.soft_lower is None else max(self.lower, self.soft_lower)

    @property
    def upper_in_force(self) -> float:
        """Soft upper limit where the URDF gives one, else the hard one."""
        return self.upper if self.soft_upper is None else min(self.upper, self.soft_upper)


def _parse(urdf_path: str | Path) -> ET.Element:
    path = Path(urdf_path)
    if not path.is_file():
        raise ConfigError(f"urdf: file not found: {path}")
    try:
        return ET.parse(path).getroot()
    except ET.ParseError as exc:
        raise ConfigError(f"urdf: {path} is not valid XML ({exc})") from exc


def _float_attr(element: ET.Element | None, key: str) -> float | None:
    if element is None or element.get(key) is None:
        return None
    return float(element.get(key))  # type: ignore[arg-type]


def read_joint_limits(urdf_path: str | Path) -> dict[str, JointLimit]:
    """Limits of every movable joint of a URDF, in file order.

    Parameters
    ----------
    urdf_path : str or Path
        The URDF file.

    Returns
    -------
    dict of str to JointLimit
        Keyed by joint name, in the order the joints appear in the file.

    Raises
    ------
    ConfigError
        The file is missing or unreadable, or a movable joint lacks a positive velocity or
        effort limit (or a revolute/prismatic joint lacks position limits).
    """
    root = _parse(urdf_path)
    limits: dict[str, JointLimit] = {}
    for joint in root.findall("joint"):
        joint_type = joint.get("type", "")
        if joint_type not in MOVABLE_JOINT_TYPES:
            continue
        name = joint.get("name", "")
        limit = joint.find("limit")
        safety = joint.find("safety_controller")
        velocity = _float_attr(limit, "velocity")
        effort = _float_attr(limit, "effort")
        if velocity is None or velocity <= 0.0:
            raise ConfigError(
                f"urdf: joint {name!r} needs <limit velocity> > 0 (got {velocity}) in {urdf_path}"
            )
        if effort is None or effort <= 0.0:
            raise ConfigError(
                f"urdf: joint {name!r} needs <limit effort> > 0 (got {effort}) in {urdf_path}"
            )
        if joint_type == "continuous":
            lower, upper = -math.inf, math.inf
        else:
            lower_attr = _float_attr(limit, "lower")
            upper_attr = _float_attr(limit, "upper")
            if lower_attr is None or upper_attr is None or not lower_attr < upper_attr:
                raise ConfigError(
                    f"urdf: joint {name!r} needs <limit lower> < <limit upper> "
                    f"(got {lower_attr}, {upper_attr}) in {urdf_path}"
                )
            lower, upper = lower_attr, upper_attr
        limits[name] = JointLimit(
            name=name,
            joint_type=joint_type,
            lower=lower,
            upper=upper,
            soft_lower=_float_attr(safety, "soft_lower_limit"),
            soft_upper=_float_attr(safety, "soft_upper_limit"),
            velocity=velocity,
            effort=effort,
        )
    return limits


def read_link_names(urdf_path: str | Path) -> list[str]:
    """Names of every ``<link>`` of a URDF, in file order."""
    return [link.get("name", "") for link in _parse(urdf_path).findall("link")]
