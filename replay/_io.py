"""Reading a ledger into pandas DataFrames, whole or in chunks of decisions."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import NamedTuple

import pandas as pd
import sqlalchemy as sa

from drawledger import _sinks
from drawledger._records import DECISION_COLUMNS, DRAW_COLUMNS, OUTCOME_COLUMNS
from drawledger.exceptions import LedgerError

TABLE_COLUMNS = {
    "decisions": DECISION_COLUMNS,
    "draws": DRAW_COLUMNS,
    "outcomes": OUTCOME_COLUMNS,
}


class LedgerTables(NamedTuple):
    """The three tables of a ledger."""

    decisions: pd.DataFrame
    draws: pd.DataFrame
    outcomes: pd.DataFrame


def is_parquet(target: str | os.PathLike[str], format: str | None = None) -> bool:
    if format is not None:
        return format == "parquet"
    path = Path(os.fspath(target))
    return not _sinks.is_url(os.fspath(target)) and path.is_dir()


def open_engine(target: str | os.PathLike[str]) -> sa.Engine:
    """An engine on an existing SQL ledger with its three tables (never creates one)."""
    text = os.fspath(target)
    if not _sinks.is_url(text) and not Path(text).expanduser().is_file():
        raise LedgerError(f"no ledger at {text!r} (no such file)")
    engine = _sinks.create_engine(_sinks.sqlalchemy_url(text))
    try:
        names = set(sa.inspect(engine).get_table_names())
    except sa.exc.SQLAlchemyError as exc:
        engine.dispose()
        raise LedgerError(f"cannot read ledger {text!r}: {str(exc).splitlines()[0]}") from None
    missing = [t for t in TABLE_COLUMNS if t not in names]
    if missing:
        engine.dispose()
        raise LedgerError(f"{text!r} is not a drawledger ledger: no table {', '.join(missing)}")
    return engine


def _read_sql(engine: sa.Engine, table: str, where: str = "") -> pd.DataFrame:
    cols = ", ".join(TABLE_COLUMNS[table])
    with engine.connect() as conn:
        return pd.read_sql_query(sa.text(f"SELECT {cols} FROM {table} {where}"), conn)


def read_tables(target: str | os.PathLike[str], *, format: str | None = None) -> LedgerTables:
    """The three tables of a ledger (SQLite path, SQLAlchemy URL or Parquet directory)."""
    if is_parquet(target, format):
        from drawledger._parquet import read_table

        return LedgerTables(*(read_table(os.fspath(target), t) for t in TABLE_COLUMNS))
    engine = open_engine(target)
    try:
        return LedgerTables(*(_read_sql(engine, t) for t in TABLE_COLUMNS))
    finally:
        engine.dispose()


def iter_decision_chunks(
    target: str | os.PathLike[str], chunk_size: int = 50_000, *, format: str | None = None
) -> Iterator[tuple[pd.DataFrame, pd.DataFrame]]:
    """Decisions in chunks of ``chunk_size`` rows, each with the draws of its decisions."""
    if is_parquet(target, format):
        tables = read_tables(target, format="parquet")
        for start in range(0, len(tables.decisions), chunk_size):
            chunk = tables.decisions.iloc[start : start + chunk_size]
            yield chunk, tables.draws[tables.draws["decision_id"].isin(chunk["decision_id"])]
        return
    engine = open_engine(target)
    try:
        cols = ", ".join(DECISION_COLUMNS)
        draw_cols = ", ".join(f"dr.{c}" for c in DRAW_COLUMNS)
        with engine.connect() as conn:
            bounds = conn.exec_driver_sql("SELECT COUNT(*) FROM decisions").scalar_one()
        for offset in range(0, int(bounds), chunk_size):
            page = f"ORDER BY writer, seq LIMIT {chunk_size} OFFSET {offset}"
            with engine.connect() as conn:
                decisions = pd.read_sql_query(
                    sa.text(f"SELECT {cols} FROM decisions {page}"), conn
                )
                draws = pd.read_sql_query(
                    sa.text(
                        f"SELECT {draw_cols} FROM draws dr JOIN "
                        f"(SELECT decision_id FROM decisions {page}) d "
                        "ON dr.decision_id = d.decision_id ORDER BY dr.decision_id, dr.idx"
                    ),
                    conn,
                )
            yield decisions, draws
    finally:
        engine.dispose()
