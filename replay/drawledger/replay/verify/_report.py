"""What verify found, as a report with JSON, rich and plain-text forms."""

from __future__ import annotations

import os
from collections import Counter
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import pandas as pd

from drawledger._text import counted
from drawledger.replay._html import html_table
from drawledger.replay._terminal import plain_text, shown
from drawledger.replay.integrity import IntegrityReport
from drawledger.replay.propensity import MONTE_CARLO, ONE_DRAW
from drawledger.replay.verify import _export
from drawledger.replay.verify._types import COUNTS, NOT_FAILING, REASONS, UNREPLAYABLE, ChunkResult

if TYPE_CHECKING:
    from rich.console import Console, ConsoleOptions, RenderResult


@dataclass
class VerifyReport:
    """What ``verify`` found. ``to_dict()`` is the JSON of ``drawledger verify --json``."""

    decisions: int
    verified: int
    mismatched: int
    unreplayable: int
    by_reason: dict[str, int]
    examples: dict[str, list[tuple[str, str]]]
    by_stream: dict[str, dict[str, Any]]
    methods: dict[str, int]
    integrity: IntegrityReport
    rows: pd.DataFrame
    short: dict[str, str] = field(default_factory=dict)  # first examples cut for the terminal
    # Each code version recorded: stream, fn, identity, decisions, replayed_under.
    versions: list[dict[str, Any]] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """Every decision verified (declared draws aside) and the ledger's integrity intact."""
        failing = sum(n for r, n in self.by_reason.items() if r in UNREPLAYABLE - NOT_FAILING)
        return self.mismatched == 0 and failing == 0 and self.integrity.ok

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "decisions": self.decisions,
            "verified": self.verified,
            "mismatched": self.mismatched,
            "unreplayable": self.unreplayable,
            "by_reason": dict(self.by_reason),
            "integrity": self.integrity.to_dict(),
            "examples": {
                reason: [{"decision_id": d, "detail": text} for d, text in pairs]
                for reason, pairs in self.examples.items()
            },
            "by_stream": self.by_stream,
            "propensity_methods": dict(self.methods),
            "versions": self.versions,
        }

    def __rich__(self) -> Any:
        from rich.console import Group
        from rich.table import Table
        from rich.text import Text

        streams = Table(title="decisions by stream", title_justify="left")
        for name in ("stream", "decisions", "verified", "mismatched", "unreplayable", "reasons"):
            # numbers fold onto a second line when the table is squeezed, never cut
            streams.add_column(name, justify="right" if name in COUNTS else "left",
                               overflow="fold")  # fmt: skip
        for stream, c in sorted(self.by_stream.items()):
            found = ", ".join(f"{r} {n}" for r, n in c["by_reason"].items())
            streams.add_row(shown(stream), *(str(c[k]) for k in COUNTS), found)
        streams.add_row("all", str(self.decisions), str(self.verified), str(self.mismatched),
                        str(self.unreplayable), style="bold")  # fmt: skip
        parts: list[Any] = [streams]
        if self.by_reason:
            reasons = Table(title="reasons", title_justify="left")
            reasons.add_column("reason")
            reasons.add_column("decisions", justify="right", overflow="fold")
            reasons.add_column("first examples")
            for reason in sorted(self.by_reason, key=REASONS.index):
                examples = self.examples.get(reason, [])
                ids = ", ".join(d for d, _ in examples)
                first = (
                    Text("\n").join([shown(ids), shown(self.short.get(reason, examples[0][1]))])
                    if examples
                    else ""
                )
                reasons.add_row(reason, str(self.by_reason[reason]), first)
            parts.append(reasons)
        if len(self.versions) > 1 or any(
            v["replayed_under"] != "current code" for v in self.versions
        ):
            versions = Table(title="code versions", title_justify="left")
            for name in ("stream", "function", "identity", "decisions", "replayed under"):
                versions.add_column(name, justify="right" if name == "decisions" else "left",
                                    overflow="fold")  # fmt: skip
            for v in self.versions:  # Text: what a ledger holds is never read as markup
                versions.add_row(*(Text(str(v[k])) for k in ("stream", "fn", "identity",
                                   "decisions", "replayed_under")))  # fmt: skip
            parts.append(versions)
        parts.extend(Text(line) for line in self.method_notes())
        parts.append(Text(self.integrity.render()))
        verdict = "verify passed" if self.ok else "verify FAILED"
        parts.append(Text(verdict, style="bold green" if self.ok else "bold red"))
        return Group(*parts)

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        yield self.__rich__()

    def method_notes(self) -> list[str]:
        """What the propensities not proven by replaying every branch are (one line each)."""
        out = []
        for method, what in ((ONE_DRAW, "one-draw: the probability of one draw's value, not "
                              "proven to be the action's (docs/replay.md, propensity methods)"),
                             (MONTE_CARLO, "estimated by Monte Carlo (propensity_stderr in "
                              "the export)")):  # fmt: skip
            n = self.methods.get(method, 0)
            if n:
                out.append(
                    f"note: {counted(n, 'propensity', 'propensities')} "
                    f"{'is' if n == 1 else 'are'} {what}"
                )
        return out

    def render(self) -> str:
        """The summary as plain text."""
        return plain_text(self)

    def __str__(self) -> str:
        return self.render()

    def to_frame(self) -> pd.DataFrame:
        """One row per decision (the export's columns); empty when run with ``keep_rows=False``."""
        return self.rows

    def _repr_html_(self) -> str:
        """The decisions by stream as an HTML table (notebooks)."""
        verdict = "verify passed" if self.ok else "verify FAILED"
        caption = (f"{verdict}: {self.verified} of {counted(self.decisions, 'decision')} verified; "
                   f"{'integrity ok' if self.integrity.ok else 'integrity FAILED'}")  # fmt: skip
        rows = [(stream, *(c[k] for k in COUNTS),
                 ", ".join(f"{r} {n}" for r, n in c["by_reason"].items()))
                for stream, c in sorted(self.by_stream.items())]  # fmt: skip
        rows.append(("all", self.decisions, self.verified, self.mismatched, self.unreplayable,
                     ", ".join(f"{r} {n}" for r, n in self.by_reason.items())))  # fmt: skip
        return html_table(caption, ("stream", *COUNTS, "reasons"), rows)


def build_report(
    total: ChunkResult, integrity: IntegrityReport, rows: pd.DataFrame
) -> VerifyReport:
    by_stream: dict[str, dict[str, Any]] = {}
    for stream, counts in sorted(total.streams.items()):
        found = total.stream_reasons.get(stream, Counter())
        by_stream[stream] = {**dict(zip(COUNTS, counts, strict=True)),
                             "by_reason": {r: found[r] for r in REASONS if found[r]}}  # fmt: skip
    sums = [sum(c[i] for c in total.streams.values()) for i in range(4)]
    ordered = {r: total.by_reason[r] for r in REASONS if total.by_reason[r]}
    return VerifyReport(
        decisions=sums[0],
        verified=sums[1],
        mismatched=sums[2],
        unreplayable=sums[3],
        by_reason=ordered,
        examples=total.examples,
        by_stream=by_stream,
        methods=dict(total.methods),
        integrity=integrity,
        rows=rows,
        short=dict(total.short),
    )


def rows_with_outcomes(frames: list[pd.DataFrame], ledger: str | os.PathLike[str],
          format: str | None) -> pd.DataFrame:  # fmt: skip
    rows = (pd.concat(frames, ignore_index=True) if frames
            else pd.DataFrame(columns=list(_export.BASE_COLUMNS)))  # fmt: skip
    rows = _export.join_outcomes(rows, _export.read_outcomes(ledger, format=format))
    return _export.typed_rows(rows)
