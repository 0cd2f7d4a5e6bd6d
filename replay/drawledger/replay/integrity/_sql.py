"""The integrity check of an SQL ledger, writer by writer, page by page."""

from __future__ import annotations

import heapq
from collections.abc import Iterator

import sqlalchemy as sa

from drawledger import _records
from drawledger._schema import DEC, DRAW
from drawledger.replay.integrity._report import (
    IntegrityReport,
    Rec,
    Row,
    chain_key,
    decision_rec,
    outcome_rec,
    walk,
)
from drawledger.replay.sources import writer_pages

_DRAW = ", ".join(f"dr.{c}" for c in _records.DRAW_COLUMNS)


def check_sql(engine: sa.Engine, key: bytes, report: IntegrityReport, chunk: int) -> None:
    dup_ids: set[str] = set()
    with engine.connect() as conn:
        for did, n in conn.execute(sa.text(
            "SELECT decision_id, COUNT(*) FROM decisions GROUP BY decision_id HAVING COUNT(*) > 1"
        )):  # fmt: skip
            dup_ids.add(did)
            report.note("duplicates", did, n - 1)
        for did, n in conn.execute(sa.text(
            "SELECT dr.decision_id, COUNT(*) FROM draws dr WHERE NOT EXISTS "
            "(SELECT 1 FROM decisions d WHERE d.decision_id = dr.decision_id) "
            "GROUP BY dr.decision_id"
        )):  # fmt: skip
            report.note("orphan_draws", did, n)
        for did, n in conn.execute(sa.text(
            "SELECT o.decision_id, COUNT(*) FROM outcomes o WHERE NOT EXISTS "
            "(SELECT 1 FROM decisions d WHERE d.decision_id = o.decision_id) "
            "GROUP BY o.decision_id"
        )):  # fmt: skip
            report.note("orphan_outcomes", did, n)
        found = {w for (w,) in conn.execute(sa.text("SELECT DISTINCT writer FROM decisions"))}
        found |= {w for (w,) in conn.execute(sa.text("SELECT DISTINCT writer FROM outcomes"))}
        for table in ("decisions", "outcomes"):  # a damaged writer column: no chain to walk
            for (did,) in conn.execute(sa.text(
                f"SELECT decision_id FROM {table} WHERE writer IS NULL"
            )):  # fmt: skip
                report.note_bad(did, f"{table}.writer is NULL")
            bad = [w for w in found if w is not None and not isinstance(w, str)]
            for w in bad:
                for (did,) in conn.execute(sa.text(
                    f"SELECT decision_id FROM {table} WHERE writer = :w"), {"w": w}
                ):  # fmt: skip
                    report.note_bad(did, f"{table}.writer is {w!r}, not text")
        writers = sorted(w for w in found if isinstance(w, str))
    for writer in writers:
        merged = heapq.merge(
            _sql_decisions(engine, writer, key, dup_ids, chunk),
            _sql_outcomes(engine, writer, key, chunk),
            key=chain_key,
        )
        walk(report, merged, dup_ids)


def _sql_decisions(
    engine: sa.Engine, writer: str, key: bytes, dup_ids: set[str], chunk: int
) -> Iterator[Rec]:
    for rows in writer_pages(engine, "decisions", writer, chunk):
        seqs = [r[DEC.seq] for r in rows if r[DEC.seq].__class__ is int]  # not a damaged seq
        with engine.connect() as conn:
            found = conn.execute(
                sa.text(
                    f"SELECT {_DRAW} FROM draws dr JOIN decisions d "
                    "ON dr.decision_id = d.decision_id "
                    "WHERE d.writer = :w AND d.seq >= :lo AND d.seq <= :hi"
                ),
                {"w": writer, "lo": min(seqs, default=0), "hi": max(seqs, default=-1)},
            )
            by_id: dict[str, list[Row]] = {}
            for d in found:
                by_id.setdefault(d[DRAW.decision_id], []).append(tuple(d))
        for row in rows:
            yield decision_rec(row, by_id.get(row[DEC.decision_id], []), key, dup_ids)


def _sql_outcomes(engine: sa.Engine, writer: str, key: bytes, chunk: int) -> Iterator[Rec]:
    for rows in writer_pages(engine, "outcomes", writer, chunk):
        for row in rows:
            yield outcome_rec(row, key)
