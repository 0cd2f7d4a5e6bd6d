"""The integrity report and the walk of one writer's hash chain."""

from __future__ import annotations

import struct
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, NamedTuple

from drawledger import _records
from drawledger._schema import DEC, DECISIONS, DRAW, DRAWS, OUT, OUTCOMES, row_problem
from drawledger._text import counted, visible
from drawledger.replay._html import html_table

if TYPE_CHECKING:
    import pandas as pd
    from rich.console import Console, ConsoleOptions, RenderResult

PROBLEMS = (
    "gaps",
    "broken_links",
    "duplicates",
    "bad_hashes",
    "orphan_draws",
    "orphan_outcomes",
    "bad_records",
    "missing_writers",
    "unregistered_writers",
    "foreign_chains",
    "bad_registry",
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
    bad_records: int = 0
    missing_writers: int = 0
    unregistered_writers: int = 0
    foreign_chains: int = 0
    bad_registry: int = 0
    decisions: int = 0
    outcomes: int = 0
    writers: int = 0
    keyed: bool = False
    uncommitted_parts: int = 0
    uncommitted_records: int = 0
    examples: dict[str, list[str]] = field(default_factory=dict)
    decision_ids: set[str] = field(default_factory=set)
    reasons: dict[str, str] = field(default_factory=dict)
    registry: bool = False  # the ledger has an identity and a writer registry
    legacy_writers: int = 0  # unregistered writers of a ledger from before its registry
    # Each walked writer's first prev_hash (None: null; absent: its seq 0 is missing).
    starts: dict[str, str | None] = field(default_factory=dict)
    chained: set[str] = field(default_factory=set)  # writers with records

    def note(self, problem: str, decision_id: object, count: int = 1) -> None:
        """Count ``count`` occurrences of a problem involving ``decision_id``."""
        setattr(self, problem, getattr(self, problem) + count)
        if decision_id is None:
            return
        if not isinstance(decision_id, str):  # a damaged id (a blob, a number): shown as such
            decision_id = repr(decision_id)
        self.decision_ids.add(decision_id)
        shown = self.examples.setdefault(problem, [])
        if len(shown) < MAX_EXAMPLES and decision_id not in shown:
            shown.append(decision_id)

    def note_writer(self, problem: str, writer: object) -> None:
        """A problem of a whole writer (examples: writer ids, not decision ids)."""
        setattr(self, problem, getattr(self, problem) + 1)
        shown = self.examples.setdefault(problem, [])
        if len(shown) < MAX_EXAMPLES:
            shown.append(writer if isinstance(writer, str) else repr(writer))

    def note_bad(self, decision_id: object, reason: str) -> None:
        """A record whose fields do not fit their columns, with the reason (the first few)."""
        self.note("bad_records", decision_id)
        if len(self.reasons) < MAX_EXAMPLES:
            shown = decision_id if isinstance(decision_id, str) else repr(decision_id)
            self.reasons.setdefault(shown, reason)

    def finish(self) -> IntegrityReport:
        # Orphan outcomes are reported but do not fail the check (module docstring).
        self.ok = not any(getattr(self, p) for p in PROBLEMS if p != "orphan_outcomes")
        return self

    def uncommitted(self) -> list[tuple[str, int]]:
        """What a writer stopped between the renames of a Parquet batch left, where it left
        anything: (what, count); not failures."""
        found = [("uncommitted parts", self.uncommitted_parts),
                 ("uncommitted records", self.uncommitted_records)]  # fmt: skip
        return [(what, n) for what, n in found if n]

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"ok": self.ok}
        out.update({p: getattr(self, p) for p in PROBLEMS})
        out.update(decisions=self.decisions, outcomes=self.outcomes, writers=self.writers,
                   keyed=self.keyed, uncommitted_parts=self.uncommitted_parts,
                   uncommitted_records=self.uncommitted_records, registry=self.registry,
                   legacy_writers=self.legacy_writers)  # fmt: skip
        out["examples"] = {k: list(v) for k, v in self.examples.items()}
        if self.reasons:
            out["bad_record_reasons"] = dict(self.reasons)
        return out

    def render(self) -> str:
        """Plain-text summary for the terminal."""
        head = "integrity ok" if self.ok else "integrity FAILED"
        lines = [
            f"{head}: {counted(self.decisions, 'decision')}, "
            f"{counted(self.outcomes, 'outcome')}, {counted(self.writers, 'writer')} "
            f"({'keyed' if self.keyed else 'unkeyed'} hashes)"
        ]
        for p in PROBLEMS:
            n = getattr(self, p)
            if n:
                shown = ", ".join(visible(d) for d in self.examples.get(p, []))
                note = " (not a failure: see docs/ledger.md)" if p == "orphan_outcomes" else ""
                lines.append(f"  {p.replace('_', ' ')}: {n}{note}; e.g. {shown}")
        for did, reason in self.reasons.items():
            lines.append(f"    {visible(did)}: {visible(reason)}")
        if not self.registry:
            lines.append("  note: no ledger identity or writer registry (a ledger from before "
                         "them): a writer whose records were all deleted, or a chain grafted "
                         "from another ledger, is not detected")  # fmt: skip
        elif self.legacy_writers:
            lines.append(f"  note: {self.legacy_writers} writers from before the registry "
                         "are not protected against deletion or grafting")  # fmt: skip
        if self.uncommitted_parts:
            parts = counted(self.uncommitted_parts, "draws part")
            lines.append(f"  {parts} of batches interrupted between their renames (ignored "
                         "by readers; safe to delete)")  # fmt: skip
        if self.uncommitted_records:
            lost = counted(self.uncommitted_records, "record")
            lines.append(f"  {lost} of a writer's last batch not in place: the writer stopped "
                         "(or is still) between the renames of the batch, before flush() "
                         "acknowledged it, or a power loss took them (not a failure: see "
                         "docs/ledger.md)")  # fmt: skip
        if self.bad_hashes and self.bad_hashes == self.decisions + self.outcomes:
            lines.append("  every hash differs: was the ledger written with another integrity key?")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.render()

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        from rich.text import Text

        yield Text(self.render())

    def to_frame(self) -> pd.DataFrame:
        """One row per kind of problem (the index): its count, whether it fails the check
        (orphan outcomes do not), and the first decision ids involved."""
        import pandas as pd

        rows = [(p, getattr(self, p), p != "orphan_outcomes", list(self.examples.get(p, [])))
                for p in PROBLEMS]  # fmt: skip
        frame = pd.DataFrame(rows, columns=["problem", "count", "fails_check", "examples"])
        return frame.set_index("problem")

    def _repr_html_(self) -> str:
        """Each problem with its count and first examples, as an HTML table (notebooks)."""
        head = "integrity ok" if self.ok else "integrity FAILED"
        caption = (f"{head}: {counted(self.decisions, 'decision')}, "
                   f"{counted(self.outcomes, 'outcome')}, "
                   f"{counted(self.writers, 'writer')}")  # fmt: skip
        rows = [(p.replace("_", " "), getattr(self, p), ", ".join(self.examples.get(p, [])))
                for p in PROBLEMS]  # fmt: skip
        rows += [(f"{what} (not a failure)", n, "") for what, n in self.uncommitted()]
        return html_table(caption, ("problem", "count", "examples"), rows)


class Rec(NamedTuple):
    seq: int
    order: int  # 0 decision, 1 outcome (ties on seq are duplicates either way)
    writer: str
    decision_id: str
    prev_hash: str | None
    hash: str
    hash_ok: bool
    problem: str | None = None  # why its fields do not fit their columns (a damaged record)


def chain_key(rec: Rec) -> tuple[int, int]:
    """The order of a writer's records; a damaged seq (NULL, text) sorts last (walk skips it)."""
    return (rec.seq if rec.seq.__class__ is int else 1 << 63, rec.order)


def walk(
    report: IntegrityReport, records: Iterable[Rec], dup_ids: set[str],
    start: dict[str, tuple[int, str | None]] | None = None,
    unfinished: Sequence[tuple[int, int]] = (),
) -> dict[str, tuple[int, str | None]]:  # fmt: skip
    """Check records of writer chains, given in (seq, order) order within each writer.

    ``start`` continues chains checked before: writer -> (next expected seq, last hash).
    Missing seqs within the ``unfinished`` ranges (first, last) count as uncommitted records,
    not gaps: the parts of an interrupted last batch (``unfinished_batch``; one writer a walk).
    Returns where each chain stands after the records.
    """
    state: dict[str, tuple[int, str | None]] = dict(start or {})  # writer -> (next seq, hash)
    unfinished = _merged(unfinished)
    for rec in records:
        if rec.order == 0:
            report.decisions += 1
        else:
            report.outcomes += 1
        if rec.problem is not None:
            report.note_bad(rec.decision_id, rec.problem)
            if rec.seq.__class__ is not int or rec.writer.__class__ is not str:
                continue  # no place in a chain: the seq it held shows as a gap
        elif not rec.hash_ok:
            report.note("bad_hashes", rec.decision_id)
        expected, last_hash = state.get(rec.writer, (0, None))
        if rec.seq < expected:
            if not (rec.order == 0 and rec.decision_id in dup_ids):  # not counted twice
                report.note("duplicates", rec.decision_id)
            continue
        report.chained.add(rec.writer)
        if rec.seq > expected:
            lost = _within(unfinished, expected, rec.seq)
            report.uncommitted_records += lost
            if rec.seq - expected > lost:
                report.note("gaps", rec.decision_id, rec.seq - expected - lost)
        elif rec.seq == 0:  # the chain's start: null, or a genesis (check_registry)
            report.starts[rec.writer] = rec.prev_hash
        elif rec.prev_hash != last_hash:
            report.note("broken_links", rec.decision_id)
        state[rec.writer] = (rec.seq + 1, rec.hash)
    for expected, _ in state.values():  # the end of an unfinished batch, past the last record
        report.uncommitted_records += _within(unfinished, expected, 1 << 63)
    report.writers += len(state)
    return state


def _merged(ranges: Sequence[tuple[int, int]]) -> list[tuple[int, int]]:
    """(first, last) ranges merged where they overlap or touch, sorted."""
    out: list[tuple[int, int]] = []
    for first, last in sorted(ranges):
        if out and first <= out[-1][1] + 1:
            out[-1] = (out[-1][0], max(last, out[-1][1]))
        else:
            out.append((first, last))
    return out


def _within(ranges: Sequence[tuple[int, int]], low: int, high: int) -> int:
    """How many seqs from ``low`` to ``high - 1`` lie in the (merged) ranges."""
    return sum(max(0, min(high, last + 1) - max(low, first)) for first, last in ranges)


# What hashing a record whose fields have the wrong types raises (a NULL or text float, ...).
_UNHASHABLE = (TypeError, ValueError, OverflowError, struct.error)


def decision_rec(row: Row, draws: list[Row], key: bytes, dup_ids: set[str]) -> Rec:
    did, digest = row[DEC.decision_id], row[DEC.hash]
    if did in dup_ids:
        ok = True  # counted as a duplicate; its draws cannot be attributed
    else:
        try:
            if len(draws) > 1:
                draws.sort(key=lambda d: d[DRAW.idx])
            ok = _records.decision_hash(row, draws, key) == digest
        except _UNHASHABLE:
            ok = False
    problem = None
    if not ok:  # only then: a record that hashes as stored has fields of the right types
        problem = row_problem(DECISIONS, row)
        for d in draws:
            problem = problem or row_problem(DRAWS, d)
    return Rec(row[DEC.seq], 0, row[DEC.writer], did, row[DEC.prev_hash], digest, ok, problem)


def outcome_rec(row: Row, key: bytes) -> Rec:
    digest = row[OUT.hash]
    try:
        ok = _records.outcome_hash(row, key) == digest
    except _UNHASHABLE:
        ok = False
    return Rec(
        row[OUT.seq],
        1,
        row[OUT.writer],
        row[OUT.decision_id],
        row[OUT.prev_hash],
        digest,
        ok,
        None if ok else row_problem(OUTCOMES, row),
    )
