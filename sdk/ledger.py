"""``Ledger`` and ``@ledger.decision``: record every decision with its draws and probability."""

from __future__ import annotations

import atexit
import functools
import hashlib
import inspect
import itertools
import os
import socket
import textwrap
import threading
import time
import weakref
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any, Generic, ParamSpec, TypeVar

from drawledger import _records, _sinks, _stream
from drawledger._writer import SpillFile, Stats, Writer
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


def code_hash(fn: Callable[..., Any]) -> str:
    """Hash of a function's source text (or of its bytecode when the source is not available)."""
    try:
        data = textwrap.dedent(inspect.getsource(fn)).encode()
    except (OSError, TypeError):
        code = fn.__code__
        data = code.co_code + repr(code.co_consts).encode()
    return hashlib.blake2b(data, digest_size=16).hexdigest()


class Decision(Generic[R]):
    """A decision function registered with ``@ledger.decision(stream)``.

    Calling it runs the function with a fresh ``Draw`` and records the decision; it returns
    the plain action. ``unit=`` and ``decision_id=`` are optional keywords of every call.
    """

    def __init__(self, ledger: Ledger, stream: str, fn: Callable[..., R]) -> None:
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
        _records.to_json(self.params, f"{fn.__qualname__}: policy parameter defaults")
        self.ledger = ledger
        self.stream = stream
        self.fn = fn
        self.name = f"{fn.__module__}:{fn.__qualname__}"
        self.code_hash = code_hash(fn)
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

    def __call__(self, *args: Any, unit: str | None = None, decision_id: str | None = None,
                 **kwargs: Any) -> R:  # fmt: skip
        names = self.inputs
        if len(args) > len(names):
            raise TypeError(f"{self.name} takes {len(names)} inputs, got {len(args)}")
        inputs = dict(zip(names, args))
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
        ledger = self.ledger
        inputs_json = ledger._inputs_json(inputs, self.name)
        params_json = _records.to_json(params, f"{self.name}: policy parameters")
        draw = Draw(ledger._seed_source())
        action = self.run(draw, inputs, params)
        ledger._record_decision(
            self, draw, inputs_json, params_json, action, unit, decision_id
        )
        return action


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
    recorded before it is committed.
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
    ) -> None:
        if queue_size < 1 or batch_size < 1:
            raise ValueError("queue_size and batch_size must be at least 1")
        self.target = os.fspath(target)
        self.format = format
        if format not in (None, "sql", "sqlite", "parquet"):
            raise LedgerError(f"unknown ledger format {format!r}; use 'parquet' or leave it out")
        if format != "parquet":
            _sinks.create_engine(_sinks.sqlalchemy_url(self.target)).dispose()  # URL check
        self._key = integrity_key.encode() if isinstance(integrity_key, str) else (integrity_key or b"")
        if len(self._key) > 64:
            raise ValueError("integrity_key must be at most 64 bytes")
        rkey = redact_key if redact_key is not None else self._key
        self._redact_key = rkey.encode() if isinstance(rkey, str) else rkey
        self._redact_paths = [field.split(".") for field in redact]
        self.queue_size = queue_size
        self.block_timeout = block_timeout
        self._spill_dir = Path(spill_dir) if spill_dir is not None else self._default_spill_dir()
        self._seed_source: Callable[[], bytes] = _stream.new_seed
        self._taps: list[Callable[[Any], None]] = []
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
        self._seq = 0
        self._prev: str | None = None
        self._ids = itertools.count()
        self._stats = Stats()
        spill = SpillFile(self._spill_dir / f"drawledger-spill-{self.writer}.jsonl")
        self._writer = Writer(self._open_sink, spill, self._stats, batch_size=self._batch_size)

    def _open_sink(self) -> _sinks.Sink:
        return _sinks.open_sink(self.target, self.format)

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
    def _inputs_json(self, inputs: dict[str, Any], fn_name: str) -> str:
        if self._redact_paths:
            plain = _records.from_json(_records.to_json(inputs, f"{fn_name}: inputs"))
            for path in self._redact_paths:
                _redact(plain, path, self._redact_key)
            return _records.to_json(plain, f"{fn_name}: inputs")
        return _records.to_json(inputs, f"{fn_name}: inputs")

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
        what = decision.name
        action_json = _records.to_json(action, f"{what}: action")
        draws = draw.records
        if not draws:
            prop, kind = 1.0, "exact"
        elif len(draws) == 1 and _records.to_json(draws[0].value, "value") == action_json:
            prop, kind = draws[0].prob, "exact"
        else:
            prop = 1.0
            for d in draws:
                prop *= d.prob
            kind = "path"
        self._append_decision(
            decision_id, decision.stream, unit, None, decision.name, decision.code_hash,
            inputs, params, action_json, prop, kind, draw.seed.hex(), draws,
        )  # fmt: skip

    def _draw_rows(self, did: str, draws: Sequence[DrawRecord]) -> list[tuple[Any, ...]]:
        rows = []
        for d in draws:
            where = f"{d.kind} draw {d.idx}"
            rows.append((
                did, d.idx, d.name, d.kind, _records.to_json(d.args, f"{where}: arguments"),
                _records.to_json(d.u, f"{where}: uniforms"),
                _records.to_json(d.value, f"{where}: value"), d.prob, int(d.is_density),
            ))  # fmt: skip
        return rows

    def _append_decision(
        self, decision_id: str | None, stream: str, unit: str | None, ts: float | None,
        fn: str | None, chash: str | None, inputs: str, params: str, action: str, prop: float,
        kind: str, seed: str | None, draws: Sequence[DrawRecord],
    ) -> str:  # fmt: skip
        if self._closed:
            raise LedgerClosedError(f"ledger {self.target!r} is closed")
        if unit is not None and not isinstance(unit, str):
            raise NotSerializableError(f"unit must be a string, got {type(unit).__name__}")
        did = self._next_id() if decision_id is None else decision_id
        if not isinstance(did, str) or not did:
            raise NotSerializableError("decision_id must be a non-empty string")
        draw_rows = self._draw_rows(did, draws)
        stamp = time.time() if ts is None else ts
        with self._lock:
            row = (did, stream, unit, stamp, fn, chash, inputs, params, action, prop, kind, seed,
                   self.writer, self._seq, self._prev)  # fmt: skip
            digest = _records.decision_hash(row, draw_rows, self._key)
            self._enqueue(("d", (*row, digest), draw_rows))
            self._seq += 1
            self._prev = digest
        return did

    def _enqueue(self, item: Any) -> None:
        """Queue one record (caller holds the lock); spill it when the queue stays full."""
        self._stats.recorded += 1
        for tap in self._taps:
            tap(item)
        w = self._writer
        if not w.running:
            w.start()
        if len(w.queue) >= self.queue_size:
            deadline = time.monotonic() + self.block_timeout
            w.wake()
            while len(w.queue) >= self.queue_size and time.monotonic() < deadline:
                time.sleep(0.001)
            if len(w.queue) >= self.queue_size:
                w.spill_items([item])
                return
        w.queue.append(item)

    def outcome(self, decision_id: str, name: str, value: float, *, ts: float | None = None) -> None:
        """Record an outcome (a reward) of a decision, by its decision id."""
        if not isinstance(decision_id, str) or not decision_id:
            raise NotSerializableError("outcome: decision_id must be a non-empty string")
        if not isinstance(name, str) or not name:
            raise NotSerializableError("outcome: name must be a non-empty string")
        if isinstance(value, bool):
            value = float(value)
        if not isinstance(value, (int, float)) or value != value or value in (float("inf"), float("-inf")):
            raise NotSerializableError(f"outcome {name!r}: value must be a finite number, got {value!r}")
        if self._closed:
            raise LedgerClosedError(f"ledger {self.target!r} is closed")
        stamp = time.time() if ts is None else float(ts)
        with self._lock:
            row = (decision_id, name, float(value), stamp, self.writer, self._seq, self._prev)
            digest = _records.outcome_hash(row, self._key)
            self._enqueue(("o", (*row, digest)))
            self._seq += 1
            self._prev = digest

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
        args = {"unit": unit, "shares": dict(zip(arms, probs)), "salt": salt_text}
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
        """Counters of this process: recorded, written, spilled, retried, queued."""
        out = self._stats.as_dict()
        out["queued"] = sum(1 for item in list(self._writer.queue) if isinstance(item, tuple))
        return out

    @property
    def spill_path(self) -> Path:
        """The JSON Lines file this process spills to when the sink fails."""
        return self._writer.spill.path


def _close_all() -> None:
    for ledger in list(_LEDGERS):
        try:
            ledger.close()
        except Exception:  # interpreter exit: never raise from here
            pass


def _after_fork_in_child() -> None:
    for ledger in list(_LEDGERS):
        ledger._after_fork()


atexit.register(_close_all)
if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_after_fork_in_child)
