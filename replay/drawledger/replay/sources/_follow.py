"""Following a growing ledger: each writer's records after a covered sequence number.

Every writer numbers its decisions and outcomes in one sequence (the hash chain), and a reader
sees whole batches only (an SQL transaction, a renamed Parquet part file). So "the records of
writer W with seq > s" is a well-defined piece that a follower can take in, remember s, and
never read again nor skip. Writers are keyed by their name in SQL ledgers and by the tag of
their part files in Parquet ledgers.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import sqlalchemy as sa

from drawledger import _parquet
from drawledger._schema import DEC, DRAW, OUT
from drawledger.exceptions import LedgerError
from drawledger.replay.sources._sql import SqlSlice, read_sql_slice
from drawledger.replay.sources._tables import TABLE_COLUMNS, is_parquet, open_engine

Row = tuple[Any, ...]


# The distinct writers of a table by a skip scan of its (writer, seq) index: one index lookup
# per writer (a plain SELECT DISTINCT reads the whole index).
_WRITERS = (
    "WITH RECURSIVE w(x) AS (SELECT MIN(writer) FROM {table} UNION ALL "
    "SELECT (SELECT MIN(writer) FROM {table} WHERE writer > w.x) FROM w WHERE w.x IS NOT NULL) "
    "SELECT x FROM w"
)


_NEWEST_TS = sa.text("SELECT ts FROM decisions WHERE writer = :w ORDER BY seq DESC LIMIT 1")


@dataclass(frozen=True)
class Head:
    """The newest record of one writer: its seq and the ts of its newest decision."""

    seq: int
    ts: float | None


@dataclass(frozen=True)
class WriterPiece:
    """Records of one writer with ``after < seq <= last``: decisions, their draws, outcomes."""

    key: str
    decisions: list[Row]
    draws: list[Row]
    outcomes: list[Row]
    last: int
    # Seq ranges of a stopped writer's last batch that never came (``unfinished_batch``).
    unfinished: tuple[tuple[int, int], ...] = ()


class Follower:
    """Reads the new records of a ledger writer by writer (one open connection pool)."""

    def __init__(
        self, target: str | os.PathLike[str], *, format: str | None = None, key: bytes = b""
    ) -> None:
        self.target = os.fspath(target)
        self.key = key  # the integrity key: a Parquet batch's part names are signed with it
        self.parquet = is_parquet(target, format)
        self.engine: sa.Engine | None = None
        if self.parquet:
            _parquet.check_ledger_dir(self.target)
        else:
            self.engine = open_engine(self.target)

    def close(self) -> None:
        if self.engine is not None:
            self.engine.dispose()

    def heads(self) -> dict[str, Head]:
        """Each writer's newest record."""
        try:
            return self._parquet_heads() if self.parquet else self._sql_heads()
        except sa.exc.SQLAlchemyError as exc:
            raise LedgerError(f"cannot read ledger: {str(exc).splitlines()[0]}") from None

    def read_after(self, key: str, after: int, size: int) -> WriterPiece | None:
        """The next piece of writer ``key`` after seq ``after`` (None when there is none).

        SQL: the records up to the next multiple of ``size`` in seq above the first one present
        (a hole in the chain longer than ``size`` is stepped over, not stuck at); Parquet: whole
        part files in seq order until they hold ``size`` records. Both cuts depend only on
        ``after`` and the ledger, so a follower resumed from a saved seq takes the same pieces as
        one that never stopped.
        """
        try:
            return self._parquet_after(key, after, size) if self.parquet else (
                self._sql_after(key, after, size))  # fmt: skip
        except sa.exc.SQLAlchemyError as exc:
            raise LedgerError(f"cannot read ledger: {str(exc).splitlines()[0]}") from None

    def _sql_heads(self) -> dict[str, Head]:
        """Each writer's newest record by index lookups: the writers found by a skip scan of
        the (writer, seq) index, then each one's largest seq; the cost grows with the number
        of writers, not of records."""
        assert self.engine is not None
        out: dict[str, Head] = {}
        with self.engine.connect() as conn:
            for table in ("decisions", "outcomes"):
                for (writer,) in conn.execute(sa.text(_WRITERS.format(table=table))):
                    if writer is None:
                        continue
                    seq = conn.execute(sa.text(f"SELECT MAX(seq) FROM {table} WHERE writer = :w"),
                                       {"w": writer}).scalar()  # fmt: skip
                    old = out.get(writer)
                    if seq is not None and (old is None or seq > old.seq):
                        out[writer] = Head(int(seq), None)
            for writer, head in out.items():
                ts = conn.execute(_NEWEST_TS, {"w": writer}).scalar()
                out[writer] = Head(head.seq, None if ts is None else float(ts))
        return out

    def _sql_after(self, writer: str, after: int, size: int) -> WriterPiece | None:
        assert self.engine is not None
        with self.engine.connect() as conn:
            firsts = [conn.execute(sa.text(f"SELECT MIN(seq) FROM {table} WHERE writer = :w "
                                           "AND seq > :a"), {"w": writer, "a": after}).scalar()
                      for table in ("decisions", "outcomes")]  # fmt: skip
        present = [int(f) for f in firsts if f is not None]
        if not present:
            return None
        end = min(present) // size * size + size  # exclusive: the next multiple of size
        rows, draws = read_sql_slice(self.engine, SqlSlice(writer, after + 1, end, 0))
        columns = ", ".join(TABLE_COLUMNS["outcomes"])
        with self.engine.connect() as conn:
            outcomes = [tuple(r) for r in conn.execute(
                sa.text(f"SELECT {columns} FROM outcomes WHERE writer = :w AND seq > :lo "
                        "AND seq < :hi ORDER BY seq"),
                {"w": writer, "lo": after, "hi": end},
            )]  # fmt: skip
        if not rows and not outcomes:
            return None
        seq_of = [r[DEC.seq] for r in rows[-1:]] + [o[OUT.seq] for o in outcomes[-1:]]
        draws.sort(key=lambda d: (d[DRAW.decision_id], d[DRAW.idx]))
        return WriterPiece(writer, rows, draws, outcomes, max(seq_of))

    def _tagged(self, table: str) -> list[_parquet.Part]:
        return _parquet.parts(self.target, table)

    def _parquet_heads(self) -> dict[str, Head]:
        out: dict[str, Head] = {}
        newest: dict[str, _parquet.Part] = {}
        for table in ("decisions", "outcomes"):
            for p in self._tagged(table):
                old = out.get(p.tag)
                if old is None or p.last > old.seq:
                    out[p.tag] = Head(p.last, None)
                if table == "decisions" and (p.tag not in newest or p.last > newest[p.tag].last):
                    newest[p.tag] = p
        for tag, part in newest.items():
            column = _parquet.pq.read_table(part.path, columns=["ts"]).column(0).to_pylist()
            out[tag] = Head(out[tag].seq, max(column) if column else None)
        return out

    def _parquet_after(self, tag: str, after: int, size: int) -> WriterPiece | None:
        every = [(p.first, order, p) for order, table in ((0, "decisions"), (1, "outcomes"))
                 for p in self._tagged(table) if p.tag == tag]  # fmt: skip
        found = sorted((t for t in every if t[2].last > after), key=lambda t: (t[0], t[1]))
        rows: list[Row] = []
        draws: list[Row] = []
        outcomes: list[Row] = []
        last = after
        for first, order, part in found:
            if first > last and last - after >= size:
                break  # every part overlapping the records taken is taken with them
            if order == 1:
                outcomes.extend(o for o in _parquet.part_rows(part.path, "outcomes")
                                if o[OUT.seq] > after)  # fmt: skip
            else:
                mine = [r for r in _parquet.part_rows(part.path, "decisions") if r[DEC.seq] > after]
                rows.extend(mine)
                sibling = _parquet.draws_sibling(self.target, part)
                if mine and sibling.exists():
                    ids = {r[DEC.decision_id] for r in mine}
                    draws.extend(d for d in _parquet.part_rows(Path(sibling), "draws")
                                 if d[DRAW.decision_id] in ids)  # fmt: skip
            last = max(last, part.last)
        if not rows and not outcomes:
            return None
        rows.sort(key=lambda r: r[DEC.seq])
        outcomes.sort(key=lambda o: o[OUT.seq])
        draws.sort(key=lambda d: (d[DRAW.decision_id], d[DRAW.idx]))
        unfinished = _parquet.unfinished_batch(self.target, [p for *_, p in every], self.key)
        return WriterPiece(tag, rows, draws, outcomes, last,
                           tuple((p.first, p.last) for p in unfinished))  # fmt: skip
