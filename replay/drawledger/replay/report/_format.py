"""How the report writes numbers, p-values and target policies as text."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from markupsafe import Markup, escape

from drawledger._text import clipped, visible

__all__ = ["NAME_LIMIT", "name", "num", "p_value", "plain", "policy"]

MISSING = "–"

# Names from a ledger (streams, draws, decision ids, targets) are cut to this many characters
# on the page; the whole name is the element's title (its tooltip).
NAME_LIMIT = 60


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


def plain(value: object) -> object:
    """What the page prints for ``{{ value }}``: text with control and bidirectional characters
    as escapes (``\\x1b``, ``\\u202e``); markup the templates built, and numbers, as they are."""
    if isinstance(value, Markup) or not isinstance(value, str):
        return value
    return visible(value)


def name(value: object, limit: int = NAME_LIMIT) -> Markup:
    """A name from a ledger as an isolated span: escaped, cut to ``limit`` characters with an
    ellipsis, and when cut, the whole (escaped) name as its title."""
    whole = visible(value)
    shown = clipped(whole, limit)
    title = Markup(' title="{}"').format(whole) if shown != whole else ""
    return Markup('<span class="name"{}>{}</span>').format(title, escape(shown))
