"""Estimate and sweep reports: JSON, rich tables, plain text and figures."""

from __future__ import annotations

import html
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from drawledger.replay._html import html_table
from drawledger.replay._terminal import plain_text, shown, warning

if TYPE_CHECKING:
    from matplotlib.figure import Figure
    from rich.console import Console, ConsoleOptions, RenderResult


INTERVALS = ("clt", "bootstrap", "bernstein")


ESTIMATORS = ("ips", "snips", "clipped", "dr")


DEFAULT_CAP = 10.0


DEFAULT_BOOTSTRAP = 1000


# Line style and marker of each estimator's curve in a sweep figure.
CURVE_STYLES = {"ips": (":", "o"), "snips": ("-", "s"), "clipped": ("--", "^"), "dr": ("-.", "D")}


DR_NOTE = ("dr needs the policy's full action distribution (continuous actions, or more "
           "branches than the enumeration budget)")  # fmt: skip


def _fmt(x: float | None) -> str:
    """Four decimals; seven significant digits from 1e7 up (rewards in cents, say)."""
    if x is None:
        return "-"
    return f"{x:.4f}" if abs(x) < 1e7 else f"{x:.7g}"


def _span(e: Mapping[str, float | None]) -> str:
    return f"[{_fmt(e['low'])}, {_fmt(e['high'])}]"


INTERVAL_NAMES = {"clt": "normal-approximation (CLT)", "bootstrap": "bootstrap",
                  "bernstein": "empirical Bernstein"}  # fmt: skip


def interval_label(settings: Mapping[str, Any]) -> str:
    """The intervals' label ("normal-approximation (CLT) 95% intervals"). A Bernstein interval's
    guarantee needs a reward range fixed in advance (Maurer & Pontil 2009): the label says which
    range it used."""
    kind = settings["interval"]
    text = f"{INTERVAL_NAMES.get(kind, kind)} {settings['level']:.0%} intervals"
    if settings["interval"] != "bernstein":
        return text
    if settings.get("reward_range_source") == "given":
        lo, hi = settings["reward_range"]
        return f"{text} (rewards in the given range [{lo:g}, {hi:g}])"
    return f"{text} (observed reward range: no finite-sample guarantee)"


def _policy_text(d: Mapping[str, Any]) -> str:
    if "callable" in d:
        return str(d["callable"])
    changed = ", ".join(f"{k}={v!r}" for k, v in d.get("overrides", {}).items())
    if "code" in d:  # records of other code versions: the target is the current code
        return f"{d['code']}, {changed}" if changed else str(d["code"])
    return changed or "logging policy"


VERSIONS_TITLE = "code versions (logging propensities from each record's own version)"


def other_versions(versions: Sequence[Mapping[str, Any]]) -> bool:
    """Whether some record of ``versions`` was logged by another code version than the
    current code (then the output shows the versions)."""
    return any(not str(v["logged_under"]).startswith("current code") for v in versions)


def _versions_table(versions: list[dict[str, Any]]) -> list[Any]:
    """The code versions of the stream, when some record was logged by another version than
    the current code (none otherwise)."""
    from rich.box import SIMPLE
    from rich.table import Table
    from rich.text import Text

    if not other_versions(versions):
        return []
    t = Table(title=VERSIONS_TITLE, title_justify="left", box=SIMPLE)
    for name in ("function", "identity", "decisions", "used", "logged under"):
        t.add_column(name, justify="right" if name in ("decisions", "used") else "left",
                     overflow="fold")  # fmt: skip
    for v in versions:  # Text: what a ledger holds is never read as markup
        t.add_row(*(Text(str(v[k])) for k in ("fn", "identity", "decisions", "used",
                                               "logged_under")))  # fmt: skip
    return [t]


@dataclass(frozen=True)
class Estimate:
    """One estimator's value with its interval [low, high].

    For clipped IPS, [low, high] is the interval of the clipped value; the clipped-away part
    lies in [bias_low, bias_bound] (from a confidence bound on the kept mass), and the target's
    value lies in the outer band [outer_low, outer_high] at the report's level (Bottou et al.
    2013, docs/estimators.md). The four are None for the other estimators.
    """

    value: float | None
    low: float | None
    high: float | None
    bias_low: float | None = None
    bias_bound: float | None = None
    outer_low: float | None = None
    outer_high: float | None = None

    @classmethod
    def from_dict(cls, entry: Mapping[str, float | None]) -> Estimate:
        """An entry of the JSON's ``estimates`` (or ``difference``) object as an ``Estimate``."""
        return cls(entry["value"], entry["low"], entry["high"], entry.get("bias_low"),
                   entry.get("bias_bound"), entry.get("outer_low"),
                   entry.get("outer_high"))  # fmt: skip


ESTIMATE_COLUMNS = tuple(f.name for f in fields(Estimate))


def _typed(entries: Mapping[str, Mapping[str, float | None]]) -> dict[str, Estimate]:
    return {name: Estimate.from_dict(e) for name, e in entries.items()}


def _estimate_rows(entries: Mapping[str, Mapping[str, float | None]]) -> list[list[Any]]:
    """One row per estimator: its name, then the ``Estimate`` fields."""
    return [[name, *(getattr(e, c) for c in ESTIMATE_COLUMNS)]
            for name, e in _typed(entries).items()]  # fmt: skip


@dataclass
class EstimateReport:
    """The estimate of a target policy's mean reward from verified records.

    ``to_dict()`` is the JSON of ``drawledger estimate --json``; ``weights`` holds the
    importance weight of every record used (for histograms). ``decisions`` counts the
    decisions of the stream before exclusions; ``excluded`` counts them by reason (a decision
    can fail for several reasons).
    """

    n: int
    target: dict[str, Any]
    estimates: dict[str, dict[str, float | None]]
    diagnostics: dict[str, Any]
    baseline: dict[str, Any]
    baseline_estimates: dict[str, dict[str, float | None]]
    difference: dict[str, dict[str, float | None]]
    excluded: dict[str, int]
    warnings: list[str]
    settings: dict[str, Any]
    segments: dict[str, Any] | None
    decisions: int
    weights: np.ndarray = field(repr=False)
    ok: bool = True
    alerts: list[str] = field(default_factory=list)
    accepted_failures: dict[str, Any] | None = None
    missing_rewards: dict[str, Any] = field(default_factory=dict)
    versions: list[dict[str, Any]] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "alerts": self.alerts,
            "accepted_failures": self.accepted_failures,
            "n": self.n,
            "target": self.target,
            "estimates": self.estimates,
            "diagnostics": self.diagnostics,
            "baseline": {**self.baseline, "estimates": self.baseline_estimates},
            "difference": self.difference,
            "logging_value": self.logging_value,
            "excluded": {"total": self.decisions - self.n, "by_reason": self.excluded},
            "missing_rewards": self.missing_rewards,
            "settings": self.settings,
            "versions": self.versions,
            "warnings": self.warnings,
            "ok": self.ok,
        }
        if self.segments is not None:
            out["segments"] = self.segments
        return out

    @property
    def logging_value(self) -> float | None:
        """The mean reward of the logging policy on the records (None with another baseline)."""
        if self.baseline.get("policy") != "logging":
            return None
        return self.baseline_estimates["ips"]["value"]

    @property
    def results(self) -> dict[str, Estimate]:
        """The target's estimates, typed: ``report.results["snips"].value``."""
        return _typed(self.estimates)

    @property
    def differences(self) -> dict[str, Estimate]:
        """Target minus baseline, estimator by estimator, typed."""
        return _typed(self.difference)

    def to_frame(self) -> pd.DataFrame:
        """One row per estimator (the index) with the ``Estimate`` fields as columns."""
        rows = _estimate_rows(self.estimates)
        return pd.DataFrame(rows, columns=["estimator", *ESTIMATE_COLUMNS]).set_index("estimator")

    def _repr_html_(self) -> str:
        """The estimates and differences as an HTML table, then the warnings (notebooks)."""
        s = self.settings
        base = _policy_text(self.baseline)
        caption = (f"{_policy_text(self.target)} on {self.target.get('stream')}, {self.n} "
                   f"verified records, {interval_label(s)}; "
                   f"difference: target minus {base}")  # fmt: skip
        diffs = self.differences
        rows = [(name, e.value, e.low, e.high, e.outer_low, e.outer_high, diffs[name].value,
                 diffs[name].low, diffs[name].high)
                for name, e in self.results.items()]  # fmt: skip
        head = ("estimator", "value", "low", "high", "outer low", "outer high",
                f"difference vs {base}", "difference low", "difference high")  # fmt: skip
        table = html_table(caption, head, rows, (f"warning: {w}" for w in self.warnings))
        return _html_alerts(self.alerts) + table + _html_versions(self.versions)

    def _tables(self) -> list[Any]:
        from rich.box import SIMPLE
        from rich.table import Table
        from rich.text import Text

        # Two narrow tables rather than one wide one: an 80-column terminal shows every digit.
        title = f"{_policy_text(self.target)}: {self.n} verified records, "
        t = Table(title=shown(title + interval_label(self.settings)), title_justify="left",
                  box=SIMPLE)  # fmt: skip
        for col in ("estimator", "value", "interval", "outer band"):
            name_column = col == "estimator"  # numbers fold, never cut
            t.add_column(col, justify="left" if name_column else "right", no_wrap=name_column,
                         overflow="fold")  # fmt: skip
        base = _policy_text(self.baseline)
        d = Table(title=shown(f"difference: target minus {base}"),
                  title_justify="left", box=SIMPLE)  # fmt: skip
        for col in ("estimator", "difference", "difference interval"):
            name_column = col == "estimator"
            d.add_column(col, justify="left" if name_column else "right", no_wrap=name_column,
                         overflow="fold")  # fmt: skip
        for name, e in self.estimates.items():
            diff = self.difference[name]
            outer = _span({"low": e.get("outer_low"), "high": e.get("outer_high")}) \
                if name == "clipped" else ""  # fmt: skip
            t.add_row(name, _fmt(e["value"]), _span(e), outer)
            d.add_row(name, _fmt(diff["value"]), _span(diff))
        g = Table(title="diagnostics", title_justify="left", box=SIMPLE)
        g.add_column("measure")
        g.add_column("value", justify="right", overflow="fold")
        diag = self.diagnostics
        g.add_row("effective sample size (Kish)", f"{diag['ess']:.1f}")
        g.add_row("max weight", f"{diag['max_weight']:.4g}")
        if diag.get("max_weight_share") is not None:
            g.add_row("max weight / sum of weights", f"{diag['max_weight_share']:.2%}")
        for q, v in diag["weight_quantiles"].items():
            g.add_row(f"weight quantile {q}", f"{v:.4g}")
        g.add_row("support deficit", _fmt(diag["support_deficit"]))
        if self.logging_value is not None:
            g.add_row("logging policy mean reward", _fmt(self.logging_value))
        filled = _filled(self.missing_rewards)
        if filled:
            g.add_row(*filled)
        out: list[Any] = [t, d, g, *_versions_table(self.versions)]
        if self.segments is not None:
            s = Table(title=shown(f"segments by {self.segments['by']}"), title_justify="left",
                      box=SIMPLE)  # fmt: skip
            for col in ("segment", "n", "snips", "interval", "ess", "deficit", ""):
                s.add_column(col, justify="left" if col in ("segment", "") else "right",
                             overflow="fold")  # fmt: skip
            for seg in self.segments["groups"]:
                e = seg["estimates"]["snips"]
                s.add_row(shown(seg["value"]), str(seg["n"]), _fmt(e["value"]), _span(e),
                          f"{seg['diagnostics']['ess']:.1f}",
                          _fmt(seg["diagnostics"]["support_deficit"]),
                          "read with care" if seg["alerts"] else "")  # fmt: skip
            out.append(s)
            if any(seg["alerts"] for seg in self.segments["groups"]):
                out.append(
                    Text(
                        "read with care: the segment's support deficit or uneven "
                        "weights (its alerts in the JSON); segments do not change ok"
                    )
                )
        return out

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        yield from _alerts(self.alerts)
        yield from self._tables()
        for w in self.warnings:
            yield warning(w)

    def render(self) -> str:
        """The tables and warnings as plain text."""
        return plain_text(self)

    def __str__(self) -> str:
        return self.render()


def _filled(missing: Mapping[str, Any]) -> tuple[str, str] | None:
    """The diagnostic of the records whose reward was missing and filled in (None: none)."""
    if not missing.get("filled"):
        return None
    return (f"records without the reward (counted as {missing['value']:g})",
            f"{missing['filled']} ({missing['share']:.1%})")  # fmt: skip


def _html_versions(versions: list[dict[str, Any]]) -> str:
    """The code versions as an HTML table, when some record was logged by another version."""
    if not other_versions(versions):
        return ""
    rows = [(v["fn"], v["identity"], v["decisions"], v["used"], v["logged_under"])
            for v in versions]  # fmt: skip
    return html_table(VERSIONS_TITLE, ("function", "identity", "decisions", "used",
                                       "logged under"), rows)  # fmt: skip


def _html_alerts(lines: list[str]) -> str:
    """The alerts as paragraphs above the table (escaped)."""
    return "".join(f"<p><b>ALERT:</b> {html.escape(line)}</p>" for line in lines)


def _alerts(lines: list[str]) -> RenderResult:
    """The alerts above everything else, each a line of its own (text, never markup)."""
    from rich.text import Text

    for line in lines:
        yield Text.assemble(("ALERT: ", "bold red"), shown(line))


@dataclass
class SweepReport:
    """Estimates of a curve of policies: one policy parameter swept over a grid."""

    param: str
    values: list[Any]
    points: list[dict[str, Any]]
    baseline: dict[str, Any]
    settings: dict[str, Any]
    warnings: list[str]
    n: int
    ok: bool = True
    alerts: list[str] = field(default_factory=list)
    accepted_failures: dict[str, Any] | None = None
    missing_rewards: dict[str, Any] = field(default_factory=dict)
    versions: list[dict[str, Any]] = field(default_factory=list)

    @property
    def table(self) -> pd.DataFrame:
        """One row per (value, estimator): value, low, high, and the point's diagnostics."""
        rows = []
        for p in self.points:
            for name, e in p["estimates"].items():
                rows.append({self.param: p["value"], "estimator": name, "estimate": e["value"],
                             "low": e["low"], "high": e["high"], "ess": p["diagnostics"]["ess"],
                             "support_deficit": p["diagnostics"]["support_deficit"]})  # fmt: skip
        return pd.DataFrame(rows)

    def figure(self) -> Figure:
        """The curve of each estimator, with interval bands for SNIPS and DR (no display).

        Each estimator has its own line style and marker, and IPS is drawn last: where clipping
        cuts nothing, clipped IPS equals IPS and would otherwise hide it."""
        from matplotlib.figure import Figure

        fig = Figure(figsize=(7.0, 4.2))
        ax = fig.add_subplot()
        table = self.table
        parts = dict(list(table.groupby("estimator", sort=False)))
        for name in sorted(parts, key=lambda n: n == "ips"):  # IPS last, on top
            part = parts[name]
            x = part[self.param].to_numpy(dtype=float)
            ls, marker = CURVE_STYLES.get(str(name), ("-", "o"))
            line = ax.plot(x, part["estimate"].to_numpy(dtype=float), ls=ls, marker=marker,
                           ms=5 if name == "ips" else 4, mfc="none" if name == "ips" else None,
                           label=str(name))[0]  # fmt: skip
            if name in ("snips", "dr"):
                ax.fill_between(x, part["low"].to_numpy(dtype=float),
                                part["high"].to_numpy(dtype=float), color=line.get_color(),
                                alpha=0.15)  # fmt: skip
        logging_value = self.baseline.get("estimates", {}).get("ips", {}).get("value")
        if self.baseline.get("policy") == "logging" and logging_value is not None:
            ax.axhline(logging_value, color="grey", ls="--", lw=1, label="logging policy")
        param = self.param.replace("$", r"\$")  # shown as written, never as math text
        reward = str(self.settings.get("reward", "reward")).replace("$", r"\$")
        ax.set_xlabel(param)
        ax.set_ylabel(f"estimated mean {reward}")
        ax.set_title(f"{param} sweep ({interval_label(self.settings)})", fontsize="medium")
        ax.legend(fontsize="small", frameon=False, loc="upper left", bbox_to_anchor=(1.01, 1.0))
        fig.tight_layout()
        return fig

    def to_frame(self) -> pd.DataFrame:
        """One row per (swept value, estimator), the index, with the ``Estimate`` fields and the
        point's diagnostics as columns: ``frame.xs("snips", level="estimator")`` is a curve."""
        rows = []
        for p in self.points:
            diag = [p["diagnostics"][k] for k in ("ess", "max_weight", "support_deficit")]
            rows += [[p["value"], *row, *diag] for row in _estimate_rows(p["estimates"])]
        columns = [self.param, "estimator", *ESTIMATE_COLUMNS, "ess", "max_weight",
                   "support_deficit"]  # fmt: skip
        return pd.DataFrame(rows, columns=columns).set_index([self.param, "estimator"])

    def _repr_html_(self) -> str:
        """Every point and estimator as a row of an HTML table, then the warnings (notebooks)."""
        s = self.settings
        caption = (f"{self.param} sweep on {s.get('stream')}: {self.n} verified records, "
                   f"{interval_label(s)}")  # fmt: skip
        rows = [(p["value"], name, e["value"], e["low"], e["high"], p["diagnostics"]["ess"])
                for p in self.points for name, e in p["estimates"].items()]  # fmt: skip
        head = (self.param, "estimator", "value", "low", "high", "ess")
        table = html_table(caption, head, rows, (f"warning: {w}" for w in self.warnings))
        return _html_alerts(self.alerts) + table + _html_versions(self.versions)

    def to_dict(self) -> dict[str, Any]:
        return {"alerts": self.alerts, "accepted_failures": self.accepted_failures,
                "n": self.n, "param": self.param, "points": self.points,
                "baseline": self.baseline, "settings": self.settings,
                "missing_rewards": self.missing_rewards, "versions": self.versions,
                "warnings": self.warnings, "ok": self.ok}  # fmt: skip

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        from rich.box import SIMPLE
        from rich.table import Table
        from rich.text import Text

        yield from _alerts(self.alerts)
        title = f"{self.param} sweep: {self.n} verified records, "
        t = Table(title=shown(title + interval_label(self.settings)), title_justify="left",
                  box=SIMPLE)  # fmt: skip
        names = [n for n in ("snips", "dr") if self.points and n in self.points[0]["estimates"]]
        t.add_column(shown(self.param), justify="right", overflow="fold")
        for name in names:  # numbers fold, never cut
            t.add_column(name, justify="right", overflow="fold")
            t.add_column("interval", justify="right", overflow="fold")
        t.add_column("ess", justify="right", overflow="fold")
        for p in self.points:
            cells = []
            for name in names:
                e = p["estimates"][name]
                cells += [_fmt(e["value"]), _span(e)]
            t.add_row(f"{p['value']:g}" if isinstance(p["value"], float) else shown(p["value"]),
                      *cells, f"{p['diagnostics']['ess']:.1f}")  # fmt: skip
        yield t
        yield from _versions_table(self.versions)
        filled = _filled(self.missing_rewards)
        if filled:
            yield Text(f"{filled[0]}: {filled[1]}")
        for w in self.warnings:
            yield warning(w)

    def render(self) -> str:
        """The table and warnings as plain text."""
        return plain_text(self)

    def __str__(self) -> str:
        return self.render()
