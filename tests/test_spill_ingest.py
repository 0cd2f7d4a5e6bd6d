"""Never lose a record: queue and sink policies, spill files, and ``ingest`` (exactly once)."""

from __future__ import annotations

import contextlib
import errno
import functools
import os
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

import drawledger as dl
from drawledger import _parquet
from drawledger.cli import main
from drawledger.replay import code_versions
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
    records = [x for x in _lines(led.spill_path) if not x.startswith(b'{"code_version"')]
    assert 60 == len(records)

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


def test_a_spilled_code_version_is_restored_by_ingest(tmp_path: Path) -> None:
    """The source of the version that made spilled decisions travels in the spill file too."""
    led = dl.Ledger(CLOSED_PORT_URL, spill_dir=tmp_path / "spill")
    _decide(led, 5, outcomes=False)
    led.close()
    lines = [orjson.loads(x) for x in _lines(led.spill_path)]
    (version,) = [x["code_version"] for x in lines if "code_version" in x]
    assert "reminder_delay" in version[2] and "draw.lognormal" in version[4]
    target = tmp_path / "restored.db"
    assert dl.ingest(led.spill_path, target).ok
    (stored,) = code_versions(target).versions
    assert (5, True) == (stored.decisions, stored.source_ok)


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


# -- a full disk under the spill file --------------------------------------------------------
class _FullDisk:
    """``os.write`` on a disk with ``room`` bytes left for files under ``folder``.

    A write that does not fit writes what fits (a short write) and the next one fails with
    ENOSPC, as write(2) does on a full disk.
    """

    def __init__(self, folder: Path, room: int) -> None:
        self.folder = str(folder)
        self.room = room
        self.real = os.write

    def __call__(self, fd: int, data: Any) -> int:
        try:
            name = os.readlink(f"/proc/self/fd/{fd}")
        except OSError:
            name = ""
        if not name.startswith(self.folder):
            return self.real(fd, data)
        if self.room <= 0:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        n = self.real(fd, bytes(data[: self.room]))
        self.room -= n
        return n


def _spilling_ledger(tmp_path: Path, **kwargs: Any) -> dl.Ledger:
    led = dl.Ledger(tmp_path / "x.db", spill_dir=tmp_path / "spill", **kwargs)
    led._writer._open_sink = _failing_sink
    return led


def test_full_disk_spill_counts_only_whole_lines_and_leaves_no_torn_line(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A short write then ENOSPC: the batch is cut back off the file and stays queued."""
    disk = _FullDisk(tmp_path / "spill", room=2_500)  # a few records, then mid-line
    monkeypatch.setattr(os, "write", disk)
    led = _spilling_ledger(tmp_path, batch_size=3)
    _decide(led, 40, outcomes=False)
    with pytest.raises(dl.LedgerError, match="could neither be written nor spilled"):
        led.flush(timeout=30)
    data = led.spill_path.read_bytes()
    assert data.endswith(b"\n")
    lines = data.splitlines()
    assert all(isinstance(orjson.loads(line), dict) for line in lines)
    records = [line for line in lines if "code_version" not in orjson.loads(line)]
    stats = led.stats()
    assert len(records) == stats["spilled"]  # code version lines are not records
    assert stats["spill_errors"] >= 1
    assert 40 == stats["spilled"] + stats["queued"]
    disk.room = 10**9  # space freed
    led.flush(timeout=30)
    led.close()
    assert (40, 0, 0) == (led.stats()["spilled"], led.stats()["queued"], led.stats()["dropped"])
    report = dl.ingest(led.spill_path, tmp_path / "restored.db")
    assert (40, True) == (report.decisions, report.ok)
    assert check_integrity(tmp_path / "restored.db").ok


def test_spill_write_cut_short_that_cannot_be_truncated_starts_the_next_on_a_new_line(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """When the fragment cannot be cut back, the next batch still starts a line of its own."""
    disk = _FullDisk(tmp_path / "spill", room=700)
    monkeypatch.setattr(os, "write", disk)

    def no_truncate(fd: int, length: int) -> None:
        raise OSError(errno.EIO, os.strerror(errno.EIO))

    monkeypatch.setattr(os, "ftruncate", no_truncate)
    led = _spilling_ledger(tmp_path, batch_size=4)
    _decide(led, 8, outcomes=False)
    with pytest.raises(dl.LedgerError):
        led.flush(timeout=30)
    disk.room = 10**9
    led.close()
    assert (8, 0) == (led.stats()["spilled"], led.stats()["dropped"])
    report = dl.ingest(led.spill_path, tmp_path / "restored.db")
    assert 8 == report.decisions
    assert 1 == len(report.malformed)
    assert "torn line" in report.malformed[0][1]


def test_full_disk_errors_are_logged_at_most_once_a_minute(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    """Hundreds of dropped records make a handful of log lines, and the counters say the rest."""
    disk = _FullDisk(tmp_path / "spill", room=0)
    monkeypatch.setattr(os, "write", disk)
    led = _spilling_ledger(tmp_path, queue_size=2, block_timeout=0.001)
    with caplog.at_level("WARNING", logger="drawledger"):
        _decide(led, 300, outcomes=False)
        with contextlib.suppress(dl.LedgerError):
            led.close()
    stats = led.stats()
    assert stats["dropped"] >= 250
    assert stats["spill_errors"] >= stats["dropped"] - 2
    assert len(caplog.records) <= 6, [r.getMessage() for r in caplog.records]


# -- ingest: torn lines ------------------------------------------------------------------------
def test_ingest_recovers_a_record_glued_to_a_torn_line(tmp_path: Path) -> None:
    spill = _spill_of(tmp_path)
    lines = _lines(spill)
    glued = lines[1][:50] + lines[2]  # a cut write, then the next record on the same line
    spill.write_bytes(b"\n".join([lines[0], glued, *lines[3:]]) + b"\n")
    report = dl.ingest(spill, tmp_path / "x.db")
    assert 5 == report.decisions
    assert [2] == [n for n, _ in report.malformed]
    assert "torn line" in report.malformed[0][1]


def test_ingest_skips_a_torn_last_line_and_says_so(tmp_path: Path) -> None:
    """A cut last line is a write that never finished: never counted as spilled, so ok."""
    spill = _spill_of(tmp_path)
    lines = _lines(spill)
    spill.write_bytes(b"\n".join([*lines[:5], lines[5][:60]]))
    report = dl.ingest(spill, tmp_path / "x.db")
    assert (5, [6], [], True) == (report.decisions, report.torn, report.malformed, report.ok)
    assert "torn" in report.render().splitlines()[0]


_SPILLED: dict[str, bytes] = {}


def _non_ascii_spill(tmp_path: Path) -> bytes:
    """Spill lines (made once) whose units hold two-byte characters, so a cut can split one."""
    if "lines" not in _SPILLED:
        led = dl.Ledger(CLOSED_PORT_URL, spill_dir=tmp_path / "made")
        led.outcome("b-0", "checkout", 1.0)
        unit = "shopper-" + "\u00fc\u00e9" * 60
        for i in range(3):
            led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5,
                            unit=unit, decision_id=f"b-{i}")  # fmt: skip
        led.close()
        _SPILLED["lines"] = led.spill_path.read_bytes()
    return _SPILLED["lines"]


@settings(max_examples=25, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])  # fmt: skip
@given(cut=st.floats(min_value=0.0, max_value=0.999))
def test_any_cut_of_the_last_line_is_skipped_as_torn_and_the_rest_loaded(
    tmp_path: Path, cut: float
) -> None:
    data = _non_ascii_spill(tmp_path)
    body, last = data[:-1].rsplit(b"\n", 1)
    keep = 12 + int(cut * (len(last) - 12))  # at least the record's opening, never all of it
    case = tmp_path / uuid.uuid4().hex
    case.mkdir()
    spill = case / "spill.jsonl"
    spill.write_bytes(body + b"\n" + last[:keep])
    report = dl.ingest(spill, case / "x.db")
    assert ([4], [], True) == (report.torn, report.malformed, report.ok)
    assert 3 == report.decisions + report.outcomes


# -- flush and close return ------------------------------------------------------------------
def test_flush_raises_when_spilling_fails_with_several_batches_queued(tmp_path: Path) -> None:
    blocker = tmp_path / "not-a-dir"
    blocker.write_text("x")
    led = dl.Ledger(tmp_path / "x.db", spill_dir=blocker / "spill", batch_size=2)
    led._writer._open_sink = _failing_sink
    _decide(led, 7, outcomes=False)
    for _ in range(2):  # a second flush during the cool-down raises as well
        with pytest.raises(dl.LedgerError, match="could neither be written nor spilled"):
            led.flush(timeout=20)
    assert 7 == led.stats()["queued"]
    with pytest.raises(dl.LedgerError):
        led.close()
    assert (7, 0) == (led.stats()["dropped"], led.stats()["queued"])


EXIT_WITH_FAILING_SPILL = """
import sys
import drawledger as dl

led = dl.Ledger(sys.argv[1], spill_dir=sys.argv[2], batch_size=2)
for i in range(9):
    led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, decision_id=f"b-{i}")
print("recorded", flush=True)
"""


def test_interpreter_exit_returns_when_neither_sink_nor_spill_takes_the_records(
    tmp_path: Path,
) -> None:
    blocker = tmp_path / "not-a-dir"
    blocker.write_text("x")
    proc = subprocess.run(
        [sys.executable, "-c", EXIT_WITH_FAILING_SPILL, CLOSED_PORT_URL, str(blocker / "spill")],
        capture_output=True, text=True, timeout=120,
    )  # fmt: skip
    assert (0, "recorded\n") == (proc.returncode, proc.stdout)
    assert "dropped" in proc.stderr


class _StuckSink:
    """A sink whose write hangs until ``go`` is set (a database that stopped answering)."""

    def __init__(self, inner: Any, go: threading.Event) -> None:
        self.inner, self.go = inner, go

    def write(self, *batch: Any) -> None:
        self.go.wait()
        self.inner.write(*batch)

    def close(self) -> None:
        self.inner.close()


def test_close_with_a_timeout_returns_and_spills_what_a_stuck_sink_left_queued(
    tmp_path: Path,
) -> None:
    target = tmp_path / "x.db"
    led = dl.Ledger(target, batch_size=1, spill_dir=tmp_path / "spill")
    go = threading.Event()
    opener = led._writer._open_sink
    led._writer._open_sink = lambda: _StuckSink(opener(), go)
    _decide(led, 5, outcomes=False)
    with pytest.raises(dl.LedgerError, match="timed out"):
        led.close(timeout=0.5)
    assert 4 == led.stats()["spilled"]  # the fifth is the batch the stuck write holds
    go.set()
    led._writer.stop(timeout=10)
    assert (1, 0, 0) == (led.stats()["written"], led.stats()["queued"], led.stats()["dropped"])
    dl.ingest(led.spill_path, target)
    assert check_integrity(target).ok


@pytest.mark.parametrize(
    ("u", "problem"),
    [
        ([1.5], r"u\[0\] is 1.5, not a number strictly between 0 and 1"),
        ([0.25, 0.0], r"u\[1\] is 0.0"),
        ([-0.5], r"u\[0\] is -0.5"),
        ([float("nan")], r"u\[0\] is nan"),
        ([True], r"u\[0\] is True"),
        (["0.5"], r"u\[0\] is '0.5'"),
        (0.5, "u must be a list of uniforms"),
        ("0.5", "u must be a list of uniforms"),
    ],
)
def test_record_draw_refuses_uniforms_that_ingest_would_refuse(
    ledger_path: Path, u: Any, problem: str
) -> None:
    """Declared uniforms lie strictly between 0 and 1 (as ingest requires): others are refused
    at the call with a DrawArgumentError naming the entry, and nothing is recorded."""
    led = dl.Ledger(ledger_path)
    with pytest.raises(dl.DrawArgumentError, match=problem):
        led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, u=u)
    led.record_draw("free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, u=(0.25,))
    led.close()
    assert (1, 1) == (led.stats()["recorded"], led.stats()["written"])
    assert ["[0.25]"] == list(read_tables(ledger_path).draws["u"])


# -- ingest: numbers out of range, conflicts --------------------------------------------------
def _resealed(line: bytes, **changes: Any) -> bytes:
    """A spilled decision with some columns changed and its (unkeyed) hash recomputed, as
    someone without an integrity key can do."""
    from drawledger._records import DECISION_COLUMNS, decision_hash

    record = orjson.loads(line)
    row = record["decision"]
    for column, value in changes.items():
        row[DECISION_COLUMNS.index(column)] = value
    row[-1] = decision_hash(tuple(row[:-1]), [tuple(d) for d in record["draws"]])
    return orjson.dumps(record)


@pytest.mark.parametrize("seq", [2**63, 2**64 - 1])
def test_an_out_of_range_number_skips_its_line_not_the_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], seq: int
) -> None:
    """seq 2**63 does not fit a 64-bit integer column: that line is malformed, the others load
    (the database used to refuse the whole batch and stop the file)."""
    spill = _spill_of(tmp_path, 6)
    lines = _lines(spill)
    lines[3] = _resealed(lines[3], seq=seq)
    spill.write_bytes(b"\n".join(lines) + b"\n")
    target = tmp_path / "x.db"
    report = dl.ingest(spill, target)
    assert [4] == [n for n, _ in report.malformed]
    assert "seq must be" in report.malformed[0][1]
    assert 5 == report.decisions
    assert 2 == main(["ingest", str(spill), str(target)])
    err = capsys.readouterr().err
    assert "line 4" in err and "Traceback" not in err


@functools.cache
def _three_spilled_lines() -> tuple[bytes, ...]:
    """Three spilled decisions, made once for the property below."""
    with tempfile.TemporaryDirectory() as folder:
        return tuple(_lines(_spill_of(Path(folder), 3)))


@settings(
    max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(column=st.sampled_from(["seq", "idx"]), value=st.integers(-(2**63), 2**64 - 1))
@example(column="seq", value=2**63)  # the first that no 64-bit column holds
@example(column="idx", value=2**31)  # the first that PostgreSQL's INTEGER does not hold
def test_any_integer_in_an_integer_column_is_loaded_or_skipped_never_stops_the_file(
    tmp_path: Path, column: str, value: int
) -> None:
    """Whatever integer a spilled line carries (hash recomputed to match it), ingest loads it
    or reports that line (malformed; conflicting when it takes another record's seq); it never
    stops the file, and the other lines always load."""
    from drawledger._records import DRAW_COLUMNS

    folder = Path(tempfile.mkdtemp(dir=tmp_path))  # one per example
    lines = list(_three_spilled_lines())
    if column == "seq":
        lines[1] = _resealed(lines[1], seq=value)
    else:
        record = orjson.loads(lines[1])
        record["draws"][0][DRAW_COLUMNS.index("idx")] = value
        lines[1] = _resealed(orjson.dumps(record))
    path = folder / "in.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    report = dl.ingest(path, folder / "x.db")
    assert 3 == report.decisions + len(report.malformed) + len(report.conflicting)
    assert [] == [n for n, _ in report.malformed + report.conflicting if n != 2]
    if not 0 <= value < 2 ** (63 if column == "seq" else 31):
        assert 1 == len(report.malformed)


def test_a_spilled_draw_with_is_density_other_than_0_or_1_is_malformed(tmp_path: Path) -> None:
    """The hash covers is_density as true/false, so 5 would pass it and be stored as 5."""
    spill = _spill_of(tmp_path, 3)
    lines = _lines(spill)
    record = orjson.loads(lines[1])
    record["draws"][0][-1] = 5
    lines[1] = orjson.dumps(record)
    spill.write_bytes(b"\n".join(lines) + b"\n")
    report = dl.ingest(spill, tmp_path / "x.db")
    assert [2] == [n for n, _ in report.malformed]
    assert "is_density other than 0 or 1" in report.malformed[0][1]
    assert 2 == report.decisions


def test_a_spilled_record_that_differs_from_the_stored_one_is_a_conflict(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Same writer and seq as a stored record, other content (and a hash that matches it): not
    "already in the ledger" but a conflict (tampering or a bug), counted, shown first, exit 1."""
    spill = _spill_of(tmp_path, 4)
    target = tmp_path / "x.db"
    assert dl.ingest(spill, target).ok
    lines = _lines(spill)
    lines[2] = _resealed(lines[2], propensity=0.5)
    altered = tmp_path / "altered.jsonl"
    altered.write_bytes(b"\n".join(lines) + b"\n")
    report = dl.ingest(altered, target)
    assert (3, 0, False) == (report.already_present, report.decisions, report.ok)
    assert [3] == [n for n, _ in report.conflicting]
    assert "differs from the stored record" in report.conflicting[0][1]
    assert 1 == len(report.to_dict()["conflicting"])
    assert report.render().startswith("CONFLICT")
    assert 1 == main(["ingest", str(altered), str(target)])
    err = capsys.readouterr().err
    assert "1 conflicting" in err and "line 3" in err
    assert 1 == len(err.strip().splitlines())
    stored = read_tables(target).decisions
    assert 0.5 not in set(stored["propensity"])  # the stored record is left as it was


@pytest.mark.parametrize("fmt", [None, "parquet"])
def test_ingest_refuses_a_decision_id_already_in_the_ledger_under_another_record(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], fmt: str | None
) -> None:
    """A spilled decision or a declared draw reusing a stored decision id (another writer, or
    another stream) is refused, counted and shown: ids are unique per ledger. The refused
    spilled record's seq stays a gap in its writer's chain, so integrity keeps saying so."""
    target = tmp_path / ("ledger" if fmt else "x.db")
    live = dl.Ledger(target, format=fmt)
    _decide(live, 1, outcomes=False)  # basket-0, by this writer
    live.record_draw("free-delivery", "bernoulli", {"p": 0.2}, True, 0.2, decision_id="legacy-1")
    live.close()
    spill = _spill_of(tmp_path, 3)  # basket-0, basket-1, basket-2 by another writer
    report = dl.ingest(spill, target)
    assert (2, False) == (report.decisions, report.ok)
    assert [1] == [n for n, _ in report.duplicate_ids]
    assert "'basket-0' is already in the ledger" in report.duplicate_ids[0][1]
    declared = tmp_path / "declared.jsonl"
    declared.write_bytes(orjson.dumps(_declared(decision_id="basket-1")) + b"\n"
                         + orjson.dumps(_declared(decision_id="legacy-1")) + b"\n")  # fmt: skip
    second = dl.ingest(declared, target)
    assert (0, 1) == (second.declared, second.already_present)  # legacy-1: same stream
    assert [1] == [n for n, _ in second.duplicate_ids]  # basket-1: stream reminder-delay
    assert 1 == main(["ingest", str(spill), str(target)])
    assert "1 records refused for a decision id already in the ledger" in capsys.readouterr().err
    tables = read_tables(target)
    assert 1 == int((tables.decisions["decision_id"] == "basket-0").sum())
    integrity = check_integrity(target)
    assert (0, 1) == (integrity.duplicates, integrity.gaps)


# -- decision ids already in the ledger ---------------------------------------------------------
def test_a_decision_id_stored_by_another_writer_is_rejected_and_the_batch_written(
    tmp_path: Path,
) -> None:
    """Another process (another writer) already stored the id, or this ledger forgot it
    (recent_ids): the writer leaves that decision out of its chain and out of the ledger,
    counts it in ``rejected`` and keeps it in the reject file; the rest of the batch is
    written and the integrity check finds nothing wrong."""
    target = tmp_path / "x.db"
    first = dl.Ledger(target)
    _decide(first, 2, outcomes=False)  # basket-0, basket-1
    first.close()
    second = dl.Ledger(target, recent_ids=2, batch_size=100)
    ids = _decide(second, 6, outcomes=False)  # basket-0 .. basket-5: two already stored
    second.record_draw(
        "free-delivery", "bernoulli", {"p": 0.5}, True, 0.5, decision_id="basket-2"
    )  # forgotten by recent_ids=2, seen by the writer
    second.outcome("basket-0", "checkout", 1.0)  # outcomes find the stored decision
    second.close()
    stats = second.stats()
    assert {"recorded": 8, "written": 5, "rejected": 3, "spilled": 0, "dropped": 0} == {
        k: stats[k] for k in ("recorded", "written", "rejected", "spilled", "dropped")
    }
    rejected = [orjson.loads(line) for line in _lines(second.reject_path)]
    assert ["basket-0", "basket-1", "basket-2"] == [r["decision"][0] for r in rejected]
    assert {"decision id already in the ledger"} == {r["rejected"] for r in rejected}
    assert sorted(ids) == sorted(read_tables(target).decisions["decision_id"])
    report = check_integrity(target)
    assert (True, 0, 0, 6) == (report.ok, report.duplicates, report.gaps, report.decisions)
    again = dl.ingest(second.reject_path, target)  # a reject file is not a spill file
    assert [1, 2, 3] == [n for n, _ in again.malformed]
    assert "refused by its writer" in again.malformed[0][1]


@pytest.mark.parametrize("prob", [10**400, float("inf"), float("nan"), -0.5, True, "0.05"])
def test_record_draw_refuses_a_probability_that_is_not_a_finite_number(
    ledger_path: Path, prob: Any
) -> None:
    """Also an integer too large for a float (it used to escape as a raw OverflowError)."""
    led = dl.Ledger(ledger_path)
    with pytest.raises(dl.DrawArgumentError, match="prob must be a finite number >= 0"):
        led.record_draw("slot-delay", "uniform", {"low": 10.0, "high": 30.0}, 20.0, prob)
    led.record_draw("slot-delay", "uniform", {"low": 10.0, "high": 30.0}, 20.0, np.float32(0.05))
    led.close()
    assert (1, 1) == (led.stats()["recorded"], led.stats()["written"])


def test_a_declared_draw_the_writer_rejects_during_ingest_is_not_counted_as_loaded(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Another process stores the id between ingest's look-up and the write: the writer rejects
    the declared draw, and the report says so instead of counting it as loaded."""
    from drawledger import _sinks

    target = tmp_path / "x.db"
    other = dl.Ledger(target)
    other.record_draw("free-delivery", "bernoulli", {"p": 0.2}, True, 0.2, decision_id="legacy-1")
    other.close()
    led = dl.Ledger(target)
    led.record_draw("free-delivery", "bernoulli", {"p": 0.2}, True, 0.2, decision_id="own-1")
    led.flush()  # its writer has its sink open: only ingest's own sink is patched below

    class Blind(_sinks.SqlSink):
        def stored_ids(self, ids: list[str]) -> dict[str, str]:
            return {}  # as if the other process had not committed yet

    monkeypatch.setattr(_sinks, "open_sink", lambda target, *a, **k: Blind(f"sqlite:///{target}"))
    path = tmp_path / "declared.jsonl"
    path.write_bytes(orjson.dumps(_declared(decision_id="legacy-1")) + b"\n")
    report = dl.ingest(path, led)
    led.close()
    assert (0, 1, False) == (report.declared, report.rejected, report.ok)
    assert "1 declared draw refused by the writer" in report.render()
    assert 1 == int((read_tables(target).decisions["decision_id"] == "legacy-1").sum())


def test_cli_ingest_json_dash_writes_the_report_alone_on_stdout(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    spill = _spill_of(tmp_path, 3)
    assert 0 == main(["ingest", str(spill), str(tmp_path / "x.db"), "--json", "-"])
    out, err = capsys.readouterr()
    assert 3 == orjson.loads(out)["decisions"]
    assert "loaded 3 spilled decisions" in err


# -- async services ------------------------------------------------------------------------------
class _StuckSink:
    """A sink whose writes wait until ``release`` is set: a database that stalls."""

    def __init__(self, inner: Any, release: threading.Event) -> None:
        self.inner, self.release = inner, release

    def write(self, *batch: Any) -> None:
        self.release.wait()
        self.inner.write(*batch)

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)


@pytest.mark.parametrize("block_timeout", [0, 0.05])
def test_async_handlers_never_wait_for_a_stalled_sink_with_block_timeout_0(
    tmp_path: Path, block_timeout: float
) -> None:
    """With block_timeout=0 a decision called from an async handler never waits for room in
    the queue: while the database stalls, 60 requests to a FastAPI app (in the event loop, via
    httpx's ASGI transport) all complete, the overflow is spilled, and nothing is lost. With a
    waiting policy the first call past the full queue holds the event loop (``waited``)."""
    import asyncio

    import httpx
    from fastapi import FastAPI

    target = tmp_path / "decisions.db"
    release = threading.Event()
    led = dl.Ledger(target, queue_size=4, batch_size=2, block_timeout=block_timeout,
                    spill_dir=tmp_path / "spill")  # fmt: skip
    opener = led._writer._open_sink
    led._writer._open_sink = lambda: _StuckSink(opener(), release)

    @led.decision("reminder-delay")
    def reminder(nominal: float, draw: dl.Draw) -> float:
        return nominal * draw.lognormal(0.0, 0.3, name="multiplier")

    app = FastAPI()

    @app.get("/reminder/{order}")
    async def handler(order: str) -> dict[str, float]:
        return {"minutes": reminder(30.0, decision_id=order)}

    async def requests() -> list[int]:
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://shop") as client:
            calls = [client.get(f"/reminder/order-{i}") for i in range(60)]
            answers = await asyncio.wait_for(asyncio.gather(*calls), timeout=120)  # a guard
        return [r.status_code for r in answers]

    try:
        assert [200] * 60 == asyncio.run(requests())  # the sink is still stalled here
        waited = led.stats()["waited"]
        assert (block_timeout > 0, True) == (waited > 0, led.stats()["spilled"] > 0)
    finally:
        release.set()
    led.close()
    stats = led.stats()
    assert 60 == stats["written"] + stats["spilled"]
    dl.ingest(led.spill_path, target)
    assert check_integrity(target).ok


@pytest.mark.parametrize("bad", [-1, float("nan"), float("inf")])
def test_block_timeout_must_be_a_number_of_seconds_at_least_0(tmp_path: Path, bad: float) -> None:
    with pytest.raises(ValueError, match="block_timeout must be a number of seconds >= 0"):
        dl.Ledger(tmp_path / "x.db", block_timeout=bad)
