"""The integrity check of a Parquet ledger: ledger-wide cross-checks and each writer's chain."""

from __future__ import annotations

import hashlib
import heapq
from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np

from drawledger import _parquet
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


def _fingerprints(ids: Iterable[str | None]) -> np.ndarray:
    return np.fromiter(
        (int.from_bytes(hashlib.blake2b((i or "").encode(), digest_size=8).digest(), "little")
         for i in ids),
        dtype=np.uint64,
    )  # fmt: skip


def _id_column(path: Path, table: str) -> list[str]:
    data = _parquet.read_columns(path, table, ["decision_id"])
    ids: list[str] = data.column(0).to_pylist()
    return ids


def parquet_cross_checks(root: Path, key: bytes, report: IntegrityReport) -> set[str]:
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

    # Draws parts without their decisions part: past the end of their writer's chain, or of
    # a decisions part that never came (unfinished_batch), the remains of a batch interrupted
    # between its renames; anywhere else, orphans.
    paired = {_parquet.draws_sibling(root, p) for p in dec_parts}
    chain_end: dict[str, int] = {}
    by_tag: dict[str, list[_parquet.Part]] = {}
    for p in (*dec_parts, *out_parts):
        chain_end[p.tag] = max(chain_end.get(p.tag, -1), p.last)
        by_tag.setdefault(p.tag, []).append(p)
    never_came = {
        _parquet.draws_sibling(root, m)
        for plist in by_tag.values()
        for m in _parquet.unfinished_batch(root, plist, key)
        if m.path.is_relative_to(root / "decisions")
    }
    for p in _parquet.parts(root, "draws"):
        if p.path in paired:
            continue
        if p.first > chain_end.get(p.tag, -1) or p.path in never_came:
            report.uncommitted_parts += 1
            continue
        for did in _id_column(p.path, "draws"):
            report.note("orphan_draws", did)
    return dup_ids


def check_parquet(root: Path, key: bytes, report: IntegrityReport) -> None:
    _parquet.check_ledger_dir(root)
    dup_ids = parquet_cross_checks(root, key, report)
    dec_parts = _parquet.parts(root, "decisions")
    out_parts = _parquet.parts(root, "outcomes")

    # The chains: per writer tag, parts merged in seq order.
    by_tag: dict[str, list[tuple[int, int, _parquet.Part]]] = {}
    for order, plist in ((0, dec_parts), (1, out_parts)):
        for p in plist:
            by_tag.setdefault(p.tag, []).append((p.first, order, p))
    for tag in sorted(by_tag):
        walk_writer(root, by_tag[tag], key, dup_ids, report)


def walk_writer(
    root: Path, plist: list[tuple[int, int, _parquet.Part]], key: bytes, dup_ids: set[str],
    report: IntegrityReport,
) -> None:  # fmt: skip
    """Walk one writer tag's chain; parts as (first seq, 0 decisions or 1 outcomes, part)."""
    ordered = sorted(plist, key=lambda t: t[:2])
    unfinished = _parquet.unfinished_batch(root, [p for *_, p in ordered], key)
    walk(report, parquet_chain(root, ordered, key, dup_ids, report), dup_ids,
         unfinished=[(p.first, p.last) for p in unfinished])  # fmt: skip


def _load_part(
    root: Path, order: int, part: _parquet.Part, key: bytes, dup_ids: set[str],
    report: IntegrityReport,
) -> list[Rec]:  # fmt: skip
    if order == 1:
        return [outcome_rec(r, key) for r in _parquet.part_rows(part.path, "outcomes")]
    rows = _parquet.part_rows(part.path, "decisions")
    sibling = _parquet.draws_sibling(root, part)
    by_id: dict[str, list[Row]] = {r[DEC.decision_id]: [] for r in rows}
    if sibling.exists():
        for d in _parquet.part_rows(sibling, "draws"):
            found = by_id.get(d[DRAW.decision_id])
            if found is None:
                report.note("orphan_draws", d[DRAW.decision_id])
            else:
                found.append(d)
    return [decision_rec(r, by_id[r[DEC.decision_id]], key, dup_ids) for r in rows]


def parquet_chain(
    root: Path, plist: list[tuple[int, int, _parquet.Part]], key: bytes, dup_ids: set[str],
    report: IntegrityReport,
) -> Iterator[Rec]:  # fmt: skip
    """Records of one writer tag in (seq, order) order, loading parts only when needed."""
    heap: list[tuple[tuple[int, int], int, Rec]] = []
    n = 0
    i = 0
    while i < len(plist) or heap:
        # Load every part that may hold a record at or before the smallest one loaded.
        while i < len(plist) and (not heap or plist[i][0] <= heap[0][0][0]):
            _first, order, part = plist[i]
            for rec in _load_part(root, order, part, key, dup_ids, report):
                heapq.heappush(heap, (chain_key(rec), n, rec))
                n += 1
            i += 1
        yield heapq.heappop(heap)[2]
