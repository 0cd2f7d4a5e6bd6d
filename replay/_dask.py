"""The Dask engine: verify, audit and estimate a partitioned Parquet ledger on a cluster.

A Parquet ledger is partitioned by stream and date (``decisions/<stream>/<date>/*.parquet``,
docs/ledger.md). The client lists the part files of every partition, in path order, and cuts
them into *pieces* exactly as the local engine cuts a ledger into chunks: consecutive part
files until a piece holds at least ``chunk_size`` decisions. Each piece is one task on the
cluster running the same pure per-chunk function as the local engine (``verify_chunk``,
``chunk_state``); the client combines the results in piece order. The local and the Dask
engine therefore see the same chunks and give the same results (estimates up to
floating-point rounding of the combine step).

Failures never yield partial numbers: a task whose worker dies is rescheduled by Dask
(``distributed.scheduler.allowed-failures`` times); a piece that still fails, an error inside a
task, or a piece that comes back with another number of decisions than its part files hold
makes the whole command fail with ``ReplayError``.

Decision code is never shipped as pickled functions: tasks carry the recorded
``module:qualname`` names and the ``path`` / ``allow`` settings, and each worker imports
the code under the same safe-import rules as the local engine (docs/replay.md). Paths are made
absolute on the client, so workers must see the ledger and the code at the same paths
(one machine, or a shared file system).
"""

from __future__ import annotations

import contextlib
import logging
import os
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import CancelledError
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd
import pyarrow.parquet as pq

from drawledger import _parquet
from drawledger.exceptions import DrawledgerError, ReplayError
from drawledger.replay._io import is_parquet

if TYPE_CHECKING:
    from distributed import Client, Future

    from drawledger.replay._audit import AuditReport, AuditState
    from drawledger.replay._integrity import IntegrityReport
    from drawledger.replay._verify import ChunkResult, Settings, VerifyReport

__all__ = [
    "Partition",
    "Piece",
    "audit_on_dask",
    "cluster",
    "evaluate_on_dask",
    "partitions",
    "pieces",
    "run_pieces",
    "verify_on_dask",
]

Row = tuple[Any, ...]
CONNECT_TIMEOUT = 30.0  # seconds to reach a scheduler given by address
# Dask workers sample their threads' stacks every 10 ms for the dashboard's profile; on replay
# (many short Python calls) that costs about a third of a worker's CPU. Local clusters go without.
NO_PROFILER = {"distributed.worker.profile.enabled": False}
WORKER_TIMEOUT = 60.0  # seconds to wait for the first worker of a cluster


# -- listing a ledger ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Partition:
    """One ``<stream>/<date>`` directory of the decisions table and its committed part files."""

    name: str
    parts: tuple[str, ...]
    draws: tuple[str | None, ...]
    counts: tuple[int, ...]  # decisions in each part (from the Parquet footers)

    @property
    def rows(self) -> int:
        return sum(self.counts)


@dataclass(frozen=True)
class Piece:
    """Consecutive part files processed by one task; ``rows`` decisions in all."""

    index: int
    parts: tuple[str, ...]
    draws: tuple[str | None, ...]
    rows: int
    partitions: tuple[str, ...]

    def label(self) -> str:
        shown = ", ".join(self.partitions[:3]) + (", ..." if len(self.partitions) > 3 else "")
        return f"piece {self.index} ({self.rows} decisions of {shown})"


def parquet_root(ledger: str | os.PathLike[str], format: str | None, command: str) -> Path:
    """The absolute directory of a Parquet ledger; ``ReplayError`` for other ledgers."""
    text = os.fspath(ledger)
    if not is_parquet(text, format):
        raise ReplayError(
            f"{command}: the dask engine reads partitioned Parquet ledgers (a directory written "
            f"with format='parquet'); {text!r} is not one, use --engine local"
        )
    root = Path(text).expanduser().resolve()
    _parquet.check_ledger_dir(root)
    return root


def partitions(root: str | os.PathLike[str]) -> list[Partition]:
    """The partitions of a Parquet ledger in path order (stream, then date)."""
    base = Path(root)
    _parquet.check_ledger_dir(base)
    found: dict[str, tuple[list[str], list[str | None], list[int]]] = {}
    decisions_dir = base / "decisions"
    for part, sibling in _parquet.iter_part_pairs(base):
        name = part.path.parent.relative_to(decisions_dir).as_posix()
        parts, draws, counts = found.setdefault(name, ([], [], []))
        parts.append(os.fspath(part.path))
        draws.append(None if sibling is None else os.fspath(sibling))
        counts.append(_footer_rows(part.path))
    return [
        Partition(name, tuple(p), tuple(d), tuple(c)) for name, (p, d, c) in sorted(found.items())
    ]


def _footer_rows(path: Path) -> int:
    try:
        return int(pq.read_metadata(path).num_rows)
    except OSError as exc:
        raise ReplayError(f"cannot read ledger part {os.fspath(path)!r}: {exc}") from None


def pieces(parts: Sequence[Partition], chunk_size: int) -> list[Piece]:
    """Part files cut into pieces of at least ``chunk_size`` decisions, as the local engine.

    The local engine reads part files in path order and yields a chunk as soon as it holds
    ``chunk_size`` decisions or more (``iter_chunks``, ``iter_decision_chunks``): the same cut
    here gives every task exactly one local chunk.
    """
    out: list[Piece] = []
    files: list[str] = []
    draws: list[str | None] = []
    names: list[str] = []
    rows = 0

    def cut() -> None:
        nonlocal files, draws, names, rows
        out.append(Piece(len(out), tuple(files), tuple(draws), rows, tuple(dict.fromkeys(names))))
        files, draws, names, rows = [], [], [], 0

    for partition in parts:
        for path, sibling, count in zip(
            partition.parts, partition.draws, partition.counts, strict=True
        ):
            files.append(path)
            draws.append(sibling)
            names.append(partition.name)
            rows += count
            if rows >= chunk_size:
                cut()
    if files:
        cut()
    return out


def read_piece(piece: Piece) -> tuple[list[Row], list[Row]]:
    """Decision rows and draw rows of a piece, as tuples in the ledger's column order."""
    rows: list[Row] = []
    draws: list[Row] = []
    for path, sibling in zip(piece.parts, piece.draws, strict=True):
        rows.extend(_parquet.part_rows(Path(path), "decisions"))
        if sibling is not None:
            draws.extend(_parquet.part_rows(Path(sibling), "draws"))
    return rows, draws


def read_piece_frames(piece: Piece) -> tuple[Any, Any]:
    """Decisions and draws of a piece as DataFrames, as ``iter_decision_chunks`` gives them."""
    decisions = [_parquet.read_part(Path(p), "decisions") for p in piece.parts]
    draws = [_parquet.read_part(Path(d), "draws") for d in piece.draws if d is not None]
    return _parquet.to_frame(decisions, "decisions"), _parquet.to_frame(draws, "draws")


# -- the cluster --------------------------------------------------------------------------------
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
        raise ReplayError(f"cannot {where}: {_first_line(exc)}") from None
    try:
        try:
            client.wait_for_workers(1, timeout=WORKER_TIMEOUT)
        except (OSError, TimeoutError) as exc:
            raise ReplayError(
                f"the Dask cluster at {scheduler!r} has no workers: {_first_line(exc)}"
            ) from None
        yield client
    finally:
        client.close()
        if local is not None:
            local.close()


def _first_line(exc: BaseException) -> str:
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

    ``fn`` returns ``(decisions read, result)``. Every piece must come back, each with the
    number of decisions its part files hold; anything else raises ``ReplayError`` (or the
    library error a task raised) after cancelling the other tasks: no partial results. Results
    that arrive early wait in a buffer until the pieces before them are yielded.
    """
    from distributed import as_completed

    futures = [client.submit(fn, piece, *args, pure=False) for piece in plan]
    index = {f.key: i for i, f in enumerate(futures)}
    waiting: dict[int, Any] = {}
    ready = 0
    try:
        for future in as_completed(futures):
            i = index.pop(future.key)
            piece = plan[i]
            n, result = _result(future, piece, command)
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
        client.cancel(futures)
        raise
    if ready != len(plan):  # as_completed yields every future; this guards against a loss
        missing = ", ".join(plan[i].label() for i in sorted(index.values())[:3])
        raise ReplayError(f"{command}: no result for {missing}; nothing is reported")


def _result(future: Future, piece: Piece, command: str) -> Any:
    """A task's result; cluster failures become ``ReplayError``, library errors pass through."""
    from distributed import KilledWorker

    try:
        return future.result()
    except DrawledgerError:
        raise
    except KilledWorker as exc:
        raise ReplayError(
            f"{command}: a Dask worker died while processing {piece.label()}, every time it "
            f"was tried ({_first_line(exc)}); nothing is reported. A decision function that "
            "exhausts a worker's memory or exits the process causes this."
        ) from None
    except (CancelledError, OSError, TimeoutError) as exc:
        raise ReplayError(
            f"{command}: the Dask cluster lost {piece.label()} ({_first_line(exc)}); "
            "nothing is reported"
        ) from None
    except Exception as exc:
        raise ReplayError(
            f"{command}: {piece.label()} failed on a Dask worker: {_first_line(exc)}"
        ) from None


def _submit_one(client: Client, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Future:
    """One task before the pieces (a higher priority: the pieces' results wait for it)."""
    return client.submit(fn, *args, pure=False, priority=10, **kwargs)


def _one_result(future: Future, command: str, what: str) -> Any:
    from distributed import KilledWorker

    try:
        return future.result()
    except DrawledgerError:
        raise
    except KilledWorker as exc:
        raise ReplayError(f"{command}: a Dask worker died during {what} every time it was "
                          f"tried ({_first_line(exc)}); nothing is reported") from None  # fmt: skip
    except Exception as exc:
        raise ReplayError(f"{command}: {what} failed on the Dask cluster: "
                          f"{_first_line(exc)}") from None  # fmt: skip


def _progress(enabled: bool, total: int, label: str) -> tuple[Callable[[int], None] | None, Any]:
    import sys

    if not enabled or not sys.stderr.isatty():
        return None, None
    from rich.console import Console
    from rich.progress import Progress

    bar = Progress(console=Console(stderr=True), transient=True)
    task = bar.add_task(label, total=total)
    bar.start()
    return (lambda n: bar.advance(task, n)), bar


# -- verify -------------------------------------------------------------------------------------
def _verify_piece(piece: Piece, flagged: frozenset[str], settings: Settings) -> tuple[int, Any]:
    from drawledger.replay._verify import verify_chunk

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


# -- the integrity check, split by writer -------------------------------------------------------
def _integrity_ids(root: str, key: bytes) -> tuple[IntegrityReport, set[str]]:
    """The ledger-wide part of the integrity check: duplicate ids, orphans, interrupted batches.

    Returns the report so far and the duplicate decision ids the chain walks need.
    """
    from drawledger.replay import _integrity as ig

    report = ig.IntegrityReport(keyed=bool(key))
    return report, ig.parquet_cross_checks(Path(root), report)


def _integrity_chains(
    root: str, key: bytes, tags: Sequence[str], dup_ids: frozenset[str]
) -> IntegrityReport:
    """Hashes and chains of some writers (``_integrity._check_parquet``'s walk, per tag)."""
    from drawledger.replay import _integrity as ig

    base = Path(root)
    report = ig.IntegrityReport(keyed=bool(key))
    wanted = set(tags)
    by_tag: dict[str, list[tuple[int, int, _parquet.Part]]] = {}
    for order, table in ((0, "decisions"), (1, "outcomes")):
        for p in _parquet.parts(base, table):
            if p.tag in wanted:
                by_tag.setdefault(p.tag, []).append((p.first, order, p))
    for tag in sorted(by_tag):
        plist = sorted(by_tag[tag], key=lambda t: t[:2])
        ig._walk(report, ig._parquet_chain(base, plist, key, set(dup_ids), report),
                 set(dup_ids))  # fmt: skip
    return report


def _integrity_combine(
    found: tuple[IntegrityReport, set[str]], *chains: IntegrityReport
) -> IntegrityReport:
    """One report from the ledger-wide part and the writers' parts, in the local engine's order."""
    from drawledger.replay import _integrity as ig

    total = found[0]
    for part in chains:
        for name in (*ig.PROBLEMS, "decisions", "outcomes", "writers", "uncommitted_parts"):
            setattr(total, name, getattr(total, name) + getattr(part, name))
        for problem, shown in part.examples.items():
            mine = total.examples.setdefault(problem, [])
            for did in shown:
                if len(mine) < ig.MAX_EXAMPLES and did not in mine:
                    mine.append(did)
        total.decision_ids |= part.decision_ids
    return total.finish()


class _Integrity:
    """The integrity check of a Parquet ledger as tasks: one ledger-wide, one per writer group.

    Each writer's chain is walked in sequence order by one task, so the check runs on as many
    workers as there are writers (up to twice the workers); the report equals
    ``check_integrity``'s. The chain tasks start at once, without the ledger's duplicate ids
    (they only change how a duplicate decision is counted); in the rare ledger that has
    duplicates, the chains are walked again with them.
    """

    def __init__(self, client: Client, root: Path, integrity_key: bytes | str | None) -> None:
        key = integrity_key.encode() if isinstance(integrity_key, str) else (integrity_key or b"")
        sizes: dict[str, int] = {}
        for table in ("decisions", "outcomes"):
            for p in _parquet.parts(root, table):
                sizes[p.tag] = sizes.get(p.tag, 0) + p.last - p.first + 1
        workers = max(1, len(client.scheduler_info().get("workers", {})))
        groups: list[list[str]] = [[] for _ in range(min(len(sizes), 2 * workers))]
        loads = [0] * len(groups)
        for tag in sorted(sizes, key=lambda t: (-sizes[t], t)):  # largest to the lightest
            k = loads.index(min(loads))
            groups[k].append(tag)
            loads[k] += sizes[tag]
        self.client, self.root, self.key = client, os.fspath(root), key
        self.groups = [sorted(g) for g in groups]
        self.found = _submit_one(client, _integrity_ids, self.root, key)
        self.chains = self._walks(frozenset())

    def _walks(self, dup_ids: frozenset[str]) -> list[Future]:
        return [_submit_one(self.client, _integrity_chains, self.root, self.key, g, dup_ids)
                for g in self.groups]  # fmt: skip

    def report(self, command: str) -> IntegrityReport:
        """The combined report (waits for the tasks)."""
        found = _one_result(self.found, command, "the integrity check")
        if found[1]:
            self.chains = self._walks(frozenset(found[1]))
        chains = [_one_result(f, command, "the integrity check") for f in self.chains]
        return _integrity_combine(found, *chains)


def _absolute(settings: Settings) -> Settings:
    return replace(settings, path=tuple(os.path.abspath(os.path.expanduser(p))
                                        for p in settings.path))  # fmt: skip


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
    from drawledger.replay import _verify
    from drawledger.replay._verify import ChunkResult

    root = parquet_root(ledger, format, "verify")
    plan = pieces(partitions(root), chunk_size)
    settings = _absolute(settings)
    advance, bar = _progress(progress, sum(p.rows for p in plan), "replaying")
    try:
        with cluster(scheduler) as client:
            checking = _Integrity(client, root, integrity_key)
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
    rows = (_verify._rows(total.rows, os.fspath(root), "parquet") if settings.keep_rows
            else pd.DataFrame())  # fmt: skip
    return _verify._report(total, integrity, rows)


# -- audit --------------------------------------------------------------------------------------
def _audit_piece(piece: Piece, sample_size: int) -> tuple[int, AuditState]:
    from drawledger.replay._audit import chunk_state

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
    from drawledger.replay._audit import AuditState

    root = parquet_root(ledger, format, "audit")
    plan = pieces(partitions(root), chunk_size)
    state = AuditState(sample_size)
    advance, bar = _progress(progress, sum(p.rows for p in plan), "auditing")
    try:
        with cluster(scheduler) as client:
            for part in run_pieces(client, _audit_piece, plan, sample_size, command="audit",
                                   advance=advance):  # fmt: skip
                state.merge(part)
    finally:
        if bar is not None:
            bar.stop()
    return state.finish(alpha)


# -- estimate -----------------------------------------------------------------------------------
@dataclass(frozen=True)
class EstimateJob:
    """What every estimate task needs besides its piece (picklable: sent with each task)."""

    policies: tuple[Any, ...]  # None (logging), a mapping of overrides, or "module:function"
    reward: str
    stream: str
    path: tuple[str, ...]
    allow: tuple[str, ...]
    seed: int
    missing_reward: float | None
    reward_range: tuple[float, float] | None


@dataclass
class PieceRecords:
    """One piece's verified records of the stream and every policy's per-record results."""

    total: int
    excluded: Counter[str]
    outside: int  # rewards outside the given reward range
    records: Any  # _estimate._Records, or None when the piece has no usable record
    logging: list[dict[str, float] | None]
    results: list[Any]  # _estimate._Evaluated per policy


def _reward_totals(path: str, reward: str) -> tuple[int, pd.DataFrame]:
    """The sum of the ``reward`` outcomes of each decision id in one outcomes part."""
    data = _parquet.read_part(Path(path), "outcomes").select(["decision_id", "name", "value"])
    frame = data.to_pandas()
    frame = frame[frame["name"] == reward]
    totals = frame.groupby("decision_id", sort=False)["value"].sum()
    return len(frame), totals.reset_index()


def _combine_rewards(*parts: tuple[int, pd.DataFrame]) -> tuple[int, pd.Series]:
    count = sum(n for n, _ in parts)
    frames = [f for _, f in parts if len(f)]
    if not frames:
        return count, pd.Series(dtype=float, index=pd.Index([], name="decision_id"))
    totals: pd.Series = pd.concat(frames).groupby("decision_id", sort=False)["value"].sum()
    return count, totals


def _estimate_piece(
    piece: Piece, integrity: IntegrityReport, rewards: tuple[int, pd.Series],
    settings: Settings, job: EstimateJob,
) -> tuple[int, PieceRecords]:  # fmt: skip
    """Replay a piece, keep the usable records of the stream and evaluate every policy on them.

    The selection follows the local engine's (``_estimate._load_records``): verified decisions
    of the stream with a decision function, a positive replayed propensity not estimated by
    Monte Carlo, and a reward (or ``missing_reward``).
    """
    import numpy as np

    from drawledger.replay import _estimate
    from drawledger.replay._enumerate import MONTE_CARLO
    from drawledger.replay._verify import verify_chunk

    rows, draws = read_piece(piece)
    ids = {r[0] for r in rows}
    flagged = frozenset(integrity.decision_ids & ids) if integrity.decision_ids else frozenset()
    checked = verify_chunk(rows, draws, flagged, settings)
    frame = pd.concat(checked.rows, ignore_index=True) if checked.rows else pd.DataFrame(
        columns=["decision_id", "stream", "verified", "reason", "propensity",
                 "propensity_method", "action"])  # fmt: skip
    frame = frame[frame["stream"] == job.stream]
    total = len(frame)
    excluded: Counter[str] = Counter()

    def drop(mask: Any, reason: str) -> None:
        nonlocal frame
        if mask.any():
            excluded[reason] += int(mask.sum())
            frame = frame[~mask]

    verified = frame["verified"].astype(bool).to_numpy()
    for reasons in frame.loc[~verified, "reason"].fillna("not verified"):
        excluded.update(str(reasons).split(";"))
    frame = frame[verified]
    texts: dict[str, tuple[Any, Any, Any]] = {}
    for r in rows:
        texts.setdefault(r[0], (r[4], r[6], r[7]))
    fns = [texts[d][0] for d in frame["decision_id"]]
    drop(np.array([f is None for f in fns], dtype=bool),
         "no decision function (bucket assignment)")  # fmt: skip
    drop((frame["propensity_method"] == MONTE_CARLO).to_numpy(),
         "logging propensity only estimated by Monte Carlo")  # fmt: skip
    drop(~(pd.to_numeric(frame["propensity"], errors="coerce").to_numpy(dtype=float) > 0.0),
         "no positive replayed propensity")  # fmt: skip
    outcome = rewards[1].reindex(frame["decision_id"]).to_numpy(dtype=float)
    if job.missing_reward is None:
        drop(np.isnan(outcome), f"no {job.reward} outcome")
        outcome = outcome[~np.isnan(outcome)]
    else:
        outcome = np.where(np.isnan(outcome), job.missing_reward, outcome)
    outside = 0
    if job.reward_range is not None:
        outside = int(((outcome < job.reward_range[0]) | (outcome > job.reward_range[1])).sum())
    if frame.empty or outside:
        return len(rows), PieceRecords(total, excluded, outside, None, [], [])
    chosen = [texts[d] for d in frame["decision_id"]]
    recs = _estimate._Records(
        rows=frame.reset_index(drop=True), fn=[c[0] for c in chosen],
        inputs=[c[1] for c in chosen], params=[c[2] for c in chosen],
        actions=frame["action"].astype(str).tolist(),
        mu=frame["propensity"].to_numpy(dtype=float), r=outcome, excluded=dict(excluded),
        total=total, stream=job.stream,
    )  # fmt: skip
    targets = [_estimate._Target(p, list(job.path), list(job.allow)) for p in job.policies]
    logging, results = _estimate._evaluate(recs, targets, path=list(job.path),
                                           allow=list(job.allow), seed=job.seed,
                                           progress=False)  # fmt: skip
    return len(rows), PieceRecords(total, excluded, 0, recs, logging, results)


def _partition_stream(partition: Partition) -> str:
    column = pq.read_table(partition.parts[0], columns=["stream"]).column(0)
    return str(column[0].as_py()) if len(column) else ""


def evaluate_on_dask(
    ledger: str | os.PathLike[str],
    *,
    policies: Sequence[Any],
    reward: str,
    stream: str | None,
    path: Sequence[str],
    allow: Sequence[str],
    format: str | None,
    seed: int,
    missing_reward: float | None,
    reward_range: tuple[float, float] | None,
    integrity_key: bytes | str | None,
    scheduler: str | None,
    chunk_size: int = 10_000,
    progress: bool = False,
) -> tuple[Any, list[dict[str, float] | None], list[Any]]:
    """The records an estimate uses and every policy's per-record results, from the cluster.

    Replaces the local engine's ``_prepare`` + ``_evaluate`` (the replay of every decision
    and its re-execution under each policy, the costly part) with one task per piece of the
    chosen stream's partitions; returns ``(records, logging distributions, results)`` in the
    local engine's order, so the estimator's own columns, reward model, intervals and
    diagnostics follow unchanged on the client.
    """
    import numpy as np

    from drawledger.replay import _estimate
    from drawledger.replay._enumerate import DEFAULT_BUDGET, DEFAULT_MC_SAMPLES
    from drawledger.replay._verify import Settings

    root = parquet_root(ledger, format, "estimate")
    listed = partitions(root)
    by_stream: dict[str, list[Partition]] = {}
    for partition in listed:
        by_stream.setdefault(_partition_stream(partition), []).append(partition)
    streams = sorted(by_stream)
    if not streams:
        raise ReplayError(f"ledger {os.fspath(ledger)!r} has no decisions")
    if stream is not None:
        if stream not in by_stream:
            raise ReplayError(f"no decisions of stream {stream!r}; streams in the ledger: "
                              f"{', '.join(streams)}")  # fmt: skip
    elif len(streams) > 1:
        raise ReplayError(f"the ledger has several decision streams ({', '.join(streams)}); "
                          "choose one with --stream")  # fmt: skip
    else:
        stream = streams[0]
    plan = pieces(by_stream[stream], chunk_size)
    paths = tuple(os.path.abspath(os.path.expanduser(p)) for p in path)
    settings = Settings(path=paths, allow=tuple(allow), budget=DEFAULT_BUDGET,
                        mc_samples=DEFAULT_MC_SAMPLES, keep_rows=True)  # fmt: skip
    job = EstimateJob(tuple(policies), reward, stream, paths, tuple(allow), seed,
                      missing_reward, reward_range)  # fmt: skip
    outcome_parts = [os.fspath(p.path) for p in _parquet.parts(root, "outcomes")]
    advance, bar = _progress(progress, sum(p.rows for p in plan), "replaying and evaluating")
    try:
        with cluster(scheduler) as client:
            checking = _Integrity(client, root, integrity_key)
            totals = [_submit_one(client, _reward_totals, p, reward) for p in outcome_parts]
            rewards = _submit_one(client, _combine_rewards, *totals)
            if _one_result(client.submit(_count, rewards), "estimate", "reading outcomes") == 0:
                raise ReplayError(f"no outcome named {reward!r} in the ledger")
            integrity = client.scatter(checking.report("estimate"), broadcast=True)
            found = list(run_pieces(client, _estimate_piece, plan, integrity, rewards, settings,
                                    job, command="estimate", advance=advance))  # fmt: skip
    finally:
        if bar is not None:
            bar.stop()
    outside = sum(p.outside for p in found)
    if outside and reward_range is not None:
        raise ReplayError(f"{outside} {reward!r} rewards lie outside reward_range "
                          f"{tuple(reward_range)}")  # fmt: skip
    excluded: Counter[str] = Counter()
    for p in found:
        excluded.update(p.excluded)
    used = [p for p in found if p.records is not None]
    if not used:
        raise ReplayError(f"no verified decisions with a {reward!r} reward to estimate from"
                          + (f" (excluded: {dict(excluded)})" if excluded else ""))  # fmt: skip
    parts = [p.records for p in used]
    recs = _estimate._Records(
        rows=pd.concat([r.rows for r in parts], ignore_index=True),
        fn=[x for r in parts for x in r.fn], inputs=[x for r in parts for x in r.inputs],
        params=[x for r in parts for x in r.params],
        actions=[x for r in parts for x in r.actions],
        mu=np.concatenate([r.mu for r in parts]), r=np.concatenate([r.r for r in parts]),
        excluded=dict(excluded), total=sum(p.total for p in found), stream=stream,
    )  # fmt: skip
    logging = [d for p in used for d in p.logging]
    results = []
    for k in range(len(policies)):
        each = [p.results[k] for p in used]
        dists = None if any(e.dists is None for e in each) else \
            [d for e in each for d in e.dists]  # fmt: skip
        methods: Counter[str] = Counter()
        for e in each:
            methods.update(e.methods)
        results.append(_estimate._Evaluated(np.concatenate([e.p for e in each]),
                                            np.concatenate([e.deficit for e in each]), dists,
                                            methods))  # fmt: skip
    return recs, logging, results


def _count(rewards: tuple[int, pd.Series]) -> int:
    return rewards[0]
