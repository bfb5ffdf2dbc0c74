"""The four log groups of one row, built from what a loop sees: one builder for every log.

A row of a run folder holds, for control step ``k``:

- ``external.*``: the truth when the policy acted (``info["external"]`` of the previous step,
  or of the reset) plus the task status scalars of that ``info`` (:data:`INFO_TRUTH_KEYS`);
- ``sensory.*``: the observation the policy acted on (a Dict observation keeps its keys, a
  tuple becomes ``item0``, ``item1``, ..., anything else ``sensory.observation``);
- ``active.*``: ``action``, the command sent, and ``action_applied``, what a safety wrapper
  let through (``info["action_applied"]`` of the step that executed it);
- ``internal.*``: the agent's diagnostics after its update (only the loop that owns the agent
  has them; an env wrapper logs the first three).

The rollout loop's logging observer (:class:`blanket.rollout.RunLog`) and the
:class:`~blanket.wrappers.Recorder` wrapper both build their rows here, so both write the same
column names.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = [
    "INFO_TRUTH_KEYS",
    "external_group",
    "sensory_group",
    "active_group",
    "numeric_only",
]

#: ``info`` scalars logged beside ``info["external"]`` under ``external.*``.
INFO_TRUTH_KEYS = ("distance_m", "success", "inside_tolerance", "contact", "heading_error_rad")

_FLOAT64 = np.dtype(np.float64)


def external_group(info: Mapping[str, Any]) -> dict[str, Any]:
    """The ``external.*`` group from an env's ``info``: its truth plus the task status."""
    external = dict(info.get("external", {}) or {})
    for key in INFO_TRUTH_KEYS:
        if key in info and key not in external:
            external[key] = info[key]
    return external


def sensory_group(obs: Any) -> dict[str, Any]:
    """The ``sensory.*`` group of an observation (a plain dict is used as it is)."""
    if type(obs) is dict:
        return obs
    if isinstance(obs, Mapping):
        return dict(obs)
    if isinstance(obs, tuple):
        return {f"item{i}": v for i, v in enumerate(obs)}
    return {"observation": np.asarray(obs)}


def active_group(action: Any, info: Mapping[str, Any]) -> dict[str, Any]:
    """The ``active.*`` group: the command sent (``action``) and, behind a safety wrapper, the
    command it let through (``action_applied``, from the ``info`` of the step that executed
    it). A Dict action keeps its keys under ``action``."""
    group: dict[str, Any] = {"action": _as_float_array(action)}
    applied = info.get("action_applied")
    if applied is not None:
        group["action_applied"] = _as_float_array(applied)
    return group


def _as_float_array(value: Any) -> Any:
    # the usual case, a float64 array, as it is (the log writer copies it)
    if type(value) is np.ndarray and value.dtype is _FLOAT64:
        return value
    if isinstance(value, Mapping):
        return {str(k): _as_float_array(v) for k, v in value.items()}
    return np.asarray(value, dtype=float)


def _loggable(value: Any) -> bool:
    if isinstance(value, (bool, int, float, np.bool_, np.integer, np.floating)):
        return True
    if isinstance(value, np.ndarray):
        return value.ndim <= 2 and value.dtype.kind in "biuf"
    return False


def _array_or_none(value: Any) -> np.ndarray | None:
    try:
        return np.asarray(value)
    except ValueError:  # ragged
        return None


def numeric_only(
    values: Mapping[str, Any], dropped: list[str] | None = None, prefix: str = ""
) -> dict[str, Any]:
    """The part of a (nested) group the log format holds: numbers, flags and numeric arrays
    of at most 2 dimensions (lists and tuples of numbers become arrays). The dotted names of
    what was left out are appended to ``dropped``."""
    out: dict[str, Any] = {}
    for key, value in values.items():
        name = f"{prefix}.{key}" if prefix else str(key)
        if isinstance(value, Mapping):
            out[str(key)] = numeric_only(value, dropped, name)
        elif _loggable(value):
            out[str(key)] = value
        elif isinstance(value, (list, tuple)) and _loggable(_array_or_none(value)):
            out[str(key)] = np.asarray(value)
        elif dropped is not None:
            dropped.append(name)
    return out
