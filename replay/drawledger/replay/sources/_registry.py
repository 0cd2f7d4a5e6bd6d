"""Reading a ledger's identity and writer registry (docs/ledger.md)."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Any

import sqlalchemy as sa

from drawledger.replay.sources._tables import is_parquet, open_engine, reading


@dataclass(frozen=True)
class Registry:
    """``identity``: the ``ledger_meta`` rows by name, None in a ledger from before the
    registry; ``writers``: the ``writers`` rows (writer, started, genesis, tag)."""

    identity: dict[str, Any] | None
    writers: list[tuple[Any, ...]] = field(default_factory=list)


_WRITERS = sa.text("SELECT writer, started, genesis, tag FROM writers ORDER BY writer")


def read_registry(target: str | os.PathLike[str], *, format: str | None = None) -> Registry:
    """The registry of any ledger kind (empty for a ledger from before the registry)."""
    if is_parquet(target, format):
        from drawledger import _parquet

        identity, rows = _parquet.read_registry(os.fspath(target))
        return Registry(identity, rows)
    engine = open_engine(target)
    try:
        with reading(target):
            names = set(sa.inspect(engine).get_table_names())
            if not {"ledger_meta", "writers"} <= names:
                return Registry(None)
            with engine.connect() as conn:
                meta: dict[str, Any] = dict(
                    conn.execute(sa.text("SELECT name, value FROM ledger_meta")).all()
                )
                rows = [tuple(r) for r in conn.execute(_WRITERS)]
    finally:
        engine.dispose()
    return Registry(meta or None, rows)
