"""Read blanket run folders and episode files; readers never change a run folder.

``read_run`` gives one pandas DataFrame of all episodes; ``open_dataset`` a
``pyarrow.dataset.Dataset`` for runs too large for memory; ``read_metadata`` the run
metadata. Every file is checked: a zero-byte, truncated or foreign file, a footer that
disagrees with its digest, a data page whose checksum fails, or a file from a newer major
schema version raises a one-line :class:`~blanket.logs.schema.LogError` naming the file.
``read_run(..., on_error="skip")`` returns the episodes that read and the list of those
errors instead. Hidden files (temporaries, and journals of earlier writers) are never read;
journals left without their episode file are reported, and ``blanket logs repair`` finishes
them (see :mod:`blanket.logs.repair`).
"""

from __future__ import annotations

import json
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Literal, overload

import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from blanket.errors import ConfigError, did_you_mean, shorten
from blanket.logs.schema import (
    INDEX_COLUMNS,
    META_DIGEST,
    META_EPISODE,
    META_RUN,
    META_SCHEMA,
    SCHEMA_VERSION,
    LogError,
    episode_file_name,
    footer_digest,
    parse_version,
)

__all__ = [
    "read_run",
    "open_dataset",
    "read_metadata",
    "read_episode_info",
    "read_episode",
    "read_one_episode",
    "episode_files",
    "check_file",
    "leftover_journals",
    "ON_ERROR",
]

#: Values of ``on_error``: raise the first problem, or skip damaged episodes and list them.
ON_ERROR = ("raise", "skip")
JOURNAL_SUFFIX = ".journal.arrow"


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return shorten(text[0], 200).strip("'\"") if text else type(exc).__name__


def _check_on_error(on_error: str) -> None:
    if on_error not in ON_ERROR:
        hint = did_you_mean(str(on_error), ON_ERROR)
        raise ConfigError(f"on_error: {shorten(on_error)} is not known; {hint}")


def leftover_journals(folder: Path) -> list[Path]:
    """Journals an interrupted earlier writer left in an ``episodes/`` folder without their
    episode file (``.episode-NNNNN.journal.arrow``); ``blanket logs repair`` finishes them."""
    return sorted(
        j
        for j in folder.glob(f".episode-*{JOURNAL_SUFFIX}")
        if not j.with_name(j.name[1 : -len(JOURNAL_SUFFIX)] + ".parquet").exists()
    )


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
            raise LogError(f"{path}: hidden files are temporaries or journals, not episodes")
        return [path]
    if not path.is_dir():
        raise LogError(f"{path}: no such file or folder")
    folder = path / "episodes" if (path / "episodes").is_dir() else path
    files = sorted(
        p
        for p in folder.iterdir()
        if p.is_file() and p.suffix == ".parquet" and not p.name.startswith((".", "_"))
    )
    if not files and not leftover_journals(folder):
        raise LogError(f"{path}: no episode files (*.parquet) found; is this a blanket run folder?")
    return files


def _journal_problems(path: str | os.PathLike[str]) -> list[LogError]:
    path = Path(path)
    if not path.is_dir():
        return []
    folder = path / "episodes" if (path / "episodes").is_dir() else path
    return [
        LogError(
            f"{j}: an interrupted run left this episode in a journal; run "
            f"`blanket logs repair {path}` to finish it"
        )
        for j in leftover_journals(folder)
    ]


def check_file(path: str | os.PathLike[str]) -> pq.ParquetFile:
    """Open one episode file and check its footer: a complete blanket log we can read.

    The data pages are checked (page checksums) as they are read, see :func:`read_episode`.

    Returns
    -------
    pyarrow.parquet.ParquetFile

    Raises
    ------
    LogError
        Empty, not Parquet, truncated or corrupt, not written by blanket, a footer that
        disagrees with its digest, or a newer major schema.
    """
    path = Path(path)
    try:
        if path.stat().st_size == 0:
            raise LogError(f"{path}: empty file (0 bytes); the write that made it did not finish")
        handle = pq.ParquetFile(path, page_checksum_verification=True)
        meta = handle.schema_arrow.metadata or {}
        footer = handle.metadata
        created_by = footer.created_by
    except (pa.ArrowException, OSError, UnicodeDecodeError) as exc:
        raise LogError(
            f"{path}: not a readable Parquet file (truncated or corrupt?): {_first_line(exc)}"
        ) from None
    if META_SCHEMA not in meta:
        raise LogError(f"{path}: not a blanket log (no {META_SCHEMA.decode()} in the metadata)")
    digest = meta.get(META_DIGEST)
    if digest is not None:
        # The footer holds the blanket metadata twice (Parquet's key-value pairs, and inside
        # the stored Arrow schema): both copies must agree with the digest.
        raw = footer.metadata or {}
        ours = {k: v for k, v in meta.items() if k.startswith(b"blanket.")}
        if ours != {k: v for k, v in raw.items() if k.startswith(b"blanket.")} or digest != (
            footer_digest(handle.schema_arrow, footer.num_rows, created_by).encode("ascii")
        ):
            raise LogError(f"{path}: corrupt file: its footer does not match its digest")
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


def read_episode(path: str | os.PathLike[str], columns: Sequence[str] | None = None) -> pa.Table:
    """One episode file as an Arrow table, every page of the file checked against its
    checksum (also with ``columns``: a file reads whole or not at all).

    ``columns`` selects columns (names absent from the file are skipped).

    Raises
    ------
    LogError
        See :func:`check_file`; also a data page that fails its checksum or cannot be decoded.
    """
    path = Path(path)
    handle = check_file(path)
    try:
        table = handle.read()
    except (pa.ArrowException, OSError) as exc:
        raise LogError(f"{path}: corrupt episode data: {_first_line(exc)}") from None
    if columns is None:
        return table
    present = set(table.column_names)
    return table.select([c for c in dict.fromkeys(columns) if c in present])


@overload
def read_run(
    path: str | os.PathLike[str],
    columns: Sequence[str] | None = ...,
    *,
    on_error: Literal["raise"] = ...,
) -> pd.DataFrame: ...
@overload
def read_run(
    path: str | os.PathLike[str],
    columns: Sequence[str] | None = ...,
    *,
    on_error: Literal["skip"],
) -> tuple[pd.DataFrame, list[LogError]]: ...
def read_run(
    path: str | os.PathLike[str],
    columns: Sequence[str] | None = None,
    *,
    on_error: str = "raise",
) -> pd.DataFrame | tuple[pd.DataFrame, list[LogError]]:
    """All episodes of a run as one DataFrame.

    Parameters
    ----------
    path : path
        A run folder, its ``episodes/`` folder, or one episode file.
    columns : sequence of str, optional
        Return only these columns (``episode``, ``step``, ``t`` are always included; names
        absent from a file are skipped). Every file is still checked whole.
    on_error : {"raise", "skip"}
        ``"raise"`` (default): the first damaged episode file (or a journal left by an
        interrupted run) raises. ``"skip"``: read the other episodes and return
        ``(frame, problems)``, ``problems`` the list of one-line :class:`LogError` s.

    Returns
    -------
    pandas.DataFrame, or (pandas.DataFrame, list of LogError) with ``on_error="skip"``
        Columns ``episode``, ``step``, ``t`` then the logged groups, rows ordered by episode
        and step. Columns missing from some episodes hold nulls there.
    """
    _check_on_error(on_error)
    files = episode_files(path)
    problems = _journal_problems(path)
    if problems and on_error == "raise":
        raise problems[0]
    if columns is not None:
        columns = list(INDEX_COLUMNS) + [c for c in columns if c not in INDEX_COLUMNS]
    tables = []
    for f in files:
        try:
            tables.append(read_episode(f, columns))
        except LogError as exc:
            if on_error == "raise":
                raise
            problems.append(exc)
    if not tables:
        raise LogError(f"{path}: no episode file reads: {problems[0]}")
    try:
        table = pa.concat_tables(
            [t.replace_schema_metadata(None) for t in tables], promote_options="default"
        )
    except (pa.ArrowException, ValueError) as exc:
        raise LogError(
            f"{path}: episode files disagree on column types: {_first_line(exc)}"
        ) from None
    frame = table.to_pandas()
    frame = frame.sort_values(["episode", "step"], kind="stable").reset_index(drop=True)
    return (frame, problems) if on_error == "skip" else frame


def read_one_episode(
    path: str | os.PathLike[str],
    episode: int | None = None,
    *,
    on_error: str = "skip",
) -> tuple[pa.Table, int, list[LogError]]:
    """One episode of a run (the first that reads when ``episode`` is None), its number, and
    the problems met on the way.

    ``on_error="skip"`` (default): other episodes' damaged files do not matter (those looked
    at are listed in the problems); ``"raise"``: every episode file of the run must read in
    full first. A requested episode that is damaged or absent always raises.
    """
    _check_on_error(on_error)
    files = episode_files(path)
    problems = _journal_problems(path)
    if on_error == "raise":
        if problems:
            raise problems[0]
        for f in files:
            read_episode(f)
    if episode is not None:
        named = [f for f in files if f.name == episode_file_name(int(episode))]
        files = named + [f for f in files if f not in named]
    known: list[int] = []
    for f in files:
        try:
            number = read_episode_info(f).get("episode")
            if episode is not None and number != episode:
                known += [number] if isinstance(number, int) else []
                continue
            table = read_episode(f)
        except LogError as exc:
            if episode is not None and f.name == episode_file_name(int(episode)):
                raise
            problems.append(exc)
            continue
        if episode is None and isinstance(number, int):
            episode = number
        if episode is None:
            episode = int(table.column("episode")[0].as_py()) if table.num_rows else 0
        return table, int(episode), problems
    if episode is None:
        raise LogError(f"{path}: no episode file reads: {problems[0]}")
    raise LogError(f"episode: {episode} is not in {path}; the run has episodes {sorted(known)}")


def open_dataset(path: str | os.PathLike[str]) -> ds.Dataset:
    """A ``pyarrow.dataset.Dataset`` over the checked episode files (lazy; filters push down;
    page checksums verified as pages are read).

    Examples
    --------
    >>> dataset = open_dataset("runs/bench-0")
    >>> dataset.to_table(columns=["episode", "t", "external.distance_m"],
    ...                  filter=ds.field("episode") == 3)
    """
    files = episode_files(path)
    problems = _journal_problems(path)
    if problems:
        raise problems[0]
    schemas = [check_file(f).schema_arrow.remove_metadata() for f in files]
    try:
        schema = pa.unify_schemas(schemas, promote_options="default")
    except (pa.ArrowException, ValueError) as exc:
        raise LogError(
            f"{path}: episode files disagree on column types: {_first_line(exc)}"
        ) from None
    checked = ds.ParquetFileFormat(
        default_fragment_scan_options=ds.ParquetFragmentScanOptions(page_checksum_verification=True)
    )
    return ds.dataset([str(f) for f in files], schema=schema, format=checked)


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
    if not files:
        raise _journal_problems(path)[0]
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
