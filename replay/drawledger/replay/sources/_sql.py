"""SQL ledgers cut into slices: each writer's decisions in seq ranges, read as rows."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import sqlalchemy as sa

from drawledger._records import (
    DECISION_COLUMNS,
    DRAW_COLUMNS,
)
from drawledger.replay.sources._tables import TABLE_COLUMNS, check_columns, reading

Row = tuple[Any, ...]


_DEC = ", ".join(DECISION_COLUMNS)


_DRAW = ", ".join(f"dr.{c}" for c in DRAW_COLUMNS)


@dataclass(frozen=True)
class SqlSlice:
    """The decisions of one writer with ``lo <= seq < hi`` (``hi`` None: to the end)."""

    writer: str
    lo: int
    hi: int | None
    rows: int


_STARTS = sa.text(
    "SELECT writer, seq, rn FROM (SELECT writer, seq, ROW_NUMBER() OVER "
    "(PARTITION BY writer ORDER BY seq) AS rn FROM decisions) AS numbered "
    "WHERE (rn - 1) % :size = 0 ORDER BY writer, rn"
)


def sql_slices(engine: sa.Engine, size: int) -> list[SqlSlice]:
    """Each writer's decisions in seq order, cut every ``size`` records (by seq ranges, so a
    duplicated (writer, seq) never falls between two slices). A decision without a writer or
    an integer seq has no place in a slice: the ledger is refused (``LedgerError``)."""
    check_columns(engine, "decisions", ("writer", "seq"))
    with reading(engine.url), engine.connect() as conn:
        totals: dict[str, int] = dict(
            conn.execute(sa.text("SELECT writer, COUNT(*) FROM decisions GROUP BY writer")).all()
        )
        starts = conn.execute(_STARTS, {"size": size}).all()
    out: list[SqlSlice] = []
    for i, (writer, seq, rn) in enumerate(starts):
        if out and out[-1].writer == writer and out[-1].lo == seq:
            continue  # duplicates of one seq at a cut: they stay together
        nxt = next((s for s in starts[i + 1 :] if s[0] == writer and s[1] != seq), None)
        hi, end = (nxt[1], nxt[2]) if nxt is not None else (None, totals[writer] + 1)
        out.append(SqlSlice(writer, seq, hi, end - rn))
    return out


def read_sql_slice(engine: sa.Engine, sl: SqlSlice,
                   codes: frozenset[str] | None = None) -> tuple[list[Row], list[Row]]:  # fmt: skip
    """Decision rows (in seq order) and draw rows of one slice; with ``codes``, only the
    decisions whose code identity is one of them.

    The draws come in their decisions' seq order, those of one decision in the order the
    database finds them (readers order them by idx): ordering by idx as well would make the
    database sort the rows again, which costs more than the reading itself.
    """
    cond = "writer = :w AND seq >= :lo" + ("" if sl.hi is None else " AND seq < :hi")
    bind: dict[str, Any] = {"w": sl.writer, "lo": sl.lo, "hi": sl.hi}
    if codes is not None:
        cond += " AND code_hash IN :codes"
        bind["codes"] = sorted(codes)
    of_d = cond.replace("writer", "d.writer").replace("seq", "d.seq").replace("code_", "d.code_")

    def query(text: str) -> sa.TextClause:
        statement = sa.text(text)
        return statement if codes is None else statement.bindparams(
            sa.bindparam("codes", expanding=True))  # fmt: skip

    with reading(engine.url), engine.connect() as conn:
        rows = [tuple(r) for r in conn.execute(
            query(f"SELECT {_DEC} FROM decisions WHERE {cond} ORDER BY seq"), bind)]  # fmt: skip
        draws = [tuple(d) for d in conn.execute(
            query(f"SELECT {_DRAW} FROM draws dr JOIN decisions d ON dr.decision_id = "
                  f"d.decision_id WHERE {of_d} ORDER BY d.seq"),
            bind)]  # fmt: skip
    return rows, draws


def group_slices(sizes: Sequence[int], size: int) -> list[tuple[int, int]]:
    """Consecutive (start, stop) index ranges holding at least ``size`` records each."""
    out, start, held = [], 0, 0
    for i, n in enumerate(sizes):
        held += n
        if held >= size:
            out.append((start, i + 1))
            start, held = i + 1, 0
    if start < len(sizes):
        out.append((start, len(sizes)))
    return out


def writer_pages(engine: sa.Engine, table: str, writer: str, size: int) -> Iterator[list[Row]]:
    """Pages of one writer's rows of ``table`` (decisions or outcomes) in seq order, by keyset
    (``WHERE seq > last``), so that the cost of a page does not grow with its position."""
    columns = ", ".join(TABLE_COLUMNS[table])
    seq = TABLE_COLUMNS[table].index("seq")
    last: object = None
    first = True
    while True:
        cond = "" if first else "AND seq > :last"
        with reading(engine.url), engine.connect() as conn:
            rows = [tuple(r) for r in conn.execute(
                sa.text(f"SELECT {columns} FROM {table} WHERE writer = :w {cond} "
                        "ORDER BY seq LIMIT :n"),
                {"w": writer, "last": last, "n": size},
            )]  # fmt: skip
        if not rows:
            return
        yield rows
        if len(rows) < size or rows[-1][seq] is None:  # past a damaged (NULL) seq: stop
            return
        first, last = False, rows[-1][seq]
