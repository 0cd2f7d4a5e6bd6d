"""The integrity report and the walk of one writer's hash chain."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, NamedTuple

from drawledger import _records
from drawledger._schema import DEC, DRAW, OUT
from drawledger._text import counted, visible
from drawledger.replay._html import html_table

if TYPE_CHECKING:
    from rich.console import Console, ConsoleOptions, RenderResult

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
        if self.uncommitted_parts:
            parts = counted(self.uncommitted_parts, "draws part")
            lines.append(f"  {parts} of batches interrupted between their renames (ignored "
                         "by readers; safe to delete)")  # fmt: skip
        if self.bad_hashes and self.bad_hashes == self.decisions + self.outcomes:
            lines.append("  every hash differs: was the ledger written with another integrity key?")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.render()

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        from rich.text import Text

        yield Text(self.render())

    def _repr_html_(self) -> str:
        """Each problem with its count and first examples, as an HTML table (notebooks)."""
        head = "integrity ok" if self.ok else "integrity FAILED"
        caption = (f"{head}: {counted(self.decisions, 'decision')}, "
                   f"{counted(self.outcomes, 'outcome')}, "
                   f"{counted(self.writers, 'writer')}")  # fmt: skip
        rows = [(p.replace("_", " "), getattr(self, p), ", ".join(self.examples.get(p, [])))
                for p in PROBLEMS]  # fmt: skip
        return html_table(caption, ("problem", "count", "examples"), rows)


class Rec(NamedTuple):
    seq: int
    order: int  # 0 decision, 1 outcome (ties on seq are duplicates either way)
    writer: str
    decision_id: str
    prev_hash: str | None
    hash: str
    hash_ok: bool


def walk(report: IntegrityReport, records: Iterable[Rec], dup_ids: set[str]) -> None:
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


def decision_rec(row: Row, draws: list[Row], key: bytes, dup_ids: set[str]) -> Rec:
    did, digest = row[DEC.decision_id], row[DEC.hash]
    if did in dup_ids:
        ok = True  # counted as a duplicate; its draws cannot be attributed
    else:
        draws.sort(key=lambda d: d[DRAW.idx])
        ok = _records.decision_hash(row, draws, key) == digest
    return Rec(row[DEC.seq], 0, row[DEC.writer], did, row[DEC.prev_hash], digest, ok)


def outcome_rec(row: Row, key: bytes) -> Rec:
    digest = row[OUT.hash]
    ok = _records.outcome_hash(row, key) == digest
    return Rec(
        row[OUT.seq], 1, row[OUT.writer], row[OUT.decision_id], row[OUT.prev_hash], digest, ok
    )
