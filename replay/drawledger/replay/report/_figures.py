"""The report's figures, drawn with matplotlib and kept as SVG data URIs.

Text in the SVG is drawn as paths (no fonts needed) and the SVG carries no date, so the same
data give the same figure. Labels that come from a ledger are shown as written (a '$' would
otherwise start matplotlib's mathematical text), with control and bidirectional characters as
escapes and cut to ``LABEL_LIMIT`` characters.
"""

from __future__ import annotations

import base64
import io
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from drawledger._text import clipped
from drawledger.replay.audit import AuditFigure
from drawledger.replay.estimate import EstimateReport, SweepReport
from drawledger.replay.report._format import policy
from drawledger.replay.verify import VerifyReport

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.axis import Axis
    from matplotlib.figure import Figure

__all__ = [
    "Image",
    "audit_chart",
    "audit_figure",
    "estimate_chart",
    "estimate_figure",
    "sweep_chart",
    "sweep_estimators",
    "sweep_figure",
    "verify_figure",
    "weights_figure",
]

# Colours that stay distinct in print and for the common colour-vision deficiencies.
OK_COLOUR = "#1b7837"
BAD_COLOUR = "#b2182b"
GREY = "#777777"
COLOURS = {"ips": "#4477aa", "snips": "#ee6677", "clipped": "#228833", "dr": "#aa3377"}
TRUTH_COLOUR = "#222222"
SWEEP_ESTIMATORS = ("snips", "dr")

# Labels in figures are cut to this many characters, alternative texts to ALT_LIMIT; a bar
# chart of options shows at most MAX_OPTIONS bars (the rest summed into one).
LABEL_LIMIT = 40
ALT_LIMIT = 200
MAX_OPTIONS = 24


@dataclass(frozen=True)
class Image:
    """A figure for an ``<img>``: its alternative text and its ``data:`` URI."""

    alt: str
    src: str


def sweep_estimators(s: SweepReport) -> list[str]:
    """The estimators a sweep's figure and table show, of those its points have."""
    return [n for n in SWEEP_ESTIMATORS if s.points and n in s.points[0]["estimates"]]


def _figure(width: float, height: float) -> Figure:
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), dpi=100)


def _style(ax: Axes) -> None:
    ax.spines["top"].set_visible(False)
    ax.spines["right"].set_visible(False)
    ax.tick_params(labelsize=8)
    ax.xaxis.label.set_fontsize(9)
    ax.yaxis.label.set_fontsize(9)
    ax.title.set_fontsize(10)


def _embed(fig: Figure, alt: str) -> Image:
    """The figure as an SVG data URI (text drawn as paths: no fonts needed)."""
    from matplotlib import rc_context

    buffer = io.BytesIO()
    with rc_context({"svg.fonttype": "path", "svg.hashsalt": "drawledger"}):
        fig.savefig(buffer, format="svg", bbox_inches="tight", metadata={"Date": None})
    data = base64.b64encode(buffer.getvalue()).decode("ascii")
    return Image(alt, f"data:image/svg+xml;base64,{data}")


def _plain_log_ticks(axis: Axis) -> None:
    """Tick labels of a log axis as plain numbers (0.1, 10, 1e+04), not mathematical text:
    mathtext loads fallback fonts, and a stale font cache then fills stderr with warnings."""
    from matplotlib.ticker import FuncFormatter, NullFormatter

    axis.set_major_formatter(FuncFormatter(lambda value, _pos: f"{value:g}"))
    axis.set_minor_formatter(NullFormatter())


def _plain(text: str, limit: int = LABEL_LIMIT) -> str:
    """Text for a matplotlib label, shown as written (a '$' would start mathematical text),
    control and bidirectional characters as escapes, cut to ``limit`` characters."""
    return clipped(text, limit).replace("$", r"\$")


def _alt(text: str) -> str:
    """Alternative text of a figure: control characters as escapes, at most ``ALT_LIMIT``."""
    return clipped(text, ALT_LIMIT)


def _option_label(text: str) -> str:
    label = text[1:-1] if len(text) >= 2 and text[0] == text[-1] == '"' else text
    return _plain(label, 18)


def _top_options(f: AuditFigure) -> tuple[list[str], list[float], list[float]]:
    """The options of a figure, the ``MAX_OPTIONS - 1`` most expected ones and the rest summed
    into one bar, so that a draw with thousands of options still gives a readable figure."""
    labels = [_option_label(o) for o in f.options]
    observed, expected = list(f.observed), list(f.expected)
    if len(labels) <= MAX_OPTIONS:
        return labels, observed, expected
    keep = sorted(range(len(labels)), key=lambda i: -expected[i])[: MAX_OPTIONS - 1]
    rest = sorted(set(range(len(labels))) - set(keep))
    return (
        [labels[i] for i in keep] + [f"{len(rest)} others"],
        [observed[i] for i in keep] + [sum(observed[i] for i in rest)],
        [expected[i] for i in keep] + [sum(expected[i] for i in rest)],
    )


def verify_figure(v: VerifyReport, limit: int) -> Image:
    """Decisions of each stream, of the ``limit`` streams with the most: verified, mismatched
    and unreplayable, as stacked bars."""
    largest = sorted(v.by_stream, key=lambda s: (-v.by_stream[s].get("decisions", 0), s))
    streams = sorted(largest[:limit])
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
    shown = f"the {len(streams)} largest streams" if len(v.by_stream) > limit else "stream"
    return _embed(fig, f"decisions by {shown}: verified, mismatched and unreplayable")


def _legend_above(ax: Axes, columns: int) -> None:
    """The axes' legend above its top right corner, outside the data (never over a bar)."""
    ax.legend(fontsize=7, frameon=False, loc="lower right", bbox_to_anchor=(1.0, 1.0),
              ncols=columns, borderaxespad=0.2)  # fmt: skip


def _legend_top_left(ax: Axes, columns: int) -> None:
    """The axes' legend above its top left corner, outside the data; a title goes above it
    (``pad=``) so that the two never meet."""
    ax.legend(fontsize=7, frameon=False, loc="lower left", bbox_to_anchor=(0.0, 1.0),
              ncols=columns, borderaxespad=0.2)  # fmt: skip


def audit_figure(f: AuditFigure, edges: Sequence[float]) -> Image:
    """The PIT histogram of one draw, and observed against declared counts of its options."""
    name = f" {f.draw!r}" if f.draw else ""
    return _embed(audit_chart(f, edges), _alt(f"audit of {f.stream} {f.kind}{name}"))


def audit_chart(f: AuditFigure, edges: Sequence[float]) -> Figure:
    """The figure of ``audit_figure``: the probability integral transform (PIT) histogram and,
    for draws with options, observed against declared counts, the legend above the bars."""
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
    ax.set_title("PIT histogram (flat if as declared)", loc="left", fontsize=10)
    _style(ax)
    if with_options:
        bx = fig.add_subplot(1, 2, 2)
        labels, observed, expected = _top_options(f)
        x = np.arange(len(labels))
        bx.bar(x - 0.2, observed, width=0.4, color="#4477aa", label="observed")
        bx.bar(x + 0.2, expected, width=0.4, color="#cccccc", label="declared")
        bx.set_xticks(
            x,
            labels,
            rotation=30 if len(labels) > 3 else 0,
            ha="right" if len(labels) > 3 else "center",
        )
        bx.set_ylabel("count")
        bx.set_title("observed vs declared", loc="left", fontsize=10)
        _legend_above(bx, 2)
        _style(bx)
    fig.tight_layout()
    return fig


def estimate_figure(r: EstimateReport, truth: float | None) -> Image:
    """Each estimator's value and interval, with the logging policy and the true value."""
    return _embed(estimate_chart(r, truth), _alt(f"estimates of {policy(r.target)}"))


def estimate_chart(r: EstimateReport, truth: float | None) -> Figure:
    """The forest plot of ``estimate_figure``: titled, its legend between title and axes."""
    names = list(r.estimates)
    fig = _figure(6.4, 0.5 * len(names) + 1.2)
    ax = fig.add_subplot()
    for i, name in enumerate(names):
        e = r.estimates[name]
        colour = COLOURS.get(name, GREY)
        if e["low"] is not None and e["high"] is not None:
            lo, hi = e.get("outer_low"), e.get("outer_high")
            if name == "clipped" and lo is not None and hi is not None:
                ax.plot(
                    [lo, hi],
                    [i, i],
                    color=colour,
                    lw=9,
                    alpha=0.25,
                    solid_capstyle="butt",
                    label="outer band (value + clipped-away mass)",
                )
            ax.plot([e["low"], e["high"]], [i, i], color=colour, lw=3, solid_capstyle="butt")
        if e["value"] is not None:
            ax.plot([e["value"]], [i], "o", color=colour, ms=6)
    if r.logging_value is not None:
        ax.axvline(r.logging_value, color=GREY, ls=":", lw=1.2, label="logging policy (observed)")
    if truth is not None:
        ax.axvline(truth, color=TRUTH_COLOUR, ls="--", lw=1.2, label="true value (simulator)")
    ax.set_yticks(range(len(names)), [_plain(n) for n in names])
    ax.set_ylim(len(names) - 0.5, -0.5)
    level = r.settings.get("level", 0.95)
    reward = _plain(str(r.target.get("reward", "reward")))
    ax.set_xlabel(f"mean {reward} with {level:.0%} intervals")
    ax.set_title(_plain(f"estimated mean {reward} under {policy(r.target)}", 80), loc="left",
                 fontsize=10, pad=18)  # fmt: skip
    _legend_top_left(ax, 3)
    _style(ax)
    return fig


def weights_figure(r: EstimateReport) -> Image:
    """The distribution of importance weights, titled with the effective sample size."""
    w = np.asarray(r.weights, dtype=float)
    fig = _figure(6.4, 2.6)
    ax = fig.add_subplot()
    positive = w[w > 0]
    if positive.size:
        spread = positive.max() / positive.min()
        if spread > 50:
            bins = np.geomspace(positive.min(), positive.max(), 40)
            ax.set_xscale("log")
            _plain_log_ticks(ax.xaxis)
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


def sweep_figure(s: SweepReport, truth: Sequence[float] | None) -> Image:
    """Each shown estimator across the swept values, with its interval band."""
    return _embed(sweep_chart(s, truth), _alt(f"sweep of {s.param}"))


def sweep_chart(s: SweepReport, truth: Sequence[float] | None) -> Figure:
    """The figure of ``sweep_figure``, its legend above the axes."""
    fig = _figure(6.4, 3.4)
    ax = fig.add_subplot()
    x = np.array([float(p["value"]) for p in s.points])
    for name in sweep_estimators(s):
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
    _legend_top_left(ax, 2)
    _style(ax)
    return fig
