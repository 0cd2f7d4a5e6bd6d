"""The quickstart's recipe-card decision: a softmax over six cards of the home screen.

Tests and benchmarks register it on their own ledger with ``make_decision(ledger)`` and call it
with ``CARDS`` and ``SCORES``.
"""

from __future__ import annotations

import drawledger as dl

CARDS = ["one-pot-pasta", "green-curry", "sheet-pan-salmon", "taco-night", "lentil-soup",
         "overnight-oats"]  # fmt: skip
SCORES = [1.6, 0.7, 1.2, 1.8, 0.5, 0.4]


def make_decision(ledger: dl.Ledger) -> dl.Decision[str]:
    """Register the decision on ``ledger`` under the stream "recipe-card"."""

    @ledger.decision("recipe-card")
    def feature_card(
        cards: list[str], scores: list[float], draw: dl.Draw, *, temperature: float = 0.7
    ) -> str:
        return draw.softmax(cards, scores, temperature=temperature, name="card")

    return feature_card
