"""``verify``: re-execute every recorded decision and confirm each draw, probability and action.

The work is a pure function of one chunk of decisions with their draws (``verify_chunk``)
and a combine step, so that chunks can run in other processes (``jobs``) or on a Dask
cluster. Reasons a decision is not verified (docs/replay.md):

- mismatched (it replayed, something differs): value, probability, args, draw-count, action,
  nondeterministic, code-changed, version-not-found, integrity;
- unreplayable (it could not be replayed): not-allowed, missing-function, not-a-decision,
  bad-record, replay-error, declared (a draw recorded by other code; ``drawledger audit``
  checks those).
"""

from __future__ import annotations

import os
from collections.abc import Iterable
from collections.abc import Set as AbstractSet

import pandas as pd

from drawledger._schema import DEC
from drawledger.exceptions import (
    ReplayError,
)
from drawledger.replay.engines import Engine, open_engine
from drawledger.replay.integrity import IntegrityReport, check_on
from drawledger.replay.propensity import DEFAULT_BUDGET, DEFAULT_MC_SAMPLES
from drawledger.replay.sources import CHUNK_SIZE, PARALLEL_CHUNK_SIZE, Task, parquet_root, plan
from drawledger.replay.verify import _export
from drawledger.replay.verify._chunk import verify_chunk
from drawledger.replay.verify._report import VerifyReport, build_report, rows_with_outcomes
from drawledger.replay.verify._types import ChunkResult, Settings, absolute_paths
from drawledger.replay.verify._versioned import VersionPlan, plan_versions, replay_revisions


def _verify_task(task: Task, flagged: AbstractSet[str], settings: Settings) -> ChunkResult | None:
    """Read one chunk and check it, with the decisions the integrity check ``flagged``; None
    when flags are given but the chunk holds none of them (a Parquet piece's ids are read
    alone first)."""
    ids = task.decision_ids() if flagged else None
    if ids is not None and not flagged & ids:
        return None
    rows, draws = task.read()
    mine = flagged & {r[DEC.decision_id] for r in rows} if flagged else frozenset()
    if flagged and not mine:
        return None
    return verify_chunk(rows, draws, mine, settings)


def verify_on(
    engine: Engine, ledger: str | os.PathLike[str], *, format: str | None,
    integrity_key: bytes | str | None, settings: Settings, size: int,
) -> tuple[ChunkResult, IntegrityReport]:  # fmt: skip
    """Every chunk replayed on ``engine`` while the integrity check runs beside them.

    Chunks are replayed without integrity flags; when the check flags decisions, the chunks
    holding them are replayed again with the flags, so the result is the same on every engine.
    """
    tasks = plan(ledger, format=format, size=size)
    checking = check_on(engine, ledger, format=format, integrity_key=integrity_key)
    parts = list(engine.map(_verify_task, tasks, frozenset(), settings, label="replaying"))
    integrity = checking.result()
    if integrity.decision_ids:
        flags = frozenset(integrity.decision_ids)
        again = engine.map(_verify_task, tasks, flags, settings)
        parts = [p if a is None else a for p, a in zip(parts, again, strict=True)]
    total = ChunkResult()
    for part in parts:
        assert part is not None  # no flags on the first pass: every chunk checked
        total.add(part)
    return total, integrity


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
    history: bool = True,
    run_stored_source: bool = False,
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
    ``progress`` shows a progress bar when stderr is a terminal. Records of another code
    version than the current one are replayed under their own version when ``history`` is on,
    a ``path`` directory lies in a git work tree, and its history holds that version (local
    engine; docs/deploys.md); else they are ``version-not-found`` (with the diff from the
    stored source) or, without a stored source, ``code-changed``. ``run_stored_source``
    replays the records of a version the history does not hold from the source the ledger
    stores, after the keyed integrity check passed (``integrity_key`` is required).
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
    size = chunk_size if jobs == 1 else min(chunk_size, PARALLEL_CHUNK_SIZE)
    if engine == "dask":  # the workers may run elsewhere: absolute paths, a Parquet ledger
        ledger, format, size = parquet_root(ledger, format, "verify"), "parquet", chunk_size
        settings = absolute_paths(settings)
    if run_stored_source and (not integrity_key or engine != "local"):
        raise ReplayError("running stored source needs the ledger's integrity key "
                          "(DRAWLEDGER_INTEGRITY_KEY) and the local engine: only a ledger that "
                          "passes the keyed integrity check has its stored source run")  # fmt: skip
    versions = plan_versions(ledger, format, settings, history and engine == "local",
                             run_stored_source)  # fmt: skip
    with open_engine(engine, jobs=jobs, scheduler=scheduler, progress=progress,
                     command="verify") as runner:  # fmt: skip
        total, integrity = verify_on(runner, ledger, format=format, integrity_key=integrity_key,
                                     settings=versions.settings, size=size)  # fmt: skip
    flagged = frozenset(integrity.decision_ids)
    if versions.runs_stored_source or versions.unmatched:
        _check_stored(versions, integrity)
    for part in replay_revisions(versions, ledger, format, size, flagged):
        total.add(part)
    rows = rows_with_outcomes(total.rows, ledger, format) if settings.keep_rows else pd.DataFrame()
    report = build_report(total, integrity, rows)
    report.versions = versions.versions
    if export is not None:
        _export.write_export(rows, export)
    return report


def _check_stored(versions: VersionPlan, integrity: IntegrityReport) -> None:
    """Stored source runs only from a ledger that passes its keyed integrity check, and only
    when every version asked for hashes to its identity: a ledger that was edited could hold
    any code (docs/deploys.md)."""
    if not integrity.ok:
        raise ReplayError("refusing to run the ledger's stored source: the ledger fails its "
                          "keyed integrity check, so its stored code may have been edited; "
                          "run verify without --run-stored-source for the details")  # fmt: skip
    if versions.unmatched:
        fn, identity = versions.unmatched[0]
        raise ReplayError(f"refusing to run the ledger's stored source: the stored source of "
                          f"{fn} does not hash to its identity {identity} (edited after it "
                          f"was recorded); nothing was run")  # fmt: skip
