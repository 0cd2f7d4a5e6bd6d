"""The engines: results in item order, a bounded window, errors translated, failures cancel
the rest, side tasks and kept data; the same contract for the local and the Dask engine."""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from drawledger.exceptions import LedgerError, ReplayError
from drawledger.replay.engines import DaskEngine, LocalEngine, open_engine
from drawledger.replay.sources import Task

CALLS: list[int] = []  # items started, in this process (the in-process Dask cluster too)
LOCK = threading.Lock()


def _slow_square(item: int, started: str) -> int:
    """Later items finish first; each start leaves a file in ``started``."""
    Path(started, str(item)).touch()
    time.sleep(0.02 * (5 - item % 5))
    return item * item


def _record(item: int) -> int:
    with LOCK:
        CALLS.append(item)
    time.sleep(0.01)
    return item


def _fail_at(item: int, bad: int, started: str) -> int:
    Path(started, str(item)).touch()
    if item == bad:
        raise ValueError(f"item {item} is bad")
    time.sleep(0.05)
    return item


def _ledger_error(item: int) -> int:
    raise LedgerError("the ledger is gone")


def _exit(item: int) -> int:
    os._exit(3)


def _numbers(item: int) -> list[int]:
    return list(range(item))


def _total(data: list[int], plus: int) -> int:
    return sum(data) + plus


def _add(a: int, b: int) -> int:
    return a + b


@pytest.mark.parametrize("jobs", [1, 2])
def test_local_map_gives_results_in_item_order(jobs: int, tmp_path: Path) -> None:
    with LocalEngine(jobs) as engine:
        found = list(engine.map(_slow_square, list(range(12)), str(tmp_path)))
    assert [i * i for i in range(12)] == found


def test_local_map_in_this_process_runs_each_item_when_its_result_is_asked_for() -> None:
    CALLS.clear()
    with LocalEngine(1) as engine:
        results = engine.map(_record, [0, 1, 2, 3])
        assert [] == CALLS
        assert 0 == next(results)
        assert [0] == CALLS


def test_local_pool_keeps_at_most_twice_jobs_items_in_flight(tmp_path: Path) -> None:
    with LocalEngine(2) as engine:
        results = engine.map(_slow_square, list(range(40)), str(tmp_path))
        assert 0 == next(results)
        time.sleep(0.5)
        started = len(list(tmp_path.iterdir()))
        results.close()
    assert started <= 4  # the window: 2 * jobs


@pytest.mark.parametrize("jobs", [1, 2])
def test_a_failing_item_raises_its_error_and_the_rest_are_cancelled(
    jobs: int, tmp_path: Path
) -> None:
    with LocalEngine(jobs) as engine, pytest.raises(ValueError, match="item 2 is bad"):
        list(engine.map(_fail_at, list(range(40)), 2, str(tmp_path)))
    time.sleep(0.3)
    assert len(list(tmp_path.iterdir())) < 10


def test_a_worker_process_that_dies_is_a_replay_error() -> None:
    with LocalEngine(2) as engine, pytest.raises(ReplayError, match="replay process died"):
        list(engine.map(_exit, [0, 1]))


def test_a_side_task_in_this_process_runs_once_when_asked_for() -> None:
    CALLS.clear()
    with LocalEngine(1) as engine:
        handle = engine.submit(_record, 7, label="a side task")
        assert [] == CALLS
        assert 7 == handle.result()
        assert 7 == handle.result()
    assert [7] == CALLS


@pytest.mark.parametrize("jobs", [1, 2])
def test_kept_data_is_mapped_over_and_deleted_on_exit(jobs: int) -> None:
    with LocalEngine(jobs) as engine:
        side = engine.submit(_add, 1, 2, label="a side task")
        kept, sizes = engine.keep(_numbers, [3, 5, 0], summary=len)
        assert [3, 5, 0] == sizes
        assert [3 + 3, 10 + 3, 0 + 3] == list(engine.map(_total, kept, side))
        directory = engine.directory
        assert directory is not None and os.path.isdir(directory)
    assert not os.path.exists(directory)


def test_jobs_must_be_a_positive_integer() -> None:
    with pytest.raises(ValueError, match="jobs must be a positive integer"):
        LocalEngine(0)


def test_an_unknown_engine_name_is_refused() -> None:
    with (
        pytest.raises(ValueError, match="engine must be one of local, dask"),
        open_engine("spark", command="verify"),
    ):
        pass


@pytest.fixture(scope="module")
def dask_engine() -> Iterator[DaskEngine]:
    """Two single-threaded workers in this process (tasks see ``CALLS``)."""
    from distributed import Client, LocalCluster

    with (
        LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                     dashboard_address=":0") as cluster,
        Client(cluster) as client,
    ):  # fmt: skip
        yield DaskEngine(client, command="verify")


def test_dask_map_gives_results_in_item_order(dask_engine: DaskEngine, tmp_path: Path) -> None:
    assert [i * i for i in range(12)] == list(
        dask_engine.map(_slow_square, list(range(12)), str(tmp_path))
    )


def test_dask_map_keeps_a_bounded_window_of_tasks(
    dask_engine: DaskEngine, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(dask_engine, "WINDOW", 1)  # one task per worker: two in flight
    CALLS.clear()
    results = dask_engine.map(_record, list(range(30)))
    assert 0 == next(results)
    time.sleep(0.5)
    started = len(CALLS)
    results.close()
    assert started <= 2  # nothing more is submitted until the next result is asked for


def test_dask_errors_name_the_item_and_cancel_the_rest(
    dask_engine: DaskEngine, tmp_path: Path
) -> None:
    with pytest.raises(
        ReplayError, match=r"^verify: task 2 failed on a Dask worker: ValueError: item 2 is bad$"
    ):
        list(dask_engine.map(_fail_at, list(range(40)), 2, str(tmp_path)))
    time.sleep(0.3)
    assert len(list(tmp_path.iterdir())) < 40


def test_dask_errors_name_a_chunk_and_let_library_errors_through(
    dask_engine: DaskEngine,
) -> None:
    with pytest.raises(ReplayError, match=r"chunk 0 \(5 decisions\) failed on a Dask worker"):
        list(dask_engine.map(_exit_free_failure, [Task("x.db", 5)]))
    with pytest.raises(LedgerError, match="the ledger is gone"):
        list(dask_engine.map(_ledger_error, [1]))


def _exit_free_failure(task: Task) -> int:
    raise KeyError(task.target)


def test_dask_keeps_data_on_the_workers_and_maps_over_it(dask_engine: DaskEngine) -> None:
    from distributed import Future

    side = dask_engine.submit(_add, 1, 2, label="a side task")
    kept, sizes = dask_engine.keep(_numbers, [3, 5, 0], summary=len)
    assert [3, 5, 0] == sizes
    assert all(isinstance(k, Future) for k in kept)
    assert [6, 13, 3] == list(dask_engine.map(_total, kept, side))
    assert 3 == side.result()
