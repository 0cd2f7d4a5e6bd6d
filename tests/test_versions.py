"""Code versions: stored once per version with the ledger, listed and diffed."""

from __future__ import annotations

import importlib
import json
import sqlite3
import sys
import uuid
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drawledger.cli import main
from drawledger.exceptions import ReplayError
from drawledger.ledger import REGISTRY
from drawledger.replay import code_versions, version_diff
from drawledger.replay.sources import read_code_versions

MODULE = """import drawledger as dl

ledger = dl.Ledger({target!r}, format={format!r})


@ledger.decision("recipe-card")
def feature_card(scores: list[float], draw: dl.Draw, *, temperature: float = 0.7) -> str:
    cards = ["one-pot-pasta", "green-curry", "taco-night"]
{body}
"""
PLAIN = '    return draw.softmax(cards, scores, temperature=temperature, name="card")'
HOTTER = '    return draw.softmax(cards, scores, temperature=temperature + 0.3, name="card")'


def log_version(code: Path, name: str, target: str, body: str, n: int,
                format: str | None = None) -> str:  # fmt: skip
    """Write ``code/name.py`` with ``body``, import it afresh, record ``n`` decisions, forget it;
    the identity of that version."""
    (code / f"{name}.py").write_text(MODULE.format(target=target, format=format, body=body))
    sys.path.insert(0, str(code))
    try:
        module = importlib.import_module(name)
        for i in range(n):
            module.feature_card([1.0 + i % 3, 2.0, 0.5], unit=f"shopper-{i}")
        module.ledger.close()
        return str(module.feature_card.code_hash)
    finally:
        sys.path.remove(str(code))
        sys.modules.pop(name, None)
        for key in [k for k in REGISTRY if k.startswith(name + ":")]:
            del REGISTRY[key]


def _two_versions(tmp_path: Path, target: str, format: str | None = None) -> tuple[str, str]:
    code = tmp_path / "code"
    code.mkdir(exist_ok=True)
    name = f"cards_{uuid.uuid4().hex[:8]}"
    first = log_version(code, name, target, PLAIN, 30, format)
    log_version(code, name, target, "    # the same code, commented\n" + PLAIN, 20, format)
    second = log_version(code, name, target, HOTTER, 10, format)
    return first, second


def test_each_version_is_stored_once_per_writer_with_its_source(tmp_path: Path) -> None:
    ledger = str(tmp_path / "decisions.db")
    first, second = _two_versions(tmp_path, ledger)
    rows = read_code_versions(ledger)
    assert [first, first, second] == [r[0] for r in rows]  # the comment edit: same identity
    assert "temperature=temperature + 0.3" in rows[2][4]
    assert rows[0][3].startswith("cards_") and rows[0][3].endswith(".py")
    assert {"recipe-card"} == {r[1] for r in rows}


def test_versions_lists_each_version_with_its_decisions_and_dates(tmp_path: Path) -> None:
    ledger = str(tmp_path / "decisions.db")
    first, second = _two_versions(tmp_path, ledger)
    report = code_versions(ledger)
    assert [(first, 50), (second, 10)] == [(v.identity, v.decisions) for v in report.versions]
    assert report.ok
    assert all(v.source_ok for v in report.versions)
    assert report.versions[0].last_ts <= report.versions[1].first_ts


def test_versions_diff_shows_the_changed_line(tmp_path: Path) -> None:
    ledger = str(tmp_path / "decisions.db")
    first, second = _two_versions(tmp_path, ledger)
    report = version_diff(ledger, first[:10], second)
    assert (first, second) == report.compared
    assert f"-{PLAIN}" in (report.diff or "")
    assert f"+{HOTTER}" in (report.diff or "")


def test_versions_refuses_an_unknown_or_ambiguous_identity(tmp_path: Path) -> None:
    ledger = str(tmp_path / "decisions.db")
    first, _ = _two_versions(tmp_path, ledger)
    with pytest.raises(ReplayError, match="no code version 'v2:ffffzz'"):
        version_diff(ledger, "v2:ffffzz", first)
    with pytest.raises(ReplayError, match="ambiguous"):
        version_diff(ledger, "v2:", first)


def test_a_stored_source_that_does_not_match_its_identity_is_reported(tmp_path: Path,
                                                                      capsys) -> None:  # fmt: skip
    ledger = str(tmp_path / "decisions.db")
    first, _ = _two_versions(tmp_path, ledger)
    with sqlite3.connect(ledger) as conn:
        conn.execute("UPDATE code_versions SET source = replace(source, '0.7', '0.9') "
                     "WHERE identity = ?", (first,))  # fmt: skip
    assert 1 == main(["versions", ledger])
    out = capsys.readouterr().out
    assert out.startswith("PROBLEM: the stored source of ")
    assert first in out.splitlines()[0]


def test_versions_command_lists_diffs_and_writes_json(tmp_path: Path, capsys) -> None:
    ledger = str(tmp_path / "decisions.db")
    first, second = _two_versions(tmp_path, ledger)
    assert 0 == main(["versions", ledger, "--stream", "recipe-card"])
    out = capsys.readouterr().out
    assert first in out and second in out
    assert "2 code versions of 1 functions" in out
    assert 0 == main(["versions", ledger, "--diff", first, second, "--json", "-"])
    data = json.loads(capsys.readouterr().out)
    assert {"from": first, "to": second} == {k: data["diff"][k] for k in ("from", "to")}
    assert [50, 10] == [v["decisions"] for v in data["versions"]]


def test_versions_of_an_unknown_identity_is_one_line_and_exit_2(tmp_path: Path, capsys) -> None:
    ledger = str(tmp_path / "decisions.db")
    first, _ = _two_versions(tmp_path, ledger)
    assert 2 == main(["versions", ledger, "--diff", "v2:0000000000", first])
    err = capsys.readouterr().err
    assert 1 == len(err.strip().splitlines())
    assert "no code version" in err


def test_a_ledger_written_before_code_versions_lists_its_functions_without_source(
    tmp_path: Path,
) -> None:
    ledger = str(tmp_path / "decisions.db")
    first, _ = _two_versions(tmp_path, ledger)
    with sqlite3.connect(ledger) as conn:
        conn.execute("DROP TABLE code_versions")
    report = code_versions(ledger)
    assert [None, None] == [v.source_ok for v in report.versions]
    with pytest.raises(ReplayError, match="holds no source"):
        version_diff(ledger, first, first)


def test_control_characters_in_stored_source_never_reach_the_terminal(tmp_path: Path,
                                                                      capsys) -> None:  # fmt: skip
    ledger = str(tmp_path / "decisions.db")
    first, second = _two_versions(tmp_path, ledger)
    with sqlite3.connect(ledger) as conn:
        conn.execute("UPDATE code_versions SET source = source || ?", ("# \x1b[2J\n",))
    main(["versions", ledger, "--diff", first, second])
    out = capsys.readouterr().out
    assert "\x1b" not in out
    assert "\\x1b[2J" in out


def test_parquet_ledgers_store_code_versions(tmp_path: Path) -> None:
    ledger = str(tmp_path / "ledger")
    first, second = _two_versions(tmp_path, ledger, "parquet")
    report = code_versions(ledger)
    assert [(first, 50), (second, 10)] == [(v.identity, v.decisions) for v in report.versions]
    assert "+" + HOTTER in (version_diff(ledger, first, second).diff or "")


def test_postgresql_ledgers_store_code_versions(tmp_path: Path, postgres_url: str) -> None:
    first, second = _two_versions(tmp_path, postgres_url)
    report = code_versions(postgres_url)
    assert [(first, 50), (second, 10)] == [(v.identity, v.decisions) for v in report.versions]
    assert all(v.source_ok for v in report.versions)
    assert "+" + HOTTER in (version_diff(postgres_url, first, second).diff or "")


@pytest.fixture(scope="module")
def two_versions(tmp_path_factory: pytest.TempPathFactory) -> tuple[str, str, str]:
    root = tmp_path_factory.mktemp("versions")
    ledger = str(root / "decisions.db")
    first, second = _two_versions(root, ledger)
    return ledger, first, second


@given(st.text(max_size=40))
@settings(max_examples=60, deadline=None)
def test_any_identity_text_is_found_or_refused_in_one_line(
    two_versions: tuple[str, str, str], wanted: str
) -> None:
    ledger, _, second = two_versions
    try:
        report = version_diff(ledger, wanted, second)
    except ReplayError as exc:
        assert 1 == len(str(exc).splitlines())
    else:
        assert report.compared is not None and second == report.compared[1]
