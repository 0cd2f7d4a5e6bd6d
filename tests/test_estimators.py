"""The estimators on plain arrays: IPS, SNIPS, clipped IPS, DR, intervals and diagnostics."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.linear_model import Ridge
from strategies import chunk_cuts, weighted_rewards

from drawledger.exceptions import ReplayError
from drawledger.replay._keys import id_keys
from drawledger.replay.estimate import _estimators as est
from drawledger.replay.estimate._reward_model import RidgeStats, dr_terms

HAND_W = [2.0, 0.0, 2.0, 0.5]
HAND_R = [1.0, 1.0, 0.0, 1.0]


def _moments(w, r, cap=10.0, dr=None):
    return est.Moments.of(est.policy_columns(w, r, cap=cap, dr=dr))


def test_hand_worked_vector_gives_ips_snips_delta_variance_and_kish_ess():
    """Worked by hand from the published formulas.

    IPS (Horvitz & Thompson 1952): sum w r / n = 2.5 / 4 = 0.625.
    SNIPS (Hajek): sum w r / sum w = 2.5 / 4.5 = 5/9.
    Delta-method variance of the ratio: sum w^2 (r - 5/9)^2 / (sum w)^2
      = (4 * 16/81 + 4 * 25/81 + 0.25 * 16/81) / (81/4) = 672/6561.
    Kish (1965) effective sample size: (sum w)^2 / sum w^2 = 20.25 / 8.25 = 27/11.
    """
    m = _moments(HAND_W, HAND_R)
    e = est.estimands()
    assert 0.625 == pytest.approx(float(e["ips"].value(m.mean)), abs=1e-15)
    assert 5 / 9 == pytest.approx(float(e["snips"].value(m.mean)), abs=1e-15)
    assert 672 / 6561 == pytest.approx(est.delta_variance(e["snips"], m), rel=1e-12)
    assert 27 / 11 == pytest.approx(est.kish_ess(m), rel=1e-12)


def test_snips_clt_interval_is_the_delta_method_interval():
    """value -/+ z_{0.975} sqrt(672/6561); z from scipy.stats.norm (external check)."""
    m = _moments(HAND_W, HAND_R)
    out = est.summarize(m, reward_range=(0.0, 1.0), names=("snips",))["snips"]
    half = scipy.stats.norm.ppf(0.975) * math.sqrt(672 / 6561)
    assert 5 / 9 - half == pytest.approx(out["low"], rel=1e-12)
    assert 5 / 9 + half == pytest.approx(out["high"], rel=1e-12)


def test_ips_clt_interval_matches_scipy_normal_interval():
    """IPS is a mean: its interval is scipy.stats.norm.interval with the plug-in standard error."""
    rng = np.random.default_rng(4)
    w = rng.exponential(1.0, 500)
    r = rng.random(500)
    out = est.summarize(_moments(w, r), reward_range=(0.0, 1.0), level=0.9, names=("ips",))
    x = w * r
    expected = scipy.stats.norm.interval(0.9, loc=x.mean(), scale=x.std() / math.sqrt(x.size))
    assert expected[0] == pytest.approx(out["ips"]["low"], rel=1e-10)
    assert expected[1] == pytest.approx(out["ips"]["high"], rel=1e-10)


def test_clipping_zeroes_weights_at_or_above_the_cap_and_bounds_the_bias():
    """Bottou et al. (2013), JMLR 14, section 4: weights >= R count as 0; the clipped-away
    value lies in [0, M (1 - W)], bounded with a lower confidence bound on W.

    With R = 2 the kept weights are six 0.5 and two 0: W = 0.375 and the clipped estimate is
    0.5 * 5 / 8 (worked by hand). At level 0.95 the one-sided bound W_low at 0.975 is
    W - z_{0.975} se, se = sqrt(0.75 * 0.25 * 0.5^2 / 8) (z from scipy.stats.norm), so the
    bias bound is 1 - W_low; the band adds it to the clipped value's 97.5% interval.
    """
    w = [0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 3.0, 3.0]
    r = [1.0, 1.0, 1.0, 1.0, 1.0, 0.0, 1.0, 0.0]
    z = est.policy_columns(w, r, cap=2.0)
    assert [0.5] * 6 + [0.0, 0.0] == z[:, est.K].tolist()
    out = est.summarize(est.Moments.of(z), reward_range=(0.0, 1.0), names=("clipped",))
    clipped = out["clipped"]
    assert 2.5 / 8 == clipped["value"]
    w_low = 0.375 - scipy.stats.norm.ppf(0.975) * math.sqrt(0.75 * 0.25 * 0.5**2 / 8)
    assert 1.0 - w_low == pytest.approx(clipped["bias_bound"], rel=1e-12)
    assert 0.0 == clipped["bias_low"]
    inner = est.clt_interval(est.estimands()["clipped"], est.Moments.of(z), 0.975)
    assert inner[0] == pytest.approx(clipped["outer_low"], rel=1e-12)
    assert inner[1] + 1.0 - w_low == pytest.approx(clipped["outer_high"], rel=1e-12)


# Clipped-away rewards at M = 1: logging mu = (0.6, 0.38, 0.02), target pi = (0.3, 0.4, 0.3),
# Bernoulli rewards with means (0.02, 0.05, 1.0). The third action's weight 15 is clipped at
# R = 10 and its mass 0.3 sits at the top of the reward range, so the truth
# 0.006 + 0.02 + 0.3 = 0.326 (worked by hand) lies at the upper end of the bias interval: a
# bias bound from the point estimate of W covered it in about 77% of runs at nominal 95%.
_MU, _PI, _MEANS = np.array([0.6, 0.38, 0.02]), np.array([0.3, 0.4, 0.3]), [0.02, 0.05, 1.0]
_TRUTH = 0.326


def _clipped_band_coverage(runs: int, n: int, interval: str = "clt") -> int:
    """Seeded runs whose outer band of clipped IPS (95%) holds the true value."""
    covered = 0
    for rep in range(runs):
        rng = np.random.default_rng(rep)
        a = rng.choice(3, size=n, p=_MU)
        r = (rng.random(n) < np.take(_MEANS, a)).astype(float)
        z = est.policy_columns(_PI[a] / _MU[a], r, cap=10.0)
        kw: dict = {}
        if interval == "bootstrap":
            keys = rng.integers(0, 2**64, size=n, dtype=np.uint64)
            kw["boot"] = _boot_means(z, keys, 400, rep)
        elif interval == "bernstein":
            kw["spans"] = est.column_spans(float((_PI / _MU).max()), 10.0, (0.0, 1.0))
        out = est.summarize(est.Moments.of(z), reward_range=(0.0, 1.0), names=("clipped",),
                            interval=interval, **kw)["clipped"]  # fmt: skip
        covered += out["outer_low"] <= _TRUTH <= out["outer_high"]
    return covered


def _at_least_nominal(covered: int, runs: int, level: float = 0.95) -> bool:
    """Coverage not significantly below ``level``: one-sided exact binomial test
    (scipy.stats.binomtest) at alarm level 0.001 (common practice)."""
    return scipy.stats.binomtest(covered, runs, level, alternative="less").pvalue > 0.001


def test_clipped_outer_band_covers_the_truth_when_clipped_rewards_sit_at_the_maximum():
    """100 seeded runs of 400 records: the band holds the truth at least at its level."""
    covered = _clipped_band_coverage(100, 400)
    assert _at_least_nominal(covered, 100), covered


@pytest.mark.slow
@pytest.mark.parametrize(("interval", "runs"), [("clt", 2000), ("bootstrap", 1000),
                                                ("bernstein", 1000)])  # fmt: skip
def test_clipped_outer_band_coverage_is_at_least_nominal_over_many_runs(interval, runs):
    covered = _clipped_band_coverage(runs, 400, interval)
    assert _at_least_nominal(covered, runs), covered


def test_clipped_outer_band_of_a_difference_covers_the_true_difference():
    """Target pi minus a baseline that is clipped too: (0.2, 0.5, 0.3) over mu has weight 15
    on the third action; its true value is 0.004 + 0.025 + 0.3 = 0.329 (by hand), so the true
    difference is 0.326 - 0.329 = -0.003. Both kept masses are bounded (delta / 4 each)."""
    base = np.array([0.2, 0.5, 0.3])
    covered = 0
    for rep in range(100):
        rng = np.random.default_rng(rep)
        a = rng.choice(3, size=400, p=_MU)
        r = (rng.random(400) < np.take(_MEANS, a)).astype(float)
        z = np.hstack([est.policy_columns(_PI[a] / _MU[a], r, cap=10.0),
                       est.policy_columns(base[a] / _MU[a], r, cap=10.0)])  # fmt: skip
        out = est.summarize(est.Moments.of(z), reward_range=(0.0, 1.0), names=("clipped",),
                            baseline=est.WIDTH)["clipped"]  # fmt: skip
        covered += out["outer_low"] <= -0.003 <= out["outer_high"]
    assert _at_least_nominal(covered, 100), covered


def test_overlap_rule_flags_ess_205_of_4000_with_a_largest_weight_of_150():
    """The reminder sweep at 30 minutes on the demo's ledger (4000 sessions): ESS 204.6,
    largest weight 150.6, 4.1% of the sum of the weights. Both rules fire; the thresholds are
    common practice."""
    problems = est.overlap_problems(204.6, 4000, 150.6 / 3714.0)
    assert 2 == len(problems)
    assert "effective sample size 204.6 is 5.12% of the 4000 records (below 10%)" == problems[0]
    assert "the largest weight carries 4.1% of the sum of the weights (above 1%)" == problems[1]


def test_overlap_rule_thresholds_and_the_largest_weights_share():
    assert [] == est.overlap_problems(400.0, 4000, 0.01)
    assert ["effective sample size 399.0 is 9.97% of the 4000 records (below 10%)"] == (
        est.overlap_problems(399.0, 4000, None)
    )
    assert ["effective sample size 99.0 of 99 records is below 100"] == (
        est.overlap_problems(99.0, 99, 0.01)
    )
    m = _moments([1.0, 3.0, 0.0, 4.0], [0.0, 1.0, 1.0, 0.0])
    assert 0.5 == est.max_weight_share(m)  # 4 / (1 + 3 + 0 + 4), by hand
    assert est.max_weight_share(_moments([0.0, 0.0], [1.0, 0.0])) is None


def test_support_deficit_is_the_target_mass_where_logging_has_none():
    """Logging (0.5, 0.5, 0) never takes the third action; target (0.3, 0.3, 0.4) gives it 0.4."""
    deficit = est.support_deficit([[0.3, 0.3, 0.4], [0.2, 0.8, 0.0]], [[0.5, 0.5, 0.0]] * 2)
    assert [0.4, 0.0] == pytest.approx(deficit.tolist())


@pytest.mark.parametrize(
    ("means", "ips_mean", "snips_mean", "truth"),
    [((0.6, 0.8, 0.1), 0.28, 0.7, 0.34), ((0.2, 0.3, 0.9), 0.1, 0.25, 0.64)],
)
def test_a_support_deficit_pulls_ips_toward_0_and_snips_either_way(
    means, ips_mean, snips_mean, truth
):
    """Logging (0.5, 0.5, 0) never shows the third action; the target (0.2, 0.2, 0.6) gives it
    0.6. IPS tends to the seen part pi . r over the seen actions (truth minus 0.6 x the unseen
    mean: always below a truth with rewards >= 0); SNIPS to the seen part over 0.4, the seen
    actions' mean, above the truth when the unseen action is worse and below when it is
    better (all worked by hand). 200 seeded runs of 500 records."""
    mu, pi = np.array([0.5, 0.5, 0.0]), np.array([0.2, 0.2, 0.6])
    ips, snips = [], []
    for rep in range(200):
        rng = np.random.default_rng(rep)
        a = rng.choice(3, size=500, p=mu)
        r = (rng.random(500) < np.take(means, a)).astype(float)
        out = est.summarize(_moments(pi[a] / mu[a], r), reward_range=(0.0, 1.0),
                            names=("ips", "snips"))  # fmt: skip
        ips.append(out["ips"]["value"])
        snips.append(out["snips"]["value"])
    assert ips_mean == pytest.approx(np.mean(ips), abs=0.01)
    assert snips_mean == pytest.approx(np.mean(snips), abs=0.01)
    assert np.mean(ips) < truth
    assert (np.mean(snips) > truth) == (means[2] < snips_mean)
    assert abs(np.mean(snips) - truth) <= 0.6 * (1.0 - 0.0)  # the warning's bound


def test_clipped_outer_band_covers_the_truth_despite_a_support_deficit():
    """The unseen share is part of 1 - W: logging (0.5, 0.5, 0), target (0.2, 0.2, 0.6),
    reward means (0.2, 0.3, 1.0), so the truth is 0.04 + 0.06 + 0.6 = 0.7 (by hand) while IPS
    tends to 0.1. 100 seeded runs of 500 records."""
    mu, pi, means = np.array([0.5, 0.5, 0.0]), np.array([0.2, 0.2, 0.6]), (0.2, 0.3, 1.0)
    covered = 0
    for rep in range(100):
        rng = np.random.default_rng(rep)
        a = rng.choice(3, size=500, p=mu)
        r = (rng.random(500) < np.take(means, a)).astype(float)
        out = est.summarize(_moments(pi[a] / mu[a], r), reward_range=(0.0, 1.0),
                            names=("clipped",))["clipped"]  # fmt: skip
        covered += out["outer_low"] <= 0.7 <= out["outer_high"]
    assert _at_least_nominal(covered, 100), covered


def test_bernstein_halfwidth_is_maurer_pontil_theorem_4_two_sided():
    """Maurer & Pontil (2009) Theorem 4 with ln(2/delta) -> ln(4/delta) for two sides:
    sqrt(2 V ln(4/delta) / n) + 7 ln(4/delta) / (3 (n - 1)) for values in [0, 1]; the range
    scales the second term. Numbers: V = 0.25, n = 100, delta = 0.05 (worked by hand)."""
    log = math.log(80.0)
    expected = math.sqrt(0.5 * log / 100) + 7 * 2.0 * log / 297
    assert expected == pytest.approx(est.bernstein_halfwidth(0.25, 100, 2.0, 0.05), rel=1e-14)
    assert math.inf == est.bernstein_halfwidth(0.25, 1, 1.0, 0.05)


def test_bernstein_interval_covers_a_bernoulli_mean_at_least_at_its_level():
    """Bernoulli(0.3) rewards, weight 1: the 95% bound must cover in >= 95% of 400 runs."""
    covered = 0
    for rep in range(400):
        r = (np.random.default_rng(rep).random(60) < 0.3).astype(float)
        m = _moments(np.ones(60), r)
        spans = est.column_spans(1.0, 10.0, (0.0, 1.0))
        lo, hi = est.bernstein_interval(est.estimands()["ips"], m, spans, 0.95)
        covered += lo <= 0.3 <= hi
    assert covered >= 380


def test_bernstein_snips_bound_divides_numerator_and_denominator_bounds():
    rng = np.random.default_rng(2)
    w = rng.exponential(1.0, 3000)
    r = rng.random(3000)
    m = _moments(w, r)
    spans = est.column_spans(float(w.max()), 10.0, (0.0, 1.0))
    out = est.summarize(m, reward_range=(0.0, 1.0), interval="bernstein", spans=spans)
    for name in ("ips", "snips", "clipped"):
        assert out[name]["low"] < out[name]["value"] < out[name]["high"]
    # An unbounded denominator (a lower bound <= 0) gives no finite interval.
    tiny = _moments([0.0, 1.0, 0.0], [0.0, 1.0, 1.0])
    spans = est.column_spans(1.0, 10.0, (0.0, 1.0))
    none = est.summarize(tiny, reward_range=(0.0, 1.0), interval="bernstein", spans=spans,
                         names=("snips",))  # fmt: skip
    assert (None, None) == (none["snips"]["low"], none["snips"]["high"])


def _boot_means(z, keys, b, seed):
    sums, counts = est.bootstrap_sums(z, keys, b, seed)
    with np.errstate(invalid="ignore"):  # a replicate of 4 records may draw none of them
        return sums / counts[:, None]


def test_bootstrap_percentile_interval_agrees_with_scipy_bootstrap():
    """The Poisson bootstrap against scipy.stats.bootstrap (percentile method) for IPS.

    Both resample the same 2000 records; the Poisson bootstrap's percentile interval is
    asymptotically that of the multinomial bootstrap (Hanley & MacGibbon 2006).
    """
    rng = np.random.default_rng(11)
    w = rng.exponential(1.0, 2000)
    r = rng.random(2000)
    z = est.policy_columns(w, r, cap=10.0)
    keys = rng.integers(0, 2**64, size=2000, dtype=np.uint64)
    lo, hi = est.percentile_interval(est.estimands()["ips"], _boot_means(z, keys, 3000, 5), 0.95)
    ref = scipy.stats.bootstrap((w * r,), np.mean, n_resamples=3000, method="percentile",
                                confidence_level=0.95, random_state=1)  # fmt: skip
    assert ref.confidence_interval.low == pytest.approx(lo, abs=0.006)
    assert ref.confidence_interval.high == pytest.approx(hi, abs=0.006)


def test_poisson_counts_follow_the_poisson_1_distribution():
    """Counts of 200 replicates x 5000 records against scipy.stats.poisson(1): chi-square."""
    keys = np.arange(5000, dtype=np.uint64) * np.uint64(7919)
    counts = est.poisson_counts(keys, 0, 200, seed=3).astype(int).ravel()
    observed = np.bincount(counts, minlength=6)[:6].astype(float)
    observed[5] += (counts > 5).sum()
    expected = scipy.stats.poisson(1.0).pmf(np.arange(6)) * counts.size
    expected[5] = scipy.stats.poisson(1.0).sf(4) * counts.size
    assert scipy.stats.chisquare(observed, expected).pvalue > 0.001  # alarm level: common practice
    assert 1.0 == pytest.approx(counts.mean(), abs=0.01)


@given(cuts=chunk_cuts(40))
@settings(max_examples=30, deadline=None)
def test_bootstrap_sums_of_chunks_add_up_to_the_whole(cuts):
    """Counts depend on each record's key only, so any chunking gives the same resamples."""
    rng = np.random.default_rng(0)
    z = rng.random((40, 3))
    keys = rng.integers(0, 2**64, size=40, dtype=np.uint64)
    whole, n = est.bootstrap_sums(z, keys, 25, seed=9)
    bounds = zip([0, *cuts], [*cuts, 40], strict=True)
    parts = [est.bootstrap_sums(z[a:b], keys[a:b], 25, seed=9) for a, b in bounds]
    np.testing.assert_allclose(whole, sum(p[0] for p in parts), rtol=1e-12)
    assert np.array_equal(n, sum(p[1] for p in parts))


def test_bootstrap_is_seeded_and_paired():
    z = np.hstack([est.policy_columns([1.0, 2.0, 0.5, 3.0], [1.0, 0.0, 1.0, 1.0], cap=10.0)] * 2)
    keys = np.array([11, 12, 13, 14], dtype=np.uint64)
    a = _boot_means(z, keys, 50, 3)
    assert np.array_equal(a, _boot_means(z, keys, 50, 3), equal_nan=True)
    assert not np.array_equal(a, _boot_means(z, keys, 50, 4), equal_nan=True)
    # The same policy on both sides: every resample gives a difference of exactly 0.
    diff = est.summarize(est.Moments.of(z), reward_range=(0.0, 1.0), interval="bootstrap",
                         boot=a, baseline=est.WIDTH, names=("snips",))["snips"]  # fmt: skip
    assert (0.0, 0.0, 0.0) == (diff["value"], diff["low"], diff["high"])


def test_a_seeded_bootstrap_interval_keyed_by_decision_ids_is_pinned():
    """IPS and SNIPS percentile intervals, seed 7, 200 resamples, 12 fixed records keyed by
    their decision ids as an estimate keys them (blake2b, replay/_keys.py).

    The literal values were produced by this implementation: they pin its stability (a change
    of the id keys, the counts or the quantiles shows here), not its correctness.
    """
    ids = [f"order-{i}" for i in range(12)]
    w = [0.5, 2.0, 1.0, 0.0, 3.0, 1.5, 0.8, 1.2, 2.5, 0.4, 1.0, 0.6]
    r = [1.0, 0.0, 1.0, 1.0, 0.0, 1.0, 0.0, 1.0, 1.0, 0.0, 1.0, 0.0]
    boot = _boot_means(est.policy_columns(w, r, cap=10.0), id_keys(ids, est.ID_KEY), 200, 7)
    ips = est.percentile_interval(est.estimands()["ips"], boot, 0.95)
    snips = est.percentile_interval(est.estimands()["snips"], boot, 0.95)
    assert (0.181439393939394, 1.050096153846154) == pytest.approx(ips, rel=1e-12)
    assert (0.19128787878787898, 0.8868021680216807) == pytest.approx(snips, rel=1e-12)


def test_paired_difference_of_a_policy_with_itself_is_exactly_zero_with_zero_width():
    z = est.policy_columns(HAND_W, HAND_R, cap=10.0)
    m = est.Moments.of(np.hstack([z, z]))
    out = est.summarize(m, reward_range=(0.0, 1.0), baseline=est.WIDTH)
    for name in ("ips", "snips", "clipped", "dr"):
        assert 0.0 == out[name]["value"]
        assert out[name]["low"] == out[name]["high"] == 0.0


@settings(max_examples=40, deadline=None)
@given(data=st.data(), sample=weighted_rewards())
def test_chunked_moments_give_the_single_pass_estimates(data, sample):
    """Per-chunk moments combined in any partition match one pass to 1e-9 (the Dask plan)."""
    w, r = sample
    z = est.policy_columns(w, r, cap=5.0)
    cuts = data.draw(chunk_cuts(len(w)))
    parts = [est.Moments.of(z[a:b]) for a, b in zip([0, *cuts], [*cuts, len(w)], strict=True)]
    whole, combined = est.Moments.of(z), est.Moments.combine(parts)
    assert whole.n == combined.n
    np.testing.assert_allclose(combined.mean, whole.mean, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(combined.m2, whole.m2, rtol=1e-9, atol=1e-9)
    # Values and variances agree to 1e-9 (interval ends are value -/+ z sqrt(variance): where
    # the variance is 0 up to rounding, its square root magnifies 1e-17 into 1e-9).
    for e in est.estimands().values():
        assert float(e.value(whole.mean)) == pytest.approx(float(e.value(combined.mean)),
                                                           rel=1e-9, abs=1e-12)  # fmt: skip
        assert est.delta_variance(e, whole) == pytest.approx(est.delta_variance(e, combined),
                                                             rel=1e-9, abs=1e-12)  # fmt: skip


@settings(max_examples=60, deadline=None)
@given(sample=weighted_rewards())
def test_snips_lies_within_the_rewards_and_ess_within_one_and_n(sample):
    w, r = sample
    m = _moments(w, r)
    snips = float(est.estimands()["snips"].value(m.mean))
    kept = [ri for wi, ri in zip(w, r, strict=True) if wi > 0]
    assert min(kept) - 1e-12 <= snips <= max(kept) + 1e-12
    assert 1.0 - 1e-9 <= est.kish_ess(m) <= len(w) + 1e-9


def test_ridge_reward_model_matches_scikit_learn_ridge():
    """One fold, one action: ridge on [1, x] for the centred reward, as sklearn's Ridge
    without intercept (every coefficient penalized) computes it."""
    rng = np.random.default_rng(0)
    x = rng.normal(size=(300, 4))
    r = x @ [0.5, -1.0, 0.0, 2.0] + 0.3 + rng.normal(scale=0.1, size=300)
    zeros = np.zeros(300, dtype=int)
    model = RidgeStats.of(x, zeros, r, zeros, folds=1, actions=1).fit(ridge=3.0)
    phi = np.hstack([np.ones((300, 1)), x])
    ref = Ridge(alpha=3.0, fit_intercept=False).fit(phi, r - r.mean())
    np.testing.assert_allclose(model.coef[0, 0], ref.coef_, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(model.predict(x, zeros)[:, 0], ref.predict(phi) + r.mean(),
                               rtol=1e-9)  # fmt: skip


def test_cross_fitting_predicts_each_fold_from_the_others_and_stats_combine():
    rng = np.random.default_rng(1)
    x = rng.normal(size=(400, 2))
    a = rng.integers(0, 3, 400)
    r = rng.random(400)
    fold = np.arange(400) % 2
    whole = RidgeStats.of(x, a, r, fold, folds=2, actions=4)
    halves = RidgeStats.of(x[:150], a[:150], r[:150], fold[:150], folds=2, actions=4) + \
        RidgeStats.of(x[150:], a[150:], r[150:], fold[150:], folds=2, actions=4)  # fmt: skip
    np.testing.assert_allclose(halves.gram, whole.gram, rtol=1e-12)
    model = whole.fit()
    # Fold 0 is predicted by a model that never saw fold 0: refitting without it agrees.
    only1 = RidgeStats.of(x[fold == 1], a[fold == 1], r[fold == 1], np.zeros(200, int),
                              folds=1, actions=4).fit()  # fmt: skip
    zeros = np.zeros(200, int)
    np.testing.assert_allclose(model.predict(x[fold == 0], zeros),
                               only1.predict(x[fold == 0], zeros), rtol=1e-10)  # fmt: skip
    # Action 3 was never logged: it predicts the training mean.
    assert r[fold == 1].mean() == pytest.approx(model.predict(x[:1], [0])[0, 3])


def test_dr_terms_worked_by_hand():
    """Dudik, Langford & Li (2011): sum_a pi(a) q(a) + w (r - q(a_logged)).

    q = (0.2, 0.6), pi = (0.5, 0.5), logged action 1 with w = 2 and r = 1:
    0.5 * 0.2 + 0.5 * 0.6 + 2 * (1 - 0.6) = 1.2 (worked by hand).
    """
    d = dr_terms([[0.2, 0.6]], [[0.5, 0.5]], [1], [2.0], [1.0])
    assert [1.2] == pytest.approx(d.tolist())
    clipped = dr_terms([[-0.5, 1.5]], [[0.5, 0.5]], [1], [2.0], [1.0], (0.0, 1.0))
    assert [0.5 + 2 * 0.0] == pytest.approx(clipped.tolist())


def test_weight_quantiles_are_numpy_quantiles():
    w = np.arange(1001, dtype=float)
    q = est.weight_quantiles(w)
    assert {"0.5": 500.0, "0.9": 900.0, "0.99": 990.0, "0.999": 999.0} == q
    assert {} == est.weight_quantiles([])


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: est.policy_columns([1.0, -1.0], [1.0, 1.0], cap=10.0), "weights must be >= 0"),
        (lambda: est.policy_columns([1.0, math.nan], [1.0, 1.0], cap=10.0), "NaN"),
        (lambda: est.policy_columns([1.0], [1.0, 1.0], cap=10.0), "one length"),
        (lambda: est.policy_columns([1.0], [1.0], cap=0.0), "cap must be > 0"),
        (lambda: est.policy_columns([1.0], [math.inf], cap=1.0), "rewards contains NaN"),
        (lambda: est.policy_columns([1.0], [1.0], cap=1.0, dr=[1.0, 2.0]), "one entry per"),
        (lambda: est.Moments.of([1.0, 2.0]), "2-d"),
        (lambda: est.Moments.of(np.ones((2, 2))) + est.Moments.of(np.ones((2, 3))), "different"),
        (lambda: est.Moments.combine([]), "nothing to combine"),
        (lambda: est.summarize(est.Moments.empty(5), reward_range=(0, 1)), "no records"),
        (lambda: est.summarize(_moments([1.0], [1.0]), reward_range=(0, 1), level=1.5), "level"),
        (lambda: est.summarize(_moments([1.0], [1.0]), reward_range=(0, 1), interval="x"),
         "unknown interval"),
        (lambda: est.summarize(_moments([1.0], [1.0]), reward_range=(0, 1),
                               interval="bootstrap"), "resamples"),
        (lambda: est.summarize(_moments([1.0], [1.0]), reward_range=(0, 1),
                               interval="bernstein"), "ranges"),
        (lambda: est.bootstrap_sums(np.ones((3, 2)), np.zeros(3, np.uint64), 0), "at least one"),
        (lambda: est.support_deficit([[0.5, 0.5]], [[1.0]]), "same shape"),
        (lambda: RidgeStats.of([[1.0]], [0], [1.0], [0], folds=1, actions=1).fit(0.0),
         "ridge penalty"),
        (lambda: RidgeStats.of([[1.0]], [3], [1.0], [0], folds=1, actions=2), "range"),
        (lambda: RidgeStats.of([1.0], [0], [1.0], [0], folds=1, actions=1), "2-d"),
        (lambda: RidgeStats.of([[1.0]], [0, 1], [1.0], [0], folds=1, actions=2), "one row"),
    ],
)  # fmt: skip
def test_bad_inputs_raise_a_replay_error_naming_the_problem(call, message):
    with pytest.raises(ReplayError, match=message):
        call()


def test_moments_of_a_long_matrix_match_numpy_mean_and_covariance():
    """Blocked reduction (rows beyond one block) against numpy.cov with divisor n."""
    z = np.random.default_rng(5).normal(size=(300_000, 3)) + np.array([1e3, 0.0, -5.0])
    m = est.Moments.of(z)
    assert 300_000 == m.n
    np.testing.assert_allclose(m.mean, z.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(m.cov, np.cov(z, rowvar=False, bias=True), rtol=1e-9)
    assert z.min(axis=0).tolist() == m.low.tolist()
    assert z.max(axis=0).tolist() == m.high.tolist()
