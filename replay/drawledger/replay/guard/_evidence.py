"""Evidence that stays valid under continuous looking, and the windowed drift view.

The guard looks at a ledger after every piece it takes in. A fixed-n test re-run after every
piece would raise false alarms far more often than its level says (the more looks, the more
alarms). The guard's alarms come instead from mixture likelihood ratios, nonnegative
martingales under the declaration whose running value is an e-value: by Ville's inequality
(Ville 1939, "Etude critique de la notion de collectif", the maximal inequality for
nonnegative supermartingales), P(sup_t E_t >= 1/alpha) <= alpha, however often and however
long one looks, and whenever one stops.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]

# Concentration c of the Dirichlet mixture Dir(c * p0) over the cell probabilities. The prior
# spreads the alternatives around the declaration p0 with standard deviation about
# sqrt(p0 (1 - p0) / c): c = 100 puts the most weight on shifts of about 0.05 in a share near
# one half (0.5 -> 0.55), the drift the guard is meant to catch. A design choice of this
# project, not taken from a source; larger shifts are still found, a little later.
CONCENTRATION = 100.0

# Bins of the uniforms' and PIT values' martingales: 10 equal bins on [0, 1], 0.1 each.
UNIFORM_BINS = 10

# Each watched draw has two e-processes (its assignment and its uniforms); the guard splits
# alpha between them (Bonferroni), so a draw alarms falsely with probability at most alpha.
PROCESSES_PER_DRAW = 2

# The false-alarm probability per watched draw over the whole run (common practice for
# monitoring alarms; no single published source).
ALPHA = 0.01

# Cochran's rule of thumb for the window's chi-square: every expected count at least 5
# (common practice).
MIN_EXPECTED = 5.0


def log_mixture_e(
    counts: Sequence[float] | FloatArray,
    declared: Sequence[float] | FloatArray,
    concentration: float = CONCENTRATION,
) -> float:
    """The log e-value of multinomial ``counts`` against the ``declared`` cell probabilities.

    The mixture likelihood ratio of the Dirichlet-multinomial Dir(c * p0) against the
    multinomial p0 (Robbins 1970, "Statistical methods related to the law of the iterated
    logarithm", Ann. Math. Statist. 41, the method of mixtures; for multinomial counts with a
    Dirichlet mixture, Lindon & Malek 2022, "Anytime-valid inference for multinomial count
    data", NeurIPS, Section 3 (section number recalled from memory)):

        log E_n = log G(A) - log G(A + n) + sum_j [log G(a_j + n_j) - log G(a_j)]
                  - sum_j n_j log p0_j,     a_j = c p0_j, A = c, n = sum_j n_j.

    Under the declaration E_n is a nonnegative martingale with E_0 = 1. It depends on the
    counts alone (the Dirichlet-multinomial is exchangeable), so pieces may be taken in any
    size. Cells declared impossible must have no count (the caller checks it: a pick of an
    impossible option is a consistency failure, not evidence).
    """
    from scipy import special

    n = np.asarray(counts, dtype=np.float64)
    p0 = np.asarray(declared, dtype=np.float64)
    live = p0 > 0.0
    n, p0 = n[live], p0[live] / p0[live].sum()
    total = float(n.sum())
    if total == 0.0:
        return 0.0
    a = concentration * p0
    log_e = (
        special.gammaln(concentration)
        - special.gammaln(concentration + total)
        + float(np.sum(special.gammaln(a + n) - special.gammaln(a)))
        - float(np.sum(n * np.log(p0)))
    )
    return float(log_e)


def threshold(alpha: float) -> float:
    """The log e-value at which one of a draw's processes alarms: log(2 / alpha)."""
    return math.log(PROCESSES_PER_DRAW / alpha)


def coarsen_uniform(hist20: Sequence[int] | npt.NDArray[np.int64]) -> list[int]:
    """A 20-bin histogram on [0, 1] (the audit's) merged into UNIFORM_BINS equal bins."""
    h = np.asarray(hist20, dtype=np.int64)
    return [int(x) for x in h.reshape(UNIFORM_BINS, -1).sum(axis=1)]


def window_test(counts: Sequence[float], declared: Sequence[float]) -> float | None:
    """The p-value of Pearson's chi-square of window ``counts`` against ``declared`` shares
    (what scipy.stats.chisquare computes), or None when an expected count is below
    MIN_EXPECTED.

    A fixed-n test on the last decisions: information about drift, not an anytime-valid alarm
    (looked at after every piece, its false-alarm rate is far above its level). The tail comes
    from ``scipy.special.chdtrc``: importing ``scipy.stats`` would cost a ``--once`` guard
    more than its look at a small ledger.
    """
    from scipy import special

    n = np.asarray(counts, dtype=np.float64)
    p0 = np.asarray(declared, dtype=np.float64)
    live = p0 > 0.0
    n, p0 = n[live], p0[live] / p0[live].sum()
    expected = n.sum() * p0
    if len(n) < 2 or float(expected.min()) < MIN_EXPECTED:
        return None
    statistic = float(np.sum((n - expected) ** 2 / expected))
    return float(special.chdtrc(len(n) - 1, statistic))
