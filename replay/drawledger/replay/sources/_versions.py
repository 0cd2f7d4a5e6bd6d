"""The code versions of a ledger: the stored source of each version, and where its decisions are.

``code_versions`` rows (docs/deploys.md) are read as they are; ledgers written before the table
existed simply have none. ``decision_versions`` counts the decisions of each (stream, function,
identity) with their first and last timestamps.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from typing import Any, NamedTuple

import sqlalchemy as sa

from drawledger._schema import CODE_VERSIONS
from drawledger.exceptions import LedgerError
from drawledger.replay.sources._tables import is_parquet, open_engine

Row = tuple[Any, ...]

VERSION_COLUMNS = CODE_VERSIONS.names


class VersionUse(NamedTuple):
    """The decisions of one code version in one stream."""

    stream: str
    fn: str
    identity: str
    first_ts: float
    last_ts: float
    decisions: int


def _parquet_rows(root: str, table: str, columns: list[str]) -> Iterator[Row]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    from drawledger import _parquet

    for part in _parquet.parts(root, table):
        try:
            data = pq.read_table(part.path, columns=columns, schema=_parquet.SCHEMAS[table])
        except (OSError, pa.ArrowException) as exc:
            raise _parquet.unreadable(part.path, exc) from None
        yield from zip(*(c.to_pylist() for c in data.columns), strict=True)


def read_code_versions(target: str | os.PathLike[str], *, format: str | None = None) -> list[Row]:
    """Every stored code version row (in ``VERSION_COLUMNS`` order); none for older ledgers."""
    if is_parquet(target, format):
        from drawledger import _parquet

        _parquet.check_ledger_dir(target)
        rows = list(_parquet_rows(os.fspath(target), CODE_VERSIONS.name, list(VERSION_COLUMNS)))
    else:
        engine = open_engine(target)
        try:
            if CODE_VERSIONS.name not in set(sa.inspect(engine).get_table_names()):
                return []
            cols = ", ".join(VERSION_COLUMNS)
            with engine.connect() as conn:
                rows = [
                    tuple(r) for r in conn.execute(sa.text(f"SELECT {cols} FROM code_versions"))
                ]
        except sa.exc.SQLAlchemyError as exc:
            raise LedgerError(f"cannot read code versions: {str(exc).splitlines()[0]}") from None
        finally:
            engine.dispose()
    return sorted(rows, key=lambda r: (r[5], str(r[0])))


def decision_versions(target: str | os.PathLike[str], *,
                      format: str | None = None) -> list[VersionUse]:  # fmt: skip
    """Decisions by (stream, function, identity), with their first and last timestamps."""
    found: dict[tuple[str, str, str], list[Any]] = {}
    if is_parquet(target, format):
        from drawledger import _parquet

        _parquet.check_ledger_dir(target)
        source = _parquet_rows(os.fspath(target), "decisions", ["stream", "fn", "code_hash", "ts"])
        for stream, fn, identity, ts in source:
            if fn is None:
                continue
            key = (str(stream), str(fn), str(identity))
            mine = found.get(key)
            if mine is None:
                found[key] = [ts, ts, 1]
            else:
                mine[0], mine[1], mine[2] = min(mine[0], ts), max(mine[1], ts), mine[2] + 1
    else:
        engine = open_engine(target)
        sql = sa.text(
            "SELECT stream, fn, code_hash, MIN(ts), MAX(ts), COUNT(*) FROM decisions "
            "WHERE fn IS NOT NULL GROUP BY stream, fn, code_hash"
        )
        try:
            with engine.connect() as conn:
                for stream, fn, identity, lo, hi, n in conn.execute(sql):
                    found[(str(stream), str(fn), str(identity))] = [lo, hi, n]
        except sa.exc.SQLAlchemyError as exc:
            raise LedgerError(f"cannot read decisions: {str(exc).splitlines()[0]}") from None
        finally:
            engine.dispose()
    uses = [VersionUse(*key, float(v[0]), float(v[1]), int(v[2])) for key, v in found.items()]
    return sorted(uses, key=lambda u: (u.stream, u.fn, u.first_ts))
