"""The live guard: continuous verification and audit of a growing ledger (docs/guard.md)."""

from drawledger.replay.guard._evidence import (
    ALPHA,
    CONCENTRATION,
    log_mixture_e,
    threshold,
    window_test,
)
from drawledger.replay.guard._report import GuardReport, alarm_line
from drawledger.replay.guard._run import GAP_WAIT, PIECE_SIZE, WINDOW, guard
from drawledger.replay.guard._state import GuardState, load_state, save_state

__all__ = [
    "ALPHA",
    "CONCENTRATION",
    "GAP_WAIT",
    "PIECE_SIZE",
    "WINDOW",
    "GuardReport",
    "GuardState",
    "alarm_line",
    "guard",
    "load_state",
    "log_mixture_e",
    "save_state",
    "threshold",
    "window_test",
]
