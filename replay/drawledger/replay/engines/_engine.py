"""The engine interface: a function mapped over tasks in order, and one side task."""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator, Sequence
from typing import Any, Protocol, TypeVar

from drawledger.replay.engines._dask import DaskEngine, cluster
from drawledger.replay.engines._local import LocalEngine

R = TypeVar("R")
S = TypeVar("S")
R_co = TypeVar("R_co", covariant=True)


class Handle(Protocol[R_co]):
    """The result of a side task, when asked for (its errors are raised there)."""

    def result(self) -> R_co: ...


class Engine(Protocol):
    """Where the work of a command runs: this process, worker processes or a Dask cluster."""

    def map(
        self, fn: Callable[..., R], items: Sequence[Any], *args: Any, label: str | None = None
    ) -> Iterator[R]:
        """``fn(item, *args)`` for every item, the results in item order, a bounded number of
        items in flight; a progress bar named ``label`` (counting decisions) when asked for
        and stderr is a terminal. A failing item raises its error and cancels the rest."""
        ...

    def keep(
        self, fn: Callable[..., Any], items: Sequence[Any], *args: Any,
        summary: Callable[[Any], S], label: str | None = None,
    ) -> tuple[Sequence[Any], list[S]]:  # fmt: skip
        """``fn(item, *args)`` for every item, kept where the engine keeps data (a file of
        this run, a Dask worker's memory), not in this process; returns what was kept, to be
        mapped over (a function then gets the data), and ``summary`` of each, in order."""
        ...

    def submit(self, fn: Callable[..., R], *args: Any, label: str) -> Handle[R]:
        """``fn(*args)`` as a side task beside the maps; ``label`` names it in errors. A
        handle passed to ``map``, ``keep`` or ``submit`` stands for its result."""
        ...


ENGINES = ("local", "dask")


@contextlib.contextmanager
def open_engine(
    name: str, *, jobs: int = 1, scheduler: str | None = None, progress: bool = False,
    command: str,
) -> Iterator[LocalEngine | DaskEngine]:  # fmt: skip
    """The engine ``name`` ("local": ``jobs`` processes; "dask": the cluster at ``scheduler``,
    or a local cluster started for the run), closed on exit. ``command`` prefixes the errors."""
    if name == "local":
        with LocalEngine(jobs, progress=progress) as local:
            yield local
    elif name == "dask":
        with cluster(scheduler) as client:
            yield DaskEngine(client, progress=progress, command=command)
    else:
        raise ValueError(f"engine must be one of {', '.join(ENGINES)}, got {name!r}")
