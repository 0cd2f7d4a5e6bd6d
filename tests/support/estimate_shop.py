"""Decision code of the grocery-delivery scenario used by the estimate tests.

The decisions are registered at import on a placeholder ledger; a test points them at its own
ledger with ``use(ledger)``. ``simulate`` records sessions with seeded outcomes whose checkout
probabilities are known, so tests can compare estimates with the true value of a policy.
"""

from __future__ import annotations

import functools
import math
import random
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

import drawledger as dl
from drawledger.draw import epsilon_greedy_probs, softmax_probs

CARDS = ["one-pot-pasta", "green-curry", "sheet-pan-salmon", "taco-night", "lentil-soup",
         "overnight-oats"]  # fmt: skip
SEGMENTS = ["family", "single", "plant-based", "budget"]
# Relevance scores the decision sees, per segment, and the true checkout rate of each card.
SCORES = np.array([
    [1.6, 0.7, 1.2, 1.8, 0.5, 0.4],
    [1.2, 1.5, 1.1, 0.6, 0.6, 1.0],
    [0.9, 1.9, 0.1, 0.8, 1.4, 1.3],
    [1.7, 0.6, 0.2, 1.0, 1.5, 0.9],
])  # fmt: skip
CHECKOUT = np.array([
    [0.40, 0.20, 0.30, 0.45, 0.15, 0.10],
    [0.30, 0.35, 0.25, 0.20, 0.20, 0.30],
    [0.25, 0.45, 0.05, 0.20, 0.40, 0.35],
    [0.40, 0.15, 0.10, 0.25, 0.35, 0.20],
])  # fmt: skip

_placeholder = dl.Ledger(Path(tempfile.gettempdir()) / "drawledger-estimate-placeholder.db")


@_placeholder.decision("recipe-card")
def feature_card(ctx: dict[str, Any], draw: dl.Draw, *, temperature: float = 0.7) -> str:
    """Softmax over the relevance scores of the shopper's segment."""
    return draw.softmax(ctx["cards"], ctx["scores"], temperature=temperature, name="card")


@_placeholder.decision("greedy-card")
def greedy_card(ctx: dict[str, Any], draw: dl.Draw, *, epsilon: float = 0.0) -> str:
    """Epsilon-greedy over the relevance scores (epsilon 0: always the best-scored card)."""
    return draw.epsilon_greedy(ctx["cards"], ctx["scores"], epsilon=epsilon, name="card")


@_placeholder.decision("reminder-delay")
def reminder_delay(basket: dict[str, Any], draw: dl.Draw, *, nominal_minutes: float = 90.0,
                   spread: float = 0.6) -> float:  # fmt: skip
    """Minutes before the basket reminder: a log-normal multiplier around a nominal delay."""
    return draw.lognormal(math.log(nominal_minutes), spread, name="delay")


@_placeholder.decision("reminder-window")
def reminder_window(basket: dict[str, Any], draw: dl.Draw, *, window: float = 60.0) -> float:
    """Minutes before the reminder, uniform over a window."""
    return draw.uniform(0.0, window, name="delay")


@_placeholder.decision("explore-card")
def explore_card(ctx: dict[str, Any], draw: dl.Draw, *, explore: float = 0.2) -> str:
    """Two draws: a coin decides to explore (any card, uniformly) or to show the best card."""
    if draw.bernoulli(explore, name="explore"):
        return draw.categorical(ctx["cards"], [1 / len(ctx["cards"])] * len(ctx["cards"]))
    return ctx["cards"][int(np.argmax(ctx["scores"]))]


@_placeholder.decision("send-reminder")
def send_reminder(draw: dl.Draw, *, p: float = 0.5) -> bool:
    """No inputs: a coin decides whether to send a basket reminder at all."""
    return draw.bernoulli(p, name="send")


@_placeholder.decision("mixed-delay")
def mixed_delay(basket: dict[str, Any], draw: dl.Draw, *, share: float = 0.5) -> float:
    """A coin picks a short (about 30 minutes) or a long (about 90 minutes) normal delay."""
    if draw.bernoulli(share, name="short"):
        return draw.normal(30.0, 5.0, name="delay")
    return draw.normal(90.0, 15.0, name="delay")


@_placeholder.decision("coupon-code")
def coupon_code(draw: dl.Draw, *, codes: int = 10_000) -> int:
    """A coupon code out of more than the enumeration budget: one-draw propensities."""
    return draw.integers(0, codes, name="code")


_SLOPPY = random.Random(5)


@_placeholder.decision("sloppy-card")
def sloppy_card(ctx: dict[str, Any], draw: dl.Draw, *, temperature: float = 0.7) -> str:
    """A bug: the card comes from the random module, not from ``draw``, so nothing records
    its probability and replay picks another card unless it matches by chance."""
    probs = softmax_probs(ctx["scores"], temperature)
    return _SLOPPY.choices(ctx["cards"], probs)[0]


DECISIONS = (feature_card, greedy_card, reminder_delay, reminder_window, explore_card,
             send_reminder, mixed_delay, sloppy_card, coupon_code)  # fmt: skip


def use(ledger: dl.Ledger, seed: int | None = None) -> None:
    """Record the decisions of this module into ``ledger`` (seeded draws when ``seed`` is set).

    Seeded draws make the tests reproducible; production seeds come from the OS CSPRNG.
    """
    for d in DECISIONS:
        d.ledger = ledger
    if seed is not None:
        ledger._seed_source = functools.partial(random.Random(seed).randbytes, 16)


def context(segment: int) -> dict[str, Any]:
    return {"segment": SEGMENTS[segment], "cards": CARDS, "scores": SCORES[segment].tolist()}


def segments(n: int, seed: int) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, len(SEGMENTS), size=n)


def simulate_cards(ledger: dl.Ledger, n: int, *, seed: int = 1, decision: Any = feature_card,
                   **params: Any) -> None:  # fmt: skip
    """Record ``n`` recipe-card decisions with seeded draws and checkout outcomes."""
    use(ledger, seed)
    rng = np.random.default_rng(seed + 1)
    for i, seg in enumerate(segments(n, seed)):
        did = f"card-{seed}-{i}"
        card = decision(context(int(seg)), decision_id=did, **params)
        p = CHECKOUT[seg, CARDS.index(card)]
        ledger.outcome(did, "checkout", float(rng.random() < p))
    ledger.flush()


def true_card_value(n: int, seed: int, probs: np.ndarray) -> float:
    """Expected checkout rate over the simulated contexts of a policy with (4, 6) probs."""
    seg = segments(n, seed)
    return float((probs * CHECKOUT).sum(axis=1)[seg].mean())


def softmax_table(temperature: float) -> np.ndarray:
    return np.array([softmax_probs(list(s), temperature) for s in SCORES])


def greedy_table(epsilon: float) -> np.ndarray:
    return np.array([epsilon_greedy_probs(list(s), epsilon) for s in SCORES])


def best_card(inputs: dict[str, Any], action: Any) -> float:
    """A callable target: always the best-scored card (probability 1 on it, else 0)."""
    ctx = inputs["ctx"]
    best = ctx["cards"][int(np.argmax(ctx["scores"]))]
    return 1.0 if action == best else 0.0


def simulate_delays(ledger: dl.Ledger, n: int, *, seed: int = 1, decision: Any = reminder_delay,
                    **params: Any) -> None:  # fmt: skip
    """Record ``n`` reminder decisions (seeded); checkout is likelier near a 40-minute delay."""
    use(ledger, seed)
    rng = np.random.default_rng(seed + 1)
    for i in range(n):
        did = f"delay-{seed}-{i}"
        minutes = decision({"items": 3}, decision_id=did, **params)
        ledger.outcome(did, "checkout", float(rng.random() < delay_checkout(minutes)))
    ledger.flush()


def delay_checkout(minutes: float) -> float:
    x = math.log(max(minutes, 1e-9) / 40.0)
    return 0.2 + 0.3 * math.exp(-x * x / (2 * 0.7**2))
