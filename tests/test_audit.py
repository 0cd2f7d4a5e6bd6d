"""The randomization audit (drawledger.replay.audit): its tests, verdicts, JSON and bad input."""

from __future__ import annotations

import itertools
import json
import math
import sqlite3
from collections.abc import Callable
from pathlib import Path
from typing import Any

import audit_synth as synth
import numpy as np
import orjson
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import special, stats
from strategies import json_values, junk_draws, seeds, valid_draws

import drawledger as dl
import drawledger.testing
from drawledger._records import DECISION_COLUMNS, DRAW_COLUMNS
from drawledger.exceptions import LedgerError, ReplayError
from drawledger.replay import AuditReport, AuditTest, audit, audit_tables

DOCS = Path(__file__).resolve().parent.parent / "docs" / "audit.md"
DESIGN_KEYS = {"stream", "test", "statistic", "p_value", "verdict"}
VERDICTS = {"as declared", "not as declared", "not enough data"}


def find(report: AuditReport, stream: str, test: str, field: str | None = None) -> AuditTest:
    hits = [t for t in report.tests if (t.stream, t.test, t.field) == (stream, test, field)]
    assert 1 == len(hits), (stream, test, field, [t.test for t in report.tests])
    return hits[0]


def rng(seed: int = 0) -> np.random.Generator:
    return np.random.default_rng(seed)


# -- a real ledger, written by the SDK ----------------------------------------------------------
def record_every_kind(ledger: dl.Ledger, n: int) -> None:
    """Decisions of the grocery scenario using every draw kind, with reproducible seeds."""

    @ledger.decision("recipe-card")
    def feature_card(
        scores: list[float], hour: int, draw: dl.Draw, *, temperature: float = 0.7
    ) -> str:
        return draw.softmax(synth.CARDS, scores, temperature=temperature, name="card")

    @ledger.decision("reminder-delay")
    def reminder(nominal: float, draw: dl.Draw, *, sigma: float = 0.35) -> float:
        return nominal * draw.lognormal(0.0, sigma, name="multiplier")

    @ledger.decision("checkout-page")
    def checkout(draw: dl.Draw) -> list[str]:
        draw.bernoulli(0.25, name="tip-prompt")
        draw.categorical([0, 5, 10], [0.6, 0.3, 0.1], name="discount")
        draw.integers(1, 7, name="banner")
        draw.uniform(10.0, 30.0, name="countdown")
        draw.normal(0.0, 2.0, name="jitter")
        draw.epsilon_greedy(["soup", "salad", "pie"], [0.2, 0.9, 0.4], 0.1, name="side")
        return draw.slate(synth.CARDS, [3, 1, 4, 1, 5, 9], 3, name="carousel")

    r = rng(5)
    with drawledger.testing.capture(ledger, seed=11, write=True):
        for i in range(n):
            feature_card(
                list(np.round(np.array(synth.RELEVANCE) + r.normal(0, 0.5, 6), 4)),
                int(r.integers(24)),
                unit=f"shopper-{i:05d}",
            )
            reminder(30.0)
            checkout()
            ledger.bucket(
                f"shopper-{r.integers(n):05d}",
                {"control": 0.5, "treatment": 0.5},
                "checkout-2026",
                stream="checkout-test",
            )
    ledger.flush()


def test_sdk_ledger_of_every_kind_is_as_declared(ledger: dl.Ledger, ledger_path: Path) -> None:
    """Correct draws of every kind pass every test, and each applicable test is present."""
    record_every_kind(ledger, 1200)
    report = audit(ledger_path)
    assert [] == [(t.stream, t.draw, t.test, t.p_adjusted, t.detail) for t in report.alarms]
    assert report.ok
    assert 4 * 1200 == report.decisions
    tests = {(t.stream, t.draw, t.test) for t in report.tests}
    for draw in ("tip-prompt", "discount", "banner", "side", "carousel"):
        assert ("checkout-page", draw, "ratio") in tests
    for draw in ("countdown", "jitter"):
        assert ("checkout-page", draw, "pit_ks") in tests
        assert ("checkout-page", draw, "ratio") not in tests
    assert ("recipe-card", "card", "calibration") in tests  # scores vary per decision
    assert ("checkout-page", "discount", "calibration") not in tests  # fixed probabilities
    assert ("recipe-card", "card", "uniforms_vs_input") in tests
    assert ("checkout-test", None, "unit_in_two_arms") in tests
    assert ("recipe-card", None, "repeated_seeds") in tests
    assert ("checkout-page", None, "repeated_uniforms") in tests
    slate_ratio = next(t for t in report.tests if (t.draw, t.test) == ("carousel", "ratio"))
    assert 3 * 1200 == slate_ratio.n  # three picks per slate
    bucket = next(t for t in report.tests if (t.stream, t.test) == ("checkout-test", "ratio"))
    assert bucket.n < 1200  # units, not decisions: shoppers come back


def test_audit_accepts_an_open_ledger_and_flushes_it(ledger: dl.Ledger) -> None:
    """A Ledger object is flushed and audited; its records are all counted."""
    for i in range(40):
        ledger.record_draw(
            "slot-discount",
            "categorical",
            {"options": [0, 5, 10], "probs": [0.6, 0.3, 0.1]},
            0,
            0.6,
            decision_id=f"legacy-{i}",
        )
    report = audit(ledger)
    assert 40 == report.decisions


# -- every statistic is scipy's on the same arrays ---------------------------------------------
def test_ratio_reference_values_from_scipy_chisquare() -> None:
    """Reference (scipy.stats.chisquare): 600/400 against 50/50 -> 40, p = 2.54e-10;
    3400/3300/3300 against equal shares -> 2, p = e^-1."""
    values = np.array([0] * 600 + [1] * 400)
    two = synth.tables(
        "coin",
        "categorical",
        '{"options":[0,1],"probs":[0.5,0.5]}',
        [str(v) for v in values],
        np.full(1000, 0.5),
        None,
        rng(),
    )
    res = find(audit_tables(*two), "coin", "ratio")
    assert (40.0, 1) == (pytest.approx(res.statistic), res.df)
    assert 2.54e-10 == pytest.approx(res.p_value, rel=2e-3)
    assert "not as declared" == res.verdict
    values = np.array([0] * 3400 + [1] * 3300 + [2] * 3300)
    args = orjson.dumps({"options": [0, 1, 2], "probs": [1 / 3, 1 / 3, 1 / 3]}).decode()
    three = synth.tables(
        "die", "categorical", args, [str(v) for v in values], np.full(10_000, 1 / 3), None, rng()
    )
    res = find(audit_tables(*three), "die", "ratio")
    assert 2.0 == pytest.approx(res.statistic)
    assert math.exp(-1) == pytest.approx(res.p_value, rel=1e-9)
    assert "as declared" == res.verdict


def test_every_statistic_equals_scipy_on_the_same_arrays() -> None:
    """chisquare, kstest and spearmanr (scipy.stats) on arrays taken from the tables."""
    r = rng(1)
    cat = synth.categorical(r, 4000, [0.6, 0.3, 0.1], options=[0, 5, 10])
    card = synth.softmax(r, 3000)
    delay = synth.lognormal(r, 3000)
    report = audit_tables(*synth.combine(cat, card, delay))
    # ratio: Pearson on the counts (fixed probabilities)
    counts = cat[1]["value"].map({"0": 0, "5": 1, "10": 2}).value_counts().sort_index()
    ref = stats.chisquare(counts.to_numpy(), 4000 * np.array([0.6, 0.3, 0.1]))
    res = find(report, "slot-discount", "ratio")
    assert (ref.statistic, ref.pvalue) == pytest.approx((res.statistic, res.p_value), rel=1e-9)
    # uniforms: kstest, binned chisquare, spearmanr against time order and an input field
    u = np.array([orjson.loads(x)[0] for x in card[1]["u"]])
    ks = stats.kstest(u, "uniform")
    res = find(report, "recipe-card", "uniforms_ks")
    assert (ks.statistic, ks.pvalue) == pytest.approx((res.statistic, res.p_value), rel=1e-9)
    ref = stats.chisquare(np.histogram(u, bins=20, range=(0, 1))[0])
    res = find(report, "recipe-card", "uniforms_chisq")
    assert (ref.statistic, ref.pvalue) == pytest.approx((res.statistic, res.p_value), rel=1e-9)
    sp = stats.spearmanr(u, card[0]["ts"])
    res = find(report, "recipe-card", "uniforms_vs_time")
    assert (sp.statistic, sp.pvalue) == pytest.approx((res.statistic, res.p_value), rel=1e-9)
    hour = [orjson.loads(x)["ctx"]["hour"] for x in card[0]["inputs"]]
    sp = stats.spearmanr(u, hour)
    res = find(report, "recipe-card", "uniforms_vs_input", "ctx.hour")
    assert (sp.statistic, sp.pvalue) == pytest.approx((res.statistic, res.p_value), rel=1e-9)
    # PIT of a continuous draw is F(x): kstest on it, and the per-hour chi-squares summed
    x = delay[1]["value"].astype(float).to_numpy()
    pit = special.ndtr(np.log(x) / 0.35)
    ks = stats.kstest(pit, "uniform")
    res = find(report, "reminder-delay", "pit_ks")
    assert (ks.statistic, ks.pvalue) == pytest.approx((res.statistic, res.p_value), rel=1e-9)
    hours = (delay[0]["ts"].to_numpy() // 3600 % 24).astype(int)
    per_hour = [np.histogram(pit[hours == h], bins=5, range=(0, 1))[0] for h in range(24)]
    used = [c for c in per_hour if c.sum() >= 25]
    stat = sum(stats.chisquare(c).statistic for c in used)
    res = find(report, "reminder-delay", "pit_vs_hour")
    assert (stat, 4 * len(used)) == (pytest.approx(res.statistic, rel=1e-9), res.df)
    assert stats.chi2.sf(stat, 4 * len(used)) == pytest.approx(res.p_value, rel=1e-9)


def test_varying_probabilities_use_the_poisson_binomial_chi_square() -> None:
    """Options counted against sums of their declared probabilities, with the covariance
    sum_i (diag p_i - p_i p_i') (its diagonal: the Poisson-binomial variances); checked
    against numpy's pseudo-inverse on the same matrices."""
    card = synth.softmax(rng(2), 3000)
    res = find(audit_tables(*card), "recipe-card", "ratio")
    probs = np.array(
        [dl.draw.softmax_probs(orjson.loads(a)["scores"], 0.7) for a in card[1]["args"]]
    )
    chosen = card[1]["value"].map({orjson.dumps(c).decode(): j for j, c in enumerate(synth.CARDS)})
    observed = np.bincount(chosen, minlength=6)
    cov = np.diag(probs.sum(0)) - probs.T @ probs
    diff = observed - probs.sum(0)
    stat = diff @ np.linalg.pinv(cov) @ diff
    assert stat == pytest.approx(res.statistic, rel=1e-6)
    assert stats.chi2.sf(stat, 5) == pytest.approx(res.p_value, rel=1e-5)
    assert 5 == res.df
    assert "Poisson-binomial" in res.detail


# -- verdicts, corrections, minimum sizes --------------------------------------------------------
def test_holm_correction_runs_across_the_tests_of_a_stream() -> None:
    """p_adjusted is Holm's adjustment of the stream's p-values (never below the raw p)."""
    report = audit_tables(*synth.softmax(rng(3), 2000))
    tested = [t for t in report.tests if t.p_value is not None]
    from drawledger.replay.audit._stats import holm

    assert holm([t.p_value for t in tested]) == [t.p_adjusted for t in tested]  # type: ignore[misc]
    assert all(t.p_adjusted >= t.p_value for t in tested)  # type: ignore[operator]


def test_small_streams_report_not_enough_data() -> None:
    """Below the minimum sizes a test gives no p-value and the verdict 'not enough data'."""
    report = audit_tables(*synth.categorical(rng(4), 6, [0.5, 0.5]))
    ratio = find(report, "slot-discount", "ratio")  # expected 3 per cell < 5
    assert ("not enough data", None, None, False) == (
        ratio.verdict,
        ratio.statistic,
        ratio.p_value,
        ratio.alarm,
    )
    assert "not enough data" == find(report, "slot-discount", "uniforms_ks").verdict
    # no alarm, but no answer either: the draw is listed as untested and the audit is not ok
    assert ((), (("slot-discount", "categorical", "discount", 6),)) == (
        report.alarms,
        report.untested,
    )
    assert not report.ok
    assert "NOT AUDITED: slot-discount, categorical discount: 6 draws" in report.render()


def test_alarm_when_draws_do_not_follow_the_declaration() -> None:
    """Declared 0.6/0.3/0.1 but drawn 0.5/0.3/0.2 (the faulty legacy service): an alarm."""
    report = audit_tables(*synth.categorical(rng(5), 5000, [0.6, 0.3, 0.1], [0.5, 0.3, 0.2]))
    assert not report.ok
    ratio = find(report, "slot-discount", "ratio")
    assert ("not as declared", True) == (ratio.verdict, ratio.alarm)
    assert ratio.p_adjusted is not None and ratio.p_adjusted < 0.001
    assert report.to_dict()["ok"] is False


def test_alpha_sets_the_alarm_threshold() -> None:
    """The smallest adjusted p-value alarms under a threshold above it, not under one below."""
    tables = synth.categorical(rng(6), 5000, [0.5, 0.5], [0.525, 0.475])
    p = min(t.p_adjusted for t in audit_tables(*tables).tests if t.p_adjusted is not None)
    assert 1e-6 < p < 0.25
    assert audit_tables(*tables, alpha=p / 2).ok
    assert not audit_tables(*tables, alpha=p * 2).ok


# -- consistency checks, repeats and bucket units ---------------------------------------------
def declared(
    ledger: dl.Ledger, stream: str, kind: str, args: Any, value: Any, prob: float, **kw: Any
) -> None:
    ledger.record_draw(stream, kind, args, value, prob, **kw)


def test_inconsistent_declared_draws_are_counted_and_alarm(
    ledger: dl.Ledger, ledger_path: Path
) -> None:
    """Values outside the options, probabilities that differ from the declaration, invalid
    declarations and malformed uniforms are each counted in the consistency check."""
    opts = {"options": [0, 5, 10], "probs": [0.6, 0.3, 0.1]}
    for _ in range(30):
        declared(ledger, "ok-stream", "categorical", opts, 5, 0.3)
    declared(ledger, "bad", "categorical", opts, 7, 0.3)  # not an option
    declared(ledger, "bad", "categorical", opts, 5, 0.6)  # wrong probability
    declared(ledger, "bad", "categorical", {"options": [0, 5], "probs": [0.5, 0.4]}, 5, 0.4)
    declared(ledger, "bad", "categorical", opts, 10, 0.1, u=[0.875])  # u made 1.5 below
    declared(ledger, "bad", "lognormal", {"mu": 0.0, "sigma": 0.3}, -1.0, 0.5)  # impossible
    declared(ledger, "bad", "uniform", {"low": 10.0, "high": 30.0}, 20.0, 0.05)  # fine
    ledger.flush()  # record_draw refuses uniforms outside (0, 1): edit one in the database
    with sqlite3.connect(ledger_path) as con:
        con.execute("UPDATE draws SET u = '[1.5]' WHERE u = '[0.875]'")
    report = audit(ledger)
    bad = [t for t in report.tests if (t.stream, t.test) == ("bad", "consistency")]
    by_kind = {t.kind: t for t in bad}
    cat = by_kind["categorical"]
    assert (4.0, True) == (cat.statistic, cat.alarm)
    assert "1 value is not a possible outcome" in cat.detail
    assert "1 recorded probability differs from the declaration" in cat.detail
    assert "1 invalid declaration: probs do not sum to 1" in cat.detail
    assert "1 recorded uniforms are not numbers in [0, 1]" in cat.detail
    assert 1.0 == by_kind["lognormal"].statistic
    assert 0.0 == by_kind["uniform"].statistic
    assert not find(report, "ok-stream", "consistency").alarm
    assert not report.ok


@pytest.mark.parametrize("stored", ["9e999", "-9e999"])
def test_a_recorded_probability_that_is_not_finite_is_flagged(
    ledger: dl.Ledger, ledger_path: Path, stored: str
) -> None:
    """An infinite recorded probability or density is never "as declared" (inf - p is inf,
    which a relative tolerance times inf would accept): it is counted and alarms."""
    opts = {"options": [0, 5, 10], "probs": [0.6, 0.3, 0.1]}
    for i in range(30):
        declared(ledger, "coupon", "categorical", opts, 5, 0.3, decision_id=f"c-{i}")
        declared(ledger, "slot-delay", "uniform", {"low": 10.0, "high": 30.0}, 20.0, 0.05,
                 decision_id=f"u-{i}")  # fmt: skip
    ledger.flush()
    with sqlite3.connect(ledger_path) as con:  # SQLite reads 9e999 as an infinity
        con.execute(f"UPDATE draws SET prob = {stored} WHERE decision_id IN ('c-3', 'u-4')")
    report = audit(ledger)
    for stream in ("coupon", "slot-delay"):
        check = find(report, stream, "consistency")
        assert (1.0, True) == (check.statistic, check.alarm)
        assert "1 recorded probability is not a finite number" in check.detail
    assert not report.ok


def test_a_unit_in_two_arms_alarms_even_across_chunks() -> None:
    """Hashed assignment never moves a unit; a unit seen in two arms is an alarm, also when
    its two decisions fall in different chunks."""
    d, w = synth.bucket(rng(7), 3000, units=1500)
    moved = w.index[d["unit"] == d["unit"].iloc[0]]
    assert len(moved) >= 2
    arms = ['"control"', '"treatment"']
    w.loc[moved[-1], "value"] = arms[1 - arms.index(w.loc[moved[0], "value"])]
    for chunk in (None, 500):
        report = audit_tables(d, w, chunk_size=chunk)
        split = find(report, "checkout-test", "unit_in_two_arms")
        assert (1.0, True) == (split.statistic, split.alarm)


def test_repeated_seeds_and_reused_uniforms_alarm() -> None:
    """Two decisions with one seed, or uniforms used twice, are repeats an honest stream of
    2**128 seeds and 2**53 uniforms would almost never show."""
    d, w = synth.categorical(rng(8), 2000, [0.5, 0.5])
    d.loc[5, "seed"] = d.loc[6, "seed"]
    report = audit_tables(d, w)
    seeds_test = find(report, "slot-discount", "repeated_seeds")
    assert (1.0, True) == (seeds_test.statistic, seeds_test.alarm)
    assert not find(report, "slot-discount", "repeated_uniforms").alarm
    report = audit_tables(*synth.categorical(rng(8), 2000, [0.5, 0.5], reuse=2))
    reused = find(report, "slot-discount", "repeated_uniforms")
    assert (1000.0, True) == (reused.statistic, reused.alarm)


# -- chunks, partitions and bounded memory -------------------------------------------------------
def scenario(seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    r = rng(seed)
    return synth.combine(
        synth.categorical(r, 1500, [0.6, 0.3, 0.1]),
        synth.softmax(r, 1500),
        synth.lognormal(r, 1500),
        synth.bucket(r, 1500, units=800),
    )


def comparable(report: AuditReport) -> list[tuple[Any, ...]]:
    return [
        (t.stream, t.draw, t.test, t.field, t.n, t.verdict, t.statistic, t.p_value)
        for t in report.tests
    ]


@pytest.mark.parametrize("sample_size", [1_000_000, 700])
def test_chunking_does_not_change_the_result(sample_size: int) -> None:
    """Sufficient statistics merged over chunks (any split) give the whole-table result to
    floating-point accuracy, also when the samples are bounded below the stream size."""
    d, w = scenario(9)
    whole = comparable(audit_tables(d, w, sample_size=sample_size))
    shuffled = d.sample(frac=1.0, random_state=3).reset_index(drop=True)
    for chunk in (997, 2500):
        parts = comparable(audit_tables(shuffled, w, sample_size=sample_size, chunk_size=chunk))
        assert [t[:6] for t in whole] == [t[:6] for t in parts]
        for a, b in zip(whole, parts, strict=True):
            for x, y in zip(a[6:], b[6:], strict=True):  # None: "not enough data" in both
                if x is None or y is None:
                    assert x is y, a[:4]
                else:
                    assert x == pytest.approx(y, rel=1e-9, abs=1e-12), a[:4]


def test_counts_only_statistics_equal_those_of_the_full_chunk_state() -> None:
    """``chunk_state(counts_only=True)`` (the guard's) leaves out sketches and samples but
    counts each draw's problems, picks and histograms exactly as the full state does."""
    from drawledger.replay.audit import chunk_state

    d, w = scenario(11)
    full = chunk_state(d, w, sample_size=50)
    lean = chunk_state(d, w, sample_size=50, counts_only=True)
    assert sorted(full.groups) == sorted(lean.groups)
    for key, g in full.groups.items():
        h = lean.groups[key]
        assert (g.draws, g.steps, g.uniforms, dict(g.problems), g.signature, g.varying, g.note) == (
            h.draws,
            h.steps,
            h.uniforms,
            dict(h.problems),
            h.signature,
            h.varying,
            h.note,
        )
        assert g.u_hist.tolist() == h.u_hist.tolist()
        assert g.pit_hist.tolist() == h.pit_hist.tolist()
        assert (g.ratio is None) == (h.ratio is None), key
        if g.ratio is not None and h.ratio is not None:
            assert g.ratio.keys == h.ratio.keys
            assert g.ratio.observed.tolist() == h.ratio.observed.tolist()
            assert g.ratio.expected.tolist() == h.ratio.expected.tolist()
    assert {} == lean.streams
    with pytest.raises(ReplayError, match="counts only"):
        lean.finish()


def test_bounded_sample_is_used_for_rank_tests_and_said_so() -> None:
    """With sample_size below the number of draws, KS and rank tests run on a sample of that
    size, histograms and ratios still count every draw."""
    report = audit_tables(*synth.lognormal(rng(10), 3000), sample_size=500)
    ks = find(report, "reminder-delay", "pit_ks")
    assert 500 == ks.n
    assert "on a sample of 500 of 3000" == ks.detail
    assert 3000 == find(report, "reminder-delay", "pit_chisq").n
    assert 500 == find(report, "reminder-delay", "pit_vs_time").n


# -- the report ---------------------------------------------------------------------------------
def test_json_has_the_design_keys_and_is_plain_json() -> None:
    """{"ok", "tests": [{"stream", "test", "statistic", "p_value", "verdict", ...}]}, no NaN."""
    report = audit_tables(*scenario(11))
    data = report.to_dict()
    assert {"ok", "tests"} <= set(data)
    assert data["tests"]
    for t in data["tests"]:
        assert DESIGN_KEYS <= set(t)
        assert t["verdict"] in VERDICTS
    assert data == orjson.loads(orjson.dumps(data))  # NaN would come back as None


def test_figures_hold_histograms_and_option_counts() -> None:
    """Per draw: 20-bin PIT (and uniform) histograms, observed vs expected per option."""
    report = audit_tables(*scenario(12))
    assert 21 == len(report.bin_edges)
    figs = {(f.stream, f.kind): f for f in report.figures}
    cat = figs[("slot-discount", "categorical")]
    assert (20, 1500) == (len(cat.pit_counts), sum(cat.pit_counts))
    assert ("0", "1", "2") == cat.options
    assert 1500 == sum(cat.observed)
    assert [900, 450, 150] == pytest.approx(cat.expected)
    delay = figs[("reminder-delay", "lognormal")]
    assert ((), 1500) == (delay.options, sum(delay.uniform_counts))
    bucket = figs[("checkout-test", "bucket")]
    assert sum(bucket.observed) == bucket.n < 1500  # units


def test_terminal_rendering_names_streams_tests_and_verdicts() -> None:
    """str(report) is a readable table with the verdict words and a closing line."""
    text = str(audit_tables(*synth.categorical(rng(13), 3000, [0.6, 0.3, 0.1], [0.5, 0.3, 0.2])))
    assert "slot-discount" in text
    assert "assignment ratios" in text
    assert "not as declared" in text
    assert "4 alarms: randomization not as declared." in text
    empty = audit_tables(
        pd.DataFrame(columns=list(DECISION_COLUMNS)), pd.DataFrame(columns=list(DRAW_COLUMNS))
    )
    assert empty.ok
    assert "No draws to audit" in str(empty)


def test_terminal_rendering_spells_out_pit() -> None:
    """Plain text that lists PIT tests says once what PIT stands for."""
    report = audit_tables(*synth.categorical(rng(13), 3000, [0.6, 0.3, 0.1], [0.6, 0.3, 0.1]))
    assert any(t.test.startswith("pit") for t in report.tests)
    assert 1 == " ".join(str(report).split()).count("probability integral transform (PIT)")


# -- bad input ---------------------------------------------------------------------------------
def test_unreadable_ledgers_raise_ledger_error(tmp_path: Path) -> None:
    """A missing file or a file that is not a ledger gives a LedgerError naming it."""
    with pytest.raises(LedgerError, match="no such file"):
        audit(tmp_path / "missing.db")
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"this is not a database" * 100)
    with pytest.raises(LedgerError, match=r"junk\.db"):
        audit(junk)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"alpha": 0.0}, "alpha must be"),
        ({"alpha": 1.5}, "alpha must be"),
        ({"engine": "dask"}, "dask engine reads partitioned Parquet ledgers"),
        ({"engine": "spark"}, "unknown engine"),
        ({"scheduler": "tcp://127.0.0.1:8786"}, "needs the dask engine"),
        ({"sample_size": 0}, "sample_size must be"),
        ({"chunk_size": 0}, "chunk_size must be"),
    ],
)
def test_bad_arguments_raise_replay_error(
    ledger_path: Path, kwargs: dict[str, Any], message: str
) -> None:
    dl.Ledger(ledger_path).close()
    with pytest.raises(ReplayError, match=message):
        audit(ledger_path, **kwargs)


def test_tables_without_the_ledger_columns_are_refused() -> None:
    with pytest.raises(ReplayError, match="draws table has no column name, kind, args"):
        audit_tables(
            pd.DataFrame(columns=list(DECISION_COLUMNS)),
            pd.DataFrame(columns=["decision_id", "idx"]),
        )


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(spec=valid_draws(), seed=seeds)
def test_every_valid_sdk_draw_is_consistent_with_its_declaration(
    spec: tuple[str, dict[str, Any]], seed: bytes
) -> None:
    """The audit recomputes each kind's declared probability (or density) as the SDK does:
    no valid draw is ever counted as inconsistent."""
    kind, args = spec
    draw = dl.Draw(seed)
    getattr(draw, kind)(**args)
    rec = draw.records[0]
    d, w = synth.tables(
        "fuzz",
        kind,
        orjson.dumps(rec.args).decode(),
        [orjson.dumps(rec.value).decode()],
        np.array([rec.prob]),
        np.array(rec.u[:1]),
        rng(),
    )
    w["u"] = [orjson.dumps(rec.u).decode()]
    consistency = find(audit_tables(d, w), "fuzz", "consistency")
    assert 0.0 == consistency.statistic, consistency.detail


def loose_json(obj: Any) -> str:
    """JSON text of anything; what JSON cannot hold (NaN, huge integers) gives invalid JSON."""
    try:
        return orjson.dumps(obj, option=orjson.OPT_NON_STR_KEYS, default=repr).decode()
    except TypeError:
        return json.dumps(obj, default=repr)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    rows=st.lists(
        st.tuples(junk_draws(), json_values, st.floats(allow_nan=False), json_values),
        min_size=1,
        max_size=8,
    )
)
def test_junk_declarations_never_break_the_audit(rows: list[Any]) -> None:
    """Declared draws with junk arguments, values, probabilities and uniforms are judged,
    never crash the audit, and the JSON stays plain."""
    kinds = [spec[0] for spec, *_ in rows]
    args = [loose_json(spec[1]) for spec, *_ in rows]
    values = [loose_json(v) for _, v, _, _ in rows]
    d, w = synth.tables(
        "junk", "categorical", args, values, np.array([p for *_, p, _ in rows]), None, rng()
    )
    w["kind"] = kinds
    w["u"] = [loose_json(u) for *_, u in rows]
    report = audit_tables(d, w)
    for t in report.tests:
        assert t.verdict in VERDICTS
    assert len(rows) == sum(t.n for t in report.tests if t.test == "consistency")
    orjson.dumps(report.to_dict())


# -- end to end: declared draws from another system, ingested ------------------------------------
def test_ingested_declared_draws_are_audited(tmp_path: Path) -> None:
    """JSON Lines of a legacy service that declares 0.6/0.3/0.1 but draws 0.5/0.3/0.2, loaded
    with drawledger.ingest, raise an alarm on the ratio; the honest file passes."""
    for faulty in (False, True):
        r = rng(14)
        real = [0.5, 0.3, 0.2] if faulty else [0.6, 0.3, 0.1]
        lines = []
        for i, u in enumerate(synth.uniforms(r, 4000).tolist()):
            j = int(np.searchsorted(np.cumsum(real), u, side="right"))
            lines.append(
                orjson.dumps(
                    {
                        "decision_id": f"legacy-discount-{i:05d}",
                        "stream": "slot-discount",
                        "unit": f"shopper-{i:05d}",
                        "ts": synth.START + 60.0 * i,
                        "kind": "categorical",
                        "args": {"options": [0, 5, 10], "probs": [0.6, 0.3, 0.1]},
                        "value": [0, 5, 10][j],
                        "prob": [0.6, 0.3, 0.1][j],
                        "u": [u],
                    }
                )
            )
        source = tmp_path / f"legacy-{faulty}.jsonl"
        source.write_bytes(b"\n".join(lines) + b"\n")
        target = tmp_path / f"legacy-{faulty}.db"
        assert dl.ingest(source, target).ok
        report = audit(target)
        assert 4000 == report.decisions
        assert faulty == find(report, "slot-discount", "ratio").alarm
        assert (not faulty) == report.ok


def test_parquet_ledger_is_audited(tmp_path: Path) -> None:
    """The same audit runs on a Parquet ledger directory."""
    led = dl.Ledger(tmp_path / "ledger", format="parquet")
    record_every_kind(led, 150)
    led.close()
    report = audit(tmp_path / "ledger")
    assert 4 * 150 == report.decisions
    assert report.ok


@pytest.mark.postgres
def test_postgres_ledger_is_audited(postgres_url: str) -> None:
    """The same audit runs on a PostgreSQL ledger."""
    led = dl.Ledger(postgres_url)
    record_every_kind(led, 150)
    led.close()
    report = audit(postgres_url)
    assert 4 * 150 == report.decisions
    assert report.ok


# -- docs ---------------------------------------------------------------------------------------
def test_docs_audit_python_blocks_run(run_markdown: Callable[..., Any]) -> None:
    """docs/audit.md: its Python blocks run in order, in a fresh interpreter, in a temp dir."""
    done = run_markdown("docs/audit.md")
    assert 0 == done.returncode, done.stderr
    assert "not as declared (p = 2.9e-131)" in done.stdout  # the value docs/audit.md quotes
    assert "slot-discount: ratio is not as declared" in done.stdout


# -- declared values against their uniforms ------------------------------------------------------
def test_declared_values_contradicting_their_uniforms_are_counted_and_named() -> None:
    """A faulty port records 5% of its values off by one option: each contradicts the uniform
    it recorded (draw spec v1: the first j with u < c_j), so the consistency check counts them,
    names some, and the audit fails."""
    d, w = synth.categorical(rng(21), 2000, [0.6, 0.3, 0.1])
    d["fn"] = None  # declared draws: no function to replay
    faulty = w.index[rng(22).random(len(w)) < 0.05]
    w.loc[faulty, "value"] = [{"0": "1", "1": "2", "2": "0"}[v] for v in w.loc[faulty, "value"]]
    w.loc[faulty, "prob"] = [{"1": 0.3, "2": 0.1, "0": 0.6}[v] for v in w.loc[faulty, "value"]]
    report = audit_tables(d, w)
    consistency = find(report, "slot-discount", "consistency")
    assert (float(len(faulty)), True) == (consistency.statistic, consistency.alarm)
    assert f"{len(faulty)} values contradict their uniforms" in consistency.detail
    assert repr(str(d.loc[faulty[0], "decision_id"])) in consistency.detail
    assert not report.ok
    honest = audit_tables(*synth.categorical(rng(21), 2000, [0.6, 0.3, 0.1]))
    assert 0.0 == find(honest, "slot-discount", "consistency").statistic


def test_uniform_counts_that_do_not_fit_the_draw_contradict() -> None:
    """A categorical draw uses one uniform, a slate of k = 2 two: other counts contradict."""
    ledger_rows = [
        ("categorical", {"options": ["a", "b"], "probs": [0.5, 0.5]}, "a", 0.5, [0.1, 0.2], 1.0),
        ("slate", {"options": ["a", "b", "c"], "weights": [1.0, 1.0, 1.0], "k": 2}, ["a", "b"],
         1 / 6, [0.1], 1.0),
        ("slate", {"options": ["a", "b", "c"], "weights": [1.0, 1.0, 1.0], "k": 2}, ["a", "b"],
         1 / 6, [0.1, 0.2], 0.0),
    ]  # fmt: skip
    for kind, args, value, prob, u, expected in ledger_rows:
        d, w = synth.tables("port", kind, orjson.dumps(args).decode(),
                            [orjson.dumps(value).decode()], np.array([prob]), None, rng(),
                            seeded=False)  # fmt: skip
        w["u"] = [orjson.dumps(u).decode()]
        got = find(audit_tables(d, w), "port", "consistency").statistic
        assert expected == got, (kind, u)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(spec=valid_draws(), seed=seeds)
def test_declared_values_drawn_by_the_sdk_never_contradict_their_uniforms(
    spec: tuple[str, dict[str, Any]], seed: bytes
) -> None:
    """Every valid draw the SDK makes, declared with its uniforms, passes the check."""
    kind, args = spec
    draw = dl.Draw(seed)
    getattr(draw, kind)(**args)
    rec = draw.records[0]
    d, w = synth.tables("fuzz", kind, orjson.dumps(rec.args).decode(),
                        [orjson.dumps(rec.value).decode()], np.array([rec.prob]), None, rng(),
                        seeded=False)  # fmt: skip
    w["u"] = [orjson.dumps(rec.u).decode()]
    consistency = find(audit_tables(d, w), "fuzz", "consistency")
    assert 0.0 == consistency.statistic, consistency.detail


# -- arms repeated within units -------------------------------------------------------------------
def test_units_pinned_to_one_arm_alarm_without_repeated_uniforms() -> None:
    """A fifth of the shoppers keep their first discount on every visit while each visit
    records a fresh uniform: the uniforms never repeat, the within-unit repeats do."""
    d, w = synth.repeat_visits(rng(31), 500, 6, sticky=0.2)
    report = audit_tables(d, w)
    repeats = find(report, "slot-discount", "unit_repeats")
    assert (2500, True) == (repeats.n, repeats.alarm)
    assert not find(report, "slot-discount", "repeated_uniforms").alarm
    assert not report.ok


def test_unit_repeats_match_by_hand_and_across_chunks() -> None:
    """Expected repeats are the later draw's declared probability of the earlier pick, summed
    over consecutive pairs (worked by hand for two shoppers); chunks that split a shopper's
    visits give the same pairs, formed at the merge."""
    d, w = synth.repeat_visits(rng(32), 2, 3)
    probs = [orjson.loads(a)["probs"] for a in w["args"]]
    picks = [orjson.loads(v) for v in w["value"]]
    expected = matches = 0.0
    for shopper in (0, 1):
        visits = [shopper, shopper + 2, shopper + 4]  # decision v * units + k
        for e, late in itertools.pairwise(visits):
            expected += probs[late][[0, 5, 10].index(picks[e])]
            matches += picks[late] == picks[e]
    for chunk in (None, 1, 3):
        state_report = audit_tables(d, w, chunk_size=chunk)
        t = find(state_report, "slot-discount", "unit_repeats")
        assert 4 == t.n
        assert f"{int(matches)} of 4 consecutive draws" in t.detail
        assert f"{expected:.1f} expected" in t.detail


CALIBRATION_RUNS = 50


def _unit_repeat_p_values(runs: int) -> list[float]:
    out = []
    for seed in range(runs):
        d, w = synth.repeat_visits(rng(1000 + seed), 150, 4)
        t = find(audit_tables(d, w), "slot-discount", "unit_repeats")
        assert t.p_value is not None
        out.append(t.p_value)
    return out


def test_unit_repeat_p_values_are_uniform_under_correct_randomization() -> None:
    """Kolmogorov-Smirnov of 50 seeded runs' p-values against scipy.stats.uniform."""
    p = _unit_repeat_p_values(CALIBRATION_RUNS)
    assert stats.kstest(p, stats.uniform.cdf).pvalue > 0.01


@pytest.mark.slow
def test_unit_repeat_p_values_are_uniform_in_500_runs() -> None:
    """Kolmogorov-Smirnov of 500 seeded runs' p-values against scipy.stats.uniform."""
    p = _unit_repeat_p_values(500)
    assert stats.kstest(p, stats.uniform.cdf).pvalue > 0.01


# -- decisions without draws ----------------------------------------------------------------------
def test_actions_varying_without_draws_name_randomness_outside_draw(ledger: dl.Ledger) -> None:
    """A decision that picks its card with the `random` module records no draw; the same
    inputs then show different actions, and the audit says what likely happened."""
    import random

    rand = random.Random(3)

    @ledger.decision("hidden-card")
    def hidden(tier: str, draw: dl.Draw) -> str:
        return rand.choice(synth.CARDS)

    @ledger.decision("fixed-card")
    def fixed(tier: str, draw: dl.Draw) -> str:
        return synth.CARDS[len(tier)]

    for i in range(40):
        hidden("plus" if i % 2 else "basic")
        fixed("plus" if i % 2 else "basic")
    for chunk in (7, 50_000):  # the same inputs in different chunks still meet at the merge
        varied = find(audit(ledger, chunk_size=chunk), "hidden-card", "actions_without_draws")
        assert (2.0, True, 40) == (varied.statistic, varied.alarm, varied.n)
    report = audit(ledger)
    assert "likely randomness outside `draw` (the `random` module" in varied.detail
    assert "random or clock outside draw" in report.render()
    assert not find(report, "fixed-card", "actions_without_draws").alarm
    assert not report.ok
