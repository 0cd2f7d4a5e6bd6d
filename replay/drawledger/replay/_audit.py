"""The randomization audit: did the draws of every stream happen as declared? (docs/audit.md)

The work is split in two so that partitions of a ledger can be processed anywhere and combined:

* ``chunk_state(decisions, draws)`` turns one chunk of the ledger tables into an ``AuditState``
  of sufficient statistics: counts, sums of declared probabilities and of their outer products,
  histograms of uniforms and PIT values, bounded samples for the rank-based tests, and sketches
  for repeated seeds and uniforms;
* ``AuditState.merge`` adds one state into another (sums, and bottom-k selections by a hash,
  so the order of the chunks does not matter beyond floating-point rounding);
* ``AuditState.finish`` computes every test and returns an ``AuditReport``.
"""

from __future__ import annotations

import contextlib
import io
import math
import os
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from itertools import chain
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import orjson
import pandas as pd
from scipy import sparse, special, stats

from drawledger.draw import PROB_SUM_TOLERANCE, lognormal_pdf, normal_pdf
from drawledger.exceptions import LedgerError, ReplayError
from drawledger.replay import _stats
from drawledger.replay._stats import BINS, FloatArray, TestResult

if TYPE_CHECKING:
    from rich.console import Console, ConsoleOptions, RenderResult

    from drawledger.ledger import Ledger

__all__ = [
    "AuditFigure",
    "AuditReport",
    "AuditState",
    "AuditTest",
    "audit",
    "audit_tables",
    "chunk_state",
]

IntArray = npt.NDArray[np.int64]
U64Array = npt.NDArray[np.uint64]
GroupKey = tuple[str, str, "str | None"]  # stream, kind, draw name

# An alarm fires when a p-value, after Holm's correction across the tests of a stream, falls
# below ALPHA. 0.001 is common practice for sample-ratio-mismatch alarms; there is no single
# published source for it.
ALPHA = 0.001
# The rank-based tests and the repeat sketches keep at most this many values per draw (a
# bottom-k selection by a hash, so every chunk order gives the same sample). Below it they are
# exact on all draws.
SAMPLE_SIZE = 1_000_000
# Minimum sample sizes below which a test reports "not enough data" (common practice; chi-square
# tests instead need every expected cell count >= 5, see _stats.MIN_EXPECTED).
MIN_KS = 20
MIN_RANK = 30
# The assignment-ratio test keeps per-option sums for at most this many distinct options.
MAX_OPTIONS = 100
# At most this many numeric input fields are tested per draw (those present most often).
MAX_INPUT_FIELDS = 20
# The hour-of-day test bins PIT values into this many bins per hour.
HOUR_BINS = 5
# Declared-probability bins of the calibration test (left edges; the last bin is [0.9, 1]).
CAL_EDGES = np.array([0.0, 0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9])
# Recorded probabilities and densities must match the declared distribution to this relative
# tolerance.
PROB_RTOL = 1e-6

AS_DECLARED = "as declared"
NOT_AS_DECLARED = "not as declared"
NOT_ENOUGH_DATA = "not enough data"

CONTINUOUS_KINDS = frozenset({"uniform", "normal", "lognormal"})
OPTION_KINDS = frozenset(
    {"categorical", "bernoulli", "integers", "softmax", "epsilon_greedy", "bucket"}
)

TEST_LABELS = {
    "consistency": "matches declaration",
    "ratio": "assignment ratios",
    "calibration": "picks by probability",
    "uniforms_ks": "uniforms KS",
    "uniforms_chisq": "uniforms chi-square",
    "pit_ks": "PIT KS",
    "pit_chisq": "PIT chi-square",
    "uniforms_vs_time": "uniforms vs time order",
    "uniforms_vs_input": "uniforms vs input",
    "pit_vs_time": "PIT vs time order",
    "pit_vs_input": "PIT vs input",
    "pit_vs_hour": "PIT by hour of day",
    "unit_in_two_arms": "units in two arms",
    "repeated_seeds": "repeated seeds",
    "repeated_uniforms": "repeated uniforms",
}

_HASH_KEY = "drawledger.audit"  # 16 characters: the key of pandas' SipHash of decision ids
_STEP = np.uint64(0x9E3779B97F4A7C15)
_SALT_V = np.uint64(0x5851F42D4C957F2D)  # PIT randomization
_SALT_K = np.uint64(0x2545F4914F6CDD1D)  # sample selection
_DECISION_COLUMNS = ("decision_id", "stream", "unit", "ts", "inputs", "seed")
_DRAW_COLUMNS = ("decision_id", "idx", "name", "kind", "args", "u", "value", "prob")


# -- the report ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class AuditTest:
    """One test of one draw (or of a whole stream, for repeated seeds and uniforms)."""

    stream: str
    draw: str | None
    kind: str | None
    test: str
    n: int
    statistic: float | None
    p_value: float | None
    p_adjusted: float | None
    verdict: str
    alarm: bool
    df: int | None = None
    field: str | None = None
    detail: str = ""

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "stream": self.stream,
            "draw": self.draw,
            "kind": self.kind,
            "test": self.test,
            "n": self.n,
            "statistic": self.statistic,
            "p_value": self.p_value,
            "p_adjusted": self.p_adjusted,
            "verdict": self.verdict,
            "alarm": self.alarm,
        }
        if self.df is not None:
            out["df"] = self.df
        if self.field is not None:
            out["field"] = self.field
        if self.detail:
            out["detail"] = self.detail
        return out


@dataclass(frozen=True)
class AuditFigure:
    """What the HTML report draws for one draw of a stream.

    ``pit_counts`` and ``uniform_counts`` are histograms over ``AuditReport.bin_edges`` (20 equal
    bins on [0, 1]); ``uniform_counts`` is empty when the draws recorded no uniforms. For
    discrete kinds ``options`` holds the JSON text of each option with its ``observed`` count
    and ``expected`` count (the sum of its declared probabilities). ``n`` is the number of PIT
    values: draws, picks for a slate (k per draw), units for a bucket.
    """

    stream: str
    draw: str | None
    kind: str
    n: int
    pit_counts: tuple[int, ...]
    uniform_counts: tuple[int, ...]
    options: tuple[str, ...] = ()
    observed: tuple[float, ...] = ()
    expected: tuple[float, ...] = ()


@dataclass(frozen=True)
class AuditReport:
    """The result of ``audit``: every test, its verdict, and the data of the figures."""

    tests: tuple[AuditTest, ...]
    figures: tuple[AuditFigure, ...]
    decisions: int
    alpha: float = ALPHA
    bin_edges: tuple[float, ...] = tuple(float(x) for x in _stats.BIN_EDGES)

    @property
    def ok(self) -> bool:
        """True when no alarm fired."""
        return not any(t.alarm for t in self.tests)

    @property
    def alarms(self) -> tuple[AuditTest, ...]:
        return tuple(t for t in self.tests if t.alarm)

    def to_dict(self) -> dict[str, Any]:
        """The audit JSON: {"ok", "tests": [{"stream", "test", "statistic", "p_value", ...}]}."""
        return {
            "ok": self.ok,
            "alpha": self.alpha,
            "decisions": self.decisions,
            "tests": [t.to_dict() for t in self.tests],
        }

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        """One table per stream; p is the Holm-adjusted p-value the verdict uses."""
        from rich.table import Table

        if not self.tests:
            yield f"No draws to audit ({self.decisions} decisions)."
            return
        yield f"[bold]Randomization audit of {self.decisions} decisions[/]"
        style = {AS_DECLARED: "green", NOT_AS_DECLARED: "bold red", NOT_ENOUGH_DATA: "dim"}
        for stream in dict.fromkeys(t.stream for t in self.tests):
            table = Table(title=stream, title_justify="left", title_style="bold")
            table.add_column("draw / test", no_wrap=True)
            for name in ("n", "statistic", "p"):
                table.add_column(name, justify="right", no_wrap=True)
            table.add_column("verdict", no_wrap=True)
            previous = None
            for t in self.tests:
                if t.stream != stream:
                    continue
                draw = (
                    "stream-wide" if t.kind is None else t.kind + (f" {t.draw}" if t.draw else "")
                )
                if draw != previous:
                    if previous is not None:
                        table.add_section()
                    table.add_row(f"[bold]{draw}[/]")
                    previous = draw
                table.add_row(
                    "  " + TEST_LABELS[t.test] + (f" {t.field}" if t.field else ""),
                    str(t.n),
                    _fmt(t.statistic),
                    _fmt_p(t.p_adjusted),
                    f"[{style[t.verdict]}]{t.verdict}[/]",
                )
            yield table
        yield f"p: after Holm's correction across a stream's tests; alarm when p < {self.alpha:g}."
        if self.ok:
            yield "[green]No alarm: every testable draw looks as declared.[/]"
        else:
            yield f"[bold red]{len(self.alarms)} alarm(s): randomization not as declared.[/]"

    def __str__(self) -> str:
        from rich.console import Console

        console = Console(width=140, record=True, file=io.StringIO())
        console.print(self)
        return console.export_text()


def _fmt(x: float | None) -> str:
    if x is None:
        return "-"
    return str(int(x)) if float(x).is_integer() and abs(x) < 1e15 else f"{x:.4g}"


def _fmt_p(p: float | None) -> str:
    if p is None:
        return "-"
    return "<1e-300" if p < 1e-300 else f"{p:.3g}"


# -- parsing one group of draws ----------------------------------------------------------------
class _Invalid(Exception):
    """A declared distribution that is not one (the message names the problem)."""


def _canon(obj: Any) -> str:
    """JSON text of a value, with integral floats written as integers (5.0 and 5 match)."""
    if obj.__class__ is float and obj.is_integer() and abs(obj) < 2.0**63:
        obj = int(obj)
    return orjson.dumps(obj, option=orjson.OPT_NON_STR_KEYS).decode()


def _arm_key(obj: Any) -> str:
    """Bucket arms are JSON object keys, so they compare as strings ("1" and 1 match)."""
    return _canon(obj if isinstance(obj, str) else orjson.dumps(obj).decode())


def _real(a: Mapping[str, Any], name: str) -> float:
    x = a.get(name)
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
        raise _Invalid(f"{name} is not a finite number")
    return float(x)


def _integer(a: Mapping[str, Any], name: str) -> int:
    x = a.get(name)
    if isinstance(x, float) and x.is_integer():
        x = int(x)
    if isinstance(x, bool) or not isinstance(x, int):
        raise _Invalid(f"{name} is not an integer")
    return x


def _integer_range(a: Mapping[str, Any]) -> tuple[int, int]:
    low, high = _integer(a, "low"), _integer(a, "high")
    if low >= high:
        raise _Invalid("low is not below high")
    return low, high


@dataclass
class _Parsed:
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


def _load(texts: npt.NDArray[Any] | list[Any]) -> list[Any]:
    """Parse JSON texts; a text that is not JSON becomes _BAD_JSON."""
    try:
        return list(map(orjson.loads, texts))
    except (orjson.JSONDecodeError, TypeError):
        return [_load_one(t) for t in texts]


def _load_one(text: Any) -> Any:
    try:
        return orjson.loads(text)
    except (orjson.JSONDecodeError, TypeError):
        return _BAD_JSON


_BAD_JSON = object()


def _number_matrix(xs: list[Any], k: int) -> FloatArray:
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


def _shape(kind: str, a: dict[str, Any]) -> bytes:
    """What the declarations of one matrix share: the option list (or the integer range)."""
    if kind == "bernoulli":
        return b""
    if kind == "integers":
        low, high = _integer_range(a)
        return f"{low},{high}".encode()
    if kind == "bucket":
        shares = a.get("shares")
        if not isinstance(shares, dict) or not shares:
            raise _Invalid("shares is not a non-empty object")
        return orjson.dumps(list(shares))
    opts = a.get("options")
    if not isinstance(opts, list) or not opts:
        raise _Invalid("options is not a non-empty list")
    return orjson.dumps(opts)


def _shape_keys(kind: str, a: dict[str, Any]) -> list[str]:
    """The options of a shape as canonical JSON text, in their declared order."""
    if kind == "bernoulli":
        return ["true", "false"]
    if kind == "integers":
        low, high = _integer_range(a)
        return [str(v) for v in range(low, high)]
    if kind == "bucket":
        return [_arm_key(k) for k in a["shares"]]
    return [_canon(o) for o in a["options"]]


def _probabilities(kind: str, ds: list[dict[str, Any]], k: int) -> tuple[FloatArray, list[str]]:
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
            p = _number_matrix(rows, k)
            flag(~np.isfinite(p).all(axis=1), f"{name} are not {k} finite numbers")
            flag((p < 0.0).any(axis=1), f"{name} have a negative entry")
            flag(~(np.abs(p.sum(axis=1) - 1.0) <= PROB_SUM_TOLERANCE), f"{name} do not sum to 1")
        elif kind in ("softmax", "epsilon_greedy"):
            s = _number_matrix([d.get("scores") for d in ds], k)
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


def _parse_options(kind: str, args: npt.NDArray[Any], values: npt.NDArray[Any]) -> _Parsed:
    """Kinds whose declaration is a list of options with probabilities (one step per draw).

    Declarations that share their option list are evaluated together as one matrix.
    """
    n = len(args)
    codes, uniq = pd.factorize(args, use_na_sentinel=False)
    loaded = _load(uniq)
    reason: list[str | None] = [None] * len(loaded)
    shapes: dict[bytes, list[int]] = {}
    for i, a in enumerate(loaded):
        try:
            if not isinstance(a, dict):
                raise _Invalid("arguments are not a JSON object")
            shapes.setdefault(_shape(kind, a), []).append(i)
        except _Invalid as exc:
            reason[i] = f"invalid declaration: {exc}"
    keymap: dict[str, int] = {}
    lens = np.zeros(len(loaded), np.int64)
    starts = np.zeros(len(loaded), np.int64)
    blocks: list[tuple[IntArray, FloatArray, FloatArray]] = []
    offset = 0
    distinct: set[tuple[tuple[str, ...], tuple[float, ...]]] = set()
    for members in shapes.values():
        keys = _shape_keys(kind, loaded[members[0]])
        p, bad = _probabilities(kind, [loaded[i] for i in members], len(keys))
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
    arm = _arm_key if kind == "bucket" else _canon
    vkey = np.array(
        [-1 if v is _BAD_JSON else keymap.get(arm(v), -1) for v in _load(vuniq)], dtype=np.int64
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
    return _Parsed(
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


def _parse_wide_integers(args: npt.NDArray[Any], values: npt.NDArray[Any]) -> _Parsed:
    """integers draws over ranges too wide to count option by option: PIT and consistency."""
    n = len(args)
    codes, uniq = pd.factorize(args, use_na_sentinel=False)
    low_u: list[int] = []
    size_u: list[int] = []
    bad: list[str | None] = []
    for a in _load(uniq):
        try:
            if not isinstance(a, dict):
                raise _Invalid("arguments are not a JSON object")
            low, high = _integer_range(a)
            low_u.append(low)
            size_u.append(high - low)
            bad.append(None)
        except _Invalid as exc:
            low_u.append(0)
            size_u.append(1)
            bad.append(f"invalid declaration: {exc}")
    vcodes, vuniq = pd.factorize(values, use_na_sentinel=False)
    parsed_v = [_as_integer(v) for v in _load(vuniq)]
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
    return _Parsed(
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


def _parse_slate(args: npt.NDArray[Any], values: npt.NDArray[Any]) -> _Parsed:
    """slate draws: k sequential categorical steps over the remaining options."""
    n = len(args)
    codes, uniq = pd.factorize(args, use_na_sentinel=False)
    decl: list[tuple[list[str], list[float], int] | str] = []
    for a in _load(uniq):
        try:
            if not isinstance(a, dict):
                raise _Invalid("arguments are not a JSON object")
            orjson.loads(_shape("slate", a))  # the options are a non-empty list
            keys = _shape_keys("slate", a)
            weights = _number_matrix([a.get("weights")], len(keys))[0]
            if not np.isfinite(weights).all():
                raise _Invalid(f"weights are not {len(keys)} finite numbers")
            w = weights.tolist()
            k = _integer(a, "k")
            if min(w) < 0.0 or k < 1 or k > sum(1 for x in w if x > 0.0):
                raise _Invalid("weights or k do not define a slate")
            if len(set(keys)) != len(keys):
                raise _Invalid("options repeat")
            decl.append((keys, w, k))
        except _Invalid as exc:
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
    values_loaded = _load(values)
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
        picks = [_canon(v) for v in value]
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
    return _Parsed(
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
) -> _Parsed:
    """uniform, normal and lognormal draws: PIT u = F(x), density at x.

    Densities are computed with numpy; where one differs from the recorded density it is
    computed again with the SDK's own formula (``math`` and numpy may differ in the last bit
    of a logarithm, which matters for tiny sigma).
    """
    names = {"uniform": ("low", "high"), "normal": ("mean", "sd"), "lognormal": ("mu", "sigma")}
    first, second = names[kind]
    codes, uniq = pd.factorize(args, use_na_sentinel=False)
    a_u: list[float] = []
    b_u: list[float] = []
    bad: list[str | None] = []
    for a in _load(uniq):
        try:
            if not isinstance(a, dict):
                raise _Invalid("arguments are not a JSON object")
            p1, p2 = _real(a, first), _real(a, second)
            if (p2 <= p1) if kind == "uniform" else (p2 <= 0.0):
                raise _Invalid(f"{second} is too small")
            a_u.append(p1)
            b_u.append(p2)
            bad.append(None)
        except _Invalid as exc:
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
        for i in np.flatnonzero(ok & ~_close(recorded, declared)):
            declared[i] = pdf(float(x[i]), float(a[i]), float(b[i]))
    return _Parsed(
        problems,
        ok,
        declared,
        rows,
        np.zeros(len(rows), np.int64),
        np.clip(cdf[rows], 0.0, 1.0),
        np.zeros(len(rows)),
    )


def _close(recorded: FloatArray, declared: FloatArray) -> npt.NDArray[np.bool_]:
    """Recorded probabilities (densities) equal to the declared ones within PROB_RTOL."""
    with np.errstate(invalid="ignore"):
        scale = np.maximum(np.abs(declared), np.abs(recorded))
        return np.abs(recorded - declared) <= PROB_RTOL * scale


def _parse(
    kind: str, args: npt.NDArray[Any], values: npt.NDArray[Any], recorded: FloatArray
) -> _Parsed:
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
    return _Parsed(
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
    for a in _load(pd.unique(args)):
        try:
            low, high = _integer_range(a) if isinstance(a, dict) else (0, 1)
        except _Invalid:
            continue
        if high - low > MAX_OPTIONS:
            return False
    return True


def _uniforms(texts: npt.NDArray[Any]) -> tuple[FloatArray, IntArray, npt.NDArray[np.bool_]]:
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
    lists = _load(texts)
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


# -- sufficient statistics ----------------------------------------------------------------------
@dataclass
class _Cells:
    """Counts of picks per cell against the sums of declared probabilities.

    ``outer`` is sum_i p_i p_i' over picks i: with ``expected`` it gives the covariance of the
    counts, sum_i (diag(p_i) - p_i p_i').
    """

    keys: list[str]
    observed: FloatArray
    expected: FloatArray
    outer: FloatArray

    def merge(self, other: _Cells) -> _Cells:
        if self.keys == other.keys:
            return _Cells(
                self.keys,
                self.observed + other.observed,
                self.expected + other.expected,
                self.outer + other.outer,
            )
        keys = list(dict.fromkeys(self.keys + other.keys))
        out = _Cells(
            keys, np.zeros(len(keys)), np.zeros(len(keys)), np.zeros((len(keys), len(keys)))
        )
        for part in (self, other):
            at = np.array([keys.index(k) for k in part.keys], np.int64)
            out.observed[at] += part.observed
            out.expected[at] += part.expected
            out.outer[np.ix_(at, at)] += part.outer
        return out


def _cells(
    keys: list[str], step: IntArray, key: IntArray, p: FloatArray, chosen: IntArray
) -> _Cells:
    k = len(keys)
    m = sparse.csr_matrix((p, (step, key)), shape=(len(chosen), k))
    outer = np.asarray((m.T @ m).todense())
    observed = np.bincount(key[chosen], minlength=k).astype(np.float64)
    expected = np.bincount(key, weights=p, minlength=k).astype(np.float64)
    return _Cells(keys, observed, expected, outer)


CAL_KEYS = [f"[{lo:g}, {hi:g})" for lo, hi in zip(CAL_EDGES, [*CAL_EDGES[1:], 1.0], strict=True)]
CAL_KEYS[-1] = "[0.9, 1]"


class _Sketch:
    """The ``size`` smallest distinct values seen, with how often each was seen.

    Bottom-k by value keeps every repeat of the values it keeps, so repeats in the sketch show
    repeats in the whole at the same rate; the region below the largest kept value is the
    sketch's share of all possible values.
    """

    def __init__(self, size: int, values: npt.NDArray[Any] | None = None) -> None:
        self.size = size
        self.truncated = False
        if values is None:
            self.values: npt.NDArray[Any] = np.zeros(0)
            self.counts: IntArray = np.zeros(0, np.int64)
        else:
            self.values, counts = np.unique(values, return_counts=True)
            self.counts = counts.astype(np.int64)
            self._cut()

    def _cut(self) -> None:
        if len(self.values) > self.size:
            self.values = self.values[: self.size]
            self.counts = self.counts[: self.size]
            self.truncated = True

    def merge(self, other: _Sketch) -> None:
        if not len(other.values):
            self.truncated |= other.truncated
            return
        if not len(self.values):
            self.values, self.counts = other.values, other.counts
        else:
            both = np.concatenate([self.values, other.values])
            uniq, inverse = np.unique(both, return_inverse=True)
            counts = np.zeros(len(uniq), np.int64)
            np.add.at(counts, inverse, np.concatenate([self.counts, other.counts]))
            self.values, self.counts = uniq, counts
        self.truncated |= other.truncated
        self._cut()


class _Sample:
    """A bottom-k sample of steps by a keyed hash: order-independent and mergeable."""

    def __init__(self, size: int) -> None:
        self.size = size
        self.parts: list[pd.DataFrame] = []
        self.rows = 0

    def add(self, frame: pd.DataFrame) -> None:
        if len(frame):
            self.parts.append(frame)
            self.rows += len(frame)
            if self.rows > 2 * self.size:
                self.frame()

    def merge(self, other: _Sample) -> None:
        for part in other.parts:
            self.add(part)

    def frame(self) -> pd.DataFrame:
        if not self.parts:
            return pd.DataFrame({"key": np.zeros(0, np.uint64), "ts": [], "u": [], "pit": []})
        df = self.parts[0] if len(self.parts) == 1 else pd.concat(self.parts, ignore_index=True)
        df = _bottom_k(df, self.size)
        self.parts, self.rows = [df], len(df)
        return df


def _bottom_k(df: pd.DataFrame, k: int) -> pd.DataFrame:
    if len(df) <= k:
        return df
    keys = df["key"].to_numpy()
    return df.iloc[np.sort(np.argpartition(keys, k - 1)[:k])].reset_index(drop=True)


@dataclass
class _GroupState:
    """Sufficient statistics of one draw (stream, kind, name) over the chunks seen so far."""

    size: int
    draws: int = 0
    problems: Counter[str] = field(default_factory=Counter)
    steps: int = 0
    uniforms: int = 0  # steps with a recorded uniform
    u_hist: IntArray = field(default_factory=lambda: np.zeros(BINS, np.int64))
    pit_hist: IntArray = field(default_factory=lambda: np.zeros(BINS, np.int64))
    hour_hist: IntArray = field(default_factory=lambda: np.zeros((24, BINS), np.int64))
    ratio: _Cells | None = None
    calibration: _Cells | None = None
    note: str | None = None
    signature: tuple[tuple[str, ...], tuple[float, ...]] | None = None
    varying: bool = False
    sample: _Sample = field(init=False)
    units: pd.DataFrame | None = None  # bucket draws: one row per unit

    def __post_init__(self) -> None:
        self.sample = _Sample(self.size)

    def merge(self, o: _GroupState) -> None:
        if o.steps:
            if not self.steps:
                self.signature, self.varying = o.signature, o.varying
            elif self.varying or o.varying or o.signature != self.signature:
                self.signature, self.varying = None, True
        self.draws += o.draws
        self.problems.update(o.problems)
        self.steps += o.steps
        self.uniforms += o.uniforms
        self.u_hist = self.u_hist + o.u_hist
        self.pit_hist = self.pit_hist + o.pit_hist
        self.hour_hist = self.hour_hist + o.hour_hist
        self.note = self.note or o.note
        if self.note:
            self.ratio = None
        elif o.ratio is not None:
            self.ratio = o.ratio if self.ratio is None else self.ratio.merge(o.ratio)
            if len(self.ratio.keys) > MAX_OPTIONS:
                self.ratio, self.note = None, f"more than {MAX_OPTIONS} distinct options"
        if o.calibration is not None:
            self.calibration = (
                o.calibration if self.calibration is None else self.calibration.merge(o.calibration)
            )
        self.sample.merge(o.sample)
        if o.units is not None:
            self.units = (
                o.units if self.units is None else _merge_units([self.units, o.units], self.size)
            )


def _hash_ids(ids: npt.NDArray[Any], idx: IntArray) -> U64Array:
    h = pd.util.hash_array(np.asarray(ids, dtype=object), hash_key=_HASH_KEY, categorize=False)
    return _stats.mix64(h ^ (idx.astype(np.uint64) * _STEP))


def _group_state(kind: str, frame: pd.DataFrame, size: int) -> tuple[_GroupState, FloatArray]:
    """Sufficient statistics of one chunk of one draw, and all the uniforms it recorded."""
    st = _GroupState(size)
    st.draws = len(frame)
    recorded = frame["prob"].to_numpy(np.float64)
    args, values = frame["args"].to_numpy(dtype=object), frame["value"].to_numpy(dtype=object)
    parsed = _parse(kind, args, values, recorded)
    problems = parsed.problems
    differs = parsed.ok & ~_close(recorded, parsed.declared)
    problems["recorded probability differs from the declaration"] += int(differs.sum())
    flat_u, u_len, malformed = _uniforms(frame["u"].to_numpy(dtype=object))
    problems["recorded uniforms are not numbers in [0, 1]"] += int(malformed.sum())
    st.problems = Counter({k: v for k, v in problems.items() if v})
    keep = (parsed.ok & ~differs & ~malformed)[parsed.row]
    row, step = parsed.row[keep], parsed.step[keep]
    st.steps = len(row)
    h_row = _hash_ids(frame["decision_id"].to_numpy(dtype=object), frame["idx"].to_numpy(np.int64))
    h = _stats.mix64(h_row[row] ^ ((step.astype(np.uint64) + np.uint64(1)) * _STEP))
    v = _stats.to_unit(_stats.mix64(h ^ _SALT_V))
    pit = np.clip(parsed.lo[keep] + v * parsed.width[keep], 0.0, 1.0)
    u_start = np.cumsum(u_len) - u_len
    has_u = step < u_len[row]
    u = np.full(len(row), np.nan)
    u[has_u] = flat_u[u_start[row[has_u]] + step[has_u]]
    st.uniforms = int(has_u.sum())
    st.u_hist = _stats.histogram(u[has_u])
    st.pit_hist = _stats.histogram(pit)
    ts = frame["ts"].to_numpy(np.float64)[row]
    hour = (np.floor(ts / 3600.0) % 24).astype(np.int64)
    pit_bin = np.minimum((pit * BINS).astype(np.int64), BINS - 1)
    st.hour_hist = np.bincount(hour * BINS + pit_bin, minlength=24 * BINS).reshape(24, BINS)
    st.note = parsed.note
    if parsed.keys is not None and st.steps:
        _discrete_stats(st, parsed, keep)
    st.sample.add(_sample_frame(frame, row, ts, u, pit, _stats.mix64(h ^ _SALT_K), size))
    return st, flat_u


def _discrete_stats(st: _GroupState, parsed: _Parsed, keep: npt.NDArray[np.bool_]) -> None:
    assert parsed.flat_step is not None and parsed.flat_key is not None
    assert parsed.flat_p is not None and parsed.chosen is not None and parsed.keys is not None
    # drop steps of draws found inconsistent after parsing (recorded probability, uniforms)
    new_index = np.cumsum(keep) - 1
    flat_keep = keep[parsed.flat_step]
    shift = np.cumsum(~flat_keep)
    f_step = new_index[parsed.flat_step[flat_keep]]
    f_key, f_p = parsed.flat_key[flat_keep], parsed.flat_p[flat_keep]
    chosen = parsed.chosen[keep]
    chosen = chosen - shift[chosen]
    st.signature, st.varying = parsed.signature, parsed.varying
    if st.note is None:
        if len(parsed.keys) > MAX_OPTIONS:
            st.note = f"more than {MAX_OPTIONS} distinct options"
        else:
            st.ratio = _cells(parsed.keys, f_step, f_key, f_p, chosen)
    cal_key = np.searchsorted(CAL_EDGES, f_p, side="right") - 1
    st.calibration = _cells(CAL_KEYS, f_step, cal_key, f_p, chosen)


def _sample_frame(
    frame: pd.DataFrame,
    row: IntArray,
    ts: FloatArray,
    u: FloatArray,
    pit: FloatArray,
    key: U64Array,
    size: int,
) -> pd.DataFrame:
    """The steps that can enter the bottom-k sample, with their numeric input fields."""
    if len(key) > size:
        pick = np.sort(np.argpartition(key, size - 1)[:size])
        row, ts, u, pit, key = row[pick], ts[pick], u[pick], pit[pick], key[pick]
    out = pd.DataFrame({"key": key, "ts": ts, "u": u, "pit": pit})
    inputs = frame["inputs"].to_numpy(dtype=object)[row]
    codes, uniq = pd.factorize(inputs, use_na_sentinel=False)
    flat = [_numeric_fields(x) for x in _load(uniq)]
    if any(flat):
        fields = pd.DataFrame.from_records(flat, index=range(len(flat)))
        if len(fields.columns):
            fields = fields.iloc[codes].reset_index(drop=True)
            fields.columns = ["input:" + c for c in fields.columns]
            out = pd.concat([out, fields.astype(np.float64)], axis=1)
    return out


def _numeric_fields(obj: Any, prefix: str = "", depth: int = 0) -> dict[str, float]:
    """Numeric leaves of a JSON object, keyed by their dotted path (three levels deep at most)."""
    out: dict[str, float] = {}
    if not isinstance(obj, dict) or depth > 2:
        return out
    for k, v in obj.items():
        path = f"{prefix}{k}"
        if isinstance(v, (int, float)) and (not isinstance(v, float) or math.isfinite(v)):
            out[path] = float(v)
        elif isinstance(v, dict):
            out.update(_numeric_fields(v, path + ".", depth + 1))
    return out


def _merge_units(frames: list[pd.DataFrame], size: int) -> pd.DataFrame:
    """One row per unit: its first draw (by ts, decision id), arms seen, number of draws."""
    df = pd.concat(frames, ignore_index=True)
    agg = df.groupby("unit", sort=False).agg(
        arm_min=("arm_min", "min"), arm_max=("arm_max", "max"), visits=("visits", "sum")
    )
    first = df.sort_values(["unit", "ts", "decision_id"]).drop_duplicates("unit")
    first = first.drop(columns=["arm_min", "arm_max", "visits"]).join(agg, on="unit")
    return _bottom_k(first.reset_index(drop=True), size)


def _unit_frame(rows: pd.DataFrame, size: int) -> pd.DataFrame:
    """Bucket draws of one chunk reduced to one row per unit."""
    unit = rows["unit"].astype(object).to_numpy()
    missing = pd.isna(unit)
    if missing.any():
        loaded = _load(rows["args"].to_numpy(dtype=object)[missing])
        ids = rows["decision_id"].to_numpy(dtype=object)[missing]
        unit[missing] = [
            a.get("unit") if isinstance(a, dict) and isinstance(a.get("unit"), str) else d
            for a, d in zip(loaded, ids, strict=True)
        ]
    units = pd.DataFrame(
        {
            "unit": unit,
            "key": _hash_ids(unit, np.zeros(len(unit), np.int64)),
            "decision_id": rows["decision_id"].to_numpy(dtype=object),
            "idx": 0,
            "ts": rows["ts"].to_numpy(np.float64),
            "args": rows["args"].to_numpy(dtype=object),
            "u": rows["u"].to_numpy(dtype=object),
            "value": rows["value"].to_numpy(dtype=object),
            "prob": rows["prob"].to_numpy(np.float64),
            "inputs": "{}",
            "arm_min": rows["value"].to_numpy(dtype=object),
            "arm_max": rows["value"].to_numpy(dtype=object),
            "visits": 1,
        }
    )
    return _merge_units([units], size)


@dataclass
class _StreamState:
    seeds: _Sketch
    uniforms: _Sketch
    decisions: int = 0
    seeded: int = 0  # decisions with a seed
    uniform_count: int = 0  # uniforms recorded by draws other than bucket

    def merge(self, o: _StreamState) -> None:
        self.seeds.merge(o.seeds)
        self.uniforms.merge(o.uniforms)
        self.decisions += o.decisions
        self.seeded += o.seeded
        self.uniform_count += o.uniform_count


class AuditState:
    """Sufficient statistics of the audit over the chunks merged so far."""

    def __init__(self, sample_size: int = SAMPLE_SIZE) -> None:
        if isinstance(sample_size, bool) or not isinstance(sample_size, int) or sample_size < 1:
            raise ReplayError(f"sample_size must be a positive integer, got {sample_size!r}")
        self.sample_size = sample_size
        self.decisions = 0
        self.groups: dict[GroupKey, _GroupState] = {}
        self.streams: dict[str, _StreamState] = {}

    def _stream(self, name: str) -> _StreamState:
        if name not in self.streams:
            size = self.sample_size
            self.streams[name] = _StreamState(_Sketch(size), _Sketch(size))
        return self.streams[name]

    def merge(self, other: AuditState) -> None:
        """Add ``other`` (another chunk or partition) into this state."""
        self.decisions += other.decisions
        for key, g in other.groups.items():
            if key in self.groups:
                self.groups[key].merge(g)
            else:
                self.groups[key] = g
        for name, s in other.streams.items():
            self._stream(name).merge(s)

    def finish(self, alpha: float = ALPHA) -> AuditReport:
        """Run every test on the statistics gathered and return the report."""
        _check_alpha(alpha)
        tests: list[AuditTest] = []
        figures: list[AuditFigure] = []
        for stream in sorted(self.streams):
            found: list[_Found] = []
            for key in sorted(k for k in self.groups if k[0] == stream):
                group = self.groups[key]
                if group.units is not None:
                    group = _bucket_state(group, self.sample_size)
                found.extend(_group_tests(key, group))
                figures.append(_figure(key, group))
            found.extend(_stream_tests(stream, self.streams[stream]))
            tests.extend(_verdicts(found, alpha))
        return AuditReport(tuple(tests), tuple(figures), self.decisions, alpha)


def chunk_state(
    decisions: pd.DataFrame, draws: pd.DataFrame, *, sample_size: int = SAMPLE_SIZE
) -> AuditState:
    """Sufficient statistics of one chunk of the ``decisions`` and ``draws`` tables.

    ``draws`` may hold draws of other decisions (they are ignored); decisions without draws
    count towards the number of decisions and their seeds.
    """
    state = AuditState(sample_size)
    _check_columns(decisions, _DECISION_COLUMNS, "decisions")
    _check_columns(draws, _DRAW_COLUMNS, "draws")
    decisions = decisions.drop_duplicates("decision_id")
    state.decisions = len(decisions)
    for stream, part in decisions.groupby("stream", sort=False):
        s = state._stream(str(stream))
        seeds = part["seed"].dropna().to_numpy(dtype=object)
        s.decisions += len(part)
        s.seeded += len(seeds)
        s.seeds.merge(_Sketch(sample_size, seeds.astype(str)))
    rows = draws[list(_DRAW_COLUMNS)].merge(
        decisions[["decision_id", "stream", "unit", "ts", "inputs"]], on="decision_id"
    )
    for (g_stream, kind, name), part in rows.groupby(
        ["stream", "kind", "name"], dropna=False, sort=False
    ):
        key: GroupKey = (
            str(g_stream),
            str(kind),
            None if name is None or name != name else str(name),
        )
        if kind == "bucket":
            g = _GroupState(sample_size)
            g.units = _unit_frame(part, sample_size)
            g.draws = len(part)
        else:
            g, flat_u = _group_state(str(kind), part, sample_size)
            s = state._stream(key[0])
            s.uniform_count += len(flat_u)
            s.uniforms.merge(_Sketch(sample_size, flat_u))
        if key in state.groups:
            state.groups[key].merge(g)
        else:
            state.groups[key] = g
    return state


def _bucket_state(group: _GroupState, size: int) -> _GroupState:
    """Statistics of a bucket draw computed over its units (one row per unit)."""
    assert group.units is not None
    units = group.units
    st, _ = _group_state("bucket", units, size)
    st.problems.update(group.problems)
    st.units = units
    return st


def _check_columns(df: pd.DataFrame, columns: tuple[str, ...], table: str) -> None:
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise ReplayError(f"the {table} table has no column {', '.join(missing)}")


def _check_alpha(alpha: float) -> None:
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0.0 < alpha < 1.0:
        raise ReplayError(f"alpha must be a number between 0 and 1, got {alpha!r}")


# -- tests --------------------------------------------------------------------------------------
@dataclass
class _Found:
    """A test computed but not yet judged (Holm's correction needs all tests of the stream)."""

    stream: str
    draw: str | None
    kind: str | None
    test: str
    n: int
    result: TestResult | None  # None: not enough data
    count: int | None = None  # deterministic checks: the number of violations
    field: str | None = None
    detail: str = ""
    chisq: bool = False


def _group_tests(key: GroupKey, g: _GroupState) -> list[_Found]:
    stream, kind, name = key

    def found(test: str, n: int, result: TestResult | None, **kw: Any) -> _Found:
        return _Found(stream, name, kind, test, n, result, **kw)

    bad = sum(g.problems.values())
    detail = "; ".join(f"{v} {k}" for k, v in sorted(g.problems.items()))
    out = [found("consistency", g.draws, None, count=bad, detail=detail)]
    if kind == "bucket" and g.units is not None:
        units = g.units
        split = int((units["arm_min"] != units["arm_max"]).sum())
        out.append(
            found(
                "unit_in_two_arms",
                len(units),
                None,
                count=split,
                detail="counts units; each unit's first draw enters the other tests",
            )
        )
    if not g.steps:
        return out
    if g.ratio is not None and int((g.ratio.expected > 0).sum()) >= 2:
        res, how = _ratio(g.ratio, g.signature is not None)
        out.append(found("ratio", int(g.ratio.observed.sum()), res, detail=how, chisq=True))
    elif g.note:
        out[0].detail = "; ".join(filter(None, [out[0].detail, f"no ratio test: {g.note}"]))
    if g.varying and g.calibration is not None:
        res, _ = _ratio(g.calibration, False)
        out.append(
            found(
                "calibration",
                g.steps,
                res,
                chisq=True,
                detail="picks grouped by their declared probability",
            )
        )
    sample = g.sample.frame()
    if g.uniforms:
        u = sample["u"].to_numpy()
        u = u[~np.isnan(u)]
        out.append(found("uniforms_ks", len(u), _ks(u), detail=_sampled(len(u), g.uniforms)))
        out.append(
            found("uniforms_chisq", g.uniforms, _stats.binned_uniformity(g.u_hist), chisq=True)
        )
    pit = sample["pit"].to_numpy()
    out.append(found("pit_ks", len(pit), _ks(pit), detail=_sampled(len(pit), g.steps)))
    out.append(found("pit_chisq", g.steps, _stats.binned_uniformity(g.pit_hist), chisq=True))
    fields = _input_fields(sample)
    for series in ("uniforms", "pit") if g.uniforms else ("pit",):
        y = sample["u" if series == "uniforms" else "pit"].to_numpy()
        out.append(found(f"{series}_vs_time", *_rank(y, sample["ts"].to_numpy())))
        for f in fields:
            n, res = _rank(y, sample[f].to_numpy())
            out.append(found(f"{series}_vs_input", n, res, field=f[len("input:") :]))
    res, hours = _by_hour(g.hour_hist)
    out.append(
        found(
            "pit_vs_hour", g.steps, res, chisq=True, detail=f"{hours} hours (UTC) with enough draws"
        )
    )
    return out


def _sampled(n: int, total: int) -> str:
    return "" if n == total else f"on a sample of {n} of {total}"


def _ks(x: FloatArray) -> TestResult | None:
    return _stats.ks_uniform(x) if len(x) >= MIN_KS else None


def _rank(y: FloatArray, x: FloatArray) -> tuple[int, TestResult | None]:
    mask = ~(np.isnan(y) | np.isnan(x))
    y, x = y[mask], x[mask]
    if len(y) < MIN_RANK or np.all(x == x[0]) or np.all(y == y[0]):
        return len(y), None
    return len(y), _stats.spearman(y, x)


def _input_fields(sample: pd.DataFrame) -> list[str]:
    cols = [c for c in sample.columns if c.startswith("input:")]
    present = sample[cols].notna().sum().sort_values(ascending=False, kind="stable")
    varying = [c for c in present.index if sample[c].nunique() > 1]
    return sorted(varying[:MAX_INPUT_FIELDS])


def _ratio(cells: _Cells, fixed: bool) -> tuple[TestResult | None, str]:
    """Observed picks per cell against the sums of declared probabilities (docs/audit.md)."""
    groups = _stats.pool_cells(cells.expected)
    if not groups:
        return None, ""
    a = _stats.grouping_matrix(groups, len(cells.keys))
    observed, expected = a @ cells.observed, a @ cells.expected
    pooled = sum(len(g) for g in groups) != len(groups)
    how = " (cells with expected count < 5 pooled)" if pooled else ""
    if fixed:
        return _stats.pearson(observed, expected), "Pearson chi-square, fixed probabilities" + how
    cov = a @ (np.diag(cells.expected) - cells.outer) @ a.T
    res = _stats.quadratic_chisq(observed - expected, cov)
    return res, "chi-square with Poisson-binomial variances, varying probabilities" + how


def _by_hour(hist: IntArray) -> tuple[TestResult | None, int]:
    """PIT values against U(0, 1) within each hour of the day: sum of Pearson chi-squares."""
    per_hour = _stats.coarsen(hist, HOUR_BINS)
    n_h = per_hour.sum(axis=1)
    used = per_hour[n_h / HOUR_BINS >= _stats.MIN_EXPECTED]
    if len(used) < 2:
        return None, len(used)
    expected = used.sum(axis=1, keepdims=True) / HOUR_BINS
    stat = float(np.sum((used - expected) ** 2 / expected))
    df = len(used) * (HOUR_BINS - 1)
    return TestResult(stat, float(stats.chi2.sf(stat, df)), df), len(used)


def _stream_tests(stream: str, s: _StreamState) -> list[_Found]:
    out = []
    if s.seeded:
        kept = int(s.seeds.counts.sum())
        share = _seed_share(s.seeds) if s.seeds.truncated else 1.0
        res = _stats.repeats(kept, len(s.seeds.values), 2.0**128 * share)
        out.append(
            _Found(
                stream, None, None, "repeated_seeds", s.seeded, res, detail=_sampled(kept, s.seeded)
            )
        )
    if s.uniform_count:
        values = s.uniforms.values.astype(np.float64)
        kept = int(s.uniforms.counts.sum())
        share = float(values[-1]) if s.uniforms.truncated else 1.0
        cells = _stats.resolution(values)
        res = _stats.repeats(kept, len(values), cells * share)
        detail = f"{cells:.3g} possible values" + (
            f", {_sampled(kept, s.uniform_count)}" if kept != s.uniform_count else ""
        )
        out.append(
            _Found(stream, None, None, "repeated_uniforms", s.uniform_count, res, detail=detail)
        )
    return out


def _seed_share(sketch: _Sketch) -> float:
    try:
        return int(str(sketch.values[-1])[:16], 16) / 2.0**64
    except ValueError:
        return 1.0


def _verdicts(found: list[_Found], alpha: float) -> list[AuditTest]:
    """Holm's correction across the p-values of one stream, then a verdict for each test."""
    p_values = {id(f): f.result.p_value for f in found if f.result is not None}
    adjusted = dict(zip(p_values, _stats.holm(list(p_values.values())), strict=True))
    out = []
    for f in found:
        if f.count is not None:
            alarm = f.count > 0
            stat: float | None = float(f.count)
            p = p_adj = None
            df = None
        elif f.result is None:
            alarm, stat, p, p_adj, df = False, None, None, None, None
        else:
            p_adj = adjusted[id(f)]
            alarm = p_adj < alpha
            stat, p = _finite(f.result.statistic), f.result.p_value
            df = f.result.df if f.chisq else None
        verdict = (
            NOT_ENOUGH_DATA
            if (f.count is None and f.result is None)
            else (NOT_AS_DECLARED if alarm else AS_DECLARED)
        )
        out.append(
            AuditTest(
                f.stream,
                f.draw,
                f.kind,
                f.test,
                f.n,
                stat,
                p,
                p_adj,
                verdict,
                alarm,
                df,
                f.field,
                f.detail,
            )
        )
    return out


def _finite(x: float) -> float | None:
    return x if math.isfinite(x) else None


def _figure(key: GroupKey, g: _GroupState) -> AuditFigure:
    stream, kind, name = key
    cells = g.ratio
    return AuditFigure(
        stream=stream,
        draw=name,
        kind=kind,
        n=g.steps,
        pit_counts=tuple(int(x) for x in g.pit_hist),
        uniform_counts=tuple(int(x) for x in g.u_hist) if g.uniforms else (),
        options=tuple(cells.keys) if cells else (),
        observed=tuple(float(x) for x in cells.observed) if cells else (),
        expected=tuple(float(x) for x in cells.expected) if cells else (),
    )


# -- entry points -------------------------------------------------------------------------------
def audit_tables(
    decisions: pd.DataFrame,
    draws: pd.DataFrame,
    *,
    alpha: float = ALPHA,
    sample_size: int = SAMPLE_SIZE,
    chunk_size: int | None = None,
) -> AuditReport:
    """Audit in-memory ``decisions`` and ``draws`` tables (the ledger's column layout).

    ``chunk_size`` splits the decisions into chunks as ``audit`` does when reading a ledger;
    the result is the same to floating-point accuracy.
    """
    _check_alpha(alpha)
    state = AuditState(sample_size)
    if chunk_size is None or len(decisions) <= chunk_size:
        state.merge(chunk_state(decisions, draws, sample_size=sample_size))
    else:
        for start in range(0, len(decisions), chunk_size):
            part = decisions.iloc[start : start + chunk_size]
            mine = draws[draws["decision_id"].isin(part["decision_id"])]
            state.merge(chunk_state(part, mine, sample_size=sample_size))
    return state.finish(alpha)


def audit(
    ledger: str | os.PathLike[str] | Ledger,
    *,
    format: str | None = None,
    progress: bool = False,
    engine: str = "local",
    scheduler: str | None = None,
    alpha: float = ALPHA,
    sample_size: int = SAMPLE_SIZE,
    chunk_size: int = 50_000,
) -> AuditReport:
    """Test statistically, stream by stream, that the recorded draws happened as declared.

    ``ledger`` is a path or URL as for ``dl.Ledger`` (or an open ``Ledger``, flushed first).
    The ledger is read in chunks of ``chunk_size`` decisions; memory stays bounded by
    ``sample_size`` values per draw (docs/audit.md).
    """
    from drawledger.replay._io import iter_decision_chunks

    _check_alpha(alpha)
    if engine not in ("local", "dask"):
        raise ReplayError(f"unknown engine {engine!r}; use 'local' or 'dask'")
    if scheduler is not None and engine != "dask":
        raise ReplayError("a scheduler address needs the dask engine")
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, int) or chunk_size < 1:
        raise ReplayError(f"chunk_size must be a positive integer, got {chunk_size!r}")
    from drawledger.ledger import Ledger

    target: str | os.PathLike[str]
    if isinstance(ledger, Ledger):
        ledger.flush()
        target, format = ledger.target, format or ledger.format
    else:
        target = ledger
    if engine == "dask":  # the same chunks, on a Dask cluster (replay/_dask.py)
        from drawledger.replay._dask import audit_on_dask

        return audit_on_dask(target, format=format, scheduler=scheduler, alpha=alpha,
                             sample_size=sample_size, chunk_size=chunk_size,
                             progress=progress)  # fmt: skip
    state = AuditState(sample_size)
    chunks = iter_decision_chunks(target, chunk_size, format=format)
    with _Progress(progress) as advance:
        try:
            for decisions, draws in chunks:
                state.merge(chunk_state(decisions, draws, sample_size=sample_size))
                advance(len(decisions))
        except Exception as exc:
            if isinstance(exc, (LedgerError, ReplayError)) or not _is_read_error(exc):
                raise
            first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise LedgerError(f"cannot read ledger {os.fspath(target)!r}: {first}") from exc
    return state.finish(alpha)


def _is_read_error(exc: Exception) -> bool:
    import sqlalchemy as sa

    return isinstance(exc, (sa.exc.SQLAlchemyError, OSError))


class _Progress:
    """A rich progress line on stderr counting the decisions audited (or nothing)."""

    def __init__(self, enabled: bool) -> None:
        self.enabled = enabled

    def __enter__(self) -> Callable[[int], None]:
        if not self.enabled:
            return lambda n: None
        from rich.console import Console
        from rich.progress import Progress, SpinnerColumn, TextColumn

        self.bar = Progress(
            SpinnerColumn(),
            TextColumn("auditing: {task.completed} decisions"),
            console=Console(stderr=True),
            transient=True,
        )
        self.bar.start()
        task = self.bar.add_task("audit", total=None)
        return lambda n: self.bar.advance(task, n)

    def __exit__(self, *exc: object) -> None:
        if self.enabled:
            self.bar.stop()
