"""``Ledger`` and ``@ledger.decision``: record every decision with its draws and probability."""

from __future__ import annotations

import atexit
import contextlib
import functools
import hashlib
import inspect
import itertools
import math
import operator
import os
import socket
import threading
import time
import weakref
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any, Generic, ParamSpec, TypeVar

from drawledger import _records, _sinks, _stream
from drawledger._code import code_hash, function_source, module_file
from drawledger._probability import decision_propensity
from drawledger._writer import Chain, SpillFile, Stats, Writer
from drawledger.draw import Draw, DrawRecord, bucket_assign
from drawledger.exceptions import (
    DecisionDefinitionError,
    DrawArgumentError,
    LedgerClosedError,
    LedgerError,
    NotSerializableError,
)

__all__ = ["Decision", "Ledger"]

P = ParamSpec("P")
R = TypeVar("R")

RESERVED = frozenset({"unit", "decision_id"})
_PROB = operator.itemgetter(6)  # DrawRecord.prob
DRAW_KINDS = frozenset(
    {"categorical", "bernoulli", "uniform", "integers", "normal", "lognormal", "softmax",
     "epsilon_greedy", "slate", "bucket"}
)  # fmt: skip

# Every decision function registered in this process, by "module:qualname". Replay accepts
# only objects found here (docs/replay.md, safe imports).
REGISTRY: dict[str, Decision[Any]] = {}

_LEDGERS: weakref.WeakSet[Ledger] = weakref.WeakSet()


def _writer_id() -> str:
    host = socket.gethostname().split(".")[0] or "host"
    return f"{host}-{os.getpid()}-{os.urandom(3).hex()}"


class Decision(Generic[R]):
    """A decision function registered with ``@ledger.decision(stream)``.

    Calling it runs the function with a fresh ``Draw`` and records the decision; it returns
    the plain action. ``unit=`` and ``decision_id=`` are optional keywords of every call.
    """

    def __init__(self, ledger: Ledger, stream: str, fn: Callable[..., R]) -> None:
        if inspect.iscoroutinefunction(fn) or inspect.isasyncgenfunction(fn) or \
                inspect.isgeneratorfunction(fn):  # fmt: skip
            raise DecisionDefinitionError(
                f"{fn.__qualname__}: a decision must be a plain function that returns its action "
                "(not async, not a generator); await what it needs before calling it"
            )
        sig = inspect.signature(fn)
        self.inputs: list[str] = []
        self.params: dict[str, Any] = {}
        self._draw_index = -1
        for p in sig.parameters.values():
            if p.name in RESERVED:
                raise DecisionDefinitionError(
                    f"{fn.__qualname__}: parameter {p.name!r} is reserved for the call "
                    "(unit= and decision_id= are given to every decision)"
                )
            if p.kind in (p.VAR_POSITIONAL, p.VAR_KEYWORD):
                raise DecisionDefinitionError(
                    f"{fn.__qualname__}: *args and **kwargs cannot be recorded; name each input"
                )
            if p.kind == p.KEYWORD_ONLY:
                if p.default is p.empty:
                    raise DecisionDefinitionError(
                        f"{fn.__qualname__}: keyword-only parameter {p.name!r} needs a default "
                        "(keyword-only parameters are the recorded policy parameters)"
                    )
                self.params[p.name] = p.default
            elif p.name == "draw" or p.annotation in (Draw, "Draw", "dl.Draw"):
                self._draw_index = len(self.inputs)
            else:
                self.inputs.append(p.name)
        if self._draw_index < 0:
            raise DecisionDefinitionError(f"{fn.__qualname__}: a decision needs a 'draw' parameter")
        params_json = _records.to_json(self.params, f"{fn.__qualname__}: policy parameter defaults")
        # Defaults that cannot change are encoded once; a call that keeps them reuses this.
        self._params_json = params_json if all(
            v is None or type(v) in (str, int, float, bool) for v in self.params.values()
        ) else None  # fmt: skip
        self.ledger = ledger
        self.stream = stream
        self.fn = fn
        self.name = f"{fn.__module__}:{fn.__qualname__}"
        self._inputs_what = f"{self.name}: inputs"
        self._action_what = f"{self.name}: action"
        self.code_hash = code_hash(fn)
        self.source = function_source(fn)  # stored once per version (docs/deploys.md)
        self.module_file = module_file(fn)
        functools.update_wrapper(self, fn)
        REGISTRY[self.name] = self

    def __repr__(self) -> str:
        return f"<decision {self.stream!r} {self.name}>"

    def run(self, draw: Draw, inputs: Mapping[str, Any], params: Mapping[str, Any]) -> R:
        """Call the function with a given ``Draw``, inputs by name and policy parameters.

        Nothing is recorded; replay and estimation use this to re-execute a decision.
        """
        args = [inputs[name] for name in self.inputs]
        args.insert(self._draw_index, draw)
        return self.fn(*args, **{**self.params, **params})

    def _bind(
        self, args: tuple[Any, ...], kwargs: dict[str, Any]
    ) -> tuple[dict[str, Any], dict[str, Any]]:
        """Inputs and policy parameters of a call, by name (TypeError as Python would)."""
        names = self.inputs
        if len(args) > len(names):
            raise TypeError(f"{self.name} takes {len(names)} inputs, got {len(args)}")
        inputs = dict(zip(names, args, strict=False))
        params = dict(self.params)
        for key, value in kwargs.items():
            if key in params:
                params[key] = value
            elif key in names and key not in inputs:
                inputs[key] = value
            else:
                raise TypeError(f"{self.name} got an unexpected keyword argument {key!r}")
        if len(inputs) != len(names):
            missing = [n for n in names if n not in inputs]
            raise TypeError(f"{self.name} is missing inputs: {', '.join(missing)}")
        return inputs, params

    def __call__(self, *args: Any, unit: str | None = None, decision_id: str | None = None,
                 **kwargs: Any) -> R:  # fmt: skip
        params_json = self._params_json
        if kwargs or len(args) != len(self.inputs) or params_json is None:
            inputs, params = self._bind(args, kwargs)
            params_json = _records.to_json(params, f"{self.name}: policy parameters")
            call = [inputs[name] for name in self.inputs]
        else:  # the common call: every input positional, the default policy parameters
            inputs = dict(zip(self.inputs, args, strict=False))  # same length: checked above
            params = None  # the function's own defaults apply
            call = list(args)
        ledger = self.ledger
        inputs_json = ledger._inputs_json(inputs, self._inputs_what)
        draw = Draw(ledger._seed_source())
        call.insert(self._draw_index, draw)
        action = self.fn(*call) if params is None else self.fn(*call, **params)
        ledger._record_decision(self, draw, inputs_json, params_json, action, unit, decision_id)
        return action


def _json_or_none(obj: Any) -> str | None:
    """JSON of ``obj``, or None when it has none (the draw rows then report the error)."""
    try:
        return _records.to_json(obj, "value")
    except NotSerializableError:
        return None


def _timestamp(ts: Any) -> float:
    """A given ``ts`` as a float; a bad one is refused here rather than failing a whole batch."""
    if isinstance(ts, bool) or not isinstance(ts, (int, float)) or not math.isfinite(ts):
        raise NotSerializableError(f"ts must be a finite number of seconds, got {ts!r}")
    return float(ts) + 0.0  # + 0.0: -0.0 becomes 0.0 (docs/ledger.md)


def _plain_text(*texts: str | None) -> None:
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


def _redact_value(value: Any, key: bytes) -> str:
    digest = hashlib.blake2b(_records.to_json(value, "redacted field").encode(), digest_size=16,
                             key=key, person=b"drawledger.r1")  # fmt: skip
    return "redacted:" + digest.hexdigest()


def _redact(obj: Any, path: list[str], key: bytes) -> None:
    head, rest = path[0], path[1:]
    if isinstance(obj, dict) and head in obj:
        if rest:
            _redact(obj[head], rest, key)
        else:
            obj[head] = _redact_value(obj[head], key)
    elif isinstance(obj, list):
        for item in obj:
            _redact(item, path, key)


class Ledger:
    """Where decisions, draws and outcomes are recorded.

    ``target`` is a path (an SQLite file, the embedded default), a SQLAlchemy URL such as
    ``postgresql+psycopg://host/db``, or a directory with ``format="parquet"``. Records are
    queued and written in batches by a background thread; ``flush()`` waits until everything
    recorded before it is committed. ``durability="full"`` makes every commit survive power
    loss, at a cost in throughput (docs/operations.md).
    """

    def __init__(
        self,
        target: str | os.PathLike[str],
        *,
        format: str | None = None,
        integrity_key: bytes | str | None = None,
        redact: Sequence[str] = (),
        redact_key: bytes | str | None = None,
        queue_size: int = 100_000,
        batch_size: int = 10_000,
        block_timeout: float = 1.0,
        spill_dir: str | os.PathLike[str] | None = None,
        durability: str = "normal",
    ) -> None:
        if queue_size < 1 or batch_size < 1:
            raise ValueError("queue_size and batch_size must be at least 1")
        self.target = os.fspath(target)
        self.format = format
        if format not in (None, "sql", "sqlite", "parquet"):
            raise LedgerError(f"unknown ledger format {format!r}; use 'parquet' or leave it out")
        if format != "parquet":
            _sinks.create_engine(_sinks.sqlalchemy_url(self.target), durability).dispose()
        elif durability not in _sinks.DURABILITY:
            raise LedgerError(f"unknown durability {durability!r}; use 'normal' or 'full'")
        self.durability = durability
        self._key = (
            integrity_key.encode() if isinstance(integrity_key, str) else (integrity_key or b"")
        )
        if len(self._key) > 64:
            raise ValueError("integrity_key must be at most 64 bytes")
        rkey = redact_key if redact_key is not None else self._key
        self._redact_key = rkey.encode() if isinstance(rkey, str) else rkey
        if isinstance(redact, str) or any(not p or "" in p.split(".") for p in redact):
            raise ValueError("redact takes a list of dotted field paths such as ['shopper.email']")
        if redact and not 1 <= len(self._redact_key) <= 64:
            raise ValueError(  # an unkeyed hash of an e-mail address is reversed by guessing
                "redact needs a secret redact_key (or integrity_key) of 1 to 64 bytes"
            )
        self._redact_paths = [field.split(".") for field in redact]
        self.queue_size = queue_size
        self.block_timeout = block_timeout
        self._spill_dir = Path(spill_dir) if spill_dir is not None else self._default_spill_dir()
        self._seed_source: Callable[[], bytes] = _stream.new_seed
        self._taps: list[Callable[[Any], bool]] = []
        self._batch_size = batch_size
        self._closed = False
        self._init_process()
        _LEDGERS.add(self)

    def _default_spill_dir(self) -> Path:
        if self.format == "parquet":
            return Path(self.target + ".spill")
        if _sinks.is_url(self.target):
            if self.target.startswith("sqlite:///") and len(self.target) > 10:
                return Path(self.target[10:]).parent
            return Path("drawledger-spill")
        return Path(self.target).expanduser().parent

    def _init_process(self) -> None:
        """State that belongs to one process: writer id, chain, queue, thread."""
        self.writer = _writer_id()
        self._lock = threading.Lock()
        self._ids = itertools.count()
        self._stats = Stats()
        self._versions: set[Decision[Any]] = set()  # decisions whose code version is noted
        spill = SpillFile(self._spill_dir / f"drawledger-spill-{self.writer}.jsonl")
        self._writer = Writer(
            self._open_sink,
            spill,
            self._stats,
            Chain(self._key),
            batch_size=self._batch_size,
            queue_size=self.queue_size,
            block_timeout=self.block_timeout,
        )

    def _open_sink(self) -> _sinks.Sink:
        return _sinks.open_sink(self.target, self.format, durability=self.durability)

    def _after_fork(self) -> None:
        old = self._writer
        self._init_process()
        old.forget_after_fork()

    def __repr__(self) -> str:
        return f"Ledger({self.target!r}, writer={self.writer!r})"

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- registering decisions -------------------------------------------------------------
    def decision(self, stream: str) -> Callable[[Callable[..., R]], Decision[R]]:
        """Register a decision function under a stream name (decorator)."""
        if not isinstance(stream, str) or not stream:
            raise DecisionDefinitionError("a decision's stream name must be a non-empty string")

        def register(fn: Callable[..., R]) -> Decision[R]:
            return Decision(self, stream, fn)

        return register

    # -- recording ----------------------------------------------------------------------------
    def _inputs_json(self, inputs: dict[str, Any], what: str) -> str:
        """JSON of a call's inputs, redacted; ``what`` names them in an error."""
        if self._redact_paths:
            plain = _records.from_json(_records.to_json(inputs, what))
            for path in self._redact_paths:
                _redact(plain, path, self._redact_key)
            return _records.to_json(plain, what)
        return _records.to_json(inputs, what)

    def _next_id(self) -> str:
        return f"{self.writer}.{next(self._ids)}"

    def _record_decision(
        self,
        decision: Decision[Any],
        draw: Draw,
        inputs: str,
        params: str,
        action: Any,
        unit: str | None,
        decision_id: str | None,
    ) -> None:
        action_json = _records.to_json(action, decision._action_what)
        draws = draw.records
        single = len(draws) == 1 and (
            draws[0].value is action or _json_or_none(draws[0].value) == action_json
        )
        prop, kind = decision_propensity(draws, single, _PROB)
        if decision not in self._versions:
            self._note_version(decision)
        self._append_decision(
            decision_id, decision.stream, unit, None, decision.name, decision.code_hash,
            inputs, params, action_json, prop, kind, draw.seed.hex(), draws, (action, action_json),
        )  # fmt: skip

    def _note_version(self, decision: Decision[Any]) -> None:
        """Queue the row of the decision's code version (the first use by this writer)."""
        self._versions.add(decision)
        row = (decision.code_hash, decision.stream, decision.name, decision.module_file,
               decision.source, time.time(), self.writer)  # fmt: skip
        self._writer.versions.append(row)

    def _draw_rows(
        self, did: str, draws: Sequence[DrawRecord], encoded: tuple[Any, str] | None = None
    ) -> list[tuple[Any, ...]]:
        """Rows of the draws table; ``encoded`` = (object, its JSON) spares encoding it twice."""
        rows = []
        to_json = _records.to_json
        for idx, name, kind, args, u, value, prob, is_density in draws:
            if name is not None and ("\x00" in name or not name.isascii()):
                _plain_text(name)  # raises when it is not plain text
            try:
                value_json = encoded[1] if encoded is not None and value is encoded[0] else \
                    to_json(value, "its value")  # fmt: skip
                rows.append((did, idx, name, kind, to_json(args, "its arguments"),
                             to_json(u, "its uniforms"), value_json, prob + 0.0,
                             1 if is_density else 0))  # fmt: skip
            except NotSerializableError as exc:
                label = f"{kind} draw {name!r}" if name is not None else f"{kind} draw"
                raise NotSerializableError(f"{label} (#{idx}): {exc}") from None
        return rows

    def _append_decision(
        self, decision_id: str | None, stream: str, unit: str | None, ts: float | None,
        fn: str | None, chash: str | None, inputs: str, params: str, action: str, prop: float,
        kind: str, seed: str | None, draws: Sequence[DrawRecord],
        encoded: tuple[Any, str] | None = None,
    ) -> str:  # fmt: skip
        if self._closed:
            raise LedgerClosedError(f"ledger {self.target!r} is closed")
        if unit is not None and not isinstance(unit, str):
            raise NotSerializableError(f"unit must be a string, got {type(unit).__name__}")
        did = self._next_id() if decision_id is None else decision_id
        if not isinstance(did, str) or not did:
            raise NotSerializableError("decision_id must be a non-empty string")
        _plain_text(did, stream, unit)  # draw names: in _draw_rows
        draw_rows = self._draw_rows(did, draws, encoded)
        stamp = time.time() if ts is None else _timestamp(ts)
        row = (did, stream, unit, stamp, fn, chash, inputs, params, action, prop + 0.0, kind,
               seed, self.writer)  # fmt: skip
        self._enqueue(("d-", row, draw_rows))
        return did

    def _enqueue(self, item: Any) -> None:
        """Queue one unsealed record; the writer thread links it into the chain and hashes it.

        ``Writer.put`` handles a full queue. Taps (drawledger.testing) get the record sealed at
        once, with its seq and hash; a tap returning True holds the record back.
        """
        with self._lock:
            self._stats.recorded += 1
            if self._taps:
                item = self._writer.seal(item)
                held = False
                for tap in self._taps:
                    held = tap(item) or held
                if held:
                    return
            self._writer.put(item)

    def outcome(
        self, decision_id: str, name: str, value: float, *, ts: float | None = None
    ) -> None:
        """Record an outcome (a reward) of a decision, by its decision id."""
        if not isinstance(decision_id, str) or not decision_id:
            raise NotSerializableError("outcome: decision_id must be a non-empty string")
        if not isinstance(name, str) or not name:
            raise NotSerializableError("outcome: name must be a non-empty string")
        _plain_text(decision_id, name)
        if isinstance(value, bool):
            value = float(value)
        if (
            not isinstance(value, (int, float))
            or value != value
            or value in (float("inf"), float("-inf"))
        ):
            raise NotSerializableError(
                f"outcome {name!r}: value must be a finite number, got {value!r}"
            )
        if self._closed:
            raise LedgerClosedError(f"ledger {self.target!r} is closed")
        stamp = time.time() if ts is None else _timestamp(ts)
        self._enqueue(("o-", (decision_id, name, float(value) + 0.0, stamp, self.writer)))

    def bucket(
        self,
        unit: str,
        shares: Mapping[Any, float],
        salt: str | bytes,
        *,
        stream: str | None = None,
        decision_id: str | None = None,
    ) -> Any:
        """Deterministic hashed assignment of ``unit`` to an arm (no seed: same unit, same arm).

        The assignment is recorded as a decision of ``stream`` (default: the salt) with one
        ``bucket`` draw, so the audit can check the arm ratios.
        """
        arm, u, prob, arms, probs = bucket_assign(unit, shares, salt)
        salt_text = salt if isinstance(salt, str) else salt.hex()
        args = {"unit": unit, "shares": dict(zip(arms, probs, strict=True)), "salt": salt_text}
        record = DrawRecord(0, None, "bucket", args, [u], arm, prob, False)
        action = _records.to_json(arm, "bucket arm")
        self._append_decision(decision_id, stream or salt_text, unit, None, None, None, "{}",
                              "{}", action, prob, "exact", None, [record])  # fmt: skip
        return arm

    def record_draw(
        self,
        stream: str,
        kind: str,
        args: Mapping[str, Any],
        value: Any,
        prob: float,
        *,
        unit: str | None = None,
        decision_id: str | None = None,
        ts: float | None = None,
        u: Sequence[float] | None = None,
        is_density: bool | None = None,
    ) -> str:
        """Record a draw made elsewhere (another language, legacy code) as declared.

        Declared draws cannot be replayed, only audited. Returns the decision id.
        """
        if kind not in DRAW_KINDS:
            raise DrawArgumentError(f"declared draw: unknown kind {kind!r}")
        if not isinstance(stream, str) or not stream:
            raise DrawArgumentError("declared draw: stream must be a non-empty string")
        if not isinstance(args, Mapping):
            raise DrawArgumentError(f"declared {kind} draw: args must be an object")
        if isinstance(prob, bool) or not isinstance(prob, (int, float)) or not prob >= 0.0 \
                or prob == float("inf"):  # fmt: skip
            raise DrawArgumentError(f"declared {kind} draw: prob must be a finite number >= 0")
        density = kind in ("uniform", "normal", "lognormal") if is_density is None else is_density
        if not density and prob > 1.0:
            raise DrawArgumentError(f"declared {kind} draw: probability {prob} exceeds 1")
        record = DrawRecord(0, None, kind, dict(args), list(u or []), value, float(prob), density)
        action = _records.to_json(value, f"declared {kind} draw: value")
        return self._append_decision(decision_id, stream, unit, ts, None, None, "{}", "{}",
                                     action, float(prob), "exact", None, [record])  # fmt: skip

    # -- lifecycle ----------------------------------------------------------------------------
    def flush(self, timeout: float | None = None) -> None:
        """Return when every record made before this call is committed (or spilled)."""
        if not self._writer.running:
            if self._writer.queue:
                self._writer.start()
            else:
                return
        if not self._writer.flush(timeout):
            raise LedgerError(f"flush of {self.target!r} timed out after {timeout} s")

    def close(self) -> None:
        """Flush and stop the writer. Also runs at interpreter exit. Safe to call twice."""
        if self._closed:
            return
        try:
            self.flush()
        finally:
            self._closed = True
            self._writer.stop(timeout=30.0)

    def stats(self) -> dict[str, int]:
        """Counters of this process: recorded, written, spilled, retried, dropped, queued."""
        out = self._stats.as_dict()
        out["queued"] = sum(1 for item in list(self._writer.queue) if isinstance(item, tuple))
        return out

    @property
    def spill_path(self) -> Path:
        """The JSON Lines file this process spills to when the sink fails."""
        return self._writer.spill.path


def _close_all() -> None:
    for ledger in list(_LEDGERS):
        with contextlib.suppress(Exception):  # interpreter exit: never raise from here
            ledger.close()


def _after_fork_in_child() -> None:
    for ledger in list(_LEDGERS):
        ledger._after_fork()


atexit.register(_close_all)
if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_after_fork_in_child)
