"""What replay across code versions costs, in one run: ``verify`` of a ledger logged by one
version with the history search on against the same run without it (``history=False``, the
replay as it was before versions), and of a ledger logged by ten deploys of the decision module
(each record replayed under its own version, found in the git history).

Run: python -m pytest tests/benchmarks/test_bench_versions.py -m benchmark -s
Results: docs/performance.md, "## Replay across code versions" (and docs/deploys.md).

Each deploy changes the temperature formula (a new code identity), so the ten-version ledger
needs nine git revisions extracted and nine processes of their own, each reading the ledger and
replaying its version's records; the newest version replays in the calling process. Reported:
decisions per second of the whole ``verify`` (integrity check, reading, replay, one job), the
ratios, and what one earlier version adds.
"""

from __future__ import annotations

import time
from pathlib import Path

import pytest
from git_shop import Shop

from drawledger.replay import verify

pytestmark = pytest.mark.benchmark

N = 20_000
VERSIONS = 10


def _body(k: int) -> str:
    return (f'    return draw.softmax(cards, scores, temperature=temperature + {k / 100:.2f}, '
            f'name="card")')  # fmt: skip


def _timed(shop: Shop, history: bool = True) -> float:
    """The better of two runs of ``verify`` (seconds); every record verified."""
    best = float("inf")
    for _ in range(2):
        start = time.perf_counter()
        report = verify(shop.ledger, path=[shop.repo], keep_rows=False, history=history)
        best = min(best, time.perf_counter() - start)
        assert (N, N) == (report.decisions, report.verified)
    return best


def test_replay_across_ten_versions(tmp_path: Path) -> None:
    (tmp_path / "one").mkdir()
    (tmp_path / "ten").mkdir()
    one = Shop(tmp_path / "one")
    one.deploy(_body(0), N, "One version")
    many = Shop(tmp_path / "ten")
    for k in range(VERSIONS):
        many.deploy(_body(k), N // VERSIONS, f"Version {k}")
    t_plain, t_one, t_many = _timed(one, history=False), _timed(one), _timed(many)
    print(f"\n[versions] verify of {N:,} decisions, one job, better of two runs")
    print(f"  1 version, no history  {N / t_plain:8,.0f} decisions/s  ({t_plain:.2f} s)")
    print(f"  1 version              {N / t_one:8,.0f} decisions/s  ({t_one:.2f} s)  "
          f"{t_plain / t_one:.2f}x of no history")  # fmt: skip
    print(f"  {VERSIONS} versions            {N / t_many:8,.0f} decisions/s  ({t_many:.2f} s)  "
          f"{t_one / t_many:.2f}x of 1 version")  # fmt: skip
    print(f"  each earlier version adds {(t_many - t_one) / (VERSIONS - 1):.2f} s "
          "(extract its tree, fork, read the ledger, replay its records)")  # fmt: skip
