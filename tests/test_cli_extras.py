"""A command whose optional extra is missing prints one line naming it and exits 2.

Each case runs the CLI in a fresh interpreter whose ``sys.modules`` blocks some modules (a
``None`` entry makes their import fail as if they were not installed).
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

BLOCKED = """
import sys
for name in sys.argv[1].split(","):
    sys.modules[name] = None
from drawledger.cli import main
sys.exit(main(sys.argv[2:]))
"""

REPLAY = "needs the analysis extras ({} is missing): pip install 'drawledger[replay]'"


def _run(blocked: str, *argv: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-c", BLOCKED, blocked, *argv],
                          capture_output=True, text=True, timeout=120)  # fmt: skip


@pytest.mark.parametrize(
    "argv",
    [
        ["verify", "{tmp}/cards.db", "--path", "{tmp}"],
        ["audit", "{tmp}/cards.db"],
        ["estimate", "{tmp}/cards.db", "--reward", "checkout", "--set", "temperature=0.3"],
        ["report", "{tmp}/cards.db", "--html", "{tmp}/report.html"],
        ["demo", "--decisions", "10", "--out", "{tmp}/demo"],
    ],
    ids=lambda argv: argv[0],
)
def test_an_analysis_command_without_numpy_names_the_replay_extra(
    argv: list[str], tmp_path: Path
) -> None:
    done = _run("numpy", *[a.format(tmp=tmp_path) for a in argv])
    assert 2 == done.returncode
    assert f"drawledger: {argv[0]} {REPLAY.format('numpy')}\n" == done.stderr
    assert "" == done.stdout


def test_the_missing_module_is_named_whichever_analysis_module_it_is(tmp_path: Path) -> None:
    done = _run("scipy,scipy.stats", "audit", str(tmp_path / "cards.db"))
    assert (2, f"drawledger: audit {REPLAY.format('scipy')}\n") == (done.returncode, done.stderr)


def test_the_dask_engine_without_dask_names_the_dask_extra(tmp_path: Path) -> None:
    """Checked before any work starts: the ledger is not even opened."""
    done = _run("dask,distributed", "audit", str(tmp_path / "cards"), "--engine", "dask")
    assert 2 == done.returncode
    assert ("drawledger: audit needs the Dask extras (dask is missing): "
            "pip install 'drawledger[dask]'\n") == done.stderr  # fmt: skip


def test_ingest_into_parquet_without_pyarrow_names_the_parquet_extra(tmp_path: Path) -> None:
    spill = tmp_path / "draws.jsonl"
    spill.write_text("", encoding="utf-8")
    (tmp_path / "ledger").mkdir()
    done = _run("pyarrow", "ingest", str(spill), str(tmp_path / "ledger"))
    assert 2 == done.returncode
    assert ("drawledger: ingest needs the Parquet extras (pyarrow is missing): "
            "pip install 'drawledger[parquet]'\n") == done.stderr  # fmt: skip


def test_debug_shows_the_traceback_of_a_missing_extra(tmp_path: Path) -> None:
    done = _run("numpy", "--debug", "audit", str(tmp_path / "cards.db"))
    assert 1 == done.returncode
    assert "Traceback" in done.stderr and "ModuleNotFoundError" in done.stderr


def test_a_command_with_every_extra_installed_runs_past_the_imports(tmp_path: Path) -> None:
    """Nothing blocked: the same command reaches the library, which reports the missing file."""
    done = _run("", "audit", str(tmp_path / "cards.db"))
    assert 2 == done.returncode
    assert "needs" not in done.stderr and "drawledger audit: error: no ledger at" in done.stderr


def test_guard_without_numpy_names_the_replay_extra(tmp_path: Path) -> None:
    done = _run("numpy", "guard", str(tmp_path / "cards.db"), "--once")
    assert (2, f"drawledger: guard {REPLAY.format('numpy')}\n") == (done.returncode, done.stderr)


def test_guard_metrics_without_prometheus_client_names_the_guard_extra(tmp_path: Path) -> None:
    done = _run("prometheus_client", "guard", str(tmp_path / "cards.db"), "--once",
                "--metrics-port", "9464")  # fmt: skip
    assert 2 == done.returncode
    assert ("drawledger: guard needs the guard extras (prometheus_client is missing): "
            "pip install 'drawledger[guard]'\n") == done.stderr  # fmt: skip
