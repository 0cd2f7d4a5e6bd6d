"""The source layer: every analysis cuts and reads a ledger through `drawledger.replay.sources`."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import pytest

import drawledger as dl
from drawledger.exceptions import LedgerError
from drawledger.replay import sources


def _write(target: Path, n: int, **options: str) -> None:
    """``n`` decisions of one stream, each with one draw."""
    ledger = dl.Ledger(target, **options)

    @ledger.decision("pick")
    def pick(draw: dl.Draw) -> int:
        return draw.integers(0, 3, name="slot")

    for i in range(n):
        pick(decision_id=f"d-{i:04d}")
    ledger.close()


@pytest.mark.parametrize("kind", ["sqlite", "parquet"])
def test_chunks_as_rows_and_as_frames_hold_the_same_decisions(tmp_path: Path, kind: str) -> None:
    target = tmp_path / ("ledger.db" if kind == "sqlite" else "ledger")
    _write(target, 230, **({"format": "parquet"} if kind == "parquet" else {}))
    as_rows = [[r[0] for r in rows] for rows, _ in sources.iter_chunks(target, size=100)]
    as_frames = [
        list(decisions["decision_id"]) for decisions, _ in sources.iter_decision_chunks(target, 100)
    ]
    assert as_rows == as_frames
    # The fixture wrote 230 decisions, each with one draw: none lost, none repeated.
    assert [f"d-{i:04d}" for i in range(230)] == sorted(d for chunk in as_rows for d in chunk)


def test_draws_come_with_their_decisions(tmp_path: Path) -> None:
    _write(tmp_path / "ledger.db", 30)
    for decisions, draws in sources.iter_decision_chunks(tmp_path / "ledger.db", 7):
        assert list(decisions["decision_id"]) == list(draws["decision_id"])


def test_a_piece_that_reads_otherwise_than_its_footers_is_refused(tmp_path: Path) -> None:
    """A Parquet part file is never rewritten: a count that differs means damage."""
    _write(tmp_path / "ledger", 40, format="parquet")
    [task] = sources.plan(tmp_path / "ledger", size=1000)
    assert 40 == task.rows  # the footers' count is the number written
    wrong = dataclasses.replace(task, rows=41)
    with pytest.raises(LedgerError, match="read 40 decisions, its part files' footers say 41"):
        wrong.read()
    with pytest.raises(LedgerError, match="footers say 41"):
        wrong.read_frames()


def test_an_sqlite_file_replaced_at_the_same_path_is_read_afresh(tmp_path: Path) -> None:
    """A process that read a ledger once must not go on reading the old file's data."""
    target = tmp_path / "ledger.db"
    _write(target, 5)
    assert [5] == [len(task.read()[0]) for task in sources.plan(target)]
    shutil.move(target, tmp_path / "old.db")
    _write(target, 9)
    assert [9] == [len(task.read()[0]) for task in sources.plan(target)]


def test_chunk_size_must_be_positive(tmp_path: Path) -> None:
    _write(tmp_path / "ledger.db", 1)
    with pytest.raises(ValueError, match="chunk_size must be at least 1"):
        next(sources.iter_decision_chunks(tmp_path / "ledger.db", 0))
