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
- spill failure too (disk full, directory not writable): what a failed write put in the file is
  cut off again, so the file holds whole lines only and ``spilled`` counts exactly those; the
  batch goes back to the front of the queue and is tried again after the cool-down; every
  waiting ``flush()`` raises ``LedgerError`` naming the error; the thread never dies of it.
  Only a record that finds both the queue full and the spill file failing is dropped, and
  counted (``dropped``). Failures are counted (``spill_errors``) and logged at most once a
  minute per kind.
- a decision whose id the sink already holds (recorded by another process, or too long ago for
  the ledger's memory of recent ids): on a sink that can look ids up by index (SQL), the batch
  is checked before it is sealed, and such a decision is left out of the chain and appended to
  the reject file (``rejected``, logged); the rest of the batch is written as usual.
- fork: ``before_fork`` waits for the write in progress and closes the sink's connections, so
  that a child inherits no database connection or library state in the middle of a call.
"""

from __future__ import annotations

import logging
import threading
import time
from collections import deque
from collections.abc import Callable
from typing import Any

import orjson

from drawledger._chain import Chain
from drawledger._records import PENDING_DRAWS
from drawledger._schema import DEC
from drawledger._sinks import Sink
from drawledger._spill import SpillFile
from drawledger.exceptions import LedgerError

log = logging.getLogger("drawledger")

# A queued record, or a flush marker. A record is queued unsealed, a flat tuple (drawledger.
# _records, PENDING_DRAWS): ("d-", *decision_row, *draw_rows) or ("o-", *outcome_row), each row
# without the last three columns (seq, prev_hash, hash). Sealed, with complete rows, it is
# ("d", decision_row, draw_rows) or ("o", outcome_row): what sinks, spill files and taps see.
Item = Any
SEALED = frozenset({"d", "o"})

MAX_COOLDOWN = 60.0
LOG_EVERY = 60.0  # seconds between two log lines of one kind (common practice for alerts)
FORK_WAIT = 10.0  # how long a fork waits for the write in progress


class Throttle:
    """Log each kind of message at most once per ``every`` seconds, saying how many were held."""

    def __init__(self, every: float = LOG_EVERY) -> None:
        self.every = every
        self._last: dict[str, float] = {}
        self._held: dict[str, int] = {}
        self._lock = threading.Lock()

    def log(self, level: int, kind: str, message: str) -> None:
        now = time.monotonic()
        with self._lock:
            last = self._last.get(kind)
            if last is not None and now - last < self.every:
                self._held[kind] = self._held.get(kind, 0) + 1
                return
            self._last[kind] = now
            held = self._held.pop(kind, 0)
        if held:
            message += f" ({held} more like this since the last such message)"
        log.log(level, "drawledger: %s", message)


class Stats:
    """Counters of one ledger in one process (see ``Ledger.stats``)."""

    __slots__ = (
        "dropped",
        "recorded",
        "rejected",
        "retried",
        "spill_errors",
        "spilled",
        "waited",
        "written",
    )

    def __init__(self) -> None:
        self.recorded = 0
        self.written = 0
        self.spilled = 0
        self.rejected = 0
        self.retried = 0
        self.dropped = 0
        self.spill_errors = 0
        self.waited = 0  # calls that waited for room in a full queue (up to block_timeout)

    def as_dict(self) -> dict[str, int]:
        return {name: getattr(self, name) for name in self.__slots__}


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
        on_start: Callable[[], None] | None = None,
        rejects: SpillFile | None = None,
    ) -> None:
        self._open_sink = open_sink
        self._on_start = on_start
        self.refusal: str | None = None  # why this process must not write (see forget_after_fork)
        self._sink: Sink | None = None
        self.spill = spill
        self.rejects = rejects or SpillFile(spill.path.with_name("drawledger-rejected.jsonl"))
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
        self._retry_now = False  # a flush or wake() ends the pause after a failure
        self.io_lock = threading.Lock()  # held while the sink is opened or written
        self._fork_holders: set[int] = set()  # threads forking that hold io_lock
        self.throttle = Throttle()
        self.last_error: BaseException | None = None

    def start(self) -> None:
        """Start the writer thread unless it runs already."""
        with self._start_lock:
            if self.running:
                return
            if self.refusal is not None:
                raise LedgerError(self.refusal)
            if self._on_start is not None:
                self._on_start()
            self._thread = threading.Thread(target=self._main, name="drawledger-writer",
                                            daemon=True)  # fmt: skip
            self._live = True
            self._thread.start()

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def wake(self) -> None:
        """Try the queued records again now, even during a cool-down."""
        self._retry_now = True
        self._wake.set()

    def put(self, item: Item) -> None:
        """Queue one record; when the queue stays full, spill it (the policy above)."""
        q = self.queue
        if not self._live:
            self.start()
        if len(q) >= self.queue_size:
            self._wake.set()
            if not self._overflowing and self.block_timeout > 0:
                self.stats.waited += 1
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
                    why = f"record dropped: queue full and spill failed: {exc}"
                    self.throttle.log(logging.ERROR, "dropped", why)
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
        self.wake()
        if not marker.done.wait(timeout):
            return False
        if marker.error is not None:
            raise LedgerError(
                f"records could neither be written nor spilled to {str(self.spill.path)!r} "
                f"(they stay queued and are retried): {marker.error}"
            )
        return True

    def stop(self, timeout: float | None) -> None:
        """Stop the thread (it drains the queue first); spill what a stuck thread left queued."""
        self._stop = True
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout)
        if self.running:
            self.rescue()
        elif self._sink is not None:
            self._sink.close()
            self._sink = None

    def rescue(self) -> None:
        """Spill every record still queued, from the calling thread (the writer is stuck)."""
        with self.chain.lock:
            self._seal_queued()
            taken = list(self.queue)
            self.queue.clear()
        items = [x for x in taken if not isinstance(x, _Flush)]
        error: BaseException | None = None
        if items:
            try:
                self.spill_items(items)
            except Exception as exc:
                error = exc
                self.stats.dropped += len(items)
                log.error("drawledger: %d records dropped: the writer is stuck and the spill "
                          "failed: %s", len(items), exc)  # fmt: skip
            else:
                log.error("drawledger: the writer is stuck in the sink; %d queued records "
                          "spilled to %s", len(items), self.spill.path)  # fmt: skip
        for marker in taken:
            if isinstance(marker, _Flush):
                marker.error = error
                marker.done.set()

    # -- fork ---------------------------------------------------------------------------------
    def before_fork(self) -> None:
        """In the parent, just before a fork: let the write in progress end, close connections.

        The child then inherits no database connection and no library state in the middle of
        a call (SQLite's locks and file state are per process; a connection must not cross a
        fork). The parent's next batch opens a new connection.
        """
        if not self.io_lock.acquire(timeout=FORK_WAIT):
            return
        self._fork_holders.add(threading.get_ident())
        release = getattr(self._sink, "release", None)  # a Parquet sink holds no connection
        if release is not None:
            try:
                release()
            except Exception as exc:  # the next batch opens a connection anyway
                self.last_error = exc

    def after_fork_in_parent(self) -> None:
        me = threading.get_ident()
        if me in self._fork_holders:
            self._fork_holders.discard(me)
            self.io_lock.release()

    def forget_after_fork(self) -> bool:
        """In a forked child: drop the parent's queue and thread; False if its sink was busy.

        Nothing inherited is closed or used here: a sink still open (the parent's write went on
        past ``FORK_WAIT``) stays referenced for the life of the child, never touched.
        """
        self.queue = deque()
        self._wake = threading.Event()
        self._start_lock = threading.Lock()
        self._thread = None
        self._live = False
        if self._sink is not None:
            ABANDONED.append(self._sink)
        return threading.get_ident() in self._fork_holders

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
            self._retry_now = False  # a flush or wake() from now on retries after a failure
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
                        # A flush waits for records behind these: it cannot succeed now.
                        waiting = [m for m in q if isinstance(m, _Flush)]
                        for m in waiting:
                            q.remove(m)
                    markers += waiting
            for m in markers:
                m.error = error
                m.done.set()
            if error is not None and not self._stop:
                self._pause(min(self._down_for, MAX_COOLDOWN))

    def _pause(self, seconds: float) -> None:
        """Wait after a failure: until the time is up, a flush or wake() asks, or close."""
        deadline = time.monotonic() + seconds
        while not (self._stop or self._retry_now):
            left = deadline - time.monotonic()
            if left <= 0:
                return
            self._wake.wait(left)
            self._wake.clear()

    def _seal_batch(self, items: list[Item]) -> list[Item]:
        """The batch sealed in order (the caller holds the chain lock).

        Decisions whose id the sink already holds are left out first (``_screen``). The serving
        thread checked every field, so sealing cannot fail; if it did, the record is dropped and
        counted rather than the thread dying.
        """
        items = self._screen(items)
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

    def _screen(self, items: list[Item]) -> list[Item]:
        """The batch without the unsealed decisions whose given id the sink already holds.

        Only on a sink that looks ids up by index (``indexed_ids``), and only for ids given by
        the caller (generated ids, ``<writer>.<n>``, are unique by construction). When the sink
        cannot be asked (down, cooling off), the batch goes on as it is: ingest and the
        integrity check catch a reuse later. A refused decision is never sealed, so its
        writer's chain has no gap; it goes to the reject file.
        """
        given: list[str] = []
        at_id, at_writer = 1 + DEC.decision_id, 1 + DEC.writer  # the row follows the tag
        writer, prefix = None, ""  # "<writer>.", built once per writer rather than per record
        for item in items:
            if item[0] == "d-":
                if item[at_writer] is not writer:
                    writer = item[at_writer]
                    prefix = writer + "."
                did = item[at_id]
                if not did.startswith(prefix):
                    given.append(did)
        if not given or time.monotonic() < self._down_until:
            return items
        try:
            with self.io_lock:  # a fork waits for it: SQLite must not fork mid-call
                if self._sink is None:
                    self._sink = self._open_sink()
                if not self._sink.indexed_ids:
                    return items
                taken = set(self._sink.stored_ids(given))
        except Exception as exc:  # the write that follows retries, spills and reports
            self.last_error = exc
            return items
        kept: list[Item] = []
        refused: list[Item] = []
        for item in items:
            if item[0] == "d-":
                did = item[at_id]
                if did in taken:
                    refused.append(item)
                    continue
                taken.add(did)  # a second use in this batch is refused too
            kept.append(item)
        if refused:
            self._reject(refused)
        return kept

    def _reject(self, items: list[Item]) -> None:
        reason = "decision id already in the ledger"
        lines = []
        for item in items:
            row, draws = item[1:PENDING_DRAWS], item[PENDING_DRAWS:]
            lines.append(orjson.dumps({"rejected": reason, "decision": list(row), "draws": draws}))
        ids = ", ".join(repr(item[1 + DEC.decision_id]) for item in items[:5])
        try:
            self.rejects.append(b"".join(line + b"\n" for line in lines))
        except Exception as exc:
            self.last_error = exc
            self.stats.dropped += len(items)
            log.error("drawledger: %d decisions dropped: their id is already in the ledger "
                      "(%s) and the reject file failed: %s", len(items), ids, exc)  # fmt: skip
            return
        self.stats.rejected += len(items)
        log.error("drawledger: %d decisions not written: their id is already in the ledger "
                  "(%s); kept in %s", len(items), ids, self.rejects.path)  # fmt: skip

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
                with self.io_lock:
                    if self._sink is None:
                        self._sink = self._open_sink()
                    if self.versions:
                        self._write_versions(self._sink)
                    self._sink.write(decisions, draws, outcomes)
                    if self.chain.late:  # unregistered: the ledger was out of reach at the start
                        self.chain.late = not self._register_late()
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
            why = f"sink failed ({self.last_error}); spilling to {self.spill.path}"
            self.throttle.log(logging.WARNING, "sink", why)
        try:
            self.spill_items(items)
            self._spill_versions()
        except Exception as exc:  # disk full, directory gone: keep the thread alive
            self.last_error = exc
            self.throttle.log(logging.ERROR, "spill", f"spill to {self.spill.path} failed: {exc} "
                              "(the records stay queued and are tried again)")  # fmt: skip
            return exc
        return None

    def _register_late(self) -> bool:
        """Register a writer whose chain started unbound; whether that worked."""
        assert self._sink is not None
        try:
            self._sink.register_writer(self.chain.writer, time.time(), self.chain.key, None)
        except Exception as exc:  # tried again after the next batch
            log.warning("drawledger: writer registration failed: %s", exc)
            return False
        return True

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
        """Append records to the spill file and count them; count a failure and raise it."""
        try:
            self.spill.write(items)
        except Exception:
            self.stats.spill_errors += 1
            raise
        self.stats.spilled += len(items)


# Sinks a forked child inherited in the middle of a write: kept, never closed (see above).
ABANDONED: list[Sink] = []
