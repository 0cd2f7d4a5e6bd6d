"""The PostgreSQL sink: same schema, COPY batches, shared by many writers, readable in chunks.

Needs DRAWLEDGER_TEST_POSTGRES_URL (the ``postgres_url`` fixture skips with a reason otherwise).
"""

from __future__ import annotations

import threading
from pathlib import Path

import pytest
import sqlalchemy as sa

import drawledger as dl
from drawledger import _schema, _sinks
from drawledger.replay.integrity import check_integrity
from drawledger.replay.sources import iter_decision_chunks, read_tables

pytestmark = pytest.mark.postgres


def _record(led: dl.Ledger, n: int) -> None:
    @led.decision("recipe-card")
    def feature_card(scores: list[float], draw: dl.Draw, *, temperature: float = 0.7) -> str:
        return draw.softmax(["ramen", "tacos", "dal"], scores, temperature=temperature)

    for i in range(n):
        feature_card([0.1, 0.5, 0.2], decision_id=f"req-{i}", unit=f"shopper-{i % 3}")
        led.outcome(f"req-{i}", "checkout", float(i % 2))


def test_ledger_on_postgresql_round_trips_and_verifies(postgres_url: str) -> None:
    led = dl.Ledger(postgres_url, batch_size=50)
    _record(led, 120)
    led.close()
    assert (240, 0) == (led.stats()["written"], led.stats()["spilled"])
    tables = read_tables(postgres_url)
    assert (120, 120, 120) == (len(tables.decisions), len(tables.draws), len(tables.outcomes))
    report = check_integrity(postgres_url, chunk_size=7)
    assert (True, 120, 120) == (report.ok, report.decisions, report.outcomes)


def test_batches_go_through_copy(postgres_url: str) -> None:
    sink = _sinks.SqlSink(postgres_url)
    assert sink._copy
    sink.close()


def test_the_unique_writer_seq_index_refuses_a_second_copy(postgres_url: str) -> None:
    led = dl.Ledger(postgres_url)
    batch: list[tuple[object, ...]] = []
    led._taps.append(batch.append)
    _record(led, 2)
    led.close()
    sink = _sinks.SqlSink(postgres_url)
    decisions = [item[1] for item in batch if item[0] == "d"]
    with pytest.raises(Exception, match="decisions_writer_seq"):  # the driver's unique violation
        sink.write(decisions[:1], [[]], [])
    sink.close()
    assert 2 == len(read_tables(postgres_url).decisions)  # the failed batch left nothing


def test_many_writers_create_the_schema_at_once(postgres_url: str) -> None:
    errors: list[BaseException] = []

    def open_sink() -> None:
        try:
            _sinks.SqlSink(postgres_url).close()
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=open_sink) for _ in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert [] == errors
    engine = _sinks.create_engine(postgres_url)
    assert {t.name for t in _schema.TABLES} <= set(sa.inspect(engine).get_table_names())
    engine.dispose()


def test_chunks_are_keyset_pages_covering_every_decision_once(postgres_url: str) -> None:
    led = dl.Ledger(postgres_url)
    _record(led, 50)
    led.close()
    seen = []
    for decisions, draws in iter_decision_chunks(postgres_url, chunk_size=8):
        assert set(decisions["decision_id"]) == set(draws["decision_id"])
        seen.extend(decisions["decision_id"])
    assert sorted(f"req-{i}" for i in range(50)) == sorted(seen)


def test_spill_from_an_outage_is_ingested_into_postgresql_once(postgres_url: str,
                                                              tmp_path: Path) -> None:  # fmt: skip
    down = dl.Ledger("postgresql+psycopg://postgres@127.0.0.1:1/test", spill_dir=tmp_path)
    _record(down, 10)
    down.close()
    first = dl.ingest(down.spill_path, postgres_url)
    second = dl.ingest(down.spill_path, postgres_url)
    assert (10, 10, 0) == (first.decisions, first.outcomes, first.already_present)
    assert 20 == second.already_present
    assert check_integrity(postgres_url).ok


def test_unreachable_server_is_a_clear_error_for_readers() -> None:
    with pytest.raises(dl.LedgerError, match="cannot read ledger"):
        read_tables("postgresql+psycopg://postgres@127.0.0.1:1/test")


def test_a_decision_id_stored_by_another_writer_is_rejected(postgres_url: str,
                                                             tmp_path: Path) -> None:  # fmt: skip
    """Retried requests served by another process: the id is looked up in the decision_id
    index before the batch is sealed; the reused one is rejected, the rest written, and the
    ledger stays whole. Ingest refuses the same reuse from a spill file."""
    first = dl.Ledger(postgres_url, spill_dir=tmp_path)
    _record(first, 3)
    first.close()
    second = dl.Ledger(postgres_url, spill_dir=tmp_path)
    _record(second, 5)  # req-0 .. req-4: three stored by the first writer
    second.close()
    assert (3, 7) == (second.stats()["rejected"], second.stats()["written"])
    down = dl.Ledger("postgresql+psycopg://postgres@127.0.0.1:1/test", spill_dir=tmp_path)
    _record(down, 6)
    down.close()
    report = dl.ingest(down.spill_path, postgres_url)
    assert (1, 6, 5) == (report.decisions, report.outcomes, len(report.duplicate_ids))
    assert 6 == len(read_tables(postgres_url).decisions)
    integrity = check_integrity(postgres_url)
    assert (0, 0, 5) == (integrity.duplicates, integrity.broken_links, integrity.gaps)
