"""`drawledger guard`: following a growing ledger, resuming after a kill, routing alarms."""

from __future__ import annotations

import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
import urllib.request
from pathlib import Path
from typing import Any

import orjson
import pytest
import shop_decisions as sd
from coin_batches import coin_batches
from conftest import SUPPORT
from git_shop import Shop
from hypothesis import given
from hypothesis import strategies as st
from test_examples import EXAMPLES, service  # noqa: F401  (the live service fixture)

import drawledger as dl
from drawledger.cli import main
from drawledger.exceptions import ReplayError
from drawledger.replay.guard import alarm_line, guard, load_state

T0 = 1_767_225_600.0


def shop_ledger(target: str | Path, n: int, *, start: int = 0, **kw: Any) -> None:
    """n recipe-card and n explore-card decisions of the grocery app (replayable)."""
    led = dl.Ledger(target, **kw)
    sd.use(led)
    for i in range(start, start + n):
        sd.feature_card(sd.context(i), unit=f"shopper-{i % 97}")
        sd.explore_card(sd.context(i), unit=f"shopper-{i % 97}")
    led.close()


def legacy_ledger(path: Path, drawn: float, n: int, *, stream: str = "slot-discount",
                  seed: int = 7) -> Path:  # fmt: skip
    """Declared 50/50 coin draws of a legacy service that really draws heads with ``drawn``."""
    import numpy as np

    led = dl.Ledger(path)
    u = np.random.default_rng(seed).random(n)
    for i in range(n):
        heads = bool(u[i] < drawn)
        led.record_draw(stream, "bernoulli", {"p": 0.5}, heads, 0.5,
                        decision_id=f"legacy-{seed}-{i}", u=[float(u[i])], ts=T0 + i)  # fmt: skip
    led.close()
    return path


def comparable(state_file: Path) -> dict[str, Any]:
    """The saved state without the wall-clock times of its alarms."""
    data = orjson.loads(state_file.read_bytes())
    for alarm in data["alarms"]:
        alarm.pop("time")
    return data


def test_a_correct_ledger_verifies_and_raises_no_alarm(tmp_path: Path) -> None:
    db = tmp_path / "shop.db"
    shop_ledger(db, 400)
    report = guard(db, path=[SUPPORT], once=True)
    data = report.to_dict()
    assert (True, 800, 800, 0) == (data["ok"], data["decisions"], data["verified"],
                                   data["mismatched"])  # fmt: skip
    tests = {(d["stream"], d["draw"], d["test"]) for d in data["draws"]}
    assert ("recipe-card", "card", "pit") in tests  # softmax over varying scores
    assert ("explore-card", "explore", "ratio") in tests  # a coin with a fixed epsilon
    assert 0 == data["lag"]["records"]


FIRST = '    return draw.softmax(cards, scores, temperature=temperature, name="card")'
HOTTER = '    return draw.softmax(cards, scores, temperature=temperature + 0.3, name="card")'


def test_records_logged_before_a_deploy_replay_under_their_version(tmp_path: Path) -> None:
    """The guard starts after a deploy, with records of the earlier version still to take in:
    they replay under the git revision that logged them, without an alarm."""
    shop = Shop(tmp_path)
    shop.deploy(FIRST, 40, "Feature a recipe card")
    shop.deploy(HOTTER, 40, "Hotter")
    report = guard(shop.ledger, path=[shop.repo], once=True)
    assert (80, 80, []) == (report.state.decisions, report.state.verify["verified"],
                            report.state.alarms)  # fmt: skip


def test_a_deploy_while_the_guard_runs_raises_no_alarm(tmp_path: Path) -> None:
    """The guard keeps the code it imported; the new version's records replay under the
    revision that holds it."""
    shop = Shop(tmp_path)
    shop.deploy(FIRST, 40, "Feature a recipe card")
    report = guard(shop.ledger, path=[shop.repo], steps=2,
                   sleep=lambda _: shop.deploy_elsewhere(HOTTER, 40, "Hotter"))  # fmt: skip
    shop.forget()
    assert (80, 80, []) == (report.state.decisions, report.state.verify["verified"],
                            report.state.alarms)  # fmt: skip


SCALED = """import drawledger as dl

ledger = dl.Ledger({db!r})
SCALE = {scale}  # outside the function: not part of its code identity


@ledger.decision("recipe-card")
def feature_card(scores: list[float], draw: dl.Draw) -> str:
    return draw.softmax(["pasta", "curry", "tacos"], [s * SCALE for s in scores], name="card")


def serve(start: int) -> None:
    for i in range(start, start + 300):
        feature_card([1.0, 2.0, 0.5 + i % 3], decision_id=f"card-{{i}}")
    ledger.close()
"""


def test_a_code_change_without_a_new_version_alarms_at_its_first_decision(
    tmp_path: Path,
) -> None:
    """A module constant the decision uses changes while the guard runs (its identity does
    not): the first decision logged by the changed code is the alarm's first affected one."""
    db, code = tmp_path / "cards.db", tmp_path / "code"
    code.mkdir()
    name = f"scaled_{os.getpid()}_{time.time_ns()}"

    def serve(scale: float, start: int) -> None:
        (code / f"{name}.py").write_text(SCALED.format(db=str(db), scale=scale))
        subprocess.run([sys.executable, "-c", f"import {name}; {name}.serve({start})"], cwd=code,
                       check=True)  # fmt: skip

    serve(1.0, 0)
    report = guard(db, path=[code], steps=2, sleep=lambda _: serve(2.0, 300))
    sys.modules.pop(name, None)
    alarms = [a for a in report.state.alarms if a["test"].startswith("verify:")]
    first = sorted(int(a["decision"].removeprefix("card-")) for a in alarms)
    assert 300 == first[0]  # every reason's first affected decision is a changed one
    assert 300 == report.state.verify["verified"]


def test_taking_in_a_growing_ledger_piece_by_piece_equals_one_pass(tmp_path: Path) -> None:
    """Three looks while the ledger grows give the statistics of one look at the whole."""
    db, state = tmp_path / "shop.db", tmp_path / "state.json"
    for k in range(3):
        shop_ledger(db, 150, start=150 * k)
        guard(db, path=[SUPPORT], state=state, once=True, piece_size=100)
    whole = guard(tmp_path / "shop.db", path=[SUPPORT], once=True, piece_size=100)
    grown = load_state(state, os.fspath(db))
    assert whole.state.decisions == grown.decisions == 900
    assert whole.state.verify == grown.verify
    for key, w in whole.state.watches.items():
        assert (w.counts, w.uniforms) == (grown.watches[key].counts, grown.watches[key].uniforms)
        assert w.log_e == pytest.approx(grown.watches[key].log_e, rel=1e-12)


def test_a_ratio_drift_raises_one_alarm_line_and_exit_1(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Declared 50/50, drawn 60/40: the ratio process alarms, once, naming the stream, the
    test, the e-value and the first decision of the piece in which it crossed."""
    db = legacy_ledger(tmp_path / "coin.db", 0.6, 3000)
    state = tmp_path / "state.json"
    assert 1 == main(["guard", str(db), "--once", "--state", str(state)])
    err = capsys.readouterr().err.splitlines()
    ratio = [line for line in err if "test ratio" in line]
    assert 1 == len(ratio)
    assert "stream 'slot-discount'" in ratio[0] and "e-value" in ratio[0]
    assert "first affected decision 'legacy-7-" in ratio[0]
    # Looking again: the alarm still stands (exit 1) but is not announced again.
    assert 1 == main(["guard", str(db), "--once", "--state", str(state)])
    assert "ALARM" not in capsys.readouterr().err


def test_correct_declared_draws_exit_0(tmp_path: Path) -> None:
    db = legacy_ledger(tmp_path / "coin.db", 0.5, 3000)
    assert 0 == main(["guard", str(db), "--once", "--json", str(tmp_path / "g.json")])
    assert orjson.loads((tmp_path / "g.json").read_bytes())["ok"] is True


def test_a_tampered_record_raises_verify_and_integrity_alarms(tmp_path: Path) -> None:
    db = tmp_path / "shop.db"
    shop_ledger(db, 100)
    with sqlite3.connect(db) as conn:
        did = conn.execute("SELECT decision_id FROM decisions WHERE stream = 'recipe-card' "
                           "ORDER BY seq LIMIT 1 OFFSET 10").fetchone()[0]  # fmt: skip
        conn.execute("UPDATE decisions SET propensity = 0.99 WHERE decision_id = ?", (did,))
    report = guard(db, path=[SUPPORT], once=True)
    tests = {a["test"]: a["decision"] for a in report.to_dict()["alarms"]}
    assert did == tests["integrity:bad_hashes"]
    assert any(t.startswith("verify:") for t in tests)
    assert report.ok is False


def test_a_hole_in_a_chain_is_waited_for_then_reported_as_a_gap(tmp_path: Path) -> None:
    db = tmp_path / "shop.db"
    shop_ledger(db, 100)
    with sqlite3.connect(db) as conn:
        conn.execute("DELETE FROM decisions WHERE seq = 50")
    state = tmp_path / "state.json"
    waiting = guard(db, path=[SUPPORT], once=True, state=state, gap_wait=3600.0)
    assert (True, 50) == (waiting.ok, waiting.state.decisions)
    assert 0 < waiting.lag_records
    reported = guard(db, path=[SUPPORT], once=True, state=state, gap_wait=0.0)
    # verify counts the decision after the gap as not verified, as ``drawledger verify`` does
    assert {"integrity:gaps", "verify:integrity"} == {a["test"] for a in reported.state.alarms}
    assert 199 == reported.state.decisions


def test_outcomes_missing_from_a_stopped_writers_last_batch_are_no_gap(tmp_path: Path) -> None:
    """A Parquet writer stopped between the renames of its last batch: after the wait, the
    outcomes that never came raise no alarm, as in ``drawledger verify``; one missing from an
    earlier batch does."""
    root = tmp_path / "pq"
    coin_batches(root, 3, 4)
    outcome_parts = sorted((root / "outcomes").rglob("*.parquet"))
    outcome_parts[-1].unlink()
    stopped = guard(root, once=True, gap_wait=0.0)
    assert (True, 12, 0) == (
        stopped.ok,
        stopped.state.decisions,
        sum(stopped.state.integrity.values()),
    )
    outcome_parts[0].unlink()
    earlier = guard(root, once=True, gap_wait=0.0)
    assert (False, 4) == (earlier.ok, earlier.state.integrity["gaps"])


GUARD_RUN = """
import sys, time
sys.path.insert(0, sys.argv[3])
from drawledger.replay.guard import guard
from drawledger.replay.sources import Follower

read_after = Follower.read_after


def slow_read_after(self, *args):  # each piece takes a while: the kill lands between pieces
    time.sleep(0.05)
    return read_after(self, *args)


Follower.read_after = slow_read_after
guard(sys.argv[1], path=[sys.argv[3]], state=sys.argv[2], once=True, piece_size=40)
"""


def test_a_guard_killed_between_pieces_resumes_to_the_uninterrupted_result(
    tmp_path: Path,
) -> None:
    """SIGKILL while taking in pieces, then a restart: the saved state equals that of a run
    never interrupted (nothing read twice, nothing skipped)."""
    db = tmp_path / "shop.db"
    shop_ledger(db, 600)
    killed, whole = tmp_path / "killed.json", tmp_path / "whole.json"
    proc = subprocess.Popen([sys.executable, "-c", GUARD_RUN, str(db), str(killed),
                             str(SUPPORT)])  # fmt: skip
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        if killed.exists() and orjson.loads(killed.read_bytes())["pieces"] >= 5:
            break
        time.sleep(0.02)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    partial = orjson.loads(killed.read_bytes())["decisions"]
    assert 0 < partial < 1200, "the kill came between pieces, not after the last"
    guard(db, path=[SUPPORT], state=killed, once=True, piece_size=40)
    guard(db, path=[SUPPORT], state=whole, once=True, piece_size=40)
    assert comparable(whole) == comparable(killed)


def test_the_state_is_saved_between_looks_and_after_an_alarm_not_after_every_piece(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Pieces taken in within SAVE_EVERY seconds share one save at the end of the look; a
    piece that raises an alarm is saved at once (a restart does not raise it again)."""
    from drawledger.replay.guard import _run

    saves: list[int] = []
    real = _run.save_state

    def counted(path: Any, state: Any, unchanged: Any = None) -> bytes:
        saves.append(state.pieces)
        return real(path, state, unchanged)

    monkeypatch.setattr(_run, "save_state", counted)
    monkeypatch.setattr(_run, "SAVE_EVERY", 3600.0)
    fair = legacy_ledger(tmp_path / "fair.db", 0.5, 400)
    report = guard(fair, state=tmp_path / "fair.json", once=True, piece_size=40)
    assert (10, [10], True) == (report.state.pieces, saves, report.ok)
    assert 400 == load_state(tmp_path / "fair.json", os.fspath(fair)).decisions
    saves.clear()
    biased = legacy_ledger(tmp_path / "biased.db", 0.8, 2000)
    report = guard(biased, state=tmp_path / "biased.json", once=True, piece_size=200)
    assert not report.ok
    assert 2 <= len(saves) and saves[-1] == 10 and saves[0] < 10


def test_ledger_text_reaches_the_terminal_escaped_and_on_alarm_gets_json(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A stream named with a terminal escape sequence: the alarm line shows it escaped; the
    --on-alarm command gets the alarm as JSON on stdin (an argument list, no shell)."""
    evil = "slot\x1b[2J\x1b]0;pwned\x07-discount"
    db = legacy_ledger(tmp_path / "coin.db", 0.65, 2000, stream=evil)
    sink = tmp_path / "alarms.jsonl"
    script = "import sys; open(sys.argv[1], 'ab').write(sys.stdin.buffer.read() + bytes([10]))"
    hook = f'{sys.executable} -c "{script}" {sink}'
    assert 1 == main(["guard", str(db), "--once", "--on-alarm", hook])
    out = capsys.readouterr()
    assert "\x1b" not in out.err and "\x07" not in out.err and "\x1b" not in out.out
    assert "slot\\x1b[2J" in out.err
    got = [orjson.loads(line) for line in sink.read_bytes().splitlines()]
    assert evil in {a["stream"] for a in got}
    assert {"stream", "test", "evidence", "decision"} <= set(got[0])


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["guard", "{tmp}/missing.db", "--once"], "no such file"),
        (["guard", "{tmp}/coin.db", "--once", "--state", "{tmp}/bad.json"], "is not JSON"),
        (["guard", "{tmp}/coin.db", "--once", "--alpha", "2"], "alpha must be"),
        (["guard", "{tmp}/coin.db", "--once", "--interval", "0"], "interval must be"),
        (["guard", "{tmp}/coin.db", "--once", "--on-alarm", ""], "--on-alarm: give a command"),
    ],
)
def test_bad_usage_exits_2_with_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], argv: list[str], message: str
) -> None:
    legacy_ledger(tmp_path / "coin.db", 0.5, 20)
    (tmp_path / "bad.json").write_text("{not json", encoding="utf-8")
    assert 2 == main([a.format(tmp=tmp_path) for a in argv])
    err = capsys.readouterr().err
    assert 1 == len(err.splitlines()) and message in err and "Traceback" not in err


def test_a_state_of_another_ledger_is_refused(tmp_path: Path) -> None:
    a = legacy_ledger(tmp_path / "a.db", 0.5, 20)
    b = legacy_ledger(tmp_path / "b.db", 0.5, 20)
    state = tmp_path / "state.json"
    guard(a, state=state, once=True)
    with pytest.raises(ReplayError, match="follows another ledger"):
        guard(b, state=state, once=True)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def test_metrics_are_served_on_loopback_in_the_prometheus_text_format(tmp_path: Path) -> None:
    db = legacy_ledger(tmp_path / "coin.db", 0.5, 500)
    port = _free_port()
    scraped: list[str] = []

    def scrape(_seconds: float) -> None:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10) as r:
            scraped.append(r.read().decode())
        legacy_ledger(db, 0.5, 100, seed=8)  # the ledger grows between looks

    guard(db, metrics_port=port, steps=2, interval=0.01, sleep=scrape)
    text = scraped[0]
    assert "drawledger_guard_decisions_seen 500.0" in text
    assert 'drawledger_guard_evidence{draw="",stream="slot-discount",test="ratio"}' in text
    assert "drawledger_guard_lag_records 0.0" in text
    with pytest.raises(OSError):  # the server stopped with the guard
        urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=2)


def test_a_parquet_ledger_gives_the_statistics_of_the_same_sqlite_ledger(tmp_path: Path) -> None:
    coin = legacy_ledger(tmp_path / "coin.db", 0.5, 700)
    (tmp_path / "pq").mkdir()
    assert 0 == main(["ingest", str(_as_jsonl(coin, tmp_path)), str(tmp_path / "pq")])
    a = guard(coin, once=True, piece_size=100)
    b = guard(tmp_path / "pq", once=True, piece_size=100)
    assert a.state.decisions == b.state.decisions == 700
    assert [w.counts for w in a.state.watches.values()] == [
        w.counts for w in b.state.watches.values()]  # fmt: skip


def _as_jsonl(db: Path, tmp_path: Path) -> Path:
    """The declared draws of an SQLite ledger as JSON Lines for ``drawledger ingest``."""
    out = tmp_path / "draws.jsonl"
    with sqlite3.connect(db) as conn:
        rows = conn.execute("SELECT d.decision_id, d.stream, d.ts, r.kind, r.args, r.value, "
                            "r.prob, r.u FROM decisions d JOIN draws r USING (decision_id) "
                            "ORDER BY d.seq").fetchall()  # fmt: skip
    out.write_bytes(b"".join(orjson.dumps({
        "decision_id": did, "stream": s, "unit": None, "ts": ts, "kind": k,
        "args": orjson.loads(a), "value": orjson.loads(v), "prob": p, "u": orjson.loads(u),
    }) + b"\n" for did, s, ts, k, a, v, p, u in rows))  # fmt: skip
    return out


@pytest.mark.postgres
def test_a_postgresql_ledger_is_followed_like_sqlite(postgres_url: str, tmp_path: Path) -> None:
    shop_ledger(postgres_url, 100)
    state = tmp_path / "state.json"
    first = guard(postgres_url, path=[SUPPORT], state=state, once=True, piece_size=64)
    assert (200, 200) == (first.state.decisions, first.state.verify["verified"])
    shop_ledger(postgres_url, 50, start=100)
    again = guard(postgres_url, path=[SUPPORT], state=state, once=True, piece_size=64)
    assert (300, 300, True) == (again.state.decisions, again.state.verify["verified"], again.ok)


def test_a_hole_longer_than_a_piece_is_stepped_over_not_stuck_at(tmp_path: Path) -> None:
    """A writer's seqs jump past a whole piece: the guard reports the gap and goes on."""
    db = tmp_path / "shop.db"
    shop_ledger(db, 100)
    with sqlite3.connect(db) as conn:
        conn.execute("DELETE FROM decisions WHERE seq BETWEEN 40 AND 150")
    report = guard(db, path=[SUPPORT], once=True, gap_wait=0.0, piece_size=20)
    assert (89, 0) == (report.state.decisions, report.lag_records)
    assert 111 == report.state.integrity["gaps"]  # seqs 40 to 150


def test_the_first_record_of_a_writer_missing_is_reported_once_waited_for(tmp_path: Path) -> None:
    db = tmp_path / "shop.db"
    shop_ledger(db, 50)
    with sqlite3.connect(db) as conn:
        conn.execute("DELETE FROM decisions WHERE seq = 0")
    report = guard(db, path=[SUPPORT], once=True, gap_wait=0.0)
    assert 99 == report.state.decisions
    assert "integrity:gaps" in {a["test"] for a in report.state.alarms}


def test_docs_guard_python_runs(tmp_path: Path, run_markdown: Any) -> None:
    """The Python block of docs/guard.md runs as written and prints what it says."""
    done = run_markdown("docs/guard.md")
    assert 0 == done.returncode, done.stderr
    assert "True ratio\n" == done.stdout


def _grow_and_watch(ledgers: int, batches: int, size: int, drift_at: int | None,
                    tmp_path: Path) -> tuple[list[int | None], list[bool]]:  # fmt: skip
    """Declared 50/50 coins recorded in batches, the guard run once after each batch (resuming
    from its state file). Per ledger: the decisions from the drift (to 0.55 at batch
    ``drift_at``) to the guard's alarm (None: no alarm), and whether a fixed-n chi-square of the
    counts re-run after every batch ever had p < 0.01 (scipy.stats.chisquare)."""
    import numpy as np
    from scipy import stats

    delays: list[int | None] = []
    fixed: list[bool] = []
    for k in range(ledgers):
        db, state = tmp_path / f"coin-{k}.db", tmp_path / f"state-{k}.json"
        rng = np.random.default_rng(1000 + k)
        found: int | None = None
        fixed_alarm = False
        for b in range(batches):
            p = 0.55 if drift_at is not None and b >= drift_at else 0.5
            led = dl.Ledger(db)
            for i, u in enumerate(rng.random(size)):
                led.record_draw("slot-discount", "bernoulli", {"p": 0.5}, bool(u < p), 0.5,
                                decision_id=f"c{k}-{b}-{i}", u=[float(u)],
                                ts=T0 + b * size + i)  # fmt: skip
            led.close()
            report = guard(db, state=state, once=True)
            counts = next(iter(report.state.watches.values())).counts
            fixed_alarm |= bool(stats.chisquare(counts).pvalue < 0.01)
            if not report.ok:
                found = (b + 1 - (drift_at or 0)) * size
                break
        delays.append(found)
        fixed.append(fixed_alarm)
    return delays, fixed


@pytest.mark.slow
def test_growing_ledgers_watched_by_the_guard_keep_alpha(tmp_path: Path) -> None:
    """100 real ledgers x 200 batches of 25, correct randomization, the guard resuming from
    its state file after each batch: the share of ledgers with any alarm stays within the
    binomial tolerance of alpha = 0.01 (scipy.stats.binom, 99th percentile); the chi-square
    re-run after every batch alarms on more of them (about 20 minutes on a shared machine;
    the simulated watches of tests/test_guard_evidence.py run 1000 x 200)."""
    from scipy import stats

    delays, fixed = _grow_and_watch(100, 200, 25, None, tmp_path)
    alarmed = sum(d is not None for d in delays)
    print(f"\nguard: {alarmed}/100 ledgers alarmed; chi-square per batch: {sum(fixed)}/100")
    assert alarmed <= stats.binom.ppf(0.99, 100, 0.01)
    assert sum(fixed) >= max(2 * alarmed, 5)


@pytest.mark.slow
def test_a_drift_in_a_growing_ledger_is_found_by_the_guard(tmp_path: Path) -> None:
    """0.5 -> 0.55 from batch 100 of 200 (batches of 200): the median delay in decisions."""
    import numpy as np

    delays, _ = _grow_and_watch(10, 200, 200, 100, tmp_path)
    found = [d for d in delays if d is not None]
    print(f"\nguard on growing ledgers: {len(found)}/10 alarmed after the drift, median delay "
          f"{np.median(found):.0f} decisions")  # fmt: skip
    assert len(found) >= 9


@pytest.mark.slow
def test_the_guard_follows_the_live_example_service_under_load(
    request: pytest.FixtureRequest, tmp_path: Path
) -> None:
    """The FastAPI example on loopback under load, the guard following its ledger with its
    metrics on loopback: scraped while the load runs and after, every decision is taken in
    and verified, and no alarm fires."""
    port, ledger = request.getfixturevalue("service")
    load = subprocess.Popen([sys.executable, str(EXAMPLES / "load.py"), "--port", str(port),
                             "--sessions", "400", "--ledger", str(ledger)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)  # fmt: skip
    deadline = time.monotonic() + 60
    while not ledger.exists() and time.monotonic() < deadline:
        time.sleep(0.1)
    mport = _free_port()
    watcher = subprocess.Popen(
        [sys.executable, "-m", "drawledger.cli", "guard", str(ledger), "--path", str(EXAMPLES),
         "--state", str(tmp_path / "guard.json"), "--interval", "0.2",
         "--metrics-port", str(mport)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip

    def scrape() -> dict[str, float]:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{mport}/metrics", timeout=5) as r:
                text = r.read().decode()
        except OSError:
            return {}
        return {line.split(" ")[0]: float(line.split(" ")[1]) for line in text.splitlines()
                if line.startswith("drawledger_guard_") and "{" not in line}  # fmt: skip

    try:
        during = []
        while load.poll() is None:
            during.append(scrape().get("drawledger_guard_decisions_seen"))
            time.sleep(0.3)
        assert 0 == load.returncode, load.stderr.read()  # type: ignore[union-attr]
        deadline = time.monotonic() + 120
        seen: dict[str, float] = {}
        while time.monotonic() < deadline:
            seen = scrape()
            if seen.get("drawledger_guard_decisions_seen") == 800:
                break
            time.sleep(0.3)
    finally:
        watcher.send_signal(signal.SIGINT)
        _out, err = watcher.communicate(timeout=60)
    print(f"\nseen while the load ran: {during}; after: {seen}")
    assert 800 == seen["drawledger_guard_decisions_seen"]
    assert 800 == seen["drawledger_guard_decisions_verified"]
    assert 0 == seen["drawledger_guard_alarms"] == seen["drawledger_guard_lag_records"]
    assert "ALARM" not in err


def test_a_ledger_replaced_under_the_state_file_is_refused_not_followed(tmp_path: Path) -> None:
    """A demo re-run replaces the ledger at the same path: the state covered more than the new
    ledger holds, and the guard says so instead of waiting forever for records."""
    db, state = tmp_path / "coin.db", tmp_path / "state.json"
    legacy_ledger(db, 0.5, 300)
    guard(db, state=state, once=True)
    db.unlink()
    legacy_ledger(db, 0.5, 100)
    with pytest.raises(ReplayError, match="the ledger was replaced or records were removed"):
        guard(db, state=state, once=True)


def test_a_changed_declaration_stops_the_ratio_process_without_an_alarm(tmp_path: Path) -> None:
    """A coin declared 0.5, then 0.3 (a new arm split), each drawn as declared: the ratio
    process stops at the change and says so; no alarm."""
    import numpy as np

    db = tmp_path / "coin.db"
    led = dl.Ledger(db)
    u = np.random.default_rng(3).random(2000)
    for i in range(2000):
        p = 0.5 if i < 1000 else 0.3
        led.record_draw("slot-discount", "bernoulli", {"p": p}, bool(u[i] < p),
                        p if u[i] < p else 1 - p, decision_id=f"d{i}", u=[float(u[i])])  # fmt: skip
    led.close()
    report = guard(db, once=True)
    (watch,) = report.state.watches.values()
    assert (True, 1000) == (report.ok, watch.n)
    assert watch.stopped is not None and "declared probabilities changed" in watch.stopped


def test_parquet_parts_of_interleaved_streams_are_taken_whole_in_small_pieces(
    tmp_path: Path,
) -> None:
    """Two streams recorded alternately: each batch writes one part file per stream with
    interleaved seqs. Pieces smaller than a part still take every overlapping part, so the
    chain has no gap and every decision verifies, as on SQLite."""
    shop_ledger(tmp_path / "pq", 150, format="parquet")
    shop_ledger(tmp_path / "shop.db", 150)
    a = guard(tmp_path / "pq", path=[SUPPORT], once=True, piece_size=7, gap_wait=0.0)
    b = guard(tmp_path / "shop.db", path=[SUPPORT], once=True, piece_size=7, gap_wait=0.0)
    assert (300, 300, True) == (a.state.decisions, a.state.verify["verified"], a.ok)
    assert 0 == sum(a.state.integrity.values())
    assert set(b.state.watches) == set(a.state.watches)  # the same draws watched


def test_the_window_shows_a_recent_drift_as_information_not_an_alarm(tmp_path: Path) -> None:
    """20 000 coins drawn as declared, then 3000 at 0.54: the window of the last 3000 shows
    the drift (p < alpha); the cumulative evidence, diluted, raises no alarm, and the window
    does not change the verdict."""
    import numpy as np

    db = tmp_path / "coin.db"
    led = dl.Ledger(db)
    u = np.random.default_rng(11).random(23_000)
    for i in range(23_000):
        p = 0.5 if i < 20_000 else 0.54
        # no uniforms: a value drawn at 0.54 from its uniform would contradict it (consistency)
        led.record_draw("slot-discount", "bernoulli", {"p": 0.5}, bool(u[i] < p), 0.5,
                        decision_id=f"d{i}")  # fmt: skip
    led.close()
    report = guard(db, once=True, window=3000)
    (draw,) = report.to_dict()["draws"]
    assert (True, 3000, True) == (report.ok, draw["window"]["n"], draw["window"]["drift"])


@given(st.text(), st.text())
def test_nothing_unprintable_reaches_the_terminal(stream: str, decision: str) -> None:
    """Whatever a ledger holds, an alarm line is one line without control, bidirectional or
    invisible format characters (drawledger._text's definition of unsafe)."""
    from drawledger._text import visible

    line = alarm_line({"stream": stream, "draw": stream, "test": "ratio", "evidence": 1e3,
                       "threshold": 200.0, "decision": decision, "detail": stream})  # fmt: skip
    assert visible(line) == line  # nothing left to escape


JSON = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**63), 2**63 - 1) | st.floats(allow_nan=False)
    | st.text(max_size=5),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=8), inner,
                                                                  max_size=4),
    max_leaves=12,
)  # fmt: skip


@given(JSON, st.sampled_from(["writers", "watches", "verify", "alarms", "decisions", None]))
def test_a_damaged_state_file_is_refused_with_a_replay_error(junk: Any, where: str | None) -> None:
    """Any JSON in place of a state, or in place of one of its parts: a ReplayError naming the
    file, never another exception (and never a state that looks valid but is not)."""
    import tempfile

    good = {"version": 1, "ledger": "x.db", "writers": {}, "watches": [], "decisions": 0,
            "outcomes": 0, "verify": {}, "by_reason": {}, "integrity": {}, "alarms": [],
            "pieces": 0}  # fmt: skip
    data = junk if where is None else {**good, where: junk}
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "state.json"
        path.write_bytes(orjson.dumps(data))
        try:
            load_state(path, "x.db")
        except ReplayError as exc:
            assert "state.json" in str(exc)


def test_ctrl_c_between_looks_ends_following_with_the_summary(tmp_path: Path) -> None:
    db = legacy_ledger(tmp_path / "coin.db", 0.5, 50)

    def interrupted(_seconds: float) -> None:
        raise KeyboardInterrupt

    report = guard(db, interval=60.0, sleep=interrupted)
    assert (True, 50) == (report.ok, report.state.decisions)


def test_json_dash_puts_the_summary_alone_on_stdout(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    db = legacy_ledger(tmp_path / "coin.db", 0.5, 100)
    assert 0 == main(["guard", str(db), "--once", "--json", "-"])
    data = orjson.loads(capsys.readouterr().out)
    assert (True, 100) == (data["ok"], data["decisions"])


def test_a_failing_on_alarm_command_is_one_line_and_the_guard_goes_on(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    db = legacy_ledger(tmp_path / "coin.db", 0.65, 2000)
    hook = f'{sys.executable} -c "import sys; sys.exit(3)"'
    assert 1 == main(["guard", str(db), "--once", "--on-alarm", hook])
    err = capsys.readouterr().err
    assert "drawledger guard: --on-alarm command exited 3\n" in err
    assert "test ratio" in err
