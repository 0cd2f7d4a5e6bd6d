"""The spill file: records the sink could not take, one JSON line each, whole or not at all."""

from __future__ import annotations

import errno
import os
import threading
from pathlib import Path
from typing import Any

import orjson

__all__ = ["SpillFile", "spill_line"]


def spill_line(item: Any) -> bytes:
    """One record as a line of the spill file (docs/ledger.md, "Spill files")."""
    if item[0] == "d":
        return orjson.dumps({"decision": list(item[1]), "draws": item[2]})
    if item[0] == "v":  # a code version row (docs/deploys.md); not a record of the chain
        return orjson.dumps({"code_version": list(item[1])})
    return orjson.dumps({"outcome": list(item[1])})


class SpillFile:
    """Append-only JSON Lines file of records the sink could not take; each write is fsynced.

    A write is whole or nothing: a short write is continued, and a write that fails (disk full)
    is cut off the file again, so the file never ends in part of a line. Should even that cut
    fail, the next write starts with a line break: the fragment stays a line of its own, which
    ingest reports, and never spoils the record written after it.
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self._lock = threading.Lock()
        self._torn = False  # the file may end in a fragment that could not be cut off

    def write(self, items: list[Any]) -> None:
        """Append the records, one line each, and fsync; raise ``OSError`` if not all landed."""
        self.append(b"".join(spill_line(item) + b"\n" for item in items))

    def append(self, data: bytes) -> None:
        """Append lines (bytes ending in a newline), whole or not at all, and fsync them."""
        with self._lock:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o600)
            try:
                self._append(fd, b"\n" + data if self._torn else data)
            finally:
                os.close(fd)

    def _append(self, fd: int, data: bytes) -> None:
        start = os.lseek(fd, 0, os.SEEK_END)
        try:
            view = memoryview(data)
            while view:
                n = os.write(fd, view)
                if n <= 0:  # write(2) wrote nothing without an error: treat as a full disk
                    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
                view = view[n:]
            os.fsync(fd)
        except OSError:
            try:
                os.ftruncate(fd, start)  # none of this batch counts: take it off the file
                os.fsync(fd)
            except OSError:
                self._torn = True
            raise
        self._torn = False
