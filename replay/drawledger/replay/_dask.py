"""The Dask engine: verify, audit and estimate a partitioned Parquet ledger on a cluster.

A Parquet ledger is partitioned by stream and date (``decisions/<stream>/<date>/*.parquet``,
docs/ledger.md). The client lists the part files of every partition, in path order, and cuts
them into *pieces* exactly as the local engine cuts a ledger into chunks: consecutive part
files until a piece holds at least ``chunk_size`` decisions. Each piece is one task on the
cluster running the same pure per-chunk function as the local engine (``verify_chunk``,
``chunk_state``, the stages of ``_pieces``); the client combines the results in piece order.
The local and the Dask engine therefore see the same chunks and give the same results
(estimates up to floating-point rounding of the combine step). An estimate's pieces keep their
first stage's data in a file of the worker that made it, in the worker's local directory, until
the last stage; the files are removed at the end of the run.

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
import shutil
import uuid
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import CancelledError
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

import pandas as pd
import pyarrow.parquet as pq

from drawledger import _parquet
from drawledger.exceptions import DrawledgerError, ReplayError
from drawledger.replay._io import is_parquet

if TYPE_CHECKING:
    from distributed import Client, Future

    from drawledger.replay._audit import AuditReport, AuditState
    from drawledger.replay._integrity import IntegrityReport
    from drawledger.replay._pieces import Facts, Job, Pass, PieceData, Rewards
    from drawledger.replay._verify import ChunkResult, Settings, VerifyReport

__all__ = [
    "Partition",
    "Piece",
    "audit_on_dask",
    "cluster",
    "estimate_pass",
    "gather_pieces",
    "partitions",
    "pieces",
    "run_pieces",
    "stream_partitions",
    "verify_on_dask",
]

Row = tuple[Any, ...]
T = TypeVar("T")
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
        client.cancel(list(futures))
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
def stream_partitions(root: str | os.PathLike[str]) -> dict[str, list[Partition]]:
    """The partitions of each decision stream (read from the first row of each partition)."""
    out: dict[str, list[Partition]] = {}
    for partition in partitions(root):
        column = pq.read_table(partition.parts[0], columns=["stream"]).column(0)
        stream = str(column[0].as_py()) if len(column) else ""
        out.setdefault(stream, []).append(partition)
    return out


@dataclass(frozen=True)
class _Held:
    """Where a piece's first-stage data waits between the stages: a file of one worker."""

    address: str
    path: str


def _evaluate(piece: Piece, flagged: frozenset[str], job: Job, rewards: Rewards) -> PieceData:
    from drawledger.replay._pieces import evaluate_piece

    rows, draws = read_piece(piece)
    return evaluate_piece(rows, draws, flagged, job, rewards)


def _first_piece(piece: Piece, flagged: frozenset[str], job: Job, rewards: Rewards,
                 run: str) -> tuple[int, tuple[_Held, Facts]]:  # fmt: skip
    """Stage 1 of a piece; its data goes to a file in the worker's local directory."""
    from distributed import get_worker

    from drawledger.replay._pieces import save

    data = _evaluate(piece, flagged, job, rewards)
    worker = get_worker()
    folder = Path(worker.local_directory) / run
    folder.mkdir(exist_ok=True)
    where = os.fspath(folder / f"piece-{piece.index}.pickle")
    save(data, where)
    return data.facts.rows, (_Held(worker.address, where), data.facts)


def _stage(fn: Callable[[PieceData, Any], Any], arg: Any, held: _Held, piece: Piece,
           flagged: frozenset[str], job: Job, rewards: Rewards) -> tuple[int, Any]:  # fmt: skip
    """A later stage of a piece, on the worker that holds its data; on another worker (the
    first one died or was busy) the first stage is run again, with the same result."""
    from drawledger.replay._pieces import load

    try:
        data = load(held.path)
    except FileNotFoundError:
        data = _evaluate(piece, flagged, job, rewards)
    return data.facts.rows, fn(data, arg)


def _remove(run: str, dask_worker: Any = None) -> None:
    shutil.rmtree(Path(dask_worker.local_directory) / run, ignore_errors=True)


class _DaskRunner:
    """The estimate's stages as tasks. Each piece's data waits in a file of the worker that
    made it, and the later stages of the piece are sent to that worker."""

    def __init__(self, client: Client, plan: Sequence[Piece], flagged: Future, rewards: Future,
                 progress: bool) -> None:  # fmt: skip
        self.client = client
        self.plan = plan
        self.flagged = flagged
        self.rewards = rewards
        self.progress = progress
        self.run = f"drawledger-estimate-{uuid.uuid4().hex}"
        self.held: list[_Held] = []
        self.job: Job | None = None

    def first(self, job: Job) -> list[Facts]:
        self.job = job
        advance, bar = _progress(self.progress, sum(p.rows for p in self.plan),
                                 "replaying and evaluating")  # fmt: skip
        try:
            found = list(run_pieces(self.client, _first_piece, self.plan, self.flagged, job,
                                    self.rewards, self.run, command="estimate",
                                    advance=advance))  # fmt: skip
        finally:
            if bar is not None:
                bar.stop()
        self.held = [h for h, _ in found]
        return [f for _, f in found]

    def map(self, fn: Callable[[PieceData, Any], T], arg: Any) -> list[T]:
        shared = self.client.scatter([arg], broadcast=True)[0]
        futures = [self.client.submit(_stage, fn, shared, held, piece, self.flagged, self.job,
                                      self.rewards, workers=[held.address],
                                      allow_other_workers=True, pure=False)
                   for held, piece in zip(self.held, self.plan, strict=True)]  # fmt: skip
        return list(gather_pieces(self.client, futures, self.plan, command="estimate"))

    def close(self) -> None:
        with contextlib.suppress(Exception):  # a worker that is gone took its files along
            self.client.run(_remove, self.run)


def _count(rewards: Rewards) -> int:
    return rewards.count


def estimate_pass(
    root: Path, plan: Sequence[Piece], job: Job, *, integrity_key: bytes | str | None,
    scheduler: str | None, progress: bool, cap: float, bootstrap: int, weights: bool,
) -> Pass:  # fmt: skip
    """``_pieces.run_pass`` with every stage of every piece a task on a Dask cluster.

    The rewards table is read by one task and the integrity check runs as tasks beside it; the
    flagged decisions reach the pieces, as in the local engine.
    """
    from drawledger.replay._pieces import read_rewards, run_pass

    job = replace(job, settings=_absolute(job.settings))
    with cluster(scheduler) as client:
        checking = _Integrity(client, root, integrity_key)
        rewards = _submit_one(client, read_rewards, os.fspath(root), "parquet", job.reward)
        if not _one_result(client.submit(_count, rewards), "estimate", "reading outcomes"):
            raise ReplayError(f"no outcome named {job.reward!r} in the ledger")
        flagged = frozenset(checking.report("estimate").decision_ids)
        shared = client.scatter([flagged], broadcast=True)[0]  # one object, not its items
        runner = _DaskRunner(client, plan, shared, rewards, progress)
        try:
            return run_pass(runner, job, cap=cap, bootstrap=bootstrap, weights=weights)
        finally:
            runner.close()
