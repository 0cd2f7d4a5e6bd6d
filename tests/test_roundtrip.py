"""Every sink stores the same records bit for bit: SQLite, Parquet and PostgreSQL round trips."""

from __future__ import annotations

import sqlite3
import struct
import tempfile
import uuid
from pathlib import Path
from typing import Any

import pandas as pd
import sqlalchemy as sa
from hypothesis import HealthCheck, given, settings
from strategies import record_specs

from drawledger import _parquet, _records, _sinks
from drawledger.replay.integrity import check_integrity
from drawledger.replay.sources import read_tables

Row = tuple[Any, ...]
Batch = tuple[list[Row], list[list[Row]], list[Row]]


def _batch(specs: list[tuple[Any, ...]], writer: str) -> Batch:
    """Rows of one writer's chain, as the SDK builds them (-0.0 recorded as 0.0)."""
    decisions: list[Row] = []
    draws: list[list[Row]] = []
    outcomes: list[Row] = []
    prev: str | None = None
    for seq, spec in enumerate(specs):
        if spec[0] == "d":
            _, stream, unit, ts, fn, inputs, action, prop, kind, seed, dspecs = spec
            did = f"{writer}.{seq}"
            row = (did, stream, unit, ts + 0.0, fn, None if fn is None else "c0de", inputs, "{}",
                   action, prop + 0.0, kind, seed, writer, seq, prev)  # fmt: skip
            its = [(did, i, name, k, args, u, value, prob + 0.0, int(dens))
                   for i, (name, k, args, u, value, prob, dens) in enumerate(dspecs)]  # fmt: skip
            prev = _records.decision_hash(row, its)
            decisions.append((*row, prev))
            draws.append(its)
        else:
            _, name, value, ts = spec
            did = decisions[-1][0] if decisions else "decided-elsewhere"
            orow = (did, name, value + 0.0, ts + 0.0, writer, seq, prev)
            prev = _records.outcome_hash(orow)
            outcomes.append((*orow, prev))
    return decisions, draws, outcomes


def _bits(rows: list[Row]) -> list[tuple[Any, ...]]:
    """Rows with every float replaced by its IEEE bits, so that comparisons are bit for bit."""
    return sorted(
        tuple(struct.pack(">d", v).hex() if isinstance(v, float) else v for v in row)
        for row in rows
    )


def _expected(batch: Batch) -> tuple[list[Row], list[Row], list[Row]]:
    decisions, draws, outcomes = batch
    return decisions, [d for its in draws for d in its], outcomes


def _sqlite_rows(path: Path) -> tuple[list[Row], list[Row], list[Row]]:
    with sqlite3.connect(path) as conn:
        return tuple(  # type: ignore[return-value]
            conn.execute(f"SELECT {', '.join(cols)} FROM {table}").fetchall()
            for table, cols in (("decisions", _records.DECISION_COLUMNS),
                                ("draws", _records.DRAW_COLUMNS),
                                ("outcomes", _records.OUTCOME_COLUMNS))
        )  # fmt: skip


def _parquet_rows(root: Path) -> tuple[list[Row], list[Row], list[Row]]:
    return tuple(  # type: ignore[return-value]
        [
            row
            for part in _parquet.parts(root, table)
            for row in _parquet.part_rows(part.path, table)
        ]
        for table in ("decisions", "draws", "outcomes")
    )


def _write_in_two_batches(sink: _sinks.Sink, batch: Batch) -> None:
    decisions, draws, outcomes = batch
    half = len(decisions) // 2
    sink.write(decisions[:half], draws[:half], [])
    sink.write(decisions[half:], draws[half:], outcomes)


@settings(max_examples=25, deadline=None)
@given(specs=record_specs)
def test_sqlite_and_parquet_store_the_same_records_bit_for_bit(specs: list[Any]) -> None:
    batch = _batch(specs, "writer-a")
    expected = [_bits(rows) for rows in _expected(batch)]
    with tempfile.TemporaryDirectory() as tmp:
        db, root = Path(tmp) / "x.db", Path(tmp) / "ledger"
        for sink in (_sinks.SqlSink(_sinks.sqlalchemy_url(db)), _parquet.ParquetSink(str(root))):
            _write_in_two_batches(sink, batch)
            sink.close()
        assert expected == [_bits(rows) for rows in _sqlite_rows(db)]
        assert expected == [_bits(rows) for rows in _parquet_rows(root)]
        for from_sql, from_parquet in zip(read_tables(db), read_tables(root), strict=True):
            pd.testing.assert_frame_equal(from_sql, from_parquet, check_exact=True)
        assert check_integrity(db).to_dict() == check_integrity(root).to_dict()
        assert check_integrity(db).ok


@settings(
    max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(specs=record_specs)
def test_postgresql_stores_the_same_records_bit_for_bit(
    postgres_url: str, specs: list[Any]
) -> None:
    writer = f"pg-{uuid.uuid4().hex[:8]}"
    batch = _batch(specs, writer)
    sink = _sinks.SqlSink(postgres_url)
    _write_in_two_batches(sink, batch)
    got = []
    with sink.engine.connect() as conn:
        for table, cols in (("decisions", _records.DECISION_COLUMNS),
                            ("draws", _records.DRAW_COLUMNS),
                            ("outcomes", _records.OUTCOME_COLUMNS)):  # fmt: skip
            where = "writer = :w" if table != "draws" else "decision_id LIKE :p"
            sql = sa.text(f"SELECT {', '.join(cols)} FROM {table} WHERE {where}")
            got.append([tuple(r) for r in conn.execute(sql, {"w": writer, "p": f"{writer}.%"})])
    sink.close()
    assert [_bits(rows) for rows in _expected(batch)] == [_bits(rows) for rows in got]
