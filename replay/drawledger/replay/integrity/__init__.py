"""The ledger's integrity: hash chains per writer, duplicates, gaps and orphans."""

from drawledger.replay.integrity._check import check_integrity
from drawledger.replay.integrity._dask import IntegrityTasks
from drawledger.replay.integrity._engine import check_on
from drawledger.replay.integrity._report import (
    PROBLEMS,
    IntegrityReport,
    Rec,
    decision_rec,
    outcome_rec,
    walk,
)

__all__ = [
    "PROBLEMS",
    "IntegrityReport",
    "IntegrityTasks",
    "Rec",
    "check_integrity",
    "check_on",
    "decision_rec",
    "outcome_rec",
    "walk",
]
