"""Decisions of the invented grocery-delivery app, used by the replay tests and benchmarks.

They are registered on a ledger that is never written; tests point them at their own ledger
with ``use(ledger)``.
"""

from __future__ import annotations

import math
import tempfile
from dataclasses import dataclass
from pathlib import Path

from pydantic import BaseModel

import drawledger as dl

CARDS = ["one-pot-pasta", "green-curry", "sheet-pan-salmon", "taco-night", "lentil-soup",
         "veggie-stir-fry"]  # fmt: skip

ledger = dl.Ledger(Path(tempfile.gettempdir()) / "drawledger-shop-decisions-unused.db")


class CardContext(BaseModel):
    """What the home screen knows about a shopper's visit."""

    user_tier: str
    cards: list[str]
    scores: list[float]


@dataclass
class Basket:
    items: int
    value: float


@ledger.decision("recipe-card")
def feature_card(ctx: CardContext, draw: dl.Draw, *, temperature: float = 0.7) -> str:
    """One draw: a softmax over the recommender's relevance scores."""
    return draw.softmax(ctx.cards, ctx.scores, temperature=temperature, name="card")


@ledger.decision("explore-card")
def explore_card(ctx: CardContext, draw: dl.Draw, *, epsilon: float = 0.2) -> str:
    """Explore or exploit: a coin with P(explore) = epsilon, then a uniform pick or the best."""
    if draw.bernoulli(epsilon, name="explore"):
        k = len(ctx.cards)
        return draw.categorical(ctx.cards, [1.0 / k] * k, name="any")
    return ctx.cards[ctx.scores.index(max(ctx.scores))]


@ledger.decision("card-row")
def card_row(ctx: CardContext, draw: dl.Draw, *, k: int = 3) -> list[str]:
    """An ordered row of k cards, Plackett-Luce over positive weights (the scores)."""
    return draw.slate(ctx.cards, ctx.scores, k, name="row")


@ledger.decision("card-badge")
def card_with_badge(ctx: CardContext, draw: dl.Draw, *, epsilon: float = 0.2,
                    badge: float = 0.5) -> dict[str, object]:  # fmt: skip
    """Three draws: an explore coin, a uniform pick, and a coin for a "new" badge."""
    explore = draw.bernoulli(epsilon, name="explore")
    k = len(ctx.cards)
    pick = draw.categorical(ctx.cards, [1.0 / k] * k, name="any")
    card = pick if explore else ctx.cards[ctx.scores.index(max(ctx.scores))]
    return {"card": card, "badge": draw.bernoulli(badge, name="badge")}


@ledger.decision("reminder-delay")
def reminder_delay(basket: Basket, draw: dl.Draw, *, nominal_minutes: float = 90.0,
                   spread: float = 0.6) -> float:  # fmt: skip
    """Minutes before a basket reminder: a log-normal around a nominal delay (its value)."""
    return draw.lognormal(math.log(nominal_minutes), spread, name="delay")


@ledger.decision("reminder-slot")
def reminder_slot(basket: Basket, draw: dl.Draw, *, nominal_minutes: float = 90.0,
                  spread: float = 0.6) -> int:  # fmt: skip
    """The reminder's half-hour slot: a continuous draw that is not itself the action."""
    minutes = draw.lognormal(math.log(nominal_minutes), spread, name="delay")
    return min(int(minutes // 30), 8)


@ledger.decision("delivery-slot")
def delivery_slot(basket: Basket, draw: dl.Draw) -> int:
    """Many branches: a slot out of 5000 (beyond a small enumeration budget)."""
    return draw.integers(0, 5000, name="slot") % 7


@ledger.decision("card-swap")
def card_swap(ctx: CardContext, draw: dl.Draw) -> str:
    """Nested choices: the first card directly (0.5), or after a swap (0.5 * 0.4): 0.7 in all."""
    first, second, third = ctx.cards[:3]
    if draw.categorical([first, second], [0.5, 0.5], name="pick") == first:
        return first
    return draw.categorical([first, third], [0.4, 0.6], name="swap")


DECISIONS = [feature_card, explore_card, card_row, card_with_badge, reminder_delay,
             reminder_slot, delivery_slot, card_swap]  # fmt: skip


def use(target: dl.Ledger) -> None:
    """Record every decision of this module into ``target``."""
    for decision in DECISIONS:
        decision.ledger = target


def context(i: int, tier: str = "plus") -> CardContext:
    """A deterministic context: scores rotate with ``i``, all positive."""
    scores = [1.0 + ((i + j) % 6) * 0.5 for j in range(6)]
    return CardContext(user_tier=tier, cards=CARDS, scores=scores)
