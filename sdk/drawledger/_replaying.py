"""A replay records nothing: what decision code would record while it is re-executed raises.

Replay and estimation re-execute decision functions (``Decision.run``) and ask callable target
policies; ``REPLAYING`` names what is being re-executed in the current context (thread, task).
A decision called inside it, or an outcome, bucket or declared draw recorded inside it, raises
``ReplayError`` instead of writing to the service's ledger (docs/replay.md, "Reasons").
"""

from __future__ import annotations

from contextvars import ContextVar
from typing import NoReturn

from drawledger.exceptions import ReplayError

REPLAYING: ContextVar[str | None] = ContextVar("drawledger_replaying", default=None)

INNER_DECISION = (
    "a decision that calls another cannot be replayed (the inner one's draws are recorded "
    "apart, under its own seed); give the inner decision's action to the outer one as an "
    "input, or make its draws with the outer one's Draw"
)
RECORDS_INSIDE = (
    "decision code that records outcomes, buckets or declared draws cannot be replayed; "
    "record them outside the decision function"
)


def refuse(what: str, advice: str) -> NoReturn:
    """Raise ``ReplayError``: ``what`` would record while decision code is re-executed."""
    raise ReplayError(f"{what} was called inside {REPLAYING.get()}, which was being "
                      f"re-executed, and a replay records nothing: {advice}")  # fmt: skip
