"""Serving cost of one recorded decision against the same logic with ``random.choices``.

Run: python -m pytest tests/benchmarks/test_bench_serving.py -m benchmark -s
Results: docs/performance.md, "## Serving cost and SQLite sink".

The decision is the quickstart's: a softmax over six recipe cards with a small input (six
scores). The baseline is the same logic without drawledger: the same softmax weights, then
``random.choices``. Both run in this process, interleaved in rounds so that machine noise hits
both alike; every call is timed on its own (``time.perf_counter_ns``) and the report gives
p50, p99 and the mean, and the ratio of drawledger to the baseline.

Two drawledger variants:

- "with writer": the real thing, a background writer committing to SQLite while the calls
  run (the writer competes for the interpreter lock in this back-to-back loop);
- "serving thread only": the records are held in memory by a tap, so the numbers are the
  serving thread's own work (validation, seed, draw, JSON, hash chain, queueing).
"""

from __future__ import annotations

import math
import random
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

import drawledger as dl

pytestmark = pytest.mark.benchmark

CARDS = ["one-pot-pasta", "green-curry", "sheet-pan-salmon", "taco-night", "lentil-soup",
         "overnight-oats"]  # fmt: skip
SCORES = [1.6, 0.7, 1.2, 1.8, 0.5, 0.4]
ROUNDS = 20
PER_ROUND = 2_500


def baseline(cards: list[str], scores: list[float], temperature: float = 0.7) -> str:
    """The same decision without drawledger."""
    top = max(scores)
    weights = [math.exp((s - top) / temperature) for s in scores]
    return random.choices(cards, weights)[0]


def make_decision(ledger: dl.Ledger) -> dl.Decision[str]:
    @ledger.decision("recipe-card")
    def feature_card(
        cards: list[str], scores: list[float], draw: dl.Draw, *, temperature: float = 0.7
    ) -> str:
        return draw.softmax(cards, scores, temperature=temperature, name="card")

    return feature_card


def timings(fn: Callable[..., Any], out: list[int]) -> None:
    clock = time.perf_counter_ns
    for _ in range(PER_ROUND):
        start = clock()
        fn(CARDS, SCORES)
        out.append(clock() - start)


def summary(ns: list[int]) -> dict[str, float]:
    s = sorted(ns)
    return {"p50": s[len(s) // 2] / 1e3, "p99": s[int(len(s) * 0.99)] / 1e3,
            "mean": statistics.fmean(s) / 1e3}  # fmt: skip


def test_serving_cost_against_random_choices() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        ledger = dl.Ledger(Path(tmp) / "serving.db")
        held = dl.Ledger(Path(tmp) / "held.db")
        held._taps.append(lambda item: True)  # keep records in memory: no writer work
        with_writer, serving_only = make_decision(ledger), make_decision(held)
        times: dict[str, list[int]] = {"baseline": [], "with writer": [], "serving only": []}
        for fn in (baseline, with_writer, serving_only):  # warm up
            for _ in range(1_000):
                fn(CARDS, SCORES)
        for _ in range(ROUNDS):
            timings(baseline, times["baseline"])
            timings(with_writer, times["with writer"])
            timings(serving_only, times["serving only"])
        ledger.close()
        held.close()
    base = summary(times["baseline"])
    print(f"\n[serving] {ROUNDS * PER_ROUND} calls each, one softmax over 6 options")
    for name, ns in times.items():
        s = summary(ns)
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
        held._taps.append(lambda item: True)
        fn = make_decision(held) if which == "decision" else baseline
        for _ in range(200):
            fn(CARDS, SCORES)
        for _ in range(n):
            fn(CARDS, SCORES)
        held.close()


if __name__ == "__main__":
    import sys

    main(sys.argv[1:])
