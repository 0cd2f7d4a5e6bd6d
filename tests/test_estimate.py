"""``estimate`` and ``sweep`` end to end on real SQLite ledgers of the grocery scenario."""

from __future__ import annotations

import importlib
import math
import re
import shutil
import sqlite3
import sys
from pathlib import Path
from typing import Any

import estimate_shop as shop
import numpy as np
import orjson
import pytest
import scipy.integrate
import scipy.special
import scipy.stats
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

import drawledger as dl
from drawledger.exceptions import EstimateRefusedError, MissingFunctionError, ReplayError
from drawledger.ledger import REGISTRY
from drawledger.replay import EstimateReport, WhatIf, estimate, sweep, verify, write_report
from drawledger.replay.verify import REASONS

N_CARDS = 1500
DOCS = Path(__file__).parent.parent / "docs" / "estimators.md"


def _record(path: Path, simulate: Any, n: int, **params: Any) -> Path:
    led = dl.Ledger(path)
    simulate(led, n, **params)
    led.close()
    return path


@pytest.fixture(scope="module")
def cards(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """1500 recipe-card decisions: softmax at temperature 0.7, seeded draws and checkouts."""
    return _record(tmp_path_factory.mktemp("cards") / "cards.db", shop.simulate_cards, N_CARDS,
                   seed=3)  # fmt: skip


@pytest.fixture(scope="module")
def cards_rows(cards: Path) -> Any:
    return verify(cards).rows


def _numpy_weights(rows: Any, temperature: float) -> tuple[np.ndarray, np.ndarray]:
    """Target / logging probability of each logged card, from scipy.special.softmax."""
    seg = rows["input.ctx.segment"].map(shop.SEGMENTS.index).to_numpy()
    card = rows["action"].map(shop.CARDS.index).to_numpy()
    target = scipy.special.softmax(shop.SCORES / temperature, axis=1)[seg, card]
    logging = scipy.special.softmax(shop.SCORES / 0.7, axis=1)[seg, card]
    return target / logging, rows["checkout"].to_numpy(dtype=float)


def test_estimates_are_the_formulas_on_the_ledgers_records(cards, cards_rows):
    """IPS and SNIPS from the pipeline equal the formulas over scipy softmax probabilities."""
    report = estimate(cards, reward="checkout", overrides={"temperature": 0.3})
    w, r = _numpy_weights(cards_rows, 0.3)
    assert N_CARDS == report.n
    np.testing.assert_allclose(report.weights, w, rtol=1e-12)
    assert (w * r).mean() == pytest.approx(report.estimates["ips"]["value"], rel=1e-12)
    assert (w * r).sum() / w.sum() == pytest.approx(report.estimates["snips"]["value"], rel=1e-12)
    assert (w.sum() ** 2 / (w**2).sum()) == pytest.approx(report.diagnostics["ess"], rel=1e-12)
    assert w.max() == pytest.approx(report.diagnostics["max_weight"], rel=1e-12)
    assert r.mean() == pytest.approx(report.logging_value, rel=1e-12)
    assert {"enumerated": N_CARDS} == report.target["propensities"]
    assert report.ok and 0.0 == report.diagnostics["support_deficit"]


def test_intervals_cover_the_true_value_of_the_target(cards):
    """The simulator knows every card's checkout rate: the true value of temperature 0.3."""
    report = estimate(cards, reward="checkout", overrides={"temperature": 0.3}, level=0.99)
    truth = shop.true_card_value(N_CARDS, 3, shop.softmax_table(0.3))
    for name in ("ips", "snips", "clipped", "dr"):
        e = report.estimates[name]
        low, high = e.get("outer_low", e["low"]), e.get("outer_high", e["high"])
        assert low <= truth <= high, name
    gain = truth - shop.true_card_value(N_CARDS, 3, shop.softmax_table(0.7))
    d = report.difference["snips"]
    assert d["low"] <= gain <= d["high"]


def test_json_has_the_design_keys_and_is_serializable(cards):
    out = estimate(cards, reward="checkout", overrides={"temperature": 0.3}).to_dict()
    assert {"n", "target", "estimates", "diagnostics"} <= set(out)
    assert {"ips", "snips", "clipped", "dr"} == set(out["estimates"])
    for e in out["estimates"].values():
        assert {"value", "low", "high"} <= set(e)
    assert {"bias_low", "bias_bound", "outer_low", "outer_high"} <= set(out["estimates"]["clipped"])
    assert {"ess", "max_weight", "support_deficit"} <= set(out["diagnostics"])
    assert {"temperature": 0.3} == out["target"]["overrides"]
    assert 0 == out["excluded"]["total"]
    orjson.dumps(out)


def test_the_logging_policy_as_target_has_unit_weights_and_a_zero_difference(cards):
    report = estimate(cards, reward="checkout", overrides={"temperature": 0.7})
    assert np.array_equal(np.ones(N_CARDS), report.weights)
    assert N_CARDS == pytest.approx(report.diagnostics["ess"])
    for name in ("ips", "snips", "clipped", "dr"):
        d = report.difference[name]
        assert 0.0 == pytest.approx(d["value"], abs=1e-12)
        assert 0.0 == pytest.approx(d["high"] - d["low"], abs=1e-9)


def test_paired_difference_between_two_targets_is_their_difference(cards):
    a = estimate(cards, reward="checkout", overrides={"temperature": 0.3})
    b = estimate(cards, reward="checkout", overrides={"temperature": 1.5})
    ab = estimate(cards, reward="checkout", overrides={"temperature": 0.3},
                  baseline={"temperature": 1.5})  # fmt: skip
    for name in ("ips", "snips", "clipped", "dr"):
        expected = a.estimates[name]["value"] - b.estimates[name]["value"]
        assert expected == pytest.approx(ab.difference[name]["value"], abs=1e-9)
    # Paired: narrower than the two intervals side by side.
    width = ab.difference["snips"]["high"] - ab.difference["snips"]["low"]
    assert width < (a.estimates["snips"]["high"] - a.estimates["snips"]["low"]) + (
        b.estimates["snips"]["high"] - b.estimates["snips"]["low"]
    )
    assert ab.logging_value is None
    assert {"overrides": {"temperature": 1.5}} == {
        k: v for k, v in ab.baseline.items() if k != "diagnostics"
    }
    # the baseline's weights are those of temperature 1.5 as a target
    for key in ("ess", "max_weight_share", "support_deficit"):
        assert b.diagnostics[key] == pytest.approx(ab.baseline["diagnostics"][key], rel=1e-9)


def test_callable_target_gives_the_probability_of_each_logged_action(cards, cards_rows):
    """best_card puts probability 1 on the best-scored card: weight 1 / mu(best) there."""
    report = estimate(cards, reward="checkout", target="estimate_shop:best_card")
    seg = cards_rows["input.ctx.segment"].map(shop.SEGMENTS.index).to_numpy()
    card = cards_rows["action"].map(shop.CARDS.index).to_numpy()
    mu = scipy.special.softmax(shop.SCORES / 0.7, axis=1)
    best = shop.SCORES.argmax(axis=1)
    expected = np.where(card == best[seg], 1.0 / mu[seg, best[seg]], 0.0)
    np.testing.assert_allclose(report.weights, expected, rtol=1e-12)
    assert {"callable": N_CARDS} == report.target["propensities"]
    assert "dr" in report.estimates and 0.0 == report.diagnostics["support_deficit"]


def test_segments_by_an_input_field_split_the_records(cards, cards_rows):
    report = estimate(cards, reward="checkout", overrides={"temperature": 0.3},
                      by="ctx.segment")  # fmt: skip
    groups = report.segments["groups"]
    assert sorted(shop.SEGMENTS) == [g["value"] for g in groups]
    assert N_CARDS == sum(g["n"] for g in groups)
    w, r = _numpy_weights(cards_rows, 0.3)
    fam = (cards_rows["input.ctx.segment"] == "family").to_numpy()
    family = next(g for g in groups if g["value"] == "family")
    assert (w[fam] * r[fam]).mean() == pytest.approx(family["estimates"]["ips"]["value"])
    # The verifier's column name selects the same segments.
    again = estimate(cards, reward="checkout", overrides={"temperature": 0.3},
                     by="input.ctx.segment")  # fmt: skip
    assert [g["n"] for g in groups] == [g["n"] for g in again.segments["groups"]]
    assert "segments by ctx.segment" in str(report)


def test_a_segment_too_small_to_read_is_marked_without_failing_the_estimate(tmp_path):
    """300 family sessions and 8 budget ones: 8 records are below the ESS floor of 100, so that
    row reads "read with care" (its alerts in the JSON); the estimate over all 308 stands."""
    led = dl.Ledger(tmp_path / "segments.db")
    shop.use(led, seed=6)
    for i in range(308):
        card = shop.feature_card(shop.context(0 if i < 300 else 3), decision_id=f"d{i}")
        led.outcome(f"d{i}", "checkout", float(card == "taco-night"))
    led.close()
    report = estimate(tmp_path / "segments.db", reward="checkout",
                      overrides={"temperature": 0.6}, by="ctx.segment")  # fmt: skip
    assert ([], True) == (report.alerts, report.ok)
    budget, family = report.segments["groups"]
    assert ("budget", 8, "family", []) == (budget["value"], budget["n"], family["value"],
                                           family["alerts"])  # fmt: skip
    assert budget["alerts"][0].startswith("effective sample size")
    rows = {line.split()[0]: line for line in str(report).splitlines()
            if line.strip().startswith(("budget", "family"))}  # fmt: skip
    assert rows["budget"].rstrip().endswith("read with care")
    assert not rows["family"].rstrip().endswith("read with care")


def test_sweep_gives_a_curve_with_bands_and_a_figure(cards, tmp_path):
    report = sweep(cards, reward="checkout", param="temperature", values=[0.3, 0.7, 1.2])
    assert [0.3, 0.7, 1.2] == [p["value"] for p in report.points]
    at_logging = report.points[1]["estimates"]["ips"]["value"]
    assert report.baseline["estimates"]["ips"]["value"] == pytest.approx(at_logging)
    single = estimate(cards, reward="checkout", overrides={"temperature": 1.2})
    assert single.estimates["dr"]["value"] == pytest.approx(
        report.points[2]["estimates"]["dr"]["value"], rel=1e-12
    )
    table = report.table
    assert 12 == len(table)
    assert {"temperature", "estimator", "estimate", "low", "high"} <= set(table.columns)
    fig = report.figure()
    assert 1 == len(fig.axes)
    fig.savefig(tmp_path / "sweep.png")
    assert (tmp_path / "sweep.png").stat().st_size > 1000
    assert "temperature sweep" in str(report)
    orjson.dumps(report.to_dict())


def test_bootstrap_and_bernstein_intervals(cards):
    clt = estimate(cards, reward="checkout", overrides={"temperature": 0.3})
    boot = estimate(cards, reward="checkout", overrides={"temperature": 0.3},
                    interval="bootstrap", bootstrap=300, seed=2)  # fmt: skip
    bern = estimate(cards, reward="checkout", overrides={"temperature": 0.3},
                    interval="bernstein")  # fmt: skip
    for name in ("ips", "snips", "dr"):
        c, b, e = clt.estimates[name], boot.estimates[name], bern.estimates[name]
        assert c["value"] == b["value"] == e["value"]
        assert b["low"] < b["value"] < b["high"]
        assert abs((b["high"] - b["low"]) / (c["high"] - c["low"]) - 1.0) < 0.25
        assert e["low"] < c["low"] and c["high"] < e["high"]  # the bound is conservative
    assert 300 == boot.settings["bootstrap"]


@pytest.fixture(scope="module")
def greedy(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Greedy logging (epsilon 0): only the best-scored card is ever shown."""
    return _record(tmp_path_factory.mktemp("greedy") / "greedy.db", shop.simulate_cards, 300,
                   seed=5, decision=shop.greedy_card)  # fmt: skip


def test_support_deficit_is_reported_not_silently_averaged(greedy):
    """epsilon 0.3 puts 0.3 * 5/6 = 0.25 on cards greedy logging never shows (by hand)."""
    report = estimate(greedy, reward="checkout", overrides={"epsilon": 0.3})
    assert 0.25 == pytest.approx(report.diagnostics["support_deficit"], rel=1e-12)
    assert not report.ok
    assert any("cannot answer" in w for w in report.warnings)
    assert "cannot answer" in str(report)


def test_support_deficit_warning_says_what_it_does_to_each_estimator(greedy):
    """Deficit 0.25, rewards in [0, 1]: IPS and clipped IPS count the unseen share as 0 (at most
    0.25 too low); SNIPS and DR fill it, so they can be off either way by up to 0.25."""
    report = estimate(greedy, reward="checkout", overrides={"epsilon": 0.3})
    [warning] = [w for w in report.warnings if w.startswith("support deficit")]
    assert "ips and clipped count that share as reward 0 (biased toward 0 by up to 0.25)" in (
        warning
    )
    assert ("snips gives it the seen actions' mean reward and dr its reward model's "
            "predictions (biased up or down by up to 0.25)") in warning  # fmt: skip


@pytest.fixture(scope="module")
def delays(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Reminder delays: log-normal around 90 minutes (spread 0.6)."""
    return _record(tmp_path_factory.mktemp("delays") / "delays.db", shop.simulate_delays, 1500,
                   seed=8)  # fmt: skip


def test_continuous_actions_use_density_ratios(delays):
    """Weights are ratios of log-normal densities (scipy.stats.lognorm) at the logged delay."""
    report = estimate(delays, reward="checkout", overrides={"nominal_minutes": 60.0}, level=0.99)
    x = verify(delays).rows["action"].astype(float).to_numpy()
    expected = scipy.stats.lognorm.pdf(x, 0.6, scale=60.0) / scipy.stats.lognorm.pdf(
        x, 0.6, scale=90.0
    )
    np.testing.assert_allclose(report.weights, expected, rtol=1e-9)
    assert {"density": 1500} == report.target["propensities"]
    assert "dr" not in report.estimates
    assert any("dr needs" in w for w in report.warnings)
    assert 0.0 == report.diagnostics["support_deficit"]  # a log-normal reaches every delay
    truth = scipy.integrate.quad(
        lambda m: shop.delay_checkout(m) * scipy.stats.lognorm.pdf(m, 0.6, scale=60.0),
        0, np.inf,
    )[0]  # fmt: skip
    e = report.estimates["snips"]
    assert e["low"] <= truth <= e["high"]


def test_uneven_weights_are_not_ok_in_estimate_sweep_and_the_report_badge(delays, tmp_path):
    """The delays were logged around 90 minutes. At 35 the effective sample size is 9.9% of
    the 1500 records, at 45 one weight carries 1.7% of the sum of the weights (both passed the
    earlier rule: ESS >= 100 and >= 1% of n); at 60 neither rule fires. One rule decides the
    warning, ``ok`` (the exit code) and the report's badge."""
    curve = sweep(delays, reward="checkout", param="nominal_minutes", values=[35.0, 45.0, 60.0])
    assert not curve.ok
    heavy = [w for w in curve.warnings if "heavy weights" in w]
    assert 2 == len(heavy)
    assert heavy[0].startswith("nominal_minutes=35.0: effective sample size 148.6 is 9.91% of")
    assert heavy[1].startswith("nominal_minutes=45.0: the largest weight carries 1.7% of the ")
    alerted = [a.split(":")[0] for a in curve.alerts]  # said at the top as well
    assert ["nominal_minutes=35.0", "nominal_minutes=45.0"] == alerted
    assert ([], True) == (curve.points[2]["alerts"], bool(curve.points[0]["alerts"]))
    d35, d45, d60 = (p["diagnostics"] for p in curve.points)
    assert 100 <= d35["ess"] < 0.1 * 1500 <= d45["ess"]
    assert d45["max_weight_share"] > 0.01 >= d60["max_weight_share"]
    single = estimate(delays, reward="checkout", overrides={"nominal_minutes": 45.0})
    assert not single.ok
    assert any("the largest weight carries" in w for w in single.warnings)
    fine = estimate(delays, reward="checkout", overrides={"nominal_minutes": 60.0})
    assert fine.ok
    whatifs = [WhatIf("delay", curve), WhatIf("at 60", fine)]
    page = write_report(delays, tmp_path / "r.html", whatifs=whatifs)
    text = page.path.read_text(encoding="utf-8")
    assert 1 == text.count("read with care") and 1 == text.count("diagnostics ok")
    assert not page.ok  # a what-if the data cannot answer fails the page, as it fails estimate


def test_continuous_support_deficit_is_found_by_sampling_the_target(tmp_path):
    """Logging delays are uniform on (0, 60); a 120-minute window puts half its mass beyond."""
    path = _record(tmp_path / "window.db", shop.simulate_delays, 400, seed=9,
                   decision=shop.reminder_window)  # fmt: skip
    report = estimate(path, reward="checkout", overrides={"window": 120.0})
    assert 0.4 < report.diagnostics["support_deficit"] < 0.6  # binomial(400, 0.5) / 400
    assert not report.ok
    [warning] = [w for w in report.warnings if w.startswith("support deficit")]
    assert "snips gives it the seen actions' mean reward (biased up or down" in warning
    assert "dr its" not in warning  # no dr estimate for continuous actions
    assert np.allclose(report.weights, 0.5)  # density 1/120 over 1/60 at every logged delay


def test_accepted_failures_leave_records_out_counted_by_reason(cards, tmp_path):
    """Tampered records fail the integrity check and verification; once both are accepted
    they are left out and counted, and the report is marked at the top and not ok."""
    path = tmp_path / "tampered.db"
    shutil.copy(cards, path)
    with sqlite3.connect(path) as conn:
        conn.execute("UPDATE decisions SET propensity = propensity / 2 WHERE rowid <= 4")
    ask: dict[str, Any] = dict(reward="checkout", overrides={"temperature": 0.3})
    with pytest.raises(EstimateRefusedError, match="integrity check"):
        estimate(path, **ask)
    with pytest.raises(EstimateRefusedError, match=r"4 of 1500 decisions .* \(probability: 4\)"):
        estimate(path, accept_integrity_failures=True, **ask)
    report = estimate(path, accept_integrity_failures=True,
                      accept_verification_failures=["probability"], **ask)  # fmt: skip
    assert N_CARDS - 4 == report.n
    assert 4 == report.to_dict()["excluded"]["total"]
    assert 4 == report.excluded["probability"]
    assert any(w.startswith(f"4 of {N_CARDS} decisions were excluded") for w in report.warnings)
    assert not report.ok
    assert {"integrity": 4, "probability": 4} == report.accepted_failures["verification"]
    assert str(report).startswith("ALERT: INTEGRITY FAILURES ACCEPTED")


def test_a_ledger_that_fails_its_integrity_check_is_refused(cards, tmp_path):
    """Outcome values edited without the key (every checkout 0 made 1) used to move SNIPS and
    exit 0 with a warning; now nothing is estimated unless the failures are accepted."""
    path = tmp_path / "edited.db"
    shutil.copy(cards, path)
    with sqlite3.connect(path) as conn:
        edited = conn.execute("UPDATE outcomes SET value = 1.0 WHERE value = 0.0").rowcount
    ask: dict[str, Any] = dict(reward="checkout", overrides={"temperature": 0.3})
    with pytest.raises(EstimateRefusedError, match=f"bad_hashes: {edited}") as refused:
        estimate(path, **ask)
    assert ("integrity", {"bad_hashes": edited}) == (refused.value.check, refused.value.problems)
    with pytest.raises(EstimateRefusedError, match="integrity check"):
        sweep(path, reward="checkout", param="temperature", values=[0.3, 1.0])
    report = estimate(path, accept_integrity_failures=True, **ask)
    out = report.to_dict()
    assert ["alerts", "accepted_failures"] == list(out)[:2]
    assert {"bad_hashes": edited} == out["accepted_failures"]["integrity"]
    assert edited == out["accepted_failures"]["dropped"]
    assert report.alerts[0].startswith("INTEGRITY FAILURES ACCEPTED (bad_hashes")
    assert "biased" in report.alerts[1]
    assert report._repr_html_().startswith("<p><b>ALERT:</b> INTEGRITY FAILURES ACCEPTED")
    assert not report.ok
    curve = sweep(path, reward="checkout", param="temperature", values=[0.3, 1.0],
                  accept_integrity_failures=True)  # fmt: skip
    assert not curve.ok and curve.to_dict()["accepted_failures"]["integrity"]


def test_a_clean_ledger_has_no_alerts_and_nothing_accepted(cards):
    out = estimate(cards, reward="checkout", overrides={"temperature": 0.3}).to_dict()
    assert ([], None) == (out["alerts"], out["accepted_failures"])
    assert {"filled": 0, "share": 0.0, "value": 0.0} == out["missing_rewards"]


@pytest.fixture(scope="module")
def sloppy(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """200 sloppy-card decisions: the card comes from the random module, not from draw."""
    return _record(tmp_path_factory.mktemp("sloppy") / "sloppy.db", shop.simulate_cards, 200,
                   seed=5, decision=shop.sloppy_card)  # fmt: skip


def test_a_stream_whose_decisions_fail_replay_is_refused(sloppy):
    """The few decisions that replay by chance are a biased subset: refused, with counts."""
    with pytest.raises(EstimateRefusedError, match="failed verification") as refused:
        estimate(sloppy, reward="checkout")
    assert "verification" == refused.value.check
    assert 100 < refused.value.problems["action"] <= 200
    with pytest.raises(EstimateRefusedError, match="action"):
        estimate(sloppy, reward="checkout", accept_verification_failures=["nondeterministic"])
    with pytest.raises(EstimateRefusedError, match="failed verification"):
        sweep(sloppy, reward="checkout", param="temperature", values=[0.3, 1.0])


def test_accepted_verification_failures_mark_the_estimate_biased(sloppy):
    report = estimate(sloppy, reward="checkout", accept_verification_failures=["all"])
    accepted = report.accepted_failures
    assert accepted is not None
    assert 200 == accepted["decisions"] == report.n + accepted["dropped"]
    assert accepted["dropped"] / 200 == pytest.approx(accepted["dropped_share"])
    assert report.alerts[0].startswith(f"VERIFICATION FAILURES ACCEPTED: {accepted['dropped']} "
                                       "of 200 decisions")  # fmt: skip
    assert "biased" in report.alerts[0]
    assert not report.ok


CODE = """
import drawledger as dl

ledger = dl.Ledger({ledger!r})


@ledger.decision("recipe-card")
def pick(scores: list[float], draw: dl.Draw, *, temperature: float = 0.7) -> str:
    cards = ["one-pot-pasta", "green-curry", "taco-night"]
{body}
"""
SOFTMAX = '    return draw.softmax(cards, scores, temperature=temperature, name="card")'


def _changed_code(root: Path, edited: str) -> tuple[Path, Path]:
    """40 decisions recorded by a module in ``root/code``, whose body is then ``edited``."""
    code, ledger = root / "code", root / "changed.db"
    code.mkdir()
    name = f"changed_{root.name[-12:].replace('-', '_')}"
    (code / f"{name}.py").write_text(CODE.format(ledger=str(ledger), body=SOFTMAX))
    sys.path.insert(0, str(code))
    try:
        module = importlib.import_module(name)
        for i in range(40):
            card = module.pick([1.0 + i % 3, 2.0, 0.5], decision_id=f"d{i}")
            module.ledger.outcome(f"d{i}", "checkout", float(card == "green-curry"))
        module.ledger.close()
    finally:
        sys.path.remove(str(code))
        sys.modules.pop(name, None)
        for key in [k for k in REGISTRY if k.startswith(name + ":")]:
            del REGISTRY[key]
    (code / f"{name}.py").write_text(CODE.format(ledger=str(ledger), body=edited))
    return ledger, code


def test_accepted_code_changes_that_replay_as_recorded_are_used(tmp_path):
    """An edit that changes the code, not the draws: refused by default; with code-changed
    accepted every decision is used (nothing dropped, nothing biased)."""
    edited = SOFTMAX.replace("temperature=temperature", "temperature=temperature * 1.0")
    ledger, code = _changed_code(tmp_path, edited)
    with pytest.raises(EstimateRefusedError, match=r"40 of 40 .*\(version-not-found: 40\)"):
        estimate(ledger, reward="checkout", path=[code])
    report = estimate(ledger, reward="checkout", path=[code],
                      accept_verification_failures=["version-not-found"])  # fmt: skip
    assert (40, None) == (report.n, report.accepted_failures)
    # 40 records are too few to read as is (an alert of its own), but nothing was accepted
    assert [] == [a for a in report.alerts if not a.startswith("effective sample size 40.0")]
    assert report.warnings[0].startswith("40 decisions ran under decision code that has changed")


def test_accepting_code_changes_does_not_accept_what_they_changed(tmp_path):
    edited = SOFTMAX.replace("scores,", "[2 * x for x in scores],")
    ledger, code = _changed_code(tmp_path, edited)
    with pytest.raises(EstimateRefusedError, match="args") as refused:
        estimate(ledger, reward="checkout", path=[code],
                 accept_verification_failures=["version-not-found"])  # fmt: skip
    assert "version-not-found" not in refused.value.problems


def test_unknown_reasons_to_accept_are_refused(small):
    with pytest.raises(ReplayError, match="unknown verification reason 'code-change'"):
        estimate(small, reward="checkout", accept_verification_failures=["code-change"])
    with pytest.raises(ReplayError, match="a list of reasons"):
        estimate(small, reward="checkout", accept_verification_failures="code-changed")
    with pytest.raises(ReplayError, match="must be True or False"):
        estimate(small, reward="checkout", accept_integrity_failures="yes")


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(accept=st.one_of(
    st.none(), st.integers(), st.text(max_size=8), st.binary(max_size=4),
    st.lists(st.one_of(st.none(), st.integers(), st.text(max_size=8), st.lists(st.integers())),
             min_size=1, max_size=3),
))  # fmt: skip
def test_bad_reasons_to_accept_raise_one_clear_error_before_any_read(small, accept):
    """Anything but a list of known reasons is refused with a ReplayError, never a traceback
    from deeper down (the ledger is not read: the options are checked first)."""
    assume(not (isinstance(accept, list) and all(r in (*REASONS, "all") for r in accept)))
    with pytest.raises(ReplayError, match=r"accept_verification_failures must be|unknown verif"):
        estimate(small, reward="checkout", accept_verification_failures=accept)


@pytest.mark.parametrize("name", ["two.db", "two-parquet"])
def test_a_reward_the_stream_never_received_is_refused_naming_its_outcomes(tmp_path, name):
    """Reminder opens exist, but only for reminders: on the cards they would all count as 0."""
    led = dl.Ledger(tmp_path / name, format="parquet" if "parquet" in name else None)
    shop.use(led, seed=2)
    for i in range(20):
        shop.feature_card(shop.context(i % 4), decision_id=f"c{i}")
        shop.reminder_delay({"items": 2}, decision_id=f"r{i}")
        led.outcome(f"c{i}", "checkout", float(i % 3 == 0))
        led.outcome(f"c{i}", "basket_size", 3.0)
        led.outcome(f"r{i}", "reminder_open", 1.0)
    led.close()
    message = ("no decision of stream 'recipe-card' has a 'reminder_open' outcome; its "
               "outcomes are: 'basket_size', 'checkout'")  # fmt: skip
    with pytest.raises(ReplayError, match=message):
        estimate(tmp_path / name, reward="reminder_open", stream="recipe-card")
    with pytest.raises(ReplayError, match="its outcomes are: 'basket_size', 'checkout'"):
        estimate(tmp_path / name, reward="reminder_open", stream="recipe-card",
                 missing_reward=None)  # fmt: skip


def test_missing_rewards_count_as_zero_or_are_excluded(tmp_path):
    led = dl.Ledger(tmp_path / "missing.db")
    shop.use(led, seed=1)
    for i in range(40):
        shop.feature_card(shop.context(i % 4), decision_id=f"d{i}")
        if i % 4 == 0:
            led.outcome(f"d{i}", "checkout", 1.0)
    led.close()
    zero = estimate(tmp_path / "missing.db", reward="checkout", overrides={"temperature": 0.3})
    assert 40 == zero.n and 0.25 == zero.logging_value
    assert {"filled": 30, "share": 0.75, "value": 0.0} == zero.to_dict()["missing_rewards"]
    assert zero.alerts[0].startswith("30 of 40 records used (75.0%) have no 'checkout' outcome")
    kept = estimate(tmp_path / "missing.db", reward="checkout", missing_reward=None,
                    overrides={"temperature": 0.3})  # fmt: skip
    assert 10 == kept.n and 1.0 == kept.logging_value
    assert {"no checkout outcome": 30} == kept.excluded
    assert ([], 0) == (_reward_alerts(kept), kept.missing_rewards["filled"])


def _reward_alerts(report):
    """The alerts about missing rewards (a small ledger also has one about its few records)."""
    return [a for a in report.alerts if "outcome" in a]


def test_many_missing_rewards_alert_and_fail_the_estimate_sweep_and_report(tmp_path):
    """10% of the records without the reward (above the 5% alert share) and counted as 0: the
    alert stands first and nothing built on it is ok; excluding them instead is ok."""
    led = dl.Ledger(tmp_path / "late.db")
    shop.use(led, seed=1)
    for i in range(400):
        shop.feature_card(shop.context(i % 4), decision_id=f"d{i}")
        if i % 10:
            led.outcome(f"d{i}", "checkout", float(i % 3 == 0))
    led.close()
    near = {"temperature": 0.8}  # close to the logging 0.7: the overlap is good
    filled = estimate(tmp_path / "late.db", reward="checkout", overrides=near)
    curve = sweep(tmp_path / "late.db", reward="checkout", param="temperature", values=[0.8])
    kept = estimate(tmp_path / "late.db", reward="checkout", overrides=near, missing_reward=None)
    assert filled.alerts[0].startswith("40 of 400 records used (10.0%) have no 'checkout'")
    assert (False, False, True) == (filled.ok, curve.ok, kept.ok)
    page = write_report(tmp_path / "late.db", tmp_path / "late.html",
                        whatifs=[WhatIf("warmer", filled)])  # fmt: skip
    assert not page.ok and "have no &#39;checkout&#39; outcome" in page.path.read_text()


def test_several_outcomes_of_a_decision_are_summed_and_said(tmp_path):
    """Every fifth decision's checkout recorded twice (a retried event): the reward is the sum,
    as the logging mean computed by hand shows, and a warning counts those records."""
    led = dl.Ledger(tmp_path / "twice.db")
    shop.use(led, seed=1)
    totals = []
    for i in range(200):
        shop.feature_card(shop.context(i % 4), decision_id=f"d{i}")
        led.outcome(f"d{i}", "checkout", float(i % 3 == 0))
        totals.append(float(i % 3 == 0))
        if i % 5 == 0:
            led.outcome(f"d{i}", "checkout", 1.0)
            totals[-1] += 1.0
    led.close()
    report = estimate(tmp_path / "twice.db", reward="checkout", overrides={"temperature": 0.8})
    assert sum(totals) / 200 == pytest.approx(report.logging_value, rel=1e-12)
    assert report.warnings[0].startswith("40 of 200 records used have several 'checkout' outcomes")


def _coupons(path, n, *, seed):
    """``n`` coupon codes out of 10,000, each redeemed when odd."""
    led = dl.Ledger(path)
    shop.use(led, seed=seed)
    for i in range(n):
        code = shop.coupon_code(decision_id=f"d{i}")
        led.outcome(f"d{i}", "redeemed", float(code % 2))
    led.close()


def test_one_draw_propensities_are_said_on_both_sides(tmp_path):
    """A code out of 10,000 (more than the budget of 4096): each propensity is that of the
    draw's value, not proven to be the action's; the estimate says so for each policy."""
    _coupons(tmp_path / "codes.db", 60, seed=2)
    report = estimate(tmp_path / "codes.db", reward="redeemed", overrides={"codes": 8000})
    said = [w for w in report.warnings if "one-draw" in w]
    assert 2 == len(said), report.warnings
    assert said[0].startswith("60 of 60 logging propensities are one-draw")
    assert said[1].startswith("60 target propensities are one-draw")
    assert {"one-draw": 60} == report.target["propensities"]
    (note,) = verify(tmp_path / "codes.db").method_notes()
    assert note.startswith("note: 60 propensities are one-draw: the probability of one draw's")


def test_a_baseline_the_data_cannot_answer_is_said_at_the_top(tmp_path):
    """Codes logged out of 10,000; a baseline drawing out of 12,000 puts 1/6 of its mass on
    codes never logged (2000 / 12000, by hand): its estimates, and the difference, cannot be
    read. Too many codes to list, so the deficit is sampled, one target draw per record: a
    binomial share, within 4 standard deviations of 1/6 (sqrt(p(1-p)/300) = 0.0215). The
    target (8000 codes) is fine; the logging baseline needs no check."""
    _coupons(tmp_path / "codes.db", 300, seed=4)
    wide = {"codes": 12_000}
    report = estimate(tmp_path / "codes.db", reward="redeemed", overrides={"codes": 8000},
                      baseline=wide)  # fmt: skip
    deficit = report.to_dict()["baseline"]["diagnostics"]["support_deficit"]
    assert abs(deficit - 2000 / 12000) < 4 * 0.0215
    assert not report.ok
    assert [f"baseline: support deficit {deficit:.3g}: the data cannot answer this question as "
            "asked (see the warning below)"] == report.alerts  # fmt: skip
    assert any(w.startswith(f"baseline: support deficit {deficit:.3g}: the baseline puts")
               for w in report.warnings)  # fmt: skip
    alone = estimate(tmp_path / "codes.db", reward="redeemed", overrides={"codes": 8000})
    assert ([], {"policy": "logging"}) == (alone.alerts, alone.baseline)
    curve = sweep(tmp_path / "codes.db", reward="redeemed", param="codes",
                  values=[8000, 9000], baseline=wide)  # fmt: skip
    said = [a for a in curve.alerts if a.startswith("baseline: support deficit")]
    assert 1 == len(said)  # once for the curve, not at every point
    assert not curve.ok


def _reminders(path, revenue):
    """400 send-reminder coins, each with the revenue ``revenue(sent)``."""
    led = dl.Ledger(path)
    shop.use(led, seed=3)
    for i in range(400):
        sent = shop.send_reminder(decision_id=f"d{i}")
        led.outcome(f"d{i}", "revenue", revenue(sent))
    led.close()


def test_rewards_too_large_to_sum_are_refused_not_overflowed(tmp_path):
    """1e308 squared overflows float64 (max about 1.8e308, IEEE 754 binary64)."""
    _reminders(tmp_path / "huge.db", lambda sent: 1e308 if sent else 1e307)
    with pytest.raises(ReplayError, match=r"'revenue' rewards reach 1e\+308: beyond 1e\+100"):
        estimate(tmp_path / "huge.db", reward="revenue", overrides={"p": 0.6})
    _reminders(tmp_path / "coins.db", float)
    with pytest.raises(ReplayError, match=r"reward_range reach 1e\+200"):
        estimate(tmp_path / "coins.db", reward="revenue", overrides={"p": 0.6},
                 reward_range=(0.0, 1e200))  # fmt: skip


def test_large_rewards_print_in_significant_digits(tmp_path):
    """Revenue in cents of a large basket: seven significant digits, not 30 characters."""
    _reminders(tmp_path / "cents.db", lambda sent: 4.2e9 if sent else 4.0e9)
    report = estimate(tmp_path / "cents.db", reward="revenue", overrides={"p": 0.6})
    ips = report.results["ips"].value
    assert 4.0e9 <= ips <= 4.2e9 * 1.2
    assert f"{ips:.7g}" in report.render()
    assert f"{ips:.4f}" not in report.render()


def test_a_few_missing_rewards_are_counted_without_an_alert(tmp_path):
    """1 of 40 (2.5%) is below the 5% alert share; it is still counted in the JSON."""
    led = dl.Ledger(tmp_path / "late.db")
    shop.use(led, seed=1)
    for i in range(40):
        shop.feature_card(shop.context(i % 4), decision_id=f"d{i}")
        if i:
            led.outcome(f"d{i}", "checkout", float(i % 2))
    led.close()
    report = estimate(tmp_path / "late.db", reward="checkout")
    assert {"filled": 1, "share": 0.025, "value": 0.0} == report.missing_rewards
    assert [] == _reward_alerts(report)
    assert re.search(r"records without the reward \(counted as 0\) +1 \(2\.5%\)", str(report))
    curve = sweep(tmp_path / "late.db", reward="checkout", param="temperature", values=[0.3, 1])
    assert "records without the reward (counted as 0): 1 (2.5%)" in str(curve)


def test_a_ledger_with_several_streams_needs_one_chosen(tmp_path):
    led = dl.Ledger(tmp_path / "mixed.db")
    shop.use(led, seed=2)
    for i in range(6):
        shop.feature_card(shop.context(i % 4), decision_id=f"c{i}")
        shop.reminder_delay({"items": 2}, decision_id=f"r{i}")
        led.outcome(f"c{i}", "checkout", 1.0)
    led.close()
    with pytest.raises(ReplayError, match="several decision streams"):
        estimate(tmp_path / "mixed.db", reward="checkout")
    report = estimate(tmp_path / "mixed.db", reward="checkout", stream="recipe-card")
    assert 6 == report.n and "recipe-card" == report.target["stream"]


@pytest.fixture(scope="module")
def small(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """60 recipe-card decisions, for questions that fail."""
    return _record(tmp_path_factory.mktemp("small") / "small.db", shop.simulate_cards, 60,
                   seed=3)  # fmt: skip


@pytest.mark.parametrize(
    ("kwargs", "error", "message"),
    [
        ({"reward": "refund"}, ReplayError, "no outcome named 'refund'"),
        ({"reward": ""}, ReplayError, "reward must name an outcome"),
        ({"stream": "banner"}, ReplayError, "no decisions of stream 'banner'"),
        ({"overrides": {"temprature": 0.3}}, ReplayError,
         "temprature is not a policy parameter of estimate_shop:feature_card"),
        ({"overrides": {"temperature": -1.0}}, ReplayError,
         "decision card-3-0 under the target: softmax draw 'card'"),
        ({"overrides": {"temperature": "warm"}}, ReplayError, "temperature='warm' (given"),
        ({"overrides": {"temperature": 0.3}, "target": "estimate_shop:best_card"}, ReplayError,
         "either overrides"),
        ({"engine": "spark"}, ReplayError, "unknown engine"),
        ({"scheduler": "tcp://x:8786"}, ReplayError, "needs --engine dask"),
        ({"interval": "wald"}, ReplayError, "unknown interval"),
        ({"bootstrap": 100}, ReplayError, "interval='bootstrap'"),
        ({"bootstrap": -1, "interval": "bootstrap"}, ReplayError, "resamples >= 0"),
        ({"clip": 0.0}, ReplayError, "clipping cap"),
        ({"clip": math.nan}, ReplayError, "clipping cap"),
        ({"level": 1.0}, ReplayError, "confidence level"),
        ({"reward_range": (1.0, 0.0)}, ReplayError, "low < high"),
        ({"reward_range": (0.0, 0.5)}, ReplayError, "outside reward_range"),
        ({"reward_range": "0,1"}, ReplayError, "a pair (low, high) of numbers"),
        ({"reward_range": (0.0, "1")}, ReplayError, "a pair (low, high) of numbers"),
        ({"reward_range": (0.0, 0.5, 1.0)}, ReplayError, "a pair (low, high) of numbers"),
        ({"reward_range": (0.0, math.inf)}, ReplayError, "low < high"),
        ({"by": "ctx.aisle"}, ReplayError, "neither a column"),
        ({"by": "ctx.scores"}, ReplayError, "not a single value"),
        ({"target": "estimate_shop"}, ReplayError, "not 'module:function'"),
        ({"target": "estimate_shop:nothing"}, ReplayError, "no function 'nothing'"),
        ({"target": "elsewhere_module:f"}, MissingFunctionError, "not under a --path"),
        ({"target": "estimate_shop:context"}, ReplayError, "raised TypeError"),
        ({"baseline": 0.5}, ReplayError, "a policy is None"),
    ],
)  # fmt: skip
def test_bad_questions_raise_clear_errors(small, kwargs, error, message):
    args: dict[str, Any] = {"reward": "checkout", **kwargs}
    with pytest.raises(error, match=re.escape(message)):
        estimate(small, **args)


def test_a_given_reward_range_clips_every_interval_to_it(small):
    """60 records at temperature 0.3: the empirical Bernstein bound (Maurer & Pontil 2009,
    Theorem 4) of SNIPS reaches past 1 for rewards in [0, 1]. With reward_range=(0, 1) fixed in
    advance every interval lies in [0, 1] (a difference in [-1, 1]), the range the value of a
    policy with such rewards can take."""
    kw: dict[str, Any] = {"reward": "checkout", "overrides": {"temperature": 0.3},
                          "interval": "bernstein"}  # fmt: skip
    assert 1.0 < estimate(small, **kw).estimates["snips"]["high"]
    report = estimate(small, reward_range=(0.0, 1.0), **kw)
    for name, e in report.estimates.items():
        for key in ("low", "high", "outer_low", "outer_high"):
            if e.get(key) is not None:
                assert 0.0 <= e[key] <= 1.0, (name, key)
    for name, d in report.difference.items():
        assert -1.0 <= d["low"] <= d["high"] <= 1.0, name
    assert "given" == report.settings["reward_range_source"]
    clt = estimate(small, reward="checkout", overrides={"temperature": 0.3}, reward_range=(0, 1))
    assert all(0.0 <= e["low"] <= e["high"] <= 1.0 for e in clt.estimates.values())


def test_bernstein_without_a_given_range_says_it_has_no_guarantee(small):
    """The observed range is read off the data, so the Bernstein bound's finite-sample
    guarantee (Maurer & Pontil 2009, which needs a range fixed in advance) does not hold:
    the table's title, a warning and the JSON settings say so; a given range lifts it."""
    kw: dict[str, Any] = {"reward": "checkout", "overrides": {"temperature": 0.5},
                          "interval": "bernstein"}  # fmt: skip
    observed = estimate(small, **kw)
    assert "observed" == observed.settings["reward_range_source"]
    assert any("no finite-sample guarantee" in w for w in observed.warnings)
    assert "(observed reward range: no finite-sample guarantee)" in str(observed)
    given = estimate(small, reward_range=(0.0, 1.0), **kw)
    assert not any("finite-sample" in w for w in given.warnings)
    assert "(rewards in the given range [0, 1])" in str(given)
    curve = sweep(
        small,
        param="temperature",
        values=[0.5, 0.7],
        **{k: v for k, v in kw.items() if k != "overrides"},
    )
    assert any("no finite-sample guarantee" in w for w in curve.warnings)
    assert "observed" == curve.settings["reward_range_source"]
    assert given.ok == observed.ok  # a note, not a refusal


def test_a_callable_whose_probabilities_sum_above_one_is_refused(small, monkeypatch):
    """Probability 0.5 on each of six cards sums to 3: not a policy (its weights would be
    inflated), refused naming the decision, whatever the logged card was."""
    monkeypatch.setattr(shop, "half_each", lambda inputs, action: 0.5, raising=False)
    with pytest.raises(ReplayError, match=r"estimate_shop:half_each gives the actions of .* "
                                          r"sum to 3; a policy's sum to at most 1"):  # fmt: skip
        estimate(small, reward="checkout", target="estimate_shop:half_each")


def test_a_callable_target_that_calls_a_decision_is_refused_and_records_nothing(small, monkeypatch):
    def asks_a_decision(inputs, action):
        return 1.0 if shop.send_reminder() else 0.0  # a decision: it would record

    monkeypatch.setattr(shop, "asks_a_decision", asks_a_decision, raising=False)
    inside = r"estimate_shop:send_reminder was called inside target estimate_shop:asks_a"
    with pytest.raises(ReplayError, match=inside):
        estimate(small, reward="checkout", target="estimate_shop:asks_a_decision")


def test_a_callable_returning_no_probability_is_refused(small, monkeypatch):
    monkeypatch.setattr(shop, "best_card", lambda inputs, action: -0.5)
    with pytest.raises(ReplayError, match="must return a probability"):
        estimate(small, reward="checkout", target="estimate_shop:best_card")


def test_a_missing_ledger_is_an_error(tmp_path):
    with pytest.raises(dl.LedgerError, match="no ledger"):
        estimate(tmp_path / "none.db", reward="checkout")


def test_report_renders_as_tables_with_warnings(greedy):
    report = estimate(greedy, reward="checkout", overrides={"epsilon": 0.3})
    assert isinstance(report, EstimateReport)
    text = str(report)
    for word in ("ips", "snips", "clipped", "dr", "effective sample size", "warning"):
        assert word in text


def test_docs_example_runs(tmp_path, monkeypatch):
    """Every Python example of docs/estimators.md runs as written."""
    monkeypatch.chdir(tmp_path)
    blocks = re.findall(r"```python\n(.*?)```", DOCS.read_text(), flags=re.S)
    assert blocks
    namespace: dict[str, Any] = {"__name__": "estimators_doc"}
    for block in blocks:
        exec(compile(block, "<docs/estimators.md>", "exec"), namespace)


def _same_estimates(a: EstimateReport, b: EstimateReport) -> None:
    assert a.n == b.n
    for name, e in a.estimates.items():
        for key, value in e.items():
            assert value == pytest.approx(b.estimates[name][key], rel=1e-12, abs=1e-15)


def test_parquet_ledger_gives_the_sqlite_estimates(tmp_path, small):
    """The same seeded decisions recorded into Parquet give the same estimates."""
    led = dl.Ledger(tmp_path / "ledger", format="parquet")
    shop.simulate_cards(led, 60, seed=3)
    led.close()
    a = estimate(small, reward="checkout", overrides={"temperature": 0.3})
    b = estimate(tmp_path / "ledger", reward="checkout", overrides={"temperature": 0.3},
                 format="parquet", progress=True)  # fmt: skip
    _same_estimates(a, b)


def test_bootstrap_intervals_do_not_depend_on_the_ledger_format_or_processes(tmp_path, small):
    """Poisson bootstrap counts follow each decision id: SQLite in 1 or 2 processes and
    Parquet (other chunks) resample alike."""
    led = dl.Ledger(tmp_path / "ledger", format="parquet")
    shop.simulate_cards(led, 60, seed=3)
    led.close()
    kw: dict[str, Any] = dict(reward="checkout", overrides={"temperature": 0.3},
                              interval="bootstrap", bootstrap=200, seed=4)  # fmt: skip
    one = estimate(small, **kw)
    _same_estimates(one, estimate(small, jobs=2, **kw))
    _same_estimates(one, estimate(tmp_path / "ledger", format="parquet", **kw))
    assert one.estimates["snips"]["low"] < one.estimates["snips"]["high"]


def test_segments_need_a_field_with_few_values(cards):
    """Segments by the decision id (one per record) would be as many as the records."""
    with pytest.raises(ReplayError, match="more than 1000 distinct values"):
        estimate(cards, reward="checkout", overrides={"temperature": 0.3}, by="decision_id")


@pytest.mark.postgres
def test_postgresql_ledger_gives_the_sqlite_estimates(postgres_url, small):
    led = dl.Ledger(postgres_url)
    shop.simulate_cards(led, 60, seed=3)
    led.close()
    a = estimate(small, reward="checkout", overrides={"temperature": 0.3})
    b = estimate(postgres_url, reward="checkout", overrides={"temperature": 0.3})
    _same_estimates(a, b)


def test_several_draws_are_enumerated_for_the_target(tmp_path):
    """explore-card: pi(a) = explore / 6 + (1 - explore) [a = best] (worked by hand)."""
    path = _record(tmp_path / "explore.db", shop.simulate_cards, 300, seed=6,
                   decision=shop.explore_card)  # fmt: skip
    report = estimate(path, reward="checkout", overrides={"explore": 0.5})
    rows = verify(path).rows
    seg = rows["input.ctx.segment"].map(shop.SEGMENTS.index).to_numpy()
    card = rows["action"].map(shop.CARDS.index).to_numpy()
    best = shop.SCORES.argmax(axis=1)[seg] == card
    expected = (0.5 / 6 + 0.5 * best) / (0.2 / 6 + 0.8 * best)
    np.testing.assert_allclose(report.weights, expected, rtol=1e-12)
    assert "dr" in report.estimates and 0.0 == report.diagnostics["support_deficit"]


def test_a_decision_without_inputs_gets_an_intercept_only_reward_model(tmp_path):
    """send-reminder has no inputs; target p = 0.8 over logged p = 0.5 gives weights 1.6, 0.4."""
    led = dl.Ledger(tmp_path / "coin.db")
    shop.use(led, seed=4)
    for i in range(200):
        sent = shop.send_reminder(decision_id=f"s{i}")
        led.outcome(f"s{i}", "checkout", float(sent and i % 3 == 0))
    led.close()
    report = estimate(tmp_path / "coin.db", reward="checkout", overrides={"p": 0.8})
    assert {0.4, 1.6} == set(np.round(report.weights, 12))
    assert report.estimates["dr"]["value"] is not None


def test_a_mixture_of_continuous_draws_sums_the_densities_of_its_branches(tmp_path):
    """Weights are ratios of two-component normal mixtures (scipy.stats.norm densities)."""
    path = _record(tmp_path / "mixed.db", shop.simulate_delays, 150, seed=12,
                   decision=shop.mixed_delay)  # fmt: skip
    report = estimate(path, reward="checkout", overrides={"share": 0.8})
    x = verify(path).rows["action"].astype(float).to_numpy()
    short, long = scipy.stats.norm.pdf(x, 30.0, 5.0), scipy.stats.norm.pdf(x, 90.0, 15.0)
    expected = (0.8 * short + 0.2 * long) / (0.5 * short + 0.5 * long)
    np.testing.assert_allclose(report.weights, expected, rtol=1e-9)
    assert {"density": 150} == report.target["propensities"]
    assert 0.0 == report.diagnostics["support_deficit"]
