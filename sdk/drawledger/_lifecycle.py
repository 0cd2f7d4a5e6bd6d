"""The end of a process that recorded decisions: closing ledgers where interpreter exit does not.

``Ledger.close`` runs by itself at interpreter exit (``atexit``). Some processes end without it:

- a ``multiprocessing`` child ends with ``os._exit`` (fork and forkserver start methods) right
  after its finalizers, and a pool's workers are ended with SIGTERM when the pool is
  terminated (``with Pool() as pool:`` does that at the end of the block). At the first record
  of such a child, ``guard_exit`` registers a finalizer that closes every ledger, and, when
  SIGTERM still has its default action and the record is made on the main thread, a SIGTERM
  handler that closes every ledger and then ends the process by SIGTERM as before;
- a child of a plain ``os.fork`` usually ends with ``os._exit``, which skips everything: at its
  first record a warning is logged once, asking for ``close()`` (or ``flush()``) before it ends.

Nothing helps a process killed with SIGKILL: what it did not flush is lost (docs/operations.md).
"""

from __future__ import annotations

import logging
import os
import socket
import sys
import threading
from collections.abc import Callable
from typing import Any

__all__ = ["EXIT_TIMEOUT", "at_exit", "guard_exit", "writer_id"]

log = logging.getLogger("drawledger")

EXIT_TIMEOUT = 10.0  # seconds a ledger may take to close when the process ends

_state = {"guarded": -1, "forked": False, "closing": False}


def _mark_forked() -> None:
    _state["forked"] = True


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_mark_forked)


def at_exit(close_all: Callable[[float | None], None], timeout: float = EXIT_TIMEOUT) -> None:
    """Close every ledger as the process ends (atexit, a multiprocessing finalizer)."""
    _state["closing"] = True
    close_all(timeout)


def guard_exit(close_all: Callable[[float | None], None]) -> None:
    """At the first record of a process: have ``close_all`` run when it ends, or warn."""
    pid = os.getpid()
    if _state["guarded"] == pid:
        return
    _state["guarded"] = pid
    mp: Any = sys.modules.get("multiprocessing")
    if mp is not None and mp.parent_process() is not None:
        from multiprocessing import util

        util.Finalize(None, at_exit, args=(close_all,), exitpriority=0)
        _close_on_sigterm(close_all)
    elif _state["forked"]:
        log.warning(
            "drawledger: this process was forked from one with a ledger; if it ends with "
            "os._exit() or by a signal, interpreter exit is skipped and records not yet "
            "written are lost: call ledger.close() (or flush()) before it ends"
        )


def _close_on_sigterm(close_all: Callable[[float | None], None]) -> None:
    import signal

    if threading.current_thread() is not threading.main_thread():
        return
    if signal.getsignal(signal.SIGTERM) is not signal.SIG_DFL:
        return  # the application handles SIGTERM itself

    def close_then_die(signum: int, frame: Any) -> None:
        signal.signal(signal.SIGTERM, signal.SIG_DFL)  # a second SIGTERM ends it at once
        if _state["closing"]:
            return  # the process is closing its ledgers on its way out already
        # The interrupted code may hold a lock that closing needs: close in another thread,
        # and wait a bounded time for it.
        closer = threading.Thread(target=at_exit, args=(close_all,), daemon=True)
        closer.start()
        closer.join(3 * EXIT_TIMEOUT)
        os.kill(os.getpid(), signal.SIGTERM)

    signal.signal(signal.SIGTERM, close_then_die)


def writer_id() -> str:
    """A new writer id: host, process id and random bytes (docs/ledger.md)."""
    host = socket.gethostname().split(".")[0] or "host"
    return f"{host}-{os.getpid()}-{os.urandom(3).hex()}"
