"""Replaying one decision and comparing every draw, probability and the action with the record."""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping, Sequence
from operator import itemgetter
from typing import Any

import orjson

from drawledger._code import same_code
from drawledger._probability import decision_propensity
from drawledger._records import (  # the SDK's own JSON encoding, bit for bit
    JSON_OPTIONS,
    from_json,
    json_default,
    to_json,
)
from drawledger._schema import DEC, DECISIONS, DRAW, DRAWS, row_problem
from drawledger.draw import Draw, DrawRecord, bucket_assign
from drawledger.exceptions import (
    BadRecordError,
    DrawArgumentError,
    MissingFunctionError,
    NotADecisionError,
    NotAllowedError,
    ReplayError,
)
from drawledger.ledger import Decision
from drawledger.replay.propensity import (
    DENSITY,
    EXACT,
    Memo,
    Propensity,
    read,
    remembered,
)
from drawledger.replay.verify._diff import mismatch, same, version_detail
from drawledger.replay.verify._imports import (
    build_inputs,
    immutable,
    load_params,
    parse_object,
    resolve_decision,
)
from drawledger.replay.verify._types import PROBES, REL_TOL, Row, Settings

OUTSIDE_DRAW = ("likely randomness outside `draw` (the `random` module, a global numpy "
                "generator), a clock, or state kept between calls")  # fmt: skip


def _close(a: float, b: float) -> bool:
    return a == b or abs(a - b) <= REL_TOL * max(abs(a), abs(b))


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
    return same(from_json(replayed), _parse(recorded, what))


def as_text(x: Any) -> str | None:
    return x if isinstance(x, str) else None


def _number(x: Any, what: str) -> float:
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
        raise BadRecordError(f"{what} is {x!r}, not a finite number")
    return float(x)


def _json(obj: Any, what: str) -> str:
    """JSON text exactly as the SDK records it (a NaN, which it refuses, shows as a difference)."""
    try:
        return orjson.dumps(obj, default=json_default, option=JSON_OPTIONS).decode()
    except TypeError:
        return to_json(obj, what)  # raises the SDK's NotSerializableError with the reason


def _encode(records: Sequence[DrawRecord]) -> list[tuple[Any, ...]]:
    dumps = orjson.dumps
    try:  # the usual case in one pass; what cannot be encoded is named by the loop below
        return [
            (kind, name, dumps(args, default=json_default, option=JSON_OPTIONS).decode(),
             dumps(u, default=json_default, option=JSON_OPTIONS).decode(),
             dumps(value, default=json_default, option=JSON_OPTIONS).decode(), prob,
             bool(is_density))
            for _, name, kind, args, u, value, prob, is_density in records
        ]  # fmt: skip
    except TypeError:
        pass
    return [
        (r.kind, r.name, _json(r.args, "draw arguments"), _json(r.u, "uniforms"),
         _json(r.value, "draw value"), r.prob, bool(r.is_density))
        for r in records
    ]  # fmt: skip


def _logged(encoded: Sequence[tuple[Any, ...]], action_json: str) -> tuple[float, str]:
    """The propensity the SDK logs for these draws and action (as `Decision.__call__` does)."""
    single = len(encoded) == 1 and encoded[0][4] == action_json
    return decision_propensity(encoded, single, itemgetter(5))


class Checked:
    """Reasons found for one decision, with the first detail of each."""

    __slots__ = ("action", "inputs", "propensity", "reasons", "replayed", "short")

    def __init__(self) -> None:
        self.reasons: dict[str, str] = {}
        self.short: dict[str, str] = {}  # the details cut for the terminal, where they differ
        self.propensity: Propensity | None = None
        self.inputs: Mapping[str, Any] = {}
        # The first replay's draws (kind, name, args, u, value, prob, is_density; JSON as the
        # SDK records it) and action JSON: None until the decision ran (``show`` prints them).
        self.replayed: list[tuple[Any, ...]] | None = None
        self.action: str | None = None

    def add(self, reason: str, detail: str) -> None:
        if reason not in self.reasons:
            self.reasons[reason] = detail

    def differ(self, reason: str, label: str, replayed: Any, recorded: Any) -> None:
        """Add ``reason`` with where the two values differ (``_diff.mismatch``)."""
        if reason not in self.reasons:
            self.reasons[reason], short = mismatch(label, replayed, recorded)
            if short != self.reasons[reason]:
                self.short[reason] = short


class Context:
    """Per-chunk caches: resolved functions, decoded parameters, enumerated distributions."""

    def __init__(self, settings: Settings, memo: Memo | None = None) -> None:
        self.settings = settings
        self.resolved: dict[str, Decision[Any] | ReplayError] = {}
        self.params: dict[tuple[str, str], dict[str, Any]] = {}
        self.memo = Memo() if memo is None else memo
        self.probed: Counter[str] = Counter()  # decisions fully enumerated, by function
        self.multi: set[str] = set()  # functions seen making several draws (never trusted)
        self.sources = dict(settings.sources)  # stored source by code identity
        self.missing: dict[tuple[str, str], tuple[str, str]] = {}  # version-not-found details

    def version_not_found(self, recorded: str, decision: Decision[Any]) -> tuple[str, str]:
        """The detail of a record whose code version was not found: the diff from its stored
        source to the current code (whole, and its first changed lines for the terminal)."""
        key = (decision.name, recorded)
        found = self.missing.get(key)
        if found is None:
            found = self.missing[key] = version_detail(
                decision.name, recorded, self.sources[recorded], decision.code_hash,
                decision.source,
            )  # fmt: skip
        return found

    def resolve(self, fn: str) -> Decision[Any]:
        found = self.resolved.get(fn)
        if found is None:
            try:
                found = resolve_decision(fn, path=self.settings.path, allow=self.settings.allow)
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
    if isinstance(exc, NotAllowedError):
        return "not-allowed"
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
        rows.sort(key=lambda d: d[DRAW.idx] if isinstance(d[DRAW.idx], int) else -1)
    for i, d in enumerate(rows):
        if d[DRAW.idx] != i:
            raise BadRecordError(
                f"draw indexes are {[d[DRAW.idx] for d in rows]}, not 0, 1, 2, ..."
            )
        if not (d[DRAW.prob].__class__ is float and -math.inf < d[DRAW.prob] < math.inf):
            _number(d[DRAW.prob], f"draw {i} probability")
    return rows


def _compare_draws(out: Checked, replayed: list[tuple[Any, ...]], recorded: list[Row]) -> None:
    if len(replayed) != len(recorded):
        out.differ("draw-count", "draws", len(replayed), len(recorded))
    for (kind, name, args, u, value, prob, dens), d in zip(replayed, recorded, strict=False):
        _, idx, r_name, r_kind, r_args, r_u, r_value, r_prob, r_dens = d  # DRAW_COLUMNS
        if (kind == r_kind and args == r_args and u == r_u and value == r_value and prob == r_prob
                and dens == bool(r_dens) and name == as_text(r_name)):  # fmt: skip
            continue  # the usual case: identical to the record
        where = f"draw {idx} ({kind}{'' if name is None else ' ' + repr(name)})"
        if kind != r_kind or name != as_text(r_name):
            out.differ("args", f"{where}: kind and name", {"kind": kind, "name": name},
                       {"kind": r_kind, "name": as_text(r_name)})  # fmt: skip
        elif not _json_same(args, r_args, f"{where} arguments"):
            out.differ("args", f"{where}: arguments", from_json(args), from_json(r_args))
        if not _json_same(u, r_u, f"{where} uniforms"):
            out.differ("value", f"{where}: uniforms", from_json(u), from_json(r_u))
        if not _json_same(value, r_value, f"{where} value"):
            out.differ("value", f"{where}: value", from_json(value), from_json(r_value))
        if not _close(prob, r_prob) or dens != bool(r_dens):
            what = "density" if dens else "probability"
            if dens != bool(r_dens):
                what = f"{what} (recorded as {'a density' if r_dens else 'a probability'})"
            out.differ("probability", f"{where}: {what}", prob, r_prob)


def _check_python(out: Checked, row: Row, draws: list[Row], ctx: Context) -> None:
    raw = parse_object(row[DEC.inputs], "inputs")
    out.inputs = raw
    decision = ctx.resolve(row[DEC.fn])
    recorded = as_text(row[DEC.code_hash])
    if not same_code(recorded, decision.fn, decision.code_hash):
        if recorded is not None and recorded in ctx.sources:
            detail, short = ctx.version_not_found(recorded, decision)
            out.add("version-not-found", detail)
            out.short.setdefault("version-not-found", short)
        else:
            out.add(
                "code-changed",
                f"code hash {row[DEC.code_hash]} recorded, {decision.code_hash} now",
            )
    seed = _seed(row[DEC.seed])
    inputs = build_inputs(decision, raw)
    params = ctx.load_params(decision, row[DEC.params])
    logged = _number(row[DEC.propensity], "logged propensity")
    draws = _draw_rows(draws)
    try:
        draw = Draw(seed)
        first_action = decision.run(draw, inputs, params)
        records = draw.records
        first = _encode(records)
        action = _json(first_action, "action")
        out.replayed, out.action = first, action
    except KeyboardInterrupt:
        raise  # Ctrl-C stops the whole run (exit 130, nothing reported)
    except BaseException as exc:  # SystemExit and the like are this decision's failure only
        out.add("replay-error", f"{type(exc).__name__}: {exc}")
        return
    _compare_draws(out, first, draws)
    if _json_same(action, row[DEC.action], "action"):
        action_key = action
    else:
        action_key = to_json(from_json(row[DEC.action]), "action")
        out.differ("action", "action", from_json(action), from_json(row[DEC.action]))
        if not records and not draws:
            note = f" although no draw was made: {OUTSIDE_DRAW}"
            out.reasons["action"] += note
            if "action" in out.short:
                out.short["action"] += note
    prop, kind = _logged(first, action)
    if not _close(prop, logged) or kind != row[DEC.propensity_kind]:
        out.differ("probability", "logged propensity", {"value": prop, "kind": kind},
                   {"value": logged, "kind": row[DEC.propensity_kind]})  # fmt: skip
    try:
        again = Draw(seed)
        returned = decision.run(again, inputs, params)
        same = again.records == records and returned == first_action
        if not same:  # objects without value equality: compare their recorded form
            same = _encode(again.records) == first and to_json(returned, "action") == action
    except KeyboardInterrupt:
        raise
    except BaseException as exc:
        out.add("nondeterministic", f"a second run raised {type(exc).__name__}: {exc}")
    else:
        if not same:
            out.add("nondeterministic", "a second run with the same seed and inputs differs: "
                    f"{OUTSIDE_DRAW}, or inputs changed by the function")  # fmt: skip
    try:
        out.propensity = _propensity(ctx, decision, inputs, params, action_key, records, first,
                                     action, (row[DEC.inputs], row[DEC.params]))  # fmt: skip
    except KeyboardInterrupt:
        raise
    except BaseException as exc:
        out.add("replay-error", f"propensity: {type(exc).__name__}: {exc}")


def _propensity(
    ctx: Context,
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

    A discrete action's probability is always read from the enumeration of this decision's
    branches (cached per inputs and parameters): a run that made one draw and returned its
    value does not show that no other option returns the same action. A function whose first
    decisions in this chunk (the probes) always made one continuous draw returning its value
    is trusted to do so: later decisions read that draw's density.
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
    settings = ctx.settings
    found = remembered(ctx.memo, decision, inputs, params, action_key, budget=settings.budget,
                       mc_samples=settings.mc_samples, texts=texts)  # fmt: skip
    ctx.probed[name] += 1
    if not found.single:
        ctx.multi.add(name)
    return read(found, action_key)


def _bucket_args(draw: Row) -> tuple[str, dict[str, Any], str] | None:
    args = _parse(draw[DRAW.args], "bucket arguments")
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


def _check_bucket(out: Checked, row: Row, draw: Row, unit: str, shares: dict[str, Any],
                  salt: str) -> None:  # fmt: skip
    """Hashed assignment has no seed: recompute the arm, its uniform and its share."""
    recorded_u = _parse(draw[DRAW.u], "bucket uniforms")
    keys = [salt.encode()]
    if len(salt) % 2 == 0 and all(c in "0123456789abcdef" for c in salt):
        keys.append(bytes.fromhex(salt))  # a bytes salt is recorded as hex
    try:
        found = [bucket_assign(unit, shares, k) for k in keys]
    except DrawArgumentError as exc:
        raise BadRecordError(f"bucket arguments: {exc}") from None
    arm, u, prob, _, _ = next((f for f in found if [f[1]] == recorded_u), found[0])
    out.action = _json(arm, "bucket arm")
    out.replayed = [("bucket", as_text(draw[DRAW.name]), draw[DRAW.args], _json([u], "uniforms"),
                     out.action, prob, False)]  # fmt: skip
    if not isinstance(recorded_u, list) or not same([u], recorded_u):
        out.differ("value", "bucket uniforms", [u], recorded_u)
    if _arm(draw[DRAW.value], "bucket arm") != arm:
        out.differ("value", "bucket arm", arm, _arm(draw[DRAW.value], "bucket arm"))
    if not _close(prob, _number(draw[DRAW.prob], "bucket share")):
        out.differ("probability", "bucket share", prob, draw[DRAW.prob])
    if not _close(prob, _number(row[DEC.propensity], "logged propensity")):
        out.differ("probability", "logged propensity", prob, row[DEC.propensity])
    if as_text(row[DEC.unit]) != unit:
        out.add("args", f"bucket unit {unit!r} in the draw, {row[DEC.unit]!r} on the decision")
    if _arm(row[DEC.action], "action") != arm:
        out.differ("action", "action (the arm)", arm, _arm(row[DEC.action], "action"))
    out.propensity = Propensity(prob, EXACT)


def _check_other(out: Checked, row: Row, draws: list[Row]) -> None:
    """A decision without a function: a hashed bucket assignment or a declared draw."""
    if len(draws) == 1 and draws[0][DRAW.kind] == "bucket":
        args = _bucket_args(draws[0])
        if args is not None:
            _check_bucket(out, row, draws[0], *args)
            return
    kind = draws[0][DRAW.kind] if draws else "no"
    out.add("declared", f"declared {kind} draw: audited, not replayed")


def check_decision(row: Row, draws: list[Row], ctx: Context, flagged: bool) -> Checked:
    """Every reason one decision is not verified (none: verified)."""
    out = Checked()
    if flagged:
        out.add("integrity", "part of an integrity problem (see integrity)")
    damaged = row_problem(DECISIONS, row)
    if damaged is None:
        for d in draws:
            damaged = row_problem(DRAWS, d)
            if damaged is not None:
                break
    if damaged is not None:  # nothing is computed from a field of the wrong type
        out.add("bad-record", damaged)
        return out
    try:
        if as_text(row[DEC.fn]) is None:
            _check_other(out, row, draws)
        else:
            _check_python(out, row, draws, ctx)
    except ReplayError as exc:
        out.add(_failure_reason(exc), str(exc))
    return out
