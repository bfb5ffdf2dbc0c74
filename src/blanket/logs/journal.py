"""Episode journals: how a finished episode survives a killed process before its Parquet file
is written.

``RunWriter.end_episode`` stores the episode's Arrow table as a hidden journal file
``episodes/.episode-NNNNN.journal.arrow`` (Arrow IPC: a copy of the buffers, fast), renamed
into place only when complete, and returns; the encoder process (:class:`Encoder`, else a
background thread) then encodes the Parquet file ``episode-NNNNN.parquet`` (hidden
temporary, renamed when complete) and removes the journal; the file is committed to the
disk then (``durable``) or when the writer closes. A process killed in between leaves the
journal;
the readers of :mod:`blanket.logs.reader` finish it into the Parquet file (same bytes as the
writer would have written) before they list a folder, the way a database replays its
journal when it is next opened. Until then ``pyarrow.dataset`` (which skips hidden files)
does not see that episode.
"""

from __future__ import annotations

import contextlib
import os
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

# This module also runs as a script (the encoder process, see :class:`Encoder`): it imports
# nothing from blanket at the top.

__all__ = [
    "JOURNAL_SUFFIX",
    "journal_path",
    "spare_path",
    "write_journal",
    "write_episode",
    "finish_journal",
    "finish_journals",
    "Encoder",
    "EncoderStopped",
    "remove_temporaries",
    "replacing",
    "commit",
    "fsync_dir",
]

JOURNAL_SUFFIX = ".journal.arrow"
_META_COMPRESSION = b"blanket.compression"
# Dictionary pages and statistics only for the index columns: float signals rarely repeat,
# and per-column statistics of ~200 signals cost more than the data (measured: 9.5 ms ->
# 3.3 ms for 960 rows x 179 columns).
_INDEX = ["episode", "step", "t"]


def fsync_dir(path: Path) -> None:
    """fsync a folder (commits renames in it); a no-op where folders have no handle."""
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


def commit(*paths: Path) -> None:
    """fsync written files, then each of their folders once (the renames)."""
    for path in paths:
        try:
            fd = os.open(path, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        except OSError as exc:
            raise OSError(f"{path}: could not be committed to the disk ({exc.strerror})") from None
    for folder in dict.fromkeys(Path(p).parent for p in paths):
        fsync_dir(folder)


def _temporary(path: Path) -> Path:
    # Unique per process and thread: a reader finishing a journal may race the writer.
    return path.with_name(f".{path.name.lstrip('.')}.{os.getpid()}-{threading.get_ident()}.tmp")


@contextlib.contextmanager
def replacing(path: Path) -> Iterator[Path]:
    """A hidden temporary to write in place of ``path``, renamed over it when the block ends
    without error (and removed when it raises): readers see the old file or the whole new
    one, never a part."""
    tmp = _temporary(path)
    try:
        yield tmp
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def journal_path(final: Path) -> Path:
    """``episodes/.episode-00042.journal.arrow`` for ``episodes/episode-00042.parquet``."""
    return final.with_name(f".{final.stem}{JOURNAL_SUFFIX}")


def spare_path(folder: Path) -> Path:
    """A finished journal kept for reuse by this process (hidden; never read)."""
    return folder / f".episode-spare.{os.getpid()}.tmp"


def _ipc_bytes(table: pa.Table, compression: str, scratch: list[Any] | None) -> memoryview:
    """The Arrow IPC file of ``table``, in ``scratch[0]`` (a buffer kept between calls and
    grown when short: no allocation per episode) or in a new buffer."""
    meta = {_META_COMPRESSION: compression.encode()}
    need = table.nbytes + 1024 * table.num_columns + (1 << 16)
    holder = scratch if scratch is not None else [None]
    for _ in range(4):
        buffer = holder[0]
        if buffer is None or buffer.size < need:
            buffer = holder[0] = pa.allocate_buffer(need)
        sink = pa.FixedSizeBufferWriter(buffer)
        try:
            with pa.ipc.new_file(sink, table.schema, metadata=meta) as out:
                out.write_table(table)
        except (pa.ArrowException, OSError):  # did not fit
            need = 2 * buffer.size
            continue
        return memoryview(buffer)[: sink.tell()]
    raise OSError("journal: the episode's table does not fit in memory")  # pragma: no cover


def write_journal(
    table: pa.Table,
    journal: Path,
    compression: str,
    spare: Path | None = None,
    scratch: list[Any] | None = None,
) -> None:
    """Write ``table`` as the complete journal ``journal`` (temporary, then renamed).

    The IPC bytes are made in memory (in ``scratch``, see :func:`_ipc_bytes`) and written
    with one call; with ``spare`` (a finished journal kept by :func:`finish_journal`) its
    file is overwritten instead of a new one (its pages are in the page cache already:
    measured here 0.07 ms against 0.4 ms a fresh megabyte).
    """
    data = _ipc_bytes(table, compression, scratch)
    with replacing(journal) as tmp:
        if spare is not None:
            try:
                os.replace(spare, tmp)
            except FileNotFoundError:
                pass
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT, 0o666)
        try:
            done = 0
            while done < len(data):
                done += os.write(fd, data[done:])
            os.ftruncate(fd, len(data))
        finally:
            os.close(fd)


def write_episode(table: pa.Table, final: Path, compression: str) -> None:
    """Write the Parquet episode file ``final`` (temporary, then renamed; not yet fsynced)."""
    with replacing(final) as tmp:
        pq.write_table(
            table,
            str(tmp),
            compression=compression,
            use_dictionary=_INDEX[:2],
            write_statistics=_INDEX,
        )


def finish_journal(
    table: pa.Table,
    journal: Path,
    final: Path,
    compression: str,
    spare: Path | None = None,
    durable: bool = True,
) -> None:
    """The background half of ``end_episode``: Parquet file, journal removed (kept as the
    ``spare`` file for the next journal when given), committed to the disk if ``durable``."""
    write_episode(table, final, compression)
    try:
        if spare is not None:
            os.replace(journal, spare)
        else:
            journal.unlink()
    except FileNotFoundError:
        pass  # a reader finished it meanwhile
    if durable:
        commit(final)


def read_journal(journal: Path) -> tuple[pa.Table, str]:
    """The table of a complete journal and the compression asked for its Parquet file."""
    with pa.memory_map(str(journal)) as source:
        reader = pa.ipc.open_file(source)
        table = reader.read_all()
        meta = reader.metadata or {}
    return table, meta.get(_META_COMPRESSION, b"snappy").decode()


def finish_journal_file(
    journal: Path, final: Path, spare: Path | None = None, durable: bool = True
) -> None:
    """:func:`finish_journal` for a journal on disk (what the encoder process does)."""
    try:
        table, compression = read_journal(journal)
    except FileNotFoundError:
        if final.exists():
            return  # a reader finished it meanwhile
        raise
    finish_journal(table, journal, final, compression, spare, durable)


def finish_journals(folder: Path) -> list[Path]:
    """Turn the complete journals an interrupted run left in ``folder`` into episode files.

    Returns the episode files written. A journal whose episode file exists already (the
    process stopped between the rename and the removal) is removed.

    Raises
    ------
    LogError
        A journal is unreadable, or the folder is read-only (one line, naming the file).
    """
    from blanket.logs.schema import LogError

    written: list[Path] = []
    for journal in sorted(folder.glob(f".episode-*{JOURNAL_SUFFIX}")):
        final = journal.with_name(journal.name[1 : -len(JOURNAL_SUFFIX)] + ".parquet")
        try:
            if final.exists():
                journal.unlink(missing_ok=True)
                continue
            try:
                table, compression = read_journal(journal)
            except FileNotFoundError:
                continue  # finished meanwhile by the writer or another reader
            except (pa.ArrowException, OSError) as exc:
                first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
                raise LogError(f"{journal}: unreadable episode journal: {first}") from None
            write_episode(table, final, compression)
            journal.unlink(missing_ok=True)
        except OSError as exc:
            raise LogError(
                f"{journal}: an interrupted run left this episode unfinished and it cannot "
                f"be finished here ({exc.strerror or exc}); copy the run to a writable folder"
            ) from None
        written.append(final)
    return written


class EncoderStopped(OSError):
    """The encoder process is gone; the episodes sent to it are in their journals.

    ``pid`` is the process's id: the hidden temporaries it may have left carry it.
    """

    def __init__(self, message: str, pid: int = 0) -> None:
        super().__init__(message)
        self.pid = pid


def remove_temporaries(folder: Path, pid: int) -> None:
    """Remove the hidden temporaries a (dead) process ``pid`` left in ``folder``."""
    for path in folder.glob(f".*.{pid}-*.tmp"):
        path.unlink(missing_ok=True)


class Encoder:
    """A helper process that turns journals into Parquet files, so that the encoding costs
    the control loop neither its thread nor the GIL.

    A thread in the same process would: measured here, a thread writing Parquet files
    continuously slowed the iiwa loop by 33 %, another process doing the same by 12 %. The
    process is this module run as a script (pyarrow only, no blanket imports), at idle CPU
    priority, in its own session (a Ctrl-C of the run's process group does not stop it
    mid-file); it reads tasks, one JSON line each, from its stdin and answers each on its
    stdout; it finishes what it has been sent and exits when its stdin closes, also when the
    run's process was killed. Journals it has not finished remain for the readers.
    """

    def __init__(self) -> None:
        import subprocess
        import sys

        self._futures: dict[int, Any] = {}
        self._lock = threading.Lock()
        self._next = 0
        self.cpu_s = 0.0  # CPU time the process spent on tasks (for benchmarks)
        self._proc = subprocess.Popen(
            [sys.executable, "-P", str(Path(__file__).resolve())],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            start_new_session=True,
        )
        self._reader = threading.Thread(target=self._read, name="blanket-encoder", daemon=True)
        self._reader.start()

    def submit(self, journal: Path, final: Path, spare: Path | None, durable: bool = True) -> Any:
        """Send one task; the returned future completes when the Parquet file is committed."""
        import json
        from concurrent.futures import Future

        future: Future[None] = Future()
        with self._lock:
            if self._proc.poll() is not None or self._proc.stdin is None:
                future.set_exception(self._dead())
                return future
            task_id, self._next = self._next, self._next + 1
            self._futures[task_id] = future
        task = {"id": task_id, "journal": str(journal), "final": str(final)}
        task["spare"] = None if spare is None else str(spare)
        task["durable"] = durable
        try:
            self._proc.stdin.write(json.dumps(task).encode() + b"\n")
            self._proc.stdin.flush()
        except OSError:
            with self._lock:
                self._futures.pop(task_id, None)
            future.set_exception(self._dead())
        return future

    def alive(self) -> bool:
        return self._proc.poll() is None

    def close(self, timeout: float = 120.0) -> None:
        """Close the task stream and wait for the process to finish what it was sent."""
        if self._proc.stdin is not None and not self._proc.stdin.closed:
            try:
                self._proc.stdin.close()
            except OSError:  # pragma: no cover - a broken pipe: the process is gone
                pass
        try:
            self._proc.wait(timeout=timeout)
        except Exception:  # pragma: no cover - a stuck encoder
            self._proc.kill()
        self._reader.join(timeout=5.0)

    def _dead(self) -> EncoderStopped:
        err = b""
        if self._proc.poll() is not None and self._proc.stderr is not None:
            try:
                err = self._proc.stderr.read() or b""
            except (OSError, ValueError):  # pragma: no cover
                pass
        lines = err.decode(errors="replace").strip().splitlines()
        why = lines[-1] if lines else f"exit code {self._proc.returncode}"
        return EncoderStopped(
            f"the log encoder process stopped ({why}); the journals remain", self._proc.pid
        )

    def _read(self) -> None:
        import json

        stdout = self._proc.stdout
        assert stdout is not None
        for line in stdout:
            try:
                answer = json.loads(line)
            except ValueError:  # pragma: no cover - not ours
                continue
            with self._lock:
                future = self._futures.pop(answer.get("id"), None)
            self.cpu_s += float(answer.get("cpu_s", 0.0))
            if future is None:  # pragma: no cover
                continue
            if answer.get("error"):
                future.set_exception(OSError(answer["error"]))
            else:
                future.set_result(None)
        self._proc.wait()
        with self._lock:
            left, self._futures = self._futures, {}
        for future in left.values():
            future.set_exception(self._dead())


def _yield_to_the_loop() -> None:
    """Run the encoder only on CPU time the control loop leaves idle.

    ``SCHED_IDLE`` (Linux; else the lowest nice level): the encoder never takes a CPU from
    the loop. When the machine has no idle CPU, the writer's bound on pending episodes makes
    the loop wait for the encoder instead of piling up journals.
    """
    try:
        os.sched_setscheduler(0, os.SCHED_IDLE, os.sched_param(0))
    except (AttributeError, OSError):
        try:
            os.nice(19)
        except (AttributeError, OSError):  # pragma: no cover
            pass


def _serve() -> None:
    """The encoder process: one task per stdin line, one answer per stdout line."""
    import json
    import sys
    import time

    _yield_to_the_loop()
    orphaned = False
    for line in sys.stdin.buffer:
        task = json.loads(line)
        t0 = time.process_time()
        try:
            spare = task.get("spare")
            finish_journal_file(
                Path(task["journal"]),
                Path(task["final"]),
                None if spare is None else Path(spare),
                bool(task.get("durable", True)),
            )
            error = None
        except Exception as exc:  # reported to the writer, which raises it
            first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
            error = f"{task.get('final')}: {first}"
        answer = {"id": task["id"], "error": error, "cpu_s": time.process_time() - t0}
        if orphaned:
            continue
        try:
            sys.stdout.write(json.dumps(answer) + "\n")
            sys.stdout.flush()
        except OSError:  # the writer's process is gone: finish the tasks sent, unanswered
            orphaned = True
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115  (no flush error at exit)


if __name__ == "__main__":
    _serve()
