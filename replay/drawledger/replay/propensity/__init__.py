"""Propensities by enumeration of a decision's branches (exact), or by Monte Carlo."""

from drawledger.replay.propensity._enumerate import (
    DEFAULT_BUDGET,
    DEFAULT_MC_SAMPLES,
    DENSITY,
    EXACT,
    MONTE_CARLO,
    ONE_DRAW,
    Memo,
    Propensity,
    action_distribution,
    from_run,
    propensity,
    read,
    remembered,
    single_draw_probability,
)

__all__ = [
    "DEFAULT_BUDGET",
    "DEFAULT_MC_SAMPLES",
    "DENSITY",
    "EXACT",
    "MONTE_CARLO",
    "ONE_DRAW",
    "Memo",
    "Propensity",
    "action_distribution",
    "from_run",
    "propensity",
    "read",
    "remembered",
    "single_draw_probability",
]
