"""Dependencies point one way: the world side never imports the agent side, nor the reverse.

World side: ``blanket.sim``, ``blanket.sensors``, ``blanket.wrappers`` and the env suite
``blanket_envs``. Agent side: ``blanket.agent`` and its internal body models ``blanket.body``.
Geometry both need lives in neutral modules (``blanket.planar_motion``, ``blanket.description``,
...). The check reads the source with :mod:`ast`, so imports inside functions count too.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SRC = ROOT / "src"
ENVS = ROOT / "envs"

WORLD_DIRS = ("src/blanket/sim", "src/blanket/sensors", "src/blanket/wrappers", "envs/blanket_envs")
AGENT_DIRS = ("src/blanket/agent", "src/blanket/body")
AGENT_MODULES = ("blanket.body", "blanket.agent")
WORLD_MODULES = ("blanket.sim", "blanket.sensors", "blanket.wrappers", "blanket_envs")

# Known exceptions, file -> forbidden module it may still import (none left).
KNOWN: dict[str, str] = {}


def _module_name(path: Path) -> str:
    """Dotted module name of a source file under src/ or envs/."""
    base = SRC if path.is_relative_to(SRC) else ENVS
    parts = list(path.relative_to(base).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imported_modules(source: str, module: str, is_package: bool = False) -> set[str]:
    """Every module a source imports, as absolute names (``from a import b``: ``a``, ``a.b``)."""
    package = module if is_package else module.rpartition(".")[0]
    found: set[str] = set()
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                anchor = package.split(".")
                anchor = anchor[: len(anchor) - (node.level - 1)]
                base = ".".join(anchor + ([node.module] if node.module else []))
            else:
                base = node.module or ""
            found.add(base)
            found.update(f"{base}.{alias.name}" for alias in node.names)
    return found


def _under(name: str, modules: tuple[str, ...]) -> bool:
    """Whether ``name`` is one of ``modules`` or below one (``blanket.simple`` is not ``sim``)."""
    return any(name == m or name.startswith(m + ".") for m in modules)


def _violations(dirs: tuple[str, ...], forbidden: tuple[str, ...]) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for folder in dirs:
        for path in sorted((ROOT / folder).rglob("*.py")):
            rel = path.relative_to(ROOT).as_posix()
            names = imported_modules(
                path.read_text(), _module_name(path), path.name == "__init__.py"
            )
            allowed = (KNOWN[rel],) if rel in KNOWN else ()
            bad = sorted(n for n in names if _under(n, forbidden) and not _under(n, allowed))
            if bad:
                out[rel] = bad
    return out


def test_world_side_does_not_import_the_agent_side():
    assert _violations(WORLD_DIRS, AGENT_MODULES) == {}


def test_agent_side_does_not_import_the_world_side():
    assert _violations(AGENT_DIRS, WORLD_MODULES) == {}


def test_the_scan_finds_every_form_of_import():
    # The check itself must see nested, aliased, package-level and relative imports.
    source = (
        "import blanket.body.arm as arm\n"
        "from blanket import agent\n"
        "def f():\n"
        "    from blanket.sensors.landmarks import bearing_range\n"
        "from ..sim import base_world\n"
        "from . import odometry\n"
    )
    names = imported_modules(source, "blanket.wrappers.example")
    for expected in (
        "blanket.body.arm",
        "blanket.agent",
        "blanket.sensors.landmarks",
        "blanket.sim.base_world",
        "blanket.wrappers.odometry",
    ):
        assert expected in names
    assert _under("blanket.sim.base_world", WORLD_MODULES)
    assert not _under("blanket.simple", WORLD_MODULES)


def test_neutral_geometry_keeps_its_public_names_on_both_sides():
    # Users' imports keep working after the move to blanket.planar_motion.
    from blanket import planar_motion
    from blanket.body import diff_drive
    from blanket.sensors import landmarks

    for name in ("wrap_angle", "body_velocity", "wheel_speeds", "pose_rate", "integrate_pose"):
        assert getattr(diff_drive, name) is getattr(planar_motion, name)
    for name in ("camera_position", "bearing_range", "bearing_range_jacobian"):
        assert getattr(landmarks, name) is getattr(planar_motion, name)
