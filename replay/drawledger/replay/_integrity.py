"""Integrity check of a ledger: hashes, per-writer chains, duplicates and orphans.

Every decision (with its draws) and every outcome carries ``writer``, ``seq``, ``prev_hash`` and
``hash`` (docs/ledger.md). The check

- re-hashes every record (``bad_hashes``: a record or one of its draws was edited, or the
  integrity key is wrong);
- walks each writer's chain in ``seq`` order, decisions and outcomes together: ``seq`` must run
  0, 1, 2, ... (``gaps`` counts missing sequence numbers) and each ``prev_hash`` must equal the
  hash of the record before it (``broken_links``, not counted across a gap: a gap already
  explains the break);
- counts ``duplicates``: a second record with the same writer and seq, or a second decision with
  the same decision id (its draws cannot be told apart, so its hash is not checked);
- counts ``orphan_draws`` (draw rows without their decision) and ``orphan_outcomes`` (outcome
  rows for a decision id that is not in this ledger). In a Parquet ledger a draws part without
  its decisions part, past the end of its writer's chain, is the remains of a batch whose writer
  was killed between the renames of the batch: counted as ``uncommitted_parts``, not a failure
  (readers ignore it).

Orphan outcomes do not make the ledger fail: outcomes are recorded by id, often by another
service or process than the decision, and may legitimately arrive before the decision's own
records (still in a spill file waiting for ``drawledger ingest``) or refer to decisions kept in
another ledger. They never change a recorded propensity; estimators ignore them. Everything else
makes ``ok`` false.

Memory stays bounded on large ledgers: SQL ledgers are read one writer at a time in pages of
``chunk_size`` records (keyset pagination on the (writer, seq) index) and the set-wise checks run
in the database; Parquet ledgers are read part by part, in seq order per writer, and keep only 8
bytes per decision (a fingerprint of its id) for the duplicate and orphan checks.
"""

from __future__ import annotations

import hashlib
import heapq
import os
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import sqlalchemy as sa

from drawledger import _parquet, _records
from drawledger.replay._io import is_parquet, open_engine

__all__ = ["IntegrityReport", "check_integrity"]

PROBLEMS = (
    "gaps",
    "broken_links",
    "duplicates",
    "bad_hashes",
    "orphan_draws",
    "orphan_outcomes",
)
MAX_EXAMPLES = 5
Row = tuple[Any, ...]


@dataclass
class IntegrityReport:
    """What ``check_integrity`` found. ``to_dict()`` is the ``integrity`` object of verify."""

    ok: bool = True
    gaps: int = 0
    broken_links: int = 0
    duplicates: int = 0
    bad_hashes: int = 0
    orphan_draws: int = 0
    orphan_outcomes: int = 0
    decisions: int = 0
    outcomes: int = 0
    writers: int = 0
    keyed: bool = False
    uncommitted_parts: int = 0
    examples: dict[str, list[str]] = field(default_factory=dict)
    decision_ids: set[str] = field(default_factory=set)

    def note(self, problem: str, decision_id: str | None, count: int = 1) -> None:
        """Count ``count`` occurrences of a problem involving ``decision_id``."""
        setattr(self, problem, getattr(self, problem) + count)
        if decision_id is None:
            return
        self.decision_ids.add(decision_id)
        shown = self.examples.setdefault(problem, [])
        if len(shown) < MAX_EXAMPLES and decision_id not in shown:
            shown.append(decision_id)

    def finish(self) -> IntegrityReport:
        # Orphan outcomes are reported but do not fail the check (module docstring).
        self.ok = not any(getattr(self, p) for p in PROBLEMS if p != "orphan_outcomes")
        return self

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"ok": self.ok}
        out.update({p: getattr(self, p) for p in PROBLEMS})
        out.update(decisions=self.decisions, outcomes=self.outcomes, writers=self.writers,
                   keyed=self.keyed, uncommitted_parts=self.uncommitted_parts)  # fmt: skip
        out["examples"] = {k: list(v) for k, v in self.examples.items()}
        return out

    def render(self) -> str:
        """Plain-text summary for the terminal."""
        head = "integrity ok" if self.ok else "integrity FAILED"
        lines = [
            f"{head}: {self.decisions} decisions, {self.outcomes} outcomes, "
            f"{self.writers} writers ({'keyed' if self.keyed else 'unkeyed'} hashes)"
        ]
        for p in PROBLEMS:
            n = getattr(self, p)
            if n:
                shown = ", ".join(self.examples.get(p, []))
                note = " (not a failure: see docs/ledger.md)" if p == "orphan_outcomes" else ""
                lines.append(f"  {p.replace('_', ' ')}: {n}{note}; e.g. {shown}")
        if self.uncommitted_parts:
            lines.append(f"  {self.uncommitted_parts} draws parts of batches interrupted "
                         "between their renames (ignored by readers; safe to delete)")  # fmt: skip
        if self.bad_hashes and self.bad_hashes == self.decisions + self.outcomes:
            lines.append("  every hash differs: was the ledger written with another integrity key?")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.render()


class _Rec(NamedTuple):
    seq: int
    order: int  # 0 decision, 1 outcome (ties on seq are duplicates either way)
    writer: str
    decision_id: str
    prev_hash: str | None
    hash: str
    hash_ok: bool


def check_integrity(
    target: str | os.PathLike[str],
    *,
    format: str | None = None,
    integrity_key: bytes | str | None = None,
    chunk_size: int = 20_000,
) -> IntegrityReport:
    """Check a ledger's hashes, chains, duplicates and orphans (see the module docstring).

    ``target`` is a SQLite path, a SQLAlchemy URL or a Parquet directory, as for ``Ledger``;
    ``integrity_key`` is the key the ledger was written with (keyed mode), if any.
    """
    key = integrity_key.encode() if isinstance(integrity_key, str) else (integrity_key or b"")
    report = IntegrityReport(keyed=bool(key))
    if is_parquet(target, format):
        _check_parquet(Path(os.fspath(target)), key, report)
    else:
        engine = open_engine(target)
        try:
            _check_sql(engine, key, report, chunk_size)
        finally:
            engine.dispose()
    return report.finish()


def _walk(report: IntegrityReport, records: Iterable[_Rec], dup_ids: set[str]) -> None:
    """Check records of writer chains, given in (seq, order) order within each writer."""
    state: dict[str, tuple[int, str | None]] = {}  # writer -> (next expected seq, last hash)
    for rec in records:
        if rec.order == 0:
            report.decisions += 1
        else:
            report.outcomes += 1
        if not rec.hash_ok:
            report.note("bad_hashes", rec.decision_id)
        expected, last_hash = state.get(rec.writer, (0, None))
        if rec.seq < expected:
            if not (rec.order == 0 and rec.decision_id in dup_ids):  # not counted twice
                report.note("duplicates", rec.decision_id)
            continue
        if rec.seq > expected:
            report.note("gaps", rec.decision_id, rec.seq - expected)
        elif rec.prev_hash != last_hash:
            report.note("broken_links", rec.decision_id)
        state[rec.writer] = (rec.seq + 1, rec.hash)
    report.writers += len(state)


def _decision_rec(row: Row, draws: list[Row], key: bytes, dup_ids: set[str]) -> _Rec:
    did = row[0]
    if did in dup_ids:
        ok = True  # counted as a duplicate; its draws cannot be attributed
    else:
        draws.sort(key=lambda d: d[1])
        ok = _records.decision_hash(row, draws, key) == row[15]
    return _Rec(row[13], 0, row[12], did, row[14], row[15], ok)


def _outcome_rec(row: Row, key: bytes) -> _Rec:
    ok = _records.outcome_hash(row, key) == row[7]
    return _Rec(row[5], 1, row[4], row[0], row[6], row[7], ok)


# -- SQL ledgers -------------------------------------------------------------------------------
_DEC = ", ".join(_records.DECISION_COLUMNS)
_OUT = ", ".join(_records.OUTCOME_COLUMNS)
_DRAW = ", ".join(f"dr.{c}" for c in _records.DRAW_COLUMNS)


def _check_sql(engine: sa.Engine, key: bytes, report: IntegrityReport, chunk: int) -> None:
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
        writers = sorted(
            {w for (w,) in conn.execute(sa.text("SELECT DISTINCT writer FROM decisions"))}
            | {w for (w,) in conn.execute(sa.text("SELECT DISTINCT writer FROM outcomes"))}
        )
    for writer in writers:
        merged = heapq.merge(
            _sql_decisions(engine, writer, key, dup_ids, chunk),
            _sql_outcomes(engine, writer, key, chunk),
            key=lambda r: (r.seq, r.order),
        )
        _walk(report, merged, dup_ids)


def _sql_pages(engine: sa.Engine, sql: str, writer: str, chunk: int) -> Iterator[list[Row]]:
    """Pages of a writer's rows in seq order (keyset pagination: WHERE seq > last)."""
    last: int | None = None
    while True:
        cond = "" if last is None else "AND seq > :last"
        with engine.connect() as conn:
            rows = [tuple(r) for r in conn.execute(
                sa.text(f"{sql} WHERE writer = :w {cond} ORDER BY seq LIMIT :n"),
                {"w": writer, "last": last, "n": chunk},
            )]  # fmt: skip
        if not rows:
            return
        yield rows
        if len(rows) < chunk:
            return
        last = rows[-1][-3]  # seq is third from the end in both decisions and outcomes rows


def _sql_decisions(
    engine: sa.Engine, writer: str, key: bytes, dup_ids: set[str], chunk: int
) -> Iterator[_Rec]:
    for rows in _sql_pages(engine, f"SELECT {_DEC} FROM decisions", writer, chunk):
        with engine.connect() as conn:
            found = conn.execute(
                sa.text(
                    f"SELECT {_DRAW} FROM draws dr JOIN decisions d "
                    "ON dr.decision_id = d.decision_id "
                    "WHERE d.writer = :w AND d.seq >= :lo AND d.seq <= :hi"
                ),
                {"w": writer, "lo": rows[0][13], "hi": rows[-1][13]},
            )
            by_id: dict[str, list[Row]] = {}
            for d in found:
                by_id.setdefault(d[0], []).append(tuple(d))
        for row in rows:
            yield _decision_rec(row, by_id.get(row[0], []), key, dup_ids)


def _sql_outcomes(engine: sa.Engine, writer: str, key: bytes, chunk: int) -> Iterator[_Rec]:
    for rows in _sql_pages(engine, f"SELECT {_OUT} FROM outcomes", writer, chunk):
        for row in rows:
            yield _outcome_rec(row, key)


# -- Parquet ledgers ---------------------------------------------------------------------------
def _fingerprints(ids: Iterable[str | None]) -> np.ndarray:
    return np.fromiter(
        (int.from_bytes(hashlib.blake2b((i or "").encode(), digest_size=8).digest(), "little")
         for i in ids),
        dtype=np.uint64,
    )  # fmt: skip


def _id_column(path: Path, table: str) -> list[str]:
    data = _parquet.pq.read_table(path, columns=["decision_id"])
    ids: list[str] = data.column(0).to_pylist()
    return ids


def parquet_cross_checks(root: Path, report: IntegrityReport) -> set[str]:
    """The ledger-wide checks of a Parquet ledger, before the chain walks: duplicate decision
    ids, orphan outcomes and draws, interrupted batches. Returns the duplicate ids."""
    dec_parts = _parquet.parts(root, "decisions")
    out_parts = _parquet.parts(root, "outcomes")

    # Duplicate decision ids: sort 64-bit fingerprints, then confirm candidates exactly.
    fps = np.sort(np.concatenate([_fingerprints(_id_column(p.path, "decisions"))
                                  for p in dec_parts] or [np.zeros(0, np.uint64)]))  # fmt: skip
    twice = fps[1:][fps[1:] == fps[:-1]]
    dup_ids: set[str] = set()
    if twice.size:
        counts: dict[str, int] = {}
        candidates = set(twice.tolist())
        for p in dec_parts:
            ids = _id_column(p.path, "decisions")
            for did, fp in zip(ids, _fingerprints(ids).tolist(), strict=True):
                if fp in candidates:
                    counts[did] = counts.get(did, 0) + 1
        for did, n in sorted(counts.items()):
            if n > 1:
                dup_ids.add(did)
                report.note("duplicates", did, n - 1)

    # Orphan outcomes: outcome ids whose fingerprint is not among the decisions'.
    for p in out_parts:
        ids = _id_column(p.path, "outcomes")
        fp = _fingerprints(ids)
        pos = np.minimum(np.searchsorted(fps, fp), max(len(fps) - 1, 0))
        missing = np.ones(len(ids), bool) if not len(fps) else fps[pos] != fp
        for i in np.flatnonzero(missing).tolist():
            report.note("orphan_outcomes", ids[i])

    # Draws parts without their decisions part: past the end of their writer's chain, the
    # remains of a batch interrupted between its renames; anywhere else, orphans.
    paired = {_parquet.draws_sibling(root, p) for p in dec_parts}
    chain_end: dict[str, int] = {}
    for p in (*dec_parts, *out_parts):
        chain_end[p.tag] = max(chain_end.get(p.tag, -1), p.last)
    for p in _parquet.parts(root, "draws"):
        if p.path in paired:
            continue
        if p.first > chain_end.get(p.tag, -1):
            report.uncommitted_parts += 1
            continue
        for did in _id_column(p.path, "draws"):
            report.note("orphan_draws", did)
    return dup_ids


def _check_parquet(root: Path, key: bytes, report: IntegrityReport) -> None:
    _parquet.check_ledger_dir(root)
    dup_ids = parquet_cross_checks(root, report)
    dec_parts = _parquet.parts(root, "decisions")
    out_parts = _parquet.parts(root, "outcomes")

    # The chains: per writer tag, parts merged in seq order.
    by_tag: dict[str, list[tuple[int, int, _parquet.Part]]] = {}
    for order, plist in ((0, dec_parts), (1, out_parts)):
        for p in plist:
            by_tag.setdefault(p.tag, []).append((p.first, order, p))
    for tag in sorted(by_tag):
        ordered = sorted(by_tag[tag], key=lambda t: t[:2])
        _walk(report, _parquet_chain(root, ordered, key, dup_ids, report), dup_ids)


def _load_part(
    root: Path, order: int, part: _parquet.Part, key: bytes, dup_ids: set[str],
    report: IntegrityReport,
) -> list[_Rec]:  # fmt: skip
    if order == 1:
        return [_outcome_rec(r, key) for r in _parquet.part_rows(part.path, "outcomes")]
    rows = _parquet.part_rows(part.path, "decisions")
    sibling = _parquet.draws_sibling(root, part)
    by_id: dict[str, list[Row]] = {r[0]: [] for r in rows}
    if sibling.exists():
        for d in _parquet.part_rows(sibling, "draws"):
            found = by_id.get(d[0])
            if found is None:
                report.note("orphan_draws", d[0])
            else:
                found.append(d)
    return [_decision_rec(r, by_id[r[0]], key, dup_ids) for r in rows]


def _parquet_chain(
    root: Path, plist: list[tuple[int, int, _parquet.Part]], key: bytes, dup_ids: set[str],
    report: IntegrityReport,
) -> Iterator[_Rec]:  # fmt: skip
    """Records of one writer tag in (seq, order) order, loading parts only when needed."""
    heap: list[tuple[int, int, int, _Rec]] = []
    n = 0
    i = 0
    while i < len(plist) or heap:
        # Load every part that may hold a record at or before the smallest one loaded.
        while i < len(plist) and (not heap or plist[i][0] <= heap[0][0]):
            _first, order, part = plist[i]
            for rec in _load_part(root, order, part, key, dup_ids, report):
                heapq.heappush(heap, (rec.seq, rec.order, n, rec))
                n += 1
            i += 1
        yield heapq.heappop(heap)[3]
