"""Ledger text for rich: never read as markup, emoji codes or escape sequences.

Every text that comes from a ledger (stream names, decision ids, reasons, warnings, input
values) reaches rich through ``shown``: a ``rich.text.Text`` (so ``[/]`` or ``[link=...]`` is
text, not markup) of ``drawledger._text.visible`` (so control and bidirectional characters
appear as escapes such as ``\\x1b`` and ``\\u202e``).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from drawledger._text import visible

if TYPE_CHECKING:
    from rich.text import Text

__all__ = ["plain_text", "shown", "warning"]


def shown(value: object, style: str = "") -> Text:
    """``value`` as rich text, shown exactly as written (with control characters escaped)."""
    from rich.text import Text

    return Text(visible(value), style=style)


def warning(text: object) -> Text:
    """A warning line: "warning:" in yellow, then ``text`` shown as written."""
    from rich.text import Text

    return Text.assemble(("warning:", "yellow"), " ", visible(text))


def plain_text(renderable: object, width: int = 110) -> str:
    """``renderable`` (a report, a table) as plain text ``width`` columns wide: no colour and
    no escape sequence, as ``render()`` gives it."""
    import io

    from rich.console import Console

    buffer = io.StringIO()
    Console(file=buffer, width=width, color_system=None, highlight=False).print(renderable)
    return buffer.getvalue().rstrip("\n")
