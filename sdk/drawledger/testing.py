"""In-memory capture of what decision code drew and recorded, for a service's own unit tests.

```python
import drawledger.testing

with drawledger.testing.capture(ledger, seed=7) as cap:
    card = feature_card(ctx, unit="rider-17")
assert cap.decisions[0].action == card
assert cap.draws[0].kind == "softmax"
```

While a capture is open, every decision, draw and outcome this process records through
``ledger`` is parsed into plain objects on the capture. By default the records stop there and
nothing reaches the ledger's storage (``write=True`` lets them through as well). With ``seed``
the decisions get reproducible seeds: the n-th decision of the capture (n = 0, 1, ...) uses
``blake2b(n as 8 little-endian bytes, digest_size=16, key=base, person=b"drawledger.t1")``,
where ``base`` is the seed as bytes. Production code never does this; seeds there come from
the operating system's CSPRNG.
"""

from __future__ import annotations

import hashlib
import itertools
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, fields
from typing import Any

from drawledger._records import from_json
from drawledger._schema import DECISIONS, DRAWS, OUTCOMES, TableSpec
from drawledger.exceptions import DrawArgumentError
from drawledger.ledger import Ledger

__all__ = ["Capture", "CapturedDecision", "CapturedDraw", "CapturedOutcome", "capture"]

SEED_PERSON = b"drawledger.t1"


@dataclass(frozen=True)
class CapturedDraw:
    """One draw, as the ``draws`` table holds it, with its JSON fields parsed."""

    decision_id: str
    idx: int
    name: str | None
    kind: str
    args: dict[str, Any]
    u: list[float]
    value: Any
    prob: float
    is_density: bool


@dataclass(frozen=True)
class CapturedDecision:
    """One decision, as the ``decisions`` table holds it, with its JSON fields parsed."""

    decision_id: str
    stream: str
    unit: str | None
    ts: float
    fn: str | None
    code_hash: str | None
    inputs: dict[str, Any]
    params: dict[str, Any]
    action: Any
    propensity: float
    propensity_kind: str
    seed: str | None
    writer: str
    seq: int
    prev_hash: str | None
    hash: str
    draws: list[CapturedDraw] = field(default_factory=list)


@dataclass(frozen=True)
class CapturedOutcome:
    """One outcome, as the ``outcomes`` table holds it."""

    decision_id: str
    name: str
    value: float
    ts: float
    writer: str
    seq: int


def _parsed(table: TableSpec, row: tuple[Any, ...]) -> dict[str, Any]:
    """A stored row of ``table`` by column name, with its JSON columns parsed."""
    return {c.name: from_json(x) if c.json else x for c, x in zip(table.columns, row, strict=True)}


def _draw(row: tuple[Any, ...]) -> CapturedDraw:
    values = _parsed(DRAWS, row)
    values["is_density"] = bool(values["is_density"])
    return CapturedDraw(**values)


def _decision(row: tuple[Any, ...], draw_rows: list[tuple[Any, ...]]) -> CapturedDecision:
    return CapturedDecision(**_parsed(DECISIONS, row), draws=[_draw(d) for d in draw_rows])


def _outcome(row: tuple[Any, ...]) -> CapturedOutcome:
    values = _parsed(OUTCOMES, row)
    return CapturedOutcome(**{f.name: values[f.name] for f in fields(CapturedOutcome)})


class Capture:
    """What a ``capture()`` block recorded, in order."""

    def __init__(self) -> None:
        self.decisions: list[CapturedDecision] = []
        self.outcomes: list[CapturedOutcome] = []

    @property
    def draws(self) -> list[CapturedDraw]:
        """Every draw of every captured decision, in order."""
        return [d for decision in self.decisions for d in decision.draws]

    @property
    def actions(self) -> list[Any]:
        """The action of every captured decision, in order."""
        return [d.action for d in self.decisions]

    def stream(self, name: str) -> list[CapturedDecision]:
        """The captured decisions of one stream."""
        return [d for d in self.decisions if d.stream == name]

    def clear(self) -> None:
        """Forget what was captured so far (the capture stays open)."""
        self.decisions.clear()
        self.outcomes.clear()

    def _take(self, item: Any) -> None:
        if item[0] == "d":
            self.decisions.append(_decision(item[1], item[2]))
        elif item[0] == "o":
            self.outcomes.append(_outcome(item[1]))

    def __repr__(self) -> str:
        return f"<Capture decisions={len(self.decisions)} outcomes={len(self.outcomes)}>"


def seed_bytes(seed: int | bytes | str) -> bytes:
    """The capture's base seed as bytes: an int as 16 little-endian bytes, a str as UTF-8."""
    if isinstance(seed, bool) or not isinstance(seed, (int, bytes, str)):
        raise DrawArgumentError(
            f"capture seed must be an int, bytes or str, got {type(seed).__name__}"
        )
    if isinstance(seed, int):
        if not 0 <= seed < 2**128:
            raise DrawArgumentError(f"capture seed must lie in [0, 2**128), got {seed}")
        return seed.to_bytes(16, "little")
    base = seed.encode() if isinstance(seed, str) else seed
    if not 1 <= len(base) <= 64:
        raise DrawArgumentError("capture seed must be 1 to 64 bytes long")
    return base


def seed_sequence(seed: int | bytes | str) -> Callable[[], bytes]:
    """A source of reproducible decision seeds: the n-th call returns seed n of ``seed``."""
    base = seed_bytes(seed)
    counter = itertools.count()

    def next_seed() -> bytes:
        n = next(counter)
        return hashlib.blake2b(
            n.to_bytes(8, "little"), digest_size=16, key=base, person=SEED_PERSON
        ).digest()

    return next_seed


@contextmanager
def reproducible_seeds(ledger: Ledger, seed: int | bytes | str) -> Iterator[None]:
    """Decisions made through ``ledger`` while the block runs get the seeds of
    ``seed_sequence(seed)`` (see the module docstring): for simulations, demos and tests only."""
    with ledger._lock:
        saved = ledger._seed_source
        ledger._seed_source = seed_sequence(seed)
    try:
        yield
    finally:
        with ledger._lock:
            ledger._seed_source = saved


@contextmanager
def capture(
    ledger: Ledger, *, seed: int | bytes | str | None = None, write: bool = False
) -> Iterator[Capture]:
    """Capture what ``ledger`` records in this process while the block runs.

    ``seed`` makes the decisions' seeds reproducible (see the module docstring). With
    ``write=False`` (the default) captured records are not written to the ledger's storage,
    and the ledger's sequence numbers and hash chain continue after the block as if the
    captured records had never been made.
    """
    cap = Capture()
    source = seed_sequence(seed) if seed is not None else None

    def tap(item: Any) -> bool:
        cap._take(item)
        return not write

    with ledger._lock:
        # Records queued before the block take their places in the chain now, so that the
        # chain can be wound back to this point afterwards.
        saved_chain = ledger._writer.seal_queued()
        saved_source = ledger._seed_source
        ledger._taps.append(tap)
        if source is not None:
            ledger._seed_source = source
    try:
        yield cap
    finally:
        with ledger._lock:
            ledger._taps.remove(tap)
            if source is not None:
                ledger._seed_source = saved_source
            if not write:
                chain = ledger._writer.chain
                with chain.lock:
                    chain.seq, chain.prev = saved_chain
