"""Where the writer puts batches: SQL databases through SQLAlchemy, or a Parquet directory.

A sink writes one batch in one transaction: a decision's row and its draws land together or
not at all.
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any, Protocol

import sqlalchemy as sa

from drawledger import _registry, _schema
from drawledger.exceptions import LedgerError

Row = tuple[Any, ...]


DURABILITY = ("normal", "full")


class Sink(Protocol):
    indexed_ids: bool
    """Whether ``stored_ids`` is an index lookup, cheap enough for the writer to ask per batch."""

    def write(self, decisions: list[Row], draws: list[list[Row]], outcomes: list[Row]) -> None:
        """Store one batch; ``draws[i]`` are the draw rows of ``decisions[i]``.

        Raise on failure (the writer then retries or spills). Writing the same batch again
        after a failure must not leave two copies of a record.
        """

    def present_hashes(self, table: str, writer: str, low: int, high: int) -> dict[int, str]:
        """The hash of each record of ``writer`` with a seq from ``low`` to ``high`` in
        ``table``, by seq."""

    def stored_ids(self, ids: list[str]) -> dict[str, str]:
        """Which of these decision ids are already in the ledger (any stream), with the stream
        of the decision that has each."""

    def register_writer(
        self, writer: str, started: float, key: bytes, genesis: str | None = _registry.BIND
    ) -> str | None:
        """Register ``writer`` in the ledger's registry (once); the genesis of its chain."""

    def close(self) -> None: ...


def is_url(target: str) -> bool:
    return "://" in target


def sqlalchemy_url(target: str | os.PathLike[str]) -> str:
    """A SQLAlchemy URL for a ledger target: a URL as given, or a path as an SQLite file."""
    text = os.fspath(target)
    if is_url(text):
        return text
    return f"sqlite:///{Path(text).expanduser()}"


def guess_format(target: str | os.PathLike[str]) -> str | None:
    """``"parquet"`` for an existing directory, else None (a path or URL of a SQL ledger)."""
    text = os.fspath(target)
    return "parquet" if not is_url(text) and Path(text).expanduser().is_dir() else None


def create_engine(url: str, durability: str = "normal") -> sa.Engine:
    """An engine for ``url``.

    SQLite files get WAL, a busy timeout, and synchronous NORMAL (``durability="normal"``) or
    FULL (``"full"``), see docs/operations.md. PostgreSQL gets a 10 s connect timeout unless the
    URL sets one.
    """
    if durability not in DURABILITY:
        raise LedgerError(f"unknown durability {durability!r}; use 'normal' or 'full'")
    try:
        parsed = sa.engine.make_url(url)
        args: dict[str, Any] = {}
        if parsed.get_backend_name() == "postgresql" and "connect_timeout" not in parsed.query:
            args["connect_args"] = {"connect_timeout": 10}
        engine = sa.create_engine(parsed, **args)
    except (sa.exc.ArgumentError, sa.exc.NoSuchModuleError, ImportError, ValueError) as exc:
        raise LedgerError(f"cannot use ledger URL {url!r}: {exc}") from None
    if engine.dialect.name == "sqlite":
        synchronous = durability.upper()

        @sa.event.listens_for(engine, "connect")
        def _pragmas(dbapi_conn: Any, _record: Any) -> None:
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA busy_timeout=60000")
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute(f"PRAGMA synchronous={synchronous}")
            cur.close()

    return engine


def _insert_sql(engine: sa.Engine, table: str, columns: tuple[str, ...]) -> str:
    mark = "?" if engine.dialect.paramstyle == "qmark" else "%s"
    return f"INSERT INTO {table} ({', '.join(columns)}) VALUES ({', '.join([mark] * len(columns))})"


def _ensure_schema(engine: sa.Engine, url: str) -> None:
    """Create the missing tables; tolerate another process creating them at the same time."""
    for attempt in range(5):
        try:
            _schema.metadata.create_all(engine)
            break
        except sa.exc.SQLAlchemyError as exc:
            try:
                names = set(sa.inspect(engine).get_table_names())
            except sa.exc.SQLAlchemyError:
                names = set()
            if {t.name for t in _schema.TABLES} <= names:
                break  # another writer created them first
            if attempt == 4 or not _is_race(exc):
                raise LedgerError(f"cannot open ledger {url!r}: {_first_line(exc)}") from None
            time.sleep(0.05 * (attempt + 1))
    try:
        inspector = sa.inspect(engine)
        columns = {
            t.name: {c["name"] for c in inspector.get_columns(t.name)} for t in _schema.TABLES
        }
    except sa.exc.SQLAlchemyError as exc:
        raise LedgerError(f"cannot open ledger {url!r}: {_first_line(exc)}") from None
    for table in _schema.TABLES:
        have = columns[table.name]
        missing = [c.name for c in table.columns if c.name not in have]
        if missing:
            raise LedgerError(
                f"{url!r} is not a drawledger ledger: its table {table.name} has no column "
                f"{', '.join(missing)}"
            )


def _is_race(exc: Exception) -> bool:
    text = str(exc).lower()
    return "already exists" in text or "locked" in text or "duplicate key" in text


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{exc.__class__.__name__}: {text[0] if text else ''}"


class SqlSink:
    """SQLite (the embedded default) or any SQLAlchemy database, PostgreSQL included.

    One batch is one transaction. PostgreSQL batches go through COPY; other databases through
    the driver's ``executemany``. The unique (writer, seq) indexes refuse a second copy of a
    record.
    """

    indexed_ids = True

    def __init__(self, url: str, *, durability: str = "normal") -> None:
        self.url = url
        self.engine = create_engine(url, durability)
        try:
            _ensure_schema(self.engine, url)
        except BaseException:
            self.engine.dispose()
            raise
        self._copy = self.engine.dialect.name == "postgresql" and \
            self.engine.dialect.driver == "psycopg"  # fmt: skip
        self._sql = {t.name: _insert_sql(self.engine, t.name, t.names) for t in _schema.SPECS}
        spec = _schema.CODE_VERSIONS
        self._versions_sql = _insert_sql(self.engine, spec.name, spec.names)

    def write(self, decisions: list[Row], draws: list[list[Row]], outcomes: list[Row]) -> None:
        flat = [d for rows in draws for d in rows]
        with self.engine.begin() as conn:
            for table, rows in (("decisions", decisions), ("draws", flat), ("outcomes", outcomes)):
                if not rows:
                    continue
                if self._copy:
                    self._copy_rows(conn, table, rows)
                else:
                    conn.exec_driver_sql(self._sql[table], rows)

    def write_versions(self, rows: list[Row]) -> None:
        """Store code version rows (docs/deploys.md) in one transaction."""
        if rows:
            with self.engine.begin() as conn:
                conn.exec_driver_sql(self._versions_sql, rows)

    @staticmethod
    def _copy_rows(conn: sa.Connection, table: str, rows: list[Row]) -> None:
        columns = ", ".join(_COLUMNS[table])
        cursor = conn.connection.driver_connection.cursor()  # type: ignore[union-attr]
        try:
            with cursor.copy(f"COPY {table} ({columns}) FROM STDIN") as copy:
                for row in rows:
                    copy.write_row(row)
        finally:
            cursor.close()

    def present_hashes(self, table: str, writer: str, low: int, high: int) -> dict[int, str]:
        """The hash of each record of ``writer`` with a seq from ``low`` to ``high``, by seq."""
        sql = sa.text(
            f"SELECT seq, hash FROM {table} WHERE writer = :w AND seq BETWEEN :lo AND :hi"
        )
        with self.engine.connect() as conn:
            return {seq: h for seq, h in conn.execute(sql, {"w": writer, "lo": low, "hi": high})}

    def stored_ids(self, ids: list[str]) -> dict[str, str]:
        """Which of these decision ids are already in the ledger, with their decision's stream.

        One indexed lookup per 500 ids (the decision_id index).
        """
        found: dict[str, str] = {}
        sql = sa.text(
            "SELECT decision_id, stream FROM decisions WHERE decision_id IN :ids"
        ).bindparams(sa.bindparam("ids", expanding=True))
        with self.engine.connect() as conn:
            for start in range(0, len(ids), 500):
                rows = conn.execute(sql, {"ids": ids[start : start + 500]})
                found.update((d, s) for d, s in rows)
        return found

    def register_writer(
        self, writer: str, started: float, key: bytes, genesis: str | None = _registry.BIND
    ) -> str | None:
        """Register ``writer`` (once) and return the genesis its chain starts from."""
        ledger_id = self._identity(key)
        genesis = _registry.genesis_for(ledger_id, writer, key, genesis)
        row = _registry.writer_row(ledger_id, writer, started, key, genesis)
        try:
            with self.engine.begin() as conn:
                conn.execute(
                    sa.insert(_schema.writers).values(
                        dict(zip(_schema.WRITERS.names, row, strict=True))
                    )
                )
        except sa.exc.IntegrityError:
            pass  # registered before (an ingest after a spill, a second call)
        return genesis

    def _identity(self, key: bytes) -> str:
        """The ledger's id, created with its signed identity if the ledger has none yet."""
        read = sa.text("SELECT value FROM ledger_meta WHERE name = 'ledger_id'")
        with self.engine.connect() as conn:
            found = conn.execute(read).scalar()
            legacy = found is None and any(
                conn.execute(sa.text(f"SELECT 1 FROM {t} LIMIT 1")).first() is not None
                for t in ("decisions", "outcomes")
            )
        if found is not None:
            return str(found)
        rows = _registry.new_identity(key, legacy)
        try:
            with self.engine.begin() as conn:
                conn.execute(sa.insert(_schema.ledger_meta),
                             [{"name": n, "value": v} for n, v in rows])  # fmt: skip
            return rows[0][1]
        except sa.exc.IntegrityError:  # another writer created it first
            with self.engine.connect() as conn:
                return str(conn.execute(read).scalar_one())

    def release(self) -> None:
        """Close the idle connections (before a fork); the next write opens a new one."""
        self.engine.dispose()

    def close(self) -> None:
        self.engine.dispose()


_COLUMNS = {t.name: t.names for t in _schema.SPECS}


def open_sink(
    target: str | os.PathLike[str], format: str | None = None, *, durability: str = "normal",
    key: bytes = b"",
) -> Sink:  # fmt: skip
    """The sink for a ledger target: a path (SQLite), a SQLAlchemy URL, or a Parquet directory.
    ``key`` is the integrity key (a Parquet sink signs the part names of each batch with it)."""
    if format in (None, "sql", "sqlite"):
        return SqlSink(sqlalchemy_url(target), durability=durability)
    if format == "parquet":
        from drawledger._parquet import ParquetSink

        return ParquetSink(os.fspath(target), durability=durability, key=key)
    raise LedgerError(f"unknown ledger format {format!r}; use 'parquet' or leave it out")


def default_spill_dir(target: str, format: str | None) -> Path:
    """Where a ledger spills by default: beside an SQLite file, ``<dir>.spill`` for Parquet."""
    if format == "parquet":
        return Path(target + ".spill")
    if is_url(target):
        if target.startswith("sqlite:///") and len(target) > 10:
            return Path(target[10:]).parent
        return Path("drawledger-spill")
    return Path(target).expanduser().parent
