"""The background writer: a bounded in-memory queue drained in batches into a sink.

The serving thread only appends to the queue. The writer thread takes everything queued,
writes it in one transaction, retries a failing sink, and spills what it cannot write to a
local JSON Lines file (fsynced) so that no acknowledged record is lost.
"""

from __future__ import annotations

import os
import threading
import time
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any

import orjson

from drawledger._sinks import Sink

# A queued item: ("d", decision_row, draw_rows) or ("o", outcome_row) or a flush marker (Event).
Item = Any


class Stats:
    """Counters of one ledger in one process (see ``Ledger.stats``)."""

    __slots__ = ("recorded", "retried", "spilled", "written")

    def __init__(self) -> None:
        self.recorded = 0
        self.written = 0
        self.spilled = 0
        self.retried = 0

    def as_dict(self) -> dict[str, int]:
        return {name: getattr(self, name) for name in self.__slots__}


class SpillFile:
    """Append-only JSON Lines file of records the sink could not take; each write is fsynced."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self._lock = threading.Lock()

    def write(self, items: list[Item]) -> None:
        lines = []
        for item in items:
            if item[0] == "d":
                lines.append(orjson.dumps({"decision": list(item[1]), "draws": item[2]}))
            else:
                lines.append(orjson.dumps({"outcome": list(item[1])}))
        data = b"\n".join(lines) + b"\n"
        with self._lock:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o600)
            try:
                os.write(fd, data)
                os.fsync(fd)
            finally:
                os.close(fd)


class Writer:
    """One writer thread per ledger per process."""

    def __init__(
        self,
        open_sink: Callable[[], Sink],
        spill: SpillFile,
        stats: Stats,
        *,
        batch_size: int,
        retries: int = 2,
        retry_delay: float = 0.05,
    ) -> None:
        self._open_sink = open_sink
        self._sink: Sink | None = None
        self.spill = spill
        self.stats = stats
        self.batch_size = batch_size
        self.retries = retries
        self.retry_delay = retry_delay
        self.queue: deque[Item] = deque()
        self._wake = threading.Event()
        self._stop = False
        self._thread: threading.Thread | None = None
        self.last_error: BaseException | None = None

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="drawledger-writer", daemon=True)
        self._thread.start()

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def wake(self) -> None:
        self._wake.set()

    def flush(self, timeout: float | None) -> bool:
        marker = threading.Event()
        self.queue.append(marker)
        self._wake.set()
        return marker.wait(timeout)

    def stop(self, timeout: float | None) -> None:
        self._stop = True
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout)
        if self._sink is not None:
            self._sink.close()
            self._sink = None

    def forget_after_fork(self) -> None:
        """In a forked child: drop the parent's queue, thread and connections."""
        self.queue = deque()
        self._wake = threading.Event()
        self._thread = None
        if self._sink is not None and hasattr(self._sink, "after_fork"):
            self._sink.after_fork()
        self._sink = None

    # -- the thread -----------------------------------------------------------------------
    def _run(self) -> None:
        q = self.queue
        while True:
            if not q:
                if self._stop:
                    return
                self._wake.wait(0.05)
                self._wake.clear()
                continue
            items: list[Item] = []
            markers: list[threading.Event] = []
            while q and len(items) < self.batch_size:
                item = q.popleft()
                if isinstance(item, threading.Event):
                    markers.append(item)
                    break  # commit what came before the marker, then release it
                items.append(item)
            if items:
                self._write(items)
            for m in markers:
                m.set()

    def _write(self, items: list[Item]) -> None:
        decisions, draws, outcomes = [], [], []
        for item in items:
            if item[0] == "d":
                decisions.append(item[1])
                draws.extend(item[2])
            else:
                outcomes.append(item[1])
        for attempt in range(self.retries + 1):
            try:
                if self._sink is None:
                    self._sink = self._open_sink()
                self._sink.write(decisions, draws, outcomes)
                self.stats.written += len(items)
                return
            except Exception as exc:  # any sink failure: retry, then spill
                self.last_error = exc
                if attempt < self.retries:
                    self.stats.retried += 1
                    time.sleep(self.retry_delay * (4**attempt))
        self.spill_items(items)

    def spill_items(self, items: list[Item]) -> None:
        self.spill.write(items)
        self.stats.spilled += len(items)
