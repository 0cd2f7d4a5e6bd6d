"""Off-policy estimators over importance weights (numpy only).

Every estimate is a smooth function of the means of a few per-record columns. For one policy
the columns are (``POLICY_COLUMNS``)::

    w    importance weight  pi(a | x) / mu(a | x) of the logged action
    wr   w * r
    k    clipped weight     w if w < cap else 0        (Bottou et al. 2013)
    kr   k * r
    dr   doubly robust term sum_a pi(a | x) q(x, a) + w (r - q(x, a_logged))

A paired comparison puts the columns of a second policy beside them. A pass over the data
therefore only keeps ``Moments`` (count, means, centred cross-products, extremes) per chunk;
chunks combine with the pairwise update of Chan, Golub & LeVeque (1979), so any partitioning
gives the same result up to float rounding. Point estimates, delta-method variances, Kish's
effective sample size and the empirical Bernstein bound all follow from the combined moments.
The bootstrap is a Poisson bootstrap whose resampling counts follow from each record's id, so
its per-chunk sums combine as well; only the weight quantiles need the weights themselves.

The reward model of the doubly robust estimator (Dudik, Langford & Li 2011) is a ridge
regression per action on standardized features, cross-fitted over folds; its sufficient
statistics (Gram matrices per fold and action) combine across chunks in the same way.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from statistics import NormalDist

import numpy as np
from numpy.typing import ArrayLike, NDArray

from drawledger.exceptions import ReplayError

__all__ = [
    "DR",
    "KR",
    "MAX_WEIGHT_SHARE",
    "MIN_ESS",
    "MIN_ESS_SHARE",
    "POLICY_COLUMNS",
    "WIDTH",
    "WR",
    "Estimand",
    "K",
    "Moments",
    "Term",
    "W",
    "bernstein_halfwidth",
    "bernstein_interval",
    "bootstrap_sums",
    "clt_interval",
    "column_spans",
    "delta_variance",
    "estimands",
    "kish_ess",
    "max_weight_share",
    "overlap_problems",
    "percentile_interval",
    "poisson_counts",
    "policy_columns",
    "summarize",
    "support_deficit",
    "weight_quantiles",
]

Array = NDArray[np.float64]

POLICY_COLUMNS = ("w", "wr", "k", "kr", "dr")
W, WR, K, KR, DR = range(len(POLICY_COLUMNS))
WIDTH = len(POLICY_COLUMNS)
QUANTILES = (0.5, 0.9, 0.99, 0.999)

# Block sizes (memory and speed, not results): bootstrap counts made at once, and rows of a
# record matrix reduced at once by ``Moments.of``.
_COUNT_BLOCK = 1_000_000
_MOMENT_BLOCK = 131_072
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
# P(X <= k) of a Poisson(1) variable for k = 0, 1, ...; beyond k = 18 the rest is below 2^-53.
_POISSON_CDF = np.cumsum([math.exp(-1.0) / math.factorial(k) for k in range(19)])


def as_floats(x: ArrayLike, what: str) -> Array:
    a = np.asarray(x, dtype=np.float64)
    if not np.all(np.isfinite(a)):
        raise ReplayError(f"{what} contains NaN or an infinity")
    return a


def policy_columns(w: ArrayLike, r: ArrayLike, *, cap: float, dr: ArrayLike | None = None) -> Array:
    """The per-record columns of one policy, shape (n, WIDTH); ``dr`` is 0 when not given."""
    wt = as_floats(w, "weights")
    rt = as_floats(r, "rewards")
    if wt.ndim != 1 or wt.shape != rt.shape:
        raise ReplayError(f"weights {wt.shape} and rewards {rt.shape} must be 1-d of one length")
    if np.any(wt < 0.0):
        raise ReplayError("weights must be >= 0 (a probability ratio)")
    if not cap > 0.0:
        raise ReplayError(f"the clipping cap must be > 0, got {cap!r}")
    z = np.empty((wt.size, WIDTH))
    z[:, W] = wt
    np.multiply(wt, rt, out=z[:, WR])
    np.multiply(wt, wt < cap, out=z[:, K])
    np.multiply(z[:, K], rt, out=z[:, KR])
    if dr is None:
        z[:, DR] = 0.0
    else:
        d = as_floats(dr, "doubly robust terms")
        if d.shape != wt.shape:
            raise ReplayError("doubly robust terms must have one entry per record")
        z[:, DR] = d
    return z


@dataclass(frozen=True)
class Moments:
    """Sufficient statistics of the columns of a record matrix, combinable across chunks.

    ``m2`` is the matrix of centred cross-products sum (z - mean)(z - mean)^T; two chunks
    combine by the pairwise update of Chan, Golub & LeVeque (1979).
    """

    n: int
    mean: Array
    m2: Array
    low: Array
    high: Array

    @classmethod
    def empty(cls, width: int) -> Moments:
        return cls(0, np.zeros(width), np.zeros((width, width)),
                   np.full(width, np.inf), np.full(width, -np.inf))  # fmt: skip

    @classmethod
    def of(cls, z: ArrayLike) -> Moments:
        a = np.asarray(z, dtype=np.float64)
        if a.ndim != 2:
            raise ReplayError(f"moments need a 2-d record matrix, got shape {a.shape}")
        if a.shape[0] == 0:
            return cls.empty(a.shape[1])
        if a.shape[0] > _MOMENT_BLOCK:  # blocks that stay in cache, combined pairwise
            return cls.combine(cls.of(a[s : s + _MOMENT_BLOCK])
                               for s in range(0, a.shape[0], _MOMENT_BLOCK))  # fmt: skip
        mean = a.mean(axis=0)
        c = a - mean
        return cls(a.shape[0], mean, c.T @ c, a.min(axis=0), a.max(axis=0))

    def __add__(self, other: Moments) -> Moments:
        if self.mean.shape != other.mean.shape:
            raise ReplayError("cannot combine moments of different column sets")
        if other.n == 0:
            return self
        if self.n == 0:
            return other
        n = self.n + other.n
        delta = other.mean - self.mean
        mean = self.mean + delta * (other.n / n)
        m2 = self.m2 + other.m2 + np.outer(delta, delta) * (self.n * other.n / n)
        return Moments(n, mean, m2, np.minimum(self.low, other.low),
                       np.maximum(self.high, other.high))  # fmt: skip

    @staticmethod
    def combine(parts: Iterable[Moments]) -> Moments:
        """The moments of the union of the chunks (pairwise, so rounding stays balanced)."""
        items = list(parts)
        if not items:
            raise ReplayError("nothing to combine")
        while len(items) > 1:
            items = [items[i] + items[i + 1] if i + 1 < len(items) else items[i]
                     for i in range(0, len(items), 2)]  # fmt: skip
        return items[0]

    @property
    def cov(self) -> Array:
        """Covariance matrix with divisor n (the plug-in estimate used by the delta method)."""
        return self.m2 / self.n


# -- estimands: smooth functions of the column means ---------------------------------------
@dataclass(frozen=True)
class Term:
    """sign * mean[num] / mean[den] (or sign * mean[num] when den is None)."""

    sign: float
    num: int
    den: int | None = None


@dataclass(frozen=True)
class Estimand:
    """A sum of terms; a paired difference is the terms of one policy minus the other's."""

    terms: tuple[Term, ...]

    def value(self, mean: Array) -> Array:
        """Value at column means of shape (..., k); vectorized over leading axes."""
        out = np.zeros(mean.shape[:-1])
        for t in self.terms:
            top = mean[..., t.num]
            if t.den is None:
                out = out + t.sign * top
            else:
                with np.errstate(divide="ignore", invalid="ignore"):
                    out = out + t.sign * top / mean[..., t.den]
        return out

    def grad(self, mean: Array) -> Array:
        g = np.zeros(mean.shape[-1])
        for t in self.terms:
            if t.den is None:
                g[t.num] += t.sign
            else:
                d = mean[t.den]
                g[t.num] += t.sign / d
                g[t.den] -= t.sign * mean[t.num] / (d * d)
        return g

    def minus(self, other: Estimand) -> Estimand:
        return Estimand(self.terms + tuple(Term(-t.sign, t.num, t.den) for t in other.terms))


def estimands(offset: int = 0) -> dict[str, Estimand]:
    """IPS, SNIPS, clipped IPS and DR of the policy whose columns start at ``offset``."""
    return {
        "ips": Estimand((Term(1.0, offset + WR),)),
        "snips": Estimand((Term(1.0, offset + WR, offset + W),)),
        "clipped": Estimand((Term(1.0, offset + KR),)),
        "dr": Estimand((Term(1.0, offset + DR),)),
    }


def delta_variance(est: Estimand, m: Moments) -> float:
    """grad^T Cov grad / n: the CLT variance of a mean, the delta method for a ratio."""
    g = est.grad(m.mean)
    return float(g @ m.cov @ g) / m.n


def _z(level: float) -> float:
    return NormalDist().inv_cdf(0.5 + level / 2.0)


def clt_interval(est: Estimand, m: Moments, level: float = 0.95) -> tuple[float, float]:
    v = float(est.value(m.mean))
    half = _z(level) * math.sqrt(max(delta_variance(est, m), 0.0))
    return v - half, v + half


def _mix(x: NDArray[np.uint64]) -> NDArray[np.uint64]:
    """The 64-bit finalizer of SplitMix64 (Steele, Lea & Flood 2014), a bijective mix."""
    with np.errstate(over="ignore"):
        x = (x ^ (x >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        x = (x ^ (x >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return x ^ (x >> np.uint64(31))


# The blake2b key of decision ids (drawledger.replay._keys): their bootstrap counts and folds.
ID_KEY = b"drawledger.estimate"


def poisson_counts(keys: ArrayLike, start: int, stop: int, seed: int = 0) -> Array:
    """Poisson(1) resampling counts of replicates ``start..stop-1``, shape (stop - start, n).

    The count of a record in a replicate is a function of its 64-bit ``keys`` entry (the
    blake2b key of the decision id, replay._keys), the replicate number and ``seed`` alone:
    any chunking or partitioning of the records gives the same resamples, so per-chunk sums
    combine exactly. A uniform from the mixed bits goes through the inverse Poisson(1)
    distribution function.
    """
    k = np.asarray(keys, dtype=np.uint64)
    with np.errstate(over="ignore"):
        base = _mix(np.array([seed % 2**64], dtype=np.uint64))
        rep = _mix(base + np.arange(start, stop, dtype=np.uint64) * _GOLDEN)
        x = _mix(k[None, :] ^ rep[:, None])
    u = (x >> np.uint64(11)).astype(np.float64) * 2.0**-53
    return np.searchsorted(_POISSON_CDF, u, side="right").astype(np.float64)


def bootstrap_sums(z: ArrayLike, keys: ArrayLike, b: int, seed: int = 0) -> tuple[Array, Array]:
    """Column sums of the rows of ``z`` and the row count in ``b`` Poisson bootstrap replicates.

    The Poisson bootstrap (Hanley & MacGibbon 2006) weights each record by an independent
    Poisson(1) count instead of drawing n records with replacement; the replicate mean of a
    column is its sum over the count. Shapes (b, k) and (b,); sums of chunks add up.
    """
    a = np.asarray(z, dtype=np.float64)
    if b < 1:
        raise ReplayError(f"the bootstrap needs at least one resample, got B={b}")
    sums = np.zeros((b, a.shape[1]))
    counts = np.zeros(b)
    if a.shape[0] == 0:
        return sums, counts
    block = max(1, _COUNT_BLOCK // a.shape[0])
    for s in range(0, b, block):
        e = min(s + block, b)
        c = poisson_counts(keys, s, e, seed)
        sums[s:e] = c @ a
        counts[s:e] = c.sum(axis=1)
    return sums, counts


def percentile_interval(est: Estimand, boot: Array, level: float = 0.95) -> tuple[float, float]:
    values = est.value(boot)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return math.nan, math.nan
    lo, hi = np.quantile(values, [0.5 - level / 2.0, 0.5 + level / 2.0])
    return float(lo), float(hi)


def bernstein_halfwidth(var: float, n: int, span: float, delta: float) -> float:
    """Two-sided empirical Bernstein half-width for a mean of n values in a range of ``span``.

    Maurer & Pontil (2009), Theorem 4, with ln(2/delta) replaced by ln(4/delta) for the two
    sides: sqrt(2 V ln(4/delta) / n) + 7 span ln(4/delta) / (3 (n - 1)), V the sample variance.
    """
    if n < 2:
        return math.inf
    log = math.log(4.0 / delta)
    return math.sqrt(2.0 * max(var, 0.0) * log / n) + 7.0 * span * log / (3.0 * (n - 1))


def _bernstein_mean(coef: Array, m: Moments, spans: Array, delta: float) -> tuple[float, float]:
    mean = float(coef @ m.mean)
    var = float(coef @ m.m2 @ coef) / (m.n - 1) if m.n > 1 else 0.0
    half = bernstein_halfwidth(var, m.n, float(np.abs(coef) @ spans), delta)
    return mean - half, mean + half


def bernstein_interval(
    est: Estimand, m: Moments, spans: ArrayLike, level: float = 0.95
) -> tuple[float, float]:
    """Empirical Bernstein interval holding with probability >= level (union bound).

    Linear estimands are bounded as one mean; a ratio term bounds its numerator and
    denominator separately and divides the bounds (needs a positive lower denominator).
    """
    s = np.asarray(spans, dtype=np.float64)
    width = m.mean.size
    delta = 1.0 - level
    if all(t.den is None for t in est.terms):
        coef = np.zeros(width)
        for t in est.terms:
            coef[t.num] += t.sign
        return _bernstein_mean(coef, m, s, delta)
    share = delta / len(est.terms)
    low = high = 0.0
    for t in est.terms:
        top = np.zeros(width)
        top[t.num] = 1.0
        if t.den is None:
            lo, hi = _bernstein_mean(top, m, s, share)
        else:
            bottom = np.zeros(width)
            bottom[t.den] = 1.0
            a_lo, a_hi = _bernstein_mean(top, m, s, share / 2.0)
            b_lo, b_hi = _bernstein_mean(bottom, m, s, share / 2.0)
            if not b_lo > 0.0:
                return -math.inf, math.inf
            corners = (a_lo / b_lo, a_lo / b_hi, a_hi / b_lo, a_hi / b_hi)
            lo, hi = min(corners), max(corners)
        if t.sign > 0:
            low, high = low + lo, high + hi
        else:
            low, high = low - hi, high - lo
    return low, high


def column_spans(weight_bound: float, cap: float, reward_range: tuple[float, float]) -> Array:
    """Ranges of the policy columns for the Bernstein bound, given the largest weight."""
    lo, hi = reward_range
    reach = max(hi, 0.0) - min(lo, 0.0)
    kept = min(cap, weight_bound)
    return np.array([
        weight_bound, weight_bound * reach, kept, kept * reach,
        (hi - lo) * (1.0 + 2.0 * weight_bound),
    ])  # fmt: skip


# -- diagnostics ------------------------------------------------------------------------------
# When the weights are too uneven to read an estimate as is (docs/estimators.md): thresholds
# are common practice, no published value. Kish's ESS (Kish 1965) below MIN_ESS records or
# below MIN_ESS_SHARE of the records; or the largest weight above MAX_WEIGHT_SHARE of the sum
# of the weights, the diagnostic max w / sum w of Chatterjee & Diaconis (2018, "The sample
# size required in importance sampling", Ann. Appl. Probab. 28; recalled from memory).
MIN_ESS = 100.0
MIN_ESS_SHARE = 0.1
MAX_WEIGHT_SHARE = 0.01


def max_weight_share(m: Moments, column: int = W) -> float | None:
    """The largest weight's share of the sum of the weights (None when they sum to 0)."""
    total = float(m.mean[column]) * m.n
    return float(m.high[column]) / total if total > 0.0 else None


def overlap_problems(ess: float, n: int, max_share: float | None) -> list[str]:
    """Why the weights are too uneven for the estimate to be read as is (empty: they are not).

    The one rule of estimate, sweep and the report's badges."""
    out = []
    if ess < MIN_ESS:
        out.append(f"effective sample size {ess:.1f} of {n} records is below {MIN_ESS:g}")
    elif ess < MIN_ESS_SHARE * n:
        out.append(f"effective sample size {ess:.1f} is {100 * ess / n:.3g}% of the {n} "
                   f"records (below {MIN_ESS_SHARE:.0%})")  # fmt: skip
    if max_share is not None and max_share > MAX_WEIGHT_SHARE:
        out.append(f"the largest weight carries {max_share:.1%} of the sum of the weights "
                   f"(above {MAX_WEIGHT_SHARE:.0%})")  # fmt: skip
    return out


def kish_ess(m: Moments, column: int = W) -> float:
    """Kish's effective sample size (sum w)^2 / sum w^2, from the moments of the weights."""
    scale = float(m.high[column])  # in units of the largest weight: no underflow when squared
    if not scale > 0.0:
        return 0.0
    mu = float(m.mean[column]) / scale
    second = float(m.cov[column, column]) / scale / scale + mu * mu
    return m.n * mu * mu / second if second > 0.0 else 0.0


def weight_quantiles(w: ArrayLike) -> dict[str, float]:
    a = np.asarray(w, dtype=np.float64)
    if a.size == 0:
        return {}
    return {str(q): float(v) for q, v in zip(QUANTILES, np.quantile(a, QUANTILES), strict=True)}


def support_deficit(target: ArrayLike, logging: ArrayLike) -> Array:
    """Per record, the target's probability on actions the logging policy could not take.

    Both arguments are (n, actions) probability matrices over a common action index.
    """
    t = as_floats(target, "target probabilities")
    lg = as_floats(logging, "logging probabilities")
    if t.shape != lg.shape:
        raise ReplayError("target and logging probabilities must have the same shape")
    return np.where(lg > 0.0, 0.0, t).sum(axis=1)


# -- the summary of one policy or of a paired difference ------------------------------------
def _clean(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _interval(
    est: Estimand, m: Moments, interval: str, level: float, boot: Array | None,
    spans: Sequence[float] | Array | None,
) -> tuple[float, float]:  # fmt: skip
    if interval == "clt":
        return clt_interval(est, m, level)
    if interval == "bootstrap":
        if boot is None:
            raise ReplayError("the bootstrap interval needs bootstrap resamples")
        return percentile_interval(est, boot, level)
    if interval == "bernstein":
        if spans is None:
            raise ReplayError("the Bernstein interval needs the ranges of the columns")
        return bernstein_interval(est, m, spans, level)
    raise ReplayError(f"unknown interval {interval!r}; use clt, bootstrap or bernstein")


def _within(low: float, high: float, box: tuple[float, float]) -> tuple[float, float]:
    """[low, high] intersected with ``box`` (left alone when they do not meet: the interval
    then says the estimate is off, which clipping would hide)."""
    lo, hi = max(low, box[0]), min(high, box[1])
    return (lo, hi) if lo <= hi else (low, high)


def _lost_mass(m: Moments, column: int, interval: str, level: float, boot: Array | None,
               spans: Sequence[float] | Array | None) -> float:  # fmt: skip
    """An upper confidence bound on 1 - W, the target's mass on clipped records, at one-sided
    level (1 + level) / 2: the lower end of W's two-sided interval at ``level``."""
    w_low, _ = _interval(Estimand((Term(1.0, column),)), m, interval, level, boot, spans)
    return min(1.0, max(0.0, 1.0 - w_low)) if math.isfinite(w_low) else 1.0


def summarize(
    m: Moments,
    *,
    reward_range: tuple[float, float],
    level: float = 0.95,
    interval: str = "clt",
    boot: Array | None = None,
    spans: Sequence[float] | Array | None = None,
    offset: int = 0,
    baseline: int | None = None,
    names: Sequence[str] = ("ips", "snips", "clipped", "dr"),
    clip: bool = False,
) -> dict[str, dict[str, float | None]]:
    """Estimates with intervals of the policy at ``offset`` (minus the one at ``baseline``).

    ``interval`` is "clt" (delta method), "bootstrap" (percentiles of ``boot``, replicate
    column means from ``bootstrap_sums``) or "bernstein" (needs ``spans``, see
    ``column_spans``). With ``clip`` the intervals are cut to the values a policy with rewards
    in ``reward_range`` can have (use it only for a range fixed in advance).

    The clipped entry also carries the outer band [outer_low, outer_high] of Bottou et al.
    (2013, JMLR 14, section 4, the outer confidence interval): the target's value is the
    clipped value plus the value of the clipped-away mass 1 - W (W = E[kept weight]), which
    lies in [min(lo, 0) (1 - W), max(hi, 0) (1 - W)] for rewards in [lo, hi]. The band splits
    delta = 1 - level between the clipped value's two-sided interval (at level 1 - delta / 2)
    and a one-sided lower bound W_low on W (delta / 2; for a difference delta / 4 for each
    policy), a union bound; [bias_low, bias_bound] is the bias interval from 1 - W_low.
    """
    if m.n == 0:
        raise ReplayError("no records to estimate from")
    if not 0.0 < level < 1.0:
        raise ReplayError(f"the confidence level must lie in (0, 1), got {level!r}")
    lo_r, hi_r = reward_range
    neg, pos = min(lo_r, 0.0), max(hi_r, 0.0)
    ests = estimands(offset)
    base = estimands(baseline) if baseline is not None else None
    delta = 1.0 - level
    # What the value of a policy (or a difference of two) can be, and a clipped value.
    box = (lo_r, hi_r) if base is None else (lo_r - hi_r, hi_r - lo_r)
    kept_box = (neg, pos) if base is None else (neg - pos, pos - neg)
    out: dict[str, dict[str, float | None]] = {}
    for name in names:
        est = ests[name] if base is None else ests[name].minus(base[name])
        value = float(est.value(m.mean))
        low, high = _interval(est, m, interval, level, boot, spans)
        if clip:
            low, high = _within(low, high, kept_box if name == "clipped" else box)
        entry = {"value": _clean(value), "low": _clean(low), "high": _clean(high)}
        if name == "clipped":
            # Union bound: delta / 2 for the clipped value, delta / 2 for the kept mass(es).
            inner_lo, inner_hi = _interval(est, m, interval, 1.0 - delta / 2.0, boot, spans)
            w_level = 1.0 - delta if base is None else 1.0 - delta / 2.0
            lost = _lost_mass(m, offset + K, interval, w_level, boot, spans)
            b_low, b_high = neg * lost, pos * lost
            if baseline is not None:
                lost_b = _lost_mass(m, baseline + K, interval, w_level, boot, spans)
                b_low, b_high = b_low - pos * lost_b, b_high - neg * lost_b
            outer = (inner_lo + b_low, inner_hi + b_high)
            if clip:
                outer = _within(*outer, box)
            entry["bias_low"] = b_low
            entry["bias_bound"] = b_high
            entry["outer_low"] = _clean(outer[0])
            entry["outer_high"] = _clean(outer[1])
        out[name] = entry
    return out
