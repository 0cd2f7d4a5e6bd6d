"""``drawledger estimate``: options, JSON output, figure, exit codes and one-line errors."""

from __future__ import annotations

import json
import math
import re
import shutil
import sqlite3
from pathlib import Path
from typing import Any

import estimate_shop as shop
import orjson
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import drawledger as dl
from drawledger._cli_estimate import assignments, reward_range, sweep_grid
from drawledger.cli import main

SUPPORT = str(Path(__file__).parent / "support")


@pytest.fixture(scope="module")
def cards(tmp_path_factory: pytest.TempPathFactory) -> str:
    """400 recipe-card decisions recorded through a real SQLite ledger (softmax, T = 0.7)."""
    path = tmp_path_factory.mktemp("cli") / "cards.db"
    led = dl.Ledger(path)
    shop.simulate_cards(led, 400, seed=11)
    led.close()
    return str(path)


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(["estimate", *argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_set_temperature_end_to_end_writes_the_design_json(cards, tmp_path, capsys):
    """The analyst's question through the command line: temperature 0.3 instead of 0.7."""
    out_json = tmp_path / "estimate.json"
    code, out, err = _run(capsys, cards, "--reward", "checkout", "--set", "temperature=0.3",
                          "--path", SUPPORT, "--json", str(out_json))  # fmt: skip
    assert (0, "") == (code, err)
    data = orjson.loads(out_json.read_bytes())
    assert 400 == data["n"]
    assert {"temperature": 0.3} == data["target"]["overrides"]
    assert {"ips", "snips", "clipped", "dr"} == set(data["estimates"])
    assert {"ess", "max_weight", "support_deficit"} <= set(data["diagnostics"])
    assert "bias_bound" in data["estimates"]["clipped"]
    for word in ("snips", "effective sample size", "temperature=0.3"):
        assert word in out


def test_a_support_deficit_exits_1_with_a_warning(tmp_path, capsys):
    path = tmp_path / "greedy.db"
    led = dl.Ledger(path)
    shop.simulate_cards(led, 80, seed=4, decision=shop.greedy_card)
    led.close()
    code, out, _ = _run(capsys, str(path), "--reward", "checkout", "--set", "epsilon=0.2")
    assert 1 == code
    assert "cannot answer" in out


def test_sweep_writes_a_table_a_figure_and_json(cards, tmp_path, capsys):
    plot, out_json = tmp_path / "sweep.png", tmp_path / "sweep.json"
    argv = ["--sweep", "temperature=0.3:0.9:3", "--plot", str(plot), "--json", str(out_json)]
    code, out, _ = _run(capsys, cards, "--reward", "checkout", *argv)
    assert 0 == code
    assert plot.read_bytes().startswith(b"\x89PNG")
    data = orjson.loads(out_json.read_bytes())
    assert [0.3, 0.6, 0.9] == [p["value"] for p in data["points"]]
    assert "temperature sweep" in out


@pytest.mark.parametrize(
    "extra",
    [
        ["--baseline-set", "temperature=1.5", "--set", "temperature=0.3"],
        ["--target", "estimate_shop:best_card"],
        ["--baseline-target", "estimate_shop:best_card"],
        ["--set", "temperature=0.3", "--by", "ctx.segment"],
        ["--set", "temperature=0.3", "--interval", "bootstrap", "--bootstrap", "100"],
        ["--set", "temperature=0.3", "--interval", "bernstein", "--reward-range", "0,1"],
        ["--set", "temperature=0.3", "--clip", "1.5", "--level", "0.9", "--seed", "3"],
        ["--set", "temperature=0.3", "--missing-reward", "exclude", "--stream", "recipe-card"],
    ],
)
def test_what_if_options_reach_the_library(cards, tmp_path, capsys, extra):
    out_json = tmp_path / "e.json"
    code, _, err = _run(capsys, cards, "--reward", "checkout", "--path", SUPPORT, *extra,
                        "--json", str(out_json))  # fmt: skip
    assert (0, "") == (code, err)
    data: dict[str, Any] = orjson.loads(out_json.read_bytes())
    if "--baseline-set" in extra:
        assert {"overrides": {"temperature": 1.5}} == {
            k: v for k, v in data["baseline"].items() if k not in ("estimates", "diagnostics")
        }
        assert 0.0 == data["baseline"]["diagnostics"]["support_deficit"]  # softmax: all cards
    if "--target" in extra:
        assert "estimate_shop:best_card" == data["target"]["callable"]
    if "--by" in extra:
        assert 400 == sum(g["n"] for g in data["segments"]["groups"])
    if "bootstrap" in extra:
        assert ("bootstrap", 100) == (data["settings"]["interval"], data["settings"]["bootstrap"])
    if "--clip" in extra:
        assert (1.5, 0.9, 3) == tuple(data["settings"][k] for k in ("clip", "level", "seed"))
    if "bernstein" in extra:
        assert [0.0, 1.0] == data["settings"]["reward_range"]


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--set", "temperature"], "expected NAME=VALUE"),
        (["--set", "temprature=0.3"], "temprature is not a policy parameter"),
        (["--set", "temperature=warm"], "temperature='warm' (given with --set"),
        (["--sweep", "temperature=0.1:1"], "expected NAME=START:STOP:POINTS"),
        (["--sweep", "temperature=0.1:1:1"], "POINTS must be between 2 and 1000"),
        (["--sweep", "temperature=0.1:nan:3"], "START and STOP must be finite"),
        (["--plot", "x.png"], "--plot draws the curve of --sweep"),
        (["--sweep", "temperature=0.1:1:3", "--by", "unit"], "cannot be combined"),
        (["--set", "temperature=0.3", "--target", "estimate_shop:best_card"], "either --set"),
        (["--baseline-set", "temperature=1", "--baseline-target", "m:f"], "not both"),
        (["--reward-range", "0-1"], "expected LOW,HIGH"),
        (["--reward-range", "1,0"], "LOW < HIGH"),
        (["--reward-range", "0,0.5"], "outside reward_range"),
        (["--missing-reward", "maybe"], "a number or 'exclude'"),
        (["--interval", "bootstrap", "--bootstrap", "-5"], "resamples >= 0"),
        (["--stream", "banner"], "no decisions of stream 'banner'"),
    ],
)
def test_bad_usage_exits_2_with_one_line(cards, capsys, argv, message):
    code, _, err = _run(capsys, cards, "--reward", "checkout", *argv)
    assert 2 == code
    assert message in err
    assert 1 == len(err.strip().splitlines())
    assert err.startswith("drawledger estimate: error: ")


def test_unknown_reward_and_missing_ledger_exit_2(cards, tmp_path, capsys):
    code, _, err = _run(capsys, cards, "--reward", "refund")
    assert 2 == code and "no outcome named 'refund'" in err
    code, _, err = _run(capsys, str(tmp_path / "nope.db"), "--reward", "checkout")
    assert 2 == code and "no ledger" in err


def test_set_values_are_json_when_they_parse_else_text():
    got = assignments(["t=0.3", "on=true", "name=warm", "xs=[1, 2]", 'q="0.3"', "e="], "--set")
    assert {"t": 0.3, "on": True, "name": "warm", "xs": [1, 2], "q": "0.3", "e": ""} == got


def test_sweep_grid_is_evenly_spaced_and_inclusive():
    assert ("temperature", [0.2, 0.4, 0.6, 0.8, 1.0]) == sweep_grid("temperature=0.2:1.0:5")


def test_sweep_grid_of_integers_written_as_integers_is_integers():
    """A count (an integer draw's bound) accepts no 8000.0; 1:4:3 has 2.5 in it, so floats."""
    name, values = sweep_grid("codes=4000:10000:4")
    assert ("codes", [4000, 6000, 8000, 10000]) == (name, values)
    assert {int} == {type(v) for v in values}
    assert {float} == {type(v) for v in sweep_grid("k=1:4:3")[1]}
    assert {float} == {type(v) for v in sweep_grid("k=1.0:4.0:4")[1]}


def test_reward_range_reads_low_comma_high_or_low_colon_high():
    assert (0.0, 1.0) == reward_range("0,1")
    assert (0.0, 1.0) == reward_range("0:1")
    assert (-1.5, 2.0) == reward_range("-1.5,2")


@given(st.text(max_size=12))
@settings(max_examples=200, deadline=None)
def test_reward_range_text_is_two_ordered_numbers_or_one_line_error(text):
    try:
        lo, hi = reward_range(text)
    except ValueError as e:
        assert str(e).startswith(f"--reward-range {text!r}: ")
        assert 1 == len(str(e).splitlines())
    else:
        assert math.isfinite(lo) and math.isfinite(hi) and lo < hi


@given(
    st.one_of(
        st.text(max_size=20),
        st.builds(
            "t={}:{}:{}".format,
            st.sampled_from(["0.2", "nan", "inf", "-inf", "1e400", "-1e308", "x", ""]),
            st.sampled_from(["1", "NaN", "Infinity", "1e308"]),
            st.sampled_from(["2", "5", "0", "-3", "1.5"]),
        ),
    )
)
@settings(max_examples=300, deadline=None)
def test_sweep_text_is_a_finite_grid_or_one_line_error(text):
    """Any --sweep text gives at least two finite values, or a one-line error naming it."""
    try:
        name, values = sweep_grid(text)
    except ValueError as e:
        assert str(e).startswith(f"--sweep {text!r}: ")
        assert 1 == len(str(e).splitlines())
    else:
        assert name and len(values) >= 2
        assert all(math.isfinite(v) for v in values), values


def test_bernstein_note_and_given_range_reach_the_json(cards, tmp_path, capsys):
    """Without --reward-range the Bernstein interval says it has no finite-sample guarantee
    (Maurer & Pontil 2009 need a range fixed in advance), on the terminal and in the JSON."""
    out_json = tmp_path / "b.json"
    argv = ["--reward", "checkout", "--path", SUPPORT, "--set", "temperature=0.3",
            "--interval", "bernstein", "--json", str(out_json)]  # fmt: skip
    code, out, _ = _run(capsys, cards, *argv)
    assert 0 == code
    assert "no finite-sample guarantee" in out
    data = orjson.loads(out_json.read_bytes())
    assert "observed" == data["settings"]["reward_range_source"]
    assert any("no finite-sample guarantee" in w for w in data["warnings"])
    code, out, _ = _run(capsys, cards, *argv, "--reward-range", "0,1")
    data = orjson.loads(out_json.read_bytes())
    assert (0, "given") == (code, data["settings"]["reward_range_source"])
    assert "no finite-sample guarantee" not in out
    for e in data["estimates"].values():
        assert 0.0 <= e["low"] <= e["high"] <= 1.0


@pytest.fixture
def edited(cards: str, tmp_path: Path) -> str:
    """The cards ledger with every checkout of 0 edited to 1 without the integrity key."""
    path = tmp_path / "edited.db"
    shutil.copy(cards, path)
    with sqlite3.connect(path) as conn:
        conn.execute("UPDATE outcomes SET value = 1.0 WHERE value = 0.0")
    return str(path)


def test_a_ledger_that_fails_integrity_is_refused_with_exit_1(edited, tmp_path, capsys):
    out_json = tmp_path / "estimate.json"
    out_json.write_text('{"ok": true}')  # an earlier run's result must not survive
    code, out, err = _run(capsys, edited, "--reward", "checkout", "--set", "temperature=0.3",
                          "--json", str(out_json))  # fmt: skip
    assert 1 == code
    assert "" == out
    assert 1 == len(err.strip().splitlines())
    assert err.startswith("drawledger estimate: refused: the ledger fails its integrity check "
                          "(bad_hashes: ")  # fmt: skip
    data = orjson.loads(out_json.read_bytes())
    assert (False, "integrity") == (data["ok"], data["refused"]["check"])
    code, _, err = _run(capsys, edited, "--reward", "checkout", "--sweep",
                        "temperature=0.3:0.9:3")  # fmt: skip
    assert 1 == code and "refused: the ledger fails its integrity check" in err


def test_accepted_integrity_failures_are_said_first_and_exit_1(edited, tmp_path, capsys):
    out_json = tmp_path / "estimate.json"
    code, out, err = _run(capsys, edited, "--reward", "checkout", "--set", "temperature=0.3",
                          "--accept-integrity-failures", "--json", str(out_json))  # fmt: skip
    assert (1, "") == (code, err)
    assert out.startswith("ALERT: INTEGRITY FAILURES ACCEPTED (bad_hashes: ")
    data = orjson.loads(out_json.read_bytes())
    assert "alerts" == next(iter(data))
    assert data["accepted_failures"]["integrity"]["bad_hashes"] > 0
    assert data["ok"] is False


def test_a_stream_failing_replay_is_refused_unless_its_reasons_are_accepted(tmp_path, capsys):
    path = tmp_path / "sloppy.db"
    led = dl.Ledger(path)
    shop.simulate_cards(led, 120, seed=8, decision=shop.sloppy_card)
    led.close()
    code, out, err = _run(capsys, str(path), "--reward", "checkout", "--path", SUPPORT)
    assert (1, "") == (code, out)
    assert re.match(r"drawledger estimate: refused: \d+ of 120 decisions of stream "
                    r"'sloppy-card' failed verification \(action: \d+", err)  # fmt: skip
    code, out, err = _run(capsys, str(path), "--reward", "checkout", "--path", SUPPORT,
                          "--accept-verification-failures", "action,nondeterministic")  # fmt: skip
    assert (1, "") == (code, err)
    assert out.startswith("ALERT: VERIFICATION FAILURES ACCEPTED: ")
    assert "biased" in out.split("logging policy")[0]


def test_a_reward_the_stream_never_received_exits_2_naming_its_outcomes(tmp_path, capsys):
    led = dl.Ledger(tmp_path / "two.db")
    shop.use(led, seed=2)
    for i in range(10):
        shop.feature_card(shop.context(i % 4), decision_id=f"c{i}")
        shop.reminder_delay({"items": 2}, decision_id=f"r{i}")
        led.outcome(f"c{i}", "checkout", 1.0)
        led.outcome(f"r{i}", "reminder_open", 1.0)
    led.close()
    code, out, err = _run(capsys, str(tmp_path / "two.db"), "--reward", "reminder_open",
                          "--stream", "recipe-card")  # fmt: skip
    assert (2, "") == (code, out)
    assert ("drawledger estimate: error: no decision of stream 'recipe-card' has a "
            "'reminder_open' outcome; its outcomes are: 'checkout'\n") == err  # fmt: skip


def test_an_unknown_reason_to_accept_exits_2(cards, capsys):
    code, _, err = _run(capsys, cards, "--reward", "checkout",
                        "--accept-verification-failures", "luck")  # fmt: skip
    assert 2 == code and "unknown verification reason 'luck'" in err


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--json", "{tmp}/missing/e.json"], "--json {tmp}/missing/e.json: no folder"),
        (["--sweep", "temperature=0.3:1:2", "--plot", "{tmp}/missing/c.png"], "--plot"),
        (["--sweep", "temperature=0.3:1:2", "--plot", "{tmp}/c.gif"], ".png, .svg or .pdf"),
    ],
)
def test_an_unwritable_output_is_refused_before_any_work(tmp_path, capsys, argv, message):
    """The ledger is missing too: the output is named, so it was checked before the run."""
    args = [a.replace("{tmp}", str(tmp_path)) for a in argv]
    code, _, err = _run(capsys, str(tmp_path / "nope.db"), "--reward", "checkout", *args)
    assert 2 == code
    assert message.replace("{tmp}", str(tmp_path)) in err
    assert 1 == len(err.strip().splitlines())


def _four(x: float | None) -> str:
    return "-" if x is None else f"{x:.4f}"


def test_a_piped_estimate_prints_every_number_in_full_at_80_columns(cards, tmp_path, cli_pipe):
    """In a CI log (stdout a pipe, COLUMNS=80) no column or interval is cut: every value,
    bound and difference of the JSON appears in the text, and each estimator's row whole."""
    out_json = tmp_path / "estimate.json"
    done = cli_pipe("estimate", cards, "--reward", "checkout", "--set", "temperature=0.3",
                    "--path", SUPPORT, "--by", "ctx.segment", "--json", str(out_json))  # fmt: skip
    assert 0 == done.returncode, done.stderr
    data = orjson.loads(out_json.read_bytes())
    for name, e in data["estimates"].items():
        d = data["difference"][name]
        row = rf"^\s*{name}\s+{_four(e['value'])}\s+\[{_four(e['low'])}, {_four(e['high'])}\]"
        diff = rf"^\s*{name}\s+{_four(d['value'])}\s+\[{_four(d['low'])}, {_four(d['high'])}\]"
        assert re.search(row, done.stdout, re.M), (name, done.stdout)
        assert re.search(diff, done.stdout, re.M), (name, done.stdout)  # the difference table
    clipped = data["estimates"]["clipped"]
    assert f"[{_four(clipped['outer_low'])}, {_four(clipped['outer_high'])}]" in done.stdout
    assert f"{data['diagnostics']['ess']:.1f}" in done.stdout
    for seg in data["segments"]["groups"]:
        e = seg["estimates"]["snips"]
        assert f"{_four(e['value'])}   [{_four(e['low'])}, {_four(e['high'])}]" in done.stdout


def test_a_piped_sweep_prints_every_point_in_full_at_80_columns(cards, tmp_path, cli_pipe):
    out_json = tmp_path / "sweep.json"
    done = cli_pipe("estimate", cards, "--reward", "checkout", "--path", SUPPORT, "--sweep",
                    "temperature=0.3:1.1:5", "--json", str(out_json))  # fmt: skip
    assert 0 == done.returncode, done.stderr
    data = orjson.loads(out_json.read_bytes())
    for p in data["points"]:
        s, r = p["estimates"]["snips"], p["estimates"]["dr"]
        row = (rf"^\s*{p['value']:g}\s+{_four(s['value'])}\s+\[{_four(s['low'])}, "
               rf"{_four(s['high'])}\]\s+{_four(r['value'])}\s+\[{_four(r['low'])}, "
               rf"{_four(r['high'])}\]\s+{p['diagnostics']['ess']:.1f}")  # fmt: skip
        assert re.search(row, done.stdout, re.M), (p["value"], done.stdout)


def test_json_dash_writes_the_json_alone_on_stdout(cards, cli_pipe):
    """`--json -`: stdout is the JSON and nothing else; the tables go to stderr."""
    done = cli_pipe("estimate", cards, "--reward", "checkout", "--set", "temperature=0.3",
                    "--path", SUPPORT, "--json", "-")  # fmt: skip
    assert 0 == done.returncode, done.stderr
    assert 400 == json.loads(done.stdout)["n"]
    assert "effective sample size" in done.stderr


def test_a_refused_estimate_with_json_dash_writes_the_refusal_on_stdout(tmp_path, cli_pipe):
    path = tmp_path / "cards.db"
    with dl.Ledger(path) as led:
        shop.simulate_cards(led, 60, seed=3)
    sqlite3.connect(path).execute("DELETE FROM decisions WHERE seq = 5").connection.commit()
    done = cli_pipe("estimate", str(path), "--reward", "checkout", "--set", "temperature=0.3",
                    "--path", SUPPORT, "--json", "-")  # fmt: skip
    assert 1 == done.returncode
    assert {"ok": False} == {"ok": json.loads(done.stdout)["ok"]}


def test_quiet_prints_nothing_and_keeps_the_exit_code_and_files(cards, tmp_path, capsys):
    out_json = tmp_path / "estimate.json"
    code, out, err = _run(capsys, cards, "--reward", "checkout", "--set", "temperature=0.3",
                          "--path", SUPPORT, "--json", str(out_json), "--quiet")  # fmt: skip
    assert (0, "", "") == (code, out, err)
    assert 400 == orjson.loads(out_json.read_bytes())["n"]


def test_a_bucket_stream_is_refused_in_readable_text(tmp_path, capsys):
    """Hashed bucket assignments have no decision function: the one-line error says so in
    words and counts, never as a printed Python dict."""
    path = tmp_path / "slots.db"
    with dl.Ledger(path) as led:
        for i in range(40):
            led.bucket(f"shopper-{i}", {"control": 0.5, "free-delivery": 0.5}, salt="fee-test")
    ids = [r[0] for r in sqlite3.connect(path).execute("SELECT decision_id FROM decisions")]
    with dl.Ledger(path) as led:
        for i, did in enumerate(ids):
            led.outcome(did, "checkout", float(i % 2))
    code, out, err = _run(capsys, str(path), "--reward", "checkout")
    assert (2, "") == (code, out)
    assert "excluded: 40 decisions (no decision function (bucket assignment))" in err
    assert "{" not in err


def test_code_replay_may_not_import_is_refused_as_not_allowed_and_can_be_accepted(cards, cli_pipe):
    """In a fresh process without --path or --allow the decision module is not imported: the
    refusal names the reason not-allowed, which --accept-verification-failures knows."""
    done = cli_pipe("estimate", cards, "--reward", "checkout")
    assert (1, "") == (done.returncode, done.stdout)
    assert "(not-allowed: 400" in done.stderr
    done = cli_pipe("estimate", cards, "--reward", "checkout",
                    "--accept-verification-failures", "not-allowed")  # fmt: skip
    assert "unknown verification reason" not in done.stderr
    assert "excluded: 400 decisions (not-allowed)" in done.stderr
