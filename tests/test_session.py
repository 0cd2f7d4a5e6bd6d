"""``drawledger.replay.open``: the ledger handle carries its settings to every analysis."""

from __future__ import annotations

import re
import shutil
import sqlite3
from pathlib import Path
from typing import Any

import estimate_shop as shop
import pytest

import drawledger as dl
import drawledger.replay as replay
from drawledger.exceptions import EstimateRefusedError, LedgerError, ReplayError
from drawledger.replay import AuditReport, VerifyReport

N = 60


@pytest.fixture(scope="module")
def cards(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """60 recipe-card decisions with seeded draws and checkout outcomes."""
    path = tmp_path_factory.mktemp("session") / "cards.db"
    led = dl.Ledger(path)
    shop.simulate_cards(led, N, seed=3)
    led.close()
    return path


class Recorder:
    """Stands in for a public function: keeps the keywords of each call, returns ``result``."""

    def __init__(self, result: Any = None) -> None:
        self.calls: list[tuple[tuple[Any, ...], dict[str, Any]]] = []
        self.result = result

    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        self.calls.append((args, kwargs))
        return self.result


SETTINGS: dict[str, Any] = {
    "format": "sqlite",
    "path": ("code",),
    "allow": ("shop",),
    "integrity_key": b"k",
    "engine": "dask",
    "scheduler": "tcp://127.0.0.1:8786",
    "jobs": 3,
    "progress": True,
}


def _handle() -> replay.LedgerHandle:
    return replay.open("cards.db", **SETTINGS)


def test_handle_verify_gives_the_functions_report(cards):
    assert verify_dict(replay.verify(cards)) == verify_dict(replay.open(cards).verify())


def verify_dict(report: VerifyReport) -> dict[str, Any]:
    return {**report.to_dict(), "rows": report.rows.to_dict("list")}


def test_handle_estimate_gives_the_functions_report(cards):
    plain = replay.estimate(cards, reward="checkout", overrides={"temperature": 0.3}, jobs=2)
    handle = replay.open(str(cards), jobs=2).estimate("checkout", overrides={"temperature": 0.3})
    assert plain.to_dict() == handle.to_dict()


def test_handle_sweep_gives_the_functions_report(cards):
    plain = replay.sweep(cards, reward="checkout", param="temperature", values=[0.3, 1.0])
    handle = replay.open(cards).sweep("checkout", "temperature", [0.3, 1.0])
    assert plain.to_dict() == handle.to_dict()


def test_verify_estimate_and_sweep_receive_every_setting(monkeypatch):
    monkeypatch.setattr("drawledger.replay._handle.verify", verify := Recorder())
    monkeypatch.setattr("drawledger.replay._handle.estimate", estimate := Recorder())
    monkeypatch.setattr("drawledger.replay._handle.sweep", sweep := Recorder())
    h = _handle()
    h.verify(budget=10)
    h.estimate("checkout", level=0.9)
    h.sweep("checkout", "temperature", [0.3])
    assert (("cards.db",), {**SETTINGS, "budget": 10}) == verify.calls[0]
    assert {**SETTINGS, "reward": "checkout", "level": 0.9} == estimate.calls[0][1]
    assert {**SETTINGS, "reward": "checkout", "param": "temperature",
            "values": [0.3]} == sweep.calls[0][1]  # fmt: skip


def test_audit_and_integrity_receive_the_settings_they_take(monkeypatch):
    monkeypatch.setattr("drawledger.replay._handle.audit", audit := Recorder())
    monkeypatch.setattr("drawledger.replay._handle.check_integrity", check := Recorder())
    _handle().audit(alpha=0.01)
    _handle().check_integrity()
    assert {"format": "sqlite", "engine": "dask", "scheduler": "tcp://127.0.0.1:8786",
            "progress": True, "alpha": 0.01} == audit.calls[0][1]  # fmt: skip
    assert {"format": "sqlite", "integrity_key": b"k"} == check.calls[0][1]


def test_report_verifies_and_audits_with_the_handles_settings(monkeypatch, tmp_path):
    verified, audited = object(), object()
    monkeypatch.setattr("drawledger.replay._handle.verify", verify := Recorder(verified))
    monkeypatch.setattr("drawledger.replay._handle.audit", Recorder(audited))
    monkeypatch.setattr("drawledger.replay._handle.write_report", write := Recorder())
    _handle().report(tmp_path / "r.html", title="cards")
    assert {**SETTINGS} == verify.calls[0][1]
    assert (("cards.db", tmp_path / "r.html"), {
        "path": ("code",), "allow": ("shop",), "progress": True, "integrity_key": b"k",
        "title": "cards", "verification": verified, "audit_report": audited,
    }) == write.calls[0]  # fmt: skip


def test_report_keeps_a_given_verification(monkeypatch, tmp_path):
    monkeypatch.setattr("drawledger.replay._handle.verify", verify := Recorder())
    monkeypatch.setattr("drawledger.replay._handle.audit", Recorder())
    monkeypatch.setattr("drawledger.replay._handle.write_report", write := Recorder())
    given = object()
    replay.open("cards.db").report(tmp_path / "r.html", verification=given)
    assert [] == verify.calls
    assert given is write.calls[0][1]["verification"]


def test_handle_report_writes_the_html_page(cards, tmp_path):
    html = tmp_path / "cards.html"
    result = replay.open(cards).report(html)
    assert html.is_file()
    assert result.verification.ok and isinstance(result.audit, AuditReport)


def test_handle_estimate_sweep_and_report_refuse_an_edited_ledger_unless_accepted(cards, tmp_path):
    """Outcomes edited without the key fail the integrity check: the handle's estimate and
    sweep raise, its report says why at the top; the accept keywords pass through."""
    edited = tmp_path / "edited.db"
    shutil.copy(cards, edited)
    with sqlite3.connect(edited) as conn:
        conn.execute("UPDATE outcomes SET value = 1.0 WHERE value = 0.0")
    handle = replay.open(edited)
    with pytest.raises(EstimateRefusedError, match="integrity check"):
        handle.estimate("checkout", overrides={"temperature": 0.3})
    with pytest.raises(EstimateRefusedError, match="integrity check"):
        handle.sweep("checkout", "temperature", [0.3, 1.0])
    page = handle.report(tmp_path / "r.html", reward="checkout", overrides={"temperature": 0.3})
    assert not page.ok and page.refused[0].startswith("the ledger fails its integrity check")
    accepted = handle.estimate("checkout", overrides={"temperature": 0.3},
                               accept_integrity_failures=True,
                               accept_verification_failures=["integrity"])  # fmt: skip
    assert not accepted.ok and accepted.accepted_failures is not None


@pytest.mark.parametrize(
    ("settings", "message"),
    [
        ({"jobs": 0}, "jobs must be a positive integer, got 0"),
        ({"jobs": True}, "jobs must be a positive integer, got True"),
        ({"jobs": 2.5}, "jobs must be a positive integer, got 2.5"),
        ({"engine": "spark"}, "engine must be 'local' or 'dask', got 'spark'"),
        ({"format": "csv"}, "format must be 'parquet', 'sql', 'sqlite' or None"),
        ({"path": "src"}, "path must be a list of directories"),
        ({"allow": "shop"}, "allow must be a list of module prefixes"),
        ({"progress": "yes"}, "progress must be True or False, got 'yes'"),
        ({"scheduler": "tcp://127.0.0.1:8786"}, "a scheduler address needs engine='dask'"),
        ({"integrity_key": 7}, "integrity_key must be bytes, a string or None"),
    ],
)
def test_a_bad_option_is_an_error_naming_it(settings, message):
    with pytest.raises(ReplayError) as caught:
        replay.open("cards.db", **settings)
    assert message in str(caught.value)


def test_every_bad_option_is_named_at_once():
    with pytest.raises(ReplayError) as caught:
        replay.open("cards.db", jobs=0, engine="spark")
    assert ("engine must be 'local' or 'dask', got 'spark'; "
            "jobs must be a positive integer, got 0") == str(caught.value)  # fmt: skip


def test_an_empty_ledger_name_is_refused():
    with pytest.raises(ReplayError, match="ledger must be a path or URL"):
        replay.open("")


def test_a_bad_integrity_key_is_not_echoed():
    with pytest.raises(ReplayError) as caught:
        replay.open("cards.db", integrity_key=123456789)
    assert "123456789" not in str(caught.value)


def test_the_integrity_key_is_left_out_of_the_repr():
    assert "secret" not in repr(replay.open("cards.db", integrity_key="secret"))


def test_paths_are_kept_as_text(tmp_path):
    options = replay.open(tmp_path / "a.db", path=[tmp_path]).options
    assert (str(tmp_path / "a.db"), (str(tmp_path),)) == (options.ledger, options.path)


def test_options_are_frozen():
    h = replay.open("cards.db")
    with pytest.raises(ValueError, match="frozen"):
        h.options.jobs = 2


def test_a_carried_setting_given_again_is_refused():
    with pytest.raises(ReplayError, match=r"jobs is set when the ledger is opened; use \.replace"):
        replay.open("cards.db").verify(jobs=2)


def test_replace_gives_a_new_validated_handle():
    h = replay.open("cards.db", jobs=2)
    assert (4, 2) == (h.replace(jobs=4).options.jobs, h.options.jobs)
    with pytest.raises(ReplayError, match="jobs must be a positive integer"):
        h.replace(jobs=0)


def test_opening_reads_nothing_until_a_method_runs(tmp_path):
    h = replay.open(tmp_path / "none.db")
    with pytest.raises(LedgerError, match="no ledger"):
        h.verify()


def test_the_replay_page_runs_as_written(tmp_path, run_markdown):
    """docs/replay.md: its first block is the module grocery_decisions.py; the rest run after."""
    page = (Path(__file__).parent.parent / "docs" / "replay.md").read_text(encoding="utf-8")
    module = re.findall(r"^```python\n(.*?)^```$", page, flags=re.S | re.M)[0]
    assert module.startswith("# grocery_decisions.py\n")
    (tmp_path / "grocery_decisions.py").write_text(module, encoding="utf-8")
    done = run_markdown("docs/replay.md", timeout=300)
    assert 0 == done.returncode, done.stderr
    assert "epsilon 0.5: " in done.stdout
    assert (tmp_path / "replay-demo.html").is_file()
