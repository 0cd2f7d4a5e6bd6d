"""Opening a ledger, and reading its three tables into pandas DataFrames whole.

Works on every ledger kind: an SQLite path, a SQLAlchemy URL, or a Parquet directory. Reading
is safe while writers are running (SQL readers see committed transactions; Parquet readers see
only part files that were renamed into place).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, NamedTuple

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


_ORDER = {"decisions": "writer, seq", "draws": "decision_id, idx", "outcomes": "writer, seq"}


class LedgerTables(NamedTuple):
    """The three tables of a ledger."""

    decisions: pd.DataFrame
    draws: pd.DataFrame
    outcomes: pd.DataFrame


def is_parquet(target: str | os.PathLike[str], format: str | None = None) -> bool:
    """Whether ``target`` is read as a Parquet ledger (``format``, else an existing directory)."""
    if format is not None:
        return format == "parquet"
    return _sinks.guess_format(target) == "parquet"


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


def _frame(conn: sa.Connection, sql: sa.TextClause, table: str) -> pd.DataFrame:
    """Rows of a query as a DataFrame with the column types of the Parquet ledger.

    Building both kinds of ledger through the same Arrow schema gives them the same dtypes.
    """
    return rows_frame([tuple(r) for r in conn.execute(sql)], table)


def _read_sql(engine: sa.Engine, table: str) -> pd.DataFrame:
    cols = ", ".join(TABLE_COLUMNS[table])
    with engine.connect() as conn:
        return _frame(conn, sa.text(f"SELECT {cols} FROM {table} ORDER BY {_ORDER[table]}"), table)


def read_tables(target: str | os.PathLike[str], *, format: str | None = None) -> LedgerTables:
    """The three tables of a ledger (SQLite path, SQLAlchemy URL or Parquet directory).

    Decisions and outcomes come sorted by (writer, seq), draws by (decision_id, idx).
    """
    if is_parquet(target, format):
        from drawledger import _parquet

        return LedgerTables(*_parquet.read_tables(os.fspath(target)))
    engine = open_engine(target)
    try:
        return LedgerTables(*(_read_sql(engine, t) for t in TABLE_COLUMNS))
    finally:
        engine.dispose()


def rows_frame(rows: list[tuple[Any, ...]], table: str) -> pd.DataFrame:
    """Rows of ``table`` as a DataFrame with the column types of the Parquet ledger.

    Building both kinds of ledger through the same Arrow schema gives them the same dtypes.
    """
    from drawledger._parquet import rows_to_table, to_frame

    return to_frame([rows_to_table(rows, table)] if rows else [], table)
