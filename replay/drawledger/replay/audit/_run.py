"""``audit``: test that randomization happened as declared, on any ledger."""

from __future__ import annotations

import os
from collections.abc import Callable
from typing import TYPE_CHECKING

import pandas as pd

from drawledger.exceptions import LedgerError, ReplayError
from drawledger.replay.audit._collect import AuditState, check_alpha, chunk_state
from drawledger.replay.audit._dask import audit_on_dask
from drawledger.replay.audit._limits import ALPHA, SAMPLE_SIZE
from drawledger.replay.audit._report import AuditReport
from drawledger.replay.sources import iter_decision_chunks

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
    if engine == "dask":  # the same chunks, on a Dask cluster (replay/_dask.py)
        return audit_on_dask(target, format=format, scheduler=scheduler, alpha=alpha,
                             sample_size=sample_size, chunk_size=chunk_size,
                             progress=progress)  # fmt: skip
    state = AuditState(sample_size)
    chunks = iter_decision_chunks(target, chunk_size, format=format)
    with _Progress(progress) as advance:
        try:
            for decisions, draws in chunks:
                state.merge(chunk_state(decisions, draws, sample_size=sample_size))
                advance(len(decisions))
        except Exception as exc:
            if isinstance(exc, (LedgerError, ReplayError)) or not _is_read_error(exc):
                raise
            first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise LedgerError(f"cannot read ledger {os.fspath(target)!r}: {first}") from exc
    return state.finish(alpha)


def _is_read_error(exc: Exception) -> bool:
    import sqlalchemy as sa

    return isinstance(exc, (sa.exc.SQLAlchemyError, OSError))


class _Progress:
    """A rich progress line on stderr counting the decisions audited (or nothing)."""

    def __init__(self, enabled: bool) -> None:
        self.enabled = enabled

    def __enter__(self) -> Callable[[int], None]:
        if not self.enabled:
            return lambda n: None
        from rich.console import Console
        from rich.progress import Progress, SpinnerColumn, TextColumn

        self.bar = Progress(
            SpinnerColumn(),
            TextColumn("auditing: {task.completed} decisions"),
            console=Console(stderr=True),
            transient=True,
        )
        self.bar.start()
        task = self.bar.add_task("audit", total=None)
        return lambda n: self.bar.advance(task, n)

    def __exit__(self, *exc: object) -> None:
        if self.enabled:
            self.bar.stop()
