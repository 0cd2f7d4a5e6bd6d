"""The estimate's stages on the local engine: in this process or in worker processes."""

from __future__ import annotations

import contextlib
import os
import pickle
import tempfile
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from typing import Any, TypeVar

from drawledger.replay.engines import fork_context, pool_result, progress_bar
from drawledger.replay.estimate._piece import Facts, Job, PieceData, evaluate_piece
from drawledger.replay.estimate._rewards import Rewards
from drawledger.replay.sources import Task

T = TypeVar("T")

_SHARED: dict[str, Any] = {}  # what every stage-1 task of a process pool shares


def _share(flagged: frozenset[str], rewards: Rewards) -> None:
    _SHARED.update(flagged=flagged, rewards=rewards)


def save(data: PieceData, where: str) -> None:
    with open(where, "wb") as f:
        pickle.dump(data, f, protocol=pickle.HIGHEST_PROTOCOL)


def load(where: str) -> PieceData:
    with open(where, "rb") as f:
        data: PieceData = pickle.load(f)  # a file this run wrote (``save``)
        return data


def _first(task: Task, job: Job, where: str) -> Facts:
    """Stage 1 of one local chunk; its data goes to the file ``where``, its facts back."""
    rows, draws = task.read()
    data = evaluate_piece(rows, draws, _SHARED["flagged"], job, _SHARED["rewards"])
    save(data, where)
    return data.facts


class LocalRunner:
    """The stages in this process (or stage 1 in ``jobs`` processes); each piece's data is kept
    in a temporary file between the stages, so memory stays bounded by a piece."""

    def __init__(self, tasks: Sequence[Task], flagged: frozenset[str], rewards: Rewards,
                 jobs: int, progress: bool, directory: str) -> None:  # fmt: skip
        self.tasks = tasks
        self.flagged = flagged
        self.rewards = rewards
        self.jobs = jobs
        self.progress = progress
        self.files = [os.path.join(directory, f"piece-{i}.pickle") for i in range(len(tasks))]

    def first(self, job: Job) -> list[Facts]:

        bar = progress_bar(self.progress, sum(t.rows for t in self.tasks))
        facts: list[Facts] = []
        try:
            if self.jobs == 1:
                _share(self.flagged, self.rewards)
                results: Iterator[Facts] = (_first(t, job, f) for t, f in
                                            zip(self.tasks, self.files, strict=True))  # fmt: skip
                for found in results:
                    facts.append(found)
                    if bar is not None:
                        bar[0].advance(bar[1], found.rows)
            else:
                with ProcessPoolExecutor(
                    self.jobs, mp_context=fork_context(), initializer=_share,
                    initargs=(self.flagged, self.rewards),
                ) as pool:  # fmt: skip
                    futures = [pool.submit(_first, t, job, f)
                               for t, f in zip(self.tasks, self.files, strict=True)]  # fmt: skip
                    for fut in futures:
                        facts.append(pool_result(fut))
                        if bar is not None:
                            bar[0].advance(bar[1], facts[-1].rows)
        finally:
            _SHARED.clear()
            if bar is not None:
                bar[0].stop()
        return facts

    def map(self, fn: Callable[[PieceData, Any], T], arg: Any) -> list[T]:
        return [fn(load(where), arg) for where in self.files]


@contextlib.contextmanager
def local_runner(tasks: Sequence[Task], flagged: frozenset[str], rewards: Rewards, jobs: int,
                 progress: bool) -> Iterator[LocalRunner]:  # fmt: skip
    with tempfile.TemporaryDirectory(prefix="drawledger-estimate-") as directory:
        yield LocalRunner(tasks, flagged, rewards, jobs, progress, directory)
