"""A synthetic ledger of the grocery scenario for large benchmark runs (generated, never committed).

    python tests/benchmarks/synth.py OUT --decisions 10000000 [--format parquet|sqlite]
        [--days 10] [--writers 2] [--seed 1]

Rows are written straight into the ledger's layout (Parquet: ``decisions/<stream>/<date>/``
part files; SQLite: the three tables), without calling the decision functions, yet they replay
and verify: 80% are ``dask_shop:feature_card`` decisions (a softmax over six recipe cards) and 20%
``dask_shop:reminder_delay`` (a log-normal delay), each with a checkout outcome. Per decision:

- the seed is 16 bytes of a seeded numpy generator (reproducible runs; production seeds come
  from the operating system's CSPRNG);
- its one uniform is the first of the draw specification v1 stream of that seed, computed by
  drawledger's own ``_stream.block``; the card is the first j with u < c_j, c_j the running
  sum of drawledger's ``softmax_probs`` (numpy ``cumsum`` adds left to right, as the
  specification does); the delay is ``exp(mu + sigma * ppnd16(u))`` with drawledger's AS241;
- JSON fields are encoded as the SDK encodes them (the per-segment texts by ``to_json``) and
  every record carries its writer's ``seq``, ``prev_hash`` and integrity hash
  (``_records.decision_hash`` / ``outcome_hash``), so the integrity check passes.

Choices, rewards and timestamps are drawn with vectorized numpy; the per-record work left in
Python is the blake2b of the stream, the JSON of the uniform and the two hashes. Writers run in
parallel processes (one hash chain each).
"""

from __future__ import annotations

import argparse
import math
import multiprocessing
import os
import shutil
import sqlite3
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.parquet as pq

from drawledger import _parquet, _records, _schema, _sinks, _stream
from drawledger._normal import ppnd16
from drawledger.draw import BELOW_ONE, lognormal_pdf, softmax_probs

SUPPORT = Path(__file__).resolve().parent.parent / "support"
if str(SUPPORT) not in sys.path:
    sys.path.insert(0, str(SUPPORT))

import dask_shop as shop  # noqa: E402  (the decision code the rows name)

START = 1_767_225_600.0  # 2026-01-01 00:00 UTC
BLOCK = 50_000  # decisions generated (and written as one batch of parts) at a time
CARD_SHARE = 0.8
TEMPERATURE = 0.7
NOMINAL, SPREAD = 90.0, 0.6
Row = tuple[Any, ...]


def _texts() -> dict[str, Any]:
    """Everything that does not change from row to row, encoded once as the SDK encodes it."""
    to_json = _records.to_json
    card, delay = shop.feature_card, shop.reminder_delay
    probs = np.array([softmax_probs(s, TEMPERATURE) for s in shop.SCORES])
    mu = math.log(NOMINAL)
    return {
        "card_fn": card.name, "card_hash": card.code_hash,
        "card_params": to_json(card.params, "params"),
        "card_inputs": [to_json({"ctx": shop.context(s)}, "inputs") for s in range(4)],
        "card_args": [to_json({"options": shop.CARDS, "scores": shop.SCORES[s],
                               "temperature": TEMPERATURE}, "args") for s in range(4)],
        "card_values": [to_json(c, "value") for c in shop.CARDS],
        "probs": probs, "cum": np.cumsum(probs, axis=1),
        "delay_fn": delay.name, "delay_hash": delay.code_hash,
        "delay_params": to_json(delay.params, "params"),
        "delay_inputs": [to_json({"basket": {"items": k}}, "inputs") for k in range(1, 10)],
        "delay_args": to_json({"mu": mu, "sigma": SPREAD}, "args"), "mu": mu,
    }  # fmt: skip


def _block(
    w: int, start: int, n: int, rng: np.random.Generator, texts: dict[str, Any],
    chain: list[Any], per_second: float,
) -> tuple[list[Row], list[Row], list[Row]]:  # fmt: skip
    """Decisions ``start .. start + n`` of writer ``w``: decision, draw and outcome rows."""
    writer = f"synth-{w}"
    seeds = rng.bytes(16 * n)
    is_card = rng.random(n) < CARD_SHARE
    segment = rng.integers(0, 4, n)
    items = rng.integers(1, 10, n)
    luck = rng.random(n)
    ts = START + (start + np.arange(n)) / per_second + w * 1e-3
    u = np.array([_stream.block(seeds[16 * i : 16 * i + 16], 0)[0] for i in range(n)])
    cum = texts["cum"][segment]
    card = np.where((u[:, None] < cum).any(axis=1), (u[:, None] < cum).argmax(axis=1), 5)
    card_prob = texts["probs"][segment, card]
    checkout = np.array(shop.CHECKOUT)[segment, card]
    decisions: list[Row] = []
    draws: list[Row] = []
    outcomes: list[Row] = []
    seq, prev = chain
    mu = texts["mu"]
    for i in range(n):
        did = f"syn-{w}-{start + i}"
        seed = seeds[16 * i : 16 * i + 16].hex()
        u_json = orjson.dumps([float(u[i])]).decode()
        t = float(ts[i])
        if is_card[i]:
            s, j = int(segment[i]), int(card[i])
            prob = float(card_prob[i])
            value = texts["card_values"][j]
            draw = (did, 0, "card", "softmax", texts["card_args"][s], u_json, value, prob, 0)
            row = (did, "recipe-card", f"shopper-{(start + i) % 100_003}", t, texts["card_fn"],
                   texts["card_hash"], texts["card_inputs"][s], texts["card_params"], value,
                   prob, "exact", seed, writer, seq, prev)  # fmt: skip
            reward = float(luck[i] < checkout[i])
        else:
            k = int(items[i])
            minutes = math.exp(mu + SPREAD * ppnd16(u[i] if u[i] < 1.0 else BELOW_ONE))
            density = lognormal_pdf(minutes, mu, SPREAD)
            value = orjson.dumps(minutes).decode()
            draw = (did, 0, "delay", "lognormal", texts["delay_args"], u_json, value, density, 1)
            row = (did, "reminder-delay", f"shopper-{(start + i) % 100_003}", t,
                   texts["delay_fn"], texts["delay_hash"], texts["delay_inputs"][k - 1],
                   texts["delay_params"], value, density, "exact", seed, writer, seq,
                   prev)  # fmt: skip
            reward = float(luck[i] < 0.2 + 0.3 * math.exp(-(math.log(minutes / 40.0) ** 2) / 0.98))
        prev = _records.decision_hash(row, [draw])
        decisions.append((*row, prev))
        draws.append(draw)
        seq += 1
        orow = (did, "checkout", reward, t + 60.0, writer, seq, prev)
        prev = _records.outcome_hash(orow)
        outcomes.append((*orow, prev))
        seq += 1
    chain[:] = [seq, prev]
    return decisions, draws, outcomes


def _table(rows: list[Row], table: str) -> pa.Table:
    schema = _parquet.SCHEMAS[table]
    cols = list(zip(*rows, strict=True))
    return pa.Table.from_arrays([pa.array(c, type=f.type) for c, f in zip(cols, schema,
                                                                          strict=True)],
                                schema=schema)  # fmt: skip


def _write_parquet(root: Path, decisions: list[Row], draws: list[Row], outcomes: list[Row]) -> None:
    """One batch as part files, grouped by stream and date as the Parquet sink groups them."""
    groups: dict[tuple[str, str], list[int]] = {}
    for i, row in enumerate(decisions):
        groups.setdefault((_parquet.stream_dir(row[1]), _parquet.day(row[3])), []).append(i)
    tag = _parquet.writer_tag(decisions[0][12])
    for (sdir, date), idx in groups.items():
        rows = [decisions[i] for i in idx]
        name = f"{rows[0][13]:012d}-{rows[-1][13]:012d}-{tag}{_parquet.SUFFIX}"
        for table, part in (("draws", [draws[i] for i in idx]), ("decisions", rows)):
            folder = root / table / sdir / date
            folder.mkdir(parents=True, exist_ok=True)
            pq.write_table(_table(part, table), folder / name)
    by_day: dict[str, list[Row]] = {}
    for row in outcomes:
        by_day.setdefault(_parquet.day(row[3]), []).append(row)
    for date, rows in by_day.items():
        folder = root / "outcomes" / date
        folder.mkdir(parents=True, exist_ok=True)
        name = f"{rows[0][5]:012d}-{rows[-1][5]:012d}-{tag}{_parquet.SUFFIX}"
        pq.write_table(_table(rows, "outcomes"), folder / name)


def _sqlite_insert(conn: sqlite3.Connection, decisions: list[Row], draws: list[Row],
                   outcomes: list[Row]) -> None:  # fmt: skip
    conn.execute("BEGIN")
    for table, rows, n in (("decisions", decisions, 16), ("draws", draws, 9),
                           ("outcomes", outcomes, 8)):  # fmt: skip
        conn.executemany(f"INSERT INTO {table} VALUES ({', '.join('?' * n)})", rows)
    conn.execute("COMMIT")


def _create_sqlite(path: Path) -> None:
    engine = _sinks.create_engine(_sinks.sqlalchemy_url(path))
    _schema.metadata.create_all(engine)
    engine.dispose()


def _writer(job: tuple[str, str, int, int, int, int, float]) -> int:
    """Generate the decisions of one writer into ``out`` (a Parquet root or an SQLite file)."""
    out, fmt, w, n, seed, _days, per_second = job
    rng = np.random.default_rng([seed, w])
    texts = _texts()
    chain: list[Any] = [0, None]
    conn = None
    if fmt == "sqlite":
        conn = sqlite3.connect(out, isolation_level=None)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA synchronous=OFF")
    for start in range(0, n, BLOCK):
        rows = _block(w, start, min(BLOCK, n - start), rng, texts, chain, per_second)
        if conn is None:
            _write_parquet(Path(out), *rows)
        else:
            _sqlite_insert(conn, *rows)
    if conn is not None:
        conn.close()
    return n


def generate(out: str | os.PathLike[str], decisions: int, *, format: str = "parquet",
             days: int = 10, writers: int = 2, seed: int = 1) -> Path:  # fmt: skip
    """Write a synthetic ledger of ``decisions`` decisions to ``out`` (replaced if it exists)."""
    target = Path(out)
    if target.is_dir():
        shutil.rmtree(target)
    elif target.exists():
        target.unlink()
    writers = max(1, min(writers, decisions))
    shares = [decisions // writers + (1 if w < decisions % writers else 0) for w in range(writers)]
    per_second = max(shares) / (days * 86_400.0)
    with tempfile.TemporaryDirectory() as tmp:
        if format == "parquet":
            for table in _parquet.TABLES:
                (target / table).mkdir(parents=True, exist_ok=True)
            outs = [os.fspath(target)] * writers
        else:
            outs = [os.path.join(tmp, f"w{w}.db") for w in range(writers)]
            for path in outs:
                _create_sqlite(Path(path))
        jobs = [(outs[w], format, w, shares[w], seed, days, per_second) for w in range(writers)]
        if writers == 1:
            [_writer(j) for j in jobs]
        else:
            ctx = multiprocessing.get_context("spawn")
            with ctx.Pool(writers) as pool:
                pool.map(_writer, jobs)
        if format == "sqlite":
            _create_sqlite(target)
            conn = sqlite3.connect(target, isolation_level=None)
            for path in outs:
                conn.execute("ATTACH DATABASE ? AS w", (path,))
                conn.execute("BEGIN")
                for table in ("decisions", "draws", "outcomes"):
                    conn.execute(f"INSERT INTO {table} SELECT * FROM w.{table}")
                conn.execute("COMMIT")
                conn.execute("DETACH DATABASE w")
            conn.close()
    return target


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out", help="the ledger to create (a directory for Parquet, a file)")
    parser.add_argument("--decisions", type=int, default=1_000_000)
    parser.add_argument("--format", choices=("parquet", "sqlite"), default="parquet")
    parser.add_argument("--days", type=int, default=10, help="dates the decisions span")
    parser.add_argument("--writers", type=int, default=os.cpu_count() or 1)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    started = time.perf_counter()
    generate(args.out, args.decisions, format=args.format, days=args.days,
             writers=args.writers, seed=args.seed)  # fmt: skip
    took = time.perf_counter() - started
    print(f"{args.decisions:,} decisions written to {args.out} in {took:.1f} s "
          f"({args.decisions / took:,.0f}/s)")  # fmt: skip
    return 0


if __name__ == "__main__":
    sys.exit(main())
