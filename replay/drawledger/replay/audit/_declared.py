"""Reading declared draw arguments: numbers, option keys and declared probabilities."""

from __future__ import annotations

import contextlib
import math
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import orjson

from drawledger.draw import PROB_SUM_TOLERANCE
from drawledger.replay.audit._limits import IntArray
from drawledger.replay.audit._stats import FloatArray

if TYPE_CHECKING:
    pass


class Invalid(Exception):
    """A declared distribution that is not one (the message names the problem)."""


def canon(obj: Any) -> str:
    """JSON text of a value, with integral floats written as integers (5.0 and 5 match)."""
    if obj.__class__ is float and obj.is_integer() and abs(obj) < 2.0**63:
        obj = int(obj)
    return orjson.dumps(obj, option=orjson.OPT_NON_STR_KEYS).decode()


def arm_key(obj: Any) -> str:
    """Bucket arms are JSON object keys, so they compare as strings ("1" and 1 match)."""
    return canon(obj if isinstance(obj, str) else orjson.dumps(obj).decode())


def real(a: Mapping[str, Any], name: str) -> float:
    x = a.get(name)
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
        raise Invalid(f"{name} is not a finite number")
    return float(x)


def integer(a: Mapping[str, Any], name: str) -> int:
    x = a.get(name)
    if isinstance(x, float) and x.is_integer():
        x = int(x)
    if isinstance(x, bool) or not isinstance(x, int):
        raise Invalid(f"{name} is not an integer")
    return x


def integer_range(a: Mapping[str, Any]) -> tuple[int, int]:
    low, high = integer(a, "low"), integer(a, "high")
    if low >= high:
        raise Invalid("low is not below high")
    return low, high


@dataclass
class Parsed:
    """One group of draws, parsed: which draws are consistent, and their steps.

    A step is one categorical pick (a slate draw has k of them) or one continuous draw. The PIT
    value of a step is ``lo + V * width`` with V uniform from a keyed hash (Czado, Gneiting &
    Held 2009: lo = F(x-1) and width = P(x) for a discrete step, lo = F(x), width = 0 for a
    continuous one).
    """

    problems: Counter[str]
    ok: npt.NDArray[np.bool_]
    declared: FloatArray  # declared probability (or density) of each draw's value
    row: IntArray  # draw of each step (steps of consistent draws only)
    step: IntArray
    lo: FloatArray
    width: FloatArray
    # discrete kinds: the option cells, flattened over steps
    keys: list[str] | None = None
    flat_step: IntArray | None = None
    flat_key: IntArray | None = None
    flat_p: FloatArray | None = None
    chosen: IntArray | None = None  # index into the flat arrays of each step's pick
    signature: tuple[tuple[str, ...], tuple[float, ...]] | None = None
    varying: bool = False
    note: str | None = None  # why the ratio test does not apply


def load_texts(texts: npt.NDArray[Any] | list[Any]) -> list[Any]:
    """Parse JSON texts; a text that is not JSON becomes BAD_JSON."""
    try:
        return list(map(orjson.loads, texts))
    except (orjson.JSONDecodeError, TypeError):
        return [_load_one(t) for t in texts]


def _load_one(text: Any) -> Any:
    try:
        return orjson.loads(text)
    except (orjson.JSONDecodeError, TypeError):
        return BAD_JSON


BAD_JSON = object()


def number_matrix(xs: list[Any], k: int) -> FloatArray:
    """Lists of k numbers as rows of a matrix; a row that is not one is NaN."""
    try:
        out = np.array(xs, dtype=np.float64)
        if out.shape == (len(xs), k):
            return out
    except (ValueError, TypeError):
        pass
    out = np.full((len(xs), k), np.nan)
    for i, x in enumerate(xs):
        if isinstance(x, list) and len(x) == k:
            with contextlib.suppress(ValueError, TypeError):
                out[i] = np.array(x, dtype=np.float64)
    return out


def _number_column(xs: list[Any]) -> FloatArray:
    """Numbers as a vector; anything that is not a real number is NaN."""
    if all(x.__class__ is float for x in xs):
        return np.array(xs, dtype=np.float64)
    return np.array(
        [float(x) if isinstance(x, (int, float)) and not isinstance(x, bool) else math.nan
         for x in xs]
    )  # fmt: skip


def shape(kind: str, a: dict[str, Any]) -> bytes:
    """What the declarations of one matrix share: the option list (or the integer range)."""
    if kind == "bernoulli":
        return b""
    if kind == "integers":
        low, high = integer_range(a)
        return f"{low},{high}".encode()
    if kind == "bucket":
        shares = a.get("shares")
        if not isinstance(shares, dict) or not shares:
            raise Invalid("shares is not a non-empty object")
        return orjson.dumps(list(shares))
    opts = a.get("options")
    if not isinstance(opts, list) or not opts:
        raise Invalid("options is not a non-empty list")
    return orjson.dumps(opts)


def shape_keys(kind: str, a: dict[str, Any]) -> list[str]:
    """The options of a shape as canonical JSON text, in their declared order."""
    if kind == "bernoulli":
        return ["true", "false"]
    if kind == "integers":
        low, high = integer_range(a)
        return [str(v) for v in range(low, high)]
    if kind == "bucket":
        return [arm_key(k) for k in a["shares"]]
    return [canon(o) for o in a["options"]]


def declared_probabilities(
    kind: str, ds: list[dict[str, Any]], k: int
) -> tuple[FloatArray, list[str]]:
    """Declared probabilities (declarations x options) and, per declaration, what is wrong."""
    bad: list[str] = [""] * len(ds)

    def flag(mask: Any, reason: str) -> None:
        for i in np.flatnonzero(mask):
            bad[i] = bad[i] or f"invalid declaration: {reason}"

    with np.errstate(all="ignore"):
        if kind in ("categorical", "bucket"):
            name = "probs" if kind == "categorical" else "shares"
            rows = [d.get("probs") for d in ds] if kind == "categorical" else [
                list(d["shares"].values()) for d in ds]  # fmt: skip
            p = number_matrix(rows, k)
            flag(~np.isfinite(p).all(axis=1), f"{name} are not {k} finite numbers")
            flag((p < 0.0).any(axis=1), f"{name} have a negative entry")
            flag(~(np.abs(p.sum(axis=1) - 1.0) <= PROB_SUM_TOLERANCE), f"{name} do not sum to 1")
        elif kind in ("softmax", "epsilon_greedy"):
            s = number_matrix([d.get("scores") for d in ds], k)
            flag(~np.isfinite(s).all(axis=1), f"scores are not {k} finite numbers")
            top = s.max(axis=1, keepdims=True)
            if kind == "softmax":
                t = _number_column([d.get("temperature") for d in ds])[:, None]
                flag(~((t > 0.0) & np.isfinite(t))[:, 0], "temperature is not a number > 0")
                e = np.exp((s - top) / t)
                p = e / e.sum(axis=1, keepdims=True)
                flag(~np.isfinite(p).all(axis=1), "scores / temperature overflow")
            else:
                eps = _number_column([d.get("epsilon") for d in ds])[:, None]
                flag(~((eps >= 0.0) & (eps <= 1.0))[:, 0], "epsilon is not in [0, 1]")
                best = s == top
                p = eps / k + best * (1.0 - eps) / best.sum(axis=1, keepdims=True)
        elif kind == "bernoulli":
            q = _number_column([d.get("p") for d in ds])
            flag(~((q >= 0.0) & (q <= 1.0)), "p is not in [0, 1]")
            p = np.column_stack([q, 1.0 - q])
        else:  # integers
            p = np.full((len(ds), k), 1.0 / k)
    return p, bad
