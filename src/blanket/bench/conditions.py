"""The benchmark's named conditions: the presets of :mod:`blanket.conditions`.

Kept so that ``blanket.bench.CONDITIONS`` and ``blanket.bench.conditions.CONDITIONS`` keep
working; the vocabulary, the presets and how they wrap an env live in :mod:`blanket.conditions`.
"""

from __future__ import annotations

from blanket.conditions import PRESETS as CONDITIONS
from blanket.conditions import Condition, resolve_conditions

__all__ = ["Condition", "CONDITIONS", "resolve_conditions"]
