"""The hash chain of one writer (docs/ledger.md): each record gets its seq and prev_hash as it
is sealed, and its hash covers both."""

from __future__ import annotations

import threading
from collections.abc import Callable
from typing import Any

from drawledger import _records

__all__ = ["Chain"]

Item = Any  # a queued record (see drawledger._writer)
_DRAWS = _records.PENDING_DRAWS


class Chain:
    """The hash chain of one writer (docs/ledger.md): records get seq and prev_hash as sealed.

    Only the holder of ``lock`` may seal; the writer thread seals each batch it takes, in queue
    order, and the serving thread seals only a record that bypasses the queue (a tap, a spill).
    """

    __slots__ = ("binder", "genesis", "key", "late", "lock", "prev", "seq", "writer")

    def __init__(
        self, key: bytes, writer: str = "", binder: Callable[[], str | None] | None = None
    ) -> None:
        self.key = key
        self.writer = writer
        self.lock = threading.Lock()
        self.seq = 0
        self.prev: str | None = None
        # The prev_hash of seq 0: null, or the genesis hash that binds the chain to its ledger
        # (docs/ledger.md, "Ledger identity and writer registry"), which ``binder`` registers
        # and returns when the first record is sealed. ``late``: the ledger could not be
        # reached then, and the writer registers with its first batch that is written.
        self.binder = binder
        self.genesis: str | None = None
        self.late = False

    def seal(self, item: Item) -> Item:
        """The record with its seq, prev_hash and hash; a sealed record as it is."""
        tag = item[0]
        sealed: Item
        if self.seq == 0 and tag in ("d-", "o-"):
            if self.binder is not None:
                binder, self.binder = self.binder, None
                self.genesis = binder()
                self.late = self.genesis is None
            self.prev = self.genesis
        if tag == "d-":
            draws = item[_DRAWS:]
            full = _records.seal_decision(item[1:_DRAWS], self.seq, self.prev, draws, self.key)
            digest = full[-1]
            sealed = ("d", full, draws)
        elif tag == "o-":
            row = (*item[1:], self.seq, self.prev)
            digest = _records.outcome_hash(row, self.key)
            sealed = ("o", (*row, digest))
        else:
            return item
        self.seq += 1
        self.prev = digest
        return sealed
