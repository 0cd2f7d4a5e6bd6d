"""Off-policy estimates (IPS, SNIPS, clipped IPS, doubly robust) from verified records."""

from drawledger.replay.estimate._report import (
    Estimate,
    EstimateReport,
    SweepReport,
    interval_label,
    other_versions,
)
from drawledger.replay.estimate._run import estimate, sweep

__all__ = [
    "Estimate",
    "EstimateReport",
    "SweepReport",
    "estimate",
    "interval_label",
    "other_versions",
    "sweep",
]
