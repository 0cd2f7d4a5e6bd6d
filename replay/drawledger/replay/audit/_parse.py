"""Parsing one group of draws of the same kind into arrays the tests use."""

from __future__ import annotations

import math
from collections import Counter
from itertools import chain
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import orjson
import pandas as pd

from drawledger.draw import lognormal_pdf, normal_pdf
from drawledger.replay.audit import _stats
from drawledger.replay.audit._declared import (
    BAD_JSON,
    Invalid,
    Parsed,
    arm_key,
    canon,
    declared_probabilities,
    integer,
    integer_range,
    load_texts,
    number_matrix,
    real,
    shape,
    shape_keys,
)
from drawledger.replay.audit._limits import (
    CONTINUOUS_KINDS,
    MAX_OPTIONS,
    OPTION_KINDS,
    PROB_RTOL,
    IntArray,
)
from drawledger.replay.audit._stats import FloatArray

if TYPE_CHECKING:
    pass


def _parse_options(kind: str, args: npt.NDArray[Any], values: npt.NDArray[Any]) -> Parsed:
    """Kinds whose declaration is a list of options with probabilities (one step per draw).

    Declarations that share their option list are evaluated together as one matrix.
    """
    n = len(args)
    codes, uniq = pd.factorize(args, use_na_sentinel=False)
    loaded = load_texts(uniq)
    reason: list[str | None] = [None] * len(loaded)
    shapes: dict[bytes, list[int]] = {}
    for i, a in enumerate(loaded):
        try:
            if not isinstance(a, dict):
                raise Invalid("arguments are not a JSON object")
            shapes.setdefault(shape(kind, a), []).append(i)
        except Invalid as exc:
            reason[i] = f"invalid declaration: {exc}"
    keymap: dict[str, int] = {}
    lens = np.zeros(len(loaded), np.int64)
    starts = np.zeros(len(loaded), np.int64)
    blocks: list[tuple[IntArray, FloatArray, FloatArray]] = []
    offset = 0
    distinct: set[tuple[tuple[str, ...], tuple[float, ...]]] = set()
    for members in shapes.values():
        keys = shape_keys(kind, loaded[members[0]])
        p, bad = declared_probabilities(kind, [loaded[i] for i in members], len(keys))
        for i, b in zip(members, bad, strict=True):
            reason[i] = b or None
        good = np.array([not b for b in bad])
        idx, p = np.array(members)[good], p[good]
        if not len(idx):
            continue
        merged = list(dict.fromkeys(keys))
        if len(merged) < len(keys):  # an option listed twice: one outcome, probabilities added
            p = p @ _stats.grouping_matrix([[j for j, k in enumerate(keys) if k == m]
                                            for m in merged], len(keys)).T  # fmt: skip
        codes_k = np.array([keymap.setdefault(m, len(keymap)) for m in merged], np.int64)
        width = len(merged)
        lens[idx] = width
        starts[idx] = offset + np.arange(len(idx)) * width
        offset += len(idx) * width
        blocks.append((np.tile(codes_k, len(idx)), p.ravel(), (np.cumsum(p, axis=1) - p).ravel()))
        distinct.add((tuple(merged), tuple(p[0].tolist())))
        if len(distinct) == 1 and not np.all(p == p[0]):
            distinct.add(((), ()))  # probabilities vary within the shape
    key_u = np.concatenate([b[0] for b in blocks]) if blocks else np.zeros(0, np.int64)
    p_u = np.concatenate([b[1] for b in blocks]) if blocks else np.zeros(0)
    before_u = np.concatenate([b[2] for b in blocks]) if blocks else np.zeros(0)
    row_len = lens[codes]
    flat_row = np.repeat(np.arange(n), row_len)
    row_start = np.cumsum(row_len) - row_len
    gather = np.repeat(starts[codes] - row_start, row_len) + np.arange(int(row_len.sum()))
    flat_key, flat_p, flat_before = key_u[gather], p_u[gather], before_u[gather]
    # the option each value names (-1: none)
    vcodes, vuniq = pd.factorize(values, use_na_sentinel=False)
    arm = arm_key if kind == "bucket" else canon
    vkey = np.array(
        [-1 if v is BAD_JSON else keymap.get(arm(v), -1) for v in load_texts(vuniq)], dtype=np.int64
    )
    value_key = vkey[vcodes] if n else np.zeros(0, np.int64)
    hit = np.flatnonzero(flat_key == value_key[flat_row])
    hit_rows, first = np.unique(flat_row[hit], return_index=True)
    chosen_all = np.full(n, -1, np.int64)
    chosen_all[hit_rows] = hit[first]
    row_reason = np.array(reason, dtype=object)[codes]
    declared = np.zeros(n)
    found = chosen_all >= 0
    declared[found] = flat_p[chosen_all[found]]
    invalid = row_reason != None  # noqa: E711 - elementwise comparison
    impossible = ~invalid & (~found | (declared <= 0.0))
    problems: Counter[str] = Counter(row_reason[invalid].tolist())
    problems["value is not a possible outcome"] += int(impossible.sum())
    ok = ~invalid & ~impossible
    rows = np.flatnonzero(ok)
    renumber = np.full(n, -1, np.int64)
    renumber[rows] = np.arange(len(rows))
    keep = ok[flat_row]
    chosen = chosen_all[rows]
    shift = np.cumsum(~keep)  # flat entries dropped before each position
    return Parsed(
        problems=problems,
        ok=ok,
        declared=declared,
        row=rows,
        step=np.zeros(len(rows), np.int64),
        lo=flat_before[chosen],
        width=flat_p[chosen],
        keys=list(keymap),
        flat_step=renumber[flat_row[keep]],
        flat_key=flat_key[keep],
        flat_p=flat_p[keep],
        chosen=chosen - shift[chosen],
        signature=next(iter(distinct)) if len(distinct) == 1 else None,
        varying=len(distinct) > 1,
    )


def _parse_wide_integers(args: npt.NDArray[Any], values: npt.NDArray[Any]) -> Parsed:
    """integers draws over ranges too wide to count option by option: PIT and consistency."""
    n = len(args)
    codes, uniq = pd.factorize(args, use_na_sentinel=False)
    low_u: list[int] = []
    size_u: list[int] = []
    bad: list[str | None] = []
    for a in load_texts(uniq):
        try:
            if not isinstance(a, dict):
                raise Invalid("arguments are not a JSON object")
            low, high = integer_range(a)
            low_u.append(low)
            size_u.append(high - low)
            bad.append(None)
        except Invalid as exc:
            low_u.append(0)
            size_u.append(1)
            bad.append(f"invalid declaration: {exc}")
    vcodes, vuniq = pd.factorize(values, use_na_sentinel=False)
    parsed_v = [_as_integer(v) for v in load_texts(vuniq)]
    problems: Counter[str] = Counter()
    ok = np.zeros(n, bool)
    lo, declared = np.zeros(n), np.zeros(n)
    for i in range(n):
        reason = bad[codes[i]]
        if reason is not None:
            problems[reason] += 1
            continue
        x, low, size = parsed_v[vcodes[i]], low_u[codes[i]], size_u[codes[i]]
        if x is None or not 0 <= x - low < size:
            problems["value is not a possible outcome"] += 1
            continue
        ok[i] = True
        lo[i] = (x - low) / size
        declared[i] = 1.0 / size
    rows = np.flatnonzero(ok)
    return Parsed(
        problems,
        ok,
        declared,
        rows,
        np.zeros(len(rows), np.int64),
        lo[rows],
        declared[rows],
        note="the integer range is wider than 100 values",
    )


def _as_integer(v: Any) -> int | None:
    if isinstance(v, float) and v.is_integer():
        return int(v)
    return v if isinstance(v, int) and not isinstance(v, bool) else None


def _parse_slate(args: npt.NDArray[Any], values: npt.NDArray[Any]) -> Parsed:
    """slate draws: k sequential categorical steps over the remaining options."""
    n = len(args)
    codes, uniq = pd.factorize(args, use_na_sentinel=False)
    decl: list[tuple[list[str], list[float], int] | str] = []
    for a in load_texts(uniq):
        try:
            if not isinstance(a, dict):
                raise Invalid("arguments are not a JSON object")
            orjson.loads(shape("slate", a))  # the options are a non-empty list
            keys = shape_keys("slate", a)
            weights = number_matrix([a.get("weights")], len(keys))[0]
            if not np.isfinite(weights).all():
                raise Invalid(f"weights are not {len(keys)} finite numbers")
            w = weights.tolist()
            k = integer(a, "k")
            if min(w) < 0.0 or k < 1 or k > sum(1 for x in w if x > 0.0):
                raise Invalid("weights or k do not define a slate")
            if len(set(keys)) != len(keys):
                raise Invalid("options repeat")
            decl.append((keys, w, k))
        except Invalid as exc:
            decl.append(f"invalid declaration: {exc}")
    keymap: dict[str, int] = {}
    problems: Counter[str] = Counter()
    ok = np.zeros(n, bool)
    declared = np.zeros(n)
    rows: list[int] = []
    steps: list[int] = []
    lo: list[float] = []
    width: list[float] = []
    f_step: list[int] = []
    f_key: list[int] = []
    f_p: list[float] = []
    chosen: list[int] = []
    sigs: set[tuple[tuple[str, ...], tuple[float, ...]]] = set()
    values_loaded = load_texts(values)
    for i in range(n):
        d = decl[codes[i]]
        if isinstance(d, str):
            problems[d] += 1
            continue
        keys, w, k = d
        value = values_loaded[i]
        if not isinstance(value, list) or len(value) != k:
            problems["value is not a possible outcome"] += 1
            continue
        picks = [canon(v) for v in value]
        remaining = list(range(len(keys)))
        prob = 1.0
        start = len(f_p)
        mine: list[tuple[float, float]] = []
        for s, pick in enumerate(picks):
            total = 0.0
            for j in remaining:
                total += w[j]
            step_p = [w[j] / total for j in remaining]
            pos = next((q for q, j in enumerate(remaining) if keys[j] == pick), -1)
            if pos < 0 or step_p[pos] <= 0.0:
                break
            base = len(rows) + s
            for q, j in enumerate(remaining):
                f_step.append(base)
                f_key.append(keymap.setdefault(keys[j], len(keymap)))
                f_p.append(step_p[q])
            chosen.append(len(f_p) - len(remaining) + pos)
            sigs.add((tuple(keys[j] for j in remaining), tuple(step_p)))
            mine.append((math.fsum(step_p[:pos]), step_p[pos]))
            prob *= step_p[pos]
            remaining.pop(pos)
        if len(mine) < k:
            del f_step[start:], f_key[start:], f_p[start:]
            del chosen[len(chosen) - len(mine) :]
            problems["value is not a possible outcome"] += 1
            continue
        ok[i] = True
        declared[i] = prob
        for s, (b, p) in enumerate(mine):
            rows.append(i)
            steps.append(s)
            lo.append(b)
            width.append(p)
    return Parsed(
        problems=problems,
        ok=ok,
        declared=declared,
        row=np.array(rows, np.int64),
        step=np.array(steps, np.int64),
        lo=np.array(lo),
        width=np.array(width),
        keys=list(keymap),
        flat_step=np.array(f_step, np.int64),
        flat_key=np.array(f_key, np.int64),
        flat_p=np.array(f_p),
        chosen=np.array(chosen, np.int64),
        signature=next(iter(sigs)) if len(sigs) == 1 else None,
        varying=len(sigs) > 1,
    )


def _parse_continuous(
    kind: str, args: npt.NDArray[Any], values: npt.NDArray[Any], recorded: FloatArray
) -> Parsed:
    """uniform, normal and lognormal draws: PIT u = F(x), density at x.

    Densities are computed with numpy; where one differs from the recorded density it is
    computed again with the SDK's own formula (``math`` and numpy may differ in the last bit
    of a logarithm, which matters for tiny sigma).
    """
    from scipy import special

    names = {"uniform": ("low", "high"), "normal": ("mean", "sd"), "lognormal": ("mu", "sigma")}
    first, second = names[kind]
    codes, uniq = pd.factorize(args, use_na_sentinel=False)
    a_u: list[float] = []
    b_u: list[float] = []
    bad: list[str | None] = []
    for a in load_texts(uniq):
        try:
            if not isinstance(a, dict):
                raise Invalid("arguments are not a JSON object")
            p1, p2 = real(a, first), real(a, second)
            if (p2 <= p1) if kind == "uniform" else (p2 <= 0.0):
                raise Invalid(f"{second} is too small")
            a_u.append(p1)
            b_u.append(p2)
            bad.append(None)
        except Invalid as exc:
            a_u.append(0.0)
            b_u.append(1.0)
            bad.append(f"invalid declaration: {exc}")
    a, b = np.array(a_u)[codes], np.array(b_u)[codes]
    reason = np.array(bad, dtype=object)[codes]
    x = pd.to_numeric(pd.Series(values, dtype=object), errors="coerce").to_numpy(np.float64)
    with np.errstate(all="ignore"):
        if kind == "uniform":
            slack = 4.0 * np.finfo(np.float64).eps * np.maximum(np.abs(a), np.abs(b))
            support = (x >= a - slack) & (x <= b + slack)  # low + (high - low) * u may round up
            cdf = (x - a) / (b - a)
            density = 1.0 / (b - a)
        elif kind == "normal":
            support = np.isfinite(x)
            z = (x - a) / b
            cdf = special.ndtr(z)
            density = np.exp(-0.5 * z * z) / (b * math.sqrt(2.0 * math.pi))
        else:
            support = x > 0.0
            z = (np.log(x) - a) / b
            cdf = special.ndtr(z)
            density = np.exp(-0.5 * z * z) / (b * x * math.sqrt(2.0 * math.pi))
    invalid = reason != None  # noqa: E711 - elementwise comparison
    impossible = ~invalid & ~(np.isfinite(x) & support)
    problems: Counter[str] = Counter(reason[invalid].tolist())
    problems["value is not a possible outcome"] += int(impossible.sum())
    ok = ~invalid & ~impossible
    rows = np.flatnonzero(ok)
    declared = np.where(ok, density, 0.0)
    pdf = {"normal": normal_pdf, "lognormal": lognormal_pdf}.get(kind)
    if pdf is not None:
        for i in np.flatnonzero(ok & ~close_to(recorded, declared)):
            declared[i] = pdf(float(x[i]), float(a[i]), float(b[i]))
    return Parsed(
        problems,
        ok,
        declared,
        rows,
        np.zeros(len(rows), np.int64),
        np.clip(cdf[rows], 0.0, 1.0),
        np.zeros(len(rows)),
    )


def close_to(recorded: FloatArray, declared: FloatArray) -> npt.NDArray[np.bool_]:
    """Recorded probabilities (densities) equal to the declared ones within PROB_RTOL; an
    infinite one never is (inf - p is inf, within PROB_RTOL times an infinite scale)."""
    with np.errstate(invalid="ignore"):
        scale = np.maximum(np.abs(declared), np.abs(recorded))
        return (np.abs(recorded - declared) <= PROB_RTOL * scale) & np.isfinite(recorded)


def parse_draws(
    kind: str, args: npt.NDArray[Any], values: npt.NDArray[Any], recorded: FloatArray
) -> Parsed:
    if kind in CONTINUOUS_KINDS:
        return _parse_continuous(kind, args, values, recorded)
    if kind == "slate":
        return _parse_slate(args, values)
    if kind == "integers" and not _narrow_integers(args):
        return _parse_wide_integers(args, values)
    if kind in OPTION_KINDS:
        return _parse_options(kind, args, values)
    n = len(args)
    empty = np.zeros(0, np.int64)
    return Parsed(
        Counter({f"unknown draw kind {kind!r}": n}),
        np.zeros(n, bool),
        np.zeros(n),
        empty,
        empty,
        np.zeros(0),
        np.zeros(0),
    )


def _narrow_integers(args: npt.NDArray[Any]) -> bool:
    """True when every integers declaration spans at most MAX_OPTIONS values."""
    for a in load_texts(pd.unique(args)):
        try:
            low, high = integer_range(a) if isinstance(a, dict) else (0, 1)
        except Invalid:
            continue
        if high - low > MAX_OPTIONS:
            return False
    return True


def parse_uniforms(texts: npt.NDArray[Any]) -> tuple[FloatArray, IntArray, npt.NDArray[np.bool_]]:
    """Recorded uniforms: flat values, the count per draw, and which draws are malformed.

    A malformed record (not a list of numbers in [0, 1]) counts as no uniforms.
    """
    try:  # the common case, one uniform a draw ("[0.25]"), without a JSON parser per row
        flat = np.array(
            [t[1:-1] if t[:1] == "[" and t[-1:] == "]" else "-" for t in texts], dtype=np.float64
        )
        if np.all((flat >= 0.0) & (flat <= 1.0)):
            return flat, np.ones(len(texts), np.int64), np.zeros(len(texts), bool)
    except (TypeError, ValueError):
        pass
    lists = load_texts(texts)
    try:
        lens = np.fromiter(map(len, lists), np.int64, count=len(lists))
        flat = np.fromiter(chain.from_iterable(lists), np.float64)
        if np.all((flat >= 0.0) & (flat <= 1.0)):
            return flat, lens, np.zeros(len(lists), bool)
    except (TypeError, ValueError):
        pass
    good = [
        isinstance(x, list)
        and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) and 0.0 <= v <= 1.0 for v in x
        )
        for x in lists
    ]
    lists = [x if g else [] for x, g in zip(lists, good, strict=True)]
    lens = np.fromiter(map(len, lists), np.int64, count=len(lists))
    flat = np.fromiter(chain.from_iterable(lists), np.float64)
    return flat, lens, ~np.array(good, dtype=bool)
