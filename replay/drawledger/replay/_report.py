"""``write_report``: one self-contained HTML file about a ledger.

The page holds the integrity and verification summary (with the reasons of every failure), the
randomization audit (its table, a histogram of the probability integral transform and observed
against declared frequencies per draw), and what-if estimates (intervals with the bias bound of
clipped IPS, the distribution of importance weights with the effective sample size, and sweep
curves with interval bands). Figures are drawn with matplotlib and embedded as SVG data URIs:
the file makes no external request, opens offline, and prints (a print stylesheet is included).
"""

from __future__ import annotations

import base64
import datetime as _dt
import html as _html
import io
import math
import os
import sys
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from drawledger import __version__
from drawledger.exceptions import ReplayError
from drawledger.replay.audit import AuditFigure, AuditReport, audit
from drawledger.replay.estimate import EstimateReport, SweepReport, estimate
from drawledger.replay.verify import VerifyReport, verify

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

__all__ = ["HtmlReport", "WhatIf", "write_report"]

# Colours that stay distinct in print and for the common colour-vision deficiencies.
OK_COLOUR = "#1b7837"
BAD_COLOUR = "#b2182b"
GREY = "#777777"
COLOURS = {"ips": "#4477aa", "snips": "#ee6677", "clipped": "#228833", "dr": "#aa3377"}
TRUTH_COLOUR = "#222222"
SWEEP_ESTIMATORS = ("snips", "dr")


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

    @property
    def ok(self) -> bool:
        """Verification and audit passed (estimate warnings do not make a report fail)."""
        return self.verification.ok and self.audit.ok

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "html": str(self.path),
            "verify": self.verification.to_dict(),
            "audit": self.audit.to_dict(),
            "whatifs": [{"title": w.title, **w.result.to_dict()} for w in self.whatifs],
        }

    def render(self) -> str:
        v, a = self.verification, self.audit
        return (
            f"wrote {self.path}: {v.decisions} decisions, {v.verified} verified, "
            f"{v.mismatched} mismatched, {v.unreplayable} unreplayable; integrity "
            f"{'ok' if v.integrity.ok else 'FAILED'}; audit "
            f"{'no alarm' if a.ok else f'{len(a.alarms)} alarm(s)'}"
        )

    def __str__(self) -> str:
        return self.render()


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
) -> HtmlReport:
    """Write one self-contained HTML report of ``ledger`` to ``html``.

    ``verification`` and ``audit_report`` are used when given (``drawledger demo`` passes the
    ones it printed); otherwise the ledger is verified (importing decision code only from
    ``path`` and ``allow``, as ``verify`` does) and audited. ``whatifs`` adds estimates and
    sweeps; ``reward`` with ``overrides`` (and ``stream`` when the ledger has several) adds the
    estimate of that target policy. ``integrity_key`` is the key the ledger's hashes were
    written with, if any. ``progress`` shows progress bars when stderr is a terminal. The
    file is written whole or not at all.
    """
    target = Path(os.fspath(html))
    if target.suffix.lower() not in (".html", ".htm"):
        raise ReplayError(f"the report is an HTML file: give a name ending in .html, not {target}")
    if not target.parent.is_dir():
        raise ReplayError(f"cannot write {target}: no directory {target.parent}")
    if overrides and reward is None:
        raise ReplayError("a target policy (--set) needs the reward to estimate (--reward)")
    progress = progress and sys.stderr.isatty()
    if verification is None:
        verification = verify(
            ledger, path=path, allow=allow, progress=progress, integrity_key=integrity_key
        )
    if audit_report is None:
        audit_report = audit(ledger, progress=progress)
    questions = list(whatifs)
    if reward is not None:
        result = estimate(
            ledger,
            reward=reward,
            overrides=dict(overrides or {}),
            stream=stream,
            path=path,
            allow=allow,
            progress=progress,
            integrity_key=integrity_key,
        )
        questions.append(WhatIf(f"What if: {_policy(result.target)}", result))
    if progress:
        from rich.console import Console

        with Console(stderr=True).status("drawing the report's figures"):
            page = _page(os.fspath(ledger), verification, audit_report, questions, title)
    else:
        page = _page(os.fspath(ledger), verification, audit_report, questions, title)
    tmp = target.with_name(f".{target.name}.tmp")
    tmp.write_text(page, encoding="utf-8")
    tmp.replace(target)
    return HtmlReport(target, verification, audit_report, questions)


# -- small helpers -----------------------------------------------------------------------------
def _e(x: Any) -> str:
    return _html.escape(str(x), quote=True)


def _num(x: Any, digits: int = 4) -> str:
    if x is None:
        return "–"
    if isinstance(x, (int, np.integer)) and not isinstance(x, bool):
        return f"{int(x):,}"
    value = float(x)
    if not math.isfinite(value):
        return "–"
    return (
        f"{value:.{digits}g}"
        if abs(value) >= 1e4 or 0 < abs(value) < 1e-3
        else f"{value:.{digits}f}"
    )


def _p(x: float | None) -> str:
    if x is None:
        return "–"
    return "< 0.0001" if x < 1e-4 else f"{x:.4f}"


def _policy(target: Mapping[str, Any]) -> str:
    if "callable" in target:
        return str(target["callable"])
    overrides = target.get("overrides") or {}
    text = ", ".join(f"{k} = {v}" for k, v in overrides.items()) or "the logging policy"
    stream = target.get("stream")
    return f"{stream} with {text}" if stream else text


_NUM = ' class="num"'


def _table(
    head: Sequence[str], rows: Iterable[Sequence[str]], numeric_from: int = 1, cls: str = ""
) -> str:
    """An HTML table; cells are already escaped HTML; columns from ``numeric_from`` align right."""
    th = "".join(f"<th{_NUM if i >= numeric_from else ''}>{_e(h)}</th>" for i, h in enumerate(head))
    body = []
    for row in rows:
        tds = "".join(f"<td{_NUM if i >= numeric_from else ''}>{c}</td>" for i, c in enumerate(row))
        body.append(f"<tr>{tds}</tr>")
    attr = f' class="{cls}"' if cls else ""
    return f"<table{attr}><thead><tr>{th}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _badge(ok: bool, yes: str, no: str) -> str:
    return f'<span class="badge {"ok" if ok else "bad"}">{_e(yes if ok else no)}</span>'


# -- figures -------------------------------------------------------------------------------------
def _figure(width: float, height: float) -> Figure:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100)
    return fig


def _style(ax: Axes) -> None:
    ax.spines["top"].set_visible(False)
    ax.spines["right"].set_visible(False)
    ax.tick_params(labelsize=8)
    ax.xaxis.label.set_fontsize(9)
    ax.yaxis.label.set_fontsize(9)
    ax.title.set_fontsize(10)


def _embed(fig: Figure, alt: str) -> str:
    """The figure as an <img> with an SVG data URI (text drawn as paths: no fonts needed)."""
    from matplotlib import rc_context

    buffer = io.BytesIO()
    with rc_context({"svg.fonttype": "path", "svg.hashsalt": "drawledger"}):
        fig.savefig(buffer, format="svg", bbox_inches="tight", metadata={"Date": None})
    data = base64.b64encode(buffer.getvalue()).decode("ascii")
    return f'<img class="fig" alt="{_e(alt)}" src="data:image/svg+xml;base64,{data}">'


def _verify_figure(v: VerifyReport) -> str:
    streams = sorted(v.by_stream)
    fig = _figure(5.0, 0.45 * len(streams) + 1.0)
    ax = fig.add_subplot()
    left = np.zeros(len(streams))
    for key, colour in (
        ("verified", OK_COLOUR),
        ("mismatched", BAD_COLOUR),
        ("unreplayable", GREY),
    ):
        counts = np.array([v.by_stream[s].get(key, 0) for s in streams], dtype=float)
        ax.barh(range(len(streams)), counts, left=left, color=colour, label=key, height=0.6)
        left += counts
    ax.set_yticks(range(len(streams)), [_plain(x) for x in streams])
    ax.invert_yaxis()
    ax.set_xlabel("decisions")
    ax.legend(fontsize=8, loc="lower right", frameon=False, ncols=3, bbox_to_anchor=(1.0, 1.0))
    _style(ax)
    return _embed(fig, "decisions by stream: verified, mismatched and unreplayable")


def _audit_figure(f: AuditFigure, edges: Sequence[float]) -> str:
    with_options = bool(f.options)
    fig = _figure(10.0 if with_options else 5.0, 2.7)
    ax = fig.add_subplot(1, 2 if with_options else 1, 1)
    counts = np.asarray(f.pit_counts, dtype=float)
    n = counts.sum()
    e = np.asarray(edges, dtype=float)
    widths = np.diff(e)
    ax.bar(
        e[:-1],
        counts,
        width=widths,
        align="edge",
        color="#88aadd",
        edgecolor="white",
        lw=0.5,
        alpha=0.85,
        zorder=2,
    )
    if n > 0:
        share = widths / (e[-1] - e[0])
        expected = n * share
        # 95% band of a bin count under uniformity (normal approximation to the binomial).
        half = 1.96 * np.sqrt(n * share * (1.0 - share))
        ax.fill_between(
            np.repeat(e, 2)[1:-1],
            np.repeat(expected - half, 2),
            np.repeat(expected + half, 2),
            color=GREY,
            alpha=0.35,
            lw=0,
            zorder=1,
        )
        ax.stairs(expected, e, color=TRUTH_COLOUR, lw=1, ls="--", zorder=3)
    ax.set_xlim(e[0], e[-1])
    ax.set_xlabel("probability integral transform")
    ax.set_ylabel("draws")
    ax.set_title("PIT histogram (flat if as declared)")
    _style(ax)
    if with_options:
        bx = fig.add_subplot(1, 2, 2)
        labels = [_option_label(o) for o in f.options]
        x = np.arange(len(labels))
        bx.bar(x - 0.2, f.observed, width=0.4, color="#4477aa", label="observed")
        bx.bar(x + 0.2, f.expected, width=0.4, color="#cccccc", label="declared")
        bx.set_xticks(
            x,
            labels,
            rotation=30 if len(labels) > 3 else 0,
            ha="right" if len(labels) > 3 else "center",
        )
        bx.set_ylabel("count")
        bx.set_title("observed vs declared")
        bx.legend(fontsize=7, frameon=False)
        _style(bx)
    fig.tight_layout()
    name = f" {f.draw!r}" if f.draw else ""
    return _embed(fig, f"audit of {f.stream} {f.kind}{name}")


def _option_label(text: str) -> str:
    label = text[1:-1] if len(text) >= 2 and text[0] == text[-1] == '"' else text
    return _plain(label if len(label) <= 18 else label[:17] + "…")


def _plain(text: str) -> str:
    """Text for a matplotlib label, shown as written (a '$' would start mathematical text)."""
    return text.replace("$", r"\$")


def _estimate_figure(r: EstimateReport, truth: float | None) -> str:
    names = list(r.estimates)
    fig = _figure(6.4, 0.5 * len(names) + 1.2)
    ax = fig.add_subplot()
    for i, name in enumerate(names):
        e = r.estimates[name]
        colour = COLOURS.get(name, GREY)
        if e["low"] is not None and e["high"] is not None:
            if name == "clipped" and e.get("bias_bound") is not None:
                lo = e["low"] + (e.get("bias_low") or 0.0)
                hi = e["high"] + (e["bias_bound"] or 0.0)
                ax.plot(
                    [lo, hi],
                    [i, i],
                    color=colour,
                    lw=9,
                    alpha=0.25,
                    solid_capstyle="butt",
                    label="interval + clipping bias bound",
                )
            ax.plot([e["low"], e["high"]], [i, i], color=colour, lw=3, solid_capstyle="butt")
        if e["value"] is not None:
            ax.plot([e["value"]], [i], "o", color=colour, ms=6)
    if r.logging_value is not None:
        ax.axvline(r.logging_value, color=GREY, ls=":", lw=1.2, label="logging policy (observed)")
    if truth is not None:
        ax.axvline(truth, color=TRUTH_COLOUR, ls="--", lw=1.2, label="true value (simulator)")
    ax.set_yticks(range(len(names)), names)
    ax.set_ylim(len(names) - 0.5, -0.5)
    level = r.settings.get("level", 0.95)
    reward = _plain(str(r.target.get("reward", "reward")))
    ax.set_xlabel(f"mean {reward} with {level:.0%} intervals")
    ax.legend(fontsize=7, frameon=False, loc="upper center", bbox_to_anchor=(0.5, -0.35), ncols=3)
    _style(ax)
    return _embed(fig, f"estimates of {_policy(r.target)}")


def _weights_figure(r: EstimateReport) -> str:
    w = np.asarray(r.weights, dtype=float)
    fig = _figure(6.4, 2.6)
    ax = fig.add_subplot()
    positive = w[w > 0]
    if positive.size:
        spread = positive.max() / positive.min()
        if spread > 50:
            bins = np.geomspace(positive.min(), positive.max(), 40)
            ax.set_xscale("log")
        else:
            bins = np.linspace(0.0, positive.max() * 1.02, 40)
        ax.hist(positive, bins=bins.tolist(), color="#88aadd", edgecolor="white", lw=0.4)
    ax.axvline(1.0, color=GREY, ls=":", lw=1)
    d = r.diagnostics
    zero = int((w == 0).sum())
    ax.set_title(
        f"importance weights: ESS {d['ess']:.0f} of {w.size} (Kish), max {d['max_weight']:.3g}"
        + (f", {zero} zero" if zero else ""),
    )
    ax.set_xlabel("weight  π_target(a|x) / π_logging(a|x)")
    ax.set_ylabel("records")
    _style(ax)
    return _embed(fig, "distribution of importance weights")


def _sweep_figure(s: SweepReport, truth: Sequence[float] | None) -> str:
    fig = _figure(6.4, 3.4)
    ax = fig.add_subplot()
    x = np.array([float(p["value"]) for p in s.points])
    shown = [n for n in SWEEP_ESTIMATORS if s.points and n in s.points[0]["estimates"]]
    for name in shown:
        es = [p["estimates"][name] for p in s.points]
        v = np.array([np.nan if e["value"] is None else e["value"] for e in es])
        lo = np.array([np.nan if e["low"] is None else e["low"] for e in es])
        hi = np.array([np.nan if e["high"] is None else e["high"] for e in es])
        colour = COLOURS.get(name, GREY)
        ax.fill_between(x, lo, hi, color=colour, alpha=0.18, lw=0)
        ax.plot(
            x, v, marker="o", ms=3.5, color=colour, label=f"{name} ({s.settings['level']:.0%} band)"
        )
    base = s.baseline.get("estimates", {}).get("ips", {}).get("value")
    if s.baseline.get("policy") == "logging" and base is not None:
        ax.axhline(base, color=GREY, ls=":", lw=1.2, label="logging policy (observed)")
    if truth is not None:
        ax.plot(x, list(truth), color=TRUTH_COLOUR, ls="--", lw=1.2, label="true value (simulator)")
    ax.set_xlabel(_plain(s.param))
    ax.set_ylabel(f"mean {_plain(str(s.settings.get('reward', 'reward')))}")
    ax.legend(fontsize=7, frameon=False)
    _style(ax)
    return _embed(fig, f"sweep of {s.param}")


# -- sections ------------------------------------------------------------------------------------
def _verify_section(v: VerifyReport) -> str:
    i = v.integrity
    summary = _table(
        ("", "decisions"),
        [
            ("decisions", _num(v.decisions)),
            ("verified", _num(v.verified)),
            ("mismatched", _num(v.mismatched)),
            ("unreplayable", _num(v.unreplayable)),
        ],
        cls="narrow",
    )
    streams = _table(
        ("stream", "decisions", "verified", "mismatched", "unreplayable"),
        [
            (
                _e(s),
                *(
                    _num(c.get(k, 0))
                    for k in ("decisions", "verified", "mismatched", "unreplayable")
                ),
            )
            for s, c in sorted(v.by_stream.items())
        ],
    )
    problems = (
        "gaps",
        "broken_links",
        "duplicates",
        "bad_hashes",
        "orphan_draws",
        "orphan_outcomes",
    )
    d = i.to_dict()
    integrity = _table(
        ("check", "count", "examples"),
        [
            (
                _e(p.replace("_", " ")),
                _num(d.get(p, 0)),
                _e(", ".join(d.get("examples", {}).get(p, []))),
            )
            for p in problems
        ],
        numeric_from=1,
    )
    if v.by_reason:
        reasons = _table(
            ("reason", "decisions", "first examples"),
            [
                (
                    f"<code>{_e(r)}</code>",
                    _num(n),
                    "<br>".join(
                        f"<code>{_e(did)}</code>: {_e(text)}"
                        for did, text in v.examples.get(r, [])[:3]
                    ),
                )
                for r, n in v.by_reason.items()
            ],
        )
    else:
        reasons = "<p>No decision failed: every replay matched its record.</p>"
    keyed = "keyed" if i.keyed else "unkeyed"
    return f"""
<section id="verify">
<h2>Integrity and verification {_badge(v.ok, "passed", "FAILED")}</h2>
<p>Every decision was re-run from its recorded seed, inputs and policy parameters, and every
draw, probability and action compared with the record. The integrity check re-hashed every
record ({keyed} hashes) and walked the chain of each of the {_num(i.writers)} writers.</p>
<div class="grid">
<div>{summary}</div>
<div>{_verify_figure(v) if v.by_stream else ""}</div>
</div>
<h3>By stream</h3>
{streams}
<h3>Reasons</h3>
{reasons}
<h3>Integrity {_badge(i.ok, "intact", "FAILED")}</h3>
<p>{_num(i.decisions)} decisions and {_num(i.outcomes)} outcomes. Orphan outcomes (outcomes of
decisions kept elsewhere) are listed but do not fail the check.</p>
{integrity}
</section>"""


def _audit_section(a: AuditReport) -> str:
    if not a.tests:
        return f"""
<section id="audit"><h2>Randomization audit</h2>
<p>No draws to audit ({_num(a.decisions)} decisions).</p></section>"""
    from drawledger.replay.audit import TEST_LABELS

    rows = []
    for t in a.tests:
        draw = "" if t.kind is None else t.kind + (f" '{t.draw}'" if t.draw else "")
        label = TEST_LABELS.get(t.test, t.test) + (f" {t.field}" if t.field else "")
        verdict_cls = "bad" if t.alarm else ("dim" if t.verdict == "not enough data" else "ok")
        rows.append(
            (
                _e(t.stream),
                _e(draw),
                _e(label),
                _num(t.n),
                _num(t.statistic),
                _p(t.p_value),
                _p(t.p_adjusted),
                f'<span class="verdict {verdict_cls}">{_e(t.verdict)}</span>',
            )
        )
    table = _table(
        ("stream", "draw", "test", "n", "statistic", "p", "p (Holm)", "verdict"),
        rows,
        numeric_from=3,
        cls="audit",
    )
    figures = []
    for f in a.figures:
        name = f" '{f.draw}'" if f.draw else ""
        wide = ' class="wide"' if f.options else ""
        figures.append(
            f"<figure{wide}><figcaption><b>{_e(f.stream)}</b> · {_e(f.kind)}{_e(name)} · "
            f"{_num(f.n)} draws</figcaption>{_audit_figure(f, a.bin_edges)}</figure>"
        )
    return f"""
<section id="audit">
<h2>Randomization audit {_badge(a.ok, "no alarm", f"{len(a.alarms)} alarm(s)")}</h2>
<p>Each stream's draws are tested against their declared distributions. An alarm fires when a
p-value, after Holm's correction across the tests of a stream, falls below {a.alpha:g}. An
audit can reveal that randomization did not happen as declared; it cannot prove that it did.
In the histograms the dashed line is the count expected under the declaration and the grey
band its 95% range per bin.</p>
{table}
<div class="figs">{"".join(figures)}</div>
</section>"""


def _estimate_block(w: WhatIf, r: EstimateReport) -> str:
    truth = w.truth if isinstance(w.truth, (int, float)) else None
    level = r.settings.get("level", 0.95)
    rows = []
    for name, e in r.estimates.items():
        d = r.difference.get(name, {})
        bias = _num(e.get("bias_bound")) if name == "clipped" else ""
        covered = ""
        if truth is not None and e["low"] is not None and e["high"] is not None:
            covered = "yes" if e["low"] <= truth <= e["high"] else "no"
        rows.append(
            (
                f"<b>{_e(name)}</b>",
                _num(e["value"]),
                f"[{_num(e['low'])}, {_num(e['high'])}]",
                bias,
                _num(d.get("value")),
                f"[{_num(d.get('low'))}, {_num(d.get('high'))}]",
                *((_num(truth), covered) if truth is not None else ()),
            )
        )
    head = [
        "estimator",
        "estimate",
        f"{level:.0%} interval",
        "bias bound",
        "minus logging",
        "interval",
    ] + (["true value", "covered"] if truth is not None else [])
    d = r.diagnostics
    diag = _table(
        ("diagnostic", "value"),
        [
            ("records used", _num(r.n)),
            ("effective sample size (Kish)", _num(None if d["ess"] is None else round(d["ess"]))),
            ("largest weight", _num(d["max_weight"])),
            ("support deficit", _num(d.get("support_deficit"))),
            ("logging policy mean (observed)", _num(r.logging_value)),
        ],
        cls="narrow",
    )
    return f"""
<h3>{_e(w.title)} {_badge(r.ok, "diagnostics ok", "read with care")}</h3>
<p>Target: {_e(_policy(r.target))}; reward <code>{_e(r.target.get("reward", ""))}</code>;
{_e(r.settings.get("interval", ""))} intervals; clipping cap {r.settings.get("clip", 0):g}.</p>
{_table(head, rows)}
<div class="grid">
<div>{_estimate_figure(r, truth)}</div>
<div>{_weights_figure(r)}{diag}</div>
</div>
{_warnings(r.warnings)}"""


def _sweep_block(w: WhatIf, s: SweepReport) -> str:
    truth = None if w.truth is None or isinstance(w.truth, (int, float)) else list(w.truth)
    shown = [n for n in SWEEP_ESTIMATORS if s.points and n in s.points[0]["estimates"]]
    rows = []
    for i, p in enumerate(s.points):
        cells = [_e(f"{p['value']:g}" if isinstance(p["value"], float) else p["value"])]
        for name in shown:
            e = p["estimates"][name]
            cells += [_num(e["value"]), f"[{_num(e['low'])}, {_num(e['high'])}]"]
        if truth is not None:
            cells.append(_num(truth[i]))
        cells += [f"{float(p['diagnostics']['ess']):,.0f}", _num(p["diagnostics"]["max_weight"])]
        rows.append(cells)
    head = [s.param]
    for name in shown:
        head += [name, "interval"]
    head += (["true value"] if truth is not None else []) + ["ESS", "max weight"]
    return f"""
<h3>{_e(w.title)} {_badge(s.ok, "diagnostics ok", "read with care")}</h3>
<p>Stream {_e(s.settings.get("stream", ""))}; {_num(s.n)} verified records; each point is the
target policy with <code>{_e(s.param)}</code> set to that value. The band is the
{s.settings.get("level", 0.95):.0%} interval; it widens where the target moves away from the
logging policy and the effective sample size shrinks.</p>
<div class="sweep">{_sweep_figure(s, truth)}</div>
{_table(head, rows)}
{_warnings(_grouped(s.warnings, s.param))}"""


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


def _warnings(warnings: Sequence[str]) -> str:
    if not warnings:
        return ""
    items = "".join(f"<li>{_e(w)}</li>" for w in warnings)
    return f'<ul class="warnings">{items}</ul>'


def _whatif_section(questions: Sequence[WhatIf]) -> str:
    blocks: list[str] = []
    render: dict[type, Callable[[WhatIf, Any], str]] = {
        EstimateReport: _estimate_block,
        SweepReport: _sweep_block,
    }
    for w in questions:
        blocks.append(render[type(w.result)](w, w.result))
    if not blocks:
        body = (
            "<p>No what-if question was asked. Add one with "
            "<code>drawledger report LEDGER --html FILE --reward NAME --set K=V --stream S</code>."
            "</p>"
        )
    else:
        body = "".join(blocks)
    return f"""
<section id="whatif">
<h2>What-if estimates</h2>
<p>Importance-sampling estimates of the mean reward the target policy would have achieved, from
verified records only. They assume overlap (the logging policy could take every action the
target takes), no interference between units, and a logging policy that was stable while the
data were collected; see <code>docs/estimators.md</code> for when not to trust them.</p>
{body}
</section>"""


# Nothing may load from anywhere: images are data URIs and the only style is inline.
CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"
CSS = """
:root { --ink: #1d1d1f; --muted: #5f6368; --line: #d9dce1; --ok: #1b7837; --bad: #b2182b; }
* { box-sizing: border-box; }
body { font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif;
       color: var(--ink); margin: 0; background: #fafafa; }
main { max-width: 1180px; margin: 0 auto; padding: 1.5rem 1.5rem 3rem; background: #fff; }
header { border-bottom: 2px solid var(--ink); margin-bottom: 1rem; }
h1 { font-size: 1.6rem; margin: 0 0 .25rem; }
h2 { font-size: 1.3rem; margin: 2rem 0 .5rem; border-bottom: 1px solid var(--line); }
h3 { font-size: 1.05rem; margin: 1.4rem 0 .4rem; }
p { max-width: 75ch; }
.meta { color: var(--muted); font-size: .9rem; margin: 0 0 .8rem; }
nav a { margin-right: 1rem; }
code { font: .85em ui-monospace, "DejaVu Sans Mono", monospace; background: #f1f3f4;
       padding: 0 .25em; border-radius: 3px; }
table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .88rem;
        font-variant-numeric: tabular-nums; }
th, td { padding: .25rem .6rem; border-bottom: 1px solid var(--line); text-align: left;
         vertical-align: top; }
th { background: #f1f3f4; font-weight: 600; }
td.num, th.num { text-align: right; white-space: nowrap; }
tbody tr:nth-child(even) { background: #fafbfc; }
table.narrow { min-width: 16rem; }
table.audit { font-size: .8rem; }
table.audit td:nth-child(-n+2) { white-space: nowrap; }
.badge { display: inline-block; font-size: .75rem; font-weight: 600; padding: .1rem .5rem;
         border-radius: 1rem; vertical-align: middle; color: #fff; }
.badge.ok { background: var(--ok); }
.badge.bad { background: var(--bad); }
.verdict.ok { color: var(--ok); }
.verdict.bad { color: var(--bad); font-weight: 700; }
.verdict.dim { color: var(--muted); }
.grid { display: grid; grid-template-columns: repeat(auto-fit, minmax(420px, 1fr)); gap: 1rem;
        align-items: start; }
.figs { display: grid; grid-template-columns: repeat(auto-fit, minmax(480px, 1fr)); gap: 1rem; }
figure { margin: 0; border: 1px solid var(--line); border-radius: 6px; padding: .5rem; }
figure.wide { grid-column: 1 / -1; }
figcaption { font-size: .85rem; color: var(--muted); margin-bottom: .25rem; }
img.fig { display: block; width: 100%; height: auto; }
.sweep { max-width: 760px; }
ul.warnings { color: #8a4b00; font-size: .9rem; }
footer { margin-top: 2.5rem; border-top: 1px solid var(--line); color: var(--muted);
         font-size: .85rem; }
@media (max-width: 700px) { .grid, .figs { grid-template-columns: 1fr; } main { padding: 1rem; } }
@media print {
  @page { size: A4; margin: 14mm 12mm; }
  body { background: #fff; font-size: 10.5pt; }
  main { max-width: none; padding: 0; }
  nav { display: none; }
  h2 { break-after: avoid; page-break-after: avoid; }
  h3 { break-after: avoid; }
  figure, table, .grid > div, img.fig { break-inside: avoid; page-break-inside: avoid; }
  .grid, .figs { grid-template-columns: 1fr; }
  table, table.audit { font-size: 8.5pt; }
  img.fig { max-width: 15cm; }
  .badge, th, tbody tr:nth-child(even) { -webkit-print-color-adjust: exact;
                                          print-color-adjust: exact; }
  a { color: inherit; text-decoration: none; }
}
"""


def _page(
    ledger: str, v: VerifyReport, a: AuditReport, questions: Sequence[WhatIf], title: str | None
) -> str:
    heading = title or "drawledger report"
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    overall = _badge(v.ok and a.ok, "checks passed", "problems found")
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta http-equiv="Content-Security-Policy" content="{CSP}">
<title>{_e(heading)}</title>
<style>{CSS}</style>
</head>
<body>
<main>
<header>
<h1>{_e(heading)} {overall}</h1>
<p class="meta">Ledger <code>{_e(ledger)}</code> · {_num(v.decisions)} decisions ·
generated {_e(now)} by drawledger {_e(__version__)}</p>
<nav><a href="#verify">Verification</a><a href="#audit">Audit</a><a href="#whatif">What-if</a></nav>
</header>
{_verify_section(v)}
{_audit_section(a)}
{_whatif_section(questions)}
<footer>
<p>Randomized decisions in a product are experiments on people: they may need consent, ethics
review and compliance with privacy and consumer-protection law, and recorded inputs may be
personal data. Defer to local rules and qualified review.</p>
</footer>
</main>
</body>
</html>
"""
