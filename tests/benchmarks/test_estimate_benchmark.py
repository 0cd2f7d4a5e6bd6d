"""Estimation throughput (marker ``benchmark``; prints ratios, never asserts a time).

Run: ``python -m pytest tests/benchmarks/test_estimate_benchmark.py -m benchmark -s``.
``DRAWLEDGER_BENCH_DECISIONS`` sets the size of the end-to-end ledger (default 100000).
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Callable
from pathlib import Path

import estimate_shop as shop
import numpy as np
import pytest

import drawledger as dl
from drawledger.replay import estimate, verify
from drawledger.replay.estimate import _estimators as est

pytestmark = pytest.mark.benchmark


def _best(fn: Callable[[], object], repeat: int = 5) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def test_ips_snips_clt_throughput_over_precomputed_propensities():
    """IPS + SNIPS with CLT intervals from arrays of propensities and rewards, vs raw numpy."""
    n = 2_000_000
    rng = np.random.default_rng(0)
    logging = rng.uniform(0.05, 1.0, n)
    target = rng.uniform(0.0, 1.0, n)
    r = (rng.random(n) < 0.3).astype(float)
    z975 = 1.959963984540054

    def raw() -> tuple[float, ...]:
        w = target / logging
        wr = w * r
        ips = wr.mean()
        ips_half = z975 * wr.std() / math.sqrt(n)
        sw = w.sum()
        snips = wr.sum() / sw
        snips_half = z975 * math.sqrt(((w * (r - snips)) ** 2).sum()) / sw
        return ips - ips_half, ips + ips_half, snips - snips_half, snips + snips_half

    def ours() -> dict[str, dict[str, float | None]]:
        z = est.policy_columns(target / logging, r, cap=10.0)
        return est.summarize(est.Moments.of(z), reward_range=(0.0, 1.0), names=("ips", "snips"))

    def chunked() -> dict[str, dict[str, float | None]]:
        w = target / logging
        cuts = range(0, n, 250_000)
        parts = [
            est.Moments.of(est.policy_columns(w[s : s + 250_000], r[s : s + 250_000], cap=10.0))
            for s in cuts
        ]
        return est.summarize(est.Moments.combine(parts), reward_range=(0.0, 1.0),
                             names=("ips", "snips"))  # fmt: skip

    ref, got = raw(), ours()
    assert ref[2] == pytest.approx(got["snips"]["low"], rel=1e-9)
    t_raw, t_ours, t_chunked = _best(raw), _best(ours), _best(chunked)
    print(f"\nIPS+SNIPS+CLT over {n:,} precomputed propensities:")
    print(f"  raw numpy reference : {n / t_raw / 1e6:7.1f} M records/s")
    print(f"  estimators (1 pass) : {n / t_ours / 1e6:7.1f} M records/s "
          f"(ratio to raw {t_ours / t_raw:.2f}x time)")  # fmt: skip
    print(f"  8 chunks + combine  : {n / t_chunked / 1e6:7.1f} M records/s "
          f"(ratio to raw {t_chunked / t_raw:.2f}x time)")  # fmt: skip


def test_end_to_end_estimate_on_a_large_ledger(tmp_path: Path):
    """Record N softmax decisions with outcomes, then verify alone and verify + estimate."""
    n = int(os.environ.get("DRAWLEDGER_BENCH_DECISIONS", "100000"))
    path = tmp_path / "large.db"
    led = dl.Ledger(path, queue_size=200_000)
    t = time.perf_counter()
    shop.simulate_cards(led, n, seed=1)
    led.close()
    t_record = time.perf_counter() - t
    t = time.perf_counter()
    verify(path)
    t_verify = time.perf_counter() - t
    t = time.perf_counter()
    report = estimate(path, reward="checkout", overrides={"temperature": 0.3})
    t_estimate = time.perf_counter() - t
    assert n == report.n
    print(f"\nend to end on {n:,} decisions (SQLite):")
    print(f"  record             : {t_record:7.1f} s ({n / t_record:,.0f} decisions/s)")
    print(f"  verify alone       : {t_verify:7.1f} s ({n / t_verify:,.0f} decisions/s)")
    print(f"  verify + estimate  : {t_estimate:7.1f} s ({n / t_estimate:,.0f} decisions/s); "
          f"estimation share {(t_estimate - t_verify) / t_estimate:.0%}, ratio to verify "
          f"{t_estimate / t_verify:.2f}x")  # fmt: skip
