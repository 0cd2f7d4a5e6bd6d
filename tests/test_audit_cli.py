"""`drawledger audit LEDGER [--json FILE]`: exit codes, the JSON gate, the terminal table."""

from __future__ import annotations

import json
import re
import subprocess
from collections.abc import Callable
from pathlib import Path

import orjson
import pytest

import drawledger as dl
from drawledger._sinks import open_sink
from drawledger.cli import main

DISCOUNTS = {"options": [0, 5, 10], "probs": [0.6, 0.3, 0.1]}


def legacy_ledger(path: Path, drawn: list[float], n: int = 3000) -> Path:
    """Declared discount draws of a legacy service that really draws with ``drawn``."""
    import numpy as np

    led = dl.Ledger(path)
    u = np.random.default_rng(21).random(n)
    for i, j in enumerate(np.searchsorted(np.cumsum(drawn), u, side="right")):
        led.record_draw(
            "slot-discount",
            "categorical",
            DISCOUNTS,
            [0, 5, 10][j],
            DISCOUNTS["probs"][j],
            decision_id=f"legacy-{i}",
            u=[float(u[i])],
            ts=1_767_225_600.0 + 60 * i,
        )
    led.close()
    return path


def test_passing_ledger_exits_0_and_writes_the_json(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Exit 0 with no alarm; the JSON file holds ok=true and the design's test keys."""
    ledger = legacy_ledger(tmp_path / "ok.db", [0.6, 0.3, 0.1])
    out = tmp_path / "audit.json"
    assert 0 == main(["audit", str(ledger), "--json", str(out)])
    data = orjson.loads(out.read_bytes())
    assert data["ok"] is True
    assert {"stream", "test", "statistic", "p_value", "verdict"} <= set(data["tests"][0])
    shown = capsys.readouterr().out
    assert "slot-discount" in shown
    assert "as declared" in shown


def test_alarm_exits_1_and_the_json_names_the_failing_test(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Declared 0.6/0.3/0.1 but drawn 0.5/0.3/0.2: exit 1, the ratio test alarms."""
    ledger = legacy_ledger(tmp_path / "drift.db", [0.5, 0.3, 0.2])
    out = tmp_path / "audit.json"
    assert 1 == main(["audit", str(ledger), "--json", str(out)])
    data = orjson.loads(out.read_bytes())
    assert data["ok"] is False
    alarms = {(t["stream"], t["test"]) for t in data["tests"] if t["alarm"]}
    assert ("slot-discount", "ratio") in alarms
    assert "not as declared" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["audit", "{tmp}/missing.db"], "no such file"),
        (["audit", "{tmp}/ok.db", "--scheduler", "tcp://127.0.0.1:1"], "needs the dask engine"),
        (["audit", "{tmp}/ok.db", "--json", "{tmp}/no/such/dir/audit.json"], "no folder"),
    ],
)
def test_bad_usage_exits_2_with_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    """A missing ledger, a scheduler without the dask engine or an unwritable JSON path: exit
    2 and one line on stderr naming the problem, no traceback."""
    legacy_ledger(tmp_path / "ok.db", [0.6, 0.3, 0.1], n=50)
    assert 2 == main([a.replace("{tmp}", str(tmp_path)) for a in args])
    err = capsys.readouterr().err.strip().splitlines()
    assert 1 == len(err)
    assert err[0].startswith("drawledger audit: error:")
    assert message in err[0]


def test_unreadable_file_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A file that is not a ledger is unreadable input: exit 2."""
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"not a database" * 200)
    assert 2 == main(["audit", str(junk)])
    assert "junk.db" in capsys.readouterr().err


def test_empty_ledger_passes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """An empty ledger has nothing to alarm about: exit 0 and says so."""
    open_sink(tmp_path / "empty.db").close()  # the three tables, no rows
    assert 0 == main(["audit", str(tmp_path / "empty.db")])
    assert "No draws to audit" in capsys.readouterr().out


# A stream name that is rich markup, a screen-clearing escape and a right-to-left override
# ahead of a forged verdict.
HOSTILE = "[/]price[eur]\x1b[2J\u202e\rno alarm"


def test_ledger_text_reaches_the_terminal_as_text_never_as_markup_or_escapes(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    led = dl.Ledger(tmp_path / "hostile.db")
    for i in range(40):
        led.record_draw(HOSTILE, "bernoulli", {"p": 0.5}, i % 2 == 0, 0.5, decision_id=f"d-{i}")
    led.close()
    assert 0 == main(["audit", str(tmp_path / "hostile.db")])
    out = capsys.readouterr().out
    assert r"[/]price[eur]\x1b[2J\u202e\x0dno alarm" in out
    assert [] == [c for c in out if c in "\x1b\u202e\r"]


def test_an_unwritable_json_is_refused_before_any_work(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The ledger is missing too: the JSON's folder is named, so it was checked first."""
    json_path = tmp_path / "missing" / "audit.json"
    assert 2 == main(["audit", str(tmp_path / "nope.db"), "--json", str(json_path)])
    assert f"--json {json_path}: no folder" in capsys.readouterr().err


def test_a_piped_audit_prints_every_test_in_full_at_80_columns(
    tmp_path: Path, cli_pipe: Callable[..., subprocess.CompletedProcess[str]]
) -> None:
    """In a CI log (stdout a pipe, COLUMNS=80) the p column is there: each test's n, statistic
    and Holm-adjusted p of the JSON appear together on its row, as the table formats them."""
    ledger = tmp_path / "slots.db"
    with dl.Ledger(ledger) as led:

        @led.decision("slot-discount")
        def discount(slot: str, draw: dl.Draw) -> int:
            name = "discount-in-percent-for-the-evening-delivery-slot"  # a wide first column
            return int(draw.categorical([0, 5, 10], [0.6, 0.3, 0.1], name=name))

        for i in range(400):
            discount(f"slot-{i % 7}")
    out = tmp_path / "audit.json"
    done = cli_pipe("audit", str(ledger), "--json", str(out))
    assert 0 == done.returncode, done.stderr
    for t in orjson.loads(out.read_bytes())["tests"]:
        stat, p = t["statistic"], t["p_adjusted"]
        shown_stat = "-" if stat is None else (
            str(int(stat)) if float(stat).is_integer() else f"{stat:.4g}")  # fmt: skip
        shown_p = "-" if p is None else f"{p:.3g}"
        row = rf"│\s+{t['n']} │\s+{re.escape(shown_stat)} │\s+{re.escape(shown_p)} │ {t['verdict']}"
        assert re.search(row, done.stdout), (t, done.stdout)


def test_json_dash_writes_the_audit_json_alone_on_stdout(
    tmp_path: Path, cli_pipe: Callable[..., subprocess.CompletedProcess[str]]
) -> None:
    ledger = legacy_ledger(tmp_path / "ok.db", [0.6, 0.3, 0.1], n=500)
    done = cli_pipe("audit", str(ledger), "--json", "-")
    assert 0 == done.returncode, done.stderr
    assert json.loads(done.stdout)["ok"] is True
    assert "as declared" in done.stderr


def test_docs_map_every_json_test_key_to_its_table_label() -> None:
    """docs/audit.md's table of `test` keys and labels is the one the tables use."""
    from drawledger.replay.audit import TEST_LABELS

    doc = (Path(__file__).resolve().parent.parent / "docs" / "audit.md").read_text()
    found = dict(re.findall(r"^\| `(\w+)` \| ([^|`]+?) \|$", doc, flags=re.M))
    assert TEST_LABELS == found
