"""Statistical building blocks of the randomization audit (docs/audit.md).

Each function works on plain numpy arrays, so the tests can hold it against scipy.stats on the
same arrays. Thresholds that are common practice rather than a published rule say so.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]

# Cochran's rule of thumb for chi-square tests: every expected cell count at least 5
# (common practice).
MIN_EXPECTED = 5.0
# Histogram resolution of uniforms and PIT values: 20 equal bins on [0, 1].
BINS = 20
BIN_EDGES = np.linspace(0.0, 1.0, BINS + 1)
# Coarser binnings for small samples: divisors of BINS, finest first.
_COARSER = (20, 10, 5, 4, 2)


class TestResult(NamedTuple):
    """A statistic with its p-value and degrees of freedom (``df`` is 0 when not a chi-square)."""

    statistic: float
    p_value: float
    df: int = 0


def histogram(values: FloatArray) -> npt.NDArray[np.int64]:
    """Counts of ``values`` (in [0, 1]) in the BINS equal bins; 1.0 falls in the last bin."""
    idx = np.minimum((values * BINS).astype(np.int64), BINS - 1)
    return np.bincount(idx, minlength=BINS).astype(np.int64)


def coarsen(counts: npt.NDArray[np.int64], bins: int) -> npt.NDArray[np.int64]:
    """Merge adjacent bins of a BINS-bin histogram (along the last axis) into ``bins`` bins."""
    shape = (*counts.shape[:-1], bins, BINS // bins)
    return counts.reshape(shape).sum(axis=-1)


def binned_uniformity(counts: npt.NDArray[np.int64]) -> TestResult | None:
    """Pearson chi-square of a BINS-bin histogram against equal shares, None if too few values.

    Uses the finest binning (20, 10, 5, 4 or 2 bins) whose expected count per bin is at least
    MIN_EXPECTED.
    """
    from scipy import stats

    n = int(counts.sum())
    for bins in _COARSER:
        if n / bins >= MIN_EXPECTED:
            merged = coarsen(counts, bins)
            res = stats.chisquare(merged)
            return TestResult(float(res.statistic), float(res.pvalue), bins - 1)
    return None


def pool_cells(expected: FloatArray) -> list[list[int]]:
    """Group cells so that every group's expected count is at least MIN_EXPECTED.

    Cells with a positive expected count below the threshold are pooled into one group; if that
    group is still too small it joins the smallest adequate cell. Cells with expected count 0
    are left out. Returns [] when fewer than two groups remain.
    """
    positive = [j for j in range(len(expected)) if expected[j] > 0.0]
    big = [[j] for j in positive if expected[j] >= MIN_EXPECTED]
    small = [j for j in positive if expected[j] < MIN_EXPECTED]
    if small:
        if sum(expected[j] for j in small) >= MIN_EXPECTED:
            big.append(small)
        elif big:
            smallest = min(range(len(big)), key=lambda g: sum(expected[j] for j in big[g]))
            big[smallest] = sorted(big[smallest] + small)
    return big if len(big) >= 2 else []


def grouping_matrix(groups: list[list[int]], cells: int) -> FloatArray:
    """A (groups x cells) 0/1 matrix that sums cells into their groups."""
    a = np.zeros((len(groups), cells))
    for g, members in enumerate(groups):
        a[g, members] = 1.0
    return a


def pearson(observed: FloatArray, expected: FloatArray) -> TestResult:
    """Pearson chi-square goodness of fit (scipy.stats.chisquare), df = cells - 1."""
    from scipy import stats

    res = stats.chisquare(observed, expected)
    return TestResult(float(res.statistic), float(res.pvalue), len(observed) - 1)


def quadratic_chisq(diff: FloatArray, cov: FloatArray) -> TestResult | None:
    """diff' cov^+ diff with df = rank(cov): the chi-square of counts with covariance ``cov``.

    For counts of categorical picks with varying declared probabilities p_i, diff = O - sum p_i
    and cov = sum_i (diag(p_i) - p_i p_i'), whose diagonal holds the Poisson-binomial variances
    sum_i p_ij (1 - p_ij). With the same p for every pick this is exactly Pearson's statistic.
    """
    from scipy import stats

    values, vectors = np.linalg.eigh(cov)
    keep = values > 1e-9 * max(float(values.max(initial=0.0)), 1e-300)
    df = int(keep.sum())
    if df == 0:
        return None
    proj = vectors[:, keep].T @ diff
    stat = float(np.sum(proj * proj / values[keep]))
    return TestResult(stat, float(stats.chi2.sf(stat, df)), df)


def holm(p_values: list[float]) -> list[float]:
    """Holm's step-down adjusted p-values (Holm 1979), in the order given."""
    m = len(p_values)
    order = sorted(range(m), key=lambda i: p_values[i])
    adjusted = [0.0] * m
    running = 0.0
    for rank, i in enumerate(order):
        running = max(running, min(1.0, (m - rank) * p_values[i]))
        adjusted[i] = running
    return adjusted


def repeats(values: int, distinct: int, cells: float) -> TestResult:
    """Are ``values`` draws showing more repeats than independent draws from ``cells`` equally
    likely values would?

    The statistic is the number of repeats (values - distinct). For independent draws the number
    of coinciding pairs is approximately Poisson with mean C(values, 2) / cells (the birthday
    problem); the p-value is the Poisson upper tail at the observed number of repeats.
    """
    from scipy import stats

    r = values - distinct
    lam = values * (values - 1) / 2.0 / cells
    p = 1.0 if r <= 0 else float(stats.poisson.sf(r - 1, lam))
    return TestResult(float(r), p)


def resolution(u: FloatArray) -> float:
    """How many equally likely values the recorded uniforms can take (at most 2**53).

    Uniforms that are all multiples of 2**-b (b < 53, e.g. from single precision) can take
    2**b values; uniforms written with d decimal digits can take 10**d values.
    """
    if len(u) == 0:
        return 2.0**53
    head = u[:1000]
    cells = 2.0**53
    for b in range(1, 53):
        if _all_whole(np.ldexp(head, b)) and _all_whole(np.ldexp(u, b)):
            cells = 2.0**b
            break
    for d in range(1, 16):
        scale = 10.0**d
        if scale >= cells:
            break
        if _decimal(head, scale) and _decimal(u, scale):
            cells = scale
            break
    return cells


def _all_whole(x: FloatArray) -> bool:
    return bool(np.all(x == np.floor(x)))


def _decimal(u: FloatArray, scale: float) -> bool:
    return bool(np.all(np.round(u * scale) / scale == u))


def spearman(x: FloatArray, y: FloatArray) -> TestResult:
    """Spearman's rank correlation and its two-sided p-value (scipy.stats.spearmanr)."""
    from scipy import stats

    res = stats.spearmanr(x, y)
    return TestResult(float(res.statistic), float(res.pvalue))


def ks_uniform(values: FloatArray) -> TestResult:
    """Kolmogorov-Smirnov test against U(0, 1) (scipy.stats.kstest)."""
    from scipy import stats

    res = stats.kstest(values, "uniform")
    return TestResult(float(res.statistic), float(res.pvalue))


_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)


def mix64(x: npt.NDArray[np.uint64]) -> npt.NDArray[np.uint64]:
    """The splitmix64 finalizer: a fixed bijection of 64-bit words that scrambles their bits."""
    with np.errstate(over="ignore"):
        z = x ^ (x >> np.uint64(30))
        z = z * _M1
        z = z ^ (z >> np.uint64(27))
        z = z * _M2
        return z ^ (z >> np.uint64(31))


def to_unit(x: npt.NDArray[np.uint64]) -> FloatArray:
    """64-bit words to doubles in (0, 1): ((x >> 11) + 0.5) * 2**-53, as in the draw spec."""
    return ((x >> np.uint64(11)).astype(np.float64) + 0.5) * 2.0**-53
