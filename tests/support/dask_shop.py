"""Grocery decisions for the Dask engine tests, one of which can take its Dask worker down.

``feature_card`` is the usual softmax over relevance scores. When its recorded context names a
``fuse`` directory and the call runs inside a Dask worker, the call removes one file from that
directory and ends the worker process (as a decision that exhausts a worker's memory would).
Outside a Dask worker (recording, the local engine) the fuse is never touched.
"""

from __future__ import annotations

import math
import os
import tempfile
from pathlib import Path
from typing import Any

import drawledger as dl

CARDS = ["one-pot-pasta", "green-curry", "sheet-pan-salmon", "taco-night", "lentil-soup",
         "overnight-oats"]  # fmt: skip
SEGMENTS = ["family", "single", "plant-based", "budget"]
SCORES = [
    [1.6, 0.7, 1.2, 1.8, 0.5, 0.4],
    [1.2, 1.5, 1.1, 0.6, 0.6, 1.0],
    [0.9, 1.9, 0.1, 0.8, 1.4, 1.3],
    [1.7, 0.6, 0.2, 1.0, 1.5, 0.9],
]
# The invented shoppers' checkout chance for each card, by segment (the simulator's truth).
CHECKOUT = [
    [0.40, 0.20, 0.30, 0.45, 0.15, 0.10],
    [0.30, 0.35, 0.25, 0.20, 0.20, 0.30],
    [0.25, 0.45, 0.05, 0.20, 0.40, 0.35],
    [0.40, 0.15, 0.10, 0.25, 0.35, 0.20],
]

_placeholder = dl.Ledger(Path(tempfile.gettempdir()) / "drawledger-dask-shop-placeholder.db")


def _in_dask_worker() -> bool:
    try:
        from distributed import get_worker

        get_worker()
    except (ImportError, ValueError):
        return False
    return True


def _burn(fuse: str) -> None:
    """Remove one fuse file (atomically: one process wins it) and end this worker process."""
    for name in sorted(os.listdir(fuse)):
        try:
            os.unlink(os.path.join(fuse, name))
        except FileNotFoundError:
            continue
        os._exit(70)


@_placeholder.decision("recipe-card")
def feature_card(ctx: dict[str, Any], draw: dl.Draw, *, temperature: float = 0.7) -> str:
    """Softmax over the relevance scores of the shopper's segment."""
    fuse = ctx.get("fuse")
    if fuse and os.path.isdir(fuse) and _in_dask_worker():
        _burn(fuse)
    return draw.softmax(ctx["cards"], ctx["scores"], temperature=temperature, name="card")


@_placeholder.decision("reminder-delay")
def reminder_delay(basket: dict[str, Any], draw: dl.Draw, *, nominal_minutes: float = 90.0,
                   spread: float = 0.6) -> float:  # fmt: skip
    """Minutes before the basket reminder: a log-normal multiplier around a nominal delay."""
    return draw.lognormal(math.log(nominal_minutes), spread, name="delay")


def use(ledger: dl.Ledger) -> None:
    """Record the decisions of this module into ``ledger``."""
    feature_card.ledger = ledger
    reminder_delay.ledger = ledger


def context(i: int, fuse: str | None = None) -> dict[str, Any]:
    segment = i % len(SEGMENTS)
    ctx: dict[str, Any] = {"segment": SEGMENTS[segment], "cards": CARDS,
                           "scores": SCORES[segment]}  # fmt: skip
    if fuse is not None:
        ctx["fuse"] = fuse
    return ctx
