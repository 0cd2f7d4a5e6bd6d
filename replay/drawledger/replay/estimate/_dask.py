"""The estimate's stages as Dask tasks."""

from __future__ import annotations

import contextlib
import os
import shutil
import uuid
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

from drawledger.exceptions import ReplayError
from drawledger.replay.engines import (
    advance_bar,
    cluster,
    gather_pieces,
    one_result,
    run_pieces,
    submit_first,
)
from drawledger.replay.estimate._local import load, save
from drawledger.replay.estimate._piece import Facts, Job, PieceData, evaluate_piece
from drawledger.replay.estimate._rewards import Rewards, read_rewards
from drawledger.replay.estimate._stages import Pass, run_pass
from drawledger.replay.integrity import IntegrityTasks
from drawledger.replay.sources import Piece, read_piece
from drawledger.replay.verify import absolute_paths

if TYPE_CHECKING:
    from distributed import Client, Future


T = TypeVar("T")


@dataclass(frozen=True)
class _Held:
    """Where a piece's first-stage data waits between the stages: a file of one worker."""

    address: str
    path: str


def _evaluate(piece: Piece, flagged: frozenset[str], job: Job, rewards: Rewards) -> PieceData:

    rows, draws = read_piece(piece)
    return evaluate_piece(rows, draws, flagged, job, rewards)


def _first_piece(piece: Piece, flagged: frozenset[str], job: Job, rewards: Rewards,
                 run: str) -> tuple[int, tuple[_Held, Facts]]:  # fmt: skip
    """Stage 1 of a piece; its data goes to a file in the worker's local directory."""
    from distributed import get_worker

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
        advance, bar = advance_bar(self.progress, sum(p.rows for p in self.plan),
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

    job = replace(job, settings=absolute_paths(job.settings))
    with cluster(scheduler) as client:
        checking = IntegrityTasks(client, root, integrity_key)
        rewards = submit_first(client, read_rewards, os.fspath(root), "parquet", job.reward)
        if not one_result(client.submit(_count, rewards), "estimate", "reading outcomes"):
            raise ReplayError(f"no outcome named {job.reward!r} in the ledger")
        flagged = frozenset(checking.report("estimate").decision_ids)
        shared = client.scatter([flagged], broadcast=True)[0]  # one object, not its items
        runner = _DaskRunner(client, plan, shared, rewards, progress)
        try:
            return run_pass(runner, job, cap=cap, bootstrap=bootstrap, weights=weights)
        finally:
            runner.close()
