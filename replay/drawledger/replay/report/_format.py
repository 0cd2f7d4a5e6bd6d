"""How the report writes numbers, p-values and target policies as text."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["num", "p_value", "policy"]

MISSING = "–"


def num(x: float | None, digits: int = 4) -> str:
    """A count with thousands separators, or a number with ``digits`` digits; "–" if missing."""
    if x is None:
        return MISSING
    if isinstance(x, (int, np.integer)) and not isinstance(x, bool):
        return f"{int(x):,}"
    value = float(x)
    if not math.isfinite(value):
        return MISSING
    return (
        f"{value:.{digits}g}"
        if abs(value) >= 1e4 or 0 < abs(value) < 1e-3
        else f"{value:.{digits}f}"
    )


def p_value(x: float | None) -> str:
    if x is None:
        return MISSING
    return "< 0.0001" if x < 1e-4 else f"{x:.4f}"


def policy(target: Mapping[str, Any]) -> str:
    """A target policy in words: its callable, or its stream with the parameters it sets."""
    if "callable" in target:
        return str(target["callable"])
    overrides = target.get("overrides") or {}
    text = ", ".join(f"{k} = {v}" for k, v in overrides.items()) or "the logging policy"
    stream = target.get("stream")
    return f"{stream} with {text}" if stream else text
