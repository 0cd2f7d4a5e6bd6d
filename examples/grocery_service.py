"""A grocery-delivery API instrumented with drawledger (an invented scenario).

Two randomized decisions, recorded with their true probabilities:

* ``POST /home``: which recipe card to feature (softmax over relevance scores);
* ``POST /reminder``: minutes before a basket reminder (log-normal around a nominal delay);

and ``POST /outcome`` records whether the shopper checked out within 24 hours.

Run it on loopback (from the examples/ folder)::

    GROCERY_LEDGER=grocery.db uvicorn grocery_service:app --host 127.0.0.1 --port 8000

Replay can re-run these decisions later because they are module-level functions:
``drawledger verify grocery.db --path .``.
"""

from __future__ import annotations

import math
import os
import uuid
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI
from pydantic import BaseModel

import drawledger as dl

CARDS = [
    "one-pot-pasta",
    "green-curry",
    "sheet-pan-salmon",
    "taco-night",
    "lentil-soup",
    "overnight-oats",
]
# A stand-in recommender: relevance of each card per shopper segment.
RELEVANCE = {
    "family": [1.6, 0.7, 1.2, 1.8, 0.5, 0.4],
    "single": [1.2, 1.5, 1.1, 0.6, 0.6, 1.0],
    "plant-based": [0.9, 1.9, 0.1, 0.8, 1.4, 1.3],
    "budget": [1.7, 0.6, 0.2, 1.0, 1.5, 0.9],
}

# One ledger per process; the SQLite file is the embedded default.
ledger = dl.Ledger(os.environ.get("GROCERY_LEDGER", "grocery.db"))


class CardContext(BaseModel):
    segment: str
    cards: list[str]
    scores: list[float]


class Basket(BaseModel):
    items: int
    value: float


@ledger.decision("recipe-card")
def feature_card(ctx: CardContext, draw: dl.Draw, *, temperature: float = 0.7) -> str:
    return draw.softmax(ctx.cards, ctx.scores, temperature=temperature, name="card")


@ledger.decision("reminder-delay")
def reminder_delay(
    basket: Basket, draw: dl.Draw, *, nominal_minutes: float = 90.0, spread: float = 0.6
) -> float:
    return draw.lognormal(math.log(nominal_minutes), spread, name="delay")


class HomeRequest(BaseModel):
    shopper: str
    segment: str


class ReminderRequest(BaseModel):
    shopper: str
    items: int
    value: float


class OutcomeRequest(BaseModel):
    decision_id: str
    checkout: bool


@asynccontextmanager
async def lifespan(_app: FastAPI) -> AsyncIterator[None]:
    yield
    ledger.close()  # flush what is queued before the process exits


app = FastAPI(title="grocery-delivery (drawledger example)", lifespan=lifespan)


@app.post("/home")
def home(req: HomeRequest) -> dict[str, str]:
    ctx = CardContext(segment=req.segment, cards=CARDS, scores=RELEVANCE[req.segment])
    decision_id = uuid.uuid4().hex
    card = feature_card(ctx, unit=req.shopper, decision_id=decision_id)
    return {"decision_id": decision_id, "card": card}


@app.post("/reminder")
def reminder(req: ReminderRequest) -> dict[str, str | float]:
    decision_id = uuid.uuid4().hex
    delay = reminder_delay(
        Basket(items=req.items, value=req.value), unit=req.shopper, decision_id=decision_id
    )
    return {"decision_id": decision_id, "delay_minutes": delay}


@app.post("/outcome")
def outcome(req: OutcomeRequest) -> dict[str, str]:
    ledger.outcome(req.decision_id, "checkout", 1.0 if req.checkout else 0.0)
    return {"decision_id": req.decision_id}
