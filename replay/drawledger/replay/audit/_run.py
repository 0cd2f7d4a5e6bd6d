"""``audit``: test that randomization happened as declared, on any ledger."""

from __future__ import annotations

import os
from typing import TYPE_CHECKING

import pandas as pd

from drawledger.exceptions import LedgerError, ReplayError
from drawledger.replay.audit._collect import AuditState, check_alpha, chunk_state
from drawledger.replay.audit._limits import ALPHA, SAMPLE_SIZE
from drawledger.replay.audit._report import AuditReport
from drawledger.replay.engines import Engine, open_engine
from drawledger.replay.sources import (
    Task,
    parquet_root,
    plan,
    read_piece_frames,
    rows_frame,
)

if TYPE_CHECKING:
    from drawledger.ledger import Ledger


def audit_tables(
    decisions: pd.DataFrame,
    draws: pd.DataFrame,
    *,
    alpha: float = ALPHA,
    sample_size: int = SAMPLE_SIZE,
    chunk_size: int | None = None,
) -> AuditReport:
    """Audit in-memory ``decisions`` and ``draws`` tables (the ledger's column layout).

    ``chunk_size`` splits the decisions into chunks as ``audit`` does when reading a ledger;
    the result is the same to floating-point accuracy.
    """
    check_alpha(alpha)
    state = AuditState(sample_size)
    if chunk_size is None or len(decisions) <= chunk_size:
        state.merge(chunk_state(decisions, draws, sample_size=sample_size))
    else:
        for start in range(0, len(decisions), chunk_size):
            part = decisions.iloc[start : start + chunk_size]
            mine = draws[draws["decision_id"].isin(part["decision_id"])]
            state.merge(chunk_state(part, mine, sample_size=sample_size))
    return state.finish(alpha)


def audit(
    ledger: str | os.PathLike[str] | Ledger,
    *,
    format: str | None = None,
    progress: bool = False,
    engine: str = "local",
    scheduler: str | None = None,
    alpha: float = ALPHA,
    sample_size: int = SAMPLE_SIZE,
    chunk_size: int = 50_000,
) -> AuditReport:
    """Test statistically, stream by stream, that the recorded draws happened as declared.

    ``ledger`` is a path or URL as for ``dl.Ledger`` (or an open ``Ledger``, flushed first).
    The ledger is read in chunks of ``chunk_size`` decisions; memory stays bounded by
    ``sample_size`` values per draw (docs/audit.md).
    """

    check_alpha(alpha)
    if engine not in ("local", "dask"):
        raise ReplayError(f"unknown engine {engine!r}; use 'local' or 'dask'")
    if scheduler is not None and engine != "dask":
        raise ReplayError("a scheduler address needs the dask engine")
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, int) or chunk_size < 1:
        raise ReplayError(f"chunk_size must be a positive integer, got {chunk_size!r}")
    from drawledger.ledger import Ledger

    target: str | os.PathLike[str]
    if isinstance(ledger, Ledger):
        ledger.flush()
        target, format = ledger.target, format or ledger.format
    else:
        target = ledger
    if engine == "dask":  # the workers may run elsewhere: a Parquet ledger by its full path
        target, format = parquet_root(target, format, "audit"), "parquet"
    try:
        with open_engine(engine, scheduler=scheduler, progress=progress,
                         command="audit") as runner:  # fmt: skip
            state = audit_on(runner, target, format=format, sample_size=sample_size,
                             chunk_size=chunk_size)  # fmt: skip
    except Exception as exc:
        if isinstance(exc, (LedgerError, ReplayError)) or not _is_read_error(exc):
            raise
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise LedgerError(f"cannot read ledger {os.fspath(target)!r}: {first}") from exc
    return state.finish(alpha)


def _audit_task(task: Task, sample_size: int) -> AuditState:
    """The sufficient statistics of one chunk."""
    if task.piece is not None:
        decisions, draws = read_piece_frames(task.piece)
    else:
        rows, draw_rows = task.read()
        decisions, draws = rows_frame(rows, "decisions"), rows_frame(draw_rows, "draws")
    return chunk_state(decisions, draws, sample_size=sample_size)


def audit_on(
    engine: Engine, ledger: str | os.PathLike[str], *, format: str | None, sample_size: int,
    chunk_size: int,
) -> AuditState:  # fmt: skip
    """The chunks' statistics computed on ``engine`` and merged in chunk order (so the tests
    and their statistics are the same on every engine)."""
    state = AuditState(sample_size)
    tasks = plan(ledger, format=format, size=chunk_size)
    for part in engine.map(_audit_task, tasks, sample_size, label="auditing"):
        state.merge(part)
    return state


def _is_read_error(exc: Exception) -> bool:
    import sqlalchemy as sa

    return isinstance(exc, (sa.exc.SQLAlchemyError, OSError))
