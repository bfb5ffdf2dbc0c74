"""Joint limits of a URDF read by outside readers, for checking blanket's own reading.

- :func:`pybullet_joint_limits`: pybullet's ``getJointInfo`` (a reference library) -- the
  hard ``<limit>`` position range, ``effort`` and ``velocity`` of each movable joint;
- :func:`urdf_soft_limits`: the ``<safety_controller>`` ``soft_lower_limit`` /
  ``soft_upper_limit`` attributes read with the standard library's XML parser, as the URDF
  XML specification (ROS wiki, "urdf/XML/joint") defines them (pybullet does not read them).

The numbers a robot maker publishes are configuration here (``blanket.robot_limits``), never
a reference.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from dataclasses import dataclass

import pybullet
from pybullet_utils.bullet_client import BulletClient


@dataclass(frozen=True)
class ReferenceLimit:
    lower: float
    upper: float
    effort: float
    velocity: float


def pybullet_joint_limits(urdf_path: str) -> dict[str, ReferenceLimit]:
    """Movable joints of ``urdf_path`` by name, as pybullet reads them."""
    client = BulletClient(connection_mode=pybullet.DIRECT)
    try:
        body = client.loadURDF(urdf_path, useFixedBase=True)
        out = {}
        for j in range(client.getNumJoints(body)):
            info = client.getJointInfo(body, j)
            if info[2] == pybullet.JOINT_FIXED:
                continue
            out[info[1].decode()] = ReferenceLimit(info[8], info[9], info[10], info[11])
        return out
    finally:
        client.disconnect()


def urdf_soft_limits(urdf_path: str) -> dict[str, tuple[float, float]]:
    """``(soft_lower_limit, soft_upper_limit)`` of the joints that have a safety controller."""
    out = {}
    for joint in ET.parse(urdf_path).getroot().iter("joint"):
        sc = joint.find("safety_controller")
        if sc is not None and "soft_lower_limit" in sc.attrib:
            out[joint.attrib["name"]] = (
                float(sc.attrib["soft_lower_limit"]),
                float(sc.attrib["soft_upper_limit"]),
            )
    return out
