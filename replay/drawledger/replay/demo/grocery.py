"""The invented grocery-delivery scenario: two instrumented decisions and a shopper simulator.

A grocery-delivery app makes two randomized decisions per shopper session:

* ``recipe-card`` (:func:`feature_card`): which of six recipe cards to feature on the home
  screen, a softmax over the relevance scores of a recommender, with a policy parameter
  ``temperature`` (logged at 0.7).
* ``reminder-delay`` (:func:`reminder_delay`): how many minutes to wait before a
  basket-reminder notification, a log-normal multiplier around a nominal delay: the delay is
  ``nominal_minutes * exp(spread * z)`` with ``z`` standard normal, recorded as one
  ``lognormal(log(nominal_minutes), spread)`` draw (logged at 90 minutes, spread 0.6).

The outcome is ``checkout``: 1.0 when the shopper checks out within 24 hours, else 0.0.

:class:`ShopperSimulator` makes the ground truth known. A shopper has a segment and visits in a
part of the day, drawn independently from fixed shares. The probability of a checkout within
24 hours is additive and never leaves (0, 1)::

    p = base[segment] + shift[daypart]
        + CARD_LIFT * appeal[segment, daypart, card]
        + REMINDER_LIFT * exp(-(log(delay / REMINDER_BEST))**2 / (2 * REMINDER_WIDTH**2))

The recommender's relevance scores are informative about the appeal but not equal to it. Since
contexts are finite and the reminder term is a Gaussian in log-delay, the expected checkout rate
of any policy (temperature, nominal delay, spread) is an exact finite sum plus a closed-form
Gaussian integral (:meth:`ShopperSimulator.true_value`); :meth:`ShopperSimulator.simulate_value`
estimates the same number by simulation. The simulator is seeded; the draws of the decisions are
not (their seeds come from the operating system, as in production).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from pydantic import BaseModel

import drawledger as dl
from drawledger.draw import softmax_probs

__all__ = [
    "CARDS",
    "DAYPARTS",
    "LOGGING_POLICY",
    "SEGMENTS",
    "Basket",
    "CardContext",
    "Session",
    "ShopperSimulator",
    "feature_card",
    "ledger",
    "reminder_delay",
]

CARDS = (
    "one-pot-pasta",
    "green-curry",
    "sheet-pan-salmon",
    "taco-night",
    "lentil-soup",
    "overnight-oats",
)
SEGMENTS = {"family": 0.35, "single": 0.25, "plant-based": 0.20, "budget": 0.20}
DAYPARTS = {"morning": 0.25, "afternoon": 0.35, "evening": 0.40}

# The recommender's relevance score of each card per segment (what the decision sees).
_SCORES = {
    "family": (1.6, 0.7, 1.2, 1.8, 0.5, 0.4),
    "single": (1.2, 1.5, 1.1, 0.6, 0.6, 1.0),
    "plant-based": (0.9, 1.9, 0.1, 0.8, 1.4, 1.3),
    "budget": (1.7, 0.6, 0.2, 1.0, 1.5, 0.9),
}
# How much each card really appeals to a segment, in [0, 1] (what drives checkouts).
_APPEAL = {
    "family": (0.9, 0.4, 0.6, 1.0, 0.3, 0.2),
    "single": (0.7, 0.8, 0.5, 0.4, 0.3, 0.6),
    "plant-based": (0.5, 1.0, 0.0, 0.4, 0.9, 0.7),
    "budget": (1.0, 0.3, 0.1, 0.6, 0.8, 0.5),
}
_MORNING_OATS_SCORE = 0.8  # the recommender favours overnight oats in the morning ...
_MORNING_OATS_APPEAL = 0.3  # ... and shoppers do like them more then, if less than it thinks
_BASE = {"family": 0.24, "single": 0.16, "plant-based": 0.20, "budget": 0.13}
_SHIFT = {"morning": -0.02, "afternoon": 0.0, "evening": 0.03}
CARD_LIFT = 0.15
REMINDER_LIFT = 0.10
REMINDER_BEST = 40.0  # minutes: the delay at which a reminder helps most
REMINDER_WIDTH = 0.7  # width of the reminder effect, in log-minutes

LOGGING_POLICY = {"temperature": 0.7, "nominal_minutes": 90.0, "spread": 0.6}


class CardContext(BaseModel):
    """What the recipe-card decision sees: the shopper's segment, the daypart, cards, scores."""

    segment: str
    daypart: str
    cards: list[str]
    scores: list[float]


class Basket(BaseModel):
    """What the reminder-delay decision sees: the abandoned basket."""

    items: int
    value: float


# Module-level decisions, so that replay can import them by name. They record into this ledger
# until a caller points them elsewhere (``feature_card.ledger = other``), as the demo does.
ledger = dl.Ledger("drawledger-demo/decisions.db")


@ledger.decision("recipe-card")
def feature_card(ctx: CardContext, draw: dl.Draw, *, temperature: float = 0.7) -> str:
    """The recipe card to feature: softmax over the recommender's relevance scores."""
    return draw.softmax(ctx.cards, ctx.scores, temperature=temperature, name="card")


@ledger.decision("reminder-delay")
def reminder_delay(
    basket: Basket, draw: dl.Draw, *, nominal_minutes: float = 90.0, spread: float = 0.6
) -> float:
    """Minutes before the basket reminder: nominal_minutes times a log-normal multiplier."""
    return draw.lognormal(math.log(nominal_minutes), spread, name="delay")


@dataclass(frozen=True)
class Session:
    """One simulated shopper session."""

    shopper: str
    segment: str
    daypart: str
    basket: Basket

    def card_context(self) -> CardContext:
        return CardContext(
            segment=self.segment,
            daypart=self.daypart,
            cards=list(CARDS),
            scores=list(scores(self.segment, self.daypart)),
        )


def scores(segment: str, daypart: str) -> tuple[float, ...]:
    """The recommender's relevance scores of the six cards for a segment and daypart."""
    s = list(_SCORES[segment])
    if daypart == "morning":
        s[5] += _MORNING_OATS_SCORE
    return tuple(s)


def appeal(segment: str, daypart: str) -> tuple[float, ...]:
    """The true appeal in [0, 1] of the six cards for a segment and daypart."""
    a = list(_APPEAL[segment])
    if daypart == "morning":
        a[5] = min(1.0, a[5] + _MORNING_OATS_APPEAL)
    return tuple(a)


def reminder_effect(delay_minutes: float) -> float:
    """Added checkout probability of a reminder sent after ``delay_minutes``."""
    x = math.log(delay_minutes / REMINDER_BEST)
    return REMINDER_LIFT * math.exp(-x * x / (2.0 * REMINDER_WIDTH**2))


def checkout_probability(segment: str, daypart: str, card: str, delay_minutes: float) -> float:
    """Probability that a session ends in a checkout within 24 hours."""
    lift = CARD_LIFT * appeal(segment, daypart)[CARDS.index(card)]
    return _BASE[segment] + _SHIFT[daypart] + lift + reminder_effect(delay_minutes)


class ShopperSimulator:
    """Seeded shoppers and their checkouts; knows the true value of every policy.

    ``sessions(n)`` draws ``n`` sessions (one per shopper) and ``checkout(session, card,
    delay)`` draws whether that session checks out within 24 hours, both from one
    ``numpy.random.Generator`` seeded with ``seed``.
    """

    def __init__(self, seed: int = 10) -> None:
        self.seed = seed
        self._rng = np.random.default_rng(seed)

    def sessions(self, n: int) -> list[Session]:
        """``n`` sessions of distinct shoppers, contexts drawn from the fixed shares."""
        if n < 1:
            raise ValueError(f"number of sessions must be at least 1, got {n}")
        rng = self._rng
        seg = rng.choice(list(SEGMENTS), size=n, p=list(SEGMENTS.values()))
        day = rng.choice(list(DAYPARTS), size=n, p=list(DAYPARTS.values()))
        items = rng.integers(1, 13, size=n)
        value = np.round(items * rng.uniform(3.0, 9.0, size=n), 2)
        return [
            Session(
                shopper=f"shopper-{i:06d}",
                segment=str(seg[i]),
                daypart=str(day[i]),
                basket=Basket(items=int(items[i]), value=float(value[i])),
            )
            for i in range(n)
        ]

    def checkout(self, session: Session, card: str, delay_minutes: float) -> bool:
        """Whether this session checks out within 24 hours (one Bernoulli draw)."""
        p = checkout_probability(session.segment, session.daypart, card, delay_minutes)
        return bool(self._rng.random() < p)

    @staticmethod
    def true_value(
        temperature: float = LOGGING_POLICY["temperature"],
        nominal_minutes: float = LOGGING_POLICY["nominal_minutes"],
        spread: float = LOGGING_POLICY["spread"],
    ) -> float:
        """The exact expected checkout rate of a policy, over the shopper population.

        The card term is a finite sum over the 12 contexts and the six cards. The reminder
        term is E[A exp(-(X - b)^2 / (2 w^2))] for X ~ N(m, s^2), which equals
        A w / sqrt(w^2 + s^2) exp(-(m - b)^2 / (2 (w^2 + s^2))) (the integral of a product of
        two Gaussian densities), with m = log(nominal_minutes), s = spread, b = log(40).
        """
        card_part = 0.0
        for segment, p_seg in SEGMENTS.items():
            for daypart, p_day in DAYPARTS.items():
                probs = softmax_probs(scores(segment, daypart), temperature)
                lift = sum(p * a for p, a in zip(probs, appeal(segment, daypart), strict=True))
                base = _BASE[segment] + _SHIFT[daypart]
                card_part += p_seg * p_day * (base + CARD_LIFT * lift)
        v = REMINDER_WIDTH**2 + spread**2
        gap = math.log(nominal_minutes) - math.log(REMINDER_BEST)
        reminder_part = (
            REMINDER_LIFT * REMINDER_WIDTH / math.sqrt(v) * math.exp(-gap * gap / (2 * v))
        )
        return card_part + reminder_part

    def simulate_value(
        self,
        n: int,
        temperature: float = LOGGING_POLICY["temperature"],
        nominal_minutes: float = LOGGING_POLICY["nominal_minutes"],
        spread: float = LOGGING_POLICY["spread"],
    ) -> float:
        """The checkout rate of a policy over ``n`` simulated sessions (vectorized)."""
        rng = np.random.default_rng(self.seed)
        segs, days = list(SEGMENTS), list(DAYPARTS)
        si = rng.choice(len(segs), size=n, p=list(SEGMENTS.values()))
        di = rng.choice(len(days), size=n, p=list(DAYPARTS.values()))
        ctx = si * len(days) + di
        probs = np.array([softmax_probs(scores(s, d), temperature) for s in segs for d in days])[
            ctx
        ]
        cum = np.cumsum(probs, axis=1)
        card = np.minimum((rng.random(n)[:, None] >= cum).sum(axis=1), len(CARDS) - 1)
        table = np.array([appeal(s, d) for s in segs for d in days])
        base = np.array([_BASE[s] + _SHIFT[d] for s in segs for d in days])
        delay = nominal_minutes * np.exp(spread * rng.standard_normal(n))
        x = np.log(delay / REMINDER_BEST)
        p = (
            base[ctx]
            + CARD_LIFT * table[ctx, card]
            + REMINDER_LIFT * np.exp(-x * x / (2.0 * REMINDER_WIDTH**2))
        )
        return float((rng.random(n) < p).mean())
