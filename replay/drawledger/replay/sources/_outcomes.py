"""Reading outcomes: the totals of every name per decision, or one name's values part by part."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
import pandas as pd
import sqlalchemy as sa

from drawledger._schema import damaged
from drawledger.replay.sources._tables import check_columns, is_parquet, open_engine, reading

OutcomePart = tuple[list[Any], np.ndarray]  # decision ids, values


def outcome_totals(target: str | os.PathLike[str], *, format: str | None = None) -> pd.DataFrame:
    """One row per (decision_id, name) with the sum of its values (column ``value``)."""
    if is_parquet(target, format):
        from drawledger._parquet import read_table

        raw = read_table(os.fspath(target), "outcomes")[["decision_id", "name", "value"]]
        if raw["value"].isna().any():  # NaN is never recorded: a NULL of a damaged part
            _refuse(raw["decision_id"][raw["value"].isna()].iloc[0], None)
        return raw.groupby(["decision_id", "name"], sort=False)["value"].sum().reset_index()
    engine = open_engine(target)
    try:
        check_columns(engine, "outcomes", ("value",))
        with reading(target), engine.connect() as conn:
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
        from drawledger import _parquet

        files = [os.fspath(p.path) for p in _parquet.parts(os.fspath(target), "outcomes")]
        capacity = sum(_parquet.open_part(Path(f), "outcomes").metadata.num_rows for f in files)
        return capacity, (_parquet_part(f, name) for f in files)
    engine = open_engine(target)
    with reading(target), engine.connect() as conn:
        capacity = conn.execute(
            sa.text("SELECT COUNT(*) FROM outcomes WHERE name = :n"), {"n": name}
        ).scalar_one()
    return int(capacity), _sql_parts(engine, name)


def _parquet_part(path: str, name: str) -> OutcomePart:
    import pyarrow.compute as pc

    from drawledger import _parquet

    table = _parquet.read_columns(Path(path), "outcomes", ["decision_id", "name", "value"])
    table = table.filter(pc.equal(table.column("name"), name))
    values = table.column("value").to_numpy(zero_copy_only=False).astype(np.float64)
    if np.isnan(values).any():  # NaN is never recorded: a NULL of a damaged part
        at = int(np.flatnonzero(np.isnan(values))[0])
        _refuse(table.column("decision_id")[at].as_py(), None)
    return table.column("decision_id").to_pylist(), values


def _sql_parts(engine: sa.Engine, name: str) -> Iterator[OutcomePart]:
    try:
        with reading(engine.url), engine.connect() as conn:
            result = conn.execution_options(yield_per=100_000).execute(
                sa.text("SELECT decision_id, value FROM outcomes WHERE name = :n"), {"n": name}
            )
            for rows in result.partitions():
                yield [r[0] for r in rows], _values(rows)
    finally:
        engine.dispose()


def _values(rows: Any) -> np.ndarray:
    """The outcome values of some rows as floats; a damaged value is refused with its record."""
    try:
        values = np.array([r[1] for r in rows], dtype=float)
    except (TypeError, ValueError):
        values = None
    if values is None or np.isnan(values).any():  # NaN is never recorded: a NULL
        bad = next(r for r in rows if r[1].__class__ not in (float, int) or r[1] != r[1])
        _refuse(bad[0], bad[1])
    return values


def _refuse(decision_id: Any, value: Any) -> NoReturn:
    raise damaged("outcomes", decision_id, f"outcomes.value is {value!r}, not a number")


def sql_streams(target: str | os.PathLike[str]) -> list[str]:
    """The decision streams of an SQL ledger, sorted."""
    engine = open_engine(target)
    try:
        with reading(target), engine.connect() as conn:
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
