"""Typed results, ``to_frame`` and the report protocol (JSON, rich, plain text, HTML)."""

from __future__ import annotations

import dataclasses
import io
import re
import tempfile
import unicodedata
from pathlib import Path
from typing import Any

import orjson
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from rich.console import Console
from strategies import hostile_text

import drawledger as dl
import drawledger.replay as replay
from drawledger._text import visible
from drawledger.replay import Estimate, Report

ODD = '<b>&"'  # a stream name that HTML must escape
ESCAPED = "&lt;b&gt;&amp;&quot;"
CARDS = ["one-pot-pasta", "green-curry", "taco-night"]
N = 80

_placeholder = dl.Ledger(Path(tempfile.gettempdir()) / "drawledger-results-placeholder.db")


@_placeholder.decision(ODD)
def odd_card(scores: list[float], draw: dl.Draw, *, temperature: float = 0.7) -> str:
    return draw.softmax(CARDS, scores, temperature=temperature, name="card")


@pytest.fixture(scope="module")
def odd(tmp_path_factory: pytest.TempPathFactory) -> replay.LedgerHandle:
    """80 decisions of the stream ``<b>&"`` with checkouts, opened as a handle."""
    path = tmp_path_factory.mktemp("results") / "odd.db"
    led = dl.Ledger(path)
    odd_card.ledger = led
    try:
        for i in range(N):
            card = odd_card([1.0, 0.5 + (i % 3) / 4, 0.2], decision_id=f"d-{i}")
            led.outcome(f"d-{i}", "checkout", float(card == "green-curry"))
    finally:
        odd_card.ledger = _placeholder
        led.close()
    return replay.open(path)


@pytest.fixture(scope="module")
def reports(odd: replay.LedgerHandle) -> dict[str, Any]:
    return {
        "verify": odd.verify(),
        "audit": odd.audit(),
        "estimate": odd.estimate("checkout", overrides={"temperature": 0.3}),
        "sweep": odd.sweep("checkout", "temperature", [0.3, 1.0]),
        "integrity": odd.check_integrity(),
    }


def test_estimates_are_typed(reports):
    report = reports["estimate"]
    snips = report.estimates["snips"]
    assert Estimate(snips["value"], snips["low"], snips["high"]) == report.results["snips"]
    assert list(report.estimates) == list(report.results)


def test_only_the_clipped_estimate_carries_its_bias_interval(reports):
    results = reports["estimate"].results
    clipped = reports["estimate"].estimates["clipped"]
    assert (clipped["bias_low"], clipped["bias_bound"]) == (
        results["clipped"].bias_low,
        results["clipped"].bias_bound,
    )
    assert [(None, None)] * 3 == [(results[n].bias_low, results[n].bias_bound)
                                  for n in ("ips", "snips", "dr")]  # fmt: skip


def test_differences_are_typed(reports):
    report = reports["estimate"]
    assert report.difference["dr"]["value"] == report.differences["dr"].value


def test_an_estimate_is_frozen(reports):
    with pytest.raises(dataclasses.FrozenInstanceError):
        reports["estimate"].results["ips"].value = 0.0


def test_to_dict_keeps_plain_json(reports):
    """The typed view leaves the JSON alone: estimates stay objects of numbers."""
    report = reports["estimate"]
    report.results  # noqa: B018 (built on demand, must not change the report)
    data = orjson.loads(orjson.dumps(report.to_dict()))
    assert {"value", "low", "high"} == set(data["estimates"]["snips"])


def test_estimate_frame_has_one_row_per_estimator(reports):
    report = reports["estimate"]
    frame = report.to_frame()
    assert ["ips", "snips", "clipped", "dr"] == list(frame.index)
    assert ["value", "low", "high", "bias_low", "bias_bound", "outer_low", "outer_high"] == list(
        frame.columns
    )
    assert report.estimates["snips"]["high"] == frame.loc["snips", "high"]


def test_sweep_frame_has_one_row_per_point_and_estimator(reports):
    report = reports["sweep"]
    frame = report.to_frame()
    assert ["temperature", "estimator"] == list(frame.index.names)
    assert 2 * 4 == len(frame)
    curve = frame.xs("snips", level="estimator")
    assert [0.3, 1.0] == list(curve.index)
    point = report.points[1]
    assert point["estimates"]["snips"]["value"] == curve.loc[1.0, "value"]
    assert point["diagnostics"]["ess"] == curve.loc[1.0, "ess"]


def test_audit_frame_has_one_row_per_test(reports):
    report = reports["audit"]
    frame = report.to_frame()
    assert len(report.tests) == len(frame)
    assert [t.verdict for t in report.tests] == list(frame["verdict"])
    assert {ODD} == set(frame["stream"])


def test_integrity_frame_has_one_row_per_kind_of_problem(reports):
    frame = reports["integrity"].to_frame()
    assert ["gaps", "broken_links", "duplicates", "bad_hashes", "orphan_draws",
            "orphan_outcomes", "bad_records", "missing_writers", "unregistered_writers",
            "foreign_chains", "bad_registry"] == list(frame.index)  # fmt: skip
    assert [0] * 11 == list(frame["count"])
    assert [True] * 5 + [False] + [True] * 5 == list(frame["fails_check"])


@pytest.mark.parametrize("name", ["verify", "audit", "estimate", "sweep", "integrity"])
def test_every_report_has_a_frame(reports, name):
    assert isinstance(reports[name].to_frame(), pd.DataFrame)


def test_verify_frame_is_one_row_per_decision(reports):
    frame = reports["verify"].to_frame()
    assert isinstance(frame, pd.DataFrame)
    assert N == len(frame)
    assert {ODD} == set(frame["stream"])


@pytest.mark.parametrize("name", ["verify", "audit", "estimate", "sweep", "integrity"])
def test_every_report_satisfies_the_protocol(reports, name):
    report = reports[name]
    assert isinstance(report, Report)
    assert isinstance(report.to_dict(), dict)
    assert report.render().strip()
    console = Console(file=io.StringIO(), width=120)
    console.print(report)
    assert console.file.getvalue().strip()
    assert re.match(r"(<p><b>ALERT:</b>[^<]*</p>)*<table><caption>", report._repr_html_())


def test_estimate_on_an_80_column_terminal_shows_every_digit_and_plain_names(reports):
    """The estimate's tables fit an 80-column terminal: no value cut to an ellipsis; the
    difference is named as target minus the logging policy and the intervals in plain words."""
    report = reports["estimate"]
    console = Console(file=io.StringIO(), width=80, color_system=None)
    console.print(report)
    out = console.file.getvalue()
    assert "…" not in out
    snips = report.results["snips"]
    assert f"[{snips.low:.4f}, {snips.high:.4f}]" in out
    assert f"{report.differences['snips'].value:.4f}" in out
    assert "difference: target minus logging policy" in out
    assert "normal-approximation (CLT) 95% intervals" in " ".join(out.split())


def test_the_protocol_check_can_fail():
    assert not isinstance(object(), Report)


@pytest.mark.parametrize("name", ["verify", "audit", "estimate", "sweep"])
def test_html_escapes_the_stream_name(reports, name):
    page = reports[name]._repr_html_()
    assert ESCAPED in page
    assert ODD not in page


def test_html_escapes_examples_of_the_integrity_report():
    report = replay.IntegrityReport()
    report.note("gaps", ODD)
    page = report.finish()._repr_html_()
    assert f"<td>{ESCAPED}</td>" in page
    assert ODD not in page


def test_html_escapes_estimate_warnings(reports):
    report = dataclasses.replace(reports["estimate"], warnings=["support <lost> & found"])
    assert "<p>warning: support &lt;lost&gt; &amp; found</p>" in report._repr_html_()


def _hostile(reports: dict[str, Any], name: str, text: str) -> Any:
    """The report ``name`` with ``text`` wherever a ledger's text shows: streams, decision ids,
    details, draw and field names, the target, warnings."""
    integrity = replay.IntegrityReport()
    integrity.note("gaps", text)
    integrity.finish()
    if name == "integrity":
        return integrity
    if name == "verify":
        v = reports["verify"]
        return dataclasses.replace(
            v,
            by_stream={text: v.by_stream[ODD]},
            by_reason={"value": 1},
            examples={"value": [(text, text)]},
            integrity=integrity,
        )
    if name == "audit":
        a = reports["audit"]
        tests = tuple(dataclasses.replace(t, stream=text, draw=text, field=text) for t in a.tests)
        return dataclasses.replace(a, tests=tests)
    if name == "estimate":
        e = reports["estimate"]
        return dataclasses.replace(e, target={**e.target, "callable": text}, warnings=[text])
    return dataclasses.replace(reports["sweep"], param=text, warnings=[text])


def _unsafe(out: str) -> list[str]:
    # Control (Cc), format (Cf, the bidirectional overrides among them), surrogate (Cs) and
    # line or paragraph separator (Zl, Zp) characters: the Unicode general categories.
    bad = {"Cc", "Cf", "Cs", "Zl", "Zp"}
    return sorted({c for c in out if c != "\n" and unicodedata.category(c) in bad})


@pytest.mark.parametrize("name", ["verify", "audit", "estimate", "sweep", "integrity"])
@settings(
    max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(text=hostile_text)
def test_terminal_output_shows_ledger_text_escaped_never_as_markup_or_control(
    reports: dict[str, Any], name: str, text: str
) -> None:
    report = _hostile(reports, name, text)
    console = Console(file=io.StringIO(), width=1000, color_system=None)
    console.print(report)
    assert visible(text) in console.file.getvalue()  # wide enough not to wrap the name
    for out in (console.file.getvalue(), report.render(), report._repr_html_()):
        assert [] == _unsafe(out)


@pytest.mark.parametrize("name", ["verify", "audit", "estimate", "sweep", "integrity"])
def test_terminal_output_writes_markup_and_escapes_as_text(
    reports: dict[str, Any], name: str
) -> None:
    """A stream ``[/]`` no longer crashes, ``price[eur]`` keeps its brackets, and ESC and
    U+202E show as ``\\x1b`` and ``\\u202e`` (a forged line cannot be drawn)."""
    report = _hostile(reports, name, "[/]price[eur]\x1b[2J\u202e[link=x]y")
    out = report.render()
    assert r"[/]price[eur]\x1b[2J\u202e[link=x]y" in out


def test_sweep_figure_keeps_ips_visible_and_names_the_reward(reports):
    """IPS and clipped IPS coincide when clipping cuts nothing: they get different line styles
    and markers and IPS is drawn last (on top); the y axis names the reward; the legend sits
    outside the curves."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    fig = reports["sweep"].figure()
    (ax,) = fig.axes
    curves = {line.get_label(): line for line in ax.lines}
    ips, clipped = curves["ips"], curves["clipped"]
    assert (ips.get_linestyle(), ips.get_marker()) != (clipped.get_linestyle(),
                                                       clipped.get_marker())  # fmt: skip
    estimators = [line.get_label() for line in ax.lines if line.get_label() in curves
                  and line.get_label() != "logging policy"]  # fmt: skip
    assert "ips" == estimators[-1]
    assert "estimated mean checkout" == ax.get_ylabel()
    FigureCanvasAgg(fig)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    legend = ax.get_legend().get_window_extent(renderer)
    assert not legend.overlaps(ax.get_window_extent(renderer))
