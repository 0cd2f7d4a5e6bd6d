"""Can the guard keep up with the SDK? Its take-in rate against the SDK's write rate.

Run: python -m pytest tests/benchmarks/test_guard_benchmark.py -m benchmark -s
Results: docs/guard.md, "Cost".

The decision is ``feature_card`` of tests/support/shop_decisions.py (a softmax over six cards,
a pydantic input), recorded through the SDK into SQLite. Reported, on one core each:

- ``write``: decisions per second the SDK records (calls, then ``close``: every record
  written);
- ``guard``: decisions per second the guard takes in from that ledger (reading, chain, replay
  twice, the audit's statistics, the evidence, the state file saved as the guard does), and
  the ratio guard / write (1 or above: the guard keeps up with the SDK on one core). Both are
  the best of ``ROUNDS`` rounds, taken in turn, so that a busy shared machine moves both alike;
- peak memory (``VmHWM`` of a fresh process; Linux) of the guard on two ledger sizes, to show
  that it does not grow with the ledger;
- the start-up of a cron-style look: ``drawledger guard --once`` on a ledger of 50 decisions in
  a fresh process, against ``python -c "import drawledger.replay.guard"`` (the import alone),
  median of ``ROUNDS`` runs.
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest
import shop_decisions as sd
from conftest import SUPPORT

import drawledger as dl
from drawledger.replay.guard import guard

pytestmark = pytest.mark.benchmark

N = 20_000
ROUNDS = 3
MEMORY_SIZES = (20_000, 80_000)

CLI = "import sys; from drawledger.cli import main; sys.exit(main(sys.argv[1:]))"

PEAK = """
import sys
sys.path.insert(0, sys.argv[2])
from drawledger.replay.guard import guard
guard(sys.argv[1], path=[sys.argv[2]], once=True)
for line in open("/proc/self/status"):
    if line.startswith("VmHWM"):
        print(int(line.split()[1]) // 1024)
"""


def _record(path: Path, n: int) -> float:
    led = dl.Ledger(path)
    sd.use(led)
    contexts = [sd.context(i) for i in range(64)]
    start = time.perf_counter()
    for i in range(n):
        sd.feature_card(contexts[i % 64])
    led.close()
    return n / (time.perf_counter() - start)


def test_guard_keeps_up_with_the_sdk() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        write = rate = 0.0
        for i in range(ROUNDS):
            db = Path(tmp) / f"cards-{i}.db"
            write = max(write, _record(db, N))
            start = time.perf_counter()
            report = guard(db, path=[SUPPORT], state=Path(tmp) / f"state-{i}.json", once=True)
            rate = max(rate, N / (time.perf_counter() - start))
            assert N == report.state.verify["verified"]
        print(f"\nwrite {write:,.0f}/s, guard {rate:,.0f}/s, guard / write {rate / write:.2f}")
        for n in MEMORY_SIZES:
            big = Path(tmp) / f"cards-{n}.db"
            _record(big, n)
            done = subprocess.run([sys.executable, "-c", PEAK, str(big), str(SUPPORT)],
                                  capture_output=True, text=True, check=True)  # fmt: skip
            print(f"guard peak memory, {n:,} decisions: {done.stdout.strip()} MiB")
        small = Path(tmp) / "cards-50.db"
        _record(small, 50)
        look = [sys.executable, "-c", CLI, "guard", str(small), "--path", str(SUPPORT), "--once"]
        imports = [sys.executable, "-c", "import drawledger.replay.guard"]
        took = {"look": [], "import": []}
        for _ in range(ROUNDS):
            for name, command in (("look", look), ("import", imports)):
                start = time.perf_counter()
                subprocess.run(command, capture_output=True, check=True)
                took[name].append(time.perf_counter() - start)
        whole, alone = statistics.median(took["look"]), statistics.median(took["import"])
        print(
            f"guard --once on 50 decisions, fresh process: {whole:.2f} s; importing the guard "
            f"alone: {alone:.2f} s ({alone / whole:.0%} of it)"
        )
