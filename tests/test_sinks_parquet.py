"""The Parquet directory ledger: layout, atomic parts, readers while writing, chunked reading."""

from __future__ import annotations

import threading
from pathlib import Path

import pandas as pd
import pyarrow.dataset as ds
import pytest

import drawledger as dl
from drawledger import _parquet
from drawledger.replay.integrity import check_integrity
from drawledger.replay.sources import iter_decision_chunks, read_tables

DAY = 1_767_225_600.0  # 2026-01-01T00:00:00Z


def _record(led: dl.Ledger, n: int, stream: str = "free-delivery", ts: float = DAY,
            tag: str = "") -> None:  # fmt: skip
    for i in range(n):
        did = f"{stream}-{tag}{i}"
        led.record_draw(stream, "bernoulli", {"p": 0.25}, i % 4 == 0, 0.25 if i % 4 == 0 else 0.75,
                        decision_id=did, unit=f"shopper-{i}", ts=ts + i)  # fmt: skip
        led.outcome(did, "checkout", 1.0, ts=ts + i + 60)


def test_tables_are_subdirectories_partitioned_by_stream_and_date(tmp_path: Path) -> None:
    root = tmp_path / "ledger"
    led = dl.Ledger(root, format="parquet")
    _record(led, 3, "free-delivery")
    _record(led, 2, "recipe/card", ts=DAY + 86_400)
    led.close()
    names = sorted(str(p.parent.relative_to(root)) for p in root.rglob("*.parquet"))
    assert [
        "decisions/free-delivery/2026-01-01",
        "decisions/recipe%2Fcard/2026-01-02",
        "draws/free-delivery/2026-01-01",
        "draws/recipe%2Fcard/2026-01-02",
        "ledger_meta",  # the registry: the ledger's identity and its one writer
        "outcomes/2026-01-01",
        "outcomes/2026-01-02",
        "writers",
    ] == names
    assert [] == [p for p in root.rglob("*") if p.name.startswith(".")]  # no temporary files


def test_pandas_and_pyarrow_read_the_tables_directly(tmp_path: Path) -> None:
    root = tmp_path / "ledger"
    led = dl.Ledger(root, format="parquet")
    _record(led, 5)
    led.close()
    assert 5 == len(pd.read_parquet(root / "decisions"))
    assert 5 == ds.dataset(root / "draws", format="parquet").count_rows()
    assert 5 == len(pd.read_parquet(root / "outcomes"))


@pytest.mark.parametrize(
    ("stream", "expected"),
    [
        (".", "%2E"),
        ("_private", "%5Fprivate"),
        ("a b/c", "a%20b%2Fc"),
        ("recipe-card", "recipe-card"),
    ],
)
def test_stream_directory_names_are_safe_and_visible(stream: str, expected: str) -> None:
    assert expected == _parquet.stream_dir(stream)


def test_long_stream_names_are_cut_and_hashed() -> None:
    name = _parquet.stream_dir("é" * 200)
    assert len(name) <= 120
    assert name != _parquet.stream_dir("é" * 201)
    assert "%" != name[name.index("~") - 1]  # no escape cut in half


def test_out_of_range_timestamps_get_their_own_partition() -> None:
    assert "out-of-range" == _parquet.day(1e300)
    assert "1970-01-01" == _parquet.day(0.0)


def test_retried_batch_replaces_its_own_parts(tmp_path: Path) -> None:
    """The writer may write a batch again after a failure: no second copy appears."""
    sink = _parquet.ParquetSink(str(tmp_path / "ledger"))
    led = dl.Ledger(tmp_path / "unused", format="parquet")
    batch: list[tuple[object, ...]] = []
    led._taps.append(batch.append)
    _record(led, 4)
    led.close()
    decisions = [item[1] for item in batch if item[0] == "d"]
    draws = [item[2] for item in batch if item[0] == "d"]
    outcomes = [item[1] for item in batch if item[0] == "o"]
    sink.write(decisions, draws, outcomes)
    sink.write(decisions, draws, outcomes)
    tables = read_tables(tmp_path / "ledger")
    assert (4, 4, 4) == (len(tables.decisions), len(tables.draws), len(tables.outcomes))


def test_readers_see_whole_batches_while_a_writer_runs(tmp_path: Path) -> None:
    """Every decision a concurrent reader sees has its draws (parts appear by rename)."""
    root = tmp_path / "ledger"
    led = dl.Ledger(root, format="parquet", batch_size=50)
    _record(led, 1)
    led.flush()
    done = threading.Event()

    def write() -> None:
        for k in range(20):
            _record(led, 50, stream=f"s{k % 3}", ts=DAY + k, tag=f"{k}-")
            led.flush()
        done.set()

    writer = threading.Thread(target=write)
    writer.start()
    reads = 0
    while not done.is_set() or reads < 2:
        tables = read_tables(root)
        assert set(tables.decisions["decision_id"]) == set(tables.draws["decision_id"])
        reads += 1
    writer.join()
    led.close()
    assert check_integrity(root).ok


def test_chunked_reading_returns_every_decision_once(tmp_path: Path) -> None:
    root = tmp_path / "ledger"
    led = dl.Ledger(root, format="parquet", batch_size=7)
    for k in range(4):
        _record(led, 10, stream=f"stream-{k}")
        led.flush()
    led.close()
    seen: list[str] = []
    for decisions, draws in iter_decision_chunks(root, chunk_size=8):
        assert set(decisions["decision_id"]) == set(draws["decision_id"])
        seen.extend(decisions["decision_id"])
    assert 40 == len(seen) == len(set(seen))


def test_full_durability_writes_the_same_records(tmp_path: Path) -> None:
    root = tmp_path / "ledger"
    led = dl.Ledger(root, format="parquet", durability="full")
    _record(led, 3)
    led.close()
    assert (3, 0) == (led.stats()["written"] // 2, led.stats()["spilled"])
    assert check_integrity(root).ok


def test_reading_a_missing_table_or_directory_is_a_clear_error(tmp_path: Path) -> None:
    with pytest.raises(dl.LedgerError, match="no such directory"):
        read_tables(tmp_path / "absent", format="parquet")
    root = tmp_path / "ledger"
    (root / "decisions").mkdir(parents=True)
    with pytest.raises(dl.LedgerError, match="no table draws, outcomes"):
        read_tables(root)
    with pytest.raises(dl.LedgerError, match="no table 'bets'"):
        _parquet.read_table(root, "bets")


def test_unknown_durability_is_refused(tmp_path: Path) -> None:
    with pytest.raises(dl.LedgerError, match="unknown durability"):
        dl.Ledger(tmp_path / "ledger", format="parquet", durability="eventually")


def test_a_part_left_empty_by_a_power_loss_is_refused_by_name_with_what_to_do(
    tmp_path: Path,
) -> None:
    root = tmp_path / "pq"
    led = dl.Ledger(root, format="parquet")
    led.record_draw("free-delivery", "bernoulli", {"p": 0.2}, False, 0.8, decision_id="b-1")
    led.close()
    part = _parquet.parts(root, "decisions")[0].path
    part.write_bytes(b"")
    with pytest.raises(dl.LedgerError, match=r"cannot read ledger part .*0 bytes.*power loss"):
        read_tables(root)
