"""audit on a Dask cluster: the same pieces as the local engine, merged in order."""

from __future__ import annotations

import os

from drawledger.replay.audit._collect import AuditState, chunk_state
from drawledger.replay.audit._report import AuditReport
from drawledger.replay.engines import advance_bar, cluster, run_pieces
from drawledger.replay.sources import Piece, parquet_root, partitions, pieces, read_piece_frames


def audit_piece(piece: Piece, sample_size: int) -> tuple[int, AuditState]:

    decisions, draws = read_piece_frames(piece)
    return len(decisions), chunk_state(decisions, draws, sample_size=sample_size)


def audit_on_dask(
    ledger: str | os.PathLike[str],
    *,
    format: str | None,
    scheduler: str | None,
    alpha: float,
    sample_size: int,
    chunk_size: int,
    progress: bool = False,
) -> AuditReport:
    """``audit`` with the sufficient statistics of every piece computed on a Dask cluster.

    The per-piece ``AuditState`` objects are merged in piece order, as the local engine merges
    its chunks, so the tests and their statistics are the same.
    """

    root = parquet_root(ledger, format, "audit")
    plan = pieces(partitions(root), chunk_size)
    state = AuditState(sample_size)
    advance, bar = advance_bar(progress, sum(p.rows for p in plan), "auditing")
    try:
        with cluster(scheduler) as client:
            for part in run_pieces(client, audit_piece, plan, sample_size, command="audit",
                                   advance=advance):  # fmt: skip
                state.merge(part)
    finally:
        if bar is not None:
            bar.stop()
    return state.finish(alpha)
