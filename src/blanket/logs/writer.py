"""Write a run folder of per-episode Parquet trajectory logs.

The column naming pattern and file metadata are described in :mod:`blanket.logs.schema`.
Each episode is held in one float64 buffer preallocated on ``begin_episode`` (``max_steps``
rows, else 1024, doubled when full), a row per record: ``step``, ``t``, the scalars (one
``struct`` pack) and the arrays (one join of their bytes), so the values are copied and
the caller may reuse its arrays. ``end_episode`` turns the buffer into one Arrow table,
typed back per column (int64 and bool where the values allow), encodes it in memory as one
Parquet file (with page checksums and a footer digest, see :mod:`blanket.logs.schema`) and
writes it with one call to a hidden temporary in the same folder, renamed over the final
name with :func:`os.replace`. A process killed at any point therefore keeps every episode
whose ``end_episode`` returned, never shows a partial file under a visible name, and loses
only the open episode; the hidden temporary it may leave is never read and
``blanket logs repair`` removes it.

Commit to the disk: :meth:`RunWriter.close` fsyncs every episode file and the folder. With
``durable=True`` every episode file is committed before ``end_episode`` returns; by default a
power loss or OS crash (not a killed process) can cost the episodes of the last ~30 s that
the OS had not yet written back.
"""

from __future__ import annotations

import datetime as _dt
import importlib.metadata
import json
import math
import operator
import os
import struct
import threading
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from blanket.errors import ConfigError
from blanket.logs.schema import (
    GROUPS,
    META_DIGEST,
    META_EPISODE,
    META_RUN,
    META_SCHEMA,
    META_UNITS,
    SCHEMA_VERSION,
    TIMING_FIELDS,
    WALL_CLOCK_FIELDS,
    component_labels,
    episode_file_name,
    footer_digest,
    to_json,
    unit_for_key,
)

__all__ = ["RunWriter", "episode_file_name", "package_versions", "write_episode_file"]

_VERSIONED_PACKAGES = ("blanket", "numpy", "pybullet", "gymnasium", "pyarrow")
_INITIAL_CAPACITY = 1024
# Dictionary pages and statistics only for the index columns: float signals rarely repeat,
# and per-column statistics of ~200 signals cost more than the data (measured: 9.5 ms ->
# 3.3 ms for 960 rows x 179 columns).
_INDEX = ["episode", "step", "t"]


def package_versions() -> dict[str, str | None]:
    """Installed versions of the packages that shape a log (None when not installed)."""
    versions: dict[str, str | None] = {}
    for name in _VERSIONED_PACKAGES:
        try:
            versions[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            versions[name] = None
    return versions


def fsync_dir(path: Path) -> None:
    """fsync a folder (commits the renames in it); a no-op where folders have no handle."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:  # pragma: no cover - platforms without directory handles
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover
        pass
    finally:
        os.close(fd)


def _fsync_file(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
    except OSError as exc:
        raise OSError(f"{path}: could not be committed to the disk ({exc.strerror})") from None


def commit(*paths: Path) -> None:
    """fsync written files, then each of their folders once (the renames)."""
    for path in paths:
        _fsync_file(path)
    for folder in dict.fromkeys(Path(p).parent for p in paths):
        fsync_dir(folder)


@contextmanager
def replacing(path: Path) -> Iterator[Path]:
    """A hidden temporary to write in place of ``path`` (named with this process's id),
    renamed over it when the block ends without error and removed when it raises: readers
    see the old file or the whole new one, never a part."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}-{threading.get_ident()}.tmp")
    try:
        yield tmp
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_episode_file(
    table: pa.Table, final: Path, compression: str = "snappy", durable: bool = False
) -> None:
    """Write ``table`` as the episode file ``final``: Parquet with page checksums and the
    footer digest, through a hidden temporary renamed into place (fsynced with the folder
    when ``durable``)."""
    digest = footer_digest(table.schema, table.num_rows).encode()
    table = table.replace_schema_metadata({**table.schema.metadata, META_DIGEST: digest})
    # Encoded in memory, then written with one call: pyarrow's own file sink makes a
    # system call per page (~330 for an episode of 159 columns).
    sink = pa.BufferOutputStream()
    pq.write_table(
        table,
        sink,
        compression=compression,
        use_dictionary=_INDEX[:2],
        write_statistics=_INDEX,
        write_page_checksum=True,
    )
    _write_bytes_atomically(final, sink.getvalue(), durable)


def _write_bytes_atomically(path: Path, data: Any, durable: bool = True) -> None:
    """Replace ``path`` whole through a hidden temporary with one write of ``data``;
    ``durable`` fsyncs the file before the rename and the folder after it (else
    :meth:`RunWriter.close` commits it)."""
    with replacing(path) as tmp:
        with open(tmp, "wb") as handle:
            handle.write(data)
        if durable:
            _fsync_file(tmp)
    if durable:
        fsync_dir(path.parent)


_dtype_of = operator.attrgetter("dtype")
_FLOAT64 = np.dtype(np.float64)
_INDEX_WIDTH = 2  # step and t lead every row


def _describe(value: Any) -> str:
    return type(value).__name__


def _kind_of(path: tuple[str, ...], value: Any) -> tuple[str, tuple[int, ...]]:
    """Kind (``"b"``, ``"i"``, ``"f"``) and shape of a first value; ValueError if unloggable."""
    name = ".".join(path)
    if isinstance(value, (bool, np.bool_)):
        return "b", ()
    if isinstance(value, (int, np.integer)):
        return "i", ()
    if isinstance(value, (float, np.floating)):
        return "f", ()
    if value is None:
        raise ValueError(f"{name}: value is None; log numbers or arrays only")
    if isinstance(value, (np.ndarray, list, tuple)):
        arr = np.asarray(value)
        if arr.ndim > 2:
            raise ValueError(
                f"{name}: arrays of {arr.ndim} dimensions cannot be logged; "
                "give 0-, 1- or 2-D arrays"
            )
        kind = arr.dtype.kind
        if kind not in "biuf":
            raise ValueError(
                f"{name}: arrays of dtype {arr.dtype} cannot be logged; "
                "give bool, integer or float arrays"
            )
        return ("i" if kind == "u" else kind), arr.shape
    raise ValueError(
        f"{name}: values of type {_describe(value)} cannot be logged; "
        "give floats, ints, bools or numpy arrays (blanket.logs.groups.numeric_only(values) "
        "keeps those; an agent's diagnostics(copy=False) gives only those)"
    )


def _no_episode_yet(run_dir: Path) -> bool:
    """True when ``run_dir`` holds only a ``run.json`` and an empty ``episodes`` folder."""
    names = {p.name for p in run_dir.iterdir()}
    episodes = run_dir / "episodes"
    return names <= {"run.json", "episodes"} and (
        not episodes.is_dir() or not any(episodes.iterdir())
    )


class _Leaf:
    """One logged key: its columns in the row buffer and how to type them.

    Values are held as float64 (exact for the integers and flags a loop logs) and typed back
    when the table is built: an integer key becomes int64 when all its values are integral,
    a flag bool when all are 0 or 1.
    """

    __slots__ = ("path", "kind", "shape", "width", "offset", "valid", "names", "unit")

    def __init__(self, path: tuple[str, ...], value: Any) -> None:
        self.path = path
        self.kind, self.shape = _kind_of(path, value)
        self.width = math.prod(self.shape)
        self.offset = -1  # no column yet
        self.valid: np.ndarray | None = None  # None: present on every row
        self.names: list[str] = []
        self.unit: str | None = None
        for key in reversed(path[1:]):
            self.unit = unit_for_key(key)
            if self.unit is not None:
                break

    def check(self, value: Any, row: int) -> np.ndarray | float:
        """Validate a later value; return it ready to store (flattened for arrays)."""
        name = ".".join(self.path)
        if value is None:
            raise ValueError(f"{name}: value is None; log numbers or arrays only")
        if isinstance(value, (str, bytes, Mapping)) or not isinstance(
            value, (bool, int, float, np.generic, np.ndarray, list, tuple)
        ):
            raise ValueError(
                f"{name}: values of type {_describe(value)} cannot be logged; "
                "give floats, ints, bools or numpy arrays"
            )
        if np.shape(value) != self.shape:
            raise ValueError(
                f"{name}: shape {np.shape(value)} at row {row}, but the episode started "
                f"with shape {self.shape}; keep shapes fixed per episode"
            )
        arr = np.asarray(value)
        if arr.dtype.kind not in "biuf":
            raise ValueError(f"{name}: values of dtype {arr.dtype} cannot be logged")
        return arr.ravel() if self.shape else float(arr)


class _Node:
    """A (nested) dict of logged keys: its leaves and sub-dicts, in first-seen order."""

    __slots__ = ("path", "children")

    def __init__(self, path: tuple[str, ...]) -> None:
        self.path = path
        self.children: dict[str, _Leaf | _Node] = {}

    def leaves(self) -> list[_Leaf]:
        """Leaves in key order with sub-dicts in place: the column order of the table."""
        out: list[_Leaf] = []
        for child in self.children.values():
            out.extend(child.leaves() if type(child) is _Node else [child])
        return out


def _fetcher(groups: list[_Node]) -> Any:
    """``fetch(external, sensory, active, internal) -> (scalars, arrays)``: the values of a
    row in column order, scalars and arrays apart. The layout is resolved once into index
    lists (sub-dicts by parent and key, leaves by dict and key), so a row costs a few list
    comprehensions of plain subscripts; a missing key raises ``KeyError``, as does a dict
    with other keys than the layout's (by its length). No code is generated."""
    subs: list[tuple[int, str]] = []  # sub-dict k is dicts[len(groups) + k] = dicts[i][key]
    checks: list[tuple[int, int]] = []  # (dict index, number of keys)
    items: dict[bool, list[tuple[int, str]]] = {False: [], True: []}

    def visit(node: _Node, index: int) -> None:
        checks.append((index, len(node.children)))
        for key, child in node.children.items():
            if type(child) is _Node:
                subs.append((index, key))
                visit(child, len(groups) + len(subs) - 1)
            else:
                items[bool(child.shape)].append((index, key))

    for g, group in enumerate(groups):
        visit(group, g)
    scalars, arrays = items[False], items[True]

    def fetch(*dicts_in: Any) -> tuple[tuple[Any, ...], tuple[Any, ...]]:
        dicts = list(dicts_in)
        for i, key in subs:
            dicts.append(dicts[i][key])
        for i, n in checks:
            if len(dicts[i]) != n:
                raise KeyError
        return (
            tuple([dicts[i][k] for i, k in scalars]),
            tuple([dicts[i][k] for i, k in arrays]),
        )

    return fetch


class _Rows:
    """The rows of one episode in one float64 buffer, a row per record: ``step``, ``t``,
    every scalar, then every array value (flattened), each in column order.

    :meth:`put` fetches a row's values with the layout's generated function
    (:func:`_fetcher`) and stores them with one ``struct`` pack of the scalars and one join
    of the arrays' bytes: callers may reuse their arrays, and nothing of theirs is kept.
    Anything unexpected there (a missing or new key, None, a string, another dtype or total
    size) raises, and the row is stored again by :meth:`_put_checked`, which adapts the
    layout (new columns, nulls for missing values) or gives a one-line message naming the
    key.
    """

    def __init__(self, capacity: int) -> None:
        self.capacity = capacity
        self.groups = [_Node((g,)) for g in GROUPS]
        self._stale = False  # keys added since the last layout
        self._relayout(0)

    def put(self, step: Any, t: Any, values: Sequence[Any], row: int) -> None:
        """Store one record (``values``: the four group dicts) as row ``row``."""
        try:
            scalars, arrays = self._fetch(*values)
            start = row * self._row_bytes
            # 'd' takes bools, ints, floats and numpy numbers; None, strings and arrays of
            # more than one value raise
            self._pack_into(self._bytes, start, step, t, *scalars)
            if arrays:
                if tuple(map(_dtype_of, arrays)) != self._dtypes:  # flags, integers
                    arrays = tuple(np.asarray(a, np.float64) for a in arrays)
                # the raw bytes of native float64 arrays: an array in another memory order
                # fails the join, another total size the assignment
                start += self._scalar_bytes
                self._bytes[start : start + self._array_bytes] = b"".join(arrays)
            return
        except Exception:
            pass
        self._put_checked(step, t, values, row)

    def _put_checked(self, step: Any, t: Any, values: Sequence[Any], row: int) -> None:
        for name, value in (("step", step), ("t", t)):
            if isinstance(value, (bool, np.bool_)) or not isinstance(
                value, (int, float, np.integer, np.floating)
            ):
                raise ValueError(
                    f"record: {name} must be {'an int' if name == 'step' else 'a float'}, "
                    f"got {_describe(value)}"
                )
        try:
            for group, value in zip(self.groups, values, strict=True):
                self._add_keys(group, value, row)
        finally:  # keys added before a bad value are placed too
            if self._stale:
                self._relayout(row)
        line = np.zeros(self.data.shape[1])
        line[:_INDEX_WIDTH] = (step, t)
        for group, value in zip(self.groups, values, strict=True):
            self._store_checked(group, value, row, line)
        self.data[row] = line

    def _add_keys(self, node: _Node, values: Any, row: int) -> None:
        """Create the leaves and sub-dicts of keys seen for the first time at ``row``."""
        if not isinstance(values, Mapping):
            raise ValueError(
                f"{'.'.join(node.path)}: expected a dict of values, got {_describe(values)}"
            )
        for name, value in values.items():
            if not isinstance(name, str):
                raise ValueError(
                    f"{'.'.join(node.path)}: keys must be strings, got {_describe(name)}"
                )
            child = node.children.get(name)
            if child is None:
                if isinstance(value, Mapping):
                    child = _Node((*node.path, name))
                else:
                    child = _Leaf((*node.path, name), value)
                    if row > 0:  # earlier rows are null
                        child.valid = np.ones(self.capacity, dtype=bool)
                        child.valid[:row] = False
                node.children[name] = child
                self._stale = True
            if type(child) is _Node:
                self._add_keys(child, value, row)

    def _store_checked(
        self, node: _Node, values: Mapping[str, Any], row: int, line: np.ndarray
    ) -> None:
        for name, child in node.children.items():
            if name not in values:
                for leaf in [child] if type(child) is _Leaf else child.leaves():
                    if leaf.valid is None:
                        leaf.valid = np.ones(self.capacity, dtype=bool)
                    leaf.valid[row] = False
                continue
            value = values[name]
            if type(child) is _Node:
                if not isinstance(value, Mapping):
                    raise ValueError(
                        f"{'.'.join(child.path)}: expected a dict of values, got {_describe(value)}"
                    )
                self._store_checked(child, value, row, line)
                continue
            line[child.offset : child.offset + child.width] = child.check(value, row)
            if child.valid is not None:
                child.valid[row] = True

    def grow(self, capacity: int) -> None:
        data = np.zeros((capacity, self.data.shape[1]))
        data[: self.capacity] = self.data
        for leaf in self.leaves():
            if leaf.valid is not None:
                leaf.valid = np.concatenate([leaf.valid, np.ones(capacity - self.capacity, bool)])
        self.capacity = capacity
        self._set_data(data)

    def leaves(self) -> list[_Leaf]:
        """All leaves in table column order."""
        return [leaf for group in self.groups for leaf in group.leaves()]

    def _relayout(self, rows: int) -> None:
        """Place every leaf (step and t, the scalars, then the arrays, each in column
        order), keep the first ``rows`` rows (new keys hold zeros there, masked) and make
        the row's fetch function."""
        leaves = self.leaves()
        scalars = [leaf for leaf in leaves if not leaf.shape]
        arrays = [leaf for leaf in leaves if leaf.shape]
        old = getattr(self, "data", None)
        offset = _INDEX_WIDTH
        moves = [(0, 0, _INDEX_WIDTH)]  # (old offset, new offset, width)
        for leaf in scalars + arrays:
            if leaf.offset >= 0:
                moves.append((leaf.offset, offset, leaf.width))
            leaf.offset = offset
            offset += leaf.width
        data = np.zeros((self.capacity, offset))
        if old is not None and rows:
            for was, now, width in moves:
                data[:rows, now : now + width] = old[:rows, was : was + width]
        self._set_data(data)
        self._pack_into = struct.Struct(f"={_INDEX_WIDTH + len(scalars)}d").pack_into
        self._scalar_bytes = 8 * (_INDEX_WIDTH + len(scalars))
        self._array_bytes = self._row_bytes - self._scalar_bytes
        self._dtypes = (_FLOAT64,) * len(arrays)
        self._fetch = _fetcher(self.groups)
        self._stale = False

    def _set_data(self, data: np.ndarray) -> None:
        self.data = data  # C-ordered float64 (np.zeros)
        self._bytes = memoryview(data).cast("B") if data.size else memoryview(b"")
        self._row_bytes = data.shape[1] * data.itemsize


def _typed(column: np.ndarray, kind: str) -> np.ndarray:
    """Give a float64 column back its logged type when its values allow it."""
    if kind == "i" and np.all(np.isfinite(column)) and np.all(column == np.round(column)):
        return column.astype(np.int64)
    if kind == "b" and np.all((column == 0.0) | (column == 1.0)):
        return column.astype(bool)
    return column


class RunWriter:
    """Writer of one run folder: ``run.json`` and ``episodes/episode-NNNNN.parquet``.

    Parameters
    ----------
    run_dir : path
        The run folder; created if missing. A non-empty folder is refused unless
        ``overwrite=True``, which removes the log files blanket wrote there before.
    metadata : dict
        Run metadata kept in ``run.json`` and (without wall-clock fields) in every
        episode file: e.g. ``scenario``, ``seed``, ``robot``, ``rates``, ``joint_names``,
        ``urdf_path``, ``end_effector``, ``action_low``, ``action_high``, ``tolerance_m``.
        Must be JSON-serialisable (numpy arrays and scalars are converted).
    overwrite : bool
        Allow a non-empty ``run_dir``.
    component_names : dict of str to sequence of str, optional
        Component names per key or key suffix, see :mod:`blanket.logs.schema`.
    compression : str
        Parquet compression codec (default ``"snappy"``; ``"zstd"`` writes smaller, slower).
    durable : bool
        Commit every episode file to the disk (fsync) as it is written, so that it survives
        a power cut or an OS crash moments later. Off by default: files are committed when
        the writer closes, and before that the OS writes them back within about 30 s; a
        killed *process* loses nothing either way. On our VM an fsync slowed the control
        steps that ran right after it (see DEVELOPERS.md).

    Examples
    --------
    >>> meta = {"scenario": "bench", "joint_names": ["shoulder", "elbow"]}
    >>> with RunWriter(run_dir, meta) as w:
    ...     w.begin_episode(0, max_steps=960)
    ...     w.record(0, 0.0, external=ext, sensory=obs, active={"joint_velocity_rad_s": a})
    ...     path = w.end_episode({"success": True})
    """

    def __init__(
        self,
        run_dir: str | os.PathLike[str],
        metadata: Mapping[str, Any] | None = None,
        *,
        overwrite: bool = False,
        component_names: Mapping[str, Sequence[str]] | None = None,
        compression: str = "snappy",
        durable: bool = False,
    ) -> None:
        self.run_dir = Path(run_dir)
        self._durable = bool(durable)
        self.episodes_dir = self.run_dir / "episodes"
        if self.run_dir.exists() and not self.run_dir.is_dir():
            raise ConfigError(f"run_dir: {self.run_dir} is a file; give a folder")
        if self.run_dir.is_dir() and any(self.run_dir.iterdir()):
            # a run that stopped before its first episode ended (only run.json and an empty
            # episodes/ folder) holds no data: start again there
            if not overwrite and not _no_episode_yet(self.run_dir):
                raise ConfigError(
                    f"run_dir: {self.run_dir} is not empty; choose a new folder or pass "
                    "overwrite=True"
                )
            self._remove_old_logs()
        self.episodes_dir.mkdir(parents=True, exist_ok=True)
        metadata = dict(metadata or {})
        joint_names = metadata.get("joint_names")
        if joint_names is not None:
            if isinstance(joint_names, str) or not isinstance(joint_names, Sequence):
                raise ConfigError("metadata.joint_names: give a list of joint name strings")
            joint_names = [str(n) for n in joint_names]
            metadata["joint_names"] = joint_names
        self._joint_names: list[str] | None = joint_names
        self._component_names = dict(component_names) if component_names else None
        self._compression = compression
        detected = package_versions()
        given = metadata.pop("versions", None)
        versions = {str(k): v for k, v in given.items()} if isinstance(given, Mapping) else {}
        # Installed versions win over what the caller passed (which may say "unknown").
        versions.update({k: v for k, v in detected.items() if v is not None})

        for key in ("scenario", "seed", "robot", "rates"):
            metadata.setdefault(key, None)
        wall_clock = {k: metadata.pop(k) for k in WALL_CLOCK_FIELDS if k in metadata}
        # One wall-clock field: the caller's start time (either name), else now.
        given = wall_clock.pop("started_at", None) or wall_clock.pop("start_time", None)
        wall_clock.pop("start_time", None)
        self._file_metadata: dict[str, Any] = {
            **metadata,
            "schema_version": SCHEMA_VERSION,
            "versions": versions,
        }
        # Validate JSON-ability once, and fix the bytes embedded in every file.
        self._run_json_bytes = to_json(self._file_metadata).encode()
        started = given or _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")
        self._run_json: dict[str, Any] = {
            **self._file_metadata,
            **wall_clock,
            "started_at": started,
            "units": {"t": "s"},
        }
        self._write_run_json()
        self._episode: int | None = None
        self._written: set[int] = set()
        self._closed = False
        self._reset_buffers(0)

    # ------------------------------------------------------------------ public API
    @property
    def metadata(self) -> dict[str, Any]:
        """The run metadata as written to ``run.json``."""
        return json.loads(to_json(self._run_json))

    def begin_episode(self, episode: int, max_steps: int | None = None) -> None:
        """Start buffering episode ``episode`` (``max_steps`` preallocates the buffers)."""
        self._check_open()
        if self._episode is not None:
            raise ValueError(
                f"begin_episode: episode {self._episode} is still open; call end_episode first"
            )
        if isinstance(episode, bool) or not isinstance(episode, (int, np.integer)):
            raise ValueError(f"episode: expected an int >= 0, got {episode!r}")
        if episode < 0:
            raise ValueError(f"episode: expected an int >= 0, got {episode}")
        if int(episode) in self._written:
            raise ValueError(f"episode: {episode} was already written in this run")
        if max_steps is not None and (
            isinstance(max_steps, bool)
            or not isinstance(max_steps, (int, np.integer))
            or max_steps < 1
        ):
            raise ValueError(f"max_steps: expected an int >= 1 or None, got {max_steps!r}")
        self._episode = int(episode)
        self._reset_buffers(int(max_steps) if max_steps else _INITIAL_CAPACITY)

    def record(
        self,
        step: int,
        t: float,
        *,
        external: Mapping[str, Any],
        sensory: Mapping[str, Any],
        active: Mapping[str, Any],
        internal: Mapping[str, Any] | None = None,
    ) -> None:
        """Append one row: the four groups of values at control step ``step``, time ``t`` (s)."""
        if self._episode is None:
            raise ValueError("record: no open episode; call begin_episode first")
        row = self._rows
        store = self._store
        if row == store.capacity:
            store.grow(2 * store.capacity)
        store.put(step, t, (external, sensory, active, {} if internal is None else internal), row)
        self._rows = row + 1

    def end_episode(self, extra: Mapping[str, Any] | None = None) -> Path:
        """End the open episode, write its Parquet file and return its path.

        The file is complete under its name when this returns (committed to the disk too
        with ``durable=True``). ``extra`` (JSON-serialisable) is stored in the file metadata
        ``blanket.episode``, except the wall-clock timings of
        :data:`~blanket.logs.schema.TIMING_FIELDS`, which go to ``timings.jsonl``.
        """
        if self._episode is None:
            raise ValueError("end_episode: no open episode; call begin_episode first")
        episode = self._episode
        extra = dict(extra or {})
        timings = {k: extra.pop(k) for k in TIMING_FIELDS if k in extra}
        table = self._build_table(episode, extra)
        final = self.episodes_dir / episode_file_name(episode)
        write_episode_file(table, final, self._compression, self._durable)
        self._written.add(episode)
        self._episode = None
        if timings:
            line = to_json({"episode": episode, **timings}) + "\n"
            with open(self.run_dir / "timings.jsonl", "a", encoding="utf-8") as handle:
                handle.write(line)  # one write per line: a killed process cuts no line short
        units = json.loads(table.schema.metadata[META_UNITS])
        if not units.items() <= self._run_json["units"].items():
            self._run_json["units"].update(units)
            self._write_run_json()
        # The buffers are kept until the next begin_episode replaces them (no reallocation here).
        return final

    def discard_episode(self) -> None:
        """Drop the open episode's rows without writing them."""
        self._episode = None
        self._reset_buffers(0)

    def close(self) -> None:
        """Write an open episode that has rows (an empty one is dropped), commit the run's
        files to the disk, and close the run."""
        if self._closed:
            return
        try:
            if self._episode is not None:
                if self._rows:
                    self.end_episode({"closed_before_end": True})
                else:
                    self.discard_episode()
        finally:
            self._closed = True
            self.flush()

    def flush(self) -> None:
        """Commit the files written so far to the disk (fsync of each and of the folders).

        Raises
        ------
        OSError
            A commit failed (the message names the file).
        """
        files = [self.episodes_dir / episode_file_name(e) for e in sorted(self._written)]
        files += [self.run_dir / name for name in ("run.json", "timings.jsonl")]
        commit(*(f for f in files if f.exists()))

    def __enter__(self) -> RunWriter:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if exc_type is not None:
            self.discard_episode()
        self.close()

    # ------------------------------------------------------------------ internals
    def _check_open(self) -> None:
        if self._closed:
            raise ValueError("RunWriter: the writer is closed")

    def _remove_old_logs(self) -> None:
        for name in ("run.json", "summary.json", "timings.jsonl"):
            (self.run_dir / name).unlink(missing_ok=True)
        if self.episodes_dir.is_dir():
            for path in self.episodes_dir.iterdir():
                is_ours = path.name.startswith("episode-") and path.suffix == ".parquet"
                if is_ours or path.name.startswith(".episode-"):
                    path.unlink()

    def _write_run_json(self) -> None:
        text = to_json(self._run_json, indent=2) + "\n"
        # Committed as written with durable=True, else by close() (flush()).
        _write_bytes_atomically(self.run_dir / "run.json", text.encode(), self._durable)

    def _reset_buffers(self, capacity: int) -> None:
        self._rows = 0
        self._store = _Rows(capacity)

    def _build_table(self, episode: int, extra: dict[str, Any]) -> pa.Table:
        n = self._rows
        store = self._store
        # One transposed copy of the rows; every column is then a contiguous slice of it
        # (float columns without nulls are Arrow arrays over those slices, no copy).
        columns = np.ascontiguousarray(store.data[:n].T)
        steps = columns[0].astype(np.int64)
        if not np.array_equal(steps, columns[0]):
            raise ValueError("record: step must be an integer")
        names = ["episode", "step", "t"]
        arrays: list[pa.Array] = [
            pa.array(np.full(n, episode, dtype=np.int64)),
            pa.array(steps),
            pa.array(columns[1]),
        ]
        buffer = pa.py_buffer(columns)
        f64 = pa.float64()
        from_buffers = pa.Array.from_buffers
        for leaf in store.leaves():
            names.extend(self._column_names(leaf))
            first = leaf.offset
            if leaf.kind == "f" and leaf.valid is None:
                arrays.extend(
                    from_buffers(f64, n, [None, buffer.slice(8 * n * j, 8 * n)])
                    for j in range(first, first + leaf.width)
                )
                continue
            valid = None if leaf.valid is None else leaf.valid[:n]
            for values in columns[first : first + leaf.width]:
                if leaf.kind != "f":
                    # Masked rows hold 0: they do not decide the type.
                    probe = values if valid is None else values[valid]
                    if _typed(probe, leaf.kind).dtype != np.float64:
                        values = _typed(values, leaf.kind)
                arrays.append(pa.array(values, mask=None if valid is None else ~valid))
        if len(set(names)) < len(names):
            twice = next(name for name in names if names.count(name) > 1)
            raise ValueError(f"column {twice!r} is produced twice; rename a key or its components")
        units = {"t": "s"}
        for leaf in store.leaves():
            if leaf.unit is not None:
                units.update(dict.fromkeys(leaf.names, leaf.unit))
        units_json = to_json(units).encode()
        schema = pa.schema(
            [
                pa.field(name, a.type, metadata={"unit": units[name]} if name in units else None)
                for name, a in zip(names, arrays, strict=True)
            ],
            metadata={
                META_SCHEMA: SCHEMA_VERSION.encode(),
                META_RUN: self._run_json_bytes,
                META_UNITS: units_json,
                META_EPISODE: to_json({"episode": episode, "rows": n, "extra": extra}).encode(),
            },
        )
        return pa.Table.from_arrays(arrays, schema=schema)

    def _column_names(self, leaf: _Leaf) -> list[str]:
        if not leaf.names:
            prefix = ".".join(leaf.path)
            shape = leaf.shape
            if not shape:
                leaf.names = [prefix]
            else:
                comps = component_labels(
                    leaf.path, shape[-1], self._joint_names, self._component_names
                )
                if len(shape) == 1:
                    leaf.names = [f"{prefix}.{c}" for c in comps]
                else:
                    leaf.names = [f"{prefix}.order{k}.{c}" for k in range(shape[0]) for c in comps]
        return leaf.names
