"""The HTML report: one self-contained file with every section, figure and verdict."""

from __future__ import annotations

import base64
import json
import re
import shutil
import sqlite3
import unicodedata
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import pytest
from coin_batches import coin_batches
from hypothesis import given
from markupsafe import escape
from strategies import hostile_text

import drawledger as dl
from drawledger.cli import main
from drawledger.exceptions import ReplayError
from drawledger.replay import verify, write_report
from drawledger.replay.report import _format

ALLOW = "drawledger.replay.demo.grocery"
LEGACY = Path(__file__).resolve().parent.parent / "examples" / "legacy-draws.jsonl"


class _Page(HTMLParser):
    """Collects tags and attributes; the standard library's parser checks the markup nests."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.open: list[str] = []
        self.rows = 0

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))
        if tag not in ("meta", "img", "br", "link", "input"):
            self.open.append(tag)

    def handle_endtag(self, tag: str) -> None:
        assert self.open and self.open[-1] == tag, f"</{tag}> closes <{self.open[-1:]}>"
        self.open.pop()


def parse(html: str) -> _Page:
    page = _Page()
    page.feed(html)
    page.close()
    assert [] == page.open
    return page


def images(page: _Page) -> list[dict[str, str | None]]:
    return [attrs for tag, attrs in page.tags if tag == "img"]


@pytest.fixture(scope="module")
def demo_html(demo_run: Any) -> str:
    return Path(demo_run.report).read_text(encoding="utf-8")


def test_report_makes_no_external_request(demo_html: str) -> None:
    """No script, stylesheet link, font or remote image: every src is a data: URI, every href
    an in-page anchor, and a Content-Security-Policy forbids loading anything else."""
    page = parse(demo_html)
    assert not [t for t, _ in page.tags if t in ("script", "link", "iframe", "object")]
    for tag, attrs in page.tags:
        if "src" in attrs:
            assert (attrs["src"] or "").startswith("data:image/svg+xml;base64,"), tag
        if "href" in attrs:
            assert (attrs["href"] or "").startswith("#"), attrs["href"]
    assert "@import" not in demo_html
    assert "url(" not in demo_html
    csp = [
        a for t, a in page.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"
    ]
    assert 1 == len(csp)
    assert "default-src 'none'" in (csp[0]["content"] or "")


def test_every_figure_is_an_svg_with_a_size(demo_run: Any, demo_html: str) -> None:
    """One figure for verification, one per audited draw, two for the estimate (intervals and
    weights) and one for the sweep; each decodes to an SVG with positive width and height."""
    figs = images(parse(demo_html))
    assert 1 + len(demo_run.audit.figures) + 2 + 1 == len(figs)
    for attrs in figs:
        assert attrs.get("alt")
        data = base64.b64decode((attrs["src"] or "").split(",", 1)[1])
        root = ET.fromstring(data)
        assert root.tag.endswith("svg")
        for dim in ("width", "height"):
            assert float(re.sub(r"[a-z]+$", "", root.attrib[dim])) > 0


def test_report_shows_every_test_estimate_and_true_value(demo_run: Any, demo_html: str) -> None:
    """The audit table has one row per test; every estimator, sweep value and known true value
    of the demo is on the page; the print stylesheet is there."""
    for section in ('id="verify"', 'id="audit"', 'id="whatif"'):
        assert section in demo_html
    audit_table = demo_html.split('<table class="audit">', 1)[1].split("</table>", 1)[0]
    assert len(demo_run.audit.tests) == audit_table.count("<tr>") - 1
    for name in ("ips", "snips", "clipped", "dr"):
        assert f"<b>{name}</b>" in demo_html
    assert f"{demo_run.truth['temperature']:.4f}" in demo_html
    for minutes, true in zip((45, 60, 75, 90), demo_run.truth["delay"], strict=True):
        assert f"<td>{minutes}</td>" in demo_html
        assert f"{true:.4f}" in demo_html
    assert "outer band" in demo_html
    assert "@media print" in demo_html and "@page" in demo_html
    assert "ethics" in demo_html and "personal data" in demo_html


def test_tampered_ledger_report_names_every_reason(
    demo_run: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """An edited probability makes `drawledger report` exit 1; the page says FAILED and lists
    every reason verify gives, with the decision id as an example."""
    ledger = tmp_path / "tampered.db"
    shutil.copy(demo_run.ledger, ledger)
    con = sqlite3.connect(ledger)
    with con:
        con.execute("UPDATE draws SET prob = prob * 1.01 WHERE decision_id = 'card-000003'")
    con.close()
    html = tmp_path / "tampered.html"
    assert 1 == main(["report", str(ledger), "--html", str(html), "--allow", ALLOW])
    assert "wrote" in capsys.readouterr().out
    text = html.read_text(encoding="utf-8")
    assert "FAILED" in text and "problems found" in text
    reasons = verify(ledger, allow=[ALLOW]).by_reason
    assert reasons
    for reason in reasons:
        assert f"<code>{reason}</code>" in text
    assert "card-000003" in text


def test_report_command_adds_the_estimate_of_a_target(
    demo_run: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--reward with --set and --stream adds that what-if estimate to the page."""
    html = tmp_path / "r.html"
    argv = ["report", str(demo_run.ledger), "--html", str(html), "--allow", ALLOW, "--reward",
            "checkout", "--set", "temperature=0.5", "--stream", "recipe-card"]  # fmt: skip
    assert 0 == main(argv)
    text = html.read_text(encoding="utf-8")
    assert "recipe-card with temperature = 0.5" in text
    assert 2 + 1 + len(demo_run.audit.figures) == len(images(parse(text)))


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--html", "{tmp}/r.txt"], "ending in .html"),
        (["--html", "{tmp}/missing/r.html"], "no folder"),
        (["--html", "{tmp}/r.html", "--set", "temperature=0.3"], "needs the reward"),
    ],
)
def test_report_command_bad_usage(
    demo_run: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str], argv: list[str],
    message: str,
) -> None:  # fmt: skip
    """Bad report arguments: one line on stderr, exit 2, nothing written."""
    args = [a.replace("{tmp}", str(tmp_path)) for a in argv]
    assert 2 == main(["report", str(demo_run.ledger), *args])
    err = capsys.readouterr().err
    assert 1 == len(err.strip().splitlines())
    assert message in err
    assert [] == list(tmp_path.iterdir())


def test_report_of_a_missing_ledger_is_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert 2 == main(["report", str(tmp_path / "nope.db"), "--html", str(tmp_path / "r.html")])
    assert "drawledger report: error:" in capsys.readouterr().err
    assert not (tmp_path / "r.html").exists()


def test_weights_on_a_log_axis_draw_no_mathematical_text(
    demo_run: Any, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Log-axis tick labels in mathtext load fallback fonts; with a stale matplotlib font
    cache each prints a warning on stderr. Weights spread over 1e4 are labelled as numbers."""
    import dataclasses

    import matplotlib.mathtext
    import numpy as np

    from drawledger.replay.report._figures import weights_figure

    parsed: list[str] = []
    parse = matplotlib.mathtext.MathTextParser.parse

    def spy(self: Any, text: str, *args: Any, **kwargs: Any) -> Any:
        parsed.append(text)
        return parse(self, text, *args, **kwargs)

    monkeypatch.setattr(matplotlib.mathtext.MathTextParser, "parse", spy)
    wide = dataclasses.replace(demo_run.temperature, weights=np.geomspace(0.01, 100.0, 50))
    assert weights_figure(wide).src.startswith("data:image/svg+xml;base64,")
    assert [] == parsed


def test_report_of_declared_draws(tmp_path: Path) -> None:
    """A ledger of declared draws (the legacy example) passes: its decisions are unreplayable
    by nature ("declared" does not fail), and each stream's draws are audited and drawn."""
    ledger = tmp_path / "legacy.db"
    assert dl.ingest(LEGACY, ledger).ok
    result = write_report(ledger, tmp_path / "legacy.html")
    assert result.ok
    text = result.path.read_text(encoding="utf-8")
    assert "<code>declared</code>" in text
    for stream in ("slot-discount", "tip-prompt", "promo-countdown"):
        assert f'<b><span class="name">{stream}</span></b>' in text
    assert "No what-if question was asked" in text
    assert 1 + len(result.audit.figures) == len(images(parse(text)))


def test_report_counts_a_stopped_writers_uncommitted_records(tmp_path: Path) -> None:
    """The outcomes part of a Parquet writer's last batch never came: shown, not a failure."""
    root = tmp_path / "pq"
    coin_batches(root, 2, 20)
    sorted((root / "outcomes").rglob("*.parquet"))[-1].unlink()
    result = write_report(root, tmp_path / "pq.html")
    text = result.path.read_text(encoding="utf-8")
    integrity = result.verification.integrity
    assert (True, 20) == (integrity.ok, integrity.uncommitted_records)
    assert re.search(r"uncommitted records \(not a failure\)</td>\s*<td[^>]*>20<", text), text


def test_a_draw_too_rare_to_test_fails_the_report_with_a_banner(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Six declared coin flips: no alarm, but no test of randomness either."""
    ledger = dl.Ledger(tmp_path / "few.db")
    for i in range(6):
        heads = i % 2 == 0  # a uniform below p gives True (the picking rule)
        ledger.record_draw("tip-prompt", "bernoulli", {"p": 0.5}, heads, 0.5,
                           u=[0.25 if heads else 0.75])  # fmt: skip
    ledger.close()
    code = main(["report", str(tmp_path / "few.db"), "--html", str(tmp_path / "few.html")])
    assert (1, "audit 1 draw not audited") == (code, capsys.readouterr().out.strip()[-24:])
    text = (tmp_path / "few.html").read_text(encoding="utf-8")
    assert '<span class="badge bad">1 draw not audited</span>' in text
    assert ('<p class="banner">Not audited: <span class="name">tip-prompt, bernoulli: 6 draws, '
            "too few for any test of randomness</span></p>") in text  # fmt: skip


def test_report_replaces_an_existing_file_whole(demo_run: Any, tmp_path: Path) -> None:
    """An existing report is replaced by the new one, and no temporary file is left behind."""
    html = tmp_path / "report.html"
    html.write_text("old")
    result = write_report(
        demo_run.ledger, html, verification=demo_run.verification, audit_report=demo_run.audit
    )
    assert html.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    assert [html] == list(tmp_path.iterdir())
    d = result.to_dict()
    assert {"ok", "html", "verify", "audit", "whatifs", "refused"} == set(d)
    assert str(html) == d["html"]
    assert result.render().startswith(f"wrote {html}:")
    table = result._repr_html_()  # what a notebook shows
    assert table.startswith(f"<table><caption>wrote {html} (passed)</caption>")
    assert f"{demo_run.verification.verified} of {demo_run.verification.decisions}" in table


def test_report_refuses_a_target_without_a_reward(demo_run: Any, tmp_path: Path) -> None:
    with pytest.raises(ReplayError, match="needs the reward"):
        write_report(demo_run.ledger, tmp_path / "r.html", overrides={"temperature": 0.3})


def test_report_escapes_what_the_ledger_says(tmp_path: Path) -> None:
    """Stream names and options from a ledger are text, never markup or mathematical text:
    '<b>' and '&' are escaped in the page, and '$' labels still draw."""
    ledger = tmp_path / "odd.db"
    with dl.Ledger(ledger) as led:
        for i in range(60):
            value = ["$5 off", "<i>10%</i> & more"][i % 2]
            led.record_draw("<b>promo</b> $x$", "categorical",
                            {"options": ["$5 off", "<i>10%</i> & more"], "probs": [0.5, 0.5]},
                            value, 0.5, decision_id=f"odd-{i}")  # fmt: skip
    text = write_report(ledger, tmp_path / "odd.html").path.read_text(encoding="utf-8")
    page = parse(text)
    assert "<b>promo</b>" not in text
    assert "&lt;b&gt;promo&lt;/b&gt; $x$" in text
    assert not [t for t, _ in page.tags if t in ("i", "script")]
    assert 2 == len(images(page))


def test_report_escapes_script_quotes_and_ampersands_from_the_ledger(tmp_path: Path) -> None:
    """A stream name and decision ids holding '<script>', '"' and '&' reach the page as text:
    escaped in element content and in attributes, so no script element appears and the
    figure's alternative text reads back whole."""
    stream = '<script>alert("x")</script> & co'
    ledger = tmp_path / "hostile.db"
    with dl.Ledger(ledger) as led:
        for i in range(40):
            led.record_draw(stream, "categorical", {"options": ["a", "b"], "probs": [0.5, 0.5]},
                            "ab"[i % 2], 0.5, decision_id=f'<script>"d-{i}"&')  # fmt: skip
    text = write_report(ledger, tmp_path / "hostile.html").path.read_text(encoding="utf-8")
    assert (
        '<span class="name">&lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt; &amp; co</span>' in text
    )
    assert '<code><span class="name">&lt;script&gt;&#34;d-0&#34;&amp;</span></code>' in text
    assert (
        'alt="audit of &lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt; &amp; co categorical"'
        in text
    )
    assert "<script>" not in text
    page = parse(text)
    assert [] == [t for t, _ in page.tags if t == "script"]
    assert f"audit of {stream} categorical" in [attrs["alt"] for attrs in images(page)]


def _edited_demo(demo_run: Any, tmp_path: Path) -> Path:
    """The demo ledger with every checkout of 0 edited to 1 without the integrity key."""
    ledger = tmp_path / "edited.db"
    shutil.copy(demo_run.ledger, ledger)
    with sqlite3.connect(ledger) as con:
        con.execute("UPDATE outcomes SET value = 1.0 WHERE value = 0.0")
    return ledger


def test_report_says_at_the_top_why_an_estimate_was_refused(
    demo_run: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A ledger that fails integrity: the page is written without the estimate, and the top
    of the page and the terminal say it was refused; exit 1."""
    html = tmp_path / "r.html"
    argv = ["report", str(_edited_demo(demo_run, tmp_path)), "--html", str(html), "--allow",
            ALLOW, "--reward", "checkout", "--set", "temperature=0.5", "--stream",
            "recipe-card"]  # fmt: skip
    assert 1 == main(argv)
    assert capsys.readouterr().out.startswith("estimate refused: the ledger fails its integrity")
    text = html.read_text(encoding="utf-8")
    header = text.split("</header>", 1)[0]
    assert '<p class="banner">Estimate refused: the ledger fails its integrity check' in header
    assert "temperature = 0.5" not in text


def test_report_of_an_estimate_from_accepted_failures_has_a_banner(
    demo_run: Any, tmp_path: Path
) -> None:
    html = tmp_path / "r.html"
    report = write_report(_edited_demo(demo_run, tmp_path), html, allow=[ALLOW],
                          reward="checkout", overrides={"temperature": 0.5},
                          stream="recipe-card", accept_integrity_failures=True,
                          accept_verification_failures=["integrity"])  # fmt: skip
    assert not report.ok
    assert report.render().startswith("ALERT: What if: recipe-card with temperature = 0.5: "
                                      "INTEGRITY FAILURES ACCEPTED")  # fmt: skip
    text = html.read_text(encoding="utf-8")
    header = text.split("</header>", 1)[0]
    assert "INTEGRITY FAILURES ACCEPTED" in header
    block = text.split('<h3><span class="name">What if: recipe-card with temperature = 0.5', 1)[1]
    assert block.split("</h3>", 1)[1].lstrip().startswith('<p class="banner">INTEGRITY')


def test_an_error_line_shows_control_characters_escaped(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The one error line never carries an escape sequence or a bidirectional override."""
    html = str(tmp_path / "r\x1b[2J\u202e.txt")
    assert 2 == main(["report", str(tmp_path / "x.db"), "--html", html])
    err = capsys.readouterr().err
    assert r"r\x1b[2J\u202e.txt" in err
    assert "\x1b" not in err


def test_a_link_planted_at_the_old_temporary_name_is_not_followed(
    demo_run: Any, tmp_path: Path
) -> None:
    victim = tmp_path / "victim.txt"
    victim.write_text("keep")
    (tmp_path / ".report.html.tmp").symlink_to(victim)
    write_report(demo_run.ledger, tmp_path / "report.html", verification=demo_run.verification,
                 audit_report=demo_run.audit)  # fmt: skip
    assert "keep" == victim.read_text()
    assert (tmp_path / "report.html").read_text(encoding="utf-8").startswith("<!DOCTYPE html>")


def _svg_width(attrs: dict[str, str | None]) -> float:
    root = ET.fromstring(base64.b64decode((attrs["src"] or "").split(",", 1)[1]))
    return float(re.sub(r"[a-z]+$", "", root.attrib["width"]))


def _declared(led: dl.Ledger, stream: str, n: int, values: str = "ab", draw: str = "") -> None:
    args = {"options": ["a", "b"], "probs": [0.5, 0.5]}
    for i in range(n):
        led.record_draw(stream, "categorical", args, values[i % len(values)], 0.5,
                        decision_id=f"{stream[:20]}-{draw}-{i}")  # fmt: skip


def test_beyond_the_limit_streams_get_one_row_each_and_the_page_says_so(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """With a limit of 3 streams in full: the stream with an alarm (though the smallest) and
    the two largest are drawn, at most one figure each; the rest are rows of a compact table."""
    from drawledger.replay.report import _sections

    monkeypatch.setattr(_sections, "FULL_STREAMS", 3, raising=False)
    monkeypatch.setattr(_sections, "PANELS_PER_STREAM", 1, raising=False)
    ledger = tmp_path / "many.db"
    with dl.Ledger(ledger) as led:
        _declared(led, "drifting", 60, values="a")  # declared 50/50, always "a": an alarm
        for k in range(6):
            _declared(led, f"stream-{k}", 70 + 10 * k)
        _declared(led, "two-draws", 200, draw="x")
        led.record_draw("two-draws", "bernoulli", {"p": 0.5}, True, 0.5, decision_id="extra")
        _declared(led, "rare", 3)  # too few draws to test: "not enough data", not "as declared"
    text = write_report(ledger, tmp_path / "many.html").path.read_text(encoding="utf-8")
    page = parse(text)
    captions = re.findall(r'<figcaption><b><span class="name">([^<]*)</span>', text)
    assert ["drifting", "stream-5", "two-draws"] == sorted(captions)
    assert 1 + 3 == len(images(page))
    assert "9 streams: the 3 with alarms or the most decisions are shown in full" in text
    assert '<p class="note">9 streams' in text
    assert "at most 1 draws per stream; 1 more draws are in the table only" in text
    others = re.search(r"<h3>Other streams</h3>.*?</table>", text, re.S)
    assert others is not None
    assert 6 == others.group(0).count("<tr>") - 1
    rare = re.search(r'<tr><td><span class="name">rare</span>.*?</tr>', others.group(0))
    assert rare is not None and "not enough data" in rare.group(0)


def test_long_names_are_cut_with_the_whole_name_as_title_and_figures_stay_narrow(
    tmp_path: Path,
) -> None:
    """A 20,000-character stream name shows as 59 characters and an ellipsis (the whole name in
    the title attribute), and no figure grows wider than a page."""
    stream = "s" * 20_000
    ledger = tmp_path / "long.db"
    with dl.Ledger(ledger) as led:
        _declared(led, stream, 40)
    text = write_report(ledger, tmp_path / "long.html").path.read_text(encoding="utf-8")
    assert f'<span class="name" title="{stream}">{"s" * 59}…</span>' in text
    assert "overflow-wrap: anywhere" in text
    assert [] == [w for w in map(_svg_width, images(parse(text))) if w > 1000]


def test_control_and_bidirectional_characters_show_as_escapes_in_page_and_figures(
    tmp_path: Path,
) -> None:
    stream = "card\x1b[2J\u202ereversed\r\n\x07"
    ledger = tmp_path / "ctl.db"
    with dl.Ledger(ledger) as led:
        _declared(led, stream, 40)
    text = write_report(ledger, tmp_path / "ctl.html").path.read_text(encoding="utf-8")
    assert r"card\x1b[2J\u202ereversed\x0d\x0a\x07" in text
    assert [] == [c for c in text if c in "\x1b\u202e\r\x07"]
    assert 2 == len(images(parse(text)))


@given(text=hostile_text)
def test_names_and_text_on_the_page_hold_no_control_characters_or_markup(text: str) -> None:
    # Unicode general categories: Cc control, Cf format (bidirectional controls among them),
    # Cs surrogate, Zl/Zp separators.
    for out in (str(_format.name(text)), str(escape(_format.plain(text)))):
        assert [] == [c for c in out if unicodedata.category(c) in {"Cc", "Cf", "Cs", "Zl", "Zp"}]
        assert "<script>" not in out


# -- figures and words a reader sees ---------------------------------------------------------------
def _boxes(fig: Any) -> list[tuple[Any, Any, list[Any]]]:
    """For each axes with a legend: the axes' box, the legend's box and the boxes of what the
    axes draw (bars, lines, bands), in display pixels from the figure's own renderer."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    out = []
    for ax in fig.axes:
        legend = ax.get_legend()
        if legend is None:
            continue
        drawn = [a.get_window_extent(renderer) for a in (*ax.patches, *ax.lines, *ax.collections)]
        out.append((ax.get_window_extent(renderer), legend.get_window_extent(renderer), drawn))
    return out


def test_legends_never_cover_bars_or_curves_and_stay_beside_their_axes(demo_run: Any) -> None:
    """In every "observed vs declared" chart, the forest plot and the sweep of the demo, the
    legend's box (from matplotlib's renderer) overlaps nothing the axes draw, and lies within
    30 pixels of its axes (not floating far below)."""
    from drawledger.replay.audit import AuditFigure
    from drawledger.replay.report._figures import audit_chart, estimate_chart, sweep_chart

    edges = demo_run.audit.bin_edges
    figures = [audit_chart(f, edges) for f in demo_run.audit.figures if f.options]
    assert figures, "the demo has draws with options"
    # Even options: every bar as tall as the others, no free corner for a legend inside.
    even = AuditFigure("tip-prompt", "tip", "categorical", 400, (20,) * 20, (), ('"no"', '"yes"'),
                       (200.0, 200.0), (200.0, 200.0))  # fmt: skip
    figures.append(audit_chart(even, edges))
    figures += [estimate_chart(demo_run.temperature, demo_run.truth["temperature"]),
                sweep_chart(demo_run.delay, demo_run.truth["delay"])]  # fmt: skip
    checked = 0
    for fig in figures:
        for axes, legend, drawn in _boxes(fig):
            assert [] == [box for box in drawn if legend.overlaps(box)]
            assert legend.overlaps(axes.padded(30))
            checked += 1
    assert len(figures) == checked


def test_forest_plot_has_a_title_naming_reward_and_target(demo_run: Any) -> None:
    from drawledger.replay.report._figures import estimate_chart

    (ax,) = estimate_chart(demo_run.temperature, None).axes
    assert "estimated mean checkout under recipe-card with temperature = 0.3" == ax.get_title(
        loc="left"
    )


def test_report_words_stand_alone(demo_html: str) -> None:
    """Differences and intervals are named in plain words, PIT is spelled out, and the page
    explains when not to trust an estimate instead of pointing at files it does not ship."""
    text = " ".join(re.sub(r"<[^>]+>", " ", demo_html).split())
    assert "difference vs logging" in text and "difference interval" in text
    assert "minus logging" not in text
    assert "normal-approximation (CLT) 95% intervals" in text
    assert "clt intervals" not in text
    assert "PIT is the probability integral transform" in text
    assert "docs/" not in text
    assert "effective sample size is small" in text


def test_report_command_json_dash_writes_the_json_alone_on_stdout(
    demo_run: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    html = tmp_path / "r.html"
    code = main(["report", str(demo_run.ledger), "--html", str(html), "--json", "-",
                 "--allow", "drawledger.replay.demo.grocery"])  # fmt: skip
    out, err = capsys.readouterr()
    assert 0 == code, err
    data = json.loads(out)
    assert (True, str(html)) == (data["ok"], data["html"])
    assert f"wrote {html}" in err
