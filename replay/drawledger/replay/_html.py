"""The small HTML table every report shows in a notebook (``_repr_html_``)."""

from __future__ import annotations

import html
import math
from collections.abc import Iterable, Sequence

from drawledger._text import visible


def cell(value: object) -> str:
    """A value as table text: None as "-", floats with 4 significant digits."""
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.4g}" if math.isfinite(value) else str(value)
    return str(value)


def _text(value: str) -> str:
    """Escaped text with control and bidirectional characters shown as escapes (``\\u202e``)."""
    return html.escape(visible(value))


def html_table(
    caption: str, head: Sequence[str], rows: Iterable[Sequence[object]], notes: Iterable[str] = ()
) -> str:
    """A table with a caption, then one paragraph per note; every text is escaped."""
    parts = [f"<table><caption>{_text(caption)}</caption><thead><tr>"]
    parts += [f"<th>{_text(h)}</th>" for h in head]
    parts.append("</tr></thead><tbody>")
    for row in rows:
        parts.append("<tr>" + "".join(f"<td>{_text(cell(v))}</td>" for v in row) + "</tr>")
    parts.append("</tbody></table>")
    parts += [f"<p>{_text(note)}</p>" for note in notes]
    return "".join(parts)
