"""The chunks of any ledger, in order, as tasks that read themselves in any process."""

from __future__ import annotations

import os
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import pandas as pd
import sqlalchemy as sa

from drawledger._sinks import sqlalchemy_url
from drawledger.exceptions import (
    LedgerError,
)
from drawledger.replay.sources._parquet import (
    Piece,
    partitions,
    piece_ids,
    pieces,
    read_piece,
    read_piece_frames,
)
from drawledger.replay.sources._sql import SqlSlice, group_slices, read_sql_slice, sql_slices
from drawledger.replay.sources._tables import is_parquet, open_engine, rows_frame

Row = tuple[Any, ...]


CHUNK_SIZE = 10_000


PARALLEL_CHUNK_SIZE = 2_000  # smaller chunks spread the work of several processes evenly


@dataclass(frozen=True)
class Task:
    """One chunk of a ledger, read by the process that replays it."""

    target: str
    rows: int
    slices: tuple[SqlSlice, ...] = ()
    piece: Piece | None = None  # a Parquet piece: consecutive part files

    def read(self, engine: sa.Engine | None = None, *,
             codes: frozenset[str] | None = None) -> tuple[list[Row], list[Row]]:  # fmt: skip
        """Its rows; SQL through ``engine``, else through this process's own engine. With
        ``codes``, only the decisions whose code identity is one of them, and their draws."""
        rows: list[Row] = []
        draws: list[Row] = []
        if self.piece is not None:
            rows, draws, total = read_piece(self.piece, codes)
            self._check_count(total)
            return rows, draws
        engine = engine or _engine(self.target)
        for sl in self.slices:
            r, d = read_sql_slice(engine, sl, codes)
            rows.extend(r)
            draws.extend(d)
        return rows, draws

    def _check_count(self, n: int) -> None:
        """Part files are never rewritten: a piece that reads otherwise than its footers said
        is damaged or was replaced during the run, and nothing computed from it is trusted."""
        if self.piece is not None and n != self.rows:
            raise LedgerError(
                f"{self.piece.label()} read {n} decisions, its part files' footers say "
                f"{self.rows}; the ledger changed during the run or a part file is damaged"
            )

    def decision_ids(self) -> set[str] | None:
        """The decision ids of a Parquet piece without reading its rows (None for SQL)."""
        return None if self.piece is None else piece_ids(self.piece)

    def read_frames(self, engine: sa.Engine | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
        """Its decisions and draws as DataFrames (Parquet pieces without a detour via rows)."""
        if self.piece is not None:
            decisions, draws = read_piece_frames(self.piece)
            self._check_count(len(decisions))
            return decisions, draws
        rows, draws = self.read(engine)
        return rows_frame(rows, "decisions"), rows_frame(draws, "draws")


_ENGINES: dict[tuple[int, str], tuple[sa.Engine, object]] = {}


def _engine(target: str) -> sa.Engine:
    """One engine per process and ledger (a forked process opens its own connections).

    An SQLite file replaced at the same path (a new demo, a restored backup) gets a new engine:
    a connection to the old file would go on reading the old data.
    """
    key = (os.getpid(), target)
    identity = _file_identity(target)
    cached = _ENGINES.get(key)
    if cached is None or cached[1] != identity:
        if cached is not None:
            cached[0].dispose()
        _ENGINES[key] = (open_engine(target), identity)
    return _ENGINES[key][0]


def _file_identity(target: str) -> object:
    """(device, inode) of an SQLite ledger file; None for a server's URL."""
    url = sa.make_url(sqlalchemy_url(target))
    if url.get_backend_name() != "sqlite" or not url.database:
        return None
    try:
        stat = os.stat(url.database)
    except OSError:
        return None
    return stat.st_dev, stat.st_ino


def plan(target: str | os.PathLike[str], *, format: str | None = None,
         size: int = CHUNK_SIZE) -> list[Task]:  # fmt: skip
    """The chunks of a ledger, in order, as tasks that read themselves."""
    text = os.fspath(target)
    if is_parquet(target, format):
        return [Task(text, p.rows, piece=p) for p in pieces(partitions(text), size)]
    engine = open_engine(target)
    try:
        slices = sql_slices(engine, size)
    except sa.exc.SQLAlchemyError as exc:
        raise LedgerError(f"cannot read ledger {text!r}: {str(exc).splitlines()[0]}") from None
    finally:
        engine.dispose()
    return [Task(text, sum(sl.rows for sl in slices[a:b]), tuple(slices[a:b]))
            for a, b in group_slices([sl.rows for sl in slices], size)]  # fmt: skip


def iter_chunks(
    target: str | os.PathLike[str], *, format: str | None = None, size: int = CHUNK_SIZE
) -> Iterator[tuple[list[Row], list[Row]]]:
    """Decision rows with their draw rows, chunk by chunk (at least ``size`` decisions each,
    the last aside): SQL ledgers writer by writer in seq order, Parquet ledgers part file by
    part file in path order. The draw rows come in their decisions' order; sort one
    decision's draws by ``idx`` before relying on their order."""
    for task, engine in _tasks(target, format, size):
        yield task.read(engine)


def iter_decision_chunks(
    target: str | os.PathLike[str], chunk_size: int = 50_000, *, format: str | None = None
) -> Iterator[tuple[pd.DataFrame, pd.DataFrame]]:
    """Decisions in chunks of at least ``chunk_size`` rows (the last aside), each with the draws
    of its decisions, as DataFrames: the chunks of ``iter_chunks``.

    Memory stays bounded by the chunk size (a Parquet chunk may exceed it by one part file).
    """
    if chunk_size < 1:
        raise ValueError("chunk_size must be at least 1")
    for task, engine in _tasks(target, format, chunk_size):
        yield task.read_frames(engine)


def _tasks(
    target: str | os.PathLike[str], format: str | None, size: int
) -> Iterator[tuple[Task, sa.Engine | None]]:
    """The tasks of ``plan`` with one engine shared by all of them (SQL ledgers)."""
    tasks = plan(target, format=format, size=size)
    engine = None if is_parquet(target, format) else open_engine(target)
    try:
        for task in tasks:
            yield task, engine
    except sa.exc.SQLAlchemyError as exc:
        raise LedgerError(f"cannot read ledger: {str(exc).splitlines()[0]}") from None
    finally:
        if engine is not None:
            engine.dispose()
