"""Column naming, units and file metadata of blanket trajectory logs.

A run folder holds::

    RUN_DIR/run.json                        run metadata (one wall-clock field: started_at)
    RUN_DIR/episodes/episode-00000.parquet  one Parquet file per finished episode
    RUN_DIR/timings.jsonl                   wall-clock timings, one JSON line per episode
    RUN_DIR/summary.json, RUN_DIR/figures/  written beside them by the runner and the plotter

Hidden files (names starting with ``.``) are temporaries of a write in progress, or journals
left by earlier blanket writers (which encoded episodes in the background). Readers never
read or change them; ``blanket logs repair RUN_DIR`` finishes or removes them (see
:mod:`blanket.logs.repair`).

Columns
-------
Every episode file has ``episode`` (int64), ``step`` (int64) and ``t`` (float64, seconds),
then four groups of flat, dotted columns::

    <group>.<key>[.<subkey>...]                   scalar            external.distance_m
    <group>.<key>[.<subkey>...].<component>       1-D vector        external.tip_position_m.x
    <group>.<key>[.<subkey>...].order<k>.<component>  2-D array     internal.belief.order1.elbow

``group`` is one of ``external`` (simulator truth), ``sensory`` (what the robot sensed),
``active`` (what it commanded) and ``internal`` (the agent's beliefs). Nested dicts add
sub-keys (``internal.prediction_error.camera.order0.c0``). Row ``k`` of a 2-D array is the
``k``-th order of motion in generalized coordinates, hence ``order<k>``.

Component names, first rule that applies:

1. the writer option ``component_names`` (``{key or key suffix: names}``; a key is matched
   as the full column prefix ``internal.prediction_error.camera``, the prefix without the
   group ``prediction_error.camera``, the last key ``camera``, then the longest entry the
   last key ends with, e.g. ``"_position_m"``);
2. a key containing ``pixel`` or ``camera``: ``u, v`` for 2 components, ``u0, v0, u1, v1,
   ...`` for an even number (several image points), else ``c0, c1, ...`` (never joint names);
3. a position-like key (containing ``position``, ``force`` or ``offset``) with 3
   components: ``x, y, z``; a key containing ``pose`` with 3 components: ``x, y, yaw``;
4. a vector as long as ``metadata["joint_names"]``: the joint names;
5. otherwise ``c0, c1, ...``.

Dots in component names are replaced by underscores.

Units
-----
Derived from the suffix of the innermost key that carries one: ``_rad_s`` rad/s,
``_m_s`` m/s, ``_n_m`` N m, ``_rad`` rad, ``_m`` m, ``_px`` px, ``_us`` us, ``_s`` s,
``_kg`` kg, ``_n`` N, ``_hz`` Hz. They are stored per column in the Parquet field metadata
(``unit``), in the file metadata (``blanket.units``, JSON) and in ``run.json``.

File metadata (Parquet key-value)
---------------------------------
``blanket.schema_version`` ("MAJOR.MINOR"), ``blanket.run`` (run metadata JSON, without
wall-clock fields), ``blanket.units`` (JSON), ``blanket.episode`` (JSON: episode number,
number of rows and the ``extra`` dict given to ``end_episode``, without the wall-clock
timings of :data:`TIMING_FIELDS`) and ``blanket.digest`` (see :func:`footer_digest`).

Integrity
---------
Data pages carry Parquet's CRC-32 page checksums (pyarrow ``write_page_checksum``), verified
by every blanket read. The footer has no checksum of its own in Parquet, so
``blanket.digest`` holds a SHA-256 of what a reader takes from it (column names, types and
units, the blanket metadata, the row count); a file whose footer disagrees is refused.
"""

from __future__ import annotations

import functools
import json
import re
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

__all__ = [
    "SCHEMA_VERSION",
    "GROUPS",
    "INDEX_COLUMNS",
    "WALL_CLOCK_FIELDS",
    "TIMING_FIELDS",
    "footer_digest",
    "LogError",
    "unit_for_key",
    "component_labels",
    "parse_version",
    "episode_file_name",
    "to_json",
    "META_SCHEMA",
    "META_RUN",
    "META_UNITS",
    "META_EPISODE",
    "META_DIGEST",
]

SCHEMA_VERSION = "1.0"
GROUPS = ("external", "sensory", "active", "internal")
INDEX_COLUMNS = ("episode", "step", "t")
#: Wall-clock metadata fields: kept in run.json, left out of the episode files (determinism).
WALL_CLOCK_FIELDS = ("started_at", "start_time", "end_time", "finished_at", "wall_time_s")
#: Wall-clock timings of an episode's ``extra``: written to ``timings.jsonl``, not to its file.
TIMING_FIELDS = ("agent_step_us", "sim_step_us")

META_SCHEMA = b"blanket.schema_version"
META_RUN = b"blanket.run"
META_UNITS = b"blanket.units"
META_EPISODE = b"blanket.episode"
META_DIGEST = b"blanket.digest"

# Longest suffixes first, so "_rad_s" wins over "_s" and "_n_m" over "_m".
_UNIT_SUFFIXES: tuple[tuple[str, str], ...] = (
    ("_rad_s2", "rad/s^2"),
    ("_m_s2", "m/s^2"),
    ("_rad_s", "rad/s"),
    ("_m_s", "m/s"),
    ("_n_m", "N m"),
    ("_rad", "rad"),
    ("_px", "px"),
    ("_us", "us"),
    ("_kg", "kg"),
    ("_hz", "Hz"),
    ("_m", "m"),
    ("_s", "s"),
    ("_n", "N"),
)


class LogError(ValueError):
    """A file or folder is not a readable blanket log; the message is one line."""


@functools.lru_cache(maxsize=1024)
def unit_for_key(key: str) -> str | None:
    """Unit of a key from its name suffix (``tip_position_m`` -> ``"m"``), or None."""
    for suffix, unit in _UNIT_SUFFIXES:
        if key.endswith(suffix) and len(key) > len(suffix):
            return unit
    return None


def _clean(name: str) -> str:
    return str(name).replace(".", "_")


def component_labels(
    path: Sequence[str],
    length: int,
    joint_names: Sequence[str] | None,
    component_names: Mapping[str, Sequence[str]] | None,
) -> list[str]:
    """Names of the ``length`` components of the vector at key ``path`` (group first).

    Parameters
    ----------
    path : sequence of str
        The group and the keys, e.g. ``("external", "tip_position_m")``.
    length : int
        Number of components.
    joint_names : sequence of str or None
        The run's joint names (``metadata["joint_names"]``).
    component_names : mapping or None
        User overrides, see the module docstring.

    Returns
    -------
    list of str
    """
    last = path[-1]
    if component_names:
        candidates = (".".join(path), ".".join(path[1:]), last)
        for cand in candidates:
            if cand in component_names:
                names = [_clean(n) for n in component_names[cand]]
                if len(names) != length:
                    raise ValueError(
                        f"component_names[{cand!r}]: got {len(names)} names for a vector of "
                        f"length {length}; give exactly {length}"
                    )
                return names
        suffixes = sorted((k for k in component_names if last.endswith(k)), key=len, reverse=True)
        for suffix in suffixes:
            names = [_clean(n) for n in component_names[suffix]]
            if len(names) == length:
                return names
    lower = last.lower()
    if "pixel" in lower or "camera" in lower:
        if length == 2:
            return ["u", "v"]
        if length % 2 == 0:
            return [f"{axis}{i}" for i in range(length // 2) for axis in ("u", "v")]
        return [f"c{i}" for i in range(length)]
    if length == 3 and any(word in lower for word in ("position", "force", "offset")):
        return ["x", "y", "z"]
    if length == 3 and "pose" in lower:
        return ["x", "y", "yaw"]
    if joint_names is not None and len(joint_names) == length:
        return [_clean(n) for n in joint_names]
    return [f"c{i}" for i in range(length)]


def episode_file_name(episode: int) -> str:
    """``episode-00042.parquet`` for episode 42."""
    return f"episode-{episode:05d}.parquet"


def parse_version(text: str) -> tuple[int, int]:
    """``"1.0"`` -> ``(1, 0)``; raises :class:`LogError` on anything else."""
    match = re.fullmatch(r"(\d+)\.(\d+)", text.strip())
    if match is None:
        raise LogError(f"schema_version: {text!r} is not of the form MAJOR.MINOR")
    return int(match.group(1)), int(match.group(2))


def _json_default(value: Any) -> Any:
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, (set, frozenset)):
        return sorted(value)
    if hasattr(value, "__fspath__"):
        return str(value)
    raise TypeError(f"metadata value of type {type(value).__name__} is not JSON-serialisable")


def to_json(value: Any, *, indent: int | None = None) -> str:
    """Deterministic JSON (sorted keys; numpy arrays and scalars as lists and numbers)."""
    try:
        return json.dumps(value, default=_json_default, sort_keys=True, indent=indent)
    except TypeError as exc:
        raise ValueError(f"metadata: {exc}") from None


def footer_digest(schema: Any, num_rows: int, created_by: str | None = None) -> str:
    """SHA-256 (hex) of what a reader takes from an episode file's footer.

    Covers the column names, types and field metadata (units), the ``blanket.*`` metadata
    other than the digest itself, ``num_rows`` and the writing library's name
    (``created_by``; default: the installed pyarrow's). ``schema`` is a ``pyarrow.Schema``
    (as written, or ``ParquetFile.schema_arrow`` as read back: both give the same digest).
    """
    import hashlib

    h = hashlib.sha256((_created_by() if created_by is None else created_by).encode())
    h.update(schema.to_string(show_field_metadata=True, show_schema_metadata=False).encode())
    for key, value in sorted((schema.metadata or {}).items()):
        if key.startswith(b"blanket.") and key != META_DIGEST:
            h.update(b"\0%d:%s\0%d:%s" % (len(key), key, len(value), value))
    h.update(b"\0rows:%d" % num_rows)
    return h.hexdigest()


@functools.cache
def _created_by() -> str:
    """The writer name pyarrow's Parquet writer puts in a footer (asked once, from a
    one-row file in memory)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    sink = pa.BufferOutputStream()
    pq.write_table(pa.table({"x": [0]}), sink)
    return pq.read_metadata(pa.BufferReader(sink.getvalue())).created_by
