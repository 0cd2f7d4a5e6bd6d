"""Verify across deploys: records replayed under the code version that logged them, found in
the git history of a --path directory."""

from __future__ import annotations

import importlib
import json
import subprocess
import sys
import uuid
from collections import Counter
from pathlib import Path

import pytest

from drawledger.cli import main
from drawledger.ledger import REGISTRY
from drawledger.replay import verify

MODULE = """import drawledger as dl

ledger = dl.Ledger({target!r}, format={format!r})


@ledger.decision("recipe-card")
def feature_card(scores: list[float], draw: dl.Draw, *, temperature: float = 0.7) -> str:
    cards = ["one-pot-pasta", "green-curry", "taco-night", "lentil-soup"]
{body}
"""
FIRST = '    return draw.softmax(cards, scores, temperature=temperature, name="card")'
COMMENTED = "    # hotter evenings: more exploration later\n" + FIRST
HOTTER = '    return draw.softmax(cards, scores, temperature=temperature + 0.3, name="card")'


def git(repo: Path, *args: str) -> str:
    done = subprocess.run(
        ["git", "-c", "user.name=Grocery Dev", "-c", "user.email=dev@grocery.invalid",
         "-c", "init.defaultBranch=main", "-C", str(repo), *args],
        capture_output=True, text=True, check=True,
    )  # fmt: skip
    return done.stdout.strip()


class Shop:
    """A git repository holding one decision module, deployed three times."""

    def __init__(self, root: Path, format: str | None = None, url: str | None = None) -> None:
        self.repo = root / "shop"
        self.repo.mkdir()
        self.format = format
        self.ledger: Path | str = url or root / (
            "ledger" if format == "parquet" else "decisions.db"
        )
        self.name = f"cards_{uuid.uuid4().hex[:8]}"
        git(self.repo, "init", "-q")

    def deploy(self, body: str, n: int, message: str) -> str:
        """Commit the module with ``body``, then log ``n`` decisions with it; its identity."""
        file = self.repo / f"{self.name}.py"
        file.write_text(MODULE.format(target=str(self.ledger), format=self.format, body=body))
        git(self.repo, "add", file.name)
        git(self.repo, "commit", "-q", "-m", message)
        sys.path.insert(0, str(self.repo))
        try:
            module = importlib.import_module(self.name)
            for i in range(n):
                module.feature_card([1.0 + i % 3, 2.0, 0.5, 1.5], unit=f"shopper-{i}")
            module.ledger.close()
            return str(module.feature_card.code_hash)
        finally:
            sys.path.remove(str(self.repo))
            self.forget()

    def forget(self) -> None:
        sys.modules.pop(self.name, None)
        for key in [k for k in REGISTRY if k.startswith(self.name + ":")]:
            del REGISTRY[key]


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
