"""pybullet, imported and connected without its console noise, and a client with cheap calls.

Two lines pybullet prints on every command are silenced at their cause:

- ``pybullet build time: ...`` is written by pybullet's C module to the C-level stderr (fd 2)
  as it is imported: the import runs with fd 2 pointed at a temporary file, and whatever else
  was written there is passed on to the real stderr afterwards;
- ``argv[0]=`` is written to stdout by ``pybullet.connect`` when it is given an ``options``
  string (``pybullet_utils.bullet_client.BulletClient`` always passes ``options=''``):
  :class:`Client` connects without one.

:class:`Client` is a ``BulletClient`` whose attribute lookup injects the client id once per
function and keeps the bound function on the instance: ``BulletClient`` builds a new
``functools.partial`` (after ``inspect.isbuiltin``) on every call, several microseconds each,
and a control step makes a dozen calls. Assigning an attribute on the instance still shadows
pybullet's function, as with ``BulletClient``. Import ``pybullet`` from here (``from
blanket.sim.bullet import pybullet``) so that the first import is the quiet one.
"""

from __future__ import annotations

import contextlib
import functools
import os
import sys
import tempfile
from collections.abc import Iterator
from typing import Any

__all__ = ["pybullet", "Client", "quiet_fd"]

#: Lines of pybullet's own console output dropped by :func:`quiet_fd`.
NOISE = (b"pybullet build time:",)


def _flush_c_streams() -> None:
    """Flush the C library's stdio buffers (pybullet writes with printf)."""
    try:
        import ctypes

        ctypes.CDLL(None).fflush(None)
    except (OSError, AttributeError, TypeError):  # pragma: no cover  (no C library handle)
        pass


@contextlib.contextmanager
def quiet_fd(fd: int, drop: tuple[bytes, ...] = NOISE) -> Iterator[None]:
    """Capture what C code writes to file descriptor ``fd`` inside the block; afterwards write
    it back to ``fd`` without the lines that start with one of ``drop``.

    Python's own ``sys.stdout`` / ``sys.stderr`` are flushed before and after. If ``fd`` is not
    open (e.g. a daemon without stderr), or no temporary file can be made, the block runs
    unchanged.
    """
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(Exception):
            stream.flush()
    try:
        capture = tempfile.TemporaryFile()
    except OSError:  # no writable temporary folder: let the output through
        yield
        return
    try:
        saved = os.dup(fd)
    except OSError:
        capture.close()
        yield
        return
    with capture:
        try:
            os.dup2(capture.fileno(), fd)
            try:
                yield
            finally:
                _flush_c_streams()
                for stream in (sys.stdout, sys.stderr):
                    with contextlib.suppress(Exception):
                        stream.flush()
                os.dup2(saved, fd)
        finally:
            os.close(saved)
            capture.seek(0)
            kept = [line for line in capture.read().splitlines(True) if not line.startswith(drop)]
            if kept:
                with contextlib.suppress(OSError):
                    os.write(fd, b"".join(kept))


with quiet_fd(2):
    import pybullet  # noqa: E402  (the one quiet first import)

from pybullet_utils.bullet_client import BulletClient  # noqa: E402


class Client(BulletClient):
    """A pybullet client (``DIRECT`` by default) whose calls carry its id; see the module
    docstring.

    Parameters
    ----------
    connection_mode : int
        ``pybullet.DIRECT`` or ``pybullet.GUI``.
    """

    def __init__(self, connection_mode: int = pybullet.DIRECT) -> None:  # noqa: D107
        self._shapes: dict[Any, Any] = {}
        self._pid = os.getpid()
        self._client = pybullet.connect(connection_mode)
        if self._client < 0:
            raise pybullet.error("could not connect to a pybullet physics server")

    def __getattr__(self, name: str) -> Any:
        attribute = getattr(pybullet, name)
        if name == "disconnect":
            bound = functools.partial(attribute, physicsClientId=self._client)
            self._client = -1
            return bound
        if callable(attribute) and type(attribute).__name__ == "builtin_function_or_method":
            attribute = functools.partial(attribute, physicsClientId=self._client)
            self.__dict__[name] = attribute  # found by plain lookup from now on
        return attribute
