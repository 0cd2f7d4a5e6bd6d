"""Crash safety: a writer process killed with SIGKILL loses nothing that ``flush()`` acknowledged.

Each trial starts a process that records decisions and outcomes and prints how many decisions
``flush()`` acknowledged; the test kills it with SIGKILL at a random moment, then checks that the
ledger opens, that every acknowledged decision is present, and that the chain verifies.
"""

from __future__ import annotations

import random
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from drawledger.replay.integrity import check_integrity
from drawledger.replay.sources import read_tables

WORKER = """
import random, sys
import drawledger as dl

target, fmt = sys.argv[1], sys.argv[2] or None
led = dl.Ledger(target, format=fmt, batch_size=500)

@led.decision("recipe-card")
def feature_card(scores, draw, *, temperature=0.7):
    return draw.softmax(["shakshuka", "ramen", "tacos", "dal"], scores, temperature=temperature)

n = 0
rng = random.Random(int(sys.argv[3]))
while True:
    for _ in range(rng.randint(1, 400)):
        feature_card([rng.random() for _ in range(4)], decision_id=f"req-{n}")
        if n % 3 == 0:
            led.outcome(f"req-{n}", "checkout", 1.0)
        n += 1
    led.flush()
    print(n, flush=True)
"""


def _trial(tmp_path: Path, trial: int, fmt: str) -> None:
    target = tmp_path / (f"ledger-{trial}" + (".db" if fmt == "" else ""))
    proc = subprocess.Popen([sys.executable, "-c", WORKER, str(target), fmt, str(trial)],
                            stdout=subprocess.PIPE, text=True)  # fmt: skip
    assert proc.stdout is not None
    acked = [0]
    first = threading.Event()

    def read() -> None:
        assert proc.stdout is not None
        for line in proc.stdout:
            acked[0] = int(line)
            first.set()

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    try:
        assert first.wait(60), "the writer process never acknowledged a flush"
        time.sleep(random.Random(trial).uniform(0.05, 0.8))
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
    finally:
        if proc.poll() is None:
            proc.kill()
    reader.join(10)
    acknowledged = acked[0]

    if fmt == "":
        with sqlite3.connect(target) as conn:  # SQLite's own check of the file
            assert [("ok",)] == conn.execute("PRAGMA integrity_check").fetchall()
    present = set(read_tables(target).decisions["decision_id"])
    missing = [f"req-{i}" for i in range(acknowledged) if f"req-{i}" not in present]
    assert [] == missing
    report = check_integrity(target)
    assert report.ok, report.render()
    assert report.decisions >= acknowledged


TORN = """
import os, signal, sys
import drawledger as dl

real_replace, armed = os.replace, [False]

def replace(src, dst):  # the last batch: killed right after its first decisions part
    real_replace(src, dst)
    if armed[0] and os.sep + "decisions" + os.sep in os.fspath(dst):
        os.kill(os.getpid(), signal.SIGKILL)

os.replace = replace
led = dl.Ledger(sys.argv[1], format="parquet", batch_size=1000)
for batch in range(2):
    armed[0] = batch == 1
    for i in range(10 * batch, 10 * batch + 10):
        led.record_draw(("slot-discount", "reminder-delay")[i % 2], "bernoulli", {"p": 0.5},
                        i % 2 == 0, 0.5, decision_id=f"req-{i}")
        led.outcome(f"req-{i}", "checkout", 1.0)
    led.flush()
"""


def test_writer_killed_between_the_renames_of_a_batch_leaves_a_ledger_that_verifies(
    tmp_path: Path,
) -> None:
    """Of the last batch (10 decisions of two streams, 10 outcomes) only the decisions part of
    one stream came into place: the other 15 records were never acknowledged, so the check
    reports them, and the other stream's draws part, and passes."""
    target = tmp_path / "ledger"
    done = subprocess.run([sys.executable, "-c", TORN, str(target)], check=False)
    assert -signal.SIGKILL == done.returncode
    report = check_integrity(target)
    assert report.ok, report.render()
    assert (15, 10, 0, 15, 1) == (report.decisions, report.outcomes, report.gaps,
                                  report.uncommitted_records, report.uncommitted_parts)  # fmt: skip


@pytest.mark.parametrize("trial", range(5))
def test_sigkill_loses_no_acknowledged_decision_sqlite(tmp_path: Path, trial: int) -> None:
    _trial(tmp_path, trial, "")


@pytest.mark.parametrize("trial", range(2))
def test_sigkill_loses_no_acknowledged_decision_parquet(tmp_path: Path, trial: int) -> None:
    _trial(tmp_path, trial, "parquet")


@pytest.mark.slow
@pytest.mark.parametrize("trial", range(100, 125))
def test_sigkill_many_trials_sqlite(tmp_path: Path, trial: int) -> None:
    _trial(tmp_path, trial, "")


@pytest.mark.slow
@pytest.mark.parametrize("trial", range(100, 120))
def test_sigkill_many_trials_parquet(tmp_path: Path, trial: int) -> None:
    _trial(tmp_path, trial, "parquet")
