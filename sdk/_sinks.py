"""Where the writer puts batches: SQL databases through SQLAlchemy, or a Parquet directory.

A sink writes one batch in one transaction: a decision's row and its draws land together or
not at all.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Protocol

import sqlalchemy as sa

from drawledger import _schema
from drawledger._records import DECISION_COLUMNS, DRAW_COLUMNS, OUTCOME_COLUMNS
from drawledger.exceptions import LedgerError

Row = tuple[Any, ...]


class Sink(Protocol):
    def write(self, decisions: list[Row], draws: list[Row], outcomes: list[Row]) -> None:
        """Store one batch atomically; raise on failure (the writer then retries or spills)."""

    def close(self) -> None: ...


def is_url(target: str) -> bool:
    return "://" in target


def sqlalchemy_url(target: str | os.PathLike[str]) -> str:
    """A SQLAlchemy URL for a ledger target: a URL as given, or a path as an SQLite file."""
    text = os.fspath(target)
    if is_url(text):
        return text
    return f"sqlite:///{Path(text).expanduser()}"


def create_engine(url: str) -> sa.Engine:
    """An engine for ``url``; SQLite files get WAL, synchronous NORMAL and a busy timeout."""
    try:
        engine = sa.create_engine(url)
    except (sa.exc.ArgumentError, sa.exc.NoSuchModuleError, ImportError) as exc:
        raise LedgerError(f"cannot use ledger URL {url!r}: {exc}") from None
    if engine.dialect.name == "sqlite":

        @sa.event.listens_for(engine, "connect")
        def _pragmas(dbapi_conn: Any, _record: Any) -> None:
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute("PRAGMA busy_timeout=60000")
            cur.close()

    return engine


def _insert_sql(engine: sa.Engine, table: str, columns: tuple[str, ...]) -> str:
    mark = "?" if engine.dialect.paramstyle == "qmark" else "%s"
    return f"INSERT INTO {table} ({', '.join(columns)}) VALUES ({', '.join([mark] * len(columns))})"


class SqlSink:
    """SQLite (the embedded default) or any SQLAlchemy database, PostgreSQL included."""

    def __init__(self, url: str) -> None:
        self.url = url
        self.engine = create_engine(url)
        try:
            _schema.metadata.create_all(self.engine)
        except sa.exc.SQLAlchemyError as exc:
            self.engine.dispose()
            raise LedgerError(f"cannot open ledger {url!r}: {exc.__class__.__name__}: {exc}") from None
        self._sql = {
            "decisions": _insert_sql(self.engine, "decisions", DECISION_COLUMNS),
            "draws": _insert_sql(self.engine, "draws", DRAW_COLUMNS),
            "outcomes": _insert_sql(self.engine, "outcomes", OUTCOME_COLUMNS),
        }

    def write(self, decisions: list[Row], draws: list[Row], outcomes: list[Row]) -> None:
        with self.engine.begin() as conn:
            if decisions:
                conn.exec_driver_sql(self._sql["decisions"], decisions)
            if draws:
                conn.exec_driver_sql(self._sql["draws"], draws)
            if outcomes:
                conn.exec_driver_sql(self._sql["outcomes"], outcomes)

    def after_fork(self) -> None:
        """Forget connections inherited from the parent process (they belong to it)."""
        self.engine.dispose(close=False)

    def close(self) -> None:
        self.engine.dispose()


def open_sink(target: str | os.PathLike[str], format: str | None = None) -> Sink:
    """The sink for a ledger target: a path (SQLite), a SQLAlchemy URL, or a Parquet directory."""
    if format in (None, "sql", "sqlite"):
        return SqlSink(sqlalchemy_url(target))
    if format == "parquet":
        from drawledger._parquet import ParquetSink

        return ParquetSink(os.fspath(target))
    raise LedgerError(f"unknown ledger format {format!r}; use 'parquet' or leave it out")
