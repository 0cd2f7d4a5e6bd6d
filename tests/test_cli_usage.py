"""Usage errors of every command: one line on stderr naming the problem, exit 2, no traceback.

Missing optional extras are covered by tests/test_cli_extras.py.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from drawledger import __version__
from drawledger.cli import main

ALLOW = ["--allow", "drawledger.replay.demo.grocery"]
CARD = ["--reward", "checkout", "--stream", "recipe-card", *ALLOW]

BAD = {
    "no command": ([], "required: COMMAND"),
    "unknown command": (["nope"], "invalid choice: 'nope'"),
    "verify missing ledger": (["verify", "{tmp}/nope.db"], "no ledger at"),
    "verify unknown option": (["verify", "{db}", "--bogus"], "unrecognized arguments: --bogus"),
    "verify jobs 0": (["verify", "{db}", "--jobs", "0"], "jobs must be a positive integer"),
    "verify jobs text": (["verify", "{db}", "--jobs", "x"], "invalid int value: 'x'"),
    "verify budget 0": (["verify", "{db}", "--budget", "0"], "budget must be a positive"),
    "verify mc-samples": (["verify", "{db}", "--mc-samples", "-1"], "mc_samples must be"),
    "verify engine": (["verify", "{db}", "--engine", "spark"], "invalid choice: 'spark'"),
    "verify scheduler": (["verify", "{db}", "--scheduler", "tcp://127.0.0.1:1"], "scheduler"),
    "verify no ledger arg": (["verify"], "required: LEDGER"),
    "audit missing ledger": (["audit", "{tmp}/nope.db"], "no ledger at"),
    "audit unknown option": (["audit", "{db}", "--reward", "x"], "unrecognized arguments"),
    "estimate no reward": (["estimate", "{db}"], "required: --reward"),
    "estimate unknown stream": (["estimate", "{db}", *CARD[:2], "--stream", "nope", *ALLOW],
                                "no decisions of stream 'nope'"),
    "estimate level": (["estimate", "{db}", *CARD, "--level", "2"], "confidence level"),
    "estimate level text": (["estimate", "{db}", *CARD, "--level", "high"], "invalid float"),
    "estimate clip": (["estimate", "{db}", *CARD, "--clip", "-1"], "clipping cap"),
    "estimate bootstrap": (["estimate", "{db}", *CARD, "--interval", "bootstrap",
                            "--bootstrap", "-5"], "bootstrap"),
    "estimate jobs": (["estimate", "{db}", *CARD, "--jobs", "0"], "jobs must be"),
    "estimate set type": (["estimate", "{db}", *CARD, "--set", "temperature=abc"],
                          "temperature='abc' (given with --set or --baseline-set): expected "
                          "float, got the text 'abc'"),
    "estimate set unknown": (["estimate", "{db}", *CARD, "--set", "epsilon=0.1"],
                             "epsilon is not a policy parameter"),
    "estimate sweep": (["estimate", "{db}", *CARD, "--sweep", "temperature=1:2:x"],
                       "NAME=START:STOP:POINTS"),
    "estimate missing reward": (["estimate", "{db}", *CARD, "--missing-reward", "none"],
                                "a number or 'exclude'"),
    "estimate reward range": (["estimate", "{db}", *CARD, "--reward-range", "1,0"], "LOW < HIGH"),
    "estimate unknown reward": (["estimate", "{db}", "--reward", "tip", "--stream",
                                 "recipe-card", *ALLOW], "no outcome named 'tip'"),
    "report unknown stream": (["report", "{db}", "--html", "{tmp}/r.html", "--reward",
                               "checkout", "--stream", "nope", *ALLOW], "stream 'nope'"),
    "report stream without reward": (["report", "{db}", "--html", "{tmp}/r.html", "--stream",
                                      "recipe-card"], "give the reward to estimate"),
    "report not html": (["report", "{db}", "--html", "{tmp}/r.txt"], "ending in .html"),
    "show unknown id": (["show", "{db}", "card-999999"], "no decision 'card-999999'"),
    "show missing ledger": (["show", "{tmp}/nope.db", "card-1"], "no ledger at"),
    "show no id": (["show", "{db}"], "required: DECISION_ID"),
    "ingest missing file": (["ingest", "{tmp}/nope.jsonl", "{tmp}/x.db"], "no such file"),
    "demo decisions text": (["demo", "--decisions", "many"], "invalid int value"),
    "demo decisions small": (["demo", "--decisions", "10", "--out", "{tmp}/d"], "between 50"),
}  # fmt: skip


def _exit_code(argv: list[str]) -> int | str | None:
    """main's return value, or the code argparse exits with for its own errors."""
    try:
        return main(argv)
    except SystemExit as exc:
        return exc.code


@pytest.mark.parametrize(("argv", "message"), BAD.values(), ids=list(BAD))
def test_a_usage_error_is_one_line_on_stderr_and_exit_2(
    argv: list[str], message: str, demo_run: Any, tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:  # fmt: skip
    code = _exit_code([a.format(db=demo_run.ledger, tmp=tmp_path) for a in argv])
    out, err = capsys.readouterr()
    assert (2, "") == (code, out)
    assert 1 == len(err.splitlines()), err
    assert message in err
    assert "Traceback" not in err
    assert not (tmp_path / "r.html").exists()


def test_version_prints_the_version(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exited:
        main(["--version"])
    assert (0, f"drawledger {__version__}\n") == (exited.value.code, capsys.readouterr().out)
