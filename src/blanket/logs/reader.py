"""Read blanket run folders and episode files.

``read_run`` gives one pandas DataFrame of all episodes; ``open_dataset`` a
``pyarrow.dataset.Dataset`` for runs too large for memory; ``read_metadata`` the run
metadata. Every file is checked first: a foreign Parquet file, a truncated or corrupt file,
a file from a newer major schema version, or a folder without episodes raises a one-line
:class:`~blanket.logs.schema.LogError`. Hidden files (the writer's temporaries, names
starting with ``.``) are never read as episodes; complete journals a killed writer left
behind are first finished into their episode files (see :mod:`blanket.logs.journal`).
"""

from __future__ import annotations

import json
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from blanket.logs.journal import finish_journals
from blanket.logs.schema import (
    INDEX_COLUMNS,
    META_EPISODE,
    META_RUN,
    META_SCHEMA,
    SCHEMA_VERSION,
    LogError,
    parse_version,
)

__all__ = [
    "read_run",
    "open_dataset",
    "read_metadata",
    "read_episode_info",
    "episode_files",
    "check_file",
]


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def episode_files(path: str | os.PathLike[str]) -> list[Path]:
    """The episode files of a run folder, its ``episodes/`` folder, or a single file.

    Raises
    ------
    LogError
        The path does not exist, or a folder holds no episode files.
    """
    path = Path(path)
    if path.is_file():
        if path.name.startswith("."):
            raise LogError(f"{path}: hidden files are temporaries of an unfinished write")
        return [path]
    if not path.is_dir():
        raise LogError(f"{path}: no such file or folder")
    folder = path / "episodes" if (path / "episodes").is_dir() else path
    finish_journals(folder)  # episodes a killed writer left in journals (see journal.py)
    files = sorted(
        p
        for p in folder.iterdir()
        if p.is_file() and p.suffix == ".parquet" and not p.name.startswith((".", "_"))
    )
    if not files:
        raise LogError(f"{path}: no episode files (*.parquet) found; is this a blanket run folder?")
    return files


def check_file(path: str | os.PathLike[str]) -> pq.ParquetFile:
    """Open one episode file and check that it is a complete blanket log we can read.

    Returns
    -------
    pyarrow.parquet.ParquetFile

    Raises
    ------
    LogError
        Not Parquet, truncated or corrupt, not written by blanket, or a newer major schema.
    """
    path = Path(path)
    try:
        handle = pq.ParquetFile(path)
    except (pa.ArrowException, OSError) as exc:
        raise LogError(
            f"{path}: not a readable Parquet file (truncated or corrupt?): {_first_line(exc)}"
        ) from None
    meta = handle.schema_arrow.metadata or {}
    if META_SCHEMA not in meta:
        raise LogError(f"{path}: not a blanket log (no {META_SCHEMA.decode()} in the metadata)")
    try:
        version_text = meta[META_SCHEMA].decode()
    except UnicodeDecodeError:
        raise LogError(f"{path}: corrupt blanket schema version in the metadata") from None
    major, _minor = parse_version(version_text)
    own_major, _ = parse_version(SCHEMA_VERSION)
    if major > own_major:
        raise LogError(
            f"{path}: written by a newer blanket schema {version_text}; this reader knows "
            f"{SCHEMA_VERSION}"
        )
    if major < own_major:  # pragma: no cover - no older major exists yet
        raise LogError(
            f"{path}: written by an older blanket schema {version_text}; this reader knows "
            f"{SCHEMA_VERSION}"
        )
    return handle


def _read_table(path: Path, columns: Sequence[str] | None = None) -> pa.Table:
    handle = check_file(path)
    try:
        if columns is not None:
            present = set(handle.schema_arrow.names)
            columns = [c for c in columns if c in present]
        return handle.read(columns=columns)
    except (pa.ArrowException, OSError) as exc:
        raise LogError(f"{path}: corrupt episode data: {_first_line(exc)}") from None


def read_run(path: str | os.PathLike[str], columns: Sequence[str] | None = None) -> pd.DataFrame:
    """All episodes of a run as one DataFrame.

    Parameters
    ----------
    path : path
        A run folder, its ``episodes/`` folder, or one episode file.
    columns : sequence of str, optional
        Read only these columns (``episode``, ``step``, ``t`` are always included; names
        absent from a file are skipped).

    Returns
    -------
    pandas.DataFrame
        Columns ``episode``, ``step``, ``t`` then the logged groups, rows ordered by episode
        and step. Columns missing from some episodes hold nulls there.
    """
    files = episode_files(path)
    if columns is not None:
        columns = list(INDEX_COLUMNS) + [c for c in columns if c not in INDEX_COLUMNS]
    tables = [_read_table(f, columns) for f in files]
    try:
        table = pa.concat_tables(
            [t.replace_schema_metadata(None) for t in tables], promote_options="default"
        )
    except (pa.ArrowException, ValueError) as exc:
        raise LogError(
            f"{path}: episode files disagree on column types: {_first_line(exc)}"
        ) from None
    frame = table.to_pandas()
    return frame.sort_values(["episode", "step"], kind="stable").reset_index(drop=True)


def open_dataset(path: str | os.PathLike[str]) -> ds.Dataset:
    """A ``pyarrow.dataset.Dataset`` over the checked episode files (lazy; filters push down).

    Examples
    --------
    >>> dataset = open_dataset("runs/bench-0")
    >>> dataset.to_table(columns=["episode", "t", "external.distance_m"],
    ...                  filter=ds.field("episode") == 3)
    """
    files = episode_files(path)
    schemas = [check_file(f).schema_arrow.remove_metadata() for f in files]
    try:
        schema = pa.unify_schemas(schemas, promote_options="default")
    except (pa.ArrowException, ValueError) as exc:
        raise LogError(
            f"{path}: episode files disagree on column types: {_first_line(exc)}"
        ) from None
    return ds.dataset([str(f) for f in files], schema=schema, format="parquet")


def read_metadata(path: str | os.PathLike[str]) -> dict[str, Any]:
    """Run metadata: ``run.json`` of a run folder, else the metadata embedded in the files.

    For a single episode file the result also has ``"episode"``: the episode number, row
    count and the ``extra`` dict stored by ``end_episode``.
    """
    path = Path(path)
    run_json = None
    if path.is_dir():
        for folder in (path, path.parent) if path.name == "episodes" else (path,):
            if (folder / "run.json").is_file():
                run_json = folder / "run.json"
                break
    if run_json is not None:
        try:
            data = json.loads(run_json.read_text())
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise LogError(f"{run_json}: unreadable run metadata: {_first_line(exc)}") from None
        if not isinstance(data, dict) or "schema_version" not in data:
            raise LogError(f"{run_json}: not a blanket run.json (no schema_version)")
        major, _ = parse_version(str(data["schema_version"]))
        if major > parse_version(SCHEMA_VERSION)[0]:
            raise LogError(
                f"{run_json}: written by a newer blanket schema {data['schema_version']}; "
                f"this reader knows {SCHEMA_VERSION}"
            )
        return data
    files = episode_files(path)
    handle = check_file(files[0])
    meta = handle.schema_arrow.metadata
    data = json.loads(meta[META_RUN]) if META_RUN in meta else {}
    if path.is_file():
        data["episode"] = read_episode_info(path)
    return data


def read_episode_info(path: str | os.PathLike[str]) -> dict[str, Any]:
    """The ``blanket.episode`` metadata of one episode file (episode, rows, extra)."""
    meta = check_file(path).schema_arrow.metadata
    if META_EPISODE not in meta:
        return {}
    return json.loads(meta[META_EPISODE])
