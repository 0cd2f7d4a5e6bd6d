"""``verify``: re-execute every recorded decision and confirm each draw, probability and action.

The work is a pure function of one chunk of decisions with their draws (``verify_chunk``)
and a combine step, so that chunks can run in other processes (``jobs``) or on a Dask
cluster (replay/_dask.py). Reasons a decision is not verified (docs/replay.md):

- mismatched (it replayed, something differs): value, probability, args, draw-count, action,
  nondeterministic, code-changed, integrity;
- unreplayable (it could not be replayed): missing-function, not-a-decision, bad-record,
  replay-error, declared (a draw recorded by other code; ``drawledger audit`` checks those).
"""

from __future__ import annotations

import io
import math
import multiprocessing
import os
import sys
from collections import Counter
from collections.abc import Iterable, Iterator, Mapping, Sequence
from collections.abc import Set as AbstractSet
from concurrent.futures import Executor, Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field
from operator import itemgetter
from typing import Any

import orjson
import pandas as pd
import sqlalchemy as sa

from drawledger._probability import decision_propensity
from drawledger._records import (  # _default, _OPTS: the SDK's own JSON encoding, bit for bit
    _OPTS,
    DECISION_COLUMNS,
    DRAW_COLUMNS,
    _default,
    from_json,
    to_json,
)
from drawledger.draw import Draw, DrawRecord, bucket_assign
from drawledger.exceptions import (
    BadRecordError,
    DrawArgumentError,
    LedgerError,
    MissingFunctionError,
    NotADecisionError,
    ReplayError,
)
from drawledger.ledger import Decision
from drawledger.replay import _export
from drawledger.replay._enumerate import (
    DEFAULT_BUDGET,
    DEFAULT_MC_SAMPLES,
    DENSITY,
    EXACT,
    Memo,
    Propensity,
    read,
    remembered,
    single_draw_probability,
)
from drawledger.replay._imports import build_inputs, immutable, load_params, parse_object
from drawledger.replay._imports import resolve_decision as _resolve
from drawledger.replay._integrity import IntegrityReport, check_integrity
from drawledger.replay._io import is_parquet, open_engine

__all__ = ["REASONS", "ChunkResult", "Settings", "VerifyReport", "verify", "verify_chunk"]

Row = tuple[Any, ...]

REASONS = (
    "value",
    "probability",
    "args",
    "draw-count",
    "action",
    "nondeterministic",
    "code-changed",
    "integrity",
    "missing-function",
    "not-a-decision",
    "bad-record",
    "replay-error",
    "declared",
)
UNREPLAYABLE = frozenset({"missing-function", "not-a-decision", "bad-record", "replay-error",
                          "declared"})  # fmt: skip
# "declared" draws are counted as unreplayable but do not fail the check: they were made by
# other code, and ``drawledger audit`` tests them statistically.
NOT_FAILING = frozenset({"declared"})
VERIFIED, MISMATCHED, UNREPLAYABLE_ = 1, 2, 3
MAX_EXAMPLES = 5
COUNTS = ("decisions", "verified", "mismatched", "unreplayable")
REL_TOL = 1e-12
CHUNK_SIZE = 10_000
PARALLEL_CHUNK_SIZE = 2_000  # smaller chunks spread the work of several processes evenly
PROBES = 8  # decisions of each function enumerated fully per chunk before the one-draw path
_SHOW = 70


@dataclass(frozen=True)
class Settings:
    """What every chunk needs to know (picklable: sent once per chunk to a worker)."""

    path: tuple[str, ...] = ()
    allow: tuple[str, ...] = ()
    budget: int = DEFAULT_BUDGET
    mc_samples: int = DEFAULT_MC_SAMPLES
    keep_rows: bool = True


@dataclass
class ChunkResult:
    """Counts, examples and export rows of one chunk (or of several, once combined)."""

    streams: dict[str, list[int]] = field(default_factory=dict)  # decisions, verified, ...
    stream_reasons: dict[str, Counter[str]] = field(default_factory=dict)
    by_reason: Counter[str] = field(default_factory=Counter)
    examples: dict[str, list[tuple[str, str]]] = field(default_factory=dict)
    methods: Counter[str] = field(default_factory=Counter)
    rows: list[pd.DataFrame] = field(default_factory=list)

    def add(self, other: ChunkResult) -> None:
        for stream, found in other.stream_reasons.items():
            self.stream_reasons.setdefault(stream, Counter()).update(found)
        for stream, counts in other.streams.items():
            mine = self.streams.setdefault(stream, [0, 0, 0, 0])
            for i, n in enumerate(counts):
                mine[i] += n
        self.by_reason.update(other.by_reason)
        self.methods.update(other.methods)
        for reason, shown in other.examples.items():
            mine_shown = self.examples.setdefault(reason, [])
            mine_shown.extend(shown[: MAX_EXAMPLES - len(mine_shown)])
        self.rows.extend(other.rows)


# -- comparing recorded and replayed values ---------------------------------------------------
def _close(a: float, b: float) -> bool:
    return a == b or abs(a - b) <= REL_TOL * max(abs(a), abs(b))


def _same(a: Any, b: Any) -> bool:
    """JSON values equal, numbers within 1e-12 relative."""
    if isinstance(a, bool) or isinstance(b, bool):
        return a is b
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return _close(float(a), float(b))
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    return bool(a == b)


def _parse(text: Any, what: str) -> Any:
    if not isinstance(text, str):
        raise BadRecordError(f"{what} is not JSON text (got {type(text).__name__})")
    try:
        return from_json(text)
    except ValueError as exc:
        raise BadRecordError(f"{what} is not valid JSON: {exc}") from None


def _json_same(replayed: str, recorded: Any, what: str) -> bool:
    """Replayed JSON text equals the recorded text (floats at 1e-12); corrupt text raises."""
    if replayed == recorded:
        return True
    return _same(from_json(replayed), _parse(recorded, what))


def _text(x: Any) -> str | None:
    return x if isinstance(x, str) else None


def _number(x: Any, what: str) -> float:
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
        raise BadRecordError(f"{what} is {x!r}, not a finite number")
    return float(x)


def _short(text: str) -> str:
    return text if len(text) <= _SHOW else text[: _SHOW - 3] + "..."


def _json(obj: Any, what: str) -> str:
    """JSON text exactly as the SDK records it (a NaN, which it refuses, shows as a difference)."""
    try:
        return orjson.dumps(obj, default=_default, option=_OPTS).decode()
    except TypeError:
        return to_json(obj, what)  # raises the SDK's NotSerializableError with the reason


def _encode(records: Sequence[DrawRecord]) -> list[tuple[Any, ...]]:
    return [
        (r.kind, r.name, _json(r.args, "draw arguments"), _json(r.u, "uniforms"),
         _json(r.value, "draw value"), r.prob, bool(r.is_density))
        for r in records
    ]  # fmt: skip


def _logged(encoded: Sequence[tuple[Any, ...]], action_json: str) -> tuple[float, str]:
    """The propensity the SDK logs for these draws and action (ledger._record_decision)."""
    single = len(encoded) == 1 and encoded[0][4] == action_json
    return decision_propensity(encoded, single, itemgetter(5))


# -- one decision --------------------------------------------------------------------------------
class _Checked:
    """Reasons found for one decision, with the first detail of each."""

    __slots__ = ("inputs", "propensity", "reasons")

    def __init__(self) -> None:
        self.reasons: dict[str, str] = {}
        self.propensity: Propensity | None = None
        self.inputs: Mapping[str, Any] = {}

    def add(self, reason: str, detail: str) -> None:
        if reason not in self.reasons:
            self.reasons[reason] = detail


class _Context:
    """Per-chunk caches: resolved functions, decoded parameters, enumerated distributions."""

    def __init__(self, settings: Settings) -> None:
        self.settings = settings
        self.resolved: dict[str, Decision[Any] | ReplayError] = {}
        self.params: dict[tuple[str, str], dict[str, Any]] = {}
        self.memo = Memo()
        self.probed: Counter[str] = Counter()  # decisions fully enumerated, by function
        self.multi: set[str] = set()  # functions seen making several draws (never trusted)

    def resolve(self, fn: str) -> Decision[Any]:
        found = self.resolved.get(fn)
        if found is None:
            try:
                found = _resolve(fn, path=self.settings.path, allow=self.settings.allow)
            except ReplayError as exc:
                found = exc
            self.resolved[fn] = found
        if isinstance(found, ReplayError):
            raise found
        return found

    def load_params(self, decision: Decision[Any], text: Any) -> dict[str, Any]:
        key = (decision.name, text)
        cached = self.params.get(key)
        if cached is None:
            cached = load_params(decision, text if isinstance(text, str) else repr(text))
            if immutable(cached) and len(self.params) < 1024:
                self.params[key] = cached
        return cached


def _failure_reason(exc: ReplayError) -> str:
    if isinstance(exc, MissingFunctionError):
        return "missing-function"
    if isinstance(exc, NotADecisionError):
        return "not-a-decision"
    if isinstance(exc, BadRecordError):
        return "bad-record"
    return "replay-error"


def _seed(text: Any) -> bytes:
    if not isinstance(text, str) or len(text) != 32:
        raise BadRecordError(f"seed {text!r} is not 32 hex digits")
    try:
        return bytes.fromhex(text)
    except ValueError:
        raise BadRecordError(f"seed {text!r} is not 32 hex digits") from None


def _draw_rows(rows: list[Row]) -> list[Row]:
    if len(rows) > 1:
        rows.sort(key=lambda d: d[1] if isinstance(d[1], int) else -1)
    for i, d in enumerate(rows):
        if d[1] != i:
            raise BadRecordError(f"draw indexes are {[d[1] for d in rows]}, not 0, 1, 2, ...")
        if not (d[7].__class__ is float and -math.inf < d[7] < math.inf):
            _number(d[7], f"draw {i} probability")
    return rows


def _compare_draws(out: _Checked, replayed: list[tuple[Any, ...]], recorded: list[Row]) -> None:
    if len(replayed) != len(recorded):
        out.add("draw-count", f"{len(recorded)} draws recorded, {len(replayed)} replayed")
    for (kind, name, args, u, value, prob, dens), d in zip(replayed, recorded, strict=False):
        if (kind == d[3] and args == d[4] and u == d[5] and value == d[6] and prob == d[7]
                and dens == bool(d[8]) and name == _text(d[2])):  # fmt: skip
            continue  # the usual case: identical to the record
        where = f"draw {d[1]} ({kind}{'' if name is None else ' ' + repr(name)})"
        if kind != d[3] or name != _text(d[2]):
            out.add("args", f"{where}: recorded as {d[3]} {_text(d[2])!r}")
        elif not _json_same(args, d[4], f"{where} arguments"):
            out.add("args", f"{where}: arguments {_short(args)} replayed, {_short(d[4])} recorded")
        if not _json_same(u, d[5], f"{where} uniforms"):
            out.add("value", f"{where}: uniforms {_short(u)} replayed, {_short(d[5])} recorded")
        if not _json_same(value, d[6], f"{where} value"):
            out.add("value", f"{where}: value {_short(value)} replayed, {_short(d[6])} recorded")
        if not _close(prob, d[7]) or dens != bool(d[8]):
            what = "density" if dens else "probability"
            out.add("probability", f"{where}: {what} {prob!r} replayed, {d[7]!r} recorded")


def _check_python(out: _Checked, row: Row, draws: list[Row], ctx: _Context) -> None:
    raw = parse_object(row[6], "inputs")
    out.inputs = raw
    decision = ctx.resolve(row[4])
    if decision.code_hash != row[5]:
        out.add("code-changed", f"code hash {row[5]} recorded, {decision.code_hash} now")
    seed = _seed(row[11])
    inputs = build_inputs(decision, raw)
    params = ctx.load_params(decision, row[7])
    logged = _number(row[9], "logged propensity")
    draws = _draw_rows(draws)
    try:
        draw = Draw(seed)
        first_action = decision.run(draw, inputs, params)
        records = draw.records
        first = _encode(records)
        action = _json(first_action, "action")
    except Exception as exc:
        out.add("replay-error", f"{type(exc).__name__}: {exc}")
        return
    _compare_draws(out, first, draws)
    if _json_same(action, row[8], "action"):
        action_key = action
    else:
        action_key = to_json(from_json(row[8]), "action")
        out.add("action", f"action {_short(action)} replayed, {_short(row[8])} recorded")
    prop, kind = _logged(first, action)
    if not _close(prop, logged) or kind != row[10]:
        out.add("probability", f"logged propensity {logged!r} ({row[10]}) recorded, "
                f"{prop!r} ({kind}) replayed")  # fmt: skip
    try:
        again = Draw(seed)
        returned = decision.run(again, inputs, params)
        same = again.records == records and returned == first_action
        if not same:  # objects without value equality: compare their recorded form
            same = _encode(again.records) == first and to_json(returned, "action") == action
    except Exception as exc:
        out.add("nondeterministic", f"a second run raised {type(exc).__name__}: {exc}")
    else:
        if not same:
            out.add("nondeterministic", "a second run with the same seed and inputs differs "
                    "(hidden state, a clock, or inputs changed by the function)")  # fmt: skip
    try:
        out.propensity = _propensity(ctx, decision, inputs, params, action_key, records, first,
                                     action, (row[6], row[7]))  # fmt: skip
    except Exception as exc:
        out.add("replay-error", f"propensity: {type(exc).__name__}: {exc}")


def _propensity(
    ctx: _Context,
    decision: Decision[Any],
    inputs: Mapping[str, Any],
    params: Mapping[str, Any],
    action_key: str,
    records: list[DrawRecord],
    encoded: list[tuple[Any, ...]],
    returned: str,
    texts: tuple[str, str],
) -> Propensity:
    """The replayed propensity of the recorded action.

    A function whose draws were fully enumerated for its first decisions in this chunk (the
    probes) and always made one draw returning its value is trusted to do so: later decisions
    read the probability of that one draw ("exact") or its density.
    """
    if not records:  # no draw: nothing random happens before or after
        return Propensity(1.0 if returned == action_key else 0.0, EXACT)
    name = decision.name
    single_run = len(records) == 1 and encoded[0][4] == returned
    if not single_run:
        ctx.multi.add(name)
    elif name not in ctx.multi and ctx.probed[name] >= PROBES:
        rec = records[0]
        if rec.is_density and returned == action_key:
            return Propensity(rec.prob, DENSITY)
        p = None if rec.is_density else single_draw_probability(rec, action_key, encoded[0][4])
        if p is not None:
            return Propensity(p, EXACT)
    settings = ctx.settings
    found = remembered(ctx.memo, decision, inputs, params, action_key, budget=settings.budget,
                       mc_samples=settings.mc_samples, texts=texts)  # fmt: skip
    ctx.probed[name] += 1
    if not found.single:
        ctx.multi.add(name)
    return read(found, action_key)


def _bucket_args(draw: Row) -> tuple[str, dict[str, Any], str] | None:
    args = _parse(draw[4], "bucket arguments")
    if not isinstance(args, dict) or set(args) != {"unit", "shares", "salt"}:
        return None
    unit, shares, salt = args["unit"], args["shares"], args["salt"]
    if not isinstance(unit, str) or not isinstance(shares, dict) or not isinstance(salt, str):
        raise BadRecordError("bucket arguments: unit, shares or salt has the wrong type")
    return unit, shares, salt


def _arm(text: Any, what: str) -> str:
    """A recorded arm as a key of the recorded shares (JSON object keys are text)."""
    value = _parse(text, what)
    return value if isinstance(value, str) else to_json(value, what)


def _check_bucket(out: _Checked, row: Row, draw: Row, unit: str, shares: dict[str, Any],
                  salt: str) -> None:  # fmt: skip
    """Hashed assignment has no seed: recompute the arm, its uniform and its share."""
    recorded_u = _parse(draw[5], "bucket uniforms")
    keys = [salt.encode()]
    if len(salt) % 2 == 0 and all(c in "0123456789abcdef" for c in salt):
        keys.append(bytes.fromhex(salt))  # a bytes salt is recorded as hex
    try:
        found = [bucket_assign(unit, shares, k) for k in keys]
    except DrawArgumentError as exc:
        raise BadRecordError(f"bucket arguments: {exc}") from None
    arm, u, prob, _, _ = next((f for f in found if [f[1]] == recorded_u), found[0])
    if not isinstance(recorded_u, list) or not _same([u], recorded_u):
        out.add("value", f"bucket uniform {u!r} recomputed, {_short(draw[5])} recorded")
    if _arm(draw[6], "bucket arm") != arm:
        out.add("value", f"bucket arm {arm!r} recomputed, {_short(draw[6])} recorded")
    if not _close(prob, _number(draw[7], "bucket share")):
        out.add("probability", f"bucket share {prob!r} recomputed, {draw[7]!r} recorded")
    if not _close(prob, _number(row[9], "logged propensity")):
        out.add("probability", f"logged propensity {row[9]!r} recorded, {prob!r} recomputed")
    if _text(row[2]) != unit:
        out.add("args", f"bucket unit {unit!r} in the draw, {row[2]!r} on the decision")
    if _arm(row[8], "action") != arm:
        out.add("action", f"action {_short(row[8])} recorded, arm {arm!r} recomputed")
    out.propensity = Propensity(prob, EXACT)


def _check_other(out: _Checked, row: Row, draws: list[Row]) -> None:
    """A decision without a function: a hashed bucket assignment or a declared draw."""
    if len(draws) == 1 and draws[0][3] == "bucket":
        args = _bucket_args(draws[0])
        if args is not None:
            _check_bucket(out, row, draws[0], *args)
            return
    kind = draws[0][3] if draws else "no"
    out.add("declared", f"declared {kind} draw: audited, not replayed")


def check_decision(row: Row, draws: list[Row], ctx: _Context, flagged: bool) -> _Checked:
    """Every reason one decision is not verified (none: verified)."""
    out = _Checked()
    if flagged:
        out.add("integrity", "part of an integrity problem (see integrity)")
    try:
        if _text(row[4]) is None:
            _check_other(out, row, draws)
        else:
            _check_python(out, row, draws, ctx)
    except ReplayError as exc:
        out.add(_failure_reason(exc), str(exc))
    return out


# -- one chunk -----------------------------------------------------------------------------------
def _category(reasons: Mapping[str, str]) -> int:
    if not reasons:
        return VERIFIED
    found = set(reasons)
    if found & UNREPLAYABLE:
        return UNREPLAYABLE_
    return MISMATCHED if found else VERIFIED


def verify_chunk(
    decisions: Sequence[Row],
    draws: Iterable[Row],
    flagged: AbstractSet[str],
    settings: Settings,
) -> ChunkResult:
    """Check a chunk of decision rows with their draw rows (tuples in the ledger's column order).

    ``flagged`` holds the ids among them that the integrity check found in a problem. Pure:
    the result depends only on the arguments (and the decision code they name).
    """
    by_id: dict[str, list[Row]] = {}
    for d in draws:
        by_id.setdefault(d[0], []).append(d)
    ctx = _Context(settings)
    result = ChunkResult()
    base: list[tuple[Any, ...]] = []
    flat: list[dict[str, Any]] = []
    for row in decisions:
        did = row[0]
        checked = check_decision(row, list(by_id.get(did, ())), ctx, did in flagged)
        reasons = checked.reasons
        category = _category(reasons)
        stream = row[1] if isinstance(row[1], str) else str(row[1])
        counts = result.streams.setdefault(stream, [0, 0, 0, 0])
        counts[0] += 1
        counts[category] += 1
        if reasons:
            result.stream_reasons.setdefault(stream, Counter()).update(reasons.keys())
        for reason, detail in reasons.items():
            result.by_reason[reason] += 1
            shown = result.examples.setdefault(reason, [])
            if len(shown) < MAX_EXAMPLES:
                shown.append((did, detail))
        prop = checked.propensity
        if prop is not None:
            result.methods[prop.method] += 1
        if settings.keep_rows:
            base.append((
                did, row[1], _text(row[2]), row[3], row[8],
                math.nan if prop is None else prop.value,
                None if prop is None else prop.method,
                math.nan if prop is None else prop.stderr,
                row[9], row[10], category == VERIFIED,
                ";".join(reasons) or None, next(iter(reasons.values()), None),
            ))  # fmt: skip
            flat.append(_export.flatten_inputs(checked.inputs))
    if settings.keep_rows and base:
        frame = pd.DataFrame.from_records(base, columns=list(_export.BASE_COLUMNS))
        if any(flat):
            frame = pd.concat([frame, pd.DataFrame.from_records(flat)], axis=1)
        result.rows.append(frame)
    return result


# -- reading a ledger in chunks ------------------------------------------------------------------
_DEC = ", ".join(DECISION_COLUMNS)
_DRAW = ", ".join(f"dr.{c}" for c in DRAW_COLUMNS)


@dataclass(frozen=True)
class SqlSlice:
    """The decisions of one writer with ``lo <= seq < hi`` (``hi`` None: to the end)."""

    writer: str
    lo: int
    hi: int | None
    rows: int


_STARTS = sa.text(
    "SELECT writer, seq, rn FROM (SELECT writer, seq, ROW_NUMBER() OVER "
    "(PARTITION BY writer ORDER BY seq) AS rn FROM decisions) AS numbered "
    "WHERE (rn - 1) % :size = 0 ORDER BY writer, rn"
)


def sql_slices(engine: sa.Engine, size: int) -> list[SqlSlice]:
    """Each writer's decisions in seq order, cut every ``size`` records (by seq ranges, so a
    duplicated (writer, seq) never falls between two slices)."""
    with engine.connect() as conn:
        totals: dict[str, int] = dict(
            conn.execute(sa.text("SELECT writer, COUNT(*) FROM decisions GROUP BY writer")).all()
        )
        starts = conn.execute(_STARTS, {"size": size}).all()
    out: list[SqlSlice] = []
    for i, (writer, seq, rn) in enumerate(starts):
        if out and out[-1].writer == writer and out[-1].lo == seq:
            continue  # duplicates of one seq at a cut: they stay together
        nxt = next((s for s in starts[i + 1 :] if s[0] == writer and s[1] != seq), None)
        hi, end = (nxt[1], nxt[2]) if nxt is not None else (None, totals[writer] + 1)
        out.append(SqlSlice(writer, seq, hi, end - rn))
    return out


def read_sql_slice(engine: sa.Engine, sl: SqlSlice) -> tuple[list[Row], list[Row]]:
    """Decision rows (in seq order) and draw rows of one slice."""
    cond = "writer = :w AND seq >= :lo" + ("" if sl.hi is None else " AND seq < :hi")
    of_d = cond.replace("writer", "d.writer").replace("seq", "d.seq")
    bind = {"w": sl.writer, "lo": sl.lo, "hi": sl.hi}
    with engine.connect() as conn:
        rows = [tuple(r) for r in conn.execute(
            sa.text(f"SELECT {_DEC} FROM decisions WHERE {cond} ORDER BY seq"), bind)]  # fmt: skip
        draws = [tuple(d) for d in conn.execute(
            sa.text(f"SELECT {_DRAW} FROM draws dr JOIN decisions d ON dr.decision_id = "
                    f"d.decision_id WHERE {of_d}"),
            bind)]  # fmt: skip
    return rows, draws


def _groups(sizes: Sequence[int], size: int) -> list[tuple[int, int]]:
    """Consecutive (start, stop) index ranges holding at least ``size`` records each."""
    out, start, held = [], 0, 0
    for i, n in enumerate(sizes):
        held += n
        if held >= size:
            out.append((start, i + 1))
            start, held = i + 1, 0
    if start < len(sizes):
        out.append((start, len(sizes)))
    return out


@dataclass(frozen=True)
class Task:
    """One chunk of a ledger, read by the process that replays it."""

    target: str
    rows: int
    slices: tuple[SqlSlice, ...] = ()
    piece: Any = None  # a Parquet piece (replay/_dask.py): consecutive part files

    def read(self, engine: sa.Engine | None = None) -> tuple[list[Row], list[Row]]:
        """Its rows; SQL through ``engine``, else through this process's own engine."""
        if self.piece is not None:
            from drawledger.replay._dask import read_piece

            return read_piece(self.piece)
        engine = engine or _engine(self.target)
        rows: list[Row] = []
        draws: list[Row] = []
        for sl in self.slices:
            r, d = read_sql_slice(engine, sl)
            rows.extend(r)
            draws.extend(d)
        return rows, draws


_ENGINES: dict[tuple[int, str], sa.Engine] = {}


def _engine(target: str) -> sa.Engine:
    """One engine per process and ledger (a forked process opens its own connections)."""
    key = (os.getpid(), target)
    if key not in _ENGINES:
        _ENGINES[key] = open_engine(target)
    return _ENGINES[key]


def plan(target: str | os.PathLike[str], *, format: str | None = None,
         size: int = CHUNK_SIZE) -> list[Task]:  # fmt: skip
    """The chunks of a ledger, in order, as tasks that read themselves."""
    text = os.fspath(target)
    if is_parquet(target, format):
        from drawledger.replay._dask import partitions, pieces

        return [Task(text, p.rows, piece=p) for p in pieces(partitions(text), size)]
    engine = open_engine(target)
    try:
        slices = sql_slices(engine, size)
    except sa.exc.SQLAlchemyError as exc:
        raise LedgerError(f"cannot read ledger {text!r}: {str(exc).splitlines()[0]}") from None
    finally:
        engine.dispose()
    return [Task(text, sum(sl.rows for sl in slices[a:b]), tuple(slices[a:b]))
            for a, b in _groups([sl.rows for sl in slices], size)]  # fmt: skip


def iter_chunks(
    target: str | os.PathLike[str], *, format: str | None = None, size: int = CHUNK_SIZE
) -> Iterator[tuple[list[Row], list[Row]]]:
    """Decision rows with their draw rows, chunk by chunk (at least ``size`` decisions each,
    the last aside): SQL ledgers writer by writer in seq order, Parquet ledgers part file by
    part file in path order."""
    tasks = plan(target, format=format, size=size)
    engine = None if is_parquet(target, format) else open_engine(target)
    try:
        for task in tasks:
            yield task.read(engine)
    except sa.exc.SQLAlchemyError as exc:
        raise LedgerError(f"cannot read ledger: {str(exc).splitlines()[0]}") from None
    finally:
        if engine is not None:
            engine.dispose()


# -- the report ------------------------------------------------------------------------------------
@dataclass
class VerifyReport:
    """What ``verify`` found. ``to_dict()`` is the JSON of ``drawledger verify --json``."""

    decisions: int
    verified: int
    mismatched: int
    unreplayable: int
    by_reason: dict[str, int]
    examples: dict[str, list[tuple[str, str]]]
    by_stream: dict[str, dict[str, Any]]
    methods: dict[str, int]
    integrity: IntegrityReport
    rows: pd.DataFrame

    @property
    def ok(self) -> bool:
        """Every decision verified (declared draws aside) and the ledger's integrity intact."""
        failing = sum(n for r, n in self.by_reason.items() if r in UNREPLAYABLE - NOT_FAILING)
        return self.mismatched == 0 and failing == 0 and self.integrity.ok

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "decisions": self.decisions,
            "verified": self.verified,
            "mismatched": self.mismatched,
            "unreplayable": self.unreplayable,
            "by_reason": dict(self.by_reason),
            "integrity": self.integrity.to_dict(),
            "examples": {
                reason: [{"decision_id": d, "detail": text} for d, text in shown]
                for reason, shown in self.examples.items()
            },
            "by_stream": self.by_stream,
            "propensity_methods": dict(self.methods),
        }

    def __rich__(self) -> Any:
        from rich.console import Group
        from rich.table import Table
        from rich.text import Text

        streams = Table(title="decisions by stream", title_justify="left")
        for name in ("stream", "decisions", "verified", "mismatched", "unreplayable", "reasons"):
            streams.add_column(name, justify="right" if name in COUNTS else "left")
        for stream, c in sorted(self.by_stream.items()):
            found = ", ".join(f"{r} {n}" for r, n in c["by_reason"].items())
            streams.add_row(stream, *(str(c[k]) for k in COUNTS), found)
        streams.add_row("all", str(self.decisions), str(self.verified), str(self.mismatched),
                        str(self.unreplayable), style="bold")  # fmt: skip
        parts: list[Any] = [streams]
        if self.by_reason:
            reasons = Table(title="reasons", title_justify="left")
            reasons.add_column("reason")
            reasons.add_column("decisions", justify="right")
            reasons.add_column("first examples")
            for reason in sorted(self.by_reason, key=REASONS.index):
                shown = self.examples.get(reason, [])
                ids = ", ".join(d for d, _ in shown)
                first = f"{ids}\n{shown[0][1]}" if shown else ""
                reasons.add_row(reason, str(self.by_reason[reason]), first)
            parts.append(reasons)
        parts.append(Text(self.integrity.render()))
        verdict = "verify passed" if self.ok else "verify FAILED"
        parts.append(Text(verdict, style="bold green" if self.ok else "bold red"))
        return Group(*parts)

    def render(self) -> str:
        """The summary as plain text."""
        from rich.console import Console

        buffer = io.StringIO()
        Console(file=buffer, width=110, no_color=True, highlight=False).print(self)
        return buffer.getvalue().rstrip("\n")

    def __str__(self) -> str:
        return self.render()


def _report(total: ChunkResult, integrity: IntegrityReport, rows: pd.DataFrame) -> VerifyReport:
    by_stream: dict[str, dict[str, Any]] = {}
    for stream, counts in sorted(total.streams.items()):
        found = total.stream_reasons.get(stream, Counter())
        by_stream[stream] = {**dict(zip(COUNTS, counts, strict=True)),
                             "by_reason": {r: found[r] for r in REASONS if found[r]}}  # fmt: skip
    sums = [sum(c[i] for c in total.streams.values()) for i in range(4)]
    ordered = {r: total.by_reason[r] for r in REASONS if total.by_reason[r]}
    return VerifyReport(
        decisions=sums[0],
        verified=sums[1],
        mismatched=sums[2],
        unreplayable=sums[3],
        by_reason=ordered,
        examples=total.examples,
        by_stream=by_stream,
        methods=dict(total.methods),
        integrity=integrity,
        rows=rows,
    )


# -- verify ----------------------------------------------------------------------------------------
def fork_context() -> Any:
    """Processes forked where the platform allows (they inherit imported decision code)."""
    methods = multiprocessing.get_all_start_methods()
    return multiprocessing.get_context("fork" if "fork" in methods else None)


def _executor(jobs: int) -> Executor | None:
    if jobs == 1:
        return None
    return ProcessPoolExecutor(max_workers=jobs, mp_context=fork_context())


def _verify_task(
    task: Task, flagged: AbstractSet[str], settings: Settings, only_flagged: bool
) -> ChunkResult | None:
    """Read one chunk and check it (None: ``only_flagged`` and no flagged decision in it)."""
    rows, draws = task.read()
    mine = flagged & {r[0] for r in rows} if flagged else frozenset()
    if only_flagged and not mine:
        return None
    return verify_chunk(rows, draws, mine, settings)


def _mapped(
    pool: Executor, tasks: list[Task], args: tuple[Any, ...], window: int
) -> Iterator[tuple[int, ChunkResult | None]]:
    """(decisions, result) of every task, in order, at most ``window`` tasks in flight."""
    pending: list[tuple[int, Future[ChunkResult | None]]] = []
    for task in tasks:
        pending.append((task.rows, pool.submit(_verify_task, task, *args)))
        if len(pending) >= window:
            n, fut = pending.pop(0)
            yield n, _result(fut)
    for n, fut in pending:
        yield n, _result(fut)


def _result(fut: Future[Any]) -> Any:
    try:
        return fut.result()
    except BrokenProcessPool as exc:
        raise ReplayError(f"a replay process died (out of memory?): {exc}") from None


def _in_processes(
    ledger: str | os.PathLike[str],
    format: str | None,
    integrity_key: bytes | str | None,
    settings: Settings,
    pool: Executor,
    jobs: int,
    size: int,
    progress: bool,
) -> tuple[list[ChunkResult], IntegrityReport]:
    """Chunks read and replayed in ``pool`` while one of its processes checks the integrity.

    Chunks are replayed without integrity flags; when the check flags decisions, the chunks
    holding them are replayed again with the flags (so the result equals one process's).
    """
    checking = pool.submit(check_integrity, ledger, format=format, integrity_key=integrity_key)
    tasks = plan(ledger, format=format, size=size)
    bar = _progress_bar(progress, sum(t.rows for t in tasks))
    parts: list[ChunkResult] = []
    try:
        for n, part in _mapped(pool, tasks, (frozenset(), settings, False), 2 * jobs):
            assert part is not None
            parts.append(part)
            if bar is not None:
                bar[0].advance(bar[1], n)
    finally:
        if bar is not None:
            bar[0].stop()
    integrity: IntegrityReport = _result(checking)
    if integrity.decision_ids:
        flags = frozenset(integrity.decision_ids)
        again = _mapped(pool, tasks, (flags, settings, True), 2 * jobs)
        parts = [p if a is None else a for p, (_, a) in zip(parts, again, strict=True)]
    return parts, integrity


def verify(
    ledger: str | os.PathLike[str],
    *,
    format: str | None = None,
    path: Iterable[str | os.PathLike[str]] = (),
    allow: Iterable[str] = (),
    jobs: int = 1,
    budget: int = DEFAULT_BUDGET,
    mc_samples: int = DEFAULT_MC_SAMPLES,
    export: str | os.PathLike[str] | None = None,
    keep_rows: bool = True,
    progress: bool = False,
    integrity_key: bytes | str | None = None,
    engine: str = "local",
    scheduler: str | None = None,
    chunk_size: int = CHUNK_SIZE,
) -> VerifyReport:
    """Replay every decision of a ledger and check its integrity.

    ``ledger`` is a SQLite path, a SQLAlchemy URL or a Parquet directory. Decision code is
    imported only from the ``path`` directories and ``allow`` module prefixes (or found
    already imported). Each decision runs twice from its recorded seed, inputs and policy
    parameters; every draw and the action are compared with the record (floats at 1e-12
    relative), and the exact propensity of the action is computed (``budget`` paths of
    enumeration, else ``mc_samples`` Monte Carlo runs). ``jobs`` > 1 replays chunks in that
    many processes. ``export`` writes one row per decision (``.csv`` or ``.parquet``);
    ``keep_rows=False`` (without ``export``) keeps memory bounded on huge ledgers.
    ``progress`` shows a progress bar when stderr is a terminal.
    """
    if engine not in ("local", "dask"):
        raise ValueError(f"engine must be 'local' or 'dask', got {engine!r}")
    if scheduler is not None and engine != "dask":
        raise ReplayError("verify: a scheduler address needs engine='dask'")
    for label, value in (("jobs", jobs), ("budget", budget), ("mc_samples", mc_samples),
                         ("chunk_size", chunk_size)):  # fmt: skip
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise ValueError(f"{label} must be a positive integer, got {value!r}")
    if export is not None:
        _export.check_export_path(export)
    settings = Settings(
        path=tuple(os.fspath(p) for p in path),
        allow=tuple(allow),
        budget=budget,
        mc_samples=mc_samples,
        keep_rows=keep_rows or export is not None,
    )
    if engine == "dask":  # the same chunks, replayed on a Dask cluster (replay/_dask.py)
        from drawledger.replay._dask import verify_on_dask

        report = verify_on_dask(ledger, format=format, settings=settings,
                                integrity_key=integrity_key, scheduler=scheduler,
                                chunk_size=chunk_size, progress=progress)  # fmt: skip
        if export is not None:
            _export.write_export(report.rows, export)
        return report
    total = ChunkResult()
    pool = _executor(jobs)
    try:
        if pool is None:
            integrity = check_integrity(ledger, format=format, integrity_key=integrity_key)
            bar = _progress_bar(progress, integrity.decisions)
            try:
                for chunk, draws in iter_chunks(ledger, format=format, size=chunk_size):
                    mine = integrity.decision_ids & {r[0] for r in chunk}
                    total.add(verify_chunk(chunk, draws, mine, settings))
                    if bar is not None:
                        bar[0].advance(bar[1], len(chunk))
            finally:
                if bar is not None:
                    bar[0].stop()
        else:
            size = min(chunk_size, PARALLEL_CHUNK_SIZE)
            parts, integrity = _in_processes(ledger, format, integrity_key, settings, pool, jobs,
                                             size, progress)  # fmt: skip
            for part in parts:
                total.add(part)
    finally:
        if pool is not None:
            pool.shutdown(cancel_futures=True)
    rows = _rows(total.rows, ledger, format) if settings.keep_rows else pd.DataFrame()
    report = _report(total, integrity, rows)
    if export is not None:
        _export.write_export(rows, export)
    return report


def _rows(frames: list[pd.DataFrame], ledger: str | os.PathLike[str],
          format: str | None) -> pd.DataFrame:  # fmt: skip
    rows = (pd.concat(frames, ignore_index=True) if frames
            else pd.DataFrame(columns=list(_export.BASE_COLUMNS)))  # fmt: skip
    return _export.join_outcomes(rows, _export.read_outcomes(ledger, format=format))


def _progress_bar(progress: bool, total: int) -> tuple[Any, Any] | None:
    if not progress or not sys.stderr.isatty():
        return None
    from rich.console import Console
    from rich.progress import Progress

    bar = Progress(console=Console(stderr=True), transient=True)
    task = bar.add_task("replaying", total=total)
    bar.start()
    return bar, task
