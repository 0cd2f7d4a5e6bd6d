"""Decisions whose inputs are numpy arrays (annotated, so replay rebuilds them as arrays), and
one annotated with a class that cannot be rebuilt from JSON. Registered on a placeholder
ledger; ``use(ledger)`` points them at a test's own."""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import numpy.typing as npt

import drawledger as dl

_placeholder = dl.Ledger(Path(tempfile.gettempdir()) / "drawledger-array-placeholder.db")
CARDS = ["one-pot-pasta", "green-curry", "taco-night"]


class Basket(dict):  # type: ignore[type-arg]
    """A dict of its own: recorded as a JSON object, but pydantic has no schema for it."""


@_placeholder.decision("card-scores")
def feature_card(scores: np.ndarray, draw: dl.Draw, *, temperature: float = 0.7) -> str:
    return draw.softmax(CARDS, (scores / scores.max()).tolist(), temperature=temperature)


@_placeholder.decision("card-scores-32")
def feature_card_32(scores: npt.NDArray[np.float32], draw: dl.Draw) -> str:
    assert scores.dtype == np.float32, scores.dtype  # rebuilt with the annotated dtype
    return draw.softmax(CARDS, scores.tolist(), temperature=0.7)


@_placeholder.decision("basket-reminder")
def remind(basket: Basket, draw: dl.Draw) -> bool:
    return draw.bernoulli(0.5 if basket["items"] else 0.1)


def use(ledger: dl.Ledger) -> None:
    for decision in (feature_card, feature_card_32, remind):
        decision.ledger = ledger
