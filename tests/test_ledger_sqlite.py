"""The SQLite ledger, the embedded default: tables, commits, flush, close, fork, full queue."""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
import textwrap
import threading
from pathlib import Path
from typing import Any

import pytest
from recipe_card import CARDS, SCORES, make_decision

import drawledger as dl
from drawledger.exceptions import LedgerError


def query(path: Path, sql: str) -> list[tuple]:
    """Read through a separate connection, as another process would."""
    con = sqlite3.connect(path)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def count(path: Path, table: str) -> int:
    return int(query(path, f"SELECT COUNT(*) FROM {table}")[0][0])


def test_tables_columns_and_wal(ledger: dl.Ledger, ledger_path: Path) -> None:
    """decisions, draws and outcomes have the design's columns; the file is in WAL mode."""
    make_decision(ledger)(CARDS, SCORES)
    ledger.flush()
    columns = {
        table: [r[1] for r in query(ledger_path, f"PRAGMA table_info({table})")]
        for table in ("decisions", "draws", "outcomes")
    }
    assert ["decision_id", "stream", "unit", "ts", "fn", "code_hash", "inputs", "params",
            "action", "propensity", "propensity_kind", "seed", "writer", "seq", "prev_hash",
            "hash"] == columns["decisions"]  # fmt: skip
    assert ["decision_id", "idx", "name", "kind", "args", "u", "value", "prob",
            "is_density"] == columns["draws"]  # fmt: skip
    assert ["decision_id", "name", "value", "ts", "writer", "seq", "prev_hash",
            "hash"] == columns["outcomes"]  # fmt: skip
    assert [("wal",)] == query(ledger_path, "PRAGMA journal_mode")


def test_a_decision_lands_with_its_draws_and_outcome(ledger: dl.Ledger, ledger_path: Path) -> None:
    """After flush() the decision row, its draw row and the outcome are in the file."""
    card = make_decision(ledger)(CARDS, SCORES, unit="shopper-000017", decision_id="req-8c1")
    ledger.outcome("req-8c1", "checkout", 1.0)
    ledger.flush()
    ((stream, unit, action, prop, kind),) = query(
        ledger_path,
        "SELECT stream, unit, action, propensity, propensity_kind FROM decisions",
    )
    assert ("recipe-card", "shopper-000017", card, "exact") == (
        stream, unit, json.loads(action), kind)  # fmt: skip
    ((name, draw_kind, value, prob, is_density),) = query(
        ledger_path, "SELECT name, kind, value, prob, is_density FROM draws"
    )
    assert ("card", "softmax", card, prop, 0) == (
        name, draw_kind, json.loads(value), prob, is_density)  # fmt: skip
    assert [("req-8c1", "checkout", 1.0)] == query(
        ledger_path, "SELECT decision_id, name, value FROM outcomes"
    )


def test_values_rederive_from_the_recorded_seed(ledger: dl.Ledger, ledger_path: Path) -> None:
    """Re-running every stored draw from the stored seed and arguments gives the stored
    uniforms, values and probabilities, bit for bit, after the round trip through SQLite."""

    @ledger.decision("everything")
    def everything(draw: dl.Draw) -> list[Any]:
        return [
            draw.categorical(["a", "b", "c"], [0.2, 0.5, 0.3]),
            draw.bernoulli(0.3),
            draw.uniform(15.0, 45.0),
            draw.integers(-3, 4),
            draw.normal(30.0, 5.0),
            draw.lognormal(3.4, 0.35365),
            draw.softmax(CARDS, SCORES, 0.7),
            draw.epsilon_greedy(CARDS, SCORES, 0.1),
            draw.slate(CARDS, [3.0, 1.0, 2.0, 0.5, 1.5, 2.0], 3),
        ]

    for _ in range(20):
        everything()
    ledger.flush()
    decisions = query(ledger_path, "SELECT decision_id, seed, action FROM decisions")
    assert 20 == len(decisions)
    for did, seed, action in decisions:
        stored = query(
            ledger_path,
            f"SELECT kind, args, u, value, prob FROM draws WHERE decision_id = '{did}' "
            "ORDER BY idx",
        )
        draw = dl.Draw(bytes.fromhex(seed))
        values = [getattr(draw, kind)(**json.loads(args)) for kind, args, _, _, _ in stored]
        assert json.loads(action) == values
        for rec, (_, _, u, value, prob) in zip(draw.records, stored, strict=True):
            assert [x.hex() for x in json.loads(u)] == [x.hex() for x in rec.u]
            assert json.loads(value) == rec.value
            assert prob.hex() == rec.prob.hex()


def test_decision_and_draws_commit_together(ledger_path: Path) -> None:
    """A batch whose draw insert fails leaves neither its decisions nor its draws behind."""
    ledger = dl.Ledger(ledger_path, spill_dir=ledger_path.parent / "spill")
    feature_card = make_decision(ledger)
    feature_card(CARDS, SCORES, decision_id="before")
    ledger.flush()
    con = sqlite3.connect(ledger_path)
    con.execute(
        "CREATE TRIGGER refuse BEFORE INSERT ON draws WHEN NEW.decision_id = 'doomed' "
        "BEGIN SELECT RAISE(ABORT, 'refused by test'); END"
    )
    con.commit()
    con.close()
    feature_card(CARDS, SCORES, decision_id="doomed")
    ledger.flush()
    ledger.close()
    assert ["before"] == [r[0] for r in query(ledger_path, "SELECT decision_id FROM decisions")]
    assert ["before"] == [r[0] for r in query(ledger_path, "SELECT decision_id FROM draws")]
    assert 1 == ledger.stats()["spilled"]  # not lost: in the spill file
    assert "doomed" in ledger.spill_path.read_text(encoding="utf-8")


def test_flush_waits_for_everything_recorded_before_it(
    ledger: dl.Ledger, ledger_path: Path
) -> None:
    """flush() returns only when every earlier record is committed, from any thread."""
    feature_card = make_decision(ledger)
    for _ in range(500):
        feature_card(CARDS, SCORES)
    ledger.flush()
    assert 500 == count(ledger_path, "decisions") == count(ledger_path, "draws")
    seen: list[int] = []

    def worker() -> None:
        for _ in range(200):
            feature_card(CARDS, SCORES)
        ledger.flush()
        seen.append(count(ledger_path, "decisions"))

    threads = [threading.Thread(target=worker) for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert all(n >= 700 for n in seen)
    assert 1100 == count(ledger_path, "decisions")


def test_flush_with_nothing_recorded_returns_at_once(ledger_path: Path) -> None:
    """A ledger that recorded nothing flushes and closes without creating its file."""
    ledger = dl.Ledger(ledger_path)
    ledger.flush()
    ledger.close()
    assert not ledger_path.exists()


def test_flush_timeout_raises_while_the_file_is_locked(
    ledger: dl.Ledger, ledger_path: Path
) -> None:
    """flush(timeout) raises LedgerError when the commit cannot finish in time; the record
    is committed once the lock goes away."""
    feature_card = make_decision(ledger)
    feature_card(CARDS, SCORES)
    ledger.flush()
    con = sqlite3.connect(ledger_path, isolation_level=None)
    con.execute("BEGIN EXCLUSIVE")
    try:
        feature_card(CARDS, SCORES)
        with pytest.raises(LedgerError, match="timed out"):
            ledger.flush(timeout=0.3)
    finally:
        con.execute("ROLLBACK")
        con.close()
    ledger.flush()
    assert 2 == count(ledger_path, "decisions")


def test_writes_through_a_sqlite_url(tmp_path: Path) -> None:
    """dl.Ledger("sqlite:///file") is the same ledger as the bare path."""
    path = tmp_path / "url.db"
    ledger = dl.Ledger(f"sqlite:///{path}")
    make_decision(ledger)(CARDS, SCORES)
    ledger.close()
    assert 1 == count(path, "decisions")


def test_threads_share_one_chain(ledger: dl.Ledger, ledger_path: Path) -> None:
    """Records from several threads form one contiguous sequence with linked hashes."""
    feature_card = make_decision(ledger)
    threads = [
        threading.Thread(target=lambda: [feature_card(CARDS, SCORES) for _ in range(250)])
        for _ in range(4)
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    ledger.flush()
    chain = query(ledger_path, "SELECT seq, prev_hash, hash FROM decisions ORDER BY seq")
    assert list(range(1000)) == [seq for seq, _, _ in chain]
    ((genesis,),) = query(ledger_path, "SELECT genesis FROM writers")
    assert [genesis] + [h for _, _, h in chain[:-1]] == [prev for _, prev, _ in chain]


RECORD_AND_EXIT = """
import sys
import drawledger as dl

ledger = dl.Ledger(sys.argv[1])


@ledger.decision("reminder-delay")
def reminder_delay(nominal: float, draw: dl.Draw) -> float:
    return nominal * draw.lognormal(0.0, 0.35365)


for _ in range(300):
    reminder_delay(30.0)
ledger.outcome("req-1", "checkout", 1.0)
# no flush, no close: interpreter exit must commit everything
"""


def test_interpreter_exit_closes_the_ledger(tmp_path: Path) -> None:
    """A script that records and exits without close() leaves every record in the file."""
    script = tmp_path / "record.py"
    script.write_text(textwrap.dedent(RECORD_AND_EXIT), encoding="utf-8")
    path = tmp_path / "exit.db"
    done = subprocess.run([sys.executable, str(script), str(path)], capture_output=True,
                          text=True, timeout=120)  # fmt: skip
    assert 0 == done.returncode, done.stderr
    assert 300 == count(path, "decisions") == count(path, "draws")
    assert 1 == count(path, "outcomes")


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs os.fork")
def test_forked_worker_gets_its_own_writer(ledger: dl.Ledger, ledger_path: Path) -> None:
    """After fork() the child records under its own writer id; parent and child both land."""
    feature_card = make_decision(ledger)
    for _ in range(10):
        feature_card(CARDS, SCORES)
    ledger.flush()
    parent_writer = ledger.writer
    pid = os.fork()
    if pid == 0:  # the child: record, flush, leave without running the parent's cleanup
        status = 1
        try:
            assert ledger.writer != parent_writer
            for _ in range(20):
                feature_card(CARDS, SCORES)
            ledger.flush()
            status = 0
        finally:
            os._exit(status)
    for _ in range(10):
        feature_card(CARDS, SCORES)
    ledger.flush()
    _, status = os.waitpid(pid, 0)
    assert 0 == os.waitstatus_to_exitcode(status)
    per_writer = dict(query(ledger_path, "SELECT writer, COUNT(*) FROM decisions GROUP BY writer"))
    assert 20 == per_writer.pop(parent_writer)
    ((child_writer, child_count),) = per_writer.items()
    assert f"-{pid}-" in child_writer
    assert 20 == child_count
    seqs = query(ledger_path, f"SELECT seq FROM decisions WHERE writer = '{child_writer}'")
    assert list(range(20)) == sorted(s for (s,) in seqs)


def test_full_queue_neither_blocks_nor_loses(tmp_path: Path) -> None:
    """With the sink stuck, the queue stays within queue_size, calls return, and every record
    ends up either committed or spilled."""
    path = tmp_path / "stuck.db"
    ledger = dl.Ledger(path, queue_size=20, block_timeout=0.05, spill_dir=tmp_path / "spill")
    feature_card = make_decision(ledger)
    feature_card(CARDS, SCORES)
    ledger.flush()
    con = sqlite3.connect(path, isolation_level=None)
    con.execute("BEGIN EXCLUSIVE")  # the writer now waits on the lock
    try:
        longest = 0
        for _ in range(200):
            feature_card(CARDS, SCORES)
            longest = max(longest, ledger.stats()["queued"])
        assert longest <= 20
        assert ledger.stats()["spilled"] > 0
    finally:
        con.execute("ROLLBACK")
        con.close()
    ledger.close()
    stats = ledger.stats()
    assert 201 == stats["recorded"] == count(path, "decisions") + stats["spilled"]
    assert 0 == stats["dropped"]


def test_a_queued_decision_is_flat_and_untracked_after_two_collections(
    ledger_path: Path,
) -> None:
    """A queued decision is one tuple of plain values and its draw rows (tuples of plain values):
    two looks of the garbage collector stop tracking it, so pending records do not pile up in
    the old generation, whose collections walk the whole heap."""
    import gc

    led = dl.Ledger(ledger_path)
    led._writer._live = True  # put() takes the thread for running: the record stays queued
    feature_card = make_decision(led)
    feature_card(CARDS, SCORES)
    item = led._writer.queue[0]
    led._writer._live = False
    nested = [x for x in item if isinstance(x, (list, tuple, dict, set))]
    assert [tuple] == [type(x) for x in nested]  # one draw: its row
    assert [] == [v for row in nested for v in row if isinstance(v, (list, tuple, dict, set))]
    gc.collect()
    gc.collect()
    assert False is gc.is_tracked(item)
    led.close()
