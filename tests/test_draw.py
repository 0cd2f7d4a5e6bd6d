"""Every draw kind of ``dl.Draw``: values, probabilities and densities, frequencies, bad input."""

from __future__ import annotations

import hashlib
import itertools
import math
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from scipy import special, stats
from strategies import junk_draws, seeds, valid_draws

from drawledger import _stream
from drawledger._normal import ppnd16
from drawledger.draw import Draw, bucket_assign, categorical_index, softmax_probs
from drawledger.exceptions import DrawArgumentError

CARDS = ["one-pot-pasta", "green-curry", "sheet-pan-salmon", "taco-night", "lentil-soup",
         "overnight-oats"]  # fmt: skip
SCORES = [1.6, 0.7, 1.2, 1.8, 0.5, 0.4]
N = 40_000  # draws per frequency test


def seed_of(i: int, salt: str = "") -> bytes:
    """A fixed seed (the frequency tests are deterministic, so they cannot flake)."""
    return hashlib.blake2b(f"{salt}{i}".encode(), digest_size=16).digest()


def sample(kind: str, n: int = N, **args: Any) -> list[Any]:
    """The value of one draw on each of n fresh seeds."""
    return [getattr(Draw(seed_of(i, kind)), kind)(**args) for i in range(n)]


def one(kind: str, seed: bytes | None = None, **args: Any) -> Any:
    draw = Draw(seed or seed_of(0))
    getattr(draw, kind)(**args)
    return draw.records[-1]


class FixedDraw(Draw):
    """A Draw whose every uniform is ``u`` (to reach the ends of the stream on purpose)."""

    __slots__ = ("u",)

    def __init__(self, u: float) -> None:
        super().__init__(seed_of(0))
        self.u = u

    def _uniform(self) -> float:
        return self.u


# -- probabilities and densities against scipy.stats -----------------------------------------
def test_categorical_probability_matches_scipy() -> None:
    """Recorded prob = pmf of the chosen index (scipy.stats.rv_discrete)."""
    probs = [0.1, 0.2, 0.3, 0.4]
    dist = stats.rv_discrete(values=(range(4), probs))
    for i in range(50):
        rec = one("categorical", seed_of(i), options=["a", "b", "c", "d"], probs=probs)
        j = ["a", "b", "c", "d"].index(rec.value)
        assert float(dist.pmf(j)) == pytest.approx(rec.prob, rel=1e-12)
        assert not rec.is_density


@settings(max_examples=60)
@given(seeds)
def test_softmax_probabilities_match_scipy(seed: bytes) -> None:
    """All six softmax probabilities equal scipy.special.softmax(scores / T) to 1e-12."""
    for temperature in (0.05, 0.7, 1.0, 20.0):
        ref = special.softmax(np.array(SCORES) / temperature)  # scipy.special.softmax
        ours = softmax_probs(SCORES, temperature)
        assert ref.tolist() == pytest.approx(ours, rel=1e-12)
        rec = one("softmax", seed, options=CARDS, scores=SCORES, temperature=temperature)
        assert float(ref[CARDS.index(rec.value)]) == pytest.approx(rec.prob, rel=1e-12)


@settings(max_examples=100)
@given(seeds)
def test_continuous_densities_match_scipy(seed: bytes) -> None:
    """normal, lognormal and uniform densities equal scipy.stats pdfs at the value (1e-12)."""
    for mean, sd in ((0.0, 1.0), (30.0, 5.0), (-1.5, 0.25)):
        rec = one("normal", seed, mean=mean, sd=sd)
        assert float(stats.norm.pdf(rec.value, mean, sd)) == pytest.approx(rec.prob, rel=1e-12)
        # the value: mean + sd * ndtri(u) (scipy.special.ndtri)
        assert mean + sd * float(special.ndtri(rec.u[0])) == pytest.approx(rec.value, rel=1e-13)
        assert rec.is_density
    for mu, sigma in ((0.0, 0.35365), (3.4, 0.5), (-1.0, 1.2)):
        rec = one("lognormal", seed, mu=mu, sigma=sigma)
        # scipy.stats.lognorm: shape s = sigma, scale = exp(mu)
        ref = stats.lognorm.pdf(rec.value, sigma, scale=math.exp(mu))
        assert float(ref) == pytest.approx(rec.prob, rel=1e-12)
        expected = math.exp(mu + sigma * float(special.ndtri(rec.u[0])))
        assert expected == pytest.approx(rec.value, rel=1e-13)
    for low, high in ((0.0, 1.0), (-2.5, 7.25), (15.0, 45.0)):
        rec = one("uniform", seed, low=low, high=high)
        ref = stats.uniform.pdf(rec.value, low, high - low)  # scipy.stats.uniform(loc, scale)
        assert float(ref) == pytest.approx(rec.prob, rel=1e-12)


@settings(max_examples=100)
@given(seeds)
def test_discrete_probabilities_match_scipy(seed: bytes) -> None:
    """bernoulli and integers probabilities equal scipy.stats pmfs (1e-12)."""
    for p in (0.05, 0.3, 0.5, 0.95):
        rec = one("bernoulli", seed, p=p)
        ref = stats.bernoulli.pmf(int(rec.value), p)  # scipy.stats.bernoulli
        assert float(ref) == pytest.approx(rec.prob, rel=1e-12)
    for low, high in ((0, 6), (-10, 10), (1000, 1001)):
        rec = one("integers", seed, low=low, high=high)
        ref = stats.randint.pmf(rec.value, low, high)  # scipy.stats.randint (high exclusive)
        assert float(ref) == pytest.approx(rec.prob, rel=1e-12)


def plackett_luce(weights: list[float], order: list[int]) -> float:
    """P(order) = prod_t w[order_t] / (sum of the weights not yet chosen).

    Reference: Plackett (1975), Luce (1959); the product form of sampling without replacement
    proportional to weights, computed here independently of the SDK.
    """
    left = sum(weights)
    prob = 1.0
    for i in order:
        prob *= weights[i] / left
        left -= weights[i]
    return prob


def test_slate_probability_is_the_plackett_luce_product() -> None:
    """slate's recorded prob equals the Plackett-Luce product of its order (1e-12)."""
    weights = [3.0, 1.0, 2.0, 0.5, 1.5, 2.0]
    for i in range(200):
        rec = one("slate", seed_of(i), options=CARDS, weights=weights, k=3)
        order = [CARDS.index(c) for c in rec.value]
        assert 3 == len(set(order))
        assert plackett_luce(weights, order) == pytest.approx(rec.prob, rel=1e-12)
        assert 3 == len(rec.u)


def test_epsilon_greedy_probabilities() -> None:
    """epsilon / K, plus (1 - epsilon) / |A| on the tied best options (the spec's formula)."""
    rec = one("epsilon_greedy", options=["a", "b", "c", "d"], scores=[2.0, 5.0, 5.0, 1.0],
              epsilon=0.3)  # fmt: skip
    expected = {"a": 0.075, "b": 0.425, "c": 0.425, "d": 0.075}
    assert expected[rec.value] == pytest.approx(rec.prob, rel=1e-12)


# -- frequencies: the draws happen as declared -----------------------------------------------
def chi_square_p(values: list[Any], expected: dict[Any, float]) -> float:
    """p-value of scipy.stats.chisquare of observed counts against declared probabilities."""
    keys = list(expected)
    counts = [sum(1 for v in values if v == k) for k in keys]
    assert len(values) == sum(counts), "a value outside the declared support"
    exp = [expected[k] * len(values) for k in keys]
    return float(stats.chisquare(counts, exp).pvalue)


def test_categorical_frequencies() -> None:
    """Observed frequencies match the declared probabilities (scipy.stats.chisquare, 0.001)."""
    probs = [0.1, 0.2, 0.3, 0.4]
    values = sample("categorical", options=["a", "b", "c", "d"], probs=probs)
    assert chi_square_p(values, dict(zip("abcd", probs, strict=True))) > 0.001


def test_softmax_frequencies() -> None:
    """Softmax over six recipe cards at T = 0.7 (scipy.stats.chisquare, 0.001)."""
    values = sample("softmax", options=CARDS, scores=SCORES, temperature=0.7)
    expected = dict(zip(CARDS, softmax_probs(SCORES, 0.7), strict=True))
    assert chi_square_p(values, expected) > 0.001


def test_epsilon_greedy_frequencies() -> None:
    """Epsilon-greedy with a tie for best (scipy.stats.chisquare, 0.001)."""
    values = sample("epsilon_greedy", options=["a", "b", "c", "d"], scores=[2.0, 5.0, 5.0, 1.0],
                    epsilon=0.3)  # fmt: skip
    expected = {"a": 0.075, "b": 0.425, "c": 0.425, "d": 0.075}
    assert chi_square_p(values, expected) > 0.001


def test_slate_frequencies_over_ordered_pairs() -> None:
    """The 12 ordered pairs of a k = 2 slate follow Plackett-Luce (scipy.stats.chisquare)."""
    options, weights = ["a", "b", "c", "d"], [3.0, 1.0, 2.0, 0.5]
    values = [tuple(v) for v in sample("slate", options=options, weights=weights, k=2)]
    expected = {
        (options[i], options[j]): plackett_luce(weights, [i, j])
        for i, j in itertools.permutations(range(4), 2)
    }
    assert 1.0 == pytest.approx(sum(expected.values()), rel=1e-12)
    assert chi_square_p(values, expected) > 0.001


def test_bernoulli_and_integers_frequencies() -> None:
    """bernoulli (scipy.stats.binomtest) and integers (scipy.stats.chisquare)."""
    hits = sum(sample("bernoulli", p=0.3))
    assert stats.binomtest(hits, N, 0.3).pvalue > 0.001
    values = sample("integers", low=-3, high=4)
    assert chi_square_p(values, {k: 1 / 7 for k in range(-3, 4)}) > 0.001


def test_bucket_frequencies_over_units() -> None:
    """Hashed assignment of 40 000 shoppers follows the shares (scipy.stats.chisquare)."""
    shares = {"a": 0.2, "b": 0.3, "c": 0.5}
    arms = [bucket_assign(f"shopper-{i:06d}", shares, "card-layout")[0] for i in range(N)]
    assert chi_square_p(arms, shares) > 0.001


@pytest.mark.parametrize(
    ("kind", "args", "cdf"),
    [
        ("normal", {"mean": 30.0, "sd": 5.0}, stats.norm(30.0, 5.0).cdf),
        ("lognormal", {"mu": 3.4, "sigma": 0.5}, stats.lognorm(0.5, scale=math.exp(3.4)).cdf),
        ("uniform", {"low": 15.0, "high": 45.0}, stats.uniform(15.0, 30.0).cdf),
    ],
)
def test_continuous_draws_follow_their_distribution(kind: str, args: dict, cdf: Any) -> None:
    """20 000 draws: Kolmogorov-Smirnov (scipy.stats.kstest) does not reject at 0.001."""
    values = sample(kind, n=20_000, **args)
    assert stats.kstest(values, cdf).pvalue > 0.001


def test_lognormal_multiplier_rule_of_thumb() -> None:
    """sigma = ln 2 / 1.959964 = 0.35365 keeps a multiplier within [0.5, 2] 95% of the time.

    The rule of thumb is common practice; the exact coverage comes from scipy.stats.norm.
    """
    sigma = math.log(2.0) / 1.959964
    assert 0.35365 == pytest.approx(sigma, abs=5e-6)
    coverage = stats.norm.cdf(math.log(2.0) / sigma) - stats.norm.cdf(-math.log(2.0) / sigma)
    assert 0.95 == pytest.approx(coverage, abs=1e-6)
    values = sample("lognormal", mu=0.0, sigma=sigma)
    inside = sum(1 for v in values if 0.5 <= v <= 2.0) / N
    assert abs(inside - 0.95) < 4 * math.sqrt(0.95 * 0.05 / N)  # four binomial sds


# -- the ends of the stream ------------------------------------------------------------------
def test_a_uniform_of_one_is_handled_by_every_kind() -> None:
    """u = 1.0 (probability 2**-53) gives the documented value for each kind."""
    d = FixedDraw(1.0)
    assert "c" == d.categorical(["a", "b", "c", "d"], [0.25, 0.25, 0.5, 0.0])
    assert d.bernoulli(1.0) is True
    assert d.bernoulli(0.999) is False
    assert 9 == d.integers(0, 10)
    assert 2.0 == d.uniform(-1.0, 2.0)
    assert 3.0 + 2.0 * ppnd16(1.0 - 2.0**-53) == d.normal(3.0, 2.0)
    assert math.isfinite(d.lognormal(0.0, 1.0))
    assert "c" == d.softmax(["a", "b", "c"], [0.0, 0.0, 0.0], temperature=1.0)
    assert ["c", "b"] == d.slate(["a", "b", "c"], [1.0, 1.0, 1.0], 2)
    assert "b" == d.epsilon_greedy(["a", "b"], [0.0, 1.0], 0.5)
    assert all(r.prob > 0.0 for r in d.records)


def test_the_smallest_uniform_picks_the_first_positive_option() -> None:
    """u = 2**-54 skips options of probability 0."""
    d = FixedDraw(2.0**-54)
    assert "b" == d.categorical(["a", "b", "c"], [0.0, 0.5, 0.5])
    assert 0 == d.integers(0, 10)
    assert d.bernoulli(1e-300) is False
    assert d.bernoulli(2.0**-53) is True


def test_categorical_rounding_fallback() -> None:
    """A running sum that ends below u picks the last option with positive probability."""
    probs = [0.5, 0.5 - 5e-10, 0.0]  # sums to 1 - 5e-10, inside the 1e-9 tolerance
    assert 1 == categorical_index(probs, 0.9999999999)
    assert 1 == categorical_index(probs, 1.0)
    # a sum a little above 1: u = 1.0 takes the first option whose running sum exceeds it
    assert 1 == categorical_index([0.5, 0.5 + 5e-10, 0.0], 1.0)
    assert 0 == categorical_index([0.25, 0.0, 0.75], 2.0**-54) == categorical_index([0.25], 0.1)


# -- recording -------------------------------------------------------------------------------
def test_records_keep_arguments_by_parameter_name() -> None:
    """args is keyed by parameter names, numbers recorded as floats, inputs copied."""
    scores = list(SCORES)
    d = Draw(seed_of(3))
    d.softmax(CARDS, scores, temperature=1, name="card")
    scores[0] = 99.0  # the caller changes its list afterwards
    rec = d.records[0]
    assert {"options": CARDS, "scores": SCORES, "temperature": 1.0} == rec.args
    assert isinstance(rec.args["temperature"], float)
    assert (0, "card", "softmax") == (rec.idx, rec.name, rec.kind)
    assert [_stream.uniforms(seed_of(3), 1)[0]] == rec.u


def test_draws_accept_numpy_arrays_and_scalars() -> None:
    """numpy arrays and numpy scalars work and are recorded as plain floats."""
    d = Draw(seed_of(4))
    d.softmax(np.array(CARDS), np.array(SCORES), temperature=np.float32(0.5))
    d.integers(np.int64(0), np.int64(6))
    d.categorical(["a", "b"], np.array([0.25, 0.75]))
    assert all(type(x) is float for x in d.records[0].args["scores"])
    assert type(d.records[0].args["temperature"]) is float
    assert type(d.records[1].value) is int


# -- bad input -------------------------------------------------------------------------------
BAD: list[tuple[str, dict[str, Any], str]] = [
    ("categorical", {"options": ["a", "b"], "probs": [0.5, math.nan]}, r"probs\[1\] must be fin"),
    ("categorical", {"options": ["a", "b"], "probs": [math.inf, 0.5]}, r"probs\[0\] must be fin"),
    ("categorical", {"options": ["a", "b"], "probs": [-0.5, 1.5]}, r"probs\[0\] is negative"),
    ("categorical", {"options": ["a", "b"], "probs": [0.5, 0.4]}, "sum to 0.9, not 1"),
    ("categorical", {"options": ["a", "b"], "probs": [0.5, 0.5 + 2e-9]}, "not 1"),
    ("categorical", {"options": [], "probs": []}, "options is empty"),
    ("categorical", {"options": ["a", "b", "c"], "probs": [0.5, 0.5]}, "2 entries but options"),
    ("categorical", {"options": "abc", "probs": [0.5, 0.5]}, "options must be a list"),
    ("categorical", {"options": {"a", "b"}, "probs": [0.5, 0.5]}, "a set has no order"),
    ("categorical", {"options": ["a", "b"], "probs": ["0.5", 0.5]}, "must be a real number"),
    ("categorical", {"options": ["a", "b"], "probs": [True, 0.0]}, "must be a real number"),
    ("categorical", {"options": ["a", "b"], "probs": [10**400, 0]}, "must be finite"),
    ("categorical", {"options": ["a"], "probs": {"a": 1.0}}, "probs must be a list"),
    ("bernoulli", {"p": 1.5}, r"p must lie in \[0, 1\]"),
    ("bernoulli", {"p": -0.1}, r"p must lie in \[0, 1\]"),
    ("bernoulli", {"p": math.nan}, "p must be finite"),
    ("bernoulli", {"p": "0.5"}, "p must be a real number"),
    ("uniform", {"low": 1.0, "high": 1.0}, "low .* must be below high"),
    ("uniform", {"low": 2.0, "high": 1.0}, "must be below high"),
    ("uniform", {"low": math.nan, "high": 1.0}, "low must be finite"),
    ("uniform", {"low": 0.0, "high": math.inf}, "high must be finite"),
    ("uniform", {"low": -1e308, "high": 1e308}, "high - low"),
    ("uniform", {"low": 0.0, "high": 1e-310}, "high - low"),
    ("integers", {"low": 5, "high": 5}, "must be below high"),
    ("integers", {"low": 0.0, "high": 5}, "low must be an integer"),
    ("integers", {"low": 0, "high": True}, "high must be an integer"),
    ("integers", {"low": 0, "high": 2**53 + 1}, "exceeds 2\\*\\*53"),
    ("integers", {"low": 2**63, "high": 2**63 + 1}, "within"),
    ("normal", {"mean": 0.0, "sd": 0.0}, "sd must be > 0"),
    ("normal", {"mean": 0.0, "sd": -1.0}, "sd must be > 0"),
    ("normal", {"mean": math.nan, "sd": 1.0}, "mean must be finite"),
    ("normal", {"mean": 0.0, "sd": math.inf}, "sd must be finite"),
    ("normal", {"mean": 0.0, "sd": 1e308}, "leave the range of doubles"),
    ("normal", {"mean": 0.0, "sd": 1e-310}, "leave the range of doubles"),
    ("lognormal", {"mu": 0.0, "sigma": 0.0}, "sigma must be > 0"),
    ("lognormal", {"mu": 0.0, "sigma": -0.5}, "sigma must be > 0"),
    ("lognormal", {"mu": 800.0, "sigma": 1.0}, "leave the range of doubles"),
    ("lognormal", {"mu": 0.0, "sigma": 100.0}, "leave the range of doubles"),
    ("softmax", {"options": CARDS, "scores": SCORES, "temperature": 0.0}, "temperature must be"),
    ("softmax", {"options": CARDS, "scores": SCORES, "temperature": -1.0}, "temperature must be"),
    ("softmax", {"options": CARDS, "scores": SCORES, "temperature": math.nan}, "temperature"),
    ("softmax", {"options": CARDS, "scores": SCORES, "temperature": math.inf}, "temperature"),
    ("softmax", {"options": CARDS, "scores": SCORES[:5], "temperature": 1.0}, "5 entries"),
    ("softmax", {"options": CARDS, "scores": [math.nan] * 6, "temperature": 1.0}, "finite"),
    ("softmax", {"options": [], "scores": [], "temperature": 1.0}, "options is empty"),
    ("epsilon_greedy", {"options": CARDS, "scores": SCORES, "epsilon": -0.1}, r"\[0, 1\]"),
    ("epsilon_greedy", {"options": CARDS, "scores": SCORES, "epsilon": 1.1}, r"\[0, 1\]"),
    ("epsilon_greedy", {"options": CARDS, "scores": SCORES, "epsilon": math.nan}, "finite"),
    ("epsilon_greedy", {"options": ["a"], "scores": [math.inf], "epsilon": 0.1}, "finite"),
    ("slate", {"options": CARDS, "weights": [1.0] * 6, "k": 0}, "k must be at least 1"),
    ("slate", {"options": CARDS, "weights": [1.0] * 6, "k": 7}, r"k \(7\) exceeds"),
    ("slate", {"options": ["a", "b"], "weights": [1.0, 0.0], "k": 2}, "weight > 0 \\(1 of 2\\)"),
    ("slate", {"options": ["a", "b"], "weights": [1.0, 1.0], "k": 1.5}, "k must be an integer"),
    ("slate", {"options": ["a", "b"], "weights": [1.0, -1.0], "k": 1}, "weights must be >= 0"),
    ("slate", {"options": ["a", "b"], "weights": [1e308, 1e308], "k": 1}, "overflows"),
    ("slate", {"options": [], "weights": [], "k": 1}, "options is empty"),
]  # fmt: skip


@pytest.mark.parametrize(("kind", "args", "problem"), BAD, ids=lambda x: None)
def test_bad_arguments_raise_naming_draw_and_problem(kind: str, args: dict, problem: str) -> None:
    """Each broken rule raises DrawArgumentError (a ValueError) naming the draw and problem;
    the draw records nothing and consumes no uniform."""
    d = Draw(seed_of(5))
    with pytest.raises(DrawArgumentError, match=problem) as info:
        getattr(d, kind)(**args, name="nm")
    assert isinstance(info.value, ValueError)
    assert str(info.value).startswith(f"{kind} draw 'nm': ")
    assert [] == d.records
    d.bernoulli(0.5)  # the stream is untouched: the next draw gets the first uniform
    assert _stream.uniforms(seed_of(5), 1) == d.records[0].u


@pytest.mark.parametrize(
    ("unit", "shares", "salt", "problem"),
    [
        ("shopper-1", {"a": 0.5, "b": 0.4}, "s", "sum to"),
        ("shopper-1", {}, "s", "shares is empty"),
        ("shopper-1", {"a": math.nan, "b": 1.0}, "s", "finite"),
        ("shopper-1", {"a": -0.5, "b": 1.5}, "s", "negative"),
        ("shopper-1", [0.5, 0.5], "s", "mapping"),
        ("", {"a": 1.0}, "s", "unit must be a non-empty string"),
        (17, {"a": 1.0}, "s", "unit must be a non-empty string"),
        ("shopper-1", {"a": 1.0}, "", "salt must be 1 to 64 bytes"),
        ("shopper-1", {"a": 1.0}, "x" * 65, "salt must be 1 to 64 bytes"),
    ],
)
def test_bad_bucket_arguments(unit: Any, shares: Any, salt: str, problem: str) -> None:
    """bucket refuses bad units, shares and salts with a DrawArgumentError naming bucket."""
    with pytest.raises(DrawArgumentError, match=problem) as info:
        bucket_assign(unit, shares, salt)
    assert str(info.value).startswith("bucket draw: ")


# -- fuzzing ---------------------------------------------------------------------------------
@settings(max_examples=300)
@given(valid_draws(), seeds)
def test_valid_draws_record_a_consistent_draw(call: tuple[str, dict], seed: bytes) -> None:
    """Any valid arguments: the value lies in the support, the probability or density is a
    positive finite number, the uniforms lie in (0, 1], and the same seed gives the same record."""
    kind, args = call
    d = Draw(seed)
    value = getattr(d, kind)(**args)
    (rec,) = d.records
    assert rec.value == value
    assert math.isfinite(rec.prob) and rec.prob > 0.0
    assert all(0.0 < u <= 1.0 for u in rec.u)
    assert (args["k"] if kind == "slate" else 1) == len(rec.u)
    if rec.is_density:
        assert kind in ("uniform", "normal", "lognormal")
    else:
        assert rec.prob <= 1.0
    if kind in ("categorical", "softmax", "epsilon_greedy"):
        assert value in args["options"]
    elif kind == "slate":
        assert len(set(value)) == len(value) == args["k"]
    elif kind == "integers":
        assert args["low"] <= value < args["high"]
    elif kind == "uniform":
        assert args["low"] <= value <= args["high"]
    elif kind == "lognormal":
        assert 0.0 < value < math.inf
    elif kind == "normal":
        assert math.isfinite(value)
    again = Draw(seed)
    getattr(again, kind)(**args)
    assert repr(d.records) == repr(again.records)


@settings(max_examples=400)
@given(junk_draws(), seeds)
def test_junk_arguments_raise_only_draw_argument_errors(
    call: tuple[str, dict], seed: bytes
) -> None:
    """Arguments of any type or value either make a valid draw or raise DrawArgumentError;
    nothing else escapes (no TypeError, OverflowError, ZeroDivisionError, ...)."""
    kind, args = call
    d = Draw(seed)
    try:
        getattr(d, kind)(**args)
    except DrawArgumentError:
        assert [] == d.records
    else:
        assert 1 == len(d.records)
        assert math.isfinite(d.records[0].prob) and d.records[0].prob > 0.0


def test_a_density_too_narrow_to_record_is_refused() -> None:
    """Found by the junk-arguments property above: a log-normal with sigma 2.1e-86 draws
    exp(mu), where the density underflows to 0; recording 0 would claim an impossible draw."""
    d = Draw(bytes(16))
    with pytest.raises(DrawArgumentError, match=r"density .* is 0\.0, which cannot be recorded"):
        d.lognormal(0.25, 2.1e-86)
    assert [] == d.records


GOOD = [
    ("categorical", {"options": ["a", "b"], "probs": [0.5, 0.5]}),
    ("bernoulli", {"p": 0.5}),
    ("integers", {"low": 0, "high": 3}),
    ("softmax", {"options": CARDS, "scores": SCORES, "temperature": 1.0}),
    ("epsilon_greedy", {"options": CARDS, "scores": SCORES, "epsilon": 0.1}),
    ("slate", {"options": CARDS, "weights": [1.0] * 6, "k": 2}),
    ("uniform", {"low": 0.0, "high": 1.0}),
    ("normal", {"mean": 0.0, "sd": 1.0}),
    ("lognormal", {"mu": 0.0, "sigma": 1.0}),
]


@pytest.mark.parametrize(("kind", "args"), GOOD, ids=[k for k, _ in GOOD])
@pytest.mark.parametrize("name", [5, b"card", ["card"]])
def test_a_draw_name_that_is_not_text_is_refused(kind: str, args: dict, name: Any) -> None:
    """name= must be a string (or None): anything else is a DrawArgumentError naming the
    argument, not a TypeError from deep inside; nothing is recorded, no uniform is used."""
    d = Draw(seed_of(6))
    with pytest.raises(DrawArgumentError, match=f"^{kind} draw: name must be a string") as info:
        getattr(d, kind)(**args, name=name)
    assert type(name).__name__ in str(info.value)
    assert [] == d.records
    d.bernoulli(0.5)
    assert _stream.uniforms(seed_of(6), 1) == d.records[0].u
