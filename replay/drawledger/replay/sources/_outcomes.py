"""Reading outcomes: the totals of every name per decision, or one name's values part by part."""

from __future__ import annotations

import os
from collections.abc import Iterator
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa

from drawledger.exceptions import LedgerError
from drawledger.replay.sources._tables import is_parquet, open_engine

OutcomePart = tuple[list[Any], np.ndarray]  # decision ids, values


def outcome_totals(target: str | os.PathLike[str], *, format: str | None = None) -> pd.DataFrame:
    """One row per (decision_id, name) with the sum of its values (column ``value``)."""
    if is_parquet(target, format):
        from drawledger._parquet import read_table

        raw = read_table(os.fspath(target), "outcomes")[["decision_id", "name", "value"]]
        return raw.groupby(["decision_id", "name"], sort=False)["value"].sum().reset_index()
    engine = open_engine(target)
    try:
        with engine.connect() as conn:
            return pd.read_sql_query(
                sa.text(
                    "SELECT decision_id, name, SUM(value) AS value FROM outcomes "
                    "GROUP BY decision_id, name"
                ),
                conn,
            )
    finally:
        engine.dispose()


def outcome_values(
    target: str | os.PathLike[str], format: str | None, name: str
) -> tuple[int, Iterator[OutcomePart]]:
    """How many outcome records there are at most (an upper bound, from counts or Parquet
    footers) and the decision ids and values of the outcomes named ``name``, part by part:
    memory holds one part at a time."""
    if is_parquet(target, format):
        import pyarrow.parquet as pq

        from drawledger import _parquet

        files = [os.fspath(p.path) for p in _parquet.parts(os.fspath(target), "outcomes")]
        capacity = sum(pq.read_metadata(f).num_rows for f in files)
        return capacity, (_parquet_part(f, name) for f in files)
    engine = open_engine(target)
    with engine.connect() as conn:
        capacity = conn.execute(
            sa.text("SELECT COUNT(*) FROM outcomes WHERE name = :n"), {"n": name}
        ).scalar_one()
    return int(capacity), _sql_parts(engine, name)


def _parquet_part(path: str, name: str) -> OutcomePart:
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    from drawledger import _parquet

    columns = ["decision_id", "name", "value"]
    try:
        table = pq.read_table(path, columns=columns, schema=_parquet.SCHEMAS["outcomes"])
    except (OSError, pa.ArrowException) as exc:
        raise LedgerError(f"cannot read ledger part {path!r}: {exc}") from None
    table = table.filter(pc.equal(table.column("name"), name))
    values = table.column("value").to_numpy(zero_copy_only=False).astype(np.float64)
    return table.column("decision_id").to_pylist(), values


def _sql_parts(engine: sa.Engine, name: str) -> Iterator[OutcomePart]:
    try:
        with engine.connect() as conn:
            result = conn.execution_options(yield_per=100_000).execute(
                sa.text("SELECT decision_id, value FROM outcomes WHERE name = :n"), {"n": name}
            )
            for rows in result.partitions():
                yield [r[0] for r in rows], np.array([r[1] for r in rows], dtype=float)
    finally:
        engine.dispose()


def sql_streams(target: str | os.PathLike[str]) -> list[str]:
    """The decision streams of an SQL ledger, sorted."""
    engine = open_engine(target)
    try:
        with engine.connect() as conn:
            found = conn.execute(sa.text("SELECT DISTINCT stream FROM decisions")).scalars()
            return sorted(str(s) for s in found if s is not None)
    finally:
        engine.dispose()


def stream_outcome_names(target: str | os.PathLike[str], format: str | None,
                         stream: str) -> list[str]:  # fmt: skip
    """The outcome names recorded for decisions of ``stream``, sorted."""
    if is_parquet(target, format):
        import pyarrow.parquet as pq

        from drawledger import _parquet
        from drawledger.replay.sources._parquet import stream_partitions

        ids: set[str] = set()
        for partition in stream_partitions(target).get(stream, []):
            for path in partition.parts:
                ids.update(pq.read_table(path, columns=["decision_id"]).column(0).to_pylist())
        names: set[str] = set()
        for part in _parquet.parts(os.fspath(target), "outcomes"):
            table = pq.read_table(os.fspath(part.path), columns=["decision_id", "name"])
            for did, name in zip(*(c.to_pylist() for c in table.columns), strict=True):
                if did in ids:
                    names.add(str(name))
        return sorted(names)
    engine = open_engine(target)
    try:
        with engine.connect() as conn:
            found = conn.execute(
                sa.text(
                    "SELECT DISTINCT o.name FROM outcomes o JOIN decisions d "
                    "ON d.decision_id = o.decision_id WHERE d.stream = :s"
                ),
                {"s": stream},
            ).scalars()
            return sorted(str(n) for n in found if n is not None)
    finally:
        engine.dispose()
