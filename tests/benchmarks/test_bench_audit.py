"""Audit throughput on 1,000,000 decisions against a raw numpy reference, same arrays.

Run: python -m pytest tests/benchmarks/test_bench_audit.py -m benchmark -s
Results: docs/performance.md, "## Audit".

The ledger holds the grocery scenario: 400,000 recipe-card softmax draws over scores that vary
per shopper (with numeric inputs), 400,000 reminder-delay log-normal draws, and 200,000 bucket
assignments of 120,000 shoppers, built with numpy (tests/support/audit_synth.py) and written to
SQLite through the SDK's own sink (``SqlSink``) in the ledger's row layout.

- end to end: ``drawledger.replay.audit(path)`` in a fresh process (read in chunks, every
  test), against a raw reference in a fresh process that reads the draws' value column with
  ``sqlite3`` and runs ``numpy.bincount`` + ``scipy.stats.chisquare`` per stream; peak memory is
  each process's maximum resident set size;
- in memory: ``audit_tables`` on the DataFrames against ``numpy.bincount`` +
  ``scipy.stats.chisquare`` on the value codes of the same frames.
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import audit_synth as synth
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from drawledger import _sinks
from drawledger.replay import audit_tables

pytestmark = pytest.mark.benchmark

BATCH = 10_000

# Peak resident memory of this process since it started (VmHWM; ru_maxrss would include the
# memory of the parent it was forked from).
PEAK = """
def peak_mb():
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
"""

AUDIT = """
import json, sys, time
from drawledger.replay import audit
t = time.perf_counter()
report = audit(sys.argv[1])
seconds = time.perf_counter() - t
print(json.dumps({"seconds": seconds, "rss_mb": peak_mb(), "tests": len(report.tests)}))
"""

RAW = """
import json, sqlite3, sys, time
import numpy as np, pandas as pd
from scipy import stats
t = time.perf_counter()
con = sqlite3.connect(sys.argv[1])
rows = con.execute(
    "SELECT d.stream, dr.value FROM draws dr JOIN decisions d USING (decision_id)").fetchall()
frame = pd.DataFrame(rows, columns=["stream", "value"])
for stream, part in frame.groupby("stream"):
    codes, uniq = pd.factorize(part["value"])
    counts = np.bincount(codes)
    stats.chisquare(counts)
seconds = time.perf_counter() - t
print(json.dumps({"seconds": seconds, "rss_mb": peak_mb()}))
"""

IDLE = """
import json
import numpy, pandas, scipy.stats, sqlalchemy, drawledger.replay
print(json.dumps({"rss_mb": peak_mb()}))
"""


def scenario() -> tuple[pd.DataFrame, pd.DataFrame]:
    r = np.random.default_rng(2026)
    return synth.combine(
        synth.softmax(r, 400_000),
        synth.lognormal(r, 400_000),
        synth.bucket(r, 200_000, units=120_000),
    )


def write(path: Path, decisions: pd.DataFrame, draws: pd.DataFrame) -> None:
    sink = _sinks.SqlSink(_sinks.sqlalchemy_url(path))
    try:
        dec = list(decisions.itertuples(index=False, name=None))
        drw = [[row] for row in draws.itertuples(index=False, name=None)]  # one draw each
        for start in range(0, len(dec), BATCH):
            sink.write(dec[start : start + BATCH], drw[start : start + BATCH], [])
    finally:
        sink.close()


def run(script: str, *args: str) -> dict[str, float]:
    done = subprocess.run(
        [sys.executable, "-c", PEAK + script, *args], capture_output=True, text=True, check=True
    )
    return json.loads(done.stdout.strip().splitlines()[-1])  # type: ignore[no-any-return]


def test_audit_throughput_against_raw_numpy() -> None:
    decisions, draws = scenario()
    n = len(decisions)
    # in memory, same frames
    t = time.perf_counter()
    report = audit_tables(decisions, draws)
    in_memory = time.perf_counter() - t
    t = time.perf_counter()
    for _, part in draws.assign(stream=decisions["stream"].to_numpy()).groupby("stream"):
        codes, _ = pd.factorize(part["value"])
        stats.chisquare(np.bincount(codes))
    raw_in_memory = time.perf_counter() - t
    # end to end, from an SQLite ledger, each in a fresh process
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.db"
        write(path, decisions, draws)
        del decisions, draws
        full = run(AUDIT, str(path))
        raw = run(RAW, str(path))
        idle = run(IDLE)
    print()
    print(f"audit of {n} decisions ({len(report.tests)} tests)")
    print(
        f"  in memory: audit_tables {n / in_memory:,.0f} decisions/s ({in_memory:.1f} s); "
        f"raw bincount+chisquare {n / raw_in_memory:,.0f}/s; "
        f"ratio {raw_in_memory / in_memory:.3f}"
    )
    print(
        f"  end to end (SQLite): audit {n / full['seconds']:,.0f} decisions/s "
        f"({full['seconds']:.1f} s, peak RSS {full['rss_mb']:.0f} MB); raw "
        f"{n / raw['seconds']:,.0f}/s ({raw['seconds']:.1f} s, peak RSS {raw['rss_mb']:.0f} MB); "
        f"ratio {raw['seconds'] / full['seconds']:.3f}"
    )
    print(f"  interpreter with the imports alone: peak RSS {idle['rss_mb']:.0f} MB")
    assert report.ok
