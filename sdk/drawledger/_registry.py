"""The ledger's identity and its writer registry, as every sink stores them (docs/ledger.md).

A ledger gets a random id when it is created (table ``ledger_meta``: rows ``ledger_id``,
``legacy`` and ``tag``, the identity signed with the integrity key). Each writer, when it
starts, registers itself (table ``writers``: writer, started, genesis, tag) and starts its
chain from ``genesis``, a keyed hash of the ledger id and the writer id, instead of null. The
integrity check can then tell a writer whose records were all deleted (registered, no records)
and a chain grafted from another ledger (its genesis binds another id).
"""

from __future__ import annotations

import os
from typing import Any

from drawledger import _records

BIND = "bind"
"""``register_writer``'s default genesis: bind the chain to this ledger's id."""


def new_identity(key: bytes, legacy: bool) -> list[tuple[str, str]]:
    """The ``ledger_meta`` rows of a new ledger identity; ``legacy``: records were there before."""
    ledger_id = os.urandom(16).hex()
    flag = "1" if legacy else "0"
    return [("ledger_id", ledger_id), ("legacy", flag),
            ("tag", _records.ledger_tag(ledger_id, flag, key))]  # fmt: skip


def writer_row(
    ledger_id: str, writer: str, started: float, key: bytes, genesis: str | None
) -> tuple[Any, ...]:
    """A ``writers`` row, signed."""
    tag = _records.writer_tag(ledger_id, writer, started, genesis, key)
    return (writer, started, genesis, tag)


def genesis_for(ledger_id: str, writer: str, key: bytes, genesis: str | None) -> str | None:
    """The genesis a writer registers with: ``BIND`` becomes the hash binding it to the ledger."""
    return _records.genesis_hash(ledger_id, writer, key) if genesis == BIND else genesis
