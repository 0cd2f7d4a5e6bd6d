"""Sustained SQLite throughput through the SDK against raw ``sqlite3.executemany``.

Run: python -m pytest tests/benchmarks/test_bench_sqlite_sink.py -m benchmark -s
Results: docs/performance.md, "## Serving cost and SQLite sink".

100,000 decisions of the quickstart (a softmax over six recipe cards, one draw each) are made
once through a real decision and held in memory, as the serving thread queues them (without
seq, prev_hash and hash). Then, in the same process:

- raw: ``sqlite3.executemany`` of exactly those decision and draw rows, completed with their
  hash chain, into a fresh file with the ledger's schema (same indexes, WAL, synchronous
  NORMAL), one transaction per 10,000 decisions (the writer's default batch);
- SDK writer: the records as queued handed to a fresh ``dl.Ledger``'s background writer, timed
  until ``flush()`` returns (queue, batching, hash chain, SQLAlchemy, commit);
- end to end: 100,000 decision calls on a fresh ledger and ``flush()``: serving work and
  writing together, in one process.
"""

from __future__ import annotations

import sqlite3
import tempfile
import time
from pathlib import Path
from typing import Any

import pytest
from recipe_card import CARDS, SCORES, make_decision

import drawledger as dl
from drawledger import _schema, _sinks
from drawledger._chain import Chain
from drawledger._records import DECISION_COLUMNS, DRAW_COLUMNS

pytestmark = pytest.mark.benchmark

N = 100_000
BATCH = 10_000


def recorded_items(tmp: Path) -> list[Any]:
    """N queue items exactly as the serving thread produces them (not yet in the chain)."""
    ledger = dl.Ledger(tmp / "source.db")
    items: list[Any] = []
    ledger._writer.put = items.append  # type: ignore[method-assign]
    feature_card = make_decision(ledger)
    for i in range(N):
        feature_card(CARDS, SCORES, unit=f"shopper-{i % 5000:06d}")
    ledger.close()
    return items


def sealed(items: list[Any]) -> list[Any]:
    """The items with complete rows: seq, prev_hash and hash, as the writer gives them."""
    chain = Chain(b"")
    return [chain.seal(item) for item in items]


def raw_executemany(path: Path, items: list[Any]) -> float:
    engine = _sinks.create_engine(_sinks.sqlalchemy_url(path))
    _schema.metadata.create_all(engine)  # the ledger's tables and indexes
    engine.dispose()
    con = sqlite3.connect(path, isolation_level=None)
    con.execute("PRAGMA journal_mode=WAL")
    con.execute("PRAGMA synchronous=NORMAL")
    insert_d = f"INSERT INTO decisions ({', '.join(DECISION_COLUMNS)}) VALUES " \
               f"({', '.join('?' * len(DECISION_COLUMNS))})"  # fmt: skip
    insert_r = f"INSERT INTO draws ({', '.join(DRAW_COLUMNS)}) VALUES " \
               f"({', '.join('?' * len(DRAW_COLUMNS))})"  # fmt: skip
    start = time.perf_counter()
    for k in range(0, N, BATCH):
        batch = items[k : k + BATCH]
        con.execute("BEGIN")
        con.executemany(insert_d, [item[1] for item in batch])
        con.executemany(insert_r, [row for item in batch for row in item[2]])
        con.execute("COMMIT")
    elapsed = time.perf_counter() - start
    con.close()
    return elapsed


def sdk_writer(path: Path, items: list[Any]) -> float:
    ledger = dl.Ledger(path, queue_size=2 * N)
    ledger._writer.start()
    ledger.flush()  # the file and its tables exist before the clock starts, as for raw
    time.sleep(0.1)
    start = time.perf_counter()
    put = ledger._writer.put
    for item in items:
        put(item)
    ledger.flush()
    elapsed = time.perf_counter() - start
    stats = ledger.stats()
    ledger.close()
    assert N == stats["written"] and 0 == stats["spilled"]
    return elapsed


def end_to_end(path: Path) -> float:
    ledger = dl.Ledger(path, queue_size=2 * N)
    feature_card = make_decision(ledger)
    start = time.perf_counter()
    for i in range(N):
        feature_card(CARDS, SCORES, unit=f"shopper-{i % 5000:06d}")
    ledger.flush()
    elapsed = time.perf_counter() - start
    ledger.close()
    return elapsed


def test_sqlite_throughput_against_raw_executemany() -> None:
    with tempfile.TemporaryDirectory() as name:
        tmp = Path(name)
        items = recorded_items(tmp)
        t_raw = raw_executemany(tmp / "raw.db", sealed(items))
        t_sdk = sdk_writer(tmp / "sdk.db", items)
        t_e2e = end_to_end(tmp / "e2e.db")
        rows = {p: sqlite3.connect(tmp / p).execute("SELECT COUNT(*) FROM decisions").fetchone()
                for p in ("raw.db", "sdk.db", "e2e.db")}  # fmt: skip
    assert {(N,)} == set(rows.values())
    print(f"\n[sqlite] {N:,} decisions with one draw each, batches of {BATCH:,}")
    print(f"  raw sqlite3.executemany  {N / t_raw:9,.0f} decisions/s")
    print(f"  SDK writer               {N / t_sdk:9,.0f} decisions/s  {t_raw / t_sdk:.2f}x raw")
    print(f"  end to end (calls+flush) {N / t_e2e:9,.0f} decisions/s  {t_raw / t_e2e:.2f}x raw")
