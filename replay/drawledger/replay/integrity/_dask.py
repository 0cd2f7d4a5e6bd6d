"""The integrity check of a Parquet ledger as Dask tasks: one ledger-wide, one per writer group."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

from drawledger import _parquet
from drawledger.replay.engines import DaskEngine, Handle
from drawledger.replay.integrity._parquet import parquet_cross_checks, walk_writer
from drawledger.replay.integrity._registry import check_registry
from drawledger.replay.integrity._report import MAX_EXAMPLES, PROBLEMS, IntegrityReport
from drawledger.replay.sources import read_registry


def _integrity_ids(root: str, key: bytes) -> tuple[IntegrityReport, set[str]]:
    """The ledger-wide part of the integrity check: duplicate ids, orphans, interrupted batches.

    Returns the report so far and the duplicate decision ids the chain walks need.
    """

    report = IntegrityReport(keyed=bool(key))
    return report, parquet_cross_checks(Path(root), key, report)


def _integrity_chains(
    root: str, key: bytes, tags: Sequence[str], dup_ids: frozenset[str]
) -> IntegrityReport:
    """Hashes and chains of some writers (``_integrity._check_parquet``'s walk, per tag)."""

    base = Path(root)
    report = IntegrityReport(keyed=bool(key))
    wanted = set(tags)
    by_tag: dict[str, list[tuple[int, int, _parquet.Part]]] = {}
    for order, table in ((0, "decisions"), (1, "outcomes")):
        for p in _parquet.parts(base, table):
            if p.tag in wanted:
                by_tag.setdefault(p.tag, []).append((p.first, order, p))
    for tag in sorted(by_tag):
        walk_writer(base, by_tag[tag], key, set(dup_ids), report)
    return report


def combine_reports(
    found: tuple[IntegrityReport, set[str]], *chains: IntegrityReport
) -> IntegrityReport:
    """One report from the ledger-wide part and the writers' parts, in the local engine's order."""

    total = found[0]
    for part in chains:
        for name in (
            *PROBLEMS,
            "decisions",
            "outcomes",
            "writers",
            "uncommitted_parts",
            "uncommitted_records",
        ):
            setattr(total, name, getattr(total, name) + getattr(part, name))
        for problem, shown in part.examples.items():
            mine = total.examples.setdefault(problem, [])
            for did in shown:
                if len(mine) < MAX_EXAMPLES and did not in mine:
                    mine.append(did)
        total.decision_ids |= part.decision_ids
        total.starts.update(part.starts)
        total.chained |= part.chained
        for did, reason in part.reasons.items():
            if len(total.reasons) < MAX_EXAMPLES:
                total.reasons.setdefault(did, reason)
    return total.finish()


LABEL = "the integrity check"


class IntegrityTasks:
    """The integrity check of a Parquet ledger as tasks: one ledger-wide, one per writer group.

    Each writer's chain is walked in sequence order by one task, so the check runs on as many
    workers as there are writers (up to twice the workers); the report equals
    ``check_integrity``'s. The chain tasks start at once, without the ledger's duplicate ids
    (they only change how a duplicate decision is counted); in the rare ledger that has
    duplicates, the chains are walked again with them.
    """

    def __init__(self, engine: DaskEngine, root: Path, integrity_key: bytes | str | None) -> None:
        key = integrity_key.encode() if isinstance(integrity_key, str) else (integrity_key or b"")
        sizes: dict[str, int] = {}
        for table in ("decisions", "outcomes"):
            for p in _parquet.parts(root, table):
                sizes[p.tag] = sizes.get(p.tag, 0) + p.last - p.first + 1
        groups: list[list[str]] = [[] for _ in range(min(len(sizes), 2 * engine.workers))]
        loads = [0] * len(groups)
        for tag in sorted(sizes, key=lambda t: (-sizes[t], t)):  # largest to the lightest
            k = loads.index(min(loads))
            groups[k].append(tag)
            loads[k] += sizes[tag]
        self.engine, self.root, self.key = engine, os.fspath(root), key
        self.groups = [sorted(g) for g in groups]
        self.found = engine.submit(_integrity_ids, self.root, key, label=LABEL)
        self.chains = self._walks(frozenset())

    def _walks(self, dup_ids: frozenset[str]) -> list[Handle[IntegrityReport]]:
        return [self.engine.submit(_integrity_chains, self.root, self.key, g, dup_ids,
                                   label=LABEL) for g in self.groups]  # fmt: skip

    def result(self) -> IntegrityReport:
        """The combined report (waits for the tasks)."""
        found = self.found.result()
        if found[1]:
            self.chains = self._walks(frozenset(found[1]))
        total = combine_reports(found, *(f.result() for f in self.chains))
        check_registry(total, read_registry(self.root, format="parquet"), self.key)
        return total.finish()
