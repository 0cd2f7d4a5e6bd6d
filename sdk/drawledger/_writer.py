"""The background writer: a bounded in-memory queue drained in batches into a sink.

The serving thread only appends to the queue (``Writer.put``). The writer thread takes what is
queued, links it into the hash chain (``Chain``: seq, prev_hash and hash, in queue order),
writes it in one transaction, retries a failing sink, and spills what it cannot write to a local
JSON Lines file (fsynced) so that no acknowledged record is lost. The policies
(docs/operations.md):

- queue full: the caller waits up to ``block_timeout`` for room, then the record is spilled by
  the caller itself; while the queue stays full later records are spilled at once, without
  waiting again;
- sink failure: ``retries`` more attempts with growing delays, then the batch is spilled; for
  the next ``cooldown`` seconds (doubling up to a minute while failures go on) batches go
  straight to the spill file without trying the sink;
- spill failure too (disk full, directory not writable): the batch goes back to the front of
  the queue and is tried again later; ``flush()`` raises ``LedgerError`` naming the error; the
  thread never dies of it. Only a record that finds both the queue full and the spill file
  failing is dropped, and counted (``dropped``), and logged.
"""

from __future__ import annotations

import logging
import os
import threading
import time
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any

import orjson

from drawledger import _records
from drawledger._sinks import Sink
from drawledger.exceptions import LedgerError

log = logging.getLogger("drawledger")

# A queued record, or a flush marker. A record is queued unsealed, its row without the last three
# columns (seq, prev_hash, hash): ("d-", decision_row, draw_rows) or ("o-", outcome_row). Sealed,
# with complete rows, it is ("d", decision_row, draw_rows) or ("o", outcome_row): what sinks,
# spill files and taps see.
Item = Any
SEALED = frozenset({"d", "o"})

MAX_COOLDOWN = 60.0


class Stats:
    """Counters of one ledger in one process (see ``Ledger.stats``)."""

    __slots__ = ("dropped", "recorded", "retried", "spilled", "written")

    def __init__(self) -> None:
        self.recorded = 0
        self.written = 0
        self.spilled = 0
        self.retried = 0
        self.dropped = 0

    def as_dict(self) -> dict[str, int]:
        return {name: getattr(self, name) for name in self.__slots__}


def spill_line(item: Item) -> bytes:
    """One record as a line of the spill file (docs/ledger.md, "Spill files")."""
    if item[0] == "d":
        return orjson.dumps({"decision": list(item[1]), "draws": item[2]})
    if item[0] == "v":  # a code version row (docs/deploys.md); not a record of the chain
        return orjson.dumps({"code_version": list(item[1])})
    return orjson.dumps({"outcome": list(item[1])})


class Chain:
    """The hash chain of one writer (docs/ledger.md): records get seq and prev_hash as sealed.

    Only the holder of ``lock`` may seal; the writer thread seals each batch it takes, in queue
    order, and the serving thread seals only a record that bypasses the queue (a tap, a spill).
    """

    __slots__ = ("key", "lock", "prev", "seq")

    def __init__(self, key: bytes) -> None:
        self.key = key
        self.lock = threading.Lock()
        self.seq = 0
        self.prev: str | None = None

    def seal(self, item: Item) -> Item:
        """The record with its seq, prev_hash and hash; a sealed record as it is."""
        tag = item[0]
        sealed: Item
        if tag == "d-":
            row = (*item[1], self.seq, self.prev)
            digest = _records.decision_hash(row, item[2], self.key)
            sealed = ("d", (*row, digest), item[2])
        elif tag == "o-":
            row = (*item[1], self.seq, self.prev)
            digest = _records.outcome_hash(row, self.key)
            sealed = ("o", (*row, digest))
        else:
            return item
        self.seq += 1
        self.prev = digest
        return sealed


class SpillFile:
    """Append-only JSON Lines file of records the sink could not take; each write is fsynced."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self._lock = threading.Lock()

    def write(self, items: list[Item]) -> None:
        data = b"".join(spill_line(item) + b"\n" for item in items)
        with self._lock:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o600)
            try:
                os.write(fd, data)
                os.fsync(fd)
            finally:
                os.close(fd)


class _Flush:
    """A flush marker in the queue: set once everything before it is written or spilled."""

    __slots__ = ("done", "error")

    def __init__(self) -> None:
        self.done = threading.Event()
        self.error: BaseException | None = None


class Writer:
    """One writer thread per ledger per process."""

    def __init__(
        self,
        open_sink: Callable[[], Sink],
        spill: SpillFile,
        stats: Stats,
        chain: Chain,
        *,
        batch_size: int,
        queue_size: int = 100_000,
        block_timeout: float = 1.0,
        retries: int = 2,
        retry_delay: float = 0.05,
        cooldown: float = 1.0,
    ) -> None:
        self._open_sink = open_sink
        self._sink: Sink | None = None
        self.spill = spill
        self.stats = stats
        self.chain = chain
        self.batch_size = batch_size
        self.queue_size = queue_size
        self.block_timeout = block_timeout
        self.retries = retries
        self.retry_delay = retry_delay
        self.cooldown = cooldown
        self.queue: deque[Item] = deque()
        # Code version rows (docs/deploys.md) waiting for the sink; written before the next batch.
        self.versions: list[tuple[Any, ...]] = []
        self._wake = threading.Event()
        self._stop = False
        self._thread: threading.Thread | None = None
        self._live = False  # set by start(), cleared when the thread ends: put() checks only this
        self._start_lock = threading.Lock()
        self._overflowing = False
        self._down_until = 0.0
        self._down_for = cooldown
        self.last_error: BaseException | None = None

    def start(self) -> None:
        """Start the writer thread unless it runs already."""
        with self._start_lock:
            if self.running:
                return
            self._thread = threading.Thread(target=self._main, name="drawledger-writer",
                                            daemon=True)  # fmt: skip
            self._live = True
            self._thread.start()

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def wake(self) -> None:
        self._wake.set()

    def put(self, item: Item) -> None:
        """Queue one record; when the queue stays full, spill it (the policy above)."""
        q = self.queue
        if not self._live:
            self.start()
        if len(q) >= self.queue_size:
            self._wake.set()
            if not self._overflowing:
                deadline = time.monotonic() + self.block_timeout
                while len(q) >= self.queue_size and time.monotonic() < deadline:
                    time.sleep(0.001)
            if len(q) >= self.queue_size:
                self._overflowing = True
                try:
                    with self.chain.lock:
                        item = self.chain.seal(item)
                    self.spill_items([item])
                except Exception as exc:  # the decision call must still return
                    self.last_error = exc
                    self.stats.dropped += 1
                    log.error("drawledger: record dropped: queue full and spill failed: %s", exc)
                return
        q.append(item)

    def seal(self, item: Item) -> Item:
        """Seal the records still queued, then ``item``: its seq follows theirs."""
        with self.chain.lock:
            self._seal_queued()
            return self.chain.seal(item)

    def seal_queued(self) -> tuple[int, str | None]:
        """Seal every queued record now; the chain's next seq and prev_hash after them."""
        with self.chain.lock:
            self._seal_queued()
            return self.chain.seq, self.chain.prev

    def _seal_queued(self) -> None:
        # The caller holds the chain lock, under which alone records leave the queue or come
        # back to its front; records sealed early are never behind unsealed ones, so the
        # unsealed ones are the records after the last sealed one.
        q = self.queue
        first = len(q)
        while first > 0 and not (type(q[first - 1]) is tuple and q[first - 1][0] in SEALED):
            first -= 1
        seal = self.chain.seal
        for i in range(first, len(q)):
            if type(q[i]) is tuple:
                q[i] = seal(q[i])

    def flush(self, timeout: float | None) -> bool:
        """Wait until everything queued before now is written or spilled; False on timeout."""
        marker = _Flush()
        self.queue.append(marker)
        self._wake.set()
        if not marker.done.wait(timeout):
            return False
        if marker.error is not None:
            raise LedgerError(
                f"records could neither be written nor spilled to {str(self.spill.path)!r} "
                f"(they stay queued and are retried): {marker.error}"
            )
        return True

    def stop(self, timeout: float | None) -> None:
        self._stop = True
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout)
        if self._sink is not None and not self.running:
            self._sink.close()
            self._sink = None

    def forget_after_fork(self) -> None:
        """In a forked child: drop the parent's queue, thread and connections."""
        self.queue = deque()
        self._wake = threading.Event()
        self._start_lock = threading.Lock()
        self._thread = None
        self._live = False
        if self._sink is not None and hasattr(self._sink, "after_fork"):
            self._sink.after_fork()
        self._sink = None

    # -- the thread -----------------------------------------------------------------------
    def _main(self) -> None:
        try:
            self._run()
        finally:
            self._live = False

    def _run(self) -> None:
        q = self.queue
        chain = self.chain
        while True:
            if not q:
                if self._stop:
                    return
                self._wake.wait(0.05)
                self._wake.clear()
                continue
            items: list[Item] = []
            markers: list[_Flush] = []
            with chain.lock:  # taking records and sealing them is one step (see _seal_queued)
                while q and len(items) < self.batch_size:
                    item = q.popleft()
                    if isinstance(item, _Flush):
                        markers.append(item)
                        break  # commit what came before the marker, then release it
                    items.append(item)
                items = self._seal_batch(items)
            if len(q) < self.queue_size:
                self._overflowing = False
            error = self._write(items) if items else None
            if error is not None:
                if self._stop:  # closing, and neither sink nor disk takes the records
                    self.stats.dropped += len(items)
                    log.error("drawledger: %d records dropped at close: %s", len(items), error)
                else:
                    with chain.lock:
                        q.extendleft(reversed(items))
            for m in markers:
                m.error = error
                m.done.set()
            if error is not None and not self._stop:
                self._wake.wait(min(self._down_for, MAX_COOLDOWN))
                self._wake.clear()

    def _seal_batch(self, items: list[Item]) -> list[Item]:
        """The batch sealed in order (the caller holds the chain lock).

        The serving thread checked every field, so sealing cannot fail; if it did, the record
        is dropped and counted rather than the thread dying.
        """
        seal = self.chain.seal
        sealed = []
        for item in items:
            try:
                sealed.append(seal(item))
            except Exception as exc:
                self.last_error = exc
                self.stats.dropped += 1
                log.error("drawledger: record dropped: it cannot be hashed: %s", exc)
        return sealed

    def _write(self, items: list[Item]) -> BaseException | None:
        """Write a batch to the sink or the spill file; the error when neither took it."""
        decisions, draws, outcomes = [], [], []
        for item in items:
            if item[0] == "d":
                decisions.append(item[1])
                draws.append(item[2])
            else:
                outcomes.append(item[1])
        down = time.monotonic() < self._down_until
        attempts = 0 if down else self.retries + 1
        for attempt in range(attempts):
            try:
                if self._sink is None:
                    self._sink = self._open_sink()
                if self.versions:
                    self._write_versions(self._sink)
                self._sink.write(decisions, draws, outcomes)
                self.stats.written += len(items)
                self._down_for = self.cooldown
                return None
            except Exception as exc:  # any sink failure: retry, then spill
                self.last_error = exc
                if attempt < self.retries:
                    self.stats.retried += 1
                    time.sleep(self.retry_delay * (4**attempt))
        if not down:
            self._down_until = time.monotonic() + self._down_for
            self._down_for = min(2 * self._down_for, MAX_COOLDOWN)
            log.warning("drawledger: sink failed (%s); spilling to %s", self.last_error,
                        self.spill.path)  # fmt: skip
        try:
            self.spill_items(items)
            self._spill_versions()
        except Exception as exc:  # disk full, directory gone: keep the thread alive
            self.last_error = exc
            log.error("drawledger: spill to %s failed: %s", self.spill.path, exc)
            return exc
        return None

    def _write_versions(self, sink: Sink) -> None:
        """Store the code versions noted so far (kept for the next batch when this fails)."""
        pending = self.versions[:]
        write = getattr(sink, "write_versions", None)
        if write is not None:
            write(pending)
        del self.versions[: len(pending)]

    def _spill_versions(self) -> None:
        """Spill the code versions noted so far with the records (``drawledger ingest``)."""
        pending = self.versions[:]
        if pending:
            self.spill.write([("v", row) for row in pending])
            del self.versions[: len(pending)]

    def spill_items(self, items: list[Item]) -> None:
        self.spill.write(items)
        self.stats.spilled += len(items)
