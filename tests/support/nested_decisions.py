"""A decision that calls another decision (the inner one records apart, so the outer one
cannot be replayed) and one that records an outcome from inside. They are registered on a
placeholder ledger; ``use(ledger)`` points them at a test's own."""

from __future__ import annotations

import tempfile
from pathlib import Path

import drawledger as dl

_placeholder = dl.Ledger(Path(tempfile.gettempdir()) / "drawledger-nested-placeholder.db")


@_placeholder.decision("free-delivery")
def free_delivery(draw: dl.Draw, *, p: float = 0.5) -> bool:
    return draw.bernoulli(p, name="free")


@_placeholder.decision("checkout-banner")
def checkout_banner(draw: dl.Draw) -> str:
    """Shows the free-delivery banner when the inner decision grants it."""
    if free_delivery():
        return "free-delivery"
    return draw.categorical(["recipes", "deals"], [0.5, 0.5], name="banner")


@_placeholder.decision("reminder-sent")
def send_reminder(draw: dl.Draw, *, p: float = 0.5) -> bool:
    """Records an "exposure" outcome of its own decision from inside: a record in a replay."""
    sent = draw.bernoulli(p, name="send")
    send_reminder.ledger.outcome("exposure", "shown", float(sent))
    return sent


def use(ledger: dl.Ledger) -> None:
    for decision in (free_delivery, checkout_banner, send_reminder):
        decision.ledger = ledger
