"""check_integrity: every ledger kind."""

from __future__ import annotations

import os
from pathlib import Path

from drawledger.replay.integrity._parquet import check_parquet
from drawledger.replay.integrity._registry import check_registry
from drawledger.replay.integrity._report import IntegrityReport
from drawledger.replay.integrity._sql import check_sql
from drawledger.replay.sources import is_parquet, open_engine, read_registry, reading


def check_integrity(
    target: str | os.PathLike[str],
    *,
    format: str | None = None,
    integrity_key: bytes | str | None = None,
    chunk_size: int = 20_000,
) -> IntegrityReport:
    """Check a ledger's hashes, chains, duplicates and orphans (see the module docstring).

    ``target`` is a SQLite path, a SQLAlchemy URL or a Parquet directory, as for ``Ledger``;
    ``integrity_key`` is the key the ledger was written with (keyed mode), if any.
    """
    key = integrity_key.encode() if isinstance(integrity_key, str) else (integrity_key or b"")
    report = IntegrityReport(keyed=bool(key))
    if is_parquet(target, format):
        check_parquet(Path(os.fspath(target)), key, report)
    else:
        engine = open_engine(target)
        try:
            with reading(target):  # a corrupt page met on the way: one line, not a traceback
                check_sql(engine, key, report, chunk_size)
        finally:
            engine.dispose()
    check_registry(report, read_registry(target, format=format), key)
    return report.finish()
