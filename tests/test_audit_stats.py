"""The audit's statistical building blocks (audit/_stats.py) against outside references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from drawledger.replay.audit import _stats


def test_pearson_reference_600_400_against_equal_shares() -> None:
    """Reference (scipy.stats.chisquare): 600/400 against 50/50 gives 40 and p = 2.54e-10."""
    res = _stats.pearson(np.array([600.0, 400.0]), np.array([500.0, 500.0]))
    assert 40.0 == pytest.approx(res.statistic)
    assert 2.54e-10 == pytest.approx(res.p_value, rel=2e-3)
    assert 1 == res.df


def test_pearson_reference_3400_3300_3300_gives_p_one_over_e() -> None:
    """Reference (scipy.stats.chisquare): 3400/3300/3300 against equal shares gives chi-square 2
    with 2 degrees of freedom, whose survival function is exactly e^-1 (chi-square with 2 df is
    exponential with mean 2)."""
    res = _stats.pearson(np.array([3400.0, 3300.0, 3300.0]), np.full(3, 10_000 / 3))
    assert 2.0 == pytest.approx(res.statistic)
    assert math.exp(-1.0) == pytest.approx(res.p_value, rel=1e-12)


def test_quadratic_form_with_fixed_probabilities_is_pearson() -> None:
    """With the same p for every pick, (O-E)' Sigma^+ (O-E) for Sigma = n (diag p - p p') is
    Pearson's statistic (standard identity, recalled from memory; checked against
    scipy.stats.chisquare)."""
    p = np.array([0.6, 0.3, 0.1])
    n = 1000
    observed = np.array([612.0, 281.0, 107.0])
    cov = n * (np.diag(p) - np.outer(p, p))
    res = _stats.quadratic_chisq(observed - n * p, cov)
    assert res is not None
    ref = stats.chisquare(observed, n * p)
    assert ref.statistic == pytest.approx(res.statistic, rel=1e-9)
    assert ref.pvalue == pytest.approx(res.p_value, rel=1e-9)
    assert 2 == res.df


def test_quadratic_form_of_two_options_is_the_poisson_binomial_z_test() -> None:
    """Two options with varying p_i: the statistic is (O - sum p)^2 / sum p(1-p), the squared z
    of a Poisson-binomial count (its variance is sum p_i (1 - p_i), textbook), with 1 df."""
    rng = np.random.default_rng(3)
    p = rng.uniform(0.05, 0.95, size=500)
    picks = rng.uniform(size=500) < p
    diff = picks.sum() - p.sum()
    var = np.sum(p * (1 - p))
    cov = np.array([[var, -var], [-var, var]])
    res = _stats.quadratic_chisq(np.array([diff, -diff]), cov)
    assert res is not None
    assert diff**2 / var == pytest.approx(res.statistic, rel=1e-9)
    assert stats.chi2.sf(diff**2 / var, 1) == pytest.approx(res.p_value, rel=1e-9)
    assert 1 == res.df


def test_holm_matches_the_step_down_procedure_worked_by_hand() -> None:
    """Holm (1979): sort p, multiply the i-th smallest by (m - i + 1), keep it monotone, cap at 1.
    Worked by hand: [0.01, 0.04, 0.03, 0.005] -> [0.03, 0.06, 0.06, 0.02]."""
    assert [0.03, 0.06, 0.06, 0.02] == pytest.approx(_stats.holm([0.01, 0.04, 0.03, 0.005]))
    assert [1.0, 1.0] == _stats.holm([0.6, 0.9])
    assert [] == _stats.holm([])


def test_repeats_follow_the_birthday_poisson_approximation() -> None:
    """Birthday problem: pairs that coincide among n draws from N values are about
    Poisson(C(n, 2) / N) (recalled from memory, e.g. Feller vol. 1)."""
    no_repeat = _stats.repeats(1000, 1000, 2.0**53)
    assert (0.0, 1.0) == (no_repeat.statistic, no_repeat.p_value)
    one = _stats.repeats(2, 1, 2.0)  # two draws from two values: lambda = 1/2
    assert 1 - math.exp(-0.5) == pytest.approx(one.p_value)
    many = _stats.repeats(100_000, 50_000, 2.0**53)
    assert 50_000 == many.statistic
    assert many.p_value < 1e-300


def test_resolution_of_recorded_uniforms() -> None:
    """Uniforms of the spec take 2**53 values, single-precision ones 2**24, six decimals 10**6."""
    rng = np.random.default_rng(0)
    words = rng.integers(0, 2**64, size=1000, dtype=np.uint64)
    assert 2.0**53 == _stats.resolution(_stats.to_unit(words))
    singles = rng.random(1000, dtype=np.float32).astype(np.float64)
    assert 2.0**24 == _stats.resolution(singles)
    assert 1e6 == _stats.resolution(np.round(rng.random(1000), 6))


def test_binned_uniformity_is_scipy_chisquare_on_the_merged_bins() -> None:
    """scipy.stats.chisquare on the same histogram; small samples use coarser bins."""
    rng = np.random.default_rng(1)
    counts = _stats.histogram(rng.random(5000))
    res = _stats.binned_uniformity(counts)
    ref = stats.chisquare(counts)
    assert res is not None
    assert (ref.statistic, ref.pvalue, 19) == pytest.approx(res)
    small = _stats.histogram(rng.random(30))  # 30 / 5 bins = 6 expected per bin
    res = _stats.binned_uniformity(small)
    assert res is not None
    assert 4 == res.df
    assert stats.chisquare(small.reshape(5, 4).sum(axis=1)).statistic == pytest.approx(
        res.statistic
    )
    assert _stats.binned_uniformity(_stats.histogram(rng.random(9))) is None


def test_histogram_puts_one_in_the_last_bin() -> None:
    """The spec's uniforms can equal 1.0 (probability 2**-53): it counts in the last bin."""
    assert 1 == _stats.histogram(np.array([1.0]))[-1]
    assert 1 == _stats.histogram(np.array([0.0]))[0]


def test_pool_cells_keeps_every_expected_count_at_least_five() -> None:
    """Cochran's rule (common practice): cells with expected count < 5 are pooled."""
    assert [[0], [1], [2, 3]] == _stats.pool_cells(np.array([50.0, 40.0, 3.0, 2.5]))
    assert [[0], [1, 2, 3]] == _stats.pool_cells(np.array([50.0, 40.0, 3.0, 0.5]))
    assert [] == _stats.pool_cells(np.array([4.0, 0.5]))
    assert [[0], [2]] == _stats.pool_cells(np.array([6.0, 0.0, 6.0]))


def test_mix64_is_the_splitmix64_finalizer() -> None:
    """splitmix64 seeded with 0 outputs 0xe220a8397b1dcdaf then 0x6e789e6aa1b965f4 (Vigna's
    reference generator; values recalled from memory)."""
    gamma = 0x9E3779B97F4A7C15
    states = np.array([gamma, (2 * gamma) % 2**64], dtype=np.uint64)
    assert [0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4] == [int(x) for x in _stats.mix64(states)]


def test_ks_and_spearman_are_scipy() -> None:
    """The wrappers return scipy.stats.kstest and scipy.stats.spearmanr unchanged."""
    rng = np.random.default_rng(2)
    x, y = rng.random(300), rng.random(300)
    ks = stats.kstest(x, "uniform")
    assert (ks.statistic, ks.pvalue) == _stats.ks_uniform(x)[:2]
    sp = stats.spearmanr(x, y)
    assert (sp.statistic, sp.pvalue) == _stats.spearman(x, y)[:2]
