"""Parquet ledgers of declared coin draws written in batches, each decision with an outcome.

The integrity, guard, report and Dask tests remove part files from them to stand for a writer
stopped between the renames of a batch.
"""

from __future__ import annotations

from pathlib import Path

import drawledger as dl


def coin_batches(root: Path, batches: int, size: int, *, key: str | None = None) -> None:
    """``batches`` batches of ``size`` fair coins (``req-<i>``), each with a checkout outcome."""
    led = dl.Ledger(root, format="parquet", batch_size=1000, integrity_key=key)
    for i in range(batches * size):
        led.record_draw("reminder-delay", "bernoulli", {"p": 0.5}, i % 2 == 0, 0.5,
                        decision_id=f"req-{i}")  # fmt: skip
        led.outcome(f"req-{i}", "checkout", 1.0)
        if i % size == size - 1:
            led.flush()
    led.close()
