"""The Dask engine: a cluster, and tasks on it through the futures API."""

from __future__ import annotations

import contextlib
import logging
import os
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import CancelledError
from typing import TYPE_CHECKING, Any, Generic, TypeVar

from drawledger.exceptions import DrawledgerError, ReplayError
from drawledger.replay.engines._progress import progress_bar
from drawledger.replay.sources import Task

if TYPE_CHECKING:
    from distributed import Client, Future


R = TypeVar("R")
S = TypeVar("S")


CONNECT_TIMEOUT = 30.0  # seconds to reach a scheduler given by address


# Dask workers sample their threads' stacks every 10 ms for the dashboard's profile; on replay
# (many short Python calls) that costs about a third of a worker's CPU. Local clusters go without.
NO_PROFILER = {"distributed.worker.profile.enabled": False}


WORKER_TIMEOUT = 60.0  # seconds to wait for the first worker of a cluster


@contextlib.contextmanager
def cluster(scheduler: str | None) -> Iterator[Client]:
    """A client of the cluster at ``scheduler``, or of a local cluster started for the run.

    The local cluster has one single-threaded worker process per core (decision code and the
    per-chunk functions hold the GIL, so threads would not add throughput) and no profiler.
    """
    try:
        import dask
        from distributed import Client, LocalCluster
    except ImportError:
        raise ReplayError(
            "the dask engine needs dask and distributed: pip install 'drawledger[dask]'"
        ) from None
    local = None
    try:
        if scheduler is None:
            with dask.config.set(NO_PROFILER):
                local = LocalCluster(
                    n_workers=os.cpu_count() or 1, threads_per_worker=1, processes=True,
                    dashboard_address=":0", silence_logs=logging.ERROR,
                )  # fmt: skip
            client = Client(local)
        else:
            client = Client(scheduler, timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError, ValueError) as exc:
        if local is not None:
            local.close()
        where = "start a local Dask cluster" if scheduler is None else \
            f"reach the Dask scheduler at {scheduler!r}"  # fmt: skip
        raise ReplayError(f"cannot {where}: {first_line(exc)}") from None
    try:
        try:
            client.wait_for_workers(1, timeout=WORKER_TIMEOUT)
        except (OSError, TimeoutError) as exc:
            raise ReplayError(
                f"the Dask cluster at {scheduler!r} has no workers: {first_line(exc)}"
            ) from None
        yield client
    finally:
        client.close()
        if local is not None:
            local.close()


def first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text and text[0] else type(exc).__name__


def same(value: R) -> R:
    return value


def describe(item: Any, index: int) -> str:
    """How an error names a task's item: a Parquet piece by its label."""
    if isinstance(item, Task):
        if item.piece is not None:
            return str(item.piece.label())
        return f"chunk {index} ({item.rows} decisions)"
    return f"task {index}"


def task_result(future: Future, command: str, what: str) -> Any:
    """A task's result; cluster failures become ``ReplayError``, library errors pass through."""
    from distributed import KilledWorker

    try:
        return future.result()
    except DrawledgerError:
        raise
    except KilledWorker as exc:
        raise ReplayError(
            f"{command}: a Dask worker died while processing {what}, every time it was tried "
            f"({first_line(exc)}); nothing is reported. A decision function that exhausts a "
            "worker's memory or exits the process causes this."
        ) from None
    except (CancelledError, OSError, TimeoutError) as exc:
        raise ReplayError(
            f"{command}: the Dask cluster lost {what} ({first_line(exc)}); nothing is reported"
        ) from None
    except Exception as exc:
        raise ReplayError(f"{command}: {what} failed on a Dask worker: {first_line(exc)}") from None


class Remote(Generic[R]):
    """A side task on the cluster; its result stays there until asked for (or passed to
    other tasks by reference)."""

    def __init__(self, future: Future, command: str, what: str) -> None:
        self.future, self.command, self.what = future, command, what

    def result(self) -> R:
        found: R = task_result(self.future, self.command, self.what)
        return found


class DaskEngine:
    """Tasks on the cluster of ``client``: results come back in item order, at most
    ``WINDOW`` tasks per worker in flight; a failure cancels the other tasks (no partial
    results) and reaches the caller as ``ReplayError`` (or the library error a task raised),
    prefixed with ``command``. Each map's arguments are sent once, to tasks by reference."""

    WINDOW = 4  # tasks in flight per worker

    def __init__(self, client: Client, *, progress: bool = False, command: str) -> None:
        self.client = client
        self.progress = progress
        self.command = command

    @property
    def workers(self) -> int:
        return max(1, len(self.client.scheduler_info().get("workers", {})))

    def _shared(self, args: tuple[Any, ...]) -> list[Any]:
        from distributed import Future

        out = []
        for a in args:
            if isinstance(a, Remote):
                out.append(a.future)
            elif isinstance(a, Future):
                out.append(a)
            else:  # made by a task, not scattered: a worker that dies with it makes it again
                out.append(self.client.submit(same, a, pure=False, priority=10))
        return out

    def _ordered(
        self, submit: Callable[[int], Future], items: Sequence[Any], label: str | None
    ) -> Iterator[Any]:
        from distributed import as_completed

        window = self.WINDOW * self.workers
        running = as_completed()
        index: dict[object, int] = {}
        futures: list[Future] = []
        waiting: dict[int, Any] = {}
        ready = 0

        def fill() -> None:
            while len(futures) < len(items) and len(futures) - ready < window:
                future = submit(len(futures))
                index[future.key] = len(futures)
                futures.append(future)
                running.add(future)

        with progress_bar(self.progress, items, label) as advance:
            try:
                fill()
                for future in running:
                    i = index.pop(future.key)
                    waiting[i] = task_result(future, self.command, describe(items[i], i))
                    future.release()
                    advance(i)
                    while ready in waiting:
                        yield waiting.pop(ready)
                        ready += 1
                    fill()
            except BaseException:
                self.client.cancel([f for f in futures if f.key in index])
                raise
        if ready != len(items):  # as_completed yields every future; this guards against a loss
            missing = ", ".join(describe(items[i], i) for i in sorted(index.values())[:3])
            raise ReplayError(f"{self.command}: no result for {missing}; nothing is reported")

    def map(
        self, fn: Callable[..., R], items: Sequence[Any], *args: Any, label: str | None = None
    ) -> Iterator[R]:
        shared = self._shared(args)
        return self._ordered(
            lambda i: self.client.submit(fn, items[i], *shared, pure=False), items, label
        )

    def keep(
        self, fn: Callable[..., Any], items: Sequence[Any], *args: Any,
        summary: Callable[[Any], S], label: str | None = None,
    ) -> tuple[list[Future], list[S]]:  # fmt: skip
        """``fn(item, *args)`` kept on the workers as futures: a task given one runs where
        its data is (a lost one is made again); ``summary`` of each comes back."""
        shared = self._shared(args)
        kept = [self.client.submit(fn, item, *shared, pure=False) for item in items]
        summaries = list(self._ordered(
            lambda i: self.client.submit(summary, kept[i], pure=False), items, label
        ))  # fmt: skip
        return kept, summaries

    def submit(self, fn: Callable[..., R], *args: Any, label: str) -> Remote[R]:
        """A side task before the maps' tasks (a higher priority: results wait for it)."""
        plain = [a.future if isinstance(a, Remote) else a for a in args]
        future = self.client.submit(fn, *plain, pure=False, priority=10)
        return Remote(future, self.command, label)
