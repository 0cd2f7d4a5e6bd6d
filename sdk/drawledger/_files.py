"""Output files written whole or not at all, without following a planted link.

``check_output`` tells, before any work, whether a file can be written where asked.
``replacing`` gives a new file in the target's folder, created with ``O_CREAT | O_EXCL``
(and ``O_NOFOLLOW`` where the system has it) under a random name, so that a symbolic link
planted in the folder is never followed; when the block ends without error the file is
synced and renamed over the target (a link at the target is replaced, not written through);
on error it is removed and the target is left as it was.
"""

from __future__ import annotations

import os
import secrets
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import BinaryIO

from drawledger._text import visible
from drawledger.exceptions import OutputError

__all__ = ["check_output", "replacing"]

FLAGS = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0)
FLAGS |= getattr(os, "O_BINARY", 0) | getattr(os, "O_CLOEXEC", 0)


def check_output(path: str | os.PathLike[str], what: str) -> Path:
    """``path`` as a ``Path`` if a file can be written there; else ``OutputError`` naming
    ``what`` (for example "--json") and the problem."""
    target = Path(path).expanduser()
    folder = target.parent
    name = visible(os.fspath(path))
    if not folder.is_dir():
        raise OutputError(f"{what} {name}: no folder {visible(os.fspath(folder))}")
    if target.is_dir():
        raise OutputError(f"{what} {name}: is a folder, not a file")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise OutputError(f"{what} {name}: the folder is not writable")
    return target


@contextmanager
def replacing(path: str | os.PathLike[str]) -> Iterator[BinaryIO]:
    """A binary file that becomes ``path`` whole when the block ends without an error."""
    target = Path(path).expanduser()
    for _ in range(16):
        tmp = target.with_name(f".{target.name[:80]}.{secrets.token_hex(8)}.tmp")
        try:
            fd = os.open(tmp, FLAGS, 0o666)
            break
        except FileExistsError:
            continue
    else:  # pragma: no cover - sixteen random names taken
        raise OutputError(f"cannot create a temporary file beside {visible(os.fspath(target))}")
    try:
        with os.fdopen(fd, "wb") as out:
            yield out
            out.flush()
            os.fsync(out.fileno())
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
