"""Internal body models an agent uses to predict its own body.

``ArmModel`` (pinocchio, from a URDF) is imported lazily so that importing this package does not
load pinocchio for users who only need other body models.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from blanket.body.arm import ArmModel

__all__ = ["ArmModel"]


def __getattr__(name: str) -> Any:
    if name == "ArmModel":
        from blanket.body.arm import ArmModel

        return ArmModel
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
