"""Never lose a record: queue and sink policies, spill files, and ``ingest`` (exactly once)."""

from __future__ import annotations

import contextlib
import os
import sqlite3
import subprocess
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import orjson
import pytest

import drawledger as dl
from drawledger import _parquet
from drawledger.cli import main
from drawledger.replay.integrity import check_integrity
from drawledger.replay.sources import read_tables

CLOSED_PORT_URL = "postgresql+psycopg://postgres@127.0.0.1:1/test"


def _decide(led: dl.Ledger, n: int, *, outcomes: bool = True, start: int = 0) -> list[str]:
    @led.decision("reminder-delay")
    def reminder_delay(nominal: float, draw: dl.Draw, *, sigma: float = 0.3) -> float:
        return nominal * draw.lognormal(0.0, sigma, name="multiplier")

    ids = []
    for i in range(start, start + n):
        did = f"basket-{i}"
        reminder_delay(30.0, unit=f"shopper-{i % 5}", decision_id=did)
        if outcomes and i % 2 == 0:
            led.outcome(did, "checkout", float(i % 3 == 0))
        ids.append(did)
    return ids


def _lines(path: Path) -> list[bytes]:
    return path.read_bytes().splitlines()


# -- outages -------------------------------------------------------------------------------
def test_unreachable_postgres_spills_everything_and_ingest_restores_it_once(
    tmp_path: Path,
) -> None:
    led = dl.Ledger(CLOSED_PORT_URL, spill_dir=tmp_path / "spill")
    ids = _decide(led, 40)
    led.close()  # the decision calls all returned
    stats = led.stats()
    assert {"recorded": 60, "written": 0, "spilled": 60, "dropped": 0} == {
        k: stats[k] for k in ("recorded", "written", "spilled", "dropped")
    }
    assert 60 == len(_lines(led.spill_path))

    target = tmp_path / "restored.db"
    first = dl.ingest(led.spill_path, target)
    second = dl.ingest(led.spill_path, target)
    assert (40, 20, 0, True) == (first.decisions, first.outcomes, first.already_present, first.ok)
    assert (0, 0, 60) == (second.decisions, second.outcomes, second.already_present)
    tables = read_tables(target)
    assert sorted(ids) == sorted(tables.decisions["decision_id"])
    assert 40 == len(tables.draws)
    report = check_integrity(target)
    assert (True, 40, 20) == (report.ok, report.decisions, report.outcomes)


@contextlib.contextmanager
def _read_only(path: Path) -> Iterator[None]:
    """Make a directory tree read-only, also for root (immutable attribute), then restore it."""
    dirs = [path, *(p for p in path.rglob("*") if p.is_dir())]
    if os.geteuid() != 0:
        for d in dirs:
            d.chmod(0o555)
        yield
        for d in dirs:
            d.chmod(0o755)
        return
    done = subprocess.run(["chattr", "+i", *map(str, dirs)], capture_output=True)
    if done.returncode != 0:
        pytest.skip(f"cannot make a directory read-only as root here: {done.stderr!r}")
    try:
        yield
    finally:
        subprocess.run(["chattr", "-i", *map(str, dirs)], check=True)


def test_read_only_parquet_directory_spills_and_ingest_restores_it_once(tmp_path: Path) -> None:
    root = tmp_path / "ledger"
    _parquet.ParquetSink(str(root)).close()  # the directory and its tables exist
    with _read_only(root):
        led = dl.Ledger(root, format="parquet", spill_dir=tmp_path / "spill")
        ids = _decide(led, 30)
        led.close()
        assert (0, 45) == (led.stats()["written"], led.stats()["spilled"])
        assert [] == _parquet.parts(root, "decisions")
    report = dl.ingest(led.spill_path, root)
    again = dl.ingest(led.spill_path, root)
    assert (30, 15) == (report.decisions, report.outcomes)
    assert 45 == again.already_present
    assert sorted(ids) == sorted(read_tables(root).decisions["decision_id"])
    assert check_integrity(root).ok


def test_sink_back_after_an_outage_leaves_a_gap_that_ingest_closes(tmp_path: Path) -> None:
    """Records spilled during an outage are a gap in the chain until they are ingested."""
    target = tmp_path / "decisions.db"
    led = dl.Ledger(target, spill_dir=tmp_path / "spill")
    healthy = led._writer._open_sink
    led._writer._open_sink = _failing_sink
    _decide(led, 5, outcomes=False)
    led.flush()
    led._writer._open_sink = healthy
    led._writer._down_until = 0.0  # end the cool-down now rather than in a second
    _decide(led, 5, outcomes=False, start=5)
    led.close()
    assert (5, 5) == (led.stats()["spilled"], led.stats()["written"])
    assert 5 == check_integrity(target).gaps
    dl.ingest(led.spill_path, target)
    assert check_integrity(target).ok


def _failing_sink() -> Any:
    raise dl.LedgerError("database is down")


# -- writer policies -------------------------------------------------------------------------
class _SlowSink:
    def __init__(self, inner: Any, delay: float) -> None:
        self.inner, self.delay = inner, delay

    def write(self, *batch: Any) -> None:
        time.sleep(self.delay)
        self.inner.write(*batch)

    def close(self) -> None:
        self.inner.close()


def test_full_queue_blocks_then_spills_and_nothing_is_lost(tmp_path: Path) -> None:
    target = tmp_path / "decisions.db"
    led = dl.Ledger(target, queue_size=4, batch_size=2, block_timeout=0.01,
                    spill_dir=tmp_path / "spill")  # fmt: skip
    opener = led._writer._open_sink
    led._writer._open_sink = lambda: _SlowSink(opener(), 0.05)
    ids = _decide(led, 40, outcomes=False)
    led.close()
    stats = led.stats()
    assert stats["spilled"] > 0
    assert 40 == stats["written"] + stats["spilled"]
    dl.ingest(led.spill_path, target)
    assert sorted(ids) == sorted(read_tables(target).decisions["decision_id"])
    assert check_integrity(target).ok


def test_failing_sink_is_retried_then_spilled(tmp_path: Path) -> None:
    led = dl.Ledger(tmp_path / "x.db", spill_dir=tmp_path / "spill")
    led._writer._open_sink = _failing_sink
    _decide(led, 3, outcomes=False)
    led.close()
    stats = led.stats()
    assert (2, 3, 0) == (stats["retried"], stats["spilled"], stats["written"])


def test_failing_spill_file_keeps_the_thread_alive_and_flush_says_so(tmp_path: Path) -> None:
    blocker = tmp_path / "not-a-dir"
    blocker.write_text("a file where the spill directory should be")
    led = dl.Ledger(tmp_path / "x.db", spill_dir=blocker / "spill")
    healthy = led._writer._open_sink
    led._writer._open_sink = _failing_sink
    _decide(led, 3, outcomes=False)  # the calls still return
    with pytest.raises(dl.LedgerError, match="could neither be written nor spilled"):
        led.flush(timeout=10)
    assert led._writer.running
    assert 3 == led.stats()["queued"]  # kept in memory, retried later
    led._writer._open_sink = healthy
    led._writer._down_until = 0.0
    led._writer.wake()
    led.flush(timeout=10)
    led.close()
    assert (3, 0, 0) == (led.stats()["written"], led.stats()["dropped"], led.stats()["queued"])


def test_queue_full_and_spill_failing_drops_and_counts(tmp_path: Path) -> None:
    blocker = tmp_path / "not-a-dir"
    blocker.write_text("x")
    led = dl.Ledger(tmp_path / "x.db", spill_dir=blocker / "spill", queue_size=2,
                    block_timeout=0.01)  # fmt: skip
    led._writer._open_sink = _failing_sink
    _decide(led, 6, outcomes=False)
    assert led.stats()["dropped"] >= 1
    with pytest.raises(dl.LedgerError):
        led.close()


# -- ingest: bad input ------------------------------------------------------------------------
def _spill_of(tmp_path: Path, n: int = 6) -> Path:
    led = dl.Ledger(CLOSED_PORT_URL, spill_dir=tmp_path / "spill")
    _decide(led, n, outcomes=False)
    led.close()
    return led.spill_path


def test_corrupt_spill_line_is_reported_and_the_rest_loaded(tmp_path: Path) -> None:
    spill = _spill_of(tmp_path)
    lines = _lines(spill)
    lines[2] = lines[2][:40]  # a torn line
    spill.write_bytes(b"\n".join(lines) + b"\n")
    report = dl.ingest(spill, tmp_path / "x.db")
    assert not report.ok
    assert [3] == [n for n, _ in report.malformed]
    assert "not valid JSON" in report.malformed[0][1]
    assert 5 == report.decisions


def test_edited_spill_line_fails_its_hash_check(tmp_path: Path) -> None:
    spill = _spill_of(tmp_path)
    lines = _lines(spill)
    record = orjson.loads(lines[1])
    record["decision"][9] = 0.5  # the propensity
    lines[1] = orjson.dumps(record)
    spill.write_bytes(b"\n".join(lines) + b"\n")
    report = dl.ingest(spill, tmp_path / "x.db")
    assert [2] == [n for n, _ in report.malformed]
    assert "hash does not match" in report.malformed[0][1]
    assert 5 == report.decisions


def test_cli_ingest_exit_codes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spill = _spill_of(tmp_path, 3)
    target = str(tmp_path / "x.db")
    assert 0 == main(["ingest", str(spill), target])
    assert "loaded 3 spilled decisions" in capsys.readouterr().out
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"decision_id": "a"\n')
    assert 2 == main(["ingest", str(bad), target])
    assert "line 1: not valid JSON" in capsys.readouterr().err
    assert 2 == main(["ingest", str(tmp_path / "absent.jsonl"), target])
    assert "no such file" in capsys.readouterr().err
    assert 2 == main(["ingest", str(spill), "nosuchdb://nowhere"])
    err = capsys.readouterr().err
    assert "cannot use ledger URL" in err and "Traceback" not in err


def test_cli_ingest_into_unreachable_database_is_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    spill = _spill_of(tmp_path, 2)
    before = spill.read_bytes()
    assert 2 == main(["ingest", str(spill), CLOSED_PORT_URL])
    assert "cannot open ledger" in capsys.readouterr().err
    assert before == spill.read_bytes()  # nothing consumed


# -- ingest: declared draws --------------------------------------------------------------------
def _declared(**extra: Any) -> dict[str, Any]:
    line = {"decision_id": "legacy-1", "stream": "free-delivery", "unit": "shopper-3",
            "ts": 1_767_225_600.0, "kind": "bernoulli", "args": {"p": 0.2}, "value": True,
            "prob": 0.2}  # fmt: skip
    line.update(extra)
    return line


def test_declared_draws_are_recorded_and_loaded_once(tmp_path: Path) -> None:
    path = tmp_path / "legacy.jsonl"
    lines = [_declared(), _declared(decision_id="legacy-2", value=False, prob=0.8, u=[0.91])]
    path.write_bytes(b"".join(orjson.dumps(x) + b"\n" for x in lines))
    target = tmp_path / "x.db"
    first = dl.ingest(path, target)
    second = dl.ingest(path, target)
    assert (2, True) == (first.declared, first.ok)
    assert (0, 2) == (second.declared, second.already_present)
    tables = read_tables(target)
    assert ["legacy-1", "legacy-2"] == sorted(tables.decisions["decision_id"])
    row = tables.draws.set_index("decision_id").loc["legacy-2"]
    assert ("bernoulli", '{"p":0.2}', "[0.91]", "false", 0.8) == (
        row["kind"], row["args"], row["u"], row["value"], row["prob"])  # fmt: skip
    decision = tables.decisions.set_index("decision_id").loc["legacy-1"]
    assert (1_767_225_600.0, "shopper-3", 0.2) == (
        decision["ts"], decision["unit"], decision["propensity"])  # fmt: skip
    assert check_integrity(target).ok


@pytest.mark.parametrize(
    ("line", "reason"),
    [
        (_declared(prob=1.5), "exceeds 1"),
        (_declared(kind="coinflip"), "unknown kind"),
        (_declared(probability=0.2), "unknown field probability"),
        ({"stream": "free-delivery"}, "without decision_id, ts, kind, args, value, prob"),
        (_declared(ts="yesterday"), "ts must be a finite number"),
        (_declared(u=[1.5]), "strictly between 0 and 1"),
        (_declared(args=[0.2]), "args must be an object"),
        ([1, 2], "not a JSON object"),
        ({"outcome": [1, 2]}, "list of 8 values"),
    ],
)
def test_bad_declared_or_spill_lines_name_the_problem(tmp_path: Path, line: Any,
                                                      reason: str) -> None:  # fmt: skip
    path = tmp_path / "in.jsonl"
    good = _declared(decision_id="legacy-ok")
    path.write_bytes(orjson.dumps(good) + b"\n" + orjson.dumps(line) + b"\n")
    report = dl.ingest(path, tmp_path / "x.db")
    assert 1 == len(report.malformed)
    number, message = report.malformed[0]
    assert 2 == number
    assert reason in message
    assert 1 == report.declared  # the good line is loaded


def test_ingest_into_a_given_ledger_uses_its_key(tmp_path: Path) -> None:
    key = b"k" * 16
    source = dl.Ledger(CLOSED_PORT_URL, spill_dir=tmp_path / "spill", integrity_key=key)
    _decide(source, 3, outcomes=False)
    source.close()
    target = dl.Ledger(tmp_path / "keyed.db", integrity_key=key)
    report = dl.ingest(source.spill_path, target)
    target.close()
    assert (3, True) == (report.decisions, report.ok)
    assert check_integrity(tmp_path / "keyed.db", integrity_key=key).ok
    unkeyed = dl.ingest(source.spill_path, tmp_path / "plain.db")
    assert 3 == len(unkeyed.malformed)  # wrong key: every line fails its hash check


def test_ingest_while_the_app_keeps_recording(tmp_path: Path) -> None:
    """Loading a spill file into a ledger that a live writer uses at the same time."""
    spill = _spill_of(tmp_path, 20)
    target = tmp_path / "live.db"
    live = dl.Ledger(target)
    stop = threading.Event()

    def keep_recording() -> None:
        i = 0
        while not stop.is_set():
            live.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5,
                             decision_id=f"live-{i}")  # fmt: skip
            i += 1
            time.sleep(0.001)

    thread = threading.Thread(target=keep_recording)
    thread.start()
    report = dl.ingest(spill, target)
    stop.set()
    thread.join()
    live.close()
    assert 20 == report.decisions
    assert check_integrity(target).ok


def test_operations_doc_python_blocks_run(run_markdown: Callable[..., Any]) -> None:
    """docs/operations.md runs as written: its ```python blocks, in order, in a new interpreter."""
    done = run_markdown("docs/operations.md")
    assert 0 == done.returncode, done.stderr
    assert "'written': 1" in done.stdout
    assert "## Scaling" in (Path(__file__).parents[1] / "docs" / "operations.md").read_text(
        encoding="utf-8"
    )


def test_wrong_url_is_a_clear_error_at_once(tmp_path: Path) -> None:
    with pytest.raises(dl.LedgerError, match="cannot use ledger URL 'nosuchdb://x'"):
        dl.Ledger("nosuchdb://x")
    with pytest.raises(dl.LedgerError, match="cannot use ledger URL"):
        read_tables("nosuchdb://x")


def test_cli_ingest_into_a_foreign_database_is_exit_2_and_leaves_it_alone(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A database whose decisions table is not a ledger's: a one-line error, no changes."""
    spill = _spill_of(tmp_path, 2)
    foreign = tmp_path / "orders.db"
    with sqlite3.connect(foreign) as conn:
        conn.execute("CREATE TABLE decisions (order_id TEXT, total REAL)")
        conn.execute("INSERT INTO decisions VALUES ('o-1', 12.5)")
    assert 2 == main(["ingest", str(spill), str(foreign)])
    err = capsys.readouterr().err
    assert "is not a drawledger ledger: its table decisions has no column" in err
    assert 1 == len(err.strip().splitlines())
    with sqlite3.connect(foreign) as conn:
        assert [("o-1", 12.5)] == conn.execute("SELECT * FROM decisions").fetchall()


@pytest.mark.parametrize("ts", [float("nan"), float("inf"), "yesterday"])
def test_bad_timestamp_is_refused_at_the_call_not_in_the_batch(ledger_path: Path, ts: Any) -> None:
    """A record the database would refuse must not take its batch into the spill file."""
    led = dl.Ledger(ledger_path)
    led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, decision_id="ok-1")
    with pytest.raises(dl.NotSerializableError, match="ts must be a finite number"):
        led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, ts=ts)
    with pytest.raises(dl.NotSerializableError, match="ts must be a finite number"):
        led.outcome("ok-1", "checkout", 1.0, ts=ts)
    led.close()
    assert (1, 0) == (led.stats()["written"], led.stats()["spilled"])
    assert check_integrity(ledger_path).ok


def test_nul_characters_are_refused_at_the_call_and_at_ingest(tmp_path: Path) -> None:
    """PostgreSQL text cannot hold NUL: refused before it could fail a whole batch."""
    led = dl.Ledger(tmp_path / "x.db")
    with pytest.raises(dl.NotSerializableError, match="NUL character"):
        led.record_draw("free\x00delivery", "bernoulli", {"p": 0.5}, True, 0.5)
    with pytest.raises(dl.NotSerializableError, match="NUL character"):
        led.outcome("basket-1", "check\x00out", 1.0)
    led.close()
    path = tmp_path / "in.jsonl"
    path.write_bytes(orjson.dumps(_declared(unit="shopper\x00")) + b"\n")
    report = dl.ingest(path, tmp_path / "x.db")
    assert [1] == [n for n, _ in report.malformed]
    assert "NUL character" in report.malformed[0][1]


def test_lone_surrogates_are_refused_at_the_call_and_the_rest_is_written(tmp_path: Path) -> None:
    """A lone surrogate is no UTF-8 text: refused when recorded, before the writer hashes it."""
    target = tmp_path / "x.db"
    led = dl.Ledger(target)

    @led.decision("free-delivery")
    def offer(draw: dl.Draw) -> bool:
        return draw.bernoulli(0.5, name="free\ud800")

    led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, decision_id="ok-1")
    with pytest.raises(dl.NotSerializableError, match="lone surrogate"):
        led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, unit="s\udfff")
    with pytest.raises(dl.NotSerializableError, match="lone surrogate"):
        offer()
    with pytest.raises(dl.NotSerializableError, match="lone surrogate"):
        led.outcome("ok-1", "check\ud800out", 1.0)
    led.outcome("ok-1", "checkout", 1.0)
    led.close()
    assert (2, 0, 0) == (led.stats()["written"], led.stats()["spilled"], led.stats()["dropped"])
    assert check_integrity(target).ok


def test_cli_ingest_json_dash_writes_the_report_alone_on_stdout(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    spill = _spill_of(tmp_path, 3)
    assert 0 == main(["ingest", str(spill), str(tmp_path / "x.db"), "--json", "-"])
    out, err = capsys.readouterr()
    assert 3 == orjson.loads(out)["decisions"]
    assert "loaded 3 spilled decisions" in err
