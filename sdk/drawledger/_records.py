"""Row layouts of the three ledger tables, JSON encoding, and the integrity hash.

Rows travel as plain tuples in the column order of ``_schema``, from the serving thread through
the writer to every sink, so that all sinks store the same values bit for bit.
"""

from __future__ import annotations

import hashlib
import math
import struct
from collections.abc import Sequence
from typing import Any

import orjson

from drawledger._schema import DEC, DECISIONS, DRAWS, OUT, OUTCOMES
from drawledger.exceptions import NotSerializableError

DECISION_COLUMNS = DECISIONS.names
DRAW_COLUMNS = DRAWS.names
OUTCOME_COLUMNS = OUTCOMES.names

HASH_PERSON = b"drawledger.h1"
_DOUBLE = struct.Struct(">d")
_pack = _DOUBLE.pack
# What a record's hash covers: its row up to the hash column. Module constants, because they are
# read once per record and reading an attribute costs more than reading a global.
_OUTCOME_HASHED = OUT.hash
_DECISION_SEQ = DEC.seq
_DECISION_PREV = DEC.prev_hash


def json_default(obj: Any) -> Any:
    """Encode what orjson does not know: pydantic models; refuse sets and everything else."""
    dump = getattr(obj, "model_dump", None)  # pydantic models, without importing pydantic
    if callable(dump):
        return dump(mode="json")
    if isinstance(obj, (set, frozenset)):
        raise TypeError("sets have no order; pass a sorted list")
    raise TypeError(f"{type(obj).__name__} is not JSON serializable")


JSON_OPTIONS = orjson.OPT_SERIALIZE_NUMPY | orjson.OPT_NON_STR_KEYS
"""The orjson options of every JSON text the ledger stores (with ``default=json_default``)."""


def non_finite_at(obj: Any, path: str = "") -> str | None:
    """Where the first NaN or infinity sits in ``obj`` (``"scores[2]"``, ``"shopper.fee"``;
    ``""`` for ``obj`` itself), or None when there is none.

    Looks into dicts, lists, tuples, pydantic models, and numpy arrays and scalars (through
    their ``tolist``, without importing numpy).
    """
    if isinstance(obj, float):  # numpy float64 too: it subclasses float
        return None if math.isfinite(obj) else path
    if obj is None or isinstance(obj, (str, int)):
        return None
    if isinstance(obj, dict):
        for k, v in obj.items():
            found = non_finite_at(v, f"{path}.{k}" if path else str(k))
            if found is not None:
                return found
        return None
    if isinstance(obj, (list, tuple)):
        for i, v in enumerate(obj):
            found = non_finite_at(v, f"{path}[{i}]")
            if found is not None:
                return found
        return None
    dump = getattr(obj, "model_dump", None)
    if callable(dump):
        return non_finite_at(dump(mode="python"), path)
    if type(obj).__module__ == "numpy":  # arrays and scalars: float32, float16, ndarray
        tolist = getattr(obj, "tolist", None)
        if callable(tolist):
            return non_finite_at(tolist(), path)
    return None


def to_json(obj: Any, what: str) -> str:
    """Encode ``obj`` as compact JSON text; ``what`` names it in the error."""
    try:
        raw = orjson.dumps(obj, default=json_default, option=JSON_OPTIONS)
    except (TypeError, orjson.JSONEncodeError) as exc:
        raise NotSerializableError(f"{what} cannot be recorded as JSON: {exc}") from None
    # orjson writes NaN and infinities (numpy's too) as null; JSON has no such numbers, so
    # refuse them, naming where they sit (a str holds none: its text is not searched).
    if type(obj) is not str and raw.rfind(b"null") != -1:  # rfind: find and "in" are slower
        where = non_finite_at(obj)
        if where is not None:
            at = f": {where} is" if where else " is"
            raise NotSerializableError(f"{what}{at} NaN or an infinity, which JSON cannot hold")
    return raw.decode()


def from_json(text: str) -> Any:
    return orjson.loads(text)


def float_hex(x: float) -> str:
    """A float in the canonical encoding: the 16 hex digits of its IEEE-754 binary64 bits."""
    return _DOUBLE.pack(x).hex()


# A keyed, personalized blake2b state per integrity key; copying it is cheaper than a new one.
_HASHERS: dict[bytes, Any] = {}


def _digest(canonical: bytes, key: bytes) -> str:
    base = _HASHERS.get(key)
    if base is None:
        base = _HASHERS[key] = hashlib.blake2b(digest_size=32, key=key, person=HASH_PERSON)
    h = base.copy()
    h.update(canonical)
    return h.hexdigest()


# A record waiting in the writer's queue, unsealed, is a flat tuple: its tag, then its row without
# the last three columns (seq, prev_hash, hash); a decision's then its draw rows, each a tuple of
# plain values. The garbage collector stops tracking a tuple of plain values at its first look,
# and one that holds such tuples at its second; a record nested deeper (a tuple of draw rows in
# it) can be looked at before its parts, stay tracked and reach the old generation, whose
# collections walk the whole heap.
PENDING_DRAWS = DEC.seq + 1  # where a queued decision's draw rows start


def decision_canonical(row: tuple[Any, ...], draws: Sequence[tuple[Any, ...]]) -> bytes:
    """Canonical bytes of a decision row (without its hash) and its draw rows (docs/ledger.md)."""
    return _decision_body(row, row[_DECISION_SEQ], row[_DECISION_PREV], draws)


def _decision_body(
    row: tuple[Any, ...], seq: int, prev: str | None, draws: Sequence[tuple[Any, ...]]
) -> bytes:
    """``decision_canonical`` of ``row``'s first columns (up to ``writer``), ``seq``, ``prev``."""
    (did, stream, unit, ts, fn, code_hash, inputs, params, action, prop, prop_kind, seed,
     writer) = row[:_DECISION_SEQ]  # fmt: skip
    # float_hex, inlined as _pack(x).hex(): this runs once per decision; _pack is a global, so
    # the comprehension closes over no cell
    body = [
        "drawledger.decision.v1", did, stream, unit, _pack(ts).hex(), fn, code_hash, inputs,
        params, action, _pack(prop).hex(), prop_kind, seed, writer, seq, prev,
        [[idx, name, kind, args, u, value, _pack(prob).hex(), bool(density)]
         for _, idx, name, kind, args, u, value, prob, density in draws],
    ]  # fmt: skip
    return orjson.dumps(body)


def seal_decision(
    row: tuple[Any, ...], seq: int, prev: str | None, draws: Sequence[tuple[Any, ...]], key: bytes
) -> tuple[Any, ...]:
    """The complete decision row: ``row`` (its columns up to ``writer``), ``seq``, ``prev`` and
    the hash of them with ``draws``; what ``decision_hash`` computes, without building the row
    twice (the writer thread seals every decision with it)."""
    return (*row, seq, prev, _digest(_decision_body(row, seq, prev, draws), key))


def outcome_canonical(row: tuple[Any, ...]) -> bytes:
    """Canonical bytes of an outcome row without its hash (docs/ledger.md)."""
    did, name, value, ts, writer, seq, prev = row[:_OUTCOME_HASHED]
    body = ["drawledger.outcome.v1", did, name, float_hex(value), float_hex(ts), writer, seq, prev]
    return orjson.dumps(body)


def decision_hash(row: tuple[Any, ...], draws: Sequence[tuple[Any, ...]], key: bytes = b"") -> str:
    return _digest(decision_canonical(row, draws), key)


def outcome_hash(row: tuple[Any, ...], key: bytes = b"") -> str:
    return _digest(outcome_canonical(row), key)


# -- the registry (docs/ledger.md, "Ledger identity and writer registry") ----------------------
def ledger_tag(ledger_id: str, legacy: str, key: bytes = b"") -> str:
    """The signature of a ledger's identity (its id, and whether it held records before)."""
    return _digest(orjson.dumps(["drawledger.ledger.v1", ledger_id, legacy]), key)


def genesis_hash(ledger_id: str, writer: str, key: bytes = b"") -> str:
    """The ``prev_hash`` of a writer's first record: binds its chain to one ledger."""
    return _digest(orjson.dumps(["drawledger.genesis.v1", ledger_id, writer]), key)


def batch_hash(names: Sequence[str], key: bytes = b"") -> str:
    """The signature of the part names of a Parquet batch (docs/ledger.md, "Parquet layout")."""
    return _digest(orjson.dumps(["drawledger.batch.v1", list(names)]), key)


def writer_tag(
    ledger_id: str, writer: str, started: float, genesis: str | None, key: bytes = b""
) -> str:
    """The signature of a writer's registry row."""
    body = ["drawledger.writer.v1", ledger_id, writer, float_hex(started), genesis]
    return _digest(orjson.dumps(body), key)
