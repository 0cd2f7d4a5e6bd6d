"""Off-policy estimates (IPS, SNIPS, clipped IPS, doubly robust) from verified records."""

from drawledger.replay.estimate._report import Estimate, EstimateReport, SweepReport
from drawledger.replay.estimate._run import estimate, sweep

__all__ = [
    "Estimate",
    "EstimateReport",
    "SweepReport",
    "estimate",
    "sweep",
]
