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
import unicodedata

__all__ = ["clipped", "counted", "visible"]

# The Unicode general categories never shown as they are: controls (Cc: C0, C1 and DEL),
# format characters (Cf: the bidirectional marks, embeddings, overrides and isolates of
# Unicode Standard Annex #9, soft hyphen, zero-width characters, tags, ...), surrogates (Cs),
# line and paragraph separators (Zl, Zp), and code points unassigned in this Python's Unicode
# database (Cn), which a newer terminal may treat as any of these.
UNSAFE_CATEGORIES = frozenset({"Cc", "Cf", "Cs", "Zl", "Zp", "Cn"})
_ASCII_UNSAFE = re.compile("[\x00-\x1f\x7f]")


def _escape(match: re.Match[str]) -> str:
    return _escape_code(ord(match.group()))


def _escape_code(code: int) -> str:
    if code <= 0xFF:
        return f"\\x{code:02x}"
    return f"\\u{code:04x}" if code <= 0xFFFF else f"\\U{code:08x}"


def visible(text: object) -> str:
    """``text`` as a string with every control, bidirectional and invisible format character
    written as its escape (``\\x1b``, ``\\x0a`` for a newline, ``\\u202e``): one line."""
    shown = str(text)
    if shown.isascii():
        return _ASCII_UNSAFE.sub(_escape, shown)
    return "".join(
        _escape_code(ord(c)) if unicodedata.category(c) in UNSAFE_CATEGORIES else c for c in shown
    )


def clipped(text: object, limit: int) -> str:
    """``visible(text)`` cut to at most ``limit`` characters, the last an ellipsis if cut."""
    shown = visible(text)
    return shown if len(shown) <= limit else shown[: max(limit - 1, 0)] + "…"


def counted(n: int, noun: str, plural: str | None = None) -> str:
    """``n`` and the noun agreeing with it: "1 writer", "3 writers", "0 decisions"."""
    return f"{n} {noun if n == 1 else (plural or noun + 's')}"
