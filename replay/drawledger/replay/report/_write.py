"""``write_report``: one self-contained HTML file about a ledger.

The page holds the integrity and verification summary (with the reasons of every failure), the
randomization audit (its table, a histogram of the probability integral transform and observed
against declared frequencies per draw), and what-if estimates (intervals with the outer band of
clipped IPS, the distribution of importance weights with the effective sample size, and sweep
curves with interval bands). Figures are drawn with matplotlib and embedded as SVG data URIs:
the file makes no external request, opens offline, and prints (a print stylesheet is included).

The page is rendered from the Jinja2 templates in ``templates/`` with autoescaping: every text
from a ledger (stream names, decision ids, reasons, options, policy parameters) is escaped, its
control and bidirectional characters shown as escapes, and names cut for display (their whole
text in a title). At most ``FULL_STREAMS`` streams are shown in full; the others get one row
each, so the page's size and the time to draw it stay bounded (docs/operations.md).
"""

from __future__ import annotations

import datetime as _dt
import os
import sys
from collections.abc import Collection, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from jinja2 import Environment, PackageLoader, StrictUndefined

from drawledger import __version__
from drawledger._files import check_output, replacing
from drawledger._text import counted
from drawledger.exceptions import EstimateRefusedError, ReplayError
from drawledger.replay._html import html_table
from drawledger.replay.audit import AuditReport, audit
from drawledger.replay.estimate import EstimateReport, SweepReport, estimate
from drawledger.replay.report._format import name, num, plain, policy
from drawledger.replay.report._sections import audit_section, verify_section, whatif_block
from drawledger.replay.verify import VerifyReport, verify

__all__ = ["HtmlReport", "WhatIf", "write_report"]

TEMPLATES = Environment(
    loader=PackageLoader("drawledger.replay.report", "templates"),
    autoescape=True,
    undefined=StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
    keep_trailing_newline=True,
    finalize=plain,
)
TEMPLATES.filters["name"] = name


@dataclass(frozen=True)
class WhatIf:
    """One what-if question for the report: an estimate or a sweep of a target policy.

    ``truth`` is the known true value (a number for an estimate, one number per swept value
    for a sweep) when the data come from a simulator, as in ``drawledger demo``; the report
    draws it beside the estimates.
    """

    title: str
    result: EstimateReport | SweepReport
    truth: float | Sequence[float] | None = None


@dataclass
class HtmlReport:
    """What ``write_report`` wrote: the file and the verdicts it shows."""

    path: Path
    verification: VerifyReport
    audit: AuditReport
    whatifs: list[WhatIf] = field(default_factory=list)
    refused: list[str] = field(default_factory=list)  # estimates refused, and why

    @property
    def ok(self) -> bool:
        """Verification and audit passed, no estimate was refused or shown under an alert
        (made from accepted failures, with many rewards filled in, or from data that cannot
        answer: a support deficit, too uneven weights); other warnings do not make a report
        fail."""
        alerted = any(w.result.alerts for w in self.whatifs)
        return self.verification.ok and self.audit.ok and not self.refused and not alerted

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "html": str(self.path),
            "verify": self.verification.to_dict(),
            "audit": self.audit.to_dict(),
            "whatifs": [{"title": w.title, **w.result.to_dict()} for w in self.whatifs],
            "refused": self.refused,
        }

    def render(self) -> str:
        """One line of what was written, after the refused estimates and the alerts."""
        v, a = self.verification, self.audit
        top = [f"estimate refused: {r}" for r in self.refused]
        top += [f"ALERT: {w.title}: {line}" for w in self.whatifs for line in w.result.alerts]
        return "".join(f"{line}\n" for line in top) + (
            f"wrote {self.path}: {counted(v.decisions, 'decision')}, {v.verified} verified, "
            f"{v.mismatched} mismatched, {v.unreplayable} unreplayable; integrity "
            f"{'ok' if v.integrity.ok else 'FAILED'}; audit "
            f"{a.verdict}"
        )

    def __str__(self) -> str:
        return self.render()

    def _repr_html_(self) -> str:
        """What was written and each verdict, as an HTML table (notebooks)."""
        v, a = self.verification, self.audit
        rows: list[tuple[str, str]] = [
            ("verification", f"{v.verified} of {v.decisions} decisions verified, "
                             f"{v.mismatched} mismatched, {v.unreplayable} unreplayable"),
            ("integrity", "ok" if v.integrity.ok else "FAILED"),
            ("audit", a.verdict),
        ]  # fmt: skip
        rows += [("estimate refused", r) for r in self.refused]
        rows += [(f"ALERT: {w.title}", line) for w in self.whatifs for line in w.result.alerts]
        verdict = "passed" if self.ok else "FAILED"
        return html_table(f"wrote {self.path} ({verdict})", ("check", "result"), rows)


def write_report(
    ledger: str | os.PathLike[str],
    html: str | os.PathLike[str],
    *,
    path: Sequence[str | os.PathLike[str]] = (),
    allow: Sequence[str] = (),
    verification: VerifyReport | None = None,
    audit_report: AuditReport | None = None,
    whatifs: Iterable[WhatIf] = (),
    reward: str | None = None,
    overrides: Mapping[str, Any] | None = None,
    stream: str | None = None,
    title: str | None = None,
    progress: bool = False,
    integrity_key: bytes | str | None = None,
    accept_integrity_failures: bool = False,
    accept_verification_failures: Collection[str] = (),
) -> HtmlReport:
    """Write one self-contained HTML report of ``ledger`` to ``html``.

    ``verification`` and ``audit_report`` are used when given (``drawledger demo`` passes the
    ones it printed); otherwise the ledger is verified (importing decision code only from
    ``path`` and ``allow``, as ``verify`` does) and audited. ``whatifs`` adds estimates and
    sweeps; ``reward`` with ``overrides`` (and ``stream`` when the ledger has several) adds the
    estimate of that target policy. ``integrity_key`` is the key the ledger's hashes were
    written with, if any. ``progress`` shows progress bars when stderr is a terminal. The
    file is written whole or not at all. An estimate that ``estimate`` refuses (a ledger that
    fails its integrity check, a stream with verification failures) is not drawn: the page
    says why at the top, as it does for one made from failures accepted with
    ``accept_integrity_failures`` / ``accept_verification_failures``.
    """
    target = Path(os.fspath(html))
    if target.suffix.lower() not in (".html", ".htm"):
        raise ReplayError(f"the report is an HTML file: give a name ending in .html, not {target}")
    check_output(target, "the report")
    if overrides and reward is None:
        raise ReplayError("a target policy (--set) needs the reward to estimate (--reward)")
    if stream is not None and reward is None:
        raise ReplayError("a stream (--stream) chooses the stream of an estimate: give the "
                          "reward to estimate (--reward) too")  # fmt: skip
    progress = progress and sys.stderr.isatty()
    if verification is None:
        verification = verify(
            ledger, path=path, allow=allow, progress=progress, integrity_key=integrity_key
        )
    if stream is not None and stream not in verification.by_stream:
        raise ReplayError(f"no decisions of stream {stream!r}; streams in the ledger: "
                          f"{', '.join(verification.by_stream) or 'none'}")  # fmt: skip
    if audit_report is None:
        audit_report = audit(ledger, progress=progress)
    questions = list(whatifs)
    refused: list[str] = []
    if reward is not None:
        try:
            result = estimate(
                ledger,
                reward=reward,
                overrides=dict(overrides or {}),
                stream=stream,
                path=path,
                allow=allow,
                progress=progress,
                integrity_key=integrity_key,
                accept_integrity_failures=accept_integrity_failures,
                accept_verification_failures=accept_verification_failures,
            )
        except EstimateRefusedError as exc:
            refused.append(str(exc))
        else:
            questions.append(WhatIf(f"What if: {policy(result.target)}", result))
    report = HtmlReport(target, verification, audit_report, questions, refused)
    if progress:
        from rich.console import Console

        with Console(stderr=True).status("drawing the report's figures"):
            page = _page(os.fspath(ledger), report, title)
    else:
        page = _page(os.fspath(ledger), report, title)
    with replacing(target) as out:
        out.write(page.encode("utf-8"))
    return report


def _page(ledger: str, report: HtmlReport, title: str | None) -> str:
    v, a, questions = report.verification, report.audit, report.whatifs
    alerts = [f"Estimate refused: {r}" for r in report.refused]
    alerts += [f"{w.title}: {line}" for w in questions for line in w.result.alerts]
    return TEMPLATES.get_template("page.html.j2").render(
        heading=title or "drawledger report",
        ok=report.ok,
        alerts=alerts,
        ledger=ledger,
        decisions=num(v.decisions),
        generated=_dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        version=__version__,
        verify=verify_section(v),
        audit=audit_section(a, {s: c.get("decisions", 0) for s, c in v.by_stream.items()}),
        whatifs=[whatif_block(w.title, w.result, w.truth) for w in questions],
    )
