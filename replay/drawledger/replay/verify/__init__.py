"""Replay verification: every recorded decision re-executed and compared with its record."""

from drawledger.replay.verify._chunk import verify_chunk
from drawledger.replay.verify._export import BASE_COLUMNS
from drawledger.replay.verify._imports import (
    immutable,
    import_allowed,
    load_inputs,
    load_params,
    lookup_qualname,
    resolve_decision,
)
from drawledger.replay.verify._one import DecisionView, verify_one
from drawledger.replay.verify._report import VerifyReport
from drawledger.replay.verify._run import verify
from drawledger.replay.verify._types import NOT_FAILING, REASONS, Settings, absolute_paths

__all__ = [
    "BASE_COLUMNS",
    "NOT_FAILING",
    "REASONS",
    "DecisionView",
    "Settings",
    "VerifyReport",
    "absolute_paths",
    "immutable",
    "import_allowed",
    "load_inputs",
    "load_params",
    "lookup_qualname",
    "resolve_decision",
    "verify",
    "verify_chunk",
    "verify_one",
]
