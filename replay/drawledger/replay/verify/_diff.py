"""Where a replayed value differs from the recorded one, said in one line.

``mismatch`` is the one way every reason of verify words a difference: the path of the first
differing element (a key path and list indexes, ``scores[3]``) with both values there, in full
(the JSON report keeps it whole) and cut around the difference (the terminal).
"""

from __future__ import annotations

import difflib
import math
import re
from typing import Any

import orjson

from drawledger._records import JSON_OPTIONS, json_default
from drawledger.replay.verify._types import REL_TOL, SHOW

_IDENT = re.compile(r"^[A-Za-z_]\w*$")
_ABSENT = object()


def same(a: Any, b: Any) -> bool:
    """JSON values equal, numbers within 1e-12 relative."""
    if isinstance(a, bool) or isinstance(b, bool):
        return a is b
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        x, y = float(a), float(b)
        return x == y or abs(x - y) <= REL_TOL * max(abs(x), abs(y))
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(same(a[k], b[k]) for k in a)
    return bool(a == b)


def _key(path: str, key: Any) -> str:
    if isinstance(key, str) and _IDENT.match(key):
        return f"{path}.{key}" if path else key
    return f"{path}[{_text(key)}]"


def first_difference(a: Any, b: Any, path: str = "") -> tuple[str, Any, Any] | None:
    """The path of the first element where ``a`` and ``b`` differ, with both values there
    (``_ABSENT`` for a key or an index one of them lacks); None when they are the same."""
    if same(a, b):
        return None
    if isinstance(a, list) and isinstance(b, list):
        for i, (x, y) in enumerate(zip(a, b, strict=False)):
            found = first_difference(x, y, f"{path}[{i}]")
            if found is not None:
                return found
        n = min(len(a), len(b))
        return (f"{path}[{n}]", a[n] if n < len(a) else _ABSENT, b[n] if n < len(b) else _ABSENT)
    if isinstance(a, dict) and isinstance(b, dict):
        for key in [*a, *(k for k in b if k not in a)]:
            x, y = a.get(key, _ABSENT), b.get(key, _ABSENT)
            found = first_difference(x, y, _key(path, key))
            if found is not None:
                return found
    return path, a, b


def _text(value: Any) -> str:
    if value is _ABSENT:
        return "(absent)"
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)
    try:
        return orjson.dumps(value, default=json_default, option=JSON_OPTIONS).decode()
    except TypeError:
        return repr(value)


def _cut(text: str, at: int, width: int) -> str:
    """``text`` cut to about ``width`` characters around position ``at``."""
    if len(text) <= width:
        return text
    start = max(0, min(at - width // 3, len(text) - width))
    out = text[start : start + width]
    return ("..." if start > 0 else "") + out + ("..." if start + width < len(text) else "")


def _common(a: str, b: str) -> int:
    n = 0
    for x, y in zip(a, b, strict=False):
        if x != y:
            break
        n += 1
    return n


def mismatch(label: str, replayed: Any, recorded: Any) -> tuple[str, str]:
    """The difference of two values (decoded JSON, numbers, text) in full and cut for the
    terminal: ``"draw 0: arguments scores[3]: 1.2 replayed, 1.25 recorded"``."""
    found = first_difference(replayed, recorded)
    path, a, b = found if found is not None else ("", replayed, recorded)
    head = f"{label} {path}:" if path else label
    ta, tb = _text(a), _text(b)
    full = f"{head} {ta} replayed, {tb} recorded"
    at = _common(ta, tb)
    head = _cut(head, len(head), SHOW)
    short = f"{head} {_cut(ta, at, SHOW)} replayed, {_cut(tb, at, SHOW)} recorded"
    return full, short


def version_detail(fn: str, recorded: str, stored: str, current: str,
                   source: str | None) -> tuple[str, str]:  # fmt: skip
    """Why a record's code version was not found, with the unified diff from its stored
    source to the current source (whole), and its first changed lines (the terminal)."""
    head = (f"code version {recorded} of {fn} was not found; replayed under the current code "
            f"{current}")  # fmt: skip
    if source is None:
        text = f"{head} (its source cannot be read, so no diff)"
        return text, text
    lines = list(difflib.unified_diff(stored.splitlines(), source.splitlines(),
                                      fromfile=recorded, tofile=current, lineterm=""))  # fmt: skip
    removed = [line for line in lines[2:] if line[:1] == "-"]
    added = [line for line in lines[2:] if line[:1] == "+"]
    shown = []
    for i in range(max(len(removed), len(added))):  # each pair cut around where it differs
        old, new = (removed[i] if i < len(removed) else ""), (added[i] if i < len(added) else "")
        at = _common(old[1:], new[1:])
        shown += [line[0] + _cut(line[1:], at, SHOW) for line in (old, new) if line]
    short = f"{head}; first changes: " + " | ".join(shown[:4])
    return f"{head}; diff to the current code:\n" + "\n".join(lines), short
