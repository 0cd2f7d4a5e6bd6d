"""Opening a ledger, and reading its three tables into pandas DataFrames whole.

Works on every ledger kind: an SQLite path, a SQLAlchemy URL, or a Parquet directory. Reading
is safe while writers are running (SQL readers see committed transactions; Parquet readers see
only part files that were renamed into place).
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any, NamedTuple

import pandas as pd
import sqlalchemy as sa

from drawledger import _sinks
from drawledger._records import DECISION_COLUMNS, DRAW_COLUMNS, OUTCOME_COLUMNS
from drawledger._schema import SPECS, damaged, row_problem, value_problem
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
        with reading(text):
            inspector = sa.inspect(engine)
            names = set(inspector.get_table_names())
            missing = [t for t in TABLE_COLUMNS if t not in names]
            if missing:
                raise LedgerError(
                    f"{text!r} is not a drawledger ledger: no table {', '.join(missing)}"
                )
            for table, wanted in TABLE_COLUMNS.items():
                have = {c["name"] for c in inspector.get_columns(table)}
                absent = [c for c in wanted if c not in have]
                if absent:
                    raise LedgerError(f"{text!r} is not a drawledger ledger: its table {table} "
                                      f"has no column {', '.join(absent)}")  # fmt: skip
    except BaseException:
        engine.dispose()
        raise
    return engine


def read_error(target: object, exc: BaseException) -> LedgerError:
    """The one-line error of a ledger that cannot be read: a corrupt file, a changed schema."""
    text = str(target)
    if isinstance(target, sa.URL) and target.get_backend_name() == "sqlite" and target.database:
        text = target.database  # the path, as the user gave it
    driver = str(getattr(exc, "orig", None) or exc).strip()
    first = driver.splitlines()[0] if driver else type(exc).__name__
    if any(w in first for w in ("malformed", "not a database", "corrupt")):
        return LedgerError(f"{text!r} is not a drawledger ledger or its database is corrupt: "
                           f"{first}")  # fmt: skip
    return LedgerError(f"cannot read ledger {text!r}: {first}")


@contextmanager
def reading(target: object) -> Iterator[None]:
    """Errors of the database while reading ``target`` as one-line ``LedgerError``s."""
    try:
        yield
    except sa.exc.SQLAlchemyError as exc:
        raise read_error(target, exc) from None


# The storage classes SQLite may hold in a column of each kind (typeof()): flexible typing lets
# a damaged ledger hold text in a number column, which no other database allows.
_STORAGE = {"text": "'text'", "float": "'real', 'integer'", "integer": "'integer'"}
_SPECS = {spec.name: spec for spec in SPECS}


def check_columns(engine: sa.Engine, table: str, columns: Sequence[str]) -> None:
    """Refuse (``LedgerError``) a table that holds a NULL or a value of another type in one of
    ``columns`` where the schema allows none: the readers cannot place or count such a row."""
    spec = {c.name: c for c in _SPECS[table].columns}
    sqlite = engine.dialect.name == "sqlite"
    conds = []
    for name in columns:
        column = spec[name]
        if sqlite:
            allowed = _STORAGE[column.kind] + (", 'null'" if column.nullable else "")
            conds.append(f"typeof({name}) NOT IN ({allowed})")
        elif not column.nullable:
            conds.append(f"{name} IS NULL")
    if not conds:
        return
    query = sa.text(f"SELECT decision_id, {', '.join(columns)} FROM {table} "
                    f"WHERE {' OR '.join(conds)} LIMIT 1")  # fmt: skip
    with reading(engine.url), engine.connect() as conn:
        row = conn.execute(query).first()
    if row is None:
        return
    problem = next(
        p for p in (value_problem(spec[n], v) for n, v in zip(columns, row[1:], strict=True)) if p
    )
    raise damaged(table, row[0], f"{table}.{problem}")


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
        with reading(target):
            return LedgerTables(*(_read_sql(engine, t) for t in TABLE_COLUMNS))
    finally:
        engine.dispose()


def rows_frame(rows: list[tuple[Any, ...]], table: str) -> pd.DataFrame:
    """Rows of ``table`` as a DataFrame with the column types of the Parquet ledger.

    Building both kinds of ledger through the same Arrow schema gives them the same dtypes.
    """
    import pyarrow as pa

    from drawledger._parquet import rows_to_table, to_frame

    try:
        data = rows_to_table(rows, table) if rows else None
    except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError):
        spec = _SPECS[table]
        bad = next((r for r in rows if row_problem(spec, r) is not None), None)
        if bad is None:
            raise
        raise damaged(table, bad[0], str(row_problem(spec, bad))) from None
    return to_frame([data] if data is not None else [], table)
