"""Text from a ledger made safe to show on a terminal or a page.

A stream name, a decision id or a reason read from a ledger may hold anything: escape
sequences that recolour or rewrite a terminal, a carriage return or newline that forges a
line, bidirectional overrides that reverse what follows, lone surrogates that no encoder
accepts. ``visible`` replaces each such character with its escape as Python writes it
(``\\x1b``, ``\\u202e``), so the text shows what it holds and nothing else. ``clipped``
also shortens very long text for display.
"""

from __future__ import annotations

import re

__all__ = ["clipped", "counted", "visible"]

# C0 and C1 controls with DEL; the bidirectional marks, embeddings, overrides and isolates
# (Unicode Standard Annex #9); line and paragraph separators; invisible format characters
# (soft hyphen, zero-width characters, word joiner, byte order mark, interlinear annotation,
# tags); lone surrogates.
UNSAFE = re.compile(
    "[\x00-\x1f\x7f-\x9f\u00ad\u061c\u180e\u200b-\u200f\u2028-\u202e\u2060-\u206f"
    "\ufeff\ufff9-\ufffb\ud800-\udfff\U000e0000-\U000e007f]"
)


def _escape(match: re.Match[str]) -> str:
    code = ord(match.group())
    if code <= 0xFF:
        return f"\\x{code:02x}"
    return f"\\u{code:04x}" if code <= 0xFFFF else f"\\U{code:08x}"


def visible(text: object) -> str:
    """``text`` as a string with every control, bidirectional and invisible format character
    written as its escape (``\\x1b``, ``\\x0a`` for a newline, ``\\u202e``): one line."""
    return UNSAFE.sub(_escape, str(text))


def clipped(text: object, limit: int) -> str:
    """``visible(text)`` cut to at most ``limit`` characters, the last an ellipsis if cut."""
    shown = visible(text)
    return shown if len(shown) <= limit else shown[: max(limit - 1, 0)] + "…"


def counted(n: int, noun: str, plural: str | None = None) -> str:
    """``n`` and the noun agreeing with it: "1 writer", "3 writers", "0 decisions"."""
    return f"{n} {noun if n == 1 else (plural or noun + 's')}"
