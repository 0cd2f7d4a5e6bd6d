"""Estimates across a code change: logging propensities from each record's own code version
(replayed from the git history), the target from the current code."""

from __future__ import annotations

import functools
import json
import random
import re
import sqlite3
from pathlib import Path
from types import ModuleType

import numpy as np
import pytest
from estimate_shop import CARDS, CHECKOUT, SCORES, context, segments
from git_shop import Shop, git
from scipy.special import softmax

from drawledger.cli import main
from drawledger.exceptions import EstimateRefusedError
from drawledger.replay import WhatIf, estimate, sweep, write_report

BODY = '    return draw.softmax(cards, ctx["scores"], temperature=temperature, name="card")'
COMMENTED = "    # evening shoppers see the same ranking\n" + BODY
SHARPER = ('    return draw.softmax(cards, ctx["scores"], temperature=temperature * 0.5, '
           'name="card")')  # fmt: skip
SEEDS = (11, 12, 13)


def _logger(seed: int) -> functools.partial[None]:
    return functools.partial(_log, seed=seed)


def _log(module: ModuleType, n: int, *, seed: int) -> None:
    """``n`` recipe-card decisions with seeded draws and checkouts of known probability."""
    module.ledger._seed_source = functools.partial(random.Random(seed).randbytes, 16)
    rng = np.random.default_rng(seed + 1)
    for i, seg in enumerate(segments(n, seed)):
        did = f"card-{seed}-{i}"
        card = module.feature_card(context(int(seg)), decision_id=did)
        module.ledger.outcome(
            did, "checkout", float(rng.random() < CHECKOUT[seg, CARDS.index(card)])
        )


def _deploys(tmp_path: Path, n: int) -> tuple[Shop, list[str]]:
    """Three deploys: the first code, a comment edit, a sharper temperature formula."""
    shop = Shop(tmp_path, arg="ctx", arg_type="dict", cards=repr(CARDS))
    ids = [
        shop.deploy(BODY, n, "Feature a recipe card by softmax", _logger(SEEDS[0])),
        shop.deploy(COMMENTED, n, "Explain the ranking", _logger(SEEDS[1])),
        shop.deploy(SHARPER, n, "Sharper ranking: half the temperature", _logger(SEEDS[2])),
    ]
    return shop, ids


def _truth(n: int, temperature: float) -> float:
    """The exact mean checkout of a softmax at ``temperature`` over the simulated shoppers of
    every deploy. Softmax from scipy.special (the reference), checkout rates from the
    simulator."""
    probs = softmax(SCORES / temperature, axis=1)
    seg = np.concatenate([segments(n, s) for s in SEEDS])
    return float((probs * CHECKOUT).sum(axis=1)[seg].mean())


def _exact_ips(shop: Shop, ids: list[str], temperature: float) -> float:
    """IPS of a softmax at ``temperature`` from the ledger's actions and checkouts, each
    record weighted against the code that logged it: the first two deploys at 0.7, the last
    at 0.35 (softmax from scipy.special, the reference)."""
    with sqlite3.connect(shop.ledger) as conn:
        rows = conn.execute("SELECT d.inputs, d.action, d.code_hash, o.value FROM decisions d "
                            "JOIN outcomes o USING (decision_id)").fetchall()  # fmt: skip
    total = 0.0
    for inputs, action, code, reward in rows:
        scores = np.array(json.loads(inputs)["ctx"]["scores"])
        a = CARDS.index(json.loads(action))
        logged = softmax(scores / (0.7 if code == ids[0] else 0.35))[a]
        total += softmax(scores / temperature)[a] / logged * reward
    return total / len(rows)


def _check_estimate(tmp_path: Path, n: int) -> float:
    """Checks the estimate over three deploys of ``n`` decisions; returns how many standard
    errors it lies from the exact value."""
    shop, ids = _deploys(tmp_path, n)
    assert ids[0] == ids[1] != ids[2]
    report = estimate(shop.ledger, reward="checkout", path=[shop.repo])
    # Each record's logging propensity is its own version's: IPS as computed by hand.
    assert _exact_ips(shop, ids, 0.35) == pytest.approx(report.results["ips"].value, rel=1e-9)
    # The target is the newest code (0.7 * 0.5) over all records: within 3 standard errors of
    # the exact value from the simulator's checkout rates.
    truth = _truth(n, 0.35)
    snips = report.results["snips"]
    se = (snips.high - snips.low) / (2 * 1.959964)  # the 95% CLT interval's half-width
    assert abs(snips.value - truth) < 3 * se, (snips.value, truth, se)
    assert (3 * n, True) == (report.n, report.ok)
    versions = [(v["identity"], v["decisions"], v["used"], v["logged_under"][:4])
                for v in report.versions]  # fmt: skip
    assert [(ids[0], 2 * n, 2 * n, "git "), (ids[2], n, n, "curr")] == versions
    assert "current code" == report.target["code"]
    return (snips.value - truth) / se


def test_the_current_code_is_estimated_from_6000_records_of_three_deploys(tmp_path: Path) -> None:
    print(f"[versions] snips - exact = {_check_estimate(tmp_path, 2000):+.2f} standard errors")


def test_without_the_history_records_of_earlier_versions_refuse_the_estimate(
    tmp_path: Path,
) -> None:
    shop, _ = _deploys(tmp_path, 100)
    with pytest.raises(EstimateRefusedError, match="version-not-found"):
        estimate(shop.ledger, reward="checkout", path=[shop.repo], history=False)


def test_the_estimate_shows_each_version_with_its_counts(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    shop, ids = _deploys(tmp_path, 150)
    out = tmp_path / "estimate.json"
    code = main(["estimate", str(shop.ledger), "--reward", "checkout", "--path", str(shop.repo),
                 "--set", "temperature=0.9", "--json", str(out)])  # fmt: skip
    shown = capsys.readouterr().out
    assert "current code, temperature=0.9" in shown
    assert "code versions" in shown and ids[0][:12] in shown and ids[2][:12] in shown
    data = json.loads(out.read_text())
    assert [300, 150] == [v["used"] for v in data["versions"]]
    assert {"temperature": 0.9} == data["target"]["overrides"]
    assert (0 if data["ok"] else 1) == code  # exit 1 exactly when the data cannot answer


def test_a_sweep_over_the_current_code_uses_every_version(tmp_path: Path) -> None:
    shop, _ = _deploys(tmp_path, 150)
    report = sweep(shop.ledger, reward="checkout", param="temperature", values=[0.5, 0.7],
                   path=[shop.repo])  # fmt: skip
    assert (450, [300, 150]) == (report.n, [v["used"] for v in report.versions])


def test_the_html_report_and_the_notebook_views_show_each_version(tmp_path: Path) -> None:
    shop, ids = _deploys(tmp_path, 60)
    one = estimate(shop.ledger, reward="checkout", overrides={"temperature": 0.9},
                   path=[shop.repo])  # fmt: skip
    swept = sweep(shop.ledger, reward="checkout", param="temperature", values=[0.5, 0.7],
                  path=[shop.repo])  # fmt: skip
    page = write_report(shop.ledger, tmp_path / "report.html", path=[shop.repo],
                        whatifs=[WhatIf("warmer", one), WhatIf("temperatures", swept)]
                        ).path.read_text()  # fmt: skip
    assert 2 == page.count("<th>logged under</th>")  # one table per what-if
    # identity, logged under, decisions, used: the first two deploys share one identity (a
    # comment edit), replayed from their git revision
    row = '<td>{}</td><td>{}</td><td class="num">{}</td><td class="num">{}</td>'
    assert re.search(row.format(ids[0], "git [0-9a-f]{12}", 120, 120), page)
    assert row.format(ids[2], "current code", 60, 60) in page
    for view in (one._repr_html_(), swept._repr_html_()):
        assert "code versions" in view and ids[0][:12] in view and "<td>120</td>" in view


def test_one_version_shows_no_versions_table(tmp_path: Path) -> None:
    shop = Shop(tmp_path, arg="ctx", arg_type="dict", cards=repr(CARDS))
    shop.deploy(BODY, 60, "Feature a recipe card by softmax", _logger(SEEDS[0]))
    one = estimate(shop.ledger, reward="checkout", overrides={"temperature": 0.9},
                   path=[shop.repo])  # fmt: skip
    page = write_report(shop.ledger, tmp_path / "report.html", path=[shop.repo],
                        whatifs=[WhatIf("warmer", one)]).path.read_text()  # fmt: skip
    assert ("logged under" not in page) and ("code versions" not in one._repr_html_())


def test_a_checkout_of_an_earlier_version_makes_it_the_target(tmp_path: Path) -> None:
    """``--path`` at a worktree of the first commit: the first version is the target, and the
    newer version's records are found in the history of every branch."""
    shop, ids = _deploys(tmp_path, 100)
    first = git(shop.repo, "rev-list", "--max-parents=0", "HEAD")
    old = tmp_path / "old"
    git(shop.repo, "worktree", "add", "-q", str(old), first)
    report = estimate(shop.ledger, reward="checkout", path=[old])
    assert [(ids[0], "curr"), (ids[2], "git ")] == [
        (v["identity"], v["logged_under"][:4]) for v in report.versions
    ]
    # Each record weighted against its own version, the target at 0.7: IPS by hand.
    assert _exact_ips(shop, ids, 0.7) == pytest.approx(report.results["ips"].value, rel=1e-9)
