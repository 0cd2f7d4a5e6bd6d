"""The integrity check as a side task of an engine."""

from __future__ import annotations

import os
from functools import partial
from pathlib import Path

from drawledger.replay.engines import DaskEngine, Engine, Handle
from drawledger.replay.integrity._check import check_integrity
from drawledger.replay.integrity._dask import IntegrityTasks
from drawledger.replay.integrity._report import IntegrityReport


def check_on(
    engine: Engine, ledger: str | os.PathLike[str], *, format: str | None = None,
    integrity_key: bytes | str | None = None,
) -> Handle[IntegrityReport]:  # fmt: skip
    """``check_integrity`` started on ``engine``; the report when the handle's result is asked.

    On Dask (a Parquet ledger) the check is split into tasks, one per group of writers, so it
    runs on several workers; elsewhere it is one side task. The report is the same.
    """
    if isinstance(engine, DaskEngine):
        return IntegrityTasks(engine, Path(os.fspath(ledger)), integrity_key)
    check = partial(check_integrity, format=format, integrity_key=integrity_key)
    return engine.submit(check, ledger, label="the integrity check")
