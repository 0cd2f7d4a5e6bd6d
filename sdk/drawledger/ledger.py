"""``Ledger`` and ``@ledger.decision``: record every decision with its draws and probability."""

from __future__ import annotations

import atexit
import contextlib
import functools
import inspect
import itertools
import logging
import math
import operator
import os
import threading
import time
import warnings
import weakref
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any, Generic, ParamSpec, TypeVar

from drawledger import _checks, _lifecycle, _records, _sinks, _stream
from drawledger._chain import Chain
from drawledger._code import code_hash, function_source, module_file
from drawledger._probability import decision_propensity
from drawledger._replaying import INNER_DECISION, RECORDS_INSIDE, REPLAYING, refuse
from drawledger._spill import SpillFile
from drawledger._writer import FORK_WAIT, Stats, Writer
from drawledger.draw import Draw, DrawRecord, bucket_assign
from drawledger.exceptions import (
    DecisionDefinitionError,
    DrawArgumentError,
    DuplicateDecisionError,
    LedgerClosedError,
    LedgerError,
    NotSerializableError,
    UnreplayableDecisionWarning,
)

__all__ = ["Decision", "Ledger"]

P = ParamSpec("P")
R = TypeVar("R")

RESERVED = frozenset({"unit", "decision_id"})
_PROB = operator.itemgetter(6)  # DrawRecord.prob
log = logging.getLogger("drawledger")
DRAW_KINDS = frozenset(
    {"categorical", "bernoulli", "uniform", "integers", "normal", "lognormal", "softmax",
     "epsilon_greedy", "slate", "bucket"}
)  # fmt: skip

# Every decision function registered in this process, by "module:qualname". Replay accepts
# only objects found here (docs/replay.md, safe imports).
REGISTRY: dict[str, Decision[Any]] = {}


_LEDGERS: weakref.WeakSet[Ledger] = weakref.WeakSet()


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

        Nothing is recorded; replay and estimation use this to re-execute a decision. A
        decision that the function calls raises ``ReplayError`` instead of recording.
        """
        args = [inputs[name] for name in self.inputs]
        args.insert(self._draw_index, draw)
        token = REPLAYING.set(f"decision {self.name}")
        try:
            return self.fn(*args, **{**self.params, **params})
        finally:
            REPLAYING.reset(token)

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
        if REPLAYING.get() is not None:
            refuse(f"decision {self.name}", INNER_DECISION)
        ledger = self.ledger
        if type(decision_id) is str and decision_id in ledger._recent:
            ledger._refuse(decision_id)  # before the function runs: nothing is drawn
        params_json = self._params_json
        if kwargs or len(args) != len(self.inputs) or params_json is None:
            inputs, params = self._bind(args, kwargs)
            params_json = _records.to_json(params, f"{self.name}: policy parameters")
            args = tuple([inputs[name] for name in self.inputs])
        else:  # the common call: every input positional, the default policy parameters
            inputs = dict(zip(self.inputs, args, strict=False))  # same length: checked above
            params = None  # the function's own defaults apply
        inputs_json = ledger._redacted_json(inputs, self._inputs_what) if ledger._redact_paths \
            else _records.to_json(inputs, self._inputs_what)  # fmt: skip
        draw = Draw(ledger._seed_source())
        i = self._draw_index
        call = (*args, draw) if i == len(args) else (*args[:i], draw, *args[i:])
        action = self.fn(*call) if params is None else self.fn(*call, **params)
        action_json = _records.to_json(action, self._action_what)
        draws = draw.records
        single = len(draws) == 1 and (
            draws[0].value is action or _json_or_none(draws[0].value) == action_json
        )
        prop, kind = decision_propensity(draws, single, _PROB)
        if self not in ledger._versions:
            ledger._note_version(self)
            _checks.warn_unrebuilt_inputs(self.fn, self.name, inputs)
        ledger._append_decision(
            decision_id, self.stream, unit, None, self.name, self.code_hash, inputs_json,
            params_json, action_json, prop, kind, draw.seed.hex(), draws, (action, action_json),
        )  # fmt: skip
        return action


def _json_or_none(obj: Any) -> str | None:
    """JSON of ``obj``, or None when it has none (the draw rows then report the error)."""
    try:
        return _records.to_json(obj, "value")
    except NotSerializableError:
        return None


class Ledger:
    """Where decisions, draws and outcomes are recorded.

    ``target`` is a path (an SQLite file, the embedded default), a SQLAlchemy URL such as
    ``postgresql+psycopg://host/db``, or a directory with ``format="parquet"``. Records are
    queued and written in batches by a background thread; ``flush()`` waits until everything
    recorded before it is committed. ``durability="full"`` makes every commit survive power
    loss, at a cost in throughput (docs/operations.md). Decision ids are unique per ledger: the
    last ``recent_ids`` ids given to it are remembered, and a reuse raises
    ``DuplicateDecisionError`` at the call (docs/ledger.md, "Decision ids").
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
        recent_ids: int = 100_000,
    ) -> None:
        if queue_size < 1 or batch_size < 1:
            raise ValueError("queue_size and batch_size must be at least 1")
        if not 0.0 <= block_timeout < math.inf:  # 0: never wait, spill (async services)
            raise ValueError(
                f"block_timeout must be a number of seconds >= 0, got {block_timeout!r}"
            )
        if isinstance(recent_ids, bool) or not isinstance(recent_ids, int) or recent_ids < 0:
            raise ValueError("recent_ids must be an integer >= 0")
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
        self._spill_dir = (
            Path(spill_dir)
            if spill_dir is not None
            else _sinks.default_spill_dir(self.target, format)
        )
        self._seed_source: Callable[[], bytes] = _stream.new_seed
        self._taps: list[Callable[[Any], bool]] = []
        self._batch_size = batch_size
        self._closed = False
        # The decision ids given to this ledger lately (docs/ledger.md, "Decision ids"): a
        # reuse is refused at the call. Kept across a fork: the parent's ids are in the ledger.
        self._recent = _checks.RecentIds(recent_ids)
        self._init_process()
        _LEDGERS.add(self)

    def _init_process(self) -> None:
        """State that belongs to one process: writer id, chain, queue, thread."""
        self.writer = _lifecycle.writer_id()
        self._lock = threading.Lock()
        self._ids = itertools.count()
        self._stats = Stats()
        self._versions: set[Decision[Any]] = set()  # decisions whose code version is noted
        spill = SpillFile(self._spill_dir / f"drawledger-spill-{self.writer}.jsonl")
        self._writer = Writer(
            self._open_sink,
            spill,
            self._stats,
            Chain(self._key, self.writer, self._bind_chain),
            batch_size=self._batch_size,
            queue_size=self.queue_size,
            block_timeout=self.block_timeout,
            on_start=_guard_exit,
            rejects=SpillFile(self._spill_dir / f"drawledger-rejected-{self.writer}.jsonl"),
        )

    def _open_sink(self) -> _sinks.Sink:
        return _sinks.open_sink(self.target, self.format, durability=self.durability,
                                key=self._key)  # fmt: skip

    def _bind_chain(self) -> str | None:
        """Register this writer in the ledger's registry; the genesis its chain starts from.

        None when the ledger cannot be reached now: the chain starts unbound (prev_hash null)
        and the writer registers with its first batch that is written (docs/ledger.md).
        """
        try:  # under the writer's io_lock, which a fork waits for: SQLite must not fork mid-call
            with self._writer.io_lock:
                sink = self._open_sink()
                try:
                    return sink.register_writer(self.writer, time.time(), self._key)
                finally:
                    sink.close()
        except Exception as exc:  # the ledger is out of reach: the writer spills meanwhile
            log.warning("drawledger: writer %s not registered yet: %s", self.writer, exc)
            return None

    def _after_fork(self) -> None:
        old = self._writer
        self._init_process()
        if not old.forget_after_fork():
            self._writer.refusal = (
                f"ledger {self.target!r}: this process was forked while the parent's writer was "
                f"in a write for over {FORK_WAIT:g} s, so its database state cannot be used "
                "here; fork while the ledger is idle (flush() first)"
            )

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
            if getattr(fn, "__module__", None) == "__main__":
                warnings.warn(
                    f"decision {stream!r} ({getattr(fn, '__qualname__', fn)!s}) is defined in "
                    "__main__, the script being run: replay imports decisions by module name "
                    "and never imports __main__, so these records cannot be verified later; "
                    "define it in a module and import it",
                    UnreplayableDecisionWarning,
                    stacklevel=2,
                )
            return Decision(self, stream, fn)

        return register

    # -- recording ----------------------------------------------------------------------------
    def _redacted_json(self, inputs: dict[str, Any], what: str) -> str:
        """JSON of a call's inputs with the ``redact`` fields replaced; ``what`` names them."""
        plain = _records.from_json(_records.to_json(inputs, what))
        for path in self._redact_paths:
            _checks.redact(plain, path, self._redact_key)
        return _records.to_json(plain, what)

    def _note_version(self, decision: Decision[Any]) -> None:
        """Queue the row of the decision's code version (the first use by this writer)."""
        self._versions.add(decision)
        row = (decision.code_hash, decision.stream, decision.name, decision.module_file,
               decision.source, time.time(), self.writer)  # fmt: skip
        self._writer.versions.append(row)

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
        did = f"{self.writer}.{next(self._ids)}" if decision_id is None else decision_id
        if not isinstance(did, str) or not did:
            raise NotSerializableError("decision_id must be a non-empty string")
        if unit is not None or "\x00" in did or "\x00" in stream or not did.isascii() or \
                not stream.isascii():  # fmt: skip
            _checks.plain_text(did, stream, unit)  # raises when one is not plain text
        rows = []  # the draw rows; ``encoded`` = (object, its JSON) spares encoding it twice
        to_json = _records.to_json
        for idx, name, dkind, args, u, value, dprob, is_density in draws:
            if name is not None and ("\x00" in name or not name.isascii()):
                _checks.plain_text(name)  # raises when it is not plain text
            try:
                value_json = encoded[1] if encoded is not None and value is encoded[0] else \
                    to_json(value, "its value")  # fmt: skip
                rows.append((did, idx, name, dkind, to_json(args, "its arguments"),
                             to_json(u, "its uniforms"), value_json, dprob + 0.0,
                             1 if is_density else 0))  # fmt: skip
            except NotSerializableError as exc:
                label = f"{dkind} draw {name!r}" if name is not None else f"{dkind} draw"
                raise NotSerializableError(f"{label} (#{idx}): {exc}") from None
        stamp = time.time() if ts is None else _checks.timestamp(ts)
        # a flat tuple (_records.PENDING_DRAWS): the garbage collector soon stops tracking it
        self._enqueue(("d-", did, stream, unit, stamp, fn, chash, inputs, params, action,
                       prop + 0.0, kind, seed, self.writer, *rows), decision_id)  # fmt: skip
        return did

    def _refuse(self, decision_id: str) -> None:
        raise DuplicateDecisionError(
            f"decision id {decision_id!r} was already recorded by this ledger; decision ids are "
            "unique per ledger (a retried request must not record its decision again)"
        )

    def _enqueue(self, item: Any, claim: str | None = None) -> None:
        """Queue one unsealed record; the writer thread links it into the chain and hashes it.

        ``claim`` is a decision id given by the caller: refused when recently recorded, else
        remembered. ``Writer.put`` handles a full queue. Taps (drawledger.testing) get the
        record sealed at once, with its seq and hash; a tap returning True holds the record back.
        """
        lock = self._lock
        lock.acquire()  # not "with": a lock's __enter__ and __exit__ cost twice as much
        try:
            if claim is not None:
                if claim in self._recent:
                    self._refuse(claim)
                self._recent.add(claim)
            self._stats.recorded += 1
            if self._taps:
                item = self._writer.seal(item)
                held = False
                for tap in self._taps:
                    held = tap(item) or held
                if held:
                    return
            self._writer.put(item)
        finally:
            lock.release()

    def outcome(
        self, decision_id: str, name: str, value: float, *, ts: float | None = None
    ) -> None:
        """Record an outcome (a reward) of a decision, by its decision id."""
        if REPLAYING.get() is not None:
            refuse("ledger.outcome", RECORDS_INSIDE)
        if not isinstance(decision_id, str) or not decision_id:
            raise NotSerializableError("outcome: decision_id must be a non-empty string")
        if not isinstance(name, str) or not name:
            raise NotSerializableError("outcome: name must be a non-empty string")
        _checks.plain_text(decision_id, name)
        number = _checks.finite_number(value)
        if number is None:
            raise NotSerializableError(
                f"outcome {name!r}: value must be a finite number, got {value!r}"
            )
        if self._closed:
            raise LedgerClosedError(f"ledger {self.target!r} is closed")
        stamp = time.time() if ts is None else _checks.timestamp(ts)
        self._enqueue(("o-", decision_id, name, number + 0.0, stamp, self.writer))

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
        if REPLAYING.get() is not None:
            refuse("ledger.bucket", RECORDS_INSIDE)
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
        if REPLAYING.get() is not None:
            refuse("ledger.record_draw", RECORDS_INSIDE)
        if kind not in DRAW_KINDS:
            raise DrawArgumentError(f"declared draw: unknown kind {kind!r}")
        if not isinstance(stream, str) or not stream:
            raise DrawArgumentError("declared draw: stream must be a non-empty string")
        if not isinstance(args, Mapping):
            raise DrawArgumentError(f"declared {kind} draw: args must be an object")
        p = None if isinstance(prob, bool) else _checks.finite_number(prob)
        if p is None or not p >= 0.0:
            raise DrawArgumentError(f"declared {kind} draw: prob must be a finite number >= 0")
        density = kind in ("uniform", "normal", "lognormal") if is_density is None else is_density
        if not density and p > 1.0:
            raise DrawArgumentError(f"declared {kind} draw: probability {p} exceeds 1")
        uniforms = _checks.declared_uniforms(kind, u)
        record = DrawRecord(0, None, kind, dict(args), uniforms, value, p, density)
        action = _records.to_json(value, f"declared {kind} draw: value")
        return self._append_decision(decision_id, stream, unit, ts, None, None, "{}", "{}",
                                     action, p, "exact", None, [record])  # fmt: skip

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

    def close(self, timeout: float | None = None) -> None:
        """Flush and stop the writer. Also runs at interpreter exit. Safe to call twice.

        ``timeout`` bounds the flush (and the wait for the thread as much again); what is still
        queued then is spilled. ``LedgerError`` when the flush failed or timed out.
        """
        if self._closed:
            return
        try:
            self.flush(timeout)
        finally:
            self._closed = True
            self._writer.stop(timeout=30.0 if timeout is None else timeout)

    def stats(self) -> dict[str, int]:
        """Counters of this process: recorded, written, spilled, rejected, retried, dropped,
        spill_errors, queued (docs/operations.md)."""
        out = self._stats.as_dict()
        out["queued"] = sum(1 for item in list(self._writer.queue) if isinstance(item, tuple))
        return out

    @property
    def spill_path(self) -> Path:
        """The JSON Lines file this process spills to when the sink fails."""
        return self._writer.spill.path

    @property
    def reject_path(self) -> Path:
        """The JSON Lines file of decisions the writer refused: their id was already stored."""
        return self._writer.rejects.path


def _close_all(timeout: float | None = _lifecycle.EXIT_TIMEOUT) -> None:
    for ledger in list(_LEDGERS):
        with contextlib.suppress(Exception):  # process exit: never raise from here
            ledger.close(timeout)


def _guard_exit() -> None:
    _lifecycle.guard_exit(_close_all)


def _each_ledger(step: Callable[[Ledger], object]) -> Callable[[], None]:
    """A fork hook that runs ``step`` on every ledger of this process."""

    def hook() -> None:
        for ledger in list(_LEDGERS):
            step(ledger)

    return hook


atexit.register(_lifecycle.at_exit, _close_all)
if hasattr(os, "register_at_fork"):
    os.register_at_fork(
        before=_each_ledger(lambda ledger: ledger._writer.before_fork()),
        after_in_parent=_each_ledger(lambda ledger: ledger._writer.after_fork_in_parent()),
        after_in_child=_each_ledger(Ledger._after_fork),
    )
