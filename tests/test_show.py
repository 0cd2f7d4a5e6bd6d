"""``drawledger show`` and ``verify_one``: one decision in full, beside its replay."""

from __future__ import annotations

import json
import shutil
import sqlite3
import subprocess
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
import shop_decisions as sd

import drawledger as dl
from drawledger.cli import main
from drawledger.replay import verify, verify_one

ALLOW = ["--allow", "drawledger.replay.demo.grocery"]
Pipe = Callable[..., subprocess.CompletedProcess[str]]


def test_show_prints_a_decision_and_every_draw_beside_its_replay(
    demo_run: Any, cli_pipe: Pipe
) -> None:
    """The JSON on stdout holds the record, each draw with its replay, the outcomes and the
    verdict; the text (stderr with --json -) shows the same values."""
    done = cli_pipe("show", str(demo_run.ledger), "card-000012", *ALLOW, "--json", "-")
    assert 0 == done.returncode, done.stderr
    d = json.loads(done.stdout)
    con = sqlite3.connect(demo_run.ledger)
    fn, code_hash, seed, params = con.execute(
        "SELECT fn, code_hash, seed, params FROM decisions WHERE decision_id = 'card-000012'"
    ).fetchone()
    kind, name, u, value, prob = con.execute(
        "SELECT kind, name, u, value, prob FROM draws WHERE decision_id = 'card-000012'"
    ).fetchone()
    con.close()
    assert (fn, code_hash, seed, json.loads(params)) == (d["fn"], d["code_hash"], d["seed"],
                                                           d["params"])  # fmt: skip
    assert {"ctx"} == set(d["inputs"])
    [draw] = d["draws"]
    assert (kind, name, json.loads(u), json.loads(value), prob) == (
        draw["kind"], draw["name"], draw["u"], draw["value"], draw["prob"])  # fmt: skip
    assert {"options", "scores", "temperature"} == set(draw["args"])
    assert {k: draw[k] for k in ("kind", "name", "args", "u", "value", "prob")} == {
        k: draw["replayed"][k] for k in ("kind", "name", "args", "u", "value", "prob")}  # fmt: skip
    assert ("verified", True, {}) == (d["status"], d["verified"], d["reasons"])
    assert ["checkout"] == [o["name"] for o in d["outcomes"]]
    assert "exact" == d["propensity"]["method"]
    for text in (fn, code_hash, seed, repr(prob), "replay: verified", "checkout"):
        assert text in done.stderr


def test_a_tampered_value_shows_recorded_and_replayed_side_by_side_and_exits_1(
    demo_run: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    ledger = tmp_path / "decisions.db"
    shutil.copy(demo_run.ledger, ledger)
    with sqlite3.connect(ledger) as con:
        con.execute("UPDATE draws SET value = '\"free-delivery-banner\"' "
                    "WHERE decision_id = 'card-000007'")  # fmt: skip
    assert 1 == main(["show", str(ledger), "card-000007", *ALLOW])
    out = capsys.readouterr().out
    assert '"free-delivery-banner"' in out
    replayed = verify_one(ledger, "card-000007", allow=ALLOW[1:]).replayed_draws
    assert replayed is not None
    assert f'"{replayed[0]["value"]}"' in out
    assert "replay: mismatched" in out
    assert "value: draw 0 (softmax 'card'): value" in out


def test_the_verdict_is_the_one_verify_gives(demo_run: Any, tmp_path: Path) -> None:
    """verify_one and verify agree decision by decision on a ledger with a tampered row (its
    hash no longer matches: the integrity reason, as verify gives it)."""
    ledger = tmp_path / "decisions.db"
    shutil.copy(demo_run.ledger, ledger)
    with sqlite3.connect(ledger) as con:
        con.execute("UPDATE decisions SET propensity = 0.5 WHERE decision_id = 'card-000003'")
    rows = verify(ledger, allow=ALLOW[1:]).to_frame().set_index("decision_id")
    for did in ("card-000003", "card-000004", "reminder-000003"):
        view = verify_one(ledger, did, allow=ALLOW[1:])
        assert bool(rows.loc[did, "verified"]) == view.verified, did
        reason = rows.loc[did, "reason"]
        assert (reason if isinstance(reason, str) else "") == ";".join(view.reasons), did


def test_an_unknown_id_is_one_line_and_exit_2(
    demo_run: Any, capsys: pytest.CaptureFixture[str]
) -> None:
    assert 2 == main(["show", str(demo_run.ledger), "card-999999"])
    out, err = capsys.readouterr()
    assert ("", "drawledger show: error: no decision 'card-999999' in the ledger\n") == (out, err)


def test_a_declared_draw_is_shown_as_recorded_with_its_text_escaped(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A declared draw has no code to replay (exit 0, as verify counts it); ledger text
    reaches the terminal escaped, never as a control sequence."""
    ledger = tmp_path / "legacy.db"
    with dl.Ledger(ledger) as led:
        did = led.record_draw("slot-\x1b[31mdiscount", "categorical",
                              {"options": [0, 5], "probs": [0.8, 0.2]}, 5, 0.2,
                              decision_id="legacy-1", u=[0.93])  # fmt: skip
    assert 0 == main(["show", str(ledger), did])
    out = capsys.readouterr().out
    assert "slot-\\x1b[31mdiscount" in out
    assert "\x1b" not in out
    assert "replay: unreplayable" in out
    assert "declared: declared categorical draw" in out


def test_show_reads_a_parquet_ledger(tmp_path: Path) -> None:
    root = tmp_path / "ledger"
    led = dl.Ledger(root, format="parquet")
    sd.use(led)
    sd.feature_card(sd.context(1), decision_id="card-1")
    sd.feature_card(sd.context(2), decision_id="card-2")
    led.outcome("card-2", "checkout", 1.0)
    led.close()
    view = verify_one(root, "card-2", allow=["shop_decisions"])
    assert (True, 1, ["checkout"]) == (view.verified, len(view.draws),
                                       [o["name"] for o in view.outcomes])  # fmt: skip
    assert view.draws[0]["value"] == view.replayed_draws[0]["value"]  # type: ignore[index]
