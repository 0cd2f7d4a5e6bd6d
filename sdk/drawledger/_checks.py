"""Checks of the values a recording call is given, their redaction, the memory of recent
decision ids, and inputs that replay could not rebuild."""

from __future__ import annotations

import hashlib
import math
import numbers
import typing
import warnings
from collections import deque
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from drawledger import _records
from drawledger.exceptions import (
    DrawArgumentError,
    NotSerializableError,
    UnreplayableDecisionWarning,
)

__all__ = [
    "RecentIds",
    "declared_uniforms",
    "finite_number",
    "is_array_annotation",
    "plain_text",
    "redact",
    "timestamp",
    "warn_unrebuilt_inputs",
]


def finite_number(x: Any) -> float | None:
    """``x`` as a finite float: a bool, an int, a float or any other real number (numpy's
    integer, float and bool scalars); None for anything else, NaN, infinities and overflows."""
    if type(x) is not float:
        if not isinstance(x, numbers.Real) and not (
            type(x).__name__ in ("bool", "bool_") and type(x).__module__ == "numpy"
        ):
            return None
        try:
            x = float(x)
        except (OverflowError, TypeError, ValueError):
            return None
    return x if math.isfinite(x) else None


def declared_uniforms(kind: str, u: Any) -> list[float]:
    """The uniforms of a declared draw: a list of numbers strictly between 0 and 1, as every
    uniform of the draw specification is (and as ingest requires)."""
    if u is None:
        return []
    if isinstance(u, (str, bytes, Mapping)) or not isinstance(u, Sequence):
        raise DrawArgumentError(f"declared {kind} draw: u must be a list of uniforms, got {u!r}")
    out = []
    for i, x in enumerate(u):
        number = None if isinstance(x, bool) else finite_number(x)
        if number is None or not 0.0 < number < 1.0:
            raise DrawArgumentError(
                f"declared {kind} draw: u[{i}] is {x!r}, not a number strictly between 0 and 1"
            )
        out.append(number)
    return out


class RecentIds:
    """The last ``size`` decision ids given to a ledger (0: none), oldest forgotten first.

    The caller holds the lock that orders the recording calls.
    """

    __slots__ = ("_ids", "_order", "size")

    def __init__(self, size: int) -> None:
        self.size = size
        self._ids: set[str] = set()
        self._order: deque[str] = deque()

    def __contains__(self, decision_id: object) -> bool:
        return decision_id in self._ids

    def add(self, decision_id: str) -> None:
        if not self.size:
            return
        self._ids.add(decision_id)
        self._order.append(decision_id)
        if len(self._order) > self.size:
            self._ids.discard(self._order.popleft())


def timestamp(ts: Any) -> float:
    """A given ``ts`` as a float; a bad one is refused here rather than failing a whole batch."""
    if isinstance(ts, bool) or not isinstance(ts, (int, float)) or not math.isfinite(ts):
        raise NotSerializableError(f"ts must be a finite number of seconds, got {ts!r}")
    return float(ts) + 0.0  # + 0.0: -0.0 becomes 0.0 (docs/ledger.md)


def plain_text(*texts: str | None) -> None:
    """Refuse NUL characters (PostgreSQL text cannot hold them) and lone surrogates (no UTF-8)."""
    for text in texts:
        if text is None:
            continue
        if "\x00" in text:
            raise NotSerializableError(f"{text!r} contains a NUL character, which cannot be stored")
        if not text.isascii():
            try:
                text.encode()
            except UnicodeEncodeError:
                raise NotSerializableError(
                    f"{text!r} contains a lone surrogate, which is not text and cannot be stored"
                ) from None


def redact_value(value: Any, key: bytes) -> str:
    digest = hashlib.blake2b(_records.to_json(value, "redacted field").encode(), digest_size=16,
                             key=key, person=b"drawledger.r1")  # fmt: skip
    return "redacted:" + digest.hexdigest()


def redact(obj: Any, path: list[str], key: bytes) -> None:
    head, rest = path[0], path[1:]
    if isinstance(obj, dict) and head in obj:
        if rest:
            redact(obj[head], rest, key)
        else:
            obj[head] = redact_value(obj[head], key)
    elif isinstance(obj, list):
        for item in obj:
            redact(item, path, key)


def is_array_annotation(hint: Any) -> bool:
    """Whether an annotation is a numpy array (``np.ndarray``, ``npt.NDArray[np.float32]``)."""
    origin = typing.get_origin(hint) or hint
    return bool(getattr(origin, "__module__", None) == "numpy"
                and getattr(origin, "__name__", None) == "ndarray")  # fmt: skip


def warn_unrebuilt_inputs(fn: Callable[..., Any], name: str, inputs: Mapping[str, Any]) -> None:
    """Warn about inputs that replay would give the function as plain JSON values: objects of
    other types (a datetime, a tuple, a dataclass) whose parameter has no annotation, and numpy
    arrays whose parameter is not annotated as one (checked at a writer's first call)."""
    odd = {k: v for k, v in inputs.items()
           if not (v is None or isinstance(v, (str, int, float, list, dict)))}  # fmt: skip
    if not odd:
        return
    unresolved = None
    try:
        hints = typing.get_type_hints(fn)
    except Exception as exc:  # unresolvable annotations: replay rebuilds nothing either
        hints = {}
        unresolved = f"the function's annotations cannot be resolved: {type(exc).__name__}: {exc}"
    found = []
    for key, value in odd.items():
        kind, hint = type(value), hints.get(key)
        if kind.__module__ == "numpy":  # numpy scalars come back as Python numbers
            if kind.__name__ == "ndarray" and not is_array_annotation(hint):
                found.append(f"{key} is a numpy array ({unresolved or 'annotate it np.ndarray'})")
        elif hint is None or hint is Any or hint is object:
            found.append(f"{key} is a {kind.__name__} "
                         f"({unresolved or 'annotate it ' + kind.__name__})")  # fmt: skip
    if found:
        warnings.warn(
            f"decision {name}: input {'; '.join(found)}: it is recorded as JSON, and replay "
            "gives the function the plain JSON value (text, a list, an object) unless the "
            "parameter's annotation says what to rebuild",
            UnreplayableDecisionWarning,
            stacklevel=3,
        )
