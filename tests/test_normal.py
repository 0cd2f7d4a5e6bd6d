"""Wichura's AS241 (PPND16), the inverse normal distribution function of the draw engine."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import special

from drawledger._normal import ppnd16


def log_grid() -> np.ndarray:
    """10^5 probabilities from 1e-300 to 1 - 1e-16: log-spaced towards both tails."""
    lower = np.logspace(-300, math.log10(0.5), 50_000)
    upper = 1.0 - np.logspace(-16, math.log10(0.5), 50_000)
    return np.concatenate([lower, upper])


def relative_errors(p: np.ndarray) -> np.ndarray:
    ours = np.array([ppnd16(float(x)) for x in p])
    ref = special.ndtri(p)
    assert np.all(ours[ref == 0.0] == 0.0)
    nonzero = ref != 0.0
    return np.abs(ours[nonzero] - ref[nonzero]) / np.abs(ref[nonzero])


def test_matches_scipy_ndtri_to_1e15_relative() -> None:
    """Relative difference from scipy.special.ndtri is at most 1e-15 from 1e-300 to 1 - 1e-16.

    Reference: scipy.special.ndtri (Cephes).
    """
    p = log_grid()
    assert p.size >= 100_000
    rel = relative_errors(p)
    assert rel.max() <= 1e-15, f"max relative difference {rel.max():.3g}"


def test_matches_scipy_ndtri_in_the_middle() -> None:
    """On a dense linear grid of (0.001, 0.999) the two differ by at most 1.1e-15 relative.

    Reference: scipy.special.ndtri. Each of the two is within about 5.3e-16 of the exact
    quantile there, sometimes on opposite sides (p = 0.8568349: AS241 +5.2e-16, ndtri
    -5.3e-16 against a 40-digit reference), so their difference can exceed 1e-15.
    """
    rel = relative_errors(np.linspace(0.001, 0.999, 100_001))
    assert rel.max() <= 1.1e-15, f"max relative difference {rel.max():.3g}"


@pytest.mark.parametrize(
    ("p", "z"),
    [
        (0.975, 1.959963984540054),  # scipy.special.ndtri(0.975)
        (0.9, 1.2815515655446004),  # scipy.special.ndtri(0.9)
    ],
)
def test_known_quantiles(p: float, z: float) -> None:
    """The familiar quantiles, to 1e-15 relative (values from scipy.special.ndtri)."""
    assert z == pytest.approx(ppnd16(p), rel=1e-15)


def test_branches_meet_without_a_jump() -> None:
    """Across the branch points |p - 0.5| = 0.425 and r = 5 neighbours differ by < 1e-15.

    (A rational approximation switching branches may step back by an ulp; it must not jump.)
    """
    # r = 5 is crossed at p = exp(-25); near 1 - exp(-25) the doubles are too coarse to tell.
    for p0 in (0.075, 0.925, math.exp(-25.0)):
        xs = [p0]
        for _ in range(200):
            xs.insert(0, math.nextafter(xs[0], 0.0))
            xs.append(math.nextafter(xs[-1], 1.0))
        zs = [ppnd16(x) for x in xs]
        steps = [abs(b - a) / abs(a) for a, b in itertools.pairwise(zs)]
        assert max(steps) < 1e-15


def test_symmetry() -> None:
    """PPND16(p) = -PPND16(1 - p) where 1 - p is exact (p a multiple of 2**-20)."""
    for k in range(1, 2**20, 997):
        p = k * 2.0**-20
        assert ppnd16(p) == pytest.approx(-ppnd16(1.0 - p), rel=1e-15, abs=1e-300)


def test_ends_and_domain() -> None:
    """0 and 1 give the infinities; outside [0, 1] and NaN are refused."""
    assert -math.inf == ppnd16(0.0)
    assert math.inf == ppnd16(1.0)
    for bad in (-1e-300, 1.0000000000000002, math.nan, math.inf):
        with pytest.raises(ValueError, match="0 <= p <= 1"):
            ppnd16(bad)
