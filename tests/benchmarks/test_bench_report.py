"""The HTML report of ledgers with many small streams: time and size of the page.

Run: python -m pytest tests/benchmarks/test_bench_report.py -m benchmark -s
Results: docs/performance.md, "## HTML report".

Each ledger holds 200 or 2,000 streams of 10 declared categorical draws. The ledger is verified
and audited first (timed apart), then ``write_report`` draws the page from those results: at
most ``FULL_STREAMS`` streams get their tests and figures, the others one row each, so the
page's time and size stay bounded however many streams there are.
"""

from __future__ import annotations

import time
from pathlib import Path

import pytest

import drawledger as dl
from drawledger.replay import audit, verify, write_report

pytestmark = pytest.mark.benchmark

ARGS = {"options": ["a", "b", "c"], "probs": [0.5, 0.3, 0.2]}


def _ledger(path: Path, streams: int) -> Path:
    with dl.Ledger(path) as led:
        for s in range(streams):
            for i in range(10):
                led.record_draw(f"stream-{s:05d}", "categorical", ARGS, "abc"[i % 3],
                                ARGS["probs"][i % 3], decision_id=f"d-{s}-{i}",
                                u=[(i % 3) * 0.3 + 0.1])  # fmt: skip
    return path


@pytest.mark.parametrize("streams", [200, 2000])
def test_report_of_many_small_streams(tmp_path: Path, streams: int) -> None:
    ledger = _ledger(tmp_path / "many.db", streams)
    t = time.perf_counter()
    v = verify(ledger)
    verified = time.perf_counter() - t
    t = time.perf_counter()
    a = audit(ledger)
    audited = time.perf_counter() - t
    t = time.perf_counter()
    page = write_report(ledger, tmp_path / "r.html", verification=v, audit_report=a).path
    drawn = time.perf_counter() - t
    print(f"{streams:>5} streams: verify {verified:5.1f} s, audit {audited:5.1f} s, "
          f"page {drawn:5.1f} s, {page.stat().st_size / 1e6:.2f} MB")  # fmt: skip
