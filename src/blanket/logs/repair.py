"""``blanket logs repair RUN_DIR``: the one step that changes a finished run folder.

Readers never write; what an interrupted run left behind is handled here, explicitly:

- a journal ``episodes/.episode-NNNNN.journal.arrow`` (Arrow IPC, complete when renamed into
  place) left by an earlier blanket writer, which ended episodes into journals and encoded
  them in the background: when its episode file is missing, empty, truncated or corrupt,
  the journal is written as the episode file (hidden temporary, renamed, committed to the
  disk), the new file is read back in full and compared with the journal, and only then is
  the journal removed. A journal whose episode file verifies is removed; an unreadable
  journal is reported and kept.
- hidden temporaries ``.NAME.PID-THREAD.tmp`` (and ``.episode-spare.PID.tmp``) of a process
  that is no longer running: removed (a temporary is never an episode's only complete copy).
- a damaged episode file without a journal: reported, left as it is.

Running it again changes nothing (idempotent).
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field
from pathlib import Path

import pyarrow as pa

from blanket.logs.reader import JOURNAL_SUFFIX, read_episode
from blanket.logs.schema import LogError
from blanket.logs.writer import commit, write_episode_file

__all__ = ["RepairReport", "repair_run"]

_META_COMPRESSION = b"blanket.compression"
_TEMPORARY = re.compile(r"^\..*\.(\d+)(?:-\d+)?\.tmp$")


@dataclass
class RepairReport:
    """What :func:`repair_run` did: episode files written from journals, journals removed,
    temporaries removed, and the problems left (one line each)."""

    written: list[Path] = field(default_factory=list)
    journals_removed: list[Path] = field(default_factory=list)
    temporaries_removed: list[Path] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)

    def lines(self) -> list[str]:
        """One line per action and problem, for the CLI."""
        out = [f"wrote {p} from its journal" for p in self.written]
        out += [f"removed {p}" for p in self.journals_removed + self.temporaries_removed]
        out += [f"problem: {p}" for p in self.problems]
        return out or ["nothing to repair"]


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # pragma: no cover - another user's live process
        return True
    return True


def _read_journal(journal: Path) -> tuple[pa.Table, str]:
    """The table of a complete journal and the compression asked for its Parquet file."""
    with pa.memory_map(str(journal)) as source:
        reader = pa.ipc.open_file(source)
        table = reader.read_all()
        meta = reader.metadata or {}
    return table, meta.get(_META_COMPRESSION, b"snappy").decode()


def _verifies(path: Path, expected: pa.Table | None = None) -> bool:
    """The episode file reads in full (checksums, digest) and, given ``expected``, holds its
    values."""
    try:
        table = read_episode(path)
    except LogError:
        return False
    if expected is None:
        return True
    return table.replace_schema_metadata(None).equals(expected.replace_schema_metadata(None))


def repair_run(run_dir: str | os.PathLike[str]) -> RepairReport:
    """Finish the journals and remove the temporaries an interrupted run left (see the
    module docstring). Returns what was done.

    Raises
    ------
    LogError
        ``run_dir`` is not a folder, or a file could not be written (e.g. a read-only
        folder); one line naming the file.
    """
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise LogError(f"{run_dir}: no such folder")
    folder = run_dir / "episodes" if (run_dir / "episodes").is_dir() else run_dir
    report = RepairReport()
    for journal in sorted(folder.glob(f".episode-*{JOURNAL_SUFFIX}")):
        final = journal.with_name(journal.name[1 : -len(JOURNAL_SUFFIX)] + ".parquet")
        try:
            table, compression = _read_journal(journal)
        except (pa.ArrowException, OSError) as exc:
            first = (str(exc).strip().splitlines() or [type(exc).__name__])[0][:200]
            report.problems.append(f"{journal}: unreadable journal, kept: {first}")
            continue
        try:
            if not (final.exists() and _verifies(final)):
                write_episode_file(table, final, compression, durable=True)
                if not _verifies(final, table):
                    report.problems.append(f"{final}: written from its journal, did not verify")
                    continue
                report.written.append(final)
            journal.unlink()
            commit(final)
        except OSError as exc:
            raise LogError(
                f"{journal}: cannot be finished here ({exc.strerror or exc}); copy the run to "
                "a writable folder and repair the copy"
            ) from None
        report.journals_removed.append(journal)
    for tmp in sorted(dict.fromkeys([*folder.iterdir(), *run_dir.iterdir()])):
        match = _TEMPORARY.match(tmp.name)
        if match and tmp.is_file() and not _alive(int(match.group(1))):
            try:
                tmp.unlink()
            except OSError as exc:
                raise LogError(f"{tmp}: cannot be removed ({exc.strerror or exc})") from None
            report.temporaries_removed.append(tmp)
    for path in sorted(folder.glob("*.parquet")):
        if path.name.startswith((".", "_")):
            continue
        try:
            read_episode(path)
        except LogError as exc:
            report.problems.append(f"{exc} (no journal to rebuild it from; left as it is)")
    return report
