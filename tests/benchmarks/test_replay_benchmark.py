"""Replay throughput of ``verify`` against raw re-execution, and its peak memory.

Run: python -m pytest tests/benchmarks/test_replay_benchmark.py -m benchmark -s
Results: docs/performance.md, "## Replay".

Two decisions of tests/support/shop_decisions.py, recorded through the SDK into SQLite:

- one draw: ``feature_card`` (a softmax over six cards, a pydantic input), 64 distinct
  contexts;
- three draws: ``card_with_badge`` (an explore coin, a uniform pick, a badge coin; its
  propensity is enumerated over 24 branches, cached for repeated inputs), with the same 64
  contexts, and again with every context distinct (no cache hits: one enumeration each).

The raw baseline, run in the same process on the same decisions, is the bare minimum of a
replay: each decision function called twice with ``Draw(seed)`` on inputs already built (no
reading, no decoding, no comparing, no propensity). Reported: decisions per second for

- ``replay``: ``verify_chunk`` on rows already read (one core), and its ratio to the baseline;
- ``verify``: the whole command (integrity check, reading, replay, no export), ``jobs`` 1 and 2.

Peak memory (``VmHWM``, the high-water mark of the resident set of a fresh process; Linux) is
measured for ``verify`` with and without the export rows on ledgers of two sizes, to show what
grows with the ledger.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import textwrap
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
import shop_decisions as sd

import drawledger as dl
from drawledger.draw import Draw
from drawledger.replay.sources import iter_chunks
from drawledger.replay.verify import Settings, load_inputs, load_params, verify, verify_chunk

pytestmark = pytest.mark.benchmark

N = 20_000
CONTEXTS = 64  # distinct inputs (a rotation of the scores), as in a busy home screen
N_DISTINCT = 5_000  # one enumeration of 24 branches each: slower, so fewer
MEMORY_SIZES = (20_000, 80_000)


def _context(i: int) -> sd.CardContext:
    ctx = sd.context(i, tier="plus" if i % 3 else "basic")
    return ctx.model_copy(update={"scores": [s + 1e-6 * i for s in ctx.scores]})


def _record(path: Path, decision: dl.Decision[Any], n: int, distinct: bool = False) -> Path:
    led = dl.Ledger(path)
    sd.use(led)
    contexts = [_context(i) for i in range(n if distinct else CONTEXTS)]
    for i in range(n):
        decision(contexts[i % len(contexts)], unit=f"shopper-{i % 5000}")
    led.close()
    return path


def _best(fn: Callable[[], object], rounds: int = 3) -> float:
    times = []
    for _ in range(rounds):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def _raw(decision: dl.Decision[Any], rows: list[tuple[Any, ...]]) -> Callable[[], None]:
    prepared = [
        (bytes.fromhex(r[11]), load_inputs(decision, r[6]), load_params(decision, r[7]))
        for r in rows
    ]

    def run() -> None:
        for seed, inputs, params in prepared:
            decision.run(Draw(seed), inputs, params)
            decision.run(Draw(seed), inputs, params)

    return run


@pytest.mark.parametrize("kind", ["one draw", "three draws", "three draws, distinct contexts"])
def test_replay_throughput(kind: str, tmp_path: Path) -> None:
    decision = sd.feature_card if kind == "one draw" else sd.card_with_badge
    n = N_DISTINCT if "distinct" in kind else N
    db = _record(tmp_path / "bench.db", decision, n, distinct="distinct" in kind)
    (rows, draws), *rest = list(iter_chunks(db, size=n))
    assert not rest
    assert n == len(rows)
    raw = n / _best(_raw(decision, rows))
    replay = n / _best(lambda: verify_chunk(rows, draws, frozenset(), Settings(keep_rows=False)))
    one = n / _best(lambda: verify(db, keep_rows=False))
    two = n / _best(lambda: verify(db, keep_rows=False, jobs=2))
    report = verify(db, keep_rows=False)
    assert report.ok
    assert n == report.verified
    print(f"\n[{kind}] {n} decisions, {os.cpu_count()} cores")
    print(f"  raw re-execution (2 runs each) {raw:10,.0f} /s")
    print(f"  replay (verify_chunk, 1 core)  {replay:10,.0f} /s   ratio to raw {replay / raw:.2f}")
    print(f"  verify, jobs=1                 {one:10,.0f} /s   ratio to raw {one / raw:.2f}")
    print(f"  verify, jobs=2                 {two:10,.0f} /s   ratio to raw {two / raw:.2f}")


MEASURE = textwrap.dedent(
    """
    import re, sys
    sys.path.insert(0, {support!r})
    import shop_decisions
    from drawledger.replay import verify
    from drawledger.replay.integrity import check_integrity
    from drawledger.replay.sources import iter_chunks
    from drawledger.replay.verify import Settings, verify_chunk

    if {what!r} == "integrity":
        check_integrity({db!r})
    elif {what!r} == "replay":
        for rows, draws in iter_chunks({db!r}):
            verify_chunk(rows, draws, frozenset(), Settings(keep_rows=False))
    else:
        report = verify({db!r}, keep_rows={what!r} == "rows")
        assert report.ok, report.by_reason
        print(int(report.rows.memory_usage(deep=True).sum()))
    status = open("/proc/self/status").read()
    print(int(re.search(r"VmHWM:\\s+(\\d+) kB", status).group(1)) * 1024)
    """
)


def _measure(db: Path, what: str) -> list[int]:
    code = MEASURE.format(support=str(Path(sd.__file__).parent), db=str(db), what=what)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          check=True, timeout=3600)  # fmt: skip
    return [int(x) for x in done.stdout.split()]


def test_peak_memory() -> None:
    mib = 2**20
    with tempfile.TemporaryDirectory() as tmp:
        (base,) = _measure(_record(Path(tmp) / "tiny.db", sd.feature_card, 100), "replay")
        print(f"\n[memory] one-draw decisions; peak (VmHWM) of a fresh process; a 100-decision "
              f"ledger: {base / mib:.0f} MiB (imports)")  # fmt: skip
        for n in MEMORY_SIZES:
            db = _record(Path(tmp) / f"m{n}.db", sd.feature_card, n)
            (replay,) = _measure(db, "replay")
            (integrity,) = _measure(db, "integrity")
            _, lean = _measure(db, "lean")
            rows, full = _measure(db, "rows")
            print(f"  {n:>7,} decisions: replay alone {replay / mib:4.0f} MiB, integrity check "
                  f"alone {integrity / mib:4.0f} MiB, verify {lean / mib:4.0f} MiB; with the "
                  f"export rows {full / mib:4.0f} MiB (the rows: {rows / n:,.0f} bytes per "
                  "decision)")  # fmt: skip
