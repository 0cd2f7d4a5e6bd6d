"""Many writers at once: processes into one SQLite file or PostgreSQL, threads into one ledger.

Pins: the exact count arrives, no duplicates, no gaps, every chain intact. The issue's full size
(4 processes x 20,000 decisions) runs behind ``-m slow``; the default run uses 4 x 1,000.
"""

from __future__ import annotations

import sqlite3
import subprocess
import sys
import threading
from pathlib import Path

import pytest

import drawledger as dl
from drawledger.replay.integrity import check_integrity
from drawledger.replay.sources import read_tables

WORKER = """
import sys
import drawledger as dl

target, n, name = sys.argv[1], int(sys.argv[2]), sys.argv[3]
led = dl.Ledger(target, batch_size=2000)

@led.decision("reminder-delay")
def reminder_delay(nominal, draw, *, sigma=0.3):
    return nominal * draw.lognormal(0.0, sigma, name="multiplier")

for i in range(n):
    did = f"{name}-{i}"
    reminder_delay(30.0, unit=f"shopper-{i % 97}", decision_id=did)
    if i % 10 == 0:
        led.outcome(did, "checkout", 1.0)
led.close()
stats = led.stats()
assert stats["spilled"] == 0 and stats["dropped"] == 0, stats
"""

PROCESSES = 4


def _run_processes(target: str, n: int) -> None:
    procs = [
        subprocess.Popen(
            [sys.executable, "-c", WORKER, target, str(n), f"p{k}"],
            stderr=subprocess.PIPE,
            text=True,
        )
        for k in range(PROCESSES)
    ]
    errors = [p.communicate(timeout=600)[1] for p in procs]
    assert [0] * PROCESSES == [p.returncode for p in procs], errors


def _check(target: str, n: int) -> None:
    report = check_integrity(target)
    assert report.ok, report.render()
    expected_outcomes = PROCESSES * len(range(0, n, 10))
    assert (PROCESSES * n, expected_outcomes, PROCESSES) == (
        report.decisions, report.outcomes, report.writers)  # fmt: skip
    assert (0, 0) == (report.gaps, report.duplicates)
    ids = read_tables(target).decisions["decision_id"]
    assert PROCESSES * n == ids.nunique()


def _sqlite(tmp_path: Path, n: int) -> None:
    target = tmp_path / "shared.db"
    _run_processes(str(target), n)
    with sqlite3.connect(target) as conn:
        assert [("ok",)] == conn.execute("PRAGMA integrity_check").fetchall()
    _check(str(target), n)


def test_four_processes_share_one_sqlite_file(tmp_path: Path) -> None:
    _sqlite(tmp_path, 1_000)


def test_four_processes_share_one_postgresql_schema(postgres_url: str) -> None:
    _run_processes(postgres_url, 1_000)
    _check(postgres_url, 1_000)


@pytest.mark.slow
def test_four_processes_full_size_sqlite(tmp_path: Path) -> None:
    _sqlite(tmp_path, 20_000)


@pytest.mark.slow
def test_four_processes_full_size_postgresql(postgres_url: str) -> None:
    _run_processes(postgres_url, 20_000)
    _check(postgres_url, 20_000)


def test_threads_of_one_process_keep_one_gapless_chain(tmp_path: Path) -> None:
    target = tmp_path / "threads.db"
    led = dl.Ledger(target, batch_size=100)

    def record(k: int) -> None:
        for i in range(400):
            led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, i % 2 == 0, 0.5,
                            decision_id=f"t{k}-{i}")  # fmt: skip
            led.outcome(f"t{k}-{i}", "checkout", 0.0)

    threads = [threading.Thread(target=record, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    led.close()
    report = check_integrity(target)
    assert (True, 1600, 1600, 1) == (report.ok, report.decisions, report.outcomes, report.writers)


def test_forked_child_gets_a_chain_of_its_own(tmp_path: Path) -> None:
    """After os.fork the child records under a new writer id, seq again from 0."""
    import os

    target = tmp_path / "fork.db"
    led = dl.Ledger(target)
    led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, decision_id="parent-0")
    led.flush()
    pid = os.fork()
    if pid == 0:  # the child
        code = 0
        try:
            led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5,
                            decision_id="child-0")  # fmt: skip
            led.close()
        except BaseException:
            code = 1
        os._exit(code)
    _, status = os.waitpid(pid, 0)
    led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, False, 0.5, decision_id="parent-1")
    led.close()
    assert 0 == os.waitstatus_to_exitcode(status)
    report = check_integrity(target)
    assert (True, 3, 2) == (report.ok, report.decisions, report.writers)


# -- fork while the writer works --------------------------------------------------------------
def _fork_children_while_busy(target: str, children: int, per_child: int) -> None:
    """Fork while a thread of the parent keeps the writer busy; every child must finish."""
    import os
    import signal
    import time

    led = dl.Ledger(target, batch_size=50)
    stop = threading.Event()

    def keep_recording() -> None:
        i = 0
        while not stop.is_set():
            led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5,
                            decision_id=f"parent-{i}")  # fmt: skip
            i += 1
            if i % 100 == 0:
                time.sleep(0.001)

    thread = threading.Thread(target=keep_recording)
    thread.start()
    time.sleep(0.1)
    pids = []
    try:
        for k in range(children):
            pid = os.fork()
            if pid == 0:  # the child: record, close, leave without interpreter exit
                code = 0
                try:
                    for i in range(per_child):
                        led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, False, 0.5,
                                        decision_id=f"child{k}-{i}")  # fmt: skip
                    led.close()
                except BaseException:
                    code = 1
                os._exit(code)
            pids.append(pid)
            time.sleep(0.005)
    finally:
        stop.set()
        thread.join()
    led.close()
    codes: dict[int, int] = {}
    deadline = time.monotonic() + 60  # a guard against a hung child, not a timing check
    while len(codes) < len(pids) and time.monotonic() < deadline:
        for pid in pids:
            if pid not in codes:
                done, status = os.waitpid(pid, os.WNOHANG)
                if done:
                    codes[pid] = os.waitstatus_to_exitcode(status)
        time.sleep(0.02)
    hung = [pid for pid in pids if pid not in codes]
    for pid in hung:
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)
    assert ([], [0] * children) == (hung, [codes.get(pid) for pid in pids])
    report = check_integrity(target)
    assert (True, children + 1) == (report.ok, report.writers)
    ids = set(read_tables(target).decisions["decision_id"])
    assert children * per_child == sum(1 for d in ids if d.startswith("child"))


def test_children_forked_while_the_writer_is_busy_finish_and_keep_their_records(
    tmp_path: Path,
) -> None:
    _fork_children_while_busy(str(tmp_path / "fork.db"), children=12, per_child=50)


def test_children_forked_while_the_writer_is_busy_postgresql(postgres_url: str) -> None:
    _fork_children_while_busy(postgres_url, children=4, per_child=30)


@pytest.mark.slow
def test_many_children_forked_while_the_writer_is_busy(tmp_path: Path) -> None:
    _fork_children_while_busy(str(tmp_path / "fork.db"), children=60, per_child=200)


def test_child_forked_during_a_write_that_outlasts_the_wait_is_refused_clearly(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A write still going on after the fork's wait: the child's first record is refused."""
    import os

    from drawledger import _writer

    monkeypatch.setattr(_writer, "FORK_WAIT", 0.05)
    led = dl.Ledger(tmp_path / "x.db")
    led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, decision_id="parent-0")
    led.flush()
    led._writer.io_lock.acquire()  # the writer is inside a long write
    try:
        pid = os.fork()
        if pid == 0:
            code = 3
            try:
                led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5)
            except dl.LedgerError as exc:
                code = 0 if "forked while the parent's writer was in a write" in str(exc) else 2
            except BaseException:
                code = 1
            os._exit(code)
    finally:
        led._writer.io_lock.release()
    _, status = os.waitpid(pid, 0)
    led.close()
    assert 0 == os.waitstatus_to_exitcode(status)


# -- children that end without close() ------------------------------------------------------------
CHILDREN = """
import multiprocessing as mp
import os
import sys

import drawledger as dl

target, method = sys.argv[1], sys.argv[2]
led = dl.Ledger(target)


def record(k):
    for i in range(100):
        led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5,
                        decision_id=f"w{os.getpid()}-{k}-{i}")
    return k


def run(k):
    for i in range(300):
        led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5,
                        decision_id=f"p{k}-{i}")


if __name__ == "__main__":
    if method == "fork":  # children end with os._exit, after multiprocessing's finalizers
        ctx = mp.get_context("fork")
        procs = [ctx.Process(target=run, args=(k,)) for k in range(5)]
        for p in procs:
            p.start()
        for p in procs:
            p.join()
        assert [0] * 5 == [p.exitcode for p in procs]
    else:  # leaving the block terminates the workers with SIGTERM
        with mp.get_context(method.removesuffix("-pool")).Pool(2) as pool:
            assert list(range(6)) == pool.map(record, range(6))
    led.close()
"""


@pytest.mark.parametrize(
    ("method", "expected"), [("fork", 1_500), ("spawn-pool", 600), ("fork-pool", 600)]
)
def test_multiprocessing_children_keep_their_records_without_close(
    tmp_path: Path, method: str, expected: int
) -> None:
    """A fork-started Process, and spawn and fork Pools ended by their with-block, lose none."""
    script = tmp_path / "children.py"
    script.write_text(CHILDREN)
    target = tmp_path / "children.db"
    done = subprocess.run([sys.executable, str(script), str(target), method],
                          capture_output=True, text=True, timeout=300)  # fmt: skip
    assert 0 == done.returncode, done.stderr
    report = check_integrity(target)
    assert (True, expected) == (report.ok, report.decisions)


def test_plain_fork_child_is_warned_once_that_os_exit_skips_close(tmp_path: Path) -> None:
    import logging
    import os

    led = dl.Ledger(tmp_path / "x.db")
    led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5)
    pid = os.fork()
    if pid == 0:
        warnings = []
        handler = logging.Handler()
        handler.emit = warnings.append  # type: ignore[method-assign]
        logging.getLogger("drawledger").addHandler(handler)
        try:
            for _ in range(3):
                led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5)
            led.close()
            code = 10 + sum("os._exit()" in r.getMessage() for r in warnings)
        except BaseException:
            code = 1
        os._exit(code)
    _, status = os.waitpid(pid, 0)
    led.close()
    assert 11 == os.waitstatus_to_exitcode(status)
