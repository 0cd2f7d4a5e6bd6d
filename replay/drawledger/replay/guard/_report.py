"""What the guard found: the summary (JSON, rich, plain text) and the one-line alarm."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from drawledger._text import visible
from drawledger.replay._html import html_table
from drawledger.replay._terminal import plain_text
from drawledger.replay.guard._evidence import threshold
from drawledger.replay.guard._state import INTEGRITY_PROBLEMS, GuardState
from drawledger.replay.guard._watch import window_view

if TYPE_CHECKING:
    from rich.console import Console, ConsoleOptions, RenderResult


def alarm_line(alarm: dict[str, Any]) -> str:
    """One line naming the stream, test, evidence and first affected decision of an alarm."""
    where = f"stream '{visible(alarm['stream'])}'" if alarm["stream"] else "ledger"
    if alarm.get("draw"):
        where += f" draw '{visible(alarm['draw'])}'"
    evidence = ""
    if alarm.get("evidence") is not None:
        evidence = f" e-value {alarm['evidence']:.4g} >= {alarm['threshold']:.4g};"
    first = alarm.get("decision")
    at = f" first affected decision '{visible(first)}';" if first is not None else ""
    return (f"drawledger guard: ALARM {where} test {visible(alarm['test'])}:{evidence}{at} "
            f"{visible(alarm['detail'])}")  # fmt: skip


@dataclass
class GuardReport:
    """The guard's summary after a run (``--once``) or when it stops following."""

    state: GuardState
    alpha: float
    new_alarms: list[dict[str, Any]] = field(default_factory=list)
    lag_records: int = 0
    lag_seconds: float | None = None

    @property
    def ok(self) -> bool:
        """No alarm stands in the guard's state."""
        return not self.state.alarms

    def draws(self) -> list[dict[str, Any]]:
        out = []
        limit = math.exp(threshold(self.alpha))
        for _, w in sorted(self.state.watches.items()):
            out.append({
                "stream": w.stream, "draw": w.draw, "kind": w.kind, "test": w.test, "n": w.n,
                "evidence": math.exp(min(w.log_e, 700.0)),
                "uniforms_evidence": math.exp(min(w.log_e_uniforms, 700.0)),
                "uniforms_n": int(sum(w.uniforms)), "threshold": limit, "stopped": w.stopped,
                "window": window_view(w, self.alpha),
            })  # fmt: skip
        return out

    def to_dict(self) -> dict[str, Any]:
        s = self.state
        problems = {p: s.integrity.get(p, 0) for p in INTEGRITY_PROBLEMS}
        return {
            "ok": self.ok,
            "ledger": s.ledger,
            "alpha": self.alpha,
            "decisions": s.decisions,
            "outcomes": s.outcomes,
            **{k: s.verify.get(k, 0) for k in ("verified", "mismatched", "unreplayable")},
            "by_reason": dict(s.by_reason),
            "integrity": {"ok": not any(problems.values()), **problems},
            "draws": self.draws(),
            "alarms": [{k: v for k, v in a.items() if k != "key"} for a in s.alarms],
            "new_alarms": len(self.new_alarms),
            "lag": {"records": self.lag_records, "seconds": self.lag_seconds},
            "pieces": s.pieces,
        }

    def _head(self) -> str:
        s = self.state
        n = len(s.alarms)
        verdict = (
            "guard: no alarm" if self.ok else f"guard: {n} ALARM{'S' if n > 1 else ''} standing"
        )
        return (f"{verdict}; {s.decisions} decisions and {s.outcomes} outcomes taken in, "
                f"{s.verify['verified']} verified, {s.verify['mismatched']} mismatched, "
                f"{s.verify['unreplayable']} unreplayable; behind the ledger by "
                f"{self.lag_records} records")  # fmt: skip

    def __rich__(self) -> Any:
        from rich.console import Group
        from rich.table import Table
        from rich.text import Text

        limit = math.exp(threshold(self.alpha))
        title = (f"draws watched (alarm at e-value >= {limit:.4g}; window: fixed-n chi-square, "
                 "information only)")  # fmt: skip
        table = Table(title=title, title_justify="left")
        for name in ("stream", "draw", "test", "n", "e-value", "uniforms e-value",
                     "window n", "window p"):  # fmt: skip
            table.add_column(
                name, justify="left" if name in ("stream", "draw", "test") else "right"
            )
        for d in self.draws():
            p = d["window"]["p_value"]
            table.add_row(Text(visible(d["stream"])), Text(visible(d["draw"] or "")), d["test"],
                          str(d["n"]), f"{d['evidence']:.3g}", f"{d['uniforms_evidence']:.3g}",
                          str(d["window"]["n"]), "" if p is None else f"{p:.3g}")  # fmt: skip
        parts: list[Any] = [Text(self._head(), style="bold" if self.ok else "bold red"), table]
        for a in self.state.alarms:
            parts.append(Text(alarm_line(a)))
        return Group(*parts)

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        yield self.__rich__()

    def render(self) -> str:
        return plain_text(self)

    def __str__(self) -> str:
        return self.render()

    def _repr_html_(self) -> str:
        rows = [(d["stream"], d["draw"] or "", d["test"], d["n"], f"{d['evidence']:.3g}",
                 f"{d['uniforms_evidence']:.3g}") for d in self.draws()]  # fmt: skip
        return html_table(self._head(), ("stream", "draw", "test", "n", "e-value",
                                         "uniforms e-value"), rows)  # fmt: skip
