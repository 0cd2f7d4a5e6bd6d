"""verify on a Dask cluster: the same chunks as the local engine, replayed as tasks."""

from __future__ import annotations

import os
from typing import Any

import pandas as pd
import pyarrow.parquet as pq

from drawledger.replay.engines import advance_bar, cluster, run_pieces
from drawledger.replay.integrity import IntegrityReport, IntegrityTasks
from drawledger.replay.sources import Piece, parquet_root, partitions, pieces, read_piece
from drawledger.replay.verify._chunk import verify_chunk
from drawledger.replay.verify._report import VerifyReport, build_report, rows_with_outcomes
from drawledger.replay.verify._types import ChunkResult, Settings, absolute_paths


def _verify_piece(piece: Piece, flagged: frozenset[str], settings: Settings) -> tuple[int, Any]:

    rows, draws = read_piece(piece)
    mine = flagged & {r[0] for r in rows} if flagged else frozenset()
    return len(rows), verify_chunk(rows, draws, mine, settings)


def _reverify_piece(
    piece: Piece, integrity: IntegrityReport, settings: Settings
) -> tuple[int, ChunkResult | None]:
    """Replay a piece again when it holds decisions the integrity check flagged (else None)."""
    ids: set[str] = set()
    for path in piece.parts:
        ids.update(pq.read_table(path, columns=["decision_id"]).column(0).to_pylist())
    if not ids & integrity.decision_ids:
        return piece.rows, None
    return _verify_piece(piece, frozenset(integrity.decision_ids), settings)


def verify_on_dask(
    ledger: str | os.PathLike[str],
    *,
    format: str | None,
    settings: Settings,
    integrity_key: bytes | str | None,
    scheduler: str | None,
    chunk_size: int,
    progress: bool = False,
) -> VerifyReport:
    """``verify`` with the replay of every piece on a Dask cluster (see the module docstring).

    The integrity check runs as tasks beside the replay (one per group of writers); pieces are
    replayed without integrity flags, and when the check flags decisions the pieces holding
    them are replayed again with the flags, so the counts equal the local engine's always.
    """

    root = parquet_root(ledger, format, "verify")
    plan = pieces(partitions(root), chunk_size)
    settings = absolute_paths(settings)
    advance, bar = advance_bar(progress, sum(p.rows for p in plan), "replaying")
    try:
        with cluster(scheduler) as client:
            checking = IntegrityTasks(client, root, integrity_key)
            results = list(run_pieces(client, _verify_piece, plan, frozenset(), settings,
                                      command="verify", advance=advance))  # fmt: skip
            integrity = checking.report("verify")
            if integrity.decision_ids:
                shared = client.scatter(integrity, broadcast=True)
                again = run_pieces(client, _reverify_piece, plan, shared, settings,
                                   command="verify")  # fmt: skip
                results = [r if a is None else a for r, a in zip(results, again, strict=True)]
    finally:
        if bar is not None:
            bar.stop()
    total = ChunkResult()
    for part in results:
        total.add(part)
    rows = (rows_with_outcomes(total.rows, os.fspath(root), "parquet") if settings.keep_rows
            else pd.DataFrame())  # fmt: skip
    return build_report(total, integrity, rows)
