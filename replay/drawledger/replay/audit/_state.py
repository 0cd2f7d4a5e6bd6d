"""The audit's sufficient statistics: built per chunk, merged in order."""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from drawledger.replay._keys import id_keys
from drawledger.replay.audit import _stats
from drawledger.replay.audit._declared import Parsed, load_texts
from drawledger.replay.audit._limits import (
    CAL_EDGES,
    CAL_KEYS,
    CONTRADICTS,
    HASH_KEY,
    MAX_EXAMPLES,
    MAX_OPTIONS,
    SALT_K,
    SALT_V,
    STEP,
    IntArray,
    U64Array,
)
from drawledger.replay.audit._parse import close_to, parse_draws, parse_uniforms
from drawledger.replay.audit._stats import BINS, FloatArray
from drawledger.replay.audit._units import PAIRED_KINDS, UnitPairs, unit_pairs
from drawledger.replay.audit._values import contradicting

if TYPE_CHECKING:
    pass


@dataclass
class Cells:
    """Counts of picks per cell against the sums of declared probabilities.

    ``outer`` is sum_i p_i p_i' over picks i: with ``expected`` it gives the covariance of the
    counts, sum_i (diag(p_i) - p_i p_i').
    """

    keys: list[str]
    observed: FloatArray
    expected: FloatArray
    outer: FloatArray

    def merge(self, other: Cells) -> Cells:
        if self.keys == other.keys:
            return Cells(
                self.keys,
                self.observed + other.observed,
                self.expected + other.expected,
                self.outer + other.outer,
            )
        keys = list(dict.fromkeys(self.keys + other.keys))
        out = Cells(
            keys, np.zeros(len(keys)), np.zeros(len(keys)), np.zeros((len(keys), len(keys)))
        )
        for part in (self, other):
            at = np.array([keys.index(k) for k in part.keys], np.int64)
            out.observed[at] += part.observed
            out.expected[at] += part.expected
            out.outer[np.ix_(at, at)] += part.outer
        return out


def _cells(
    keys: list[str],
    step: IntArray,
    key: IntArray,
    p: FloatArray,
    chosen: IntArray,
    *,
    outer: bool = True,
) -> Cells:
    """The cells of the picks; ``outer=False`` leaves ``outer`` empty (counts only)."""
    k = len(keys)
    if outer:
        from scipy import sparse

        m = sparse.csr_matrix((p, (step, key)), shape=(len(chosen), k))
        products = np.asarray((m.T @ m).todense())
    else:
        products = np.zeros((0, 0))
    observed = np.bincount(key[chosen], minlength=k).astype(np.float64)
    expected = np.bincount(key, weights=p, minlength=k).astype(np.float64)
    return Cells(keys, observed, expected, products)


class Sketch:
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

    def merge(self, other: Sketch) -> None:
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
class GroupState:
    """Sufficient statistics of one draw (stream, kind, name) over the chunks seen so far."""

    size: int
    draws: int = 0
    problems: Counter[str] = field(default_factory=Counter)
    steps: int = 0
    uniforms: int = 0  # steps with a recorded uniform
    u_hist: IntArray = field(default_factory=lambda: np.zeros(BINS, np.int64))
    pit_hist: IntArray = field(default_factory=lambda: np.zeros(BINS, np.int64))
    hour_hist: IntArray = field(default_factory=lambda: np.zeros((24, BINS), np.int64))
    ratio: Cells | None = None
    calibration: Cells | None = None
    note: str | None = None
    signature: tuple[tuple[str, ...], tuple[float, ...]] | None = None
    varying: bool = False
    sample: _Sample = field(init=False)
    units: pd.DataFrame | None = None  # bucket draws: one row per unit
    examples: list[str] = field(default_factory=list)  # ids of draws contradicting uniforms
    pairs: UnitPairs | None = None  # consecutive draws of the same unit

    def __post_init__(self) -> None:
        self.sample = _Sample(self.size)

    def merge(self, o: GroupState) -> None:
        if o.steps:
            if not self.steps:
                self.signature, self.varying = o.signature, o.varying
            elif self.varying or o.varying or o.signature != self.signature:
                self.signature, self.varying = None, True
        self.draws += o.draws
        self.problems.update(o.problems)
        self.examples.extend(o.examples[: MAX_EXAMPLES - len(self.examples)])
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
        if o.pairs is not None:
            if self.pairs is None:
                self.pairs = o.pairs
            else:
                self.pairs.merge(o.pairs)
        if o.units is not None:
            self.units = (
                o.units if self.units is None else merge_units([self.units, o.units], self.size)
            )


def _hash_ids(ids: npt.NDArray[Any], idx: IntArray) -> U64Array:
    """Keys of (decision id or unit, draw index): the id's blake2b key mixed with the index."""
    return _stats.mix64(id_keys(ids, HASH_KEY) ^ (idx.astype(np.uint64) * STEP))


def group_state(
    kind: str, frame: pd.DataFrame, size: int, *, counts_only: bool = False
) -> tuple[GroupState, FloatArray]:
    """Sufficient statistics of one chunk of one draw, and all the uniforms it recorded.

    ``counts_only``: without the hours, unit pairs, calibration and sample (chunk_state).
    """
    st = GroupState(size)
    st.draws = len(frame)
    recorded = frame["prob"].to_numpy(np.float64)
    args, values = frame["args"].to_numpy(dtype=object), frame["value"].to_numpy(dtype=object)
    parsed = parse_draws(kind, args, values, recorded)
    problems = parsed.problems
    finite = np.isfinite(recorded)
    problems["recorded probability is not a finite number"] += int((parsed.ok & ~finite).sum())
    differs = parsed.ok & ~close_to(recorded, parsed.declared)
    problems["recorded probability differs from the declaration"] += int((differs & finite).sum())
    u_texts = frame["u"].to_numpy(dtype=object)
    flat_u, u_len, malformed = parse_uniforms(u_texts)
    problems["recorded uniforms are not numbers in [0, 1]"] += int(malformed.sum())
    # declared draws (no function to replay) with uniforms: their value must follow from them
    declared = frame["fn"].isna().to_numpy() if "fn" in frame.columns else np.ones(len(frame), bool)
    check = parsed.ok & ~differs & ~malformed & declared & (u_len > 0)
    contradicts = contradicting(kind, args, u_texts, values, check)
    problems[CONTRADICTS] += int(contradicts.sum())
    ids = frame["decision_id"].to_numpy(dtype=object)
    st.examples = [str(x) for x in ids[np.flatnonzero(contradicts)[:MAX_EXAMPLES]]]
    st.problems = Counter({k: v for k, v in problems.items() if v})
    keep = (parsed.ok & ~differs & ~malformed)[parsed.row]  # contradicting values stay in
    row, step = parsed.row[keep], parsed.step[keep]
    st.steps = len(row)
    h_row = _hash_ids(ids, frame["idx"].to_numpy(np.int64))
    h = _stats.mix64(h_row[row] ^ ((step.astype(np.uint64) + np.uint64(1)) * STEP))
    v = _stats.to_unit(_stats.mix64(h ^ SALT_V))
    pit = np.clip(parsed.lo[keep] + v * parsed.width[keep], 0.0, 1.0)
    u_start = np.cumsum(u_len) - u_len
    has_u = step < u_len[row]
    u = np.full(len(row), np.nan)
    u[has_u] = flat_u[u_start[row[has_u]] + step[has_u]]
    st.uniforms = int(has_u.sum())
    st.u_hist = _stats.histogram(u[has_u])
    st.pit_hist = _stats.histogram(pit)
    st.note = parsed.note
    if counts_only:
        if parsed.keys is not None and st.steps:
            _discrete_stats(st, parsed, keep, counts_only=True)
        return st, flat_u
    ts = frame["ts"].to_numpy(np.float64)[row]
    hour = (np.floor(ts / 3600.0) % 24).astype(np.int64)
    pit_bin = np.minimum((pit * BINS).astype(np.int64), BINS - 1)
    st.hour_hist = np.bincount(hour * BINS + pit_bin, minlength=24 * BINS).reshape(24, BINS)
    if kind in PAIRED_KINDS and "unit" in frame.columns:
        codes, uniq = pd.factorize(frame["unit"].to_numpy(dtype=object), use_na_sentinel=False)
        names = np.array(["" if x is None or x != x else str(x) for x in uniq], dtype=object)
        unit_keys = _hash_ids(names, np.zeros(len(names), np.int64))[codes]
        st.pairs = unit_pairs(kind, frame, parsed, keep, unit_keys)
    if parsed.keys is not None and st.steps:
        _discrete_stats(st, parsed, keep)
    st.sample.add(_sample_frame(frame, row, ts, u, pit, _stats.mix64(h ^ SALT_K), size))
    return st, flat_u


def _discrete_stats(
    st: GroupState, parsed: Parsed, keep: npt.NDArray[np.bool_], *, counts_only: bool = False
) -> None:
    """The cells of the picks; ``counts_only``: without the calibration cells and the ratio
    cells' ``outer``."""
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
            st.ratio = _cells(parsed.keys, f_step, f_key, f_p, chosen, outer=not counts_only)
    if counts_only:
        return
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
    flat = [_numeric_fields(x) for x in load_texts(uniq)]
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


def merge_units(frames: list[pd.DataFrame], size: int) -> pd.DataFrame:
    """One row per unit: its first draw (by ts, decision id), arms seen, number of draws."""
    df = pd.concat(frames, ignore_index=True)
    agg = df.groupby("unit", sort=False).agg(
        arm_min=("arm_min", "min"), arm_max=("arm_max", "max"), visits=("visits", "sum")
    )
    first = df.sort_values(["unit", "ts", "decision_id"]).drop_duplicates("unit")
    first = first.drop(columns=["arm_min", "arm_max", "visits"]).join(agg, on="unit")
    return _bottom_k(first.reset_index(drop=True), size)


def unit_frame(rows: pd.DataFrame, size: int) -> pd.DataFrame:
    """Bucket draws of one chunk reduced to one row per unit."""
    unit = rows["unit"].astype(object).to_numpy()
    missing = pd.isna(unit)
    if missing.any():
        loaded = load_texts(rows["args"].to_numpy(dtype=object)[missing])
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
    return merge_units([units], size)


class Undrawn:
    """Decisions without draws: the actions seen per (function, inputs, parameters).

    Such a decision should be a function of what it recorded; two actions for the same record
    show randomness the ledger did not capture. Keeps at most ``size`` records (those with the
    smallest keyed hash), so the count is over a sample when ``truncated``.
    """

    def __init__(self, size: int) -> None:
        self.size = size
        self.decisions = 0
        self.truncated = False
        self.actions: dict[int, int] = {}  # record key -> action key, or VARIED

    VARIED = -1

    def add(self, records: npt.NDArray[Any], actions: npt.NDArray[Any]) -> None:
        self.decisions += len(records)
        keys = id_keys(records.astype(str), HASH_KEY).tolist()
        acts = id_keys(actions.astype(str), HASH_KEY).astype(np.int64).tolist()
        self._put(dict(zip(keys, acts, strict=True)) if len(set(keys)) == len(keys)
                  else _fold(keys, acts))  # fmt: skip

    def _put(self, other: dict[int, int]) -> None:
        mine = self.actions
        for k, a in other.items():
            seen = mine.get(k)
            mine[k] = a if seen is None or seen == a else self.VARIED
        if len(mine) > self.size:
            self.actions = dict(sorted(mine.items())[: self.size])
            self.truncated = True

    def merge(self, o: Undrawn) -> None:
        self.decisions += o.decisions
        self.truncated |= o.truncated
        self._put(o.actions)

    @property
    def varied(self) -> int:
        return sum(1 for a in self.actions.values() if a == self.VARIED)


def _fold(keys: list[int], acts: list[int]) -> dict[int, int]:
    out: dict[int, int] = {}
    for k, a in zip(keys, acts, strict=True):
        seen = out.get(k)
        out[k] = a if seen is None or seen == a else Undrawn.VARIED
    return out


@dataclass
class StreamState:
    seeds: Sketch
    uniforms: Sketch
    decisions: int = 0
    seeded: int = 0  # decisions with a seed
    uniform_count: int = 0  # uniforms recorded by draws other than bucket
    undrawn: Undrawn | None = None

    def merge(self, o: StreamState) -> None:
        self.seeds.merge(o.seeds)
        self.uniforms.merge(o.uniforms)
        self.decisions += o.decisions
        self.seeded += o.seeded
        self.uniform_count += o.uniform_count
        if o.undrawn is not None:
            if self.undrawn is None:
                self.undrawn = o.undrawn
            else:
                self.undrawn.merge(o.undrawn)
