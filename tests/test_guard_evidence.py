"""The guard's anytime-valid evidence: the formula, the martingale, calibration and power.

The calibration runs watch simulated counts with the statistics functions directly (no ledger),
so that many watched ledgers fit in the default run; the slow variants are larger.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats

from drawledger.replay.guard import log_mixture_e, threshold, window_test


def test_log_e_is_the_dirichlet_multinomial_against_the_multinomial() -> None:
    """The e-value of counts is the Bayes factor DirMult(c p0) / Mult(p0) of the counts (the
    multinomial coefficients cancel); reference: scipy.stats.dirichlet_multinomial and
    scipy.stats.multinomial."""
    p0 = np.array([0.5, 0.3, 0.2])
    counts = np.array([40, 35, 25])
    c = 100.0
    expected = (stats.dirichlet_multinomial.logpmf(counts, c * p0, counts.sum())
                - stats.multinomial.logpmf(counts, counts.sum(), p0))  # fmt: skip
    assert expected == pytest.approx(log_mixture_e(counts, p0, c), rel=1e-10)


@given(
    st.lists(st.integers(0, 50), min_size=2, max_size=6),
    st.floats(1.0, 500.0),
)
def test_the_e_value_is_a_martingale_under_the_declaration(counts: list[int], c: float) -> None:
    """E[E_{n+1} | counts] = E_n: the average over the next pick, weighted by the declared
    probabilities, gives the current value back (the defining property of a martingale)."""
    k = len(counts)
    p0 = np.arange(1, k + 1, dtype=float)
    p0 /= p0.sum()
    now = math.exp(log_mixture_e(counts, p0, c))
    nxt = 0.0
    for j in range(k):
        step = list(counts)
        step[j] += 1
        nxt += p0[j] * math.exp(log_mixture_e(step, p0, c))
    assert now == pytest.approx(nxt, rel=1e-9)


def test_no_data_is_no_evidence() -> None:
    assert 0.0 == log_mixture_e([0, 0, 0], [0.2, 0.3, 0.5])


def test_threshold_splits_alpha_between_a_draws_two_processes() -> None:
    assert math.log(200.0) == pytest.approx(threshold(0.01))


def _watch(rng: np.random.Generator, ledgers: int, batches: int, size: int, p0: np.ndarray,
           drift: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:  # fmt: skip
    """Cumulative counts after each batch, (ledgers, batches, cells); with ``drift`` the
    second half of the batches is drawn from it."""
    probs = np.tile(p0, (batches, 1))
    if drift is not None:
        probs[batches // 2 :] = drift
    draws = np.stack([rng.multinomial(size, probs[b], size=ledgers) for b in range(batches)], 1)
    return np.cumsum(draws, axis=1), draws


def _alarms(cum: np.ndarray, p0: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Per ledger: whether the e-value ever reached 1/alpha, and whether a fixed-n Pearson
    chi-square re-run after every batch ever had p < alpha (the statistic of
    scipy.stats.chisquare, its p-value from scipy.stats.chi2, vectorized)."""
    ledgers, batches, _ = cum.shape
    seq = np.zeros(ledgers, bool)
    for i in range(ledgers):
        for b in range(batches):
            seq[i] |= log_mixture_e(cum[i, b], p0) >= math.log(1.0 / alpha)
    expected = cum.sum(axis=2, keepdims=True) * p0
    chisq = np.sum((cum - expected) ** 2 / expected, axis=2)
    fixed = np.any(stats.chi2.sf(chisq, len(p0) - 1) < alpha, axis=1)
    return seq, fixed


def _calibration(ledgers: int, batches: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    p0 = np.array([0.5, 0.3, 0.2])
    alpha = 0.05
    cum, _ = _watch(rng, ledgers, batches, 50, p0)
    seq, fixed = _alarms(cum, p0, alpha)
    # Binomial tolerance: the 99th percentile of Binomial(ledgers, alpha) (scipy.stats.binom).
    allowed = stats.binom.ppf(0.99, ledgers, alpha) / ledgers
    print(f"any-alarm share: sequential {seq.mean():.3f}, fixed-n re-run {fixed.mean():.3f}")
    assert seq.mean() <= allowed
    assert fixed.mean() > max(2 * seq.mean(), alpha + 0.05)


def test_watched_continuously_the_e_value_keeps_its_level_and_fixed_n_does_not() -> None:
    """200 watched ledgers x 30 batches under correct randomization: the share with any alarm
    stays within alpha's binomial tolerance; a chi-square re-run per batch alarms far more."""
    _calibration(200, 30, seed=1)


@pytest.mark.slow
def test_calibration_over_many_long_watches() -> None:
    _calibration(1000, 200, seed=2)


def _delays(ledgers: int, batches: int, size: int, seed: int) -> np.ndarray:
    """Decisions from the fault (halfway) to the alarm, per ledger (inf: no alarm)."""
    rng = np.random.default_rng(seed)
    p0 = np.array([0.5, 0.5])
    cum, _ = _watch(rng, ledgers, batches, size, p0, drift=np.array([0.55, 0.45]))
    limit = threshold(0.01)
    out = np.full(ledgers, np.inf)
    for i in range(ledgers):
        for b in range(batches // 2, batches):
            if log_mixture_e(cum[i, b], p0) >= limit:
                out[i] = (b + 1 - batches // 2) * size
                break
    return out


def test_a_ratio_drift_halfway_raises_an_alarm() -> None:
    """0.5 -> 0.55 after 10 000 decisions: most watched ledgers alarm within 30 000 more."""
    delays = _delays(40, 40, 1000, seed=3)
    assert np.mean(np.isfinite(delays)) >= 0.8


@pytest.mark.slow
def test_median_delay_of_a_ratio_drift() -> None:
    """The numbers quoted in docs/guard.md (printed with -s)."""
    delays = _delays(100, 200, 500, seed=4)
    found = delays[np.isfinite(delays)]
    print(f"ratio 0.5 -> 0.55 after 50000: {len(found)}/100 alarmed, median delay "
          f"{np.median(found):.0f} decisions")  # fmt: skip
    assert len(found) >= 95


@pytest.mark.slow
def test_median_delay_of_biased_uniforms() -> None:
    """Uniforms that fall in the lowest tenth 12% of the time instead of 10%."""
    rng = np.random.default_rng(5)
    p0 = np.full(10, 0.1)
    bad = np.array([0.12] + [0.88 / 9] * 9)
    cum, _ = _watch(rng, 100, 200, 500, p0, drift=bad)
    limit = threshold(0.01)
    delays = []
    for i in range(100):
        for b in range(100, 200):
            if log_mixture_e(cum[i, b], p0) >= limit:
                delays.append((b + 1 - 100) * 500)
                break
    print(f"uniforms 10% -> 12% in the first tenth: {len(delays)}/100 alarmed, median delay "
          f"{np.median(delays):.0f} decisions")  # fmt: skip
    assert len(delays) >= 90


def test_the_window_test_reports_drift_in_recent_counts() -> None:
    assert window_test([550, 450], [0.5, 0.5]) == pytest.approx(
        stats.chisquare([550, 450], [500, 500]).pvalue  # reference: scipy.stats.chisquare
    )
    assert window_test([3, 1], [0.5, 0.5]) is None  # expected counts below 5


@given(
    st.lists(st.integers(20, 400), min_size=2, max_size=8),
    st.lists(st.floats(0.05, 1.0), min_size=8, max_size=8),
)
def test_the_window_test_is_pearsons_chi_square(counts: list[int], weights: list[float]) -> None:
    shares = np.array(weights[: len(counts)]) / sum(weights[: len(counts)])
    expected = sum(counts) * shares
    got = window_test(counts, list(shares))
    if expected.min() < 5.0:
        assert got is None
    else:  # reference: scipy.stats.chisquare with the same expected counts
        assert stats.chisquare(counts, expected).pvalue == pytest.approx(got, rel=1e-9, abs=1e-300)
