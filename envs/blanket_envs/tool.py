"""A straight tool on an arm's end-effector link, written as a generated URDF.

The camera watches a coloured sphere at the tool point, so the point the agent models (the
URDF link it is given) must be a point the camera can see. On some arms the end-effector link
origin lies inside the wrist housing (the iiwa's ``lbr_iiwa_link_7``); a straight tool along
the link's z axis carries the point out of it. :func:`tool_urdf` writes a copy of the arm's
URDF with one more link, :data:`TOOL_LINK`, fixed at ``length_m`` along the end effector's z
axis (a thin grey rod shows the tool), into a folder under the system's temporary directory
(never into the package). The file name is a digest of its content, so every process that
asks for the same tool gets the same file, written once.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
import xml.etree.ElementTree as ET
from pathlib import Path

from blanket.errors import ConfigError

__all__ = ["TOOL_LINK", "TOOL_RADIUS_M", "TOOL_MASS_KG", "tool_urdf"]

#: Name of the added link (a suffix is added if the URDF has a link of that name).
TOOL_LINK = "tool_point"
#: Radius of the tool rod's visual cylinder (m); it has no collision shape.
TOOL_RADIUS_M = 0.006
#: Mass of the tool link (kg): small, so the arm's dynamics barely change.
TOOL_MASS_KG = 0.01


def _absolute_meshes(root: ET.Element, folder: Path) -> None:
    """Mesh paths relative to the URDF's folder (plain or ``package://``) made absolute."""
    for mesh in root.iter("mesh"):
        name = mesh.get("filename")
        if not name:
            continue
        relative = name[len("package://") :] if name.startswith("package://") else name
        if Path(relative).is_absolute():
            continue
        candidate = folder / relative
        if candidate.exists():
            mesh.set("filename", str(candidate))


def tool_urdf(urdf_path: str, link: str, length_m: float) -> tuple[str, str]:
    """Path of a copy of ``urdf_path`` with a tool on ``link``, and the tool link's name.

    Parameters
    ----------
    urdf_path : str
        The arm's URDF.
    link : str
        The end-effector link that holds the tool.
    length_m : float
        Distance of the tool point from the link origin along the link's z axis (m).

    Returns
    -------
    (path, tool_link) : tuple of str
    """
    source = Path(urdf_path).resolve()
    try:
        root = ET.parse(source).getroot()
    except (OSError, ET.ParseError) as exc:
        raise ConfigError(f"urdf: cannot read {source.name}: {exc}") from exc
    links = {el.get("name") for el in root.findall("link")}
    if link not in links:
        raise ConfigError(f"end_effector: link {link!r} is not in {source.name}")
    name = TOOL_LINK
    while name in links:
        name += "_"
    _absolute_meshes(root, source.parent)
    length = float(length_m)
    tool = ET.SubElement(root, "link", name=name)
    inertial = ET.SubElement(tool, "inertial")
    ET.SubElement(inertial, "origin", xyz=f"0 0 {-0.5 * length:.9g}", rpy="0 0 0")
    ET.SubElement(inertial, "mass", value=f"{TOOL_MASS_KG:g}")
    ET.SubElement(
        inertial, "inertia", ixx="1e-6", ixy="0", ixz="0", iyy="1e-6", iyz="0", izz="1e-6"
    )
    if length > 0.0:
        visual = ET.SubElement(tool, "visual")
        ET.SubElement(visual, "origin", xyz=f"0 0 {-0.5 * length:.9g}", rpy="0 0 0")
        geometry = ET.SubElement(visual, "geometry")
        ET.SubElement(geometry, "cylinder", radius=f"{TOOL_RADIUS_M:g}", length=f"{length:.9g}")
        material = ET.SubElement(visual, "material", name="tool_grey")
        ET.SubElement(material, "color", rgba="0.55 0.55 0.55 1")
    joint = ET.SubElement(root, "joint", name=f"{name}_joint", type="fixed")
    ET.SubElement(joint, "parent", link=link)
    ET.SubElement(joint, "child", link=name)
    ET.SubElement(joint, "origin", xyz=f"0 0 {length:.9g}", rpy="0 0 0")
    text = ET.tostring(root, encoding="unicode")
    digest = hashlib.sha256(text.encode()).hexdigest()[:16]
    folder = Path(tempfile.gettempdir()) / f"blanket-tools-{os.getuid()}"
    folder.mkdir(mode=0o700, exist_ok=True)
    path = folder / f"{source.stem}-{digest}.urdf"
    if not path.is_file():
        partial = folder / f".{path.name}.{os.getpid()}"
        partial.write_text(text)
        os.replace(partial, path)  # atomic: a concurrent reader sees all of it or nothing
    return str(path), name
