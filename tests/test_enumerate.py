"""Marginal propensities: enumerated branches, one-draw exact values, densities, Monte Carlo."""

from __future__ import annotations

import itertools
import math
import tempfile
from pathlib import Path

import pytest
import shop_decisions as sd
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from strategies import prob_vectors

import drawledger as dl
from drawledger._records import to_json
from drawledger.exceptions import ReplayError
from drawledger.replay import action_distribution, propensity
from drawledger.replay.propensity import MONTE_CARLO, Memo, from_run, remembered

led = dl.Ledger(Path(tempfile.gettempdir()) / "drawledger-enumerate-never-written.db")


@led.decision("nested")
def nested(draw: dl.Draw) -> str:
    """Two paths reach "basil": directly (0.5), or through a second draw (0.5 * 0.4)."""
    herb = draw.categorical(["basil", "thyme"], [0.5, 0.5], name="herb")
    if herb == "thyme":
        return draw.categorical(["basil", "sage"], [0.4, 0.6], name="swap")
    return herb


@led.decision("tip")
def tip(draw: dl.Draw) -> float:
    """A coin, then a uniform or a normal tip: the action is a continuous draw's value."""
    if draw.bernoulli(0.3, name="flat"):
        return draw.uniform(0.0, 10.0, name="amount")
    return draw.normal(5.0, 1.5, name="amount")


@led.decision("steady")
def steady(draw: dl.Draw) -> str:
    """No draw at all."""
    return "one-pot-pasta"


@led.decision("picky")
def picky(cards: list[str], draw: dl.Draw) -> str:
    """Raises on one branch only."""
    card = draw.categorical(cards, [0.5, 0.5])
    if card == "taco-night":
        raise LookupError("no tortillas in stock")
    return card


@led.decision("careless")
def careless(draw: dl.Draw) -> str:
    """Catches every Exception around a continuous draw (enumeration must still stop)."""
    try:
        x = draw.uniform(0.0, 1.0)
    except Exception:
        x = 0.0
    return "early" if x < 0.25 else "late"


@led.decision("menu")
def menu(options: list[str], probs: list[float], draw: dl.Draw) -> str:
    return draw.categorical(options, probs, name="dish")


def _inputs(i: int = 0) -> dict[str, sd.CardContext]:
    return {"ctx": sd.context(i)}


def test_epsilon_greedy_propensities_match_the_hand_worked_values() -> None:
    """Explore-or-exploit with epsilon = 0.2 over K = 6 cards.

    Worked by hand: the greedy card has (1 - eps) + eps / K = 0.8 + 0.2 / 6 = 0.8333...,
    every other card eps / K = 0.0333... (the epsilon-greedy rule of Sutton & Barto,
    Reinforcement Learning, 2nd ed. 2018, section 2.2; recalled from memory).
    """
    eps, k = 0.2, 6
    ctx = sd.context(4)
    greedy = ctx.cards[ctx.scores.index(max(ctx.scores))]
    dist = action_distribution(sd.explore_card, {"ctx": ctx}, {"epsilon": eps})
    assert dist is not None
    assert set(to_json(c, "card") for c in ctx.cards) == set(dist)
    for card in ctx.cards:
        expected = (1 - eps) + eps / k if card == greedy else eps / k
        assert pytest.approx(expected, rel=1e-12) == dist[to_json(card, "card")]
        found = propensity(sd.explore_card, {"ctx": ctx}, {"epsilon": eps}, to_json(card, "c"))
        assert "enumerated" == found.method
        assert pytest.approx(expected, rel=1e-12) == found.value


def test_plackett_luce_slate_matches_the_product_formula() -> None:
    """Ordered slate of k = 3 out of 4 cards with weights 4, 3, 2, 1 (sum 10).

    Plackett-Luce model (Plackett 1975, "The analysis of permutations", Applied Statistics
    24(2); Luce 1959, Individual Choice Behavior): P(a, b, c) = w_a / W * w_b / (W - w_a) *
    w_c / (W - w_a - w_b). Worked example: P(salmon, pasta, tacos)
    = 2/10 * 4/8 * 1/4 = 0.025.
    """
    cards = ["one-pot-pasta", "green-curry", "sheet-pan-salmon", "taco-night"]
    weights = [4.0, 3.0, 2.0, 1.0]
    ctx = sd.CardContext(user_tier="plus", cards=cards, scores=weights)
    inputs, params = {"ctx": ctx}, {"k": 3}
    worked = ["sheet-pan-salmon", "one-pot-pasta", "taco-night"]
    found = propensity(sd.card_row, inputs, params, to_json(worked, "slate"))
    assert "exact" == found.method
    assert pytest.approx(0.025, rel=1e-12) == found.value
    dist = action_distribution(sd.card_row, inputs, params)
    assert dist is not None
    assert 24 == len(dist)  # 4 * 3 * 2 ordered slates
    for slate in itertools.permutations(range(4), 3):
        w, total, expected = weights, 10.0, 1.0
        for i in slate:
            expected *= w[i] / total
            total -= w[i]
        key = to_json([cards[i] for i in slate], "slate")
        assert pytest.approx(expected, rel=1e-12) == dist[key]
    assert pytest.approx(1.0, rel=1e-12) == math.fsum(dist.values())


def test_nested_choices_sum_over_every_path() -> None:
    """P(basil) = 0.5 + 0.5 * 0.4 = 0.7 (worked by hand), not the 0.5 of its first draw."""
    assert {'"basil"': pytest.approx(0.7, rel=1e-12), '"sage"': pytest.approx(0.3)} == (
        action_distribution(nested, {}, {})
    )
    found = propensity(nested, {}, {}, '"basil"')
    assert ("enumerated", pytest.approx(0.7, rel=1e-12)) == (found.method, found.value)


def test_monte_carlo_lies_within_three_standard_errors_of_the_exact_value() -> None:
    """A budget of 2 paths forces Monte Carlo on the three-draw decision (8 paths)."""
    inputs, params = _inputs(2), {"epsilon": 0.3, "badge": 0.25}
    exact = action_distribution(sd.card_with_badge, inputs, params)
    assert exact is not None
    for action, p in sorted(exact.items(), key=lambda kv: -kv[1])[:3]:
        mc = propensity(sd.card_with_badge, inputs, params, action, budget=2, mc_samples=4000,
                        seed=11)  # fmt: skip
        assert MONTE_CARLO == mc.method
        assert 0.0 < mc.stderr
        assert abs(mc.value - p) <= 3 * mc.stderr


def test_lognormal_action_uses_its_density() -> None:
    """The action is the log-normal draw's value: its density, checked with scipy.stats.lognorm
    (s = sigma, scale = exp(mu))."""
    inputs = {"basket": sd.Basket(items=4, value=31.0)}
    params = {"nominal_minutes": 90.0, "spread": 0.6}
    for minutes in (12.5, 90.0, 240.0):
        found = propensity(sd.reminder_delay, inputs, params, to_json(minutes, "m"))
        assert "density" == found.method
        expected = stats.lognorm.pdf(minutes, s=0.6, scale=90.0)
        assert pytest.approx(expected, rel=1e-12) == found.value


def test_mixture_density_sums_the_discrete_branches() -> None:
    """0.3 * uniform(0, 10) density + 0.7 * normal(5, 1.5) density (scipy.stats.norm)."""
    for x in (4.2, 7.5, 11.0):
        found = propensity(tip, {}, {}, to_json(x, "tip"))
        expected = 0.3 * (0.1 if x <= 10 else 0.0) + 0.7 * stats.norm.pdf(x, 5.0, 1.5)
        assert "density" == found.method
        assert pytest.approx(expected, rel=1e-12) == found.value


def test_continuous_draw_that_is_not_the_action_falls_back_to_monte_carlo() -> None:
    """The reminder slot floor(minutes / 30) of a log-normal: P(slot) from the log-normal CDF
    (scipy.stats.lognorm.cdf) lies within 3 standard errors of the estimate."""
    inputs = {"basket": sd.Basket(items=1, value=9.0)}
    assert action_distribution(sd.reminder_slot, inputs, {}) is None
    cdf = stats.lognorm(s=0.6, scale=90.0).cdf
    for slot in (1, 2, 3):
        found = propensity(sd.reminder_slot, inputs, {}, str(slot), mc_samples=3000, seed=5)
        expected = cdf(30.0 * (slot + 1)) - cdf(30.0 * slot)
        assert MONTE_CARLO == found.method
        assert abs(found.value - expected) <= 3 * found.stderr


def test_many_branches_exceed_the_budget() -> None:
    """integers(0, 5000) % 7: over a 4096-path budget, exact with a 5000-path budget."""
    inputs = {"basket": sd.Basket(items=1, value=9.0)}
    assert action_distribution(sd.delivery_slot, inputs, {}) is None
    exact = action_distribution(sd.delivery_slot, inputs, {}, budget=5000)
    assert exact is not None
    expected = sum(1 for i in range(5000) if i % 7 == 3) / 5000  # counted directly
    assert pytest.approx(expected, rel=1e-12) == exact["3"]
    mc = propensity(sd.delivery_slot, inputs, {}, "3", mc_samples=3000, seed=2)
    assert MONTE_CARLO == mc.method
    assert abs(mc.value - expected) <= 3 * mc.stderr


def test_one_draw_beyond_the_budget_is_read_from_the_draw() -> None:
    """A single integers draw over 10**9 values returns its value: 1e-9, no sampling, labelled
    "one-draw" (too many branches to prove that no other value gives the same action)."""
    found = propensity(wide, {}, {}, "123456789")
    assert ("one-draw", pytest.approx(1e-9, rel=1e-12)) == (found.method, found.value)


@led.decision("wide")
def wide(draw: dl.Draw) -> int:
    return draw.integers(0, 10**9)


@led.decision("wide-folded")
def wide_folded(draw: dl.Draw) -> int:
    """integers(0, 5000) returned as drawn, except 4321, which is shown as 7."""
    slot = draw.integers(0, 5000)
    return 7 if slot == 4321 else slot


def test_one_draw_beyond_the_budget_is_not_called_exact() -> None:
    """Random branches cannot rule out another value returning the same action (4321 -> 7):
    the draw's probability is reported as "one-draw", never "exact"; with a budget that lists
    every branch, P(7) = 2 / 5000 (counted by hand) and P(4321) = 0."""
    found = propensity(wide_folded, {}, {}, "7")
    assert ("one-draw", pytest.approx(1 / 5000, rel=1e-12)) == (found.method, found.value)
    listed = propensity(wide_folded, {}, {}, "7", budget=5000)
    assert ("enumerated", pytest.approx(2 / 5000, rel=1e-12)) == (listed.method, listed.value)
    assert 0.0 == propensity(wide_folded, {}, {}, "4321", budget=5000).value


def test_one_draw_with_every_branch_listed_is_exact() -> None:
    """Every option replayed returns its own value: the draw's probability is proven."""
    found = propensity(menu, {"options": ["soup", "salad"], "probs": [0.25, 0.75]}, {}, '"soup"')
    assert ("exact", 0.25) == (found.method, found.value)


def test_no_draw_is_probability_one() -> None:
    assert (1.0, "exact") == tuple(propensity(steady, {}, {}, '"one-pot-pasta"'))[:2]
    assert 0.0 == propensity(steady, {}, {}, '"green-curry"').value
    assert 0.0 == from_run(steady, {}, {}, '"green-curry"', [], '"one-pot-pasta"').value


def test_a_branch_that_raises_is_reported_with_its_message() -> None:
    with pytest.raises(ReplayError, match="no tortillas in stock"):
        action_distribution(picky, {"cards": ["green-curry", "taco-night"]}, {})


def test_user_code_catching_exceptions_cannot_hide_a_continuous_draw() -> None:
    """The signal that stops enumeration is not an Exception, so `except Exception` misses it."""
    assert action_distribution(careless, {}, {}) is None
    found = propensity(careless, {}, {}, '"early"', mc_samples=2000, seed=3)
    assert MONTE_CARLO == found.method
    assert abs(found.value - 0.25) <= 3 * found.stderr  # P(U < 0.25) = 0.25


def test_memo_reuses_distributions_for_identical_inputs() -> None:
    memo = Memo(size=2)
    first = remembered(memo, nested, {}, {}, '"basil"')
    assert first is remembered(memo, nested, {}, {}, '"sage"')
    remembered(memo, sd.explore_card, _inputs(1), {}, '"green-curry"')
    remembered(memo, sd.explore_card, _inputs(2), {}, '"green-curry"')
    assert first is not remembered(memo, nested, {}, {}, '"basil"')  # evicted (size 2)


@settings(max_examples=60, deadline=None)
@given(prob_vectors(max_size=6), st.data())
def test_one_categorical_draw_enumerates_to_its_probabilities(
    probs: list[float], data: st.DataObject
) -> None:
    """Options may repeat: an option's propensity is the sum of its entries' probabilities."""
    options = data.draw(st.lists(st.sampled_from(["soup", "salad", "stew"]), min_size=len(probs),
                                 max_size=len(probs)))  # fmt: skip
    inputs = {"options": options, "probs": probs}
    dist = action_distribution(menu, inputs, {})
    assert dist is not None
    for option in set(options):
        expected = math.fsum(p for o, p in zip(options, probs, strict=True) if o == option)
        key = to_json(option, "option")
        assert pytest.approx(expected, rel=1e-12, abs=1e-300) == dist.get(key, 0.0)
        assert pytest.approx(expected, rel=1e-12, abs=1e-300) == (
            propensity(menu, inputs, {}, key).value
        )
