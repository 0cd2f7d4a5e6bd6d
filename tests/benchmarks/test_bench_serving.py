"""Serving cost of one recorded decision against the same logic with ``random.choices``.

Run: python -m pytest tests/benchmarks/test_bench_serving.py -m benchmark -s
Results: docs/performance.md, "## Serving cost per decision" (``run.py`` calls ``measure``).

The decision is the quickstart's: a softmax over six recipe cards with a small input (six
scores). The baseline is the same logic without drawledger: the same softmax weights, then
``random.choices``. Both run in this process, interleaved in rounds so that machine noise hits
both alike; every call is timed on its own (``time.perf_counter_ns``) and the report gives
p50, p99 and the mean, and the ratio of drawledger to the baseline.

Two drawledger variants:

- "with writer": the real thing, a background writer committing to SQLite; in this
  back-to-back loop it runs between the timed calls (competing for the interpreter lock), and
  what it has left at the end of a round is waited for with ``flush()``. Its percentiles are
  the calls'; its mean also holds all of the writer's work (hash chain, SQLAlchemy, commits);
- "serving only": the records stay in the ledger's queue and no writer thread takes them, so
  the numbers are the serving thread's own work (validation, seed, draw, JSON, queueing).
"""

from __future__ import annotations

import math
import random
import sys
import tempfile
import time
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

import drawledger as dl

SUPPORT = Path(__file__).resolve().parent.parent / "support"
if str(SUPPORT) not in sys.path:  # run as a script (see main); under pytest conftest adds it
    sys.path.insert(0, str(SUPPORT))

from recipe_card import CARDS, SCORES, make_decision  # noqa: E402

pytestmark = pytest.mark.benchmark

ROUNDS = 20
PER_ROUND = 2_500


def baseline(cards: list[str], scores: list[float], temperature: float = 0.7) -> str:
    """The same decision without drawledger."""
    top = max(scores)
    weights = [math.exp((s - top) / temperature) for s in scores]
    return random.choices(cards, weights)[0]


def hold_records(ledger: dl.Ledger) -> None:
    """Queue ``ledger``'s records as usual, but no writer thread takes them and the queue keeps
    only the last one (a queue that grew would make the garbage collector's work grow)."""
    ledger._writer.queue = deque(maxlen=1)
    ledger._writer._live = True  # put() takes the thread for running and never starts it


def drop_held(ledger: dl.Ledger) -> None:
    """Close a ledger of ``hold_records`` without writing what it held."""
    ledger._writer.queue.clear()
    ledger.close()


def timings(fn: Callable[..., Any], out: list[int], calls: int) -> None:
    clock = time.perf_counter_ns
    for _ in range(calls):
        start = clock()
        fn(CARDS, SCORES)
        out.append(clock() - start)


def summary(ns: list[int], extra_ns: int = 0) -> dict[str, float]:
    """p50 and p99 of the calls, and their mean with ``extra_ns`` spread over them (us)."""
    s = sorted(ns)
    return {"p50": s[len(s) // 2] / 1e3, "p99": s[int(len(s) * 0.99)] / 1e3,
            "mean": (sum(s) + extra_ns) / len(s) / 1e3}  # fmt: skip


def measure(rounds: int = ROUNDS, per_round: int = PER_ROUND) -> dict[str, dict[str, float]]:
    """p50, p99 and mean in microseconds of "baseline", "with writer" and "serving only", each
    called ``rounds * per_round`` times, interleaved in ``rounds`` rounds.

    The writer thread runs between the timed calls when it wakes (it polls every 50 ms); what
    it has not written by the end of a "with writer" round, ``flush()`` waits for, and that
    wait counts in the mean of "with writer" (not in its percentiles). So the other variants
    never pay for it, and the mean of "with writer" holds all of the writer's work.
    """
    with tempfile.TemporaryDirectory() as tmp:
        ledger = dl.Ledger(Path(tmp) / "serving.db")
        held = dl.Ledger(Path(tmp) / "held.db")
        hold_records(held)  # records stay in memory: no writer work
        variants: dict[str, Callable[..., Any]] = {
            "baseline": baseline,
            "with writer": make_decision(ledger),
            "serving only": make_decision(held),
        }
        times: dict[str, list[int]] = {name: [] for name in variants}
        for fn in variants.values():  # warm up
            for _ in range(1_000):
                fn(CARDS, SCORES)
        ledger.flush()
        flushing = 0
        for _ in range(rounds):
            for name, fn in variants.items():
                timings(fn, times[name], per_round)
                start = time.perf_counter_ns()
                ledger.flush()  # only "with writer" leaves records to write
                if name == "with writer":
                    flushing += time.perf_counter_ns() - start
        ledger.close()
        drop_held(held)
    return {name: summary(ns, flushing if name == "with writer" else 0)
            for name, ns in times.items()}  # fmt: skip


def test_serving_cost_against_random_choices() -> None:
    stats = measure()
    base = stats["baseline"]
    print(f"\n[serving] {ROUNDS * PER_ROUND} calls each, one softmax over 6 options "
          "(the mean of 'with writer' includes waiting for the writer's backlog)")  # fmt: skip
    for name, s in stats.items():
        print(f"  {name:13s} p50 {s['p50']:6.2f} us  p99 {s['p99']:7.2f} us  "
              f"mean {s['mean']:6.2f} us  ratio p50 {s['p50'] / base['p50']:4.1f}x  "
              f"mean {s['mean'] / base['mean']:4.1f}x")  # fmt: skip


def main(argv: list[str]) -> None:
    """Run one variant N times with records held in memory, for an outside profiler:

    valgrind --tool=callgrind python tests/benchmarks/test_bench_serving.py decision 2000
    (the instruction count of N = 2000 minus that of N = 0, divided by 2000, is the cost of
    one call; py-spy or cProfile work the same way).
    """
    which, n = argv[0], int(argv[1])
    with tempfile.TemporaryDirectory() as tmp:
        held = dl.Ledger(Path(tmp) / "held.db")
        hold_records(held)
        fn = make_decision(held) if which == "decision" else baseline
        for _ in range(200):
            fn(CARDS, SCORES)
        for _ in range(n):
            fn(CARDS, SCORES)
        drop_held(held)


if __name__ == "__main__":
    main(sys.argv[1:])
