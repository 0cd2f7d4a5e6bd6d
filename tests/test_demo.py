"""The grocery-delivery demo: the scenario's ground truth, and ``drawledger demo`` end to end."""

from __future__ import annotations

import json
import math
import re
import shlex
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, special, stats

import drawledger as dl
from drawledger.cli import main
from drawledger.exceptions import LedgerError, ReplayError
from drawledger.replay import run_demo
from drawledger.replay.demo import grocery
from drawledger.replay.demo._run import _simulate
from drawledger.replay.demo.grocery import ShopperSimulator

INTERVAL = r"\[\d\.\d{4}, \d\.\d{4}\]"


# -- the scenario's ground truth -----------------------------------------------------------------
def test_reminder_term_matches_numerical_integration() -> None:
    """The closed-form reminder term equals E[effect(delay)] integrated numerically.

    Outside check: scipy.integrate.quad of the effect against the log-normal density of
    scipy.stats.lognorm (s = spread, scale = nominal), for several policies.
    """
    for nominal, spread in ((90.0, 0.6), (30.0, 0.6), (45.0, 0.3), (120.0, 1.1)):
        density = stats.lognorm(s=spread, scale=nominal).pdf
        numeric, _ = integrate.quad(
            lambda d, f=density: grocery.reminder_effect(d) * f(d), 0.0, np.inf, limit=200
        )
        reminder_part = ShopperSimulator.true_value(nominal_minutes=nominal, spread=spread) - (
            ShopperSimulator.true_value(nominal_minutes=1e9, spread=spread)
        )
        assert numeric == pytest.approx(reminder_part, rel=1e-7, abs=1e-12)


def test_card_term_uses_the_softmax_of_the_scores() -> None:
    """The card term is sum over contexts and cards of share * softmax(scores / T) * lift.

    Outside check: the softmax of scipy.special.softmax, summed here independently.
    """
    for temperature in (0.3, 0.7, 2.0):
        expected = 0.0
        for segment, p_seg in grocery.SEGMENTS.items():
            for daypart, p_day in grocery.DAYPARTS.items():
                s = np.array(grocery.scores(segment, daypart)) / temperature
                probs = special.softmax(s)
                lift = grocery.CARD_LIFT * float(probs @ np.array(grocery.appeal(segment, daypart)))
                expected += (
                    p_seg * p_day * (grocery._BASE[segment] + grocery._SHIFT[daypart] + lift)
                )
        far = ShopperSimulator.true_value(temperature=temperature, nominal_minutes=1e9)
        assert expected == pytest.approx(far, rel=1e-12)


def test_true_value_agrees_with_a_large_simulation() -> None:
    """The exact value of a policy lies within 4 Monte Carlo standard errors of a simulation of
    400,000 sessions (4 standard errors: common practice for a check that must not flake)."""
    sim = ShopperSimulator(seed=11)
    n = 400_000
    for policy in ({}, {"temperature": 0.3}, {"nominal_minutes": 45.0}):
        exact = ShopperSimulator.true_value(**policy)
        simulated = sim.simulate_value(n, **policy)
        se = math.sqrt(exact * (1.0 - exact) / n)
        assert abs(simulated - exact) < 4.0 * se, (policy, simulated, exact)


def test_lower_temperature_and_shorter_delay_raise_the_true_checkout_rate() -> None:
    """The demo's what-if questions have answers worth asking: both targets beat the logging
    policy, and the delay curve peaks between 30 and 90 minutes."""
    logging = ShopperSimulator.true_value()
    assert ShopperSimulator.true_value(temperature=0.3) > logging + 0.01
    curve = [ShopperSimulator.true_value(nominal_minutes=m) for m in (30, 40, 60, 90)]
    assert max(curve) == curve[1]
    assert curve[-1] == pytest.approx(logging)


def test_checkout_probability_stays_inside_the_unit_interval() -> None:
    """Every context, card and delay gives a probability strictly between 0 and 1."""
    for segment in grocery.SEGMENTS:
        for daypart in grocery.DAYPARTS:
            for card in grocery.CARDS:
                for delay in (0.01, 1.0, 40.0, 1e6):
                    p = grocery.checkout_probability(segment, daypart, card, delay)
                    assert 0.0 < p < 1.0


def test_simulator_is_reproducible_from_its_seed() -> None:
    """Two simulators with one seed draw the same sessions and the same checkouts."""
    a, b = ShopperSimulator(3), ShopperSimulator(3)
    sa, sb = a.sessions(50), b.sessions(50)
    assert sa == sb
    assert [a.checkout(s, "taco-night", 40.0) for s in sa] == [
        b.checkout(s, "taco-night", 40.0) for s in sb
    ]
    assert sa != ShopperSimulator(4).sessions(50)


def test_sessions_follow_the_declared_context_shares() -> None:
    """Segments and dayparts of simulated sessions match their shares (chi-square goodness of
    fit, scipy.stats.chisquare; p > 0.001)."""
    sessions = ShopperSimulator(5).sessions(20_000)
    for shares, attr in ((grocery.SEGMENTS, "segment"), (grocery.DAYPARTS, "daypart")):
        observed = [sum(getattr(s, attr) == k for s in sessions) for k in shares]
        expected = [p * len(sessions) for p in shares.values()]
        assert stats.chisquare(observed, expected).pvalue > 1e-3


def test_simulator_refuses_an_empty_population() -> None:
    with pytest.raises(ValueError, match="at least 1"):
        ShopperSimulator().sessions(0)


# -- drawledger demo -------------------------------------------------------------------------------
def test_demo_command_end_to_end(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """`drawledger demo --decisions 300` exits 0, writes the ledger and the report, and prints
    every estimator's and every sweep point's interval beside the true value."""
    out = tmp_path / "demo"
    assert 0 == main(["demo", "--decisions", "300", "--out", str(out)])
    text = capsys.readouterr().out
    assert (out / "report.html").stat().st_size > 10_000
    con = sqlite3.connect(out / "decisions.db")
    try:
        assert [("recipe-card", 300), ("reminder-delay", 300)] == con.execute(
            "SELECT stream, COUNT(*) FROM decisions GROUP BY stream ORDER BY stream"
        ).fetchall()
        assert 600 == con.execute("SELECT COUNT(*) FROM outcomes").fetchone()[0]
    finally:
        con.close()
    assert "600 of 600 decisions verified" in text
    assert "integrity intact" in text
    truth = f"{ShopperSimulator.true_value(temperature=0.3):.4f}"
    for name in ("ips", "snips", "clipped", "dr"):
        assert re.search(rf"^  {name} +\d\.\d{{4}} +{INTERVAL} +{truth}", text, re.M), name
    for minutes in (45, 60, 75, 90):
        true = f"{ShopperSimulator.true_value(nominal_minutes=minutes):.4f}"
        assert re.search(rf"^ +{minutes} +\d\.\d{{4}} +{INTERVAL} +{true}", text, re.M), minutes
    # 300 sessions are too few for 45 minutes (ESS below 100): the row says so, as the report
    assert re.search(r"^ +45 .* read with care$", text, re.M)
    assert re.search(r"^ +90 .*\d$", text, re.M)
    assert "read with care: the weights are too uneven there" in text
    assert f"report   {out / 'report.html'}" in text


def test_demo_result_carries_every_report(demo_run: object) -> None:
    """run_demo returns the verify, audit, estimate and sweep reports and the true values."""
    d = demo_run.to_dict()  # type: ignore[attr-defined]
    assert {"ok", "sessions", "seed", "ledger", "report", "verify", "audit", "temperature",
            "delay", "truth", "seconds"} == set(d)  # fmt: skip
    assert 300 == d["sessions"]
    assert 600 == d["verify"]["verified"]
    assert {"ips", "snips", "clipped", "dr"} == set(d["temperature"]["estimates"])
    assert [45.0, 60.0, 75.0, 90.0] == [p["value"] for p in d["delay"]["points"]]
    assert 4 == len(d["truth"]["delay"])
    assert {"simulate", "verify", "audit", "estimate", "sweep", "report"} == set(d["seconds"])


def test_demo_result_shows_in_a_notebook_with_the_true_value(demo_run: object) -> None:
    """A notebook shows the demo as a table of the temperature estimates, the true value in its
    caption."""
    table = demo_run._repr_html_()  # type: ignore[attr-defined]
    truth = demo_run.truth["temperature"]  # type: ignore[attr-defined]
    assert table.startswith("<table><caption>drawledger demo, 300 sessions")
    assert f"true checkout rate {truth:.3f}" in table
    assert 4 == table.count("<tr><td>")


def test_demo_replaces_its_previous_ledger(tmp_path: Path) -> None:
    """A demo into a directory that holds a previous demo ledger starts a fresh one."""
    _simulate(tmp_path / "decisions.db", 60, seed=1, progress=False)
    result = run_demo(50, tmp_path)
    assert 100 == result.verification.decisions
    assert result.verification.integrity.ok


def test_demo_refuses_to_replace_a_file_that_is_not_a_ledger(tmp_path: Path) -> None:
    """decisions.db that is not a drawledger ledger is left alone, with a clear error."""
    precious = tmp_path / "decisions.db"
    precious.write_bytes(b"not a ledger")
    with pytest.raises(LedgerError, match="not a drawledger ledger"):
        run_demo(60, tmp_path)
    assert b"not a ledger" == precious.read_bytes()


def test_demo_refuses_to_replace_another_ledger(tmp_path: Path) -> None:
    """A ledger with decisions of other code in --out is left alone, with a clear error."""
    with dl.Ledger(tmp_path / "decisions.db") as ledger:
        ledger.record_draw("slot-discount", "bernoulli", {"p": 0.5}, True, 0.5)
    with pytest.raises(LedgerError, match="1 decisions that are not the demo's"):
        run_demo(60, tmp_path)
    con = sqlite3.connect(tmp_path / "decisions.db")
    try:
        assert 1 == con.execute("SELECT COUNT(*) FROM decisions").fetchone()[0]
    finally:
        con.close()


def test_demo_replaces_a_ledger_of_an_earlier_demo(tmp_path: Path) -> None:
    """A demo ledger written before the demo's module moved is still the demo's own."""
    run_demo(60, tmp_path)
    with sqlite3.connect(tmp_path / "decisions.db") as con:
        con.execute(
            "UPDATE decisions SET fn = replace(fn, 'replay.demo.grocery', 'replay._grocery')"
        )
    assert run_demo(60, tmp_path).verification.ok


@pytest.mark.parametrize("bad", [0, 49, 2_000_000, True, 1.5, "300"])
def test_demo_rejects_bad_sizes(tmp_path: Path, bad: object) -> None:
    with pytest.raises(ReplayError, match="sessions"):
        run_demo(bad, tmp_path)  # type: ignore[arg-type]
    assert not (tmp_path / "decisions.db").exists()


def test_demo_command_bad_usage_is_one_line_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--decisions 10 and an --out that is a file are usage errors: one line, exit 2."""
    assert 2 == main(["demo", "--decisions", "10", "--out", str(tmp_path)])
    err = capsys.readouterr().err
    assert 1 == len(err.strip().splitlines())
    assert "drawledger demo: error: the demo needs between 50 and" in err
    a_file = tmp_path / "file"
    a_file.write_text("x")
    assert 2 == main(["demo", "--decisions", "100", "--out", str(a_file)])
    assert "is a file, not a directory" in capsys.readouterr().err


def test_the_printed_commands_re_run_the_checks_as_printed(demo_run: object) -> None:
    """The demo prints verify, audit, estimate and report commands naming the public demo
    module; the verify command, run as printed in a fresh process, passes (exit 0)."""
    text = demo_run.render()  # type: ignore[attr-defined]
    printed = [line.strip() for line in text.splitlines() if line.startswith("  drawledger ")]
    assert ["verify", "audit", "estimate", "report"] == [c.split()[1] for c in printed]
    verify_line = printed[0]
    assert "--allow drawledger.replay.demo.grocery" in verify_line
    argv = shlex.split(verify_line)[1:]
    done = subprocess.run([sys.executable, "-m", "drawledger.cli", *argv], capture_output=True,
                          text=True, timeout=300)  # fmt: skip
    assert (0, "") == (done.returncode, done.stderr)
    assert "verify passed" in done.stdout


def test_demo_json_dash_writes_the_result_alone_on_stdout(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert 0 == main(["demo", "--decisions", "60", "--out", str(tmp_path / "d"), "--json", "-"])
    out, err = capsys.readouterr()
    assert 60 == json.loads(out)["sessions"]
    assert "Re-run the checks on this ledger:" in err
