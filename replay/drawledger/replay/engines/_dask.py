"""The Dask engine: a cluster, and a function mapped over pieces with results in piece order."""

from __future__ import annotations

import contextlib
import logging
import os
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import CancelledError
from typing import TYPE_CHECKING, Any, TypeVar

from drawledger.exceptions import DrawledgerError, ReplayError
from drawledger.replay.sources import Piece

if TYPE_CHECKING:
    from distributed import Client, Future


T = TypeVar("T")


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


def run_pieces(
    client: Client,
    fn: Callable[..., tuple[int, Any]],
    plan: Sequence[Piece],
    *args: Any,
    command: str,
    advance: Callable[[int], None] | None = None,
) -> Iterator[Any]:
    """``fn(piece, *args)`` for every piece on the cluster; yields the results in piece order.

    ``fn`` returns ``(decisions read, result)``; see ``gather_pieces``.
    """
    futures = [client.submit(fn, piece, *args, pure=False) for piece in plan]
    yield from gather_pieces(client, futures, plan, command=command, advance=advance)


def gather_pieces(
    client: Client,
    futures: Sequence[Future],
    plan: Sequence[Piece],
    *,
    command: str,
    advance: Callable[[int], None] | None = None,
) -> Iterator[Any]:
    """The results of one task per piece, in piece order; each task returns ``(decisions read,
    result)``.

    Every piece must come back, each with the number of decisions its part files hold; anything
    else raises ``ReplayError`` (or the library error a task raised) after cancelling the other
    tasks: no partial results. Results that arrive early wait in a buffer until the pieces
    before them are yielded.
    """
    from distributed import as_completed

    index = {f.key: i for i, f in enumerate(futures)}
    waiting: dict[int, Any] = {}
    ready = 0
    try:
        for future in as_completed(futures):
            i = index.pop(future.key)
            piece = plan[i]
            n, result = piece_result(future, piece, command)
            future.release()
            if n != piece.rows:
                raise ReplayError(
                    f"{command}: {piece.label()} came back with {n} decisions, not "
                    f"{piece.rows}; the ledger changed during the run or a part file is "
                    "damaged; nothing is reported"
                )
            if advance is not None:
                advance(n)
            waiting[i] = result
            while ready in waiting:
                yield waiting.pop(ready)
                ready += 1
    except BaseException:
        client.cancel(list(futures))
        raise
    if ready != len(plan):  # as_completed yields every future; this guards against a loss
        missing = ", ".join(plan[i].label() for i in sorted(index.values())[:3])
        raise ReplayError(f"{command}: no result for {missing}; nothing is reported")


def piece_result(future: Future, piece: Piece, command: str) -> Any:
    """A task's result; cluster failures become ``ReplayError``, library errors pass through."""
    from distributed import KilledWorker

    try:
        return future.result()
    except DrawledgerError:
        raise
    except KilledWorker as exc:
        raise ReplayError(
            f"{command}: a Dask worker died while processing {piece.label()}, every time it "
            f"was tried ({first_line(exc)}); nothing is reported. A decision function that "
            "exhausts a worker's memory or exits the process causes this."
        ) from None
    except (CancelledError, OSError, TimeoutError) as exc:
        raise ReplayError(
            f"{command}: the Dask cluster lost {piece.label()} ({first_line(exc)}); "
            "nothing is reported"
        ) from None
    except Exception as exc:
        raise ReplayError(
            f"{command}: {piece.label()} failed on a Dask worker: {first_line(exc)}"
        ) from None


def submit_first(client: Client, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Future:
    """One task before the pieces (a higher priority: the pieces' results wait for it)."""
    return client.submit(fn, *args, pure=False, priority=10, **kwargs)


def one_result(future: Future, command: str, what: str) -> Any:
    from distributed import KilledWorker

    try:
        return future.result()
    except DrawledgerError:
        raise
    except KilledWorker as exc:
        raise ReplayError(f"{command}: a Dask worker died during {what} every time it was "
                          f"tried ({first_line(exc)}); nothing is reported") from None  # fmt: skip
    except Exception as exc:
        raise ReplayError(f"{command}: {what} failed on the Dask cluster: "
                          f"{first_line(exc)}") from None  # fmt: skip


def advance_bar(enabled: bool, total: int, label: str) -> tuple[Callable[[int], None] | None, Any]:
    import sys

    if not enabled or not sys.stderr.isatty():
        return None, None
    from rich.console import Console
    from rich.progress import Progress

    bar = Progress(console=Console(stderr=True), transient=True)
    task = bar.add_task(label, total=total)
    bar.start()
    return (lambda n: bar.advance(task, n)), bar
