"""The one implementation of every draw kind's probability, density and distribution.

``drawledger._probability`` computes what ``Draw`` records and what the replay side recomputes
from recorded arguments. Pinned here: hand-computed worked examples, densities against
scipy.stats, the properties every kind must have (probabilities of all outcomes sum to 1; the
probability a draw records is the probability of its recorded value), the draw methods' own
error messages for bad recorded arguments, and agreement with the audit's vectorized numpy
versions of the same formulas.
"""

from __future__ import annotations

import itertools
import math
from typing import Any

import numpy as np
import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats
from strategies import bucket_shares, junk_draws, seeds, small_slates, valid_draws

from drawledger._probability import (
    CONTINUOUS_KINDS,
    OPTION_KINDS,
    decision_propensity,
    density,
    distribution,
    option_probabilities,
    probability,
)
from drawledger.draw import Draw
from drawledger.exceptions import DrawArgumentError
from drawledger.replay.audit import _declared, _parse

SEED = bytes(range(16))


def recorded(kind: str, args: dict[str, Any], seed: bytes = SEED) -> Any:
    """The record of one draw made with these arguments."""
    draw = Draw(seed)
    getattr(draw, kind)(**args)
    return draw.records[0]


# -- worked examples (hand-computed) ---------------------------------------------------------
def test_softmax_worked_example() -> None:
    """Hand-computed: scores [1, 2, 3] at temperature 1 give e = [e^-2, e^-1, 1], total
    1.50321472..., so p = [0.09003057, 0.24472847, 0.66524096]."""
    args = {"options": ["a", "b", "c"], "scores": [1.0, 2.0, 3.0], "temperature": 1.0}
    options, probs = option_probabilities("softmax", args)
    assert ["a", "b", "c"] == options
    assert [0.0900305731703805, 0.2447284710547977, 0.6652409557748219] == pytest.approx(
        probs, rel=1e-13
    )


def test_softmax_temperature_worked_example() -> None:
    """Hand-computed: scores [0, ln 2] at temperature 0.5 give e = [exp(-2 ln 2), 1] =
    [1/4, 1], total 5/4, so p = [0.2, 0.8]."""
    args = {"options": ["x", "y"], "scores": [0.0, math.log(2.0)], "temperature": 0.5}
    assert [0.2, 0.8] == pytest.approx(option_probabilities("softmax", args)[1], rel=1e-15)


def test_epsilon_greedy_worked_example() -> None:
    """Hand-computed: 4 options, epsilon 0.2, two tied best: explore = 0.2 / 4 = 0.05 and
    best = 0.05 + 0.8 / 2 = 0.45."""
    args = {"options": ["a", "b", "c", "d"], "scores": [0.2, 0.9, 0.9, 0.1], "epsilon": 0.2}
    assert [0.05, 0.45, 0.45, 0.05] == pytest.approx(
        option_probabilities("epsilon_greedy", args)[1], rel=1e-15
    )
    assert 0.45 == pytest.approx(probability("epsilon_greedy", args, "c"), rel=1e-15)
    assert 0.0 == probability("epsilon_greedy", args, "e")


def test_slate_worked_example() -> None:
    """Hand-computed: weights [1, 2, 3, 4], k = 2. [d, c]: 4/10, then 3 of the 6 left = 0.2;
    [a, b]: 1/10 * 2/9 = 1/45; orders that are not two distinct options: 0."""
    args = {"options": ["a", "b", "c", "d"], "weights": [1.0, 2.0, 3.0, 4.0], "k": 2}
    assert 0.2 == pytest.approx(probability("slate", args, ["d", "c"]), rel=1e-15)
    assert 1 / 45 == pytest.approx(probability("slate", args, ["a", "b"]), rel=1e-15)
    assert 0.0 == probability("slate", args, ["a", "a"])
    assert 0.0 == probability("slate", args, ["a"])
    assert 0.0 == probability("slate", args, ["a", "e"])
    assert 0.0 == probability("slate", args, "a")


def test_slate_over_repeated_options_has_no_probability_by_arguments() -> None:
    """Two options with the same JSON: several orders give one slate, so None (enumerate)."""
    args = {"options": ["a", "a", "b"], "weights": [1.0, 1.0, 1.0], "k": 2}
    assert probability("slate", args, ["a", "b"]) is None


def test_integers_bernoulli_and_bucket_worked_examples() -> None:
    """integers [-3, 5): 1/8 for each int inside, 0 outside or for a non-int; bernoulli(0.3):
    0.3 and 1 - 0.3; bucket: the arm's share."""
    ints = {"low": -3, "high": 5}
    assert 0.125 == probability("integers", ints, 0)
    assert 0.125 == probability("integers", ints, -3)
    assert [0.0, 0.0, 0.0] == [probability("integers", ints, v) for v in (5, 1.0, True)]
    assert 0.3 == probability("bernoulli", {"p": 0.3}, True)
    assert 1.0 - 0.3 == probability("bernoulli", {"p": 0.3}, False)
    shares = {"shares": {"control": 0.25, "treatment": 0.75}, "unit": "u", "salt": "s"}
    assert (["control", "treatment"], [0.25, 0.75]) == option_probabilities("bucket", shares)
    assert 0.75 == probability("bucket", shares, "treatment")


def test_values_are_compared_by_their_json() -> None:
    """1, 1.0 and True are three values in the ledger; equal options add up (math.fsum)."""
    args = {"options": [1, 1.0, True, "a", "a"], "probs": [0.1, 0.2, 0.3, 0.15, 0.25]}
    assert [0.1, 0.2, 0.3, 0.4] == [
        probability("categorical", args, v) for v in (1, 1.0, True, "a")
    ]
    assert {"1": 0.1, "1.0": 0.2, "true": 0.3, '"a"': 0.4} == distribution("categorical", args)


def test_repeated_options_add_up_exactly_in_probability_and_in_order_in_distribution() -> None:
    """Ten options "a" of 0.1: probability sums them with math.fsum (exactly 1.0); distribution
    adds them left to right, as the target policies always have (0.9999999999999999)."""
    args = {"options": ["a"] * 10, "probs": [0.1] * 10}
    assert 1.0 == probability("categorical", args, "a")
    assert {'"a"': 0.9999999999999999} == distribution("categorical", args)


def test_distribution_is_none_for_kinds_without_a_list_of_options() -> None:
    """integers and slate do not list their outcomes; continuous kinds have densities."""
    assert distribution("integers", {"low": 0, "high": 3}) is None
    assert distribution("slate", {"options": ["a"], "weights": [1.0], "k": 1}) is None
    assert distribution("normal", {"mean": 0.0, "sd": 1.0}) is None
    assert {"true": 0.3, "false": 1.0 - 0.3} == distribution("bernoulli", {"p": 0.3})


def test_uniform_density_is_zero_outside_its_interval_and_for_non_numbers() -> None:
    args = {"low": 2.0, "high": 6.0}
    assert [0.25, 0.25, 0.25] == [density("uniform", args, x) for x in (2.0, 3, 6.0)]
    assert [0.0, 0.0, 0.0, 0.0] == [density("uniform", args, x) for x in (1.9, 6.1, "3", True)]
    assert 0.0 == density("lognormal", {"mu": 0.0, "sigma": 1.0}, -1.0)


def test_decision_propensity_worked_examples() -> None:
    """No draw: 1, exact; one draw whose value was returned: its prob, exact; otherwise the
    product in draw order: path."""
    assert (1.0, "exact") == decision_propensity([], False, float)
    assert (0.25, "exact") == decision_propensity([0.25], True, float)
    assert (0.25, "path") == decision_propensity([0.25], False, float)
    assert (0.5 * 0.25 * 0.8, "path") == decision_propensity([0.5, 0.25, 0.8], False, float)


# -- densities against scipy.stats -----------------------------------------------------------
@settings(deadline=None)
@given(st.floats(-1e3, 1e3), st.floats(1e-3, 1e3), st.floats(-8.0, 8.0))
def test_normal_density_matches_scipy(mean: float, sd: float, z: float) -> None:
    """scipy.stats.norm.pdf as the outside reference."""
    x = mean + sd * z
    expected = float(stats.norm.pdf(x, loc=mean, scale=sd))
    assert expected == pytest.approx(density("normal", {"mean": mean, "sd": sd}, x), rel=1e-12)


@settings(deadline=None)
@given(st.floats(-5.0, 5.0), st.floats(0.05, 3.0), st.floats(-8.0, 8.0))
def test_lognormal_density_matches_scipy(mu: float, sigma: float, z: float) -> None:
    """scipy.stats.lognorm.pdf (shape s = sigma, scale = exp(mu)) as the outside reference."""
    x = math.exp(mu + sigma * z)
    expected = float(stats.lognorm.pdf(x, s=sigma, scale=math.exp(mu)))
    got = density("lognormal", {"mu": mu, "sigma": sigma}, x)
    assert expected == pytest.approx(got, rel=1e-12)


@settings(deadline=None)
@given(st.floats(-1e6, 1e6), st.floats(1e-3, 1e6), st.floats(-0.5, 1.5))
def test_uniform_density_matches_scipy(low: float, width: float, t: float) -> None:
    """scipy.stats.uniform.pdf (loc = low, scale = high - low) as the outside reference."""
    high = low + width
    x = low + (high - low) * t
    expected = float(stats.uniform.pdf(x, loc=low, scale=high - low))
    assert expected == pytest.approx(density("uniform", {"low": low, "high": high}, x), rel=1e-12)


# -- properties --------------------------------------------------------------------------------
@given(valid_draws().filter(lambda call: call[0] in OPTION_KINDS))
def test_option_probabilities_sum_to_one(call: tuple[str, dict[str, Any]]) -> None:
    kind, args = call
    options, probs = option_probabilities(kind, args)
    assert len(options) == len(probs)
    assert all(p >= 0.0 for p in probs)
    assert 1.0 == pytest.approx(math.fsum(probs), abs=1e-9)
    assert 1.0 == pytest.approx(math.fsum(distribution(kind, args).values()), abs=1e-9)


@given(bucket_shares())
def test_bucket_shares_sum_to_one(shares: dict[str, float]) -> None:
    options, probs = option_probabilities("bucket", {"shares": shares})
    assert list(shares) == options
    assert 1.0 == pytest.approx(math.fsum(probs), abs=1e-9)


@settings(max_examples=50)
@given(small_slates())
def test_slate_probabilities_of_every_ordered_slate_sum_to_one(args: dict[str, Any]) -> None:
    """Summed over every ordered choice of k distinct options (zero weights included)."""
    total = math.fsum(
        probability("slate", args, list(order))
        for order in itertools.permutations(args["options"], args["k"])
    )
    assert 1.0 == pytest.approx(total, abs=1e-12)


@settings(max_examples=300)
@given(valid_draws(), seeds)
def test_recorded_probability_is_the_probability_of_the_recorded_value(
    call: tuple[str, dict[str, Any]], seed: bytes
) -> None:
    """Bit for bit: what Draw records equals _probability's value for the recorded value
    (options are distinct here, so one index path gives the value)."""
    kind, args = call
    rec = recorded(kind, args, seed)
    if kind in CONTINUOUS_KINDS:
        assert rec.prob.hex() == density(kind, rec.args, rec.value).hex()
    else:
        got = probability(kind, rec.args, rec.value)
        assert got is not None
        assert rec.prob.hex() == got.hex()
    dist = distribution(kind, rec.args)
    if dist is not None:
        assert rec.prob == dist[orjson.dumps(rec.value).decode()]


def _recompute(kind: str, args: dict[str, Any], name: str) -> None:
    """Each kind through the function of _probability that reads its recorded arguments."""
    if kind in CONTINUOUS_KINDS:
        density(kind, args, 0.0, name=name)
    elif kind in OPTION_KINDS:
        option_probabilities(kind, args, name=name)
    else:
        probability(kind, args, None, name=name)


@settings(max_examples=400)
@given(junk_draws())
def test_bad_recorded_arguments_raise_the_draw_methods_error(
    call: tuple[str, dict[str, Any]],
) -> None:
    """Arguments a draw method refuses are refused from the record with the same message."""
    kind, args = call
    try:
        getattr(Draw(SEED), kind)(**args, name="nm")
    except DrawArgumentError as exc:
        if "the density at the drawn value" in str(exc):
            return  # refused for the value drawn, not for the arguments: no record holds it
        with pytest.raises(DrawArgumentError) as info:
            _recompute(kind, args, "nm")
        assert str(exc) == str(info.value)


def test_recorded_arguments_must_name_every_parameter() -> None:
    with pytest.raises(DrawArgumentError, match="softmax draw: the arguments lack temperature"):
        option_probabilities("softmax", {"options": ["a"], "scores": [1.0]})
    with pytest.raises(DrawArgumentError, match="coin draw: not a draw kind"):
        probability("coin", {}, True)
    with pytest.raises(DrawArgumentError, match="integers draw: not a continuous draw"):
        density("integers", {"low": 0, "high": 2}, 1)


# -- the audit's vectorized versions agree ---------------------------------------------------
# The audit keeps numpy copies of these formulas to evaluate many declarations at once
# (audit: declared_probabilities, _parse_continuous, _parse_slate); they must say what the SDK
# says.
@settings(deadline=None)
@given(
    valid_draws().filter(lambda call: call[0] in OPTION_KINDS)
    | bucket_shares().map(lambda shares: ("bucket", {"shares": shares}))
)
def test_audit_probabilities_agree(call: tuple[str, dict[str, Any]]) -> None:
    kind, args = call
    options, probs = option_probabilities(kind, args)
    p, bad = _declared.declared_probabilities(
        kind, [orjson.loads(orjson.dumps(args))], len(options)
    )
    assert [""] == bad
    assert probs == pytest.approx(p[0].tolist(), rel=1e-12, abs=1e-300)


@settings(deadline=None)
@given(st.integers(-(2**40), 2**40), st.integers(1, 100))
def test_audit_integer_probabilities_agree(low: int, n: int) -> None:
    args = {"low": low, "high": low + n}
    p, bad = _declared.declared_probabilities("integers", [args], n)
    assert [""] == bad
    assert [probability("integers", args, v) for v in range(low, low + n)] == p[0].tolist()


@settings(max_examples=200, deadline=None)
@given(valid_draws().filter(lambda call: call[0] in CONTINUOUS_KINDS), seeds)
def test_audit_densities_agree(call: tuple[str, dict[str, Any]], seed: bytes) -> None:
    kind, args = call
    rec = recorded(kind, args, seed)
    parsed = _parse._parse_continuous(
        kind,
        np.array([orjson.dumps(rec.args).decode()], dtype=object),
        np.array([orjson.dumps(rec.value).decode()], dtype=object),
        np.array([rec.prob]),
    )
    assert [True] == parsed.ok.tolist()
    expected = density(kind, rec.args, rec.value)
    assert expected == pytest.approx(float(parsed.declared[0]), rel=1e-12, abs=1e-300)


@settings(
    max_examples=200,
    deadline=None,
    suppress_health_check=[HealthCheck.filter_too_much, HealthCheck.too_slow],
)
@given(valid_draws().filter(lambda call: call[0] == "slate"), seeds)
def test_audit_slate_probabilities_agree(call: tuple[str, dict[str, Any]], seed: bytes) -> None:
    _, args = call
    rec = recorded("slate", args, seed)
    parsed = _parse._parse_slate(
        np.array([orjson.dumps(rec.args).decode()], dtype=object),
        np.array([orjson.dumps(rec.value).decode()], dtype=object),
    )
    assert [True] == parsed.ok.tolist()
    expected = probability("slate", rec.args, rec.value)
    assert expected == pytest.approx(float(parsed.declared[0]), rel=1e-12, abs=1e-300)
