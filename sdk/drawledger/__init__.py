"""drawledger: record every randomized decision with its true probability.

The serving-side SDK. It imports nothing from the analysis stack (numpy, pandas, scipy);
replay, audit and estimates live in ``drawledger.replay``.
"""

from drawledger._ingest import IngestReport, ingest
from drawledger.draw import Draw
from drawledger.exceptions import (
    DecisionDefinitionError,
    DrawArgumentError,
    DrawledgerError,
    DuplicateDecisionError,
    LedgerClosedError,
    LedgerError,
    NotSerializableError,
    ReplayError,
    UnreplayableDecisionWarning,
)
from drawledger.ledger import Decision, Ledger

__version__ = "0.1.0.dev0"

__all__ = [
    "Decision",
    "DecisionDefinitionError",
    "Draw",
    "DrawArgumentError",
    "DrawledgerError",
    "DuplicateDecisionError",
    "IngestReport",
    "Ledger",
    "LedgerClosedError",
    "LedgerError",
    "NotSerializableError",
    "ReplayError",
    "UnreplayableDecisionWarning",
    "__version__",
    "ingest",
]
