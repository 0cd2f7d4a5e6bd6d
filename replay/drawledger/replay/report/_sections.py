"""What each section of the report shows, as plain text ready for the templates.

Every value here is text as a reader sees it (numbers already formatted); the templates lay it
out and escape it. Nothing here is markup.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, ClassVar

from drawledger.replay.audit import (
    AS_DECLARED,
    NOT_AS_DECLARED,
    NOT_ENOUGH_DATA,
    TEST_LABELS,
    AuditReport,
    AuditTest,
)
from drawledger.replay.estimate import (
    EstimateReport,
    SweepReport,
    interval_label,
    other_versions,
)
from drawledger.replay.integrity import PROBLEMS
from drawledger.replay.report._figures import (
    Image,
    audit_figure,
    estimate_figure,
    sweep_estimators,
    sweep_figure,
    verify_figure,
    weights_figure,
)
from drawledger.replay.report._format import num, p_value, policy
from drawledger.replay.verify import VerifyReport

__all__ = [
    "AuditPanel",
    "AuditRow",
    "AuditSection",
    "EstimateBlock",
    "Reason",
    "SweepBlock",
    "Table",
    "VerifySection",
    "audit_section",
    "full_streams",
    "verify_section",
    "whatif_block",
]

STREAM_COUNTS = ("decisions", "verified", "mismatched", "unreplayable")

# The report shows at most this many streams in full (every test, and figures); the others get
# one row each in a compact table, so that the page's size and the time to draw it stay bounded
# however many streams a ledger has. Streams with an alarm come first, then the largest.
FULL_STREAMS = 20

# Figures of at most this many draws per stream shown in full.
PANELS_PER_STREAM = 6

# The style of each verdict on the page.
VERDICT_CLASSES = {AS_DECLARED: "ok", NOT_AS_DECLARED: "bad", NOT_ENOUGH_DATA: "dim"}


@dataclass(frozen=True)
class Table:
    """A table of text cells; the columns from ``numeric_from`` on align right."""

    head: Sequence[str]
    rows: Sequence[Sequence[str]]
    numeric_from: int = 1
    cls: str = ""


@dataclass(frozen=True)
class Reason:
    """One reason decisions failed verification, with (decision id, text) of the first few."""

    code: str
    decisions: str
    examples: Sequence[tuple[str, str]]


@dataclass(frozen=True)
class VerifySection:
    ok: bool
    keyed: str
    writers: str
    summary: Table
    figure: Image | None
    streams: Table
    reasons: Sequence[Reason]
    integrity_ok: bool
    decisions: str
    outcomes: str
    integrity: Table


@dataclass(frozen=True)
class AuditRow:
    stream: str
    draw: str
    test: str
    n: str
    statistic: str
    p: str
    p_adjusted: str
    verdict: str
    verdict_class: str


@dataclass(frozen=True)
class AuditPanel:
    """The figure of one audited draw with its caption."""

    stream: str
    kind: str
    draw: str
    n: str
    wide: bool
    image: Image


@dataclass(frozen=True)
class AuditSection:
    """The audit; ``others`` is the compact table of the streams not shown in full (one row
    each), ``note`` says how many streams are shown in full and how many draws have no figure
    (empty when everything is shown)."""

    ok: bool
    verdict: str
    alpha: str
    decisions: str
    rows: Sequence[AuditRow]
    panels: Sequence[AuditPanel]
    others: Table | None = None
    note: str = ""
    untested: Sequence[str] = ()  # the draws too rare to test, one line each
    classes: ClassVar[dict[str, str]] = VERDICT_CLASSES


@dataclass(frozen=True)
class EstimateBlock:
    """One what-if estimate; ``template`` is the template that lays it out."""

    template: ClassVar[str] = "estimate.html.j2"
    title: str
    ok: bool
    target: str
    reward: str
    interval: str
    clip: str
    table: Table
    figure: Image
    weights: Image
    diagnostics: Table
    warnings: Sequence[str]
    alerts: Sequence[str] = ()
    versions: Table | None = None  # when some record was logged by another code version


@dataclass(frozen=True)
class SweepBlock:
    """One what-if sweep; ``template`` is the template that lays it out."""

    template: ClassVar[str] = "sweep.html.j2"
    title: str
    ok: bool
    stream: str
    n: str
    param: str
    level: str
    figure: Image
    table: Table
    warnings: Sequence[str]
    alerts: Sequence[str] = ()
    versions: Table | None = None  # when some record was logged by another code version


def verify_section(v: VerifyReport) -> VerifySection:
    i = v.integrity
    summary = Table(
        ("", "decisions"),
        [
            ("decisions", num(v.decisions)),
            ("verified", num(v.verified)),
            ("mismatched", num(v.mismatched)),
            ("unreplayable", num(v.unreplayable)),
        ],
        cls="narrow",
    )
    streams = Table(
        ("stream", *STREAM_COUNTS),
        [(s, *(num(c.get(k, 0)) for k in STREAM_COUNTS)) for s, c in sorted(v.by_stream.items())],
    )
    d = i.to_dict()
    integrity = Table(
        ("check", "count", "examples"),
        [
            (
                p.replace("_", " "),
                num(d.get(p, 0)),
                ", ".join(d.get("examples", {}).get(p, [])),
            )
            for p in PROBLEMS
        ]
        + [(f"{what} (not a failure)", num(n), "") for what, n in i.uncommitted()],
    )
    reasons = [Reason(r, num(n), v.examples.get(r, [])[:3]) for r, n in v.by_reason.items()]
    return VerifySection(
        ok=v.ok,
        keyed="keyed" if i.keyed else "unkeyed",
        writers=num(i.writers),
        summary=summary,
        figure=verify_figure(v, FULL_STREAMS) if v.by_stream else None,
        streams=streams,
        reasons=reasons,
        integrity_ok=i.ok,
        decisions=num(i.decisions),
        outcomes=num(i.outcomes),
        integrity=integrity,
    )


def full_streams(a: AuditReport, decisions: Mapping[str, int]) -> list[str]:
    """The streams shown in full, at most ``FULL_STREAMS``: those with an alarm first, then
    those with the most decisions (``decisions`` counts them by stream), then by name."""
    alarmed = {t.stream for t in a.tests if t.alarm}
    streams = {t.stream for t in a.tests}
    ranked = sorted(streams, key=lambda s: (s not in alarmed, -decisions.get(s, 0), s))
    return ranked[:FULL_STREAMS]


def audit_section(a: AuditReport, decisions: Mapping[str, int] | None = None) -> AuditSection:
    """The audit's rows and figures for the streams shown in full, a compact table for the
    rest; ``decisions`` counts decisions by stream (verify's ``by_stream``) to rank them."""
    counts = dict(decisions or {})
    full = set(full_streams(a, counts))
    rows = []
    for t in a.tests:
        if t.stream not in full:
            continue
        draw = "" if t.kind is None else t.kind + (f" '{t.draw}'" if t.draw else "")
        label = TEST_LABELS.get(t.test, t.test) + (f" {t.field}" if t.field else "")
        verdict_class = "bad" if t.alarm else VERDICT_CLASSES.get(t.verdict, "ok")
        rows.append(
            AuditRow(
                t.stream,
                draw,
                label,
                num(t.n),
                num(t.statistic),
                p_value(t.p_value),
                p_value(t.p_adjusted),
                t.verdict,
                verdict_class,
            )
        )
    per_stream: Counter[str] = Counter()
    panels = []
    undrawn = 0
    for f in a.figures:
        if f.stream not in full:
            continue
        if per_stream[f.stream] >= PANELS_PER_STREAM:
            undrawn += 1
            continue
        per_stream[f.stream] += 1
        draw = f" '{f.draw}'" if f.draw else ""
        image = audit_figure(f, a.bin_edges)
        panels.append(AuditPanel(f.stream, f.kind, draw, num(f.n), bool(f.options), image))
    others = _other_streams(a, full, counts)
    streams = len(full) + (len(others.rows) if others else 0)
    notes = []
    if others is not None:
        notes.append(f"{num(streams)} streams: the {num(len(full))} with alarms or the most "
                     f"decisions are shown in full (tests and figures); the other "
                     f"{num(len(others.rows))} have one row each in a compact table.")  # fmt: skip
    if undrawn:
        notes.append(f"Figures are drawn for at most {PANELS_PER_STREAM} draws per stream; "
                     f"{num(undrawn)} more draws are in the table only.")  # fmt: skip
    note = " ".join(notes)
    untested = [f"{stream}, {kind}{f' {draw!r}' if draw else ''}: {num(n)} draws, too few for "
                "any test of randomness" for stream, kind, draw, n in a.untested]  # fmt: skip
    return AuditSection(
        a.ok, a.verdict, f"{a.alpha:g}", num(a.decisions), rows, panels, others, note, untested
    )


def _other_streams(a: AuditReport, full: set[str], decisions: Mapping[str, int]) -> Table | None:
    """One row per stream not shown in full: decisions, tests, alarms, smallest p, verdict."""
    tests: dict[str, list[AuditTest]] = {}
    for t in a.tests:
        if t.stream not in full:
            tests.setdefault(t.stream, []).append(t)
    if not tests:
        return None
    rows = []
    untested = {u[0] for u in a.untested}  # a draw of the stream could not be tested
    for stream in sorted(tests, key=lambda s: (-decisions.get(s, 0), s)):
        ts = tests[stream]
        alarms = sum(t.alarm for t in ts)
        ps = [t.p_adjusted for t in ts if t.p_adjusted is not None]
        verdicts = {t.verdict for t in ts}
        verdict = NOT_AS_DECLARED if alarms else (
            AS_DECLARED if AS_DECLARED in verdicts and stream not in untested
            else NOT_ENOUGH_DATA)  # fmt: skip
        rows.append((stream, num(decisions.get(stream, 0)), num(len(ts)), num(alarms),
                     p_value(min(ps)) if ps else num(None), verdict))  # fmt: skip
    head = ("stream", "decisions", "tests", "alarms", "smallest p (Holm)", "verdict")
    return Table(head, rows, cls="others")


def whatif_block(
    title: str, result: EstimateReport | SweepReport, truth: float | Sequence[float] | None
) -> EstimateBlock | SweepBlock:
    """The block of one what-if question; ``truth`` is its known true value or values."""
    if isinstance(result, EstimateReport):
        return _estimate_block(title, result, truth if isinstance(truth, (int, float)) else None)
    return _sweep_block(
        title, result, None if truth is None or isinstance(truth, (int, float)) else list(truth)
    )


def _estimate_block(title: str, r: EstimateReport, truth: float | None) -> EstimateBlock:
    level = r.settings.get("level", 0.95)
    rows = []
    for name, e in r.estimates.items():
        d = r.difference.get(name, {})
        outer = ""
        if name == "clipped":
            outer = f"[{num(e.get('outer_low'))}, {num(e.get('outer_high'))}]"
        covered = ""
        if truth is not None and e["low"] is not None and e["high"] is not None:
            covered = "yes" if e["low"] <= truth <= e["high"] else "no"
        rows.append(
            (
                name,
                num(e["value"]),
                f"[{num(e['low'])}, {num(e['high'])}]",
                outer,
                num(d.get("value")),
                f"[{num(d.get('low'))}, {num(d.get('high'))}]",
                *((num(truth), covered) if truth is not None else ()),
            )
        )
    head = [
        "estimator",
        "estimate",
        f"{level:.0%} interval",
        "outer band",
        "difference vs logging"
        if r.baseline.get("policy") == "logging"
        else "difference vs baseline",
        "difference interval",
    ] + (["true value", "covered"] if truth is not None else [])
    d = r.diagnostics
    diagnostics = Table(
        ("diagnostic", "value"),
        [
            ("records used", num(r.n)),
            ("effective sample size (Kish)", num(None if d["ess"] is None else round(d["ess"]))),
            ("largest weight", num(d["max_weight"])),
            ("largest weight / sum of weights", num(d.get("max_weight_share"))),
            ("support deficit", num(d.get("support_deficit"))),
            ("logging policy mean (observed)", num(r.logging_value)),
            *_filled(r),
        ],
        cls="narrow",
    )
    return EstimateBlock(
        title=title,
        ok=r.ok,
        target=policy(r.target),
        reward=str(r.target.get("reward", "")),
        interval=interval_label(r.settings),
        clip=f"{r.settings.get('clip', 0):g}",
        table=Table(head, rows),
        figure=estimate_figure(r, truth),
        weights=weights_figure(r),
        diagnostics=diagnostics,
        warnings=r.warnings,
        alerts=r.alerts,
        versions=_versions(r.versions),
    )


def _filled(r: EstimateReport) -> list[tuple[str, str]]:
    """The diagnostic of the records whose reward was missing and filled in, if any."""
    m = r.missing_rewards
    if not m.get("filled"):
        return []
    return [(f"records without the reward (counted as {m['value']:g})",
             f"{num(m['filled'])} ({m['share']:.1%})")]  # fmt: skip


def _sweep_block(title: str, s: SweepReport, truth: Sequence[float] | None) -> SweepBlock:
    shown = sweep_estimators(s)
    rows = []
    for i, p in enumerate(s.points):
        cells = [f"{p['value']:g}" if isinstance(p["value"], float) else str(p["value"])]
        for name in shown:
            e = p["estimates"][name]
            cells += [num(e["value"]), f"[{num(e['low'])}, {num(e['high'])}]"]
        if truth is not None:
            cells.append(num(truth[i]))
        cells += [f"{float(p['diagnostics']['ess']):,.0f}", num(p["diagnostics"]["max_weight"])]
        rows.append(cells)
    head = [s.param]
    for name in shown:
        head += [name, "interval"]
    head += (["true value"] if truth is not None else []) + ["ESS", "max weight"]
    return SweepBlock(
        title=title,
        ok=s.ok,
        stream=str(s.settings.get("stream", "")),
        n=num(s.n),
        param=s.param,
        level=f"{s.settings.get('level', 0.95):.0%}",
        figure=sweep_figure(s, truth),
        table=Table(head, rows),
        warnings=_grouped(s.warnings, s.param),
        alerts=s.alerts,
        versions=_versions(s.versions),
    )


def _versions(versions: Sequence[Mapping[str, Any]]) -> Table | None:
    """The code versions of a what-if's records, when some record was logged by another
    version than the current code (None otherwise)."""
    if not other_versions(versions):
        return None
    rows = [(str(v["fn"]), str(v["identity"]), str(v["logged_under"]), num(v["decisions"]),
             num(v["used"])) for v in versions]  # fmt: skip
    return Table(("function", "identity", "logged under", "decisions", "used"), rows,
                 numeric_from=3)  # fmt: skip


def _grouped(warnings: Sequence[str], param: str) -> list[str]:
    """Sweep warnings that repeat for several values, said once with the list of values."""
    by_text: dict[str, list[str]] = {}
    for w in warnings:
        head, sep, text = w.partition(": ")
        if sep and head.startswith(f"{param}="):
            by_text.setdefault(text, []).append(head.removeprefix(f"{param}="))
        else:
            by_text.setdefault(w, [])
    return [f"{param} = {', '.join(v)}: {t}" if v else t for t, v in by_text.items()]
