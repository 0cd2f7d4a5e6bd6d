"""Verify across deploys: records replayed under the code version that logged them, found in
the git history of a --path directory."""

from __future__ import annotations

import json
import shutil
import sqlite3
from collections import Counter
from pathlib import Path

import pytest
from git_shop import Shop, git

from drawledger._code import source_identity
from drawledger._schema import DEC, DRAW
from drawledger.cli import main
from drawledger.exceptions import ReplayError
from drawledger.replay import sources, verify

FIRST = '    return draw.softmax(cards, scores, temperature=temperature, name="card")'
COMMENTED = "    # hotter evenings: more exploration later\n" + FIRST
HOTTER = '    return draw.softmax(cards, scores, temperature=temperature + 0.3, name="card")'


def _three_deploys(tmp_path: Path, n: int, format: str | None = None,
                   url: str | None = None) -> tuple[Shop, list[str]]:  # fmt: skip
    shop = Shop(tmp_path, format, url)
    ids = [
        shop.deploy(FIRST, n, "Feature a recipe card by softmax"),
        shop.deploy(COMMENTED, n, "Explain the temperature"),
        shop.deploy(HOTTER, n, "Explore more: temperature + 0.3"),
    ]
    return shop, ids


def _check_three_deploys(tmp_path: Path, n: int, capsys: pytest.CaptureFixture[str]) -> None:
    shop, ids = _three_deploys(tmp_path, n)
    assert ids[0] == ids[1] != ids[2]  # the comment edit keeps the identity
    assert 0 == main(["verify", str(shop.ledger), "--path", str(shop.repo)])  # no other option
    shown = capsys.readouterr().out
    assert "code versions" in shown and "verify passed" in shown
    assert ids[0][:12] in shown and ids[2][:12] in shown
    out = tmp_path / "verify.json"
    assert 0 == main(["verify", str(shop.ledger), "--path", str(shop.repo), "--json", str(out)])
    data = json.loads(out.read_text())
    assert (3 * n, 3 * n, {}) == (data["decisions"], data["verified"], data["by_reason"])
    versions = data["versions"]
    assert [ids[0], ids[2]] == [v["identity"] for v in versions]
    assert [2 * n, n] == [v["decisions"] for v in versions]
    assert versions[0]["replayed_under"].startswith("git ")
    assert "current code" == versions[1]["replayed_under"]


def test_verify_replays_each_record_under_the_version_that_logged_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _check_three_deploys(tmp_path, 200, capsys)


@pytest.mark.slow
def test_verify_replays_each_record_under_its_version_at_scale(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _check_three_deploys(tmp_path, 2000, capsys)


def test_without_history_an_earlier_version_is_version_not_found_with_a_diff(
    tmp_path: Path,
) -> None:
    shop, ids = _three_deploys(tmp_path, 50)
    report = verify(shop.ledger, path=[shop.repo], history=False)
    assert not report.ok
    assert 100 == report.by_reason["version-not-found"]
    assert Counter({"current code": 1, "not found": 1}) == Counter(
        v["replayed_under"] for v in report.versions
    )
    detail = report.to_dict()["examples"]["version-not-found"][0]["detail"]
    assert detail.startswith(f"code version {ids[0]} of {shop.name}:feature_card was not found")
    assert f"\n-{FIRST}\n+{HOTTER}" in detail
    assert 50 == int(report.rows["verified"].sum())  # the records of the current version


def test_parquet_ledgers_replay_under_their_versions_with_several_jobs(tmp_path: Path) -> None:
    shop, ids = _three_deploys(tmp_path, 40, "parquet")
    report = verify(shop.ledger, path=[shop.repo], jobs=2)
    assert (120, 120, {}) == (report.decisions, report.verified, report.by_reason)
    assert [ids[0], ids[2]] == [v["identity"] for v in report.versions]


def test_a_parquet_piece_read_for_one_version_holds_its_records_and_their_draws(
    tmp_path: Path,
) -> None:
    shop, ids = _three_deploys(tmp_path, 40, "parquet")
    (piece,) = sources.pieces(sources.partitions(shop.ledger), 1_000)
    rows, draws, total = sources.read_piece(piece)
    mine, their_draws, same_total = sources.read_piece(piece, frozenset({ids[0]}))
    expected = [r for r in rows if r[DEC.code_hash] == ids[0]]  # the filter in Python
    assert (120, 80, 80) == (total, len(expected), len(their_draws))
    assert (expected, total) == (mine, same_total)
    kept = {r[DEC.decision_id] for r in expected}
    assert [d for d in draws if d[DRAW.decision_id] in kept] == their_draws


def test_postgresql_ledgers_replay_under_their_versions(tmp_path: Path, postgres_url: str) -> None:
    shop, ids = _three_deploys(tmp_path, 40, url=postgres_url)
    report = verify(shop.ledger, path=[shop.repo])
    assert (120, 120, {}) == (report.decisions, report.verified, report.by_reason)
    assert [ids[0], ids[2]] == [v["identity"] for v in report.versions]


def test_a_version_missing_from_the_history_does_not_fail_the_others(tmp_path: Path) -> None:
    shop, _ = _three_deploys(tmp_path, 30)
    first = git(shop.repo, "rev-list", "--max-parents=0", "HEAD")
    # History rewritten: the first two commits squashed away, the current code kept.
    git(shop.repo, "checkout", "-q", "--orphan", "rewritten")
    git(shop.repo, "commit", "-q", "-m", "One commit")
    git(shop.repo, "branch", "-D", "main")
    git(shop.repo, "reflog", "expire", "--expire=now", "--all")
    git(shop.repo, "gc", "-q", "--prune=now")
    assert first != git(shop.repo, "rev-list", "--max-parents=0", "HEAD")
    report = verify(shop.ledger, path=[shop.repo])
    assert {"version-not-found": 60} == {
        k: v for k, v in report.by_reason.items() if k == "version-not-found"
    }
    assert 30 == int(report.rows["verified"].sum())


def test_outside_a_git_work_tree_nothing_is_searched(tmp_path: Path) -> None:
    shop, _ = _three_deploys(tmp_path, 20)
    plain = tmp_path / "plain"
    plain.mkdir()
    (plain / f"{shop.name}.py").write_text((shop.repo / f"{shop.name}.py").read_text())
    report = verify(shop.ledger, path=[plain])
    assert 40 == report.by_reason["version-not-found"]


def test_the_deploys_page_runs_as_written(run_markdown) -> None:  # type: ignore[no-untyped-def]
    """docs/deploys.md: its worked example (three deploys after the first) runs and verifies."""
    done = run_markdown("docs/deploys.md", timeout=300)
    assert 0 == done.returncode, done.stderr
    assert "verified 600 of 600 | ok: True" in done.stdout
    assert '+    return draw.softmax(cards, scores, temperature=temperature * 0.8, name="card")' \
        in done.stdout  # fmt: skip


KEY = "grocery-ledger-key"


def _without_history(tmp_path: Path) -> tuple[Shop, list[str]]:
    """Two deploys under a keyed ledger, then the repository's history deleted: the first
    version can only come from the source the ledger stores."""
    shop = Shop(tmp_path, key=KEY)
    ids = [shop.deploy(FIRST, 30, "Feature a recipe card"), shop.deploy(HOTTER, 30, "Hotter")]
    shutil.rmtree(shop.repo / ".git")
    return shop, ids


def _stored(shop: Shop, identity: str) -> str:
    with sqlite3.connect(shop.ledger) as conn:
        (source,) = conn.execute("SELECT source FROM code_versions WHERE identity = ?",
                                 (identity,)).fetchone()  # fmt: skip
    return str(source)


def _plant(shop: Shop, identity: str, canary: Path, *, rehash: bool) -> None:
    """Edit the stored source of ``identity`` to create ``canary`` when it runs; with
    ``rehash``, also give it and its decisions the edited source's identity (without the key)."""
    source = _stored(shop, identity).replace(
        "    return", f"    __import__('os').system('touch {canary}')\n    return"
    )
    with sqlite3.connect(shop.ledger) as conn:
        conn.execute("UPDATE code_versions SET source = ? WHERE identity = ?", (source, identity))
        if rehash:
            new = source_identity(source)
            conn.execute("UPDATE code_versions SET identity = ? WHERE identity = ?",
                         (new, identity))  # fmt: skip
            conn.execute("UPDATE decisions SET code_hash = ? WHERE code_hash = ?", (new, identity))


def test_stored_source_replays_a_version_the_history_lost_after_the_keyed_check(
    tmp_path: Path,
) -> None:
    shop, _ = _without_history(tmp_path)
    assert 30 == verify(shop.ledger, path=[shop.repo]).by_reason["version-not-found"]
    report = verify(shop.ledger, path=[shop.repo], run_stored_source=True, integrity_key=KEY)
    assert (60, 60) == (report.decisions, report.verified)
    assert ["stored source", "current code"] == [v["replayed_under"] for v in report.versions]


@pytest.mark.parametrize("rehash", [False, True], ids=["source-edited", "identity-rewritten"])
def test_edited_stored_source_never_runs(tmp_path: Path, rehash: bool) -> None:
    shop, ids = _without_history(tmp_path)
    canary = tmp_path / "canary"
    _plant(shop, ids[0], canary, rehash=rehash)
    report = verify(shop.ledger, path=[shop.repo], integrity_key=KEY)  # without the option
    assert not report.ok and not canary.exists()
    refusal = "keyed integrity check" if rehash else "does not hash to its identity"
    with pytest.raises(ReplayError, match=refusal):
        verify(shop.ledger, path=[shop.repo], run_stored_source=True, integrity_key=KEY)
    assert not canary.exists()


def test_stored_source_is_never_run_without_the_integrity_key(tmp_path: Path) -> None:
    shop, _ = _without_history(tmp_path)
    with pytest.raises(ReplayError, match="integrity key"):
        verify(shop.ledger, path=[shop.repo], run_stored_source=True)
    assert 2 == main(["verify", str(shop.ledger), "--path", str(shop.repo),
                      "--run-stored-source"])  # fmt: skip


def test_show_replays_a_decision_under_the_version_that_logged_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    shop, ids = _three_deploys(tmp_path, 5)
    with sqlite3.connect(shop.ledger) as conn:
        (first,) = conn.execute("SELECT decision_id FROM decisions WHERE code_hash = ? LIMIT 1",
                                (ids[0],)).fetchone()  # fmt: skip
    assert 0 == main(["show", str(shop.ledger), first, "--path", str(shop.repo)])
    assert "replayed under the code version of git" in capsys.readouterr().out
    assert 1 == main(["show", str(shop.ledger), first, "--path", str(shop.repo), "--no-history"])
    assert "version-not-found" in capsys.readouterr().out
