"""The local engine: this process (lazily), or worker processes forked where possible."""

from __future__ import annotations

import multiprocessing
import os
import pickle
import shutil
import tempfile
from collections import deque
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from multiprocessing.context import BaseContext
from typing import Any, Generic, TypeVar

from drawledger.exceptions import ReplayError
from drawledger.replay.engines._progress import progress_bar

R = TypeVar("R")
S = TypeVar("S")


def fork_context() -> BaseContext:
    """Processes forked where the platform allows (they inherit imported decision code)."""
    methods = multiprocessing.get_all_start_methods()
    return multiprocessing.get_context("fork" if "fork" in methods else None)


def pool_result(fut: Future[R]) -> R:
    try:
        return fut.result()
    except BrokenProcessPool as exc:
        raise ReplayError(f"a replay process died (out of memory?): {exc}") from None


_LOADED: dict[str, Any] = {}  # this process's copies of the arguments of the current map


class Stored:
    """A value in a file of the engine's directory, written by this run: the data a task
    keeps (``keep``), or an argument of a map shared by every task (loaded once a process)."""

    def __init__(self, path: str, shared: bool = False) -> None:
        self.path, self.shared = path, shared

    def save(self, value: Any) -> None:
        with open(self.path, "wb") as f:
            pickle.dump(value, f, protocol=pickle.HIGHEST_PROTOCOL)

    def load(self) -> Any:
        if self.shared and self.path in _LOADED:
            return _LOADED[self.path]
        with open(self.path, "rb") as f:
            value = pickle.load(f)  # a file this run wrote (``save``)
        if self.shared:
            folder = os.path.dirname(self.path)
            for old in [p for p in _LOADED if os.path.dirname(p) != folder]:
                del _LOADED[old]  # another map's arguments
            _LOADED[self.path] = value
        return value


def _value(x: Any) -> Any:
    return x.load() if isinstance(x, Stored) else x


def call(fn: Callable[..., R], item: Any, *args: Any) -> R:
    """``fn(item, *args)`` with stored values loaded."""
    return fn(_value(item), *(_value(a) for a in args))


def call_and_keep(
    fn: Callable[..., Any], summary: Callable[[Any], S], kept: Stored, item: Any, *args: Any
) -> S:
    """``fn(item, *args)`` saved to ``kept``; returns its summary."""
    value = call(fn, item, *args)
    kept.save(value)
    return summary(value)


class Deferred(Generic[R]):
    """A side task of this process: run when its result is first asked for."""

    def __init__(self, fn: Callable[..., R], args: tuple[Any, ...]) -> None:
        self.fn, self.args = fn, args
        self.done: tuple[R] | None = None

    def result(self) -> R:
        if self.done is None:
            self.done = (self.fn(*self.args),)
        return self.done[0]


class Pooled(Generic[R]):
    """A side task in a worker process."""

    def __init__(self, future: Future[R]) -> None:
        self.future = future

    def result(self) -> R:
        return pool_result(self.future)


def _plain(x: Any) -> Any:
    """An argument with a side task's handle replaced by its result."""
    return x.result() if isinstance(x, (Deferred, Pooled)) else x


class LocalEngine:
    """``jobs`` == 1: every task in this process, when its result is asked for; ``jobs`` > 1:
    a pool of that many processes (forked where possible), at most ``2 * jobs`` tasks in
    flight, each map's arguments sent once through a file. Use it as a context manager (on
    exit the pool stops, pending tasks cancelled, and the kept data is deleted)."""

    def __init__(self, jobs: int = 1, *, progress: bool = False) -> None:
        if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
            raise ValueError(f"jobs must be a positive integer, got {jobs!r}")
        self.jobs = jobs
        self.progress = progress
        self.pool: ProcessPoolExecutor | None = None
        self.directory: str | None = None
        self.files = 0

    def __enter__(self) -> LocalEngine:
        if self.jobs > 1:
            self.pool = ProcessPoolExecutor(max_workers=self.jobs, mp_context=fork_context())
        return self

    def __exit__(self, *exc: object) -> None:
        if self.pool is not None:
            self.pool.shutdown(cancel_futures=True)
            self.pool = None
        if self.directory is not None:
            shutil.rmtree(self.directory, ignore_errors=True)
            self.directory = None

    def _file(self, name: str, shared: bool = False) -> Stored:
        if self.directory is None:
            self.directory = tempfile.mkdtemp(prefix="drawledger-")
        self.files += 1
        folder = os.path.join(self.directory, name)
        os.makedirs(folder, exist_ok=True)
        return Stored(os.path.join(folder, str(self.files)), shared)

    def _ordered(
        self, fn: Callable[..., R], calls: Sequence[tuple[Any, ...]], label: str | None,
        items: Sequence[Any],
    ) -> Iterator[R]:  # fmt: skip
        with progress_bar(self.progress, items, label) as advance:
            if self.pool is None:
                for i, args in enumerate(calls):
                    yield fn(*args)
                    advance(i)
                return
            pending: deque[tuple[int, Future[R]]] = deque()
            try:
                for i, args in enumerate(calls):
                    pending.append((i, self.pool.submit(fn, *args)))
                    if len(pending) >= 2 * self.jobs:
                        done, fut = pending.popleft()
                        yield pool_result(fut)
                        advance(done)
                while pending:
                    done, fut = pending.popleft()
                    yield pool_result(fut)
                    advance(done)
            finally:
                for _, fut in pending:  # a failure, or the caller stopped early
                    fut.cancel()

    def _shared(self, args: tuple[Any, ...]) -> tuple[Any, ...]:
        plain = tuple(_plain(a) for a in args)
        if self.pool is None:
            return plain
        name = f"map-{self.files}"
        shared = []
        for a in plain:
            stored = self._file(name, shared=True)
            stored.save(a)
            shared.append(stored)
        return tuple(shared)

    def map(
        self, fn: Callable[..., R], items: Sequence[Any], *args: Any, label: str | None = None
    ) -> Iterator[R]:
        shared = self._shared(args)
        return self._ordered(call, [(fn, item, *shared) for item in items], label, items)

    def keep(
        self, fn: Callable[..., Any], items: Sequence[Any], *args: Any,
        summary: Callable[[Any], S], label: str | None = None,
    ) -> tuple[list[Stored], list[S]]:  # fmt: skip
        shared = self._shared(args)
        kept = [self._file("kept") for _ in items]
        calls = [(fn, summary, k, item, *shared) for k, item in zip(kept, items, strict=True)]
        return kept, list(self._ordered(call_and_keep, calls, label, items))

    def submit(self, fn: Callable[..., R], *args: Any, label: str) -> Deferred[R] | Pooled[R]:
        plain = tuple(_plain(a) for a in args)
        if self.pool is None:
            return Deferred(fn, plain)
        return Pooled(self.pool.submit(fn, *plain))
