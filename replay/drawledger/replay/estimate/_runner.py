"""The estimate's stages on an engine: stage 1 kept where the engine keeps data, the later
stages sent to it."""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import Any, TypeVar

from drawledger.exceptions import ReplayError
from drawledger.replay.engines import Engine
from drawledger.replay.estimate._elsewhere import load_logged, logged_elsewhere
from drawledger.replay.estimate._piece import Facts, Job, PieceData, evaluate_piece
from drawledger.replay.estimate._refuse import Failures, check_stream, integrity_verdict
from drawledger.replay.estimate._rewards import Rewards, read_rewards
from drawledger.replay.estimate._stages import Pass, run_pass
from drawledger.replay.integrity import check_on
from drawledger.replay.sources import Task, stream_outcome_names
from drawledger.replay.verify import VersionPlan

T = TypeVar("T")


def _evaluate(item: tuple[Task, list[str]], flagged: frozenset[str], job: Job,
              rewards: Rewards) -> PieceData:  # fmt: skip
    """Stage 1 of one chunk: its records replayed and re-run under every policy (with its
    records of other code versions, replayed under their own in the files ``item`` names)."""
    task, logged = item
    rows, draws = task.read()
    return evaluate_piece(rows, draws, flagged, job, rewards, load_logged(logged))


def _facts(data: PieceData) -> Facts:
    return data.facts


def _count(rewards: Rewards) -> int:
    return rewards.count


class EngineRunner:
    """The stages over every chunk on ``engine``: each chunk's data stays where the engine
    keeps it between the stages (a file, a Dask worker), so this process holds a chunk's
    data at most, and the later stages of a chunk run where its data is."""

    def __init__(self, engine: Engine, tasks: Sequence[tuple[Task, list[str]]],
                 flagged: frozenset[str], rewards: Any) -> None:  # fmt: skip
        self.engine = engine
        self.tasks = tasks
        self.flagged = flagged
        self.rewards = rewards
        self.kept: Sequence[Any] = ()

    def first(self, job: Job) -> list[Facts]:
        self.kept, facts = self.engine.keep(
            _evaluate, self.tasks, self.flagged, job, self.rewards, summary=_facts,
            label="replaying and evaluating",
        )  # fmt: skip
        return facts

    def map(self, fn: Callable[[PieceData, Any], T], arg: Any) -> list[T]:
        return list(self.engine.map(fn, self.kept, arg))


def estimate_on(
    engine: Engine, ledger: str, format: str | None, tasks: Sequence[Task], job: Job, *,
    integrity_key: bytes | str | None, cap: float, bootstrap: int, weights: bool,
    accept_integrity: bool, versions: VersionPlan,
) -> Pass:  # fmt: skip
    """``run_pass`` on ``engine``: the rewards table read by one side task (kept on the engine)
    and the integrity check beside it; the flagged decisions reach every chunk. A failed
    integrity check refuses the estimate unless ``accept_integrity``. The records of the
    code versions found in the history (``versions``) are replayed under their own version
    first, in a process of each revision."""
    checking = check_on(engine, ledger, format=format, integrity_key=integrity_key)
    rewards = engine.submit(read_rewards, os.fspath(ledger), format, job.reward,
                            label="reading outcomes")  # fmt: skip
    if not engine.submit(_count, rewards, label="reading outcomes").result():
        raise ReplayError(f"no outcome named {job.reward!r} in the ledger")
    report = checking.result()
    integrity = integrity_verdict(report, accept_integrity)
    flagged = frozenset(report.decision_ids)

    def names() -> list[str]:
        return engine.submit(stream_outcome_names, ledger, format, job.stream,
                             label="reading outcome names").result()  # fmt: skip

    def check(facts: Sequence[Facts]) -> Failures:
        return check_stream(facts, job.reward, job.stream, names)

    with tempfile.TemporaryDirectory(prefix="drawledger-versions-") as folder:
        logged, leftover = logged_elsewhere(versions, tasks, job.stream, flagged, job.seed,
                                            folder)  # fmt: skip
        if leftover:
            here = replace(job.settings, elsewhere=job.settings.elsewhere - leftover)
            job = replace(job, settings=here)
        runner = EngineRunner(engine, list(zip(tasks, logged, strict=True)), flagged, rewards)
        return run_pass(runner, job, cap=cap, bootstrap=bootstrap, weights=weights,
                        check=check, integrity=integrity)  # fmt: skip
