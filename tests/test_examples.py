"""Every example in examples/ runs as its README says."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from drawledger.cli import main

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
LEGACY = EXAMPLES / "legacy-draws.jsonl"


def run(
    *args: str | Path, cwd: Path | None = None, timeout: float = 120
) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [str(a) for a in args], cwd=cwd, capture_output=True, text=True, timeout=timeout
    )


def drawledger(*args: str | Path) -> int:
    """The ``drawledger`` command, in this process (its output goes to capsys)."""
    return main([str(a) for a in args])


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture
def service(tmp_path: Path) -> Iterator[tuple[int, Path]]:
    """The FastAPI example under uvicorn on 127.0.0.1, recording into a fresh ledger."""
    port = free_port()
    ledger = tmp_path / "grocery.db"
    env = {**os.environ, "GROCERY_LEDGER": str(ledger)}
    cmd = [sys.executable, "-m", "uvicorn", "grocery_service:app", "--host", "127.0.0.1",
           "--port", str(port), "--log-level", "warning"]  # fmt: skip
    proc = subprocess.Popen(cmd, cwd=EXAMPLES, env=env, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                if httpx.get(f"http://127.0.0.1:{port}/openapi.json", timeout=1).is_success:
                    break
            except httpx.TransportError:
                pass
            if proc.poll() is not None or time.monotonic() > deadline:
                raise AssertionError(f"the example service did not start: {proc.stderr.read()}")  # type: ignore[union-attr]
            time.sleep(0.2)
        yield port, ledger
    finally:
        proc.send_signal(signal.SIGINT)  # uvicorn shuts down; the lifespan closes the ledger
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def test_service_load_then_analyst(service: tuple[int, Path], tmp_path: Path) -> None:
    """The load script finds every decision and outcome in the ledger; the analyst script then
    verifies all of them, exports them and prints a temperature estimate with its interval."""
    port, ledger = service
    load = run(sys.executable, EXAMPLES / "load.py", "--port", str(port), "--sessions", "60",
               "--ledger", ledger, "--max-seconds", "60")  # fmt: skip
    assert 0 == load.returncode, load.stdout + load.stderr
    assert "sent 60 sessions (120 decisions)" in load.stdout
    assert "missing in the ledger: 0 decisions, 0 outcomes" in load.stdout

    export = tmp_path / "propensities.csv"
    analyst = run(sys.executable, EXAMPLES / "analyst.py", ledger, "--path", EXAMPLES,
                  "--export", export)  # fmt: skip
    assert 0 == analyst.returncode, analyst.stdout + analyst.stderr
    assert "verify passed" in analyst.stdout
    assert "checkout rate by featured card" in analyst.stdout
    assert "temperature 0.3: estimated checkout rate" in analyst.stdout
    import pandas as pd

    rows = pd.read_csv(export)
    assert 120 == len(rows)
    assert {"recipe-card": 60, "reminder-delay": 60} == rows["stream"].value_counts().to_dict()
    assert rows["verified"].all()
    assert {0.0, 1.0} >= set(rows["checkout"])


def test_load_script_refuses_unbounded_runs(tmp_path: Path) -> None:
    """--sessions outside 1..100000 is bad usage (exit 2), before any request is sent."""
    done = run(sys.executable, EXAMPLES / "load.py", "--sessions", "1000000", "--ledger",
               tmp_path / "x.db")  # fmt: skip
    assert 2 == done.returncode
    assert "--sessions must be between 1 and 100000" in done.stderr


def test_legacy_draws_file_is_what_the_generator_writes(tmp_path: Path) -> None:
    """examples/legacy-draws.jsonl is reproducible from examples/make_legacy_draws.py."""
    out = tmp_path / "legacy.jsonl"
    done = run(sys.executable, EXAMPLES / "make_legacy_draws.py", out)
    assert 0 == done.returncode, done.stderr
    assert LEGACY.read_bytes() == out.read_bytes()


def test_legacy_draws_ingest_and_pass_the_audit(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The honest legacy file loads as 1200 declared draws and the audit raises no alarm."""
    ledger = tmp_path / "legacy.db"
    assert 0 == drawledger("ingest", LEGACY, ledger)
    assert "1200 declared draws" in capsys.readouterr().out
    assert 0 == drawledger("audit", ledger, "--json", tmp_path / "audit.json")
    result = json.loads((tmp_path / "audit.json").read_text())
    tested = {t["stream"] for t in result["tests"]}
    assert {"slot-discount", "tip-prompt", "promo-countdown"} == tested


def test_faulty_legacy_draws_fail_the_audit(tmp_path: Path) -> None:
    """Discounts drawn 0.5/0.3/0.2 but declared 0.6/0.3/0.1 make the audit exit 1 on that stream.

    400 draws: the chi-square statistic against the declared shares is about 400 * (0.01/0.6 +
    0 + 0.01/0.1) = 47 in expectation (2 degrees of freedom), far past the alarm threshold.
    """
    faulty = tmp_path / "faulty.jsonl"
    assert (
        0 == run(sys.executable, EXAMPLES / "make_legacy_draws.py", "--faulty", faulty).returncode
    )
    ledger = tmp_path / "faulty.db"
    assert 0 == drawledger("ingest", faulty, ledger)
    assert 1 == drawledger("audit", ledger, "--json", tmp_path / "audit.json")
    result = json.loads((tmp_path / "audit.json").read_text())
    alarmed = {t["stream"] for t in result["tests"] if t["alarm"]}
    assert {"slot-discount"} == alarmed


NOTEBOOK = EXAMPLES / "analyst.ipynb"


def test_analyst_notebook_is_what_its_generator_writes(tmp_path: Path) -> None:
    """examples/analyst.ipynb is reproducible from examples/make_analyst_notebook.py (no
    outputs stored)."""
    out = tmp_path / "analyst.ipynb"
    done = run(sys.executable, EXAMPLES / "make_analyst_notebook.py", out)
    assert 0 == done.returncode, done.stderr
    assert NOTEBOOK.read_text(encoding="utf-8") == out.read_text(encoding="utf-8")


def test_analyst_notebook_runs_in_a_kernel(tmp_path: Path) -> None:
    """Every cell of the notebook runs in a Jupyter kernel without network: the reports show
    as HTML tables, the sweep as a picture, and the true value is printed."""
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    nb = nbformat.read(NOTEBOOK, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=600, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})  # fmt: skip
    client.execute()
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]
    assert [] == [o for o in outputs if o.output_type == "error"]
    shown = [o.get("data", {}) for o in outputs if o.output_type == "execute_result"]
    tables = [d["text/html"] for d in shown if "text/html" in d]
    assert any("verify passed" in t for t in tables)
    assert any("difference vs logging policy" in t for t in tables)
    assert any("image/png" in d for d in shown)
    printed = "".join(o.get("text", "") for o in outputs if o.output_type == "stream")
    assert "true checkout rate at temperature 0.3 (the simulator): " in printed
    assert (tmp_path / "analyst-demo" / "decisions.db").is_file()
