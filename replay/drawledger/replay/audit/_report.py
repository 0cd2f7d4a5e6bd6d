"""What the audit found: tests, figures, and the report."""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import TYPE_CHECKING, Any

import pandas as pd

from drawledger._text import counted
from drawledger.replay._html import html_table
from drawledger.replay._terminal import plain_text, shown
from drawledger.replay.audit import _stats
from drawledger.replay.audit._limits import (
    ALPHA,
    AS_DECLARED,
    NOT_AS_DECLARED,
    NOT_ENOUGH_DATA,
    TEST_LABELS,
)

if TYPE_CHECKING:
    from rich.console import Console, ConsoleOptions, RenderResult


# The tests of a draw's randomness (the others check its declaration, its units and repeats):
# a draw none of whose randomness tests had enough data was not audited.
RANDOMNESS_TESTS = frozenset(
    {"ratio", "calibration", "uniforms_ks", "uniforms_chisq", "pit_ks", "pit_chisq"}
)


@dataclass(frozen=True)
class AuditTest:
    """One test of one draw (or of a whole stream, for repeated seeds and uniforms)."""

    stream: str
    draw: str | None
    kind: str | None
    test: str
    n: int
    statistic: float | None
    p_value: float | None
    p_adjusted: float | None
    verdict: str
    alarm: bool
    df: int | None = None
    field: str | None = None
    detail: str = ""

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "stream": self.stream,
            "draw": self.draw,
            "kind": self.kind,
            "test": self.test,
            "n": self.n,
            "statistic": self.statistic,
            "p_value": self.p_value,
            "p_adjusted": self.p_adjusted,
            "verdict": self.verdict,
            "alarm": self.alarm,
        }
        if self.df is not None:
            out["df"] = self.df
        if self.field is not None:
            out["field"] = self.field
        if self.detail:
            out["detail"] = self.detail
        return out


@dataclass(frozen=True)
class AuditFigure:
    """What the HTML report draws for one draw of a stream.

    ``pit_counts`` and ``uniform_counts`` are histograms over ``AuditReport.bin_edges`` (20 equal
    bins on [0, 1]); ``uniform_counts`` is empty when the draws recorded no uniforms. For
    discrete kinds ``options`` holds the JSON text of each option with its ``observed`` count
    and ``expected`` count (the sum of its declared probabilities). ``n`` is the number of PIT
    values: draws, picks for a slate (k per draw), units for a bucket.
    """

    stream: str
    draw: str | None
    kind: str
    n: int
    pit_counts: tuple[int, ...]
    uniform_counts: tuple[int, ...]
    options: tuple[str, ...] = ()
    observed: tuple[float, ...] = ()
    expected: tuple[float, ...] = ()


@dataclass(frozen=True)
class AuditReport:
    """The result of ``audit``: every test, its verdict, and the data of the figures."""

    tests: tuple[AuditTest, ...]
    figures: tuple[AuditFigure, ...]
    decisions: int
    alpha: float = ALPHA
    bin_edges: tuple[float, ...] = tuple(float(x) for x in _stats.BIN_EDGES)

    @property
    def ok(self) -> bool:
        """True when no alarm fired and every draw had enough data for a test of randomness."""
        return not any(t.alarm for t in self.tests) and not self.untested

    @property
    def verdict(self) -> str:
        """The audit in a few words: "no alarm", "2 alarms" or "1 draw not audited"."""
        if self.alarms:
            return counted(len(self.alarms), "alarm")
        if self.untested:
            return f"{counted(len(self.untested), 'draw')} not audited"
        return "no alarm"

    @property
    def untested(self) -> tuple[tuple[str, str, str | None, int], ...]:
        """The draws (stream, kind, name, draws) none of whose tests of randomness had enough
        data: no alarm there says nothing."""
        groups: dict[tuple[str, str, str | None], list[AuditTest]] = {}
        for t in self.tests:
            if t.kind is not None and t.test in RANDOMNESS_TESTS:
                groups.setdefault((t.stream, t.kind, t.draw), []).append(t)
        return tuple((*key, max(t.n for t in found)) for key, found in groups.items()
                     if all(t.verdict == NOT_ENOUGH_DATA for t in found))  # fmt: skip

    @property
    def alarms(self) -> tuple[AuditTest, ...]:
        return tuple(t for t in self.tests if t.alarm)

    def to_dict(self) -> dict[str, Any]:
        """The audit JSON: {"ok", "tests": [{"stream", "test", "statistic", "p_value", ...}]}."""
        return {
            "ok": self.ok,
            "alpha": self.alpha,
            "decisions": self.decisions,
            "untested": [
                {"stream": stream, "kind": kind, "draw": draw, "n": n}
                for stream, kind, draw, n in self.untested
            ],
            "tests": [t.to_dict() for t in self.tests],
        }

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        """One table per stream; p is the Holm-adjusted p-value the verdict uses."""
        from rich.table import Table
        from rich.text import Text

        if not self.tests:
            yield f"No draws to audit ({counted(self.decisions, 'decision')})."
            return
        yield f"[bold]Randomization audit of {counted(self.decisions, 'decision')}[/]"
        for stream, kind, draw, n in self.untested:
            name = f"{kind} {draw}" if draw else kind
            yield Text.assemble(("NOT AUDITED: ", "bold red"), shown(f"{stream}, {name}"),
                                f": {counted(n, 'draw')}, too few for any test of "
                                "randomness")  # fmt: skip
        style = {AS_DECLARED: "green", NOT_AS_DECLARED: "bold red", NOT_ENOUGH_DATA: "dim"}
        for stream in dict.fromkeys(t.stream for t in self.tests):
            table = Table(title=shown(stream), title_justify="left", title_style="bold")
            table.add_column("draw / test", no_wrap=True)
            for name in ("n", "statistic", "p"):  # numbers fold, never cut
                table.add_column(name, justify="right", overflow="fold")
            table.add_column("verdict", no_wrap=True)
            previous = None
            for t in self.tests:
                if t.stream != stream:
                    continue
                draw = (
                    "stream-wide" if t.kind is None else t.kind + (f" {t.draw}" if t.draw else "")
                )
                if draw != previous:
                    if previous is not None:
                        table.add_section()
                    table.add_row(shown(draw, style="bold"))
                    previous = draw
                table.add_row(
                    shown("  " + TEST_LABELS[t.test] + (f" {t.field}" if t.field else "")),
                    str(t.n),
                    _fmt(t.statistic),
                    _fmt_p(t.p_adjusted),
                    f"[{style[t.verdict]}]{t.verdict}[/]",
                )
            yield table
        yield f"p: after Holm's correction across a stream's tests; alarm when p < {self.alpha:g}."
        if any(t.test.startswith("pit") for t in self.tests):
            yield (
                "PIT: the probability integral transform (PIT) of each draw under the "
                "distribution it declares, uniform on (0, 1) when draws are as declared."
            )
        if self.alarms:
            alarms = counted(len(self.alarms), "alarm")
            yield f"[bold red]{alarms}: randomization not as declared.[/]"
        elif self.untested:
            draws = counted(len(self.untested), "draw")
            yield f"[bold red]No alarm, but {draws} could not be tested: too few draws.[/]"
        else:
            yield "[green]No alarm: every testable draw looks as declared.[/]"

    def render(self) -> str:
        """The tables as plain text."""
        return plain_text(self, width=140)

    def __str__(self) -> str:
        return self.render()

    def to_frame(self) -> pd.DataFrame:
        """One row per test, with every field of ``AuditTest`` as a column."""
        columns = [f.name for f in fields(AuditTest)]
        return pd.DataFrame([[getattr(t, c) for c in columns] for t in self.tests],
                            columns=columns)  # fmt: skip

    def _repr_html_(self) -> str:
        """Every test as a row of an HTML table (notebooks); p is Holm-adjusted."""
        caption = f"Randomization audit of {counted(self.decisions, 'decision')}: {self.verdict}"
        rows = [(t.stream, t.draw, t.kind, TEST_LABELS[t.test], t.n, t.statistic, t.p_adjusted,
                 t.verdict) for t in self.tests]  # fmt: skip
        head = ("stream", "draw", "kind", "test", "n", "statistic", "p", "verdict")
        return html_table(caption, head, rows)


def _fmt(x: float | None) -> str:
    if x is None:
        return "-"
    return str(int(x)) if float(x).is_integer() and abs(x) < 1e15 else f"{x:.4g}"


def _fmt_p(p: float | None) -> str:
    if p is None:
        return "-"
    return "<1e-300" if p < 1e-300 else f"{p:.3g}"
