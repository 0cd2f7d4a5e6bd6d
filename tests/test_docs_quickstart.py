"""docs/quickstart.md runs as written: its file block, its Python blocks in order in a fresh
interpreter, then its ``drawledger`` commands, all in one folder."""

from __future__ import annotations

import re
import shlex
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

QUICKSTART = Path(__file__).resolve().parent.parent / "docs" / "quickstart.md"


def python_blocks(text: str) -> list[str]:
    return re.findall(r"^```python\n(.*?)^```$", text, flags=re.S | re.M)


def drawledger_commands(text: str) -> list[list[str]]:
    """The ```bash blocks of the page that are one ``drawledger`` command, in order."""
    found = re.findall(r"^```bash\n(drawledger [^\n]*)\n```$", text, flags=re.M)
    return [shlex.split(command) for command in found]


def drawledger(args: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    """``drawledger ARGS`` with this environment's installed command (or its module)."""
    script = Path(sys.executable).parent / "drawledger"
    head = [str(script)] if script.is_file() else [sys.executable, "-m", "drawledger.cli"]
    return subprocess.run([*head, *args], cwd=cwd, capture_output=True, text=True, timeout=300)


def test_quickstart_python_blocks_run(tmp_path: Path, run_markdown: Callable[..., Any]) -> None:
    """The file block is saved, every ```python block runs, in order, in one session, in a temp
    dir, and the decision lands in the ledger of the imported module."""
    done = run_markdown("docs/quickstart.md")
    assert 0 == done.returncode, done.stderr
    assert "featured card:" in done.stdout
    assert "re-derived from the seed" in done.stdout
    assert (tmp_path / "quickstart.db").exists()
    assert (tmp_path / "grocery_cards.py").exists()


def test_quickstart_reaches_verify_and_estimate(
    tmp_path: Path, run_markdown: Callable[..., Any]
) -> None:
    """After the Python blocks, the page's verify and estimate commands run on its ledger: every
    decision verifies (exit 0), the estimate exits 0 with the tables the page shows, and the
    simulator's true checkout rate that the page prints lies near the SNIPS interval.

    The draws come from fresh OS seeds, so a 95% interval misses the truth in 1 run of 20: the
    check allows twice the interval's half-width around its centre (about 3.9 standard errors
    of a normal approximation, a miss in fewer than 1 run of 10,000).
    """
    text = QUICKSTART.read_text(encoding="utf-8")
    done = run_markdown("docs/quickstart.md")
    assert 0 == done.returncode, done.stderr
    commands = drawledger_commands(text)
    assert ["verify", "estimate"] == [c[1] for c in commands]
    verify, estimate = (drawledger(c[1:], tmp_path) for c in commands)
    assert 0 == verify.returncode, verify.stdout + verify.stderr
    assert "verify passed" in verify.stdout
    assert 0 == estimate.returncode, estimate.stdout + estimate.stderr
    assert "difference: target minus logging policy" in estimate.stdout
    (truth,) = re.findall(r"true checkout rate at temperature 0.3: (\d\.\d+)", done.stdout)
    assert f"true checkout rate at temperature 0.3: {truth}" in text  # the page says it
    snips = re.search(r"^\s*snips\s+(\S+)\s+\[(\S+), (\S+)\]", estimate.stdout, flags=re.M)
    assert snips is not None, estimate.stdout
    low, high = float(snips[2]), float(snips[3])
    assert abs(float(truth) - (low + high) / 2) <= high - low
    shown = [*verify.stdout.splitlines()[-5:], *estimate.stdout.splitlines()[4:5]]
    for line in shown:  # the page shows what the commands print
        assert line.strip() in text, line
