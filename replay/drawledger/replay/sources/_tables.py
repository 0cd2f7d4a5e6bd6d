"""Reading a ledger's tables into pandas DataFrames, whole or in chunks of decisions.

Works on every ledger kind: an SQLite path, a SQLAlchemy URL, or a Parquet directory. Reading
is safe while writers are running (SQL readers see committed transactions; Parquet readers see
only part files that were renamed into place).
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import NamedTuple

import pandas as pd
import pyarrow as pa
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


def _frame(conn: sa.Connection, sql: sa.TextClause, table: str, **params: object) -> pd.DataFrame:
    """Rows of a query as a DataFrame with the column types of the Parquet ledger.

    Building both kinds of ledger through the same Arrow schema gives them the same dtypes.
    """
    from drawledger._parquet import rows_to_table, to_frame

    rows = [tuple(r) for r in conn.execute(sql, params)]
    return to_frame([rows_to_table(rows, table)] if rows else [], table)


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


def iter_decision_chunks(
    target: str | os.PathLike[str], chunk_size: int = 50_000, *, format: str | None = None
) -> Iterator[tuple[pd.DataFrame, pd.DataFrame]]:
    """Decisions in chunks of about ``chunk_size`` rows, each with the draws of its decisions.

    Memory stays bounded by the chunk size. SQL ledgers are paged by keyset on the (writer, seq)
    index (each page starts after the last (writer, seq) of the one before, so the cost of a
    page does not grow with its position); chunks come in (writer, seq) order. Parquet ledgers
    are read part file by part file (a chunk may exceed ``chunk_size`` by at most one part).
    """
    if chunk_size < 1:
        raise ValueError("chunk_size must be at least 1")
    if is_parquet(target, format):
        yield from _parquet_chunks(os.fspath(target), chunk_size)
    else:
        yield from _sql_chunks(target, chunk_size)


def _sql_chunks(
    target: str | os.PathLike[str], chunk_size: int
) -> Iterator[tuple[pd.DataFrame, pd.DataFrame]]:
    engine = open_engine(target)
    cols = ", ".join(DECISION_COLUMNS)
    draw_cols = ", ".join(f"dr.{c}" for c in DRAW_COLUMNS)
    first = sa.text(f"SELECT {cols} FROM decisions ORDER BY writer, seq LIMIT :n")
    after = sa.text(
        f"SELECT {cols} FROM decisions WHERE (writer, seq) > (:w, :s) ORDER BY writer, seq LIMIT :n"
    )
    draws_sql = sa.text(
        f"SELECT {draw_cols} FROM draws dr JOIN decisions d ON dr.decision_id = d.decision_id "
        "WHERE (d.writer, d.seq) >= (:w0, :s0) AND (d.writer, d.seq) <= (:w1, :s1) "
        "ORDER BY dr.decision_id, dr.idx"
    )
    try:
        last: tuple[str, int] | None = None
        while True:
            with engine.connect() as conn:
                if last is None:
                    decisions = _frame(conn, first, "decisions", n=chunk_size)
                else:
                    decisions = _frame(conn, after, "decisions", w=last[0], s=last[1], n=chunk_size)
                if decisions.empty:
                    return
                lo, hi = decisions.iloc[0], decisions.iloc[-1]
                draws = _frame(conn, draws_sql, "draws", w0=lo["writer"], s0=int(lo["seq"]),
                               w1=hi["writer"], s1=int(hi["seq"]))  # fmt: skip
            yield decisions, draws
            if len(decisions) < chunk_size:
                return
            last = (str(hi["writer"]), int(hi["seq"]))
    finally:
        engine.dispose()


def _parquet_chunks(root: str, chunk_size: int) -> Iterator[tuple[pd.DataFrame, pd.DataFrame]]:
    from drawledger import _parquet

    _parquet.check_ledger_dir(root)
    decisions: list[pa.Table] = []
    draws: list[pa.Table] = []
    rows = 0
    for part, sibling in _parquet.iter_part_pairs(root):
        decisions.append(_parquet.read_part(part.path, "decisions"))
        if sibling is not None:
            draws.append(_parquet.read_part(sibling, "draws"))
        rows += decisions[-1].num_rows
        if rows >= chunk_size:
            yield _frames(decisions, draws)
            decisions, draws, rows = [], [], 0
    if decisions:
        yield _frames(decisions, draws)


def _frames(decisions: list[pa.Table], draws: list[pa.Table]) -> tuple[pd.DataFrame, pd.DataFrame]:
    from drawledger._parquet import to_frame

    return to_frame(decisions, "decisions"), to_frame(draws, "draws")
