"""The source layer: every analysis cuts and reads a ledger through `drawledger.replay.sources`."""

from __future__ import annotations

import dataclasses
import shutil
import sqlite3
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
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


@pytest.mark.parametrize("kind", ["sqlite", "parquet"])
def test_a_read_by_code_identity_holds_only_those_decisions_and_their_draws(
    tmp_path: Path, kind: str
) -> None:
    target = tmp_path / ("ledger.db" if kind == "sqlite" else "ledger")
    ledger = dl.Ledger(target, **({"format": "parquet"} if kind == "parquet" else {}))

    @ledger.decision("pick")
    def pick(draw: dl.Draw) -> int:
        return draw.integers(0, 3, name="slot")

    @ledger.decision("pick")
    def pick_wider(draw: dl.Draw) -> int:
        return draw.integers(0, 5, name="slot")

    for i in range(30):
        (pick if i % 3 else pick_wider)(decision_id=f"d-{i:02d}")
    ledger.close()
    wider = str(pick_wider.code_hash)
    (task,) = sources.plan(target)
    rows, draws = task.read(codes=frozenset({wider}))
    assert [f"d-{i:02d}" for i in range(0, 30, 3)] == sorted(r[0] for r in rows)
    assert {wider} == {r[5] for r in rows}
    assert sorted(r[0] for r in rows) == sorted(d[0] for d in draws)
    assert (30, 30) == tuple(map(len, task.read()))


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


def _loosen(path: Path, statement: str) -> None:
    """Run ``statement`` on a copy of the decisions table without its NOT NULL constraints."""
    with sqlite3.connect(path) as conn:
        conn.executescript("CREATE TABLE loose AS SELECT * FROM decisions; DROP TABLE decisions; "
                           f"ALTER TABLE loose RENAME TO decisions; {statement}")  # fmt: skip


@pytest.mark.parametrize("value", ["NULL", "'x'"])
def test_a_decision_without_an_integer_seq_is_refused_rather_than_its_slice_lost(
    tmp_path: Path, value: str
) -> None:
    target = tmp_path / "led.db"
    _write(target, 30)
    _loosen(target, f"UPDATE decisions SET seq = {value} WHERE decision_id = 'd-0000'")
    with pytest.raises(LedgerError, match=r"record of decision 'd-0000': decisions\.seq is"):
        list(sources.iter_chunks(target, size=10))


def test_a_table_without_one_of_its_columns_is_refused_on_open(tmp_path: Path) -> None:
    target = tmp_path / "led.db"
    _write(target, 3)
    with sqlite3.connect(target) as conn:
        conn.execute("ALTER TABLE draws DROP COLUMN u")
    with pytest.raises(LedgerError, match="its table draws has no column u"):
        sources.plan(target)


def test_a_corrupt_sqlite_file_is_a_ledger_error_that_says_so(tmp_path: Path) -> None:
    target = tmp_path / "led.db"
    _write(target, 400)
    data = bytearray(target.read_bytes())
    data[len(data) // 2 : len(data) // 2 + 3000] = b"\xa5" * 3000
    target.write_bytes(bytes(data))
    with pytest.raises(LedgerError, match="database is corrupt: database disk image is malformed"):
        list(sources.iter_chunks(target))


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (lambda t: t.drop_columns(["ts"]), "has no column ts"),
        (lambda t: t.set_column(t.schema.get_field_index("propensity"), "propensity",
                                pa.array(["0.5"] * t.num_rows)),
         "its column propensity is string, not double"),
    ],
)  # fmt: skip
def test_a_parquet_part_of_another_schema_is_refused_not_cast(
    tmp_path: Path, change: Any, message: str
) -> None:
    target = tmp_path / "led"
    _write(target, 5, format="parquet")
    part = next((target / "decisions").rglob("*.parquet"))
    pq.write_table(change(pq.read_table(part)), part)
    with pytest.raises(LedgerError, match=message):
        list(sources.iter_chunks(target))


def test_a_null_where_the_schema_allows_none_is_refused_when_read_as_frames(
    tmp_path: Path,
) -> None:
    target = tmp_path / "led.db"
    _write(target, 5)
    _loosen(target, "UPDATE decisions SET ts = NULL WHERE decision_id = 'd-0003'")
    with pytest.raises(LedgerError, match=r"decision 'd-0003': decisions\.ts is NULL"):
        list(sources.iter_decision_chunks(target))
