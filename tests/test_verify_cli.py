"""``drawledger verify``: JSON keys, exit codes, export columns, one-line errors."""

from __future__ import annotations

import json
import os
import re
import shlex
import sqlite3
import subprocess
import sys
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import shop_decisions as sd

import drawledger as dl
from drawledger.cli import main

SUPPORT = str(Path(sd.__file__).parent)
DOC = Path(__file__).resolve().parent.parent / "docs" / "replay.md"


@pytest.fixture
def shop(ledger_path: Path) -> Path:
    led = dl.Ledger(ledger_path)
    sd.use(led)
    for i in range(8):
        ctx = sd.context(i)
        sd.feature_card(ctx, unit=f"shopper-{i}", decision_id=f"card-{i}")
        sd.explore_card(ctx, decision_id=f"explore-{i}")
        led.outcome(f"card-{i}", "checkout", float(i % 2))
    led.close()
    return ledger_path


def test_json_keys_and_exit_zero(shop: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    out = tmp_path / "verify.json"
    assert 0 == main(["verify", str(shop), "--allow", "shop_decisions", "--json", str(out)])
    data = json.loads(out.read_text())
    assert {"decisions", "verified", "mismatched", "unreplayable", "by_reason",
            "integrity"} <= set(data)  # fmt: skip
    assert {"ok", "gaps", "broken_links", "duplicates"} <= set(data["integrity"])
    assert (16, 16, 0, 0, {}) == (data["decisions"], data["verified"], data["mismatched"],
                                  data["unreplayable"], data["by_reason"])  # fmt: skip
    assert "verify passed" in capsys.readouterr().out


def test_found_problem_exits_one(shop: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    with sqlite3.connect(shop) as conn:
        conn.execute("UPDATE draws SET prob = 0.99 WHERE decision_id = 'card-2'")
    out = tmp_path / "verify.json"
    assert 1 == main(["verify", str(shop), "--path", SUPPORT, "--json", str(out)])
    data = json.loads(out.read_text())
    assert {"probability": 1, "integrity": 1} == data["by_reason"]
    assert "card-2" == data["examples"]["probability"][0]["decision_id"]
    assert data["integrity"]["ok"] is False
    assert "verify FAILED" in capsys.readouterr().out


def test_fresh_process_imports_nothing_without_path_or_allow(shop: Path, tmp_path: Path) -> None:
    """In a new process (the module importable through PYTHONPATH, but not named by --path or
    --allow) nothing is imported: every decision is not-allowed, exit 1."""
    env = {**os.environ, "PYTHONPATH": SUPPORT}
    out = tmp_path / "v.json"
    command = [sys.executable, "-m", "drawledger.cli", "verify", str(shop), "--json", str(out)]
    done = subprocess.run(command, env=env, capture_output=True, text=True, timeout=120)
    assert 1 == done.returncode, done.stderr
    assert {"not-allowed": 16} == json.loads(out.read_text())["by_reason"]
    assert "not-allowed" in done.stdout


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_export_columns(shop: Path, tmp_path: Path, suffix: str) -> None:
    target = tmp_path / f"props{suffix}"
    assert 0 == main(["verify", str(shop), "--path", SUPPORT, "--export", str(target),
                      "--jobs", "2", "--budget", "64"])  # fmt: skip
    data = pd.read_csv(target) if suffix == ".csv" else pd.read_parquet(target)
    for column in ("decision_id", "stream", "unit", "ts", "action", "propensity",
                   "logged_propensity", "verified", "reason", "propensity_method", "checkout",
                   "input.ctx.user_tier"):  # fmt: skip
        assert column in data.columns
    assert 16 == len(data)
    assert data["verified"].all()


@pytest.mark.parametrize(
    "args",
    [
        ["verify", "{tmp}/missing.db"],
        ["verify", "{tmp}/notes.txt"],
        ["verify", "{tmp}"],
        ["verify", "sqlite:///{tmp}/missing-dir/x.db"],
        ["verify", "nosuchdialect://host/db"],
        ["verify", "{ledger}", "--export", "{tmp}/props.xlsx"],
        ["verify", "{ledger}", "--export", "{tmp}/no-such-dir/props.csv"],
        ["verify", "{ledger}", "--jobs", "0"],
        ["verify", "{ledger}", "--budget", "-3"],
        ["verify", "{ledger}", "--engine", "dask"],
    ],
)
def test_bad_usage_gives_one_line_and_exit_two(
    args: list[str], shop: Path, tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    (tmp_path / "notes.txt").write_text("not a ledger")
    argv = [a.format(tmp=tmp_path, ledger=shop) for a in args]
    assert 2 == main(argv)
    err = capsys.readouterr().err
    assert 1 == len(err.strip().splitlines()), err
    assert err.startswith("drawledger verify: error: ")


def test_replay_doc_examples_run(tmp_path: Path) -> None:
    """docs/replay.md runs as written: its module, its Python blocks in order, its command."""
    text = DOC.read_text(encoding="utf-8")
    module, *script = re.findall(r"^```python\n(.*?)^```$", text, flags=re.S | re.M)
    assert module.startswith("# grocery_decisions.py\n")
    (tmp_path / "grocery_decisions.py").write_text(module, encoding="utf-8")
    (tmp_path / "example.py").write_text("\n\n".join(script), encoding="utf-8")
    done = subprocess.run([sys.executable, "example.py"], cwd=tmp_path, capture_output=True,
                          text=True, timeout=300)  # fmt: skip
    assert 0 == done.returncode, done.stderr
    assert "True 300 of 300 verified" in done.stdout
    assert "{'green-curry': 0.85, " in done.stdout
    assert "Propensity(value=0.625, method='enumerated', stderr=0.0)" in done.stdout
    (command,) = re.findall(r"^```bash\n(drawledger verify .*?)\n```$", text, flags=re.M)
    args = shlex.split(command)[1:]
    done = subprocess.run([sys.executable, "-m", "drawledger.cli", *args], cwd=tmp_path,
                          capture_output=True, text=True, timeout=300)  # fmt: skip
    assert 0 == done.returncode, done.stdout + done.stderr
    assert 300 == json.loads((tmp_path / "verify.json").read_text())["verified"]
    assert 300 == len(pd.read_csv(tmp_path / "propensities.csv"))


# -- a crafted ledger never chooses what verify does --------------------------------------------
def _point(ledger: Path, decision_id: str, fn: str) -> None:
    """Make one recorded decision name another function (its hash no longer matches)."""
    with sqlite3.connect(ledger) as conn:
        conn.execute("UPDATE decisions SET fn = ? WHERE decision_id = ?", (fn, decision_id))


EXITS = """
from pathlib import Path
from typing import Any
Path({canary!r}).write_text("ran")
raise SystemExit(0)
"""


def test_a_module_that_exits_on_import_fails_its_records_not_the_run(
    shop: Path, tmp_path: Path
) -> None:
    """SystemExit(0) raised while importing a module a ledger names is that record's
    replay-error: the run ends with its own verdict (exit 1) and writes its JSON."""
    code, canary = tmp_path / "code", tmp_path / "ran"
    code.mkdir()
    (code / "leaves.py").write_text(EXITS.format(canary=str(canary)))
    _point(shop, "card-3", "leaves:decide")
    out = tmp_path / "verify.json"
    assert 1 == main(["verify", str(shop), "--path", SUPPORT, "--path", str(code),
                      "--json", str(out)])  # fmt: skip
    data = json.loads(out.read_text())
    assert {"replay-error": 1, "integrity": 1} == data["by_reason"]
    assert "SystemExit" in data["examples"]["replay-error"][0]["detail"]
    assert 16 == data["decisions"]
    sys.modules.pop("leaves", None)


def test_decision_code_that_exits_fails_its_record_not_the_run(shop: Path, tmp_path: Path) -> None:
    code = tmp_path / "code"
    code.mkdir()
    (code / "quits.py").write_text(
        "import drawledger as dl\n"
        "ledger = dl.Ledger(dl.__file__ + '.unused.db')\n"  # never written: nothing is recorded
        "@ledger.decision('recipe-card')\n"
        "def decide(ctx, draw: dl.Draw, *, temperature: float = 0.7):\n"
        "    raise SystemExit(0)\n"
    )
    _point(shop, "card-4", "quits:decide")
    out = tmp_path / "verify.json"
    assert 1 == main(["verify", str(shop), "--path", SUPPORT, "--path", str(code),
                      "--json", str(out)])  # fmt: skip
    data = json.loads(out.read_text())
    assert 1 == data["by_reason"].get("replay-error")
    assert "SystemExit" in data["examples"]["replay-error"][0]["detail"]
    sys.modules.pop("quits", None)


@pytest.mark.parametrize(
    ("files", "fn"),
    [
        ({"svc/__init__.py": "", "svc/__main__.py": "{canary}"}, "svc.__main__:main"),
        ({"scripts/wipe.py": "{canary}"}, "scripts.wipe:x"),  # a folder without __init__.py
    ],
)
def test_entry_points_and_folders_without_init_are_never_imported(
    shop: Path, tmp_path: Path, files: dict[str, str], fn: str
) -> None:
    code, canary = tmp_path / "code", tmp_path / "ran"
    for name, text in files.items():
        (code / name).parent.mkdir(parents=True, exist_ok=True)
        (code / name).write_text(text.format(canary=f"open({str(canary)!r}, 'w').write('ran')"))
    _point(shop, "card-5", fn)
    out = tmp_path / "verify.json"
    assert 1 == main(["verify", str(shop), "--path", SUPPORT, "--path", str(code),
                      "--json", str(out)])  # fmt: skip
    assert not canary.exists()
    assert 1 == json.loads(out.read_text())["by_reason"].get("not-allowed")


def test_ledger_text_reaches_the_terminal_as_text_never_as_markup_or_escapes(
    tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    """A stream ``[/]`` no longer crashes verify; ``price[eur]`` keeps its brackets; ESC and a
    right-to-left override show as ``\\x1b`` and ``\\u202e`` (no forged "verify passed")."""
    hostile = "[/]price[eur]\x1b[2J\u202e\nverify passed"
    led = dl.Ledger(tmp_path / "hostile.db")
    led.record_draw(hostile, "bernoulli", {"p": 0.5}, True, 0.5, decision_id=hostile)
    led.close()
    assert 0 == main(["verify", str(tmp_path / "hostile.db")])
    out = capsys.readouterr().out
    assert r"[/]price[eur]\x1b[2J\u202e\x0averify passed" in out
    assert [] == [c for c in out if c in "\x1b\u202e"]


def test_an_unwritable_json_is_refused_before_any_work(
    tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    """The ledger is missing too: the JSON's folder is named, so it was checked first."""
    json_path = tmp_path / "missing" / "verify.json"
    assert 2 == main(["verify", str(tmp_path / "nope.db"), "--json", str(json_path)])
    assert f"--json {json_path}: no folder" in capsys.readouterr().err


def test_a_link_planted_at_the_old_temporary_name_is_not_followed(
    shop: Path, tmp_path: Path
) -> None:
    """The export and the JSON go through a new file of a random name, never an existing one."""
    victim = tmp_path / "victim.txt"
    victim.write_text("keep")
    out = tmp_path / "out"
    out.mkdir()
    (out / ".props.csv.partial").symlink_to(victim)
    assert 0 == main(["verify", str(shop), "--allow", "shop_decisions", "--export",
                      str(out / "props.csv"), "--json", str(out / "v.json")])  # fmt: skip
    assert "keep" == victim.read_text()
    assert 16 == len(pd.read_csv(out / "props.csv"))
    assert {".props.csv.partial", "props.csv", "v.json"} == {p.name for p in out.iterdir()}


def test_csv_export_writes_formulas_as_text_and_numbers_as_numbers(tmp_path: Path) -> None:
    """Text cells (and column names) starting with = + - @ get a leading quote (OWASP, CSV
    injection); a negative reward and a plain negative number as text stay as they are."""
    led = dl.Ledger(tmp_path / "x.db")
    formula = '=HYPERLINK("https://example.invalid","open")'
    led.record_draw("card", "bernoulli", {"p": 0.5}, True, 0.5, unit=formula, decision_id="d-0")
    led.record_draw("card", "bernoulli", {"p": 0.5}, False, 0.5, unit="-7", decision_id="d-1")
    led.outcome("d-0", "@refund", -2.5)
    led.outcome("d-1", "checkout", -1.0)
    led.close()
    target = tmp_path / "props.csv"
    assert 0 == main(["verify", str(tmp_path / "x.db"), "--export", str(target)])
    data = pd.read_csv(target, dtype={"unit": str})
    assert ["'" + formula, "-7"] == list(data["unit"])
    assert -1.0 == data["checkout"][1]
    assert -2.5 == data["'@refund"][0]


def test_csv_export_keeps_a_carriage_return_inside_its_cell(tmp_path: Path) -> None:
    """A unit holding a carriage return stays in its cell (quoted, CRLF line ends as in RFC
    4180) instead of splitting its row in two; an action that reads as a formula is text."""
    led = dl.Ledger(tmp_path / "x.db")
    args = {"options": ["=1+1", "b"], "probs": [0.5, 0.5]}
    led.record_draw("card", "categorical", args, "=1+1", 0.5, unit="north\rsouth",
                    decision_id="d-0")  # fmt: skip
    led.record_draw("card", "categorical", args, "b", 0.5, unit="west", decision_id="d-1")
    led.close()
    target = tmp_path / "props.csv"
    assert 0 == main(["verify", str(tmp_path / "x.db"), "--export", str(target)])
    data = pd.read_csv(target)
    assert ["north\rsouth", "west"] == list(data["unit"])
    assert ["'=1+1", "b"] == list(data["action"])


def test_a_piped_verify_prints_every_count_in_full_at_80_columns(
    shop: Path, tmp_path: Path, cli_pipe: Any
) -> None:
    """In a CI log (stdout a pipe, COLUMNS=80) each stream's row holds its four counts."""
    out = tmp_path / "verify.json"
    done = cli_pipe("verify", str(shop), "--path", SUPPORT, "--json", str(out))
    assert 0 == done.returncode, done.stderr
    data = json.loads(out.read_text())
    for stream, c in {**data["by_stream"], "all": data}.items():
        counts = r"\s+│\s+".join(str(c[k]) for k in ("decisions", "verified", "mismatched",
                                                          "unreplayable"))  # fmt: skip
        assert re.search(rf"│ {re.escape(stream)}\s+│\s+{counts}\s+│", done.stdout), stream


def test_json_dash_writes_the_verify_json_alone_on_stdout(shop: Path, cli_pipe: Any) -> None:
    done = cli_pipe("verify", str(shop), "--path", SUPPORT, "--json", "-")
    assert 0 == done.returncode, done.stderr
    assert 16 == json.loads(done.stdout)["verified"]
    assert "verify passed" in done.stderr


def test_other_outputs_refuse_a_dash(shop: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Only --json writes to stdout; `--export -` is refused rather than writing a file '-'."""
    assert 2 == main(["verify", str(shop), "--export", "-"])
    assert "--export -: only --json can write to stdout" in capsys.readouterr().err
    assert not Path("-").exists()


def test_counts_of_one_take_the_singular(shop: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A ledger of one writer says "1 writer", never "1 writers"."""
    assert 0 == main(["verify", str(shop), "--allow", "shop_decisions"])
    out = capsys.readouterr().out
    assert "16 decisions, 8 outcomes, 1 writer (unkeyed hashes)" in out
