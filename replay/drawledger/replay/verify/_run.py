"""``verify``: re-execute every recorded decision and confirm each draw, probability and action.

The work is a pure function of one chunk of decisions with their draws (``verify_chunk``)
and a combine step, so that chunks can run in other processes (``jobs``) or on a Dask
cluster. Reasons a decision is not verified (docs/replay.md):

- mismatched (it replayed, something differs): value, probability, args, draw-count, action,
  nondeterministic, code-changed, integrity;
- unreplayable (it could not be replayed): missing-function, not-a-decision, bad-record,
  replay-error, declared (a draw recorded by other code; ``drawledger audit`` checks those).
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Iterator
from collections.abc import Set as AbstractSet
from concurrent.futures import Executor, Future
from typing import Any

import pandas as pd

from drawledger.exceptions import (
    ReplayError,
)
from drawledger.replay.engines import executor, pool_result, progress_bar
from drawledger.replay.integrity import IntegrityReport, check_integrity
from drawledger.replay.propensity import DEFAULT_BUDGET, DEFAULT_MC_SAMPLES
from drawledger.replay.sources import CHUNK_SIZE, PARALLEL_CHUNK_SIZE, Task, iter_chunks, plan
from drawledger.replay.verify import _export
from drawledger.replay.verify._chunk import verify_chunk
from drawledger.replay.verify._dask import verify_on_dask
from drawledger.replay.verify._report import VerifyReport, build_report, rows_with_outcomes
from drawledger.replay.verify._types import ChunkResult, Settings


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
            yield n, pool_result(fut)
    for n, fut in pending:
        yield n, pool_result(fut)


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
    bar = progress_bar(progress, sum(t.rows for t in tasks))
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
    integrity: IntegrityReport = pool_result(checking)
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
        report = verify_on_dask(ledger, format=format, settings=settings,
                                integrity_key=integrity_key, scheduler=scheduler,
                                chunk_size=chunk_size, progress=progress)  # fmt: skip
        if export is not None:
            _export.write_export(report.rows, export)
        return report
    total = ChunkResult()
    pool = executor(jobs)
    try:
        if pool is None:
            integrity = check_integrity(ledger, format=format, integrity_key=integrity_key)
            bar = progress_bar(progress, integrity.decisions)
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
    rows = rows_with_outcomes(total.rows, ledger, format) if settings.keep_rows else pd.DataFrame()
    report = build_report(total, integrity, rows)
    if export is not None:
        _export.write_export(rows, export)
    return report
