"""``import drawledger`` stays light: the serving side never loads the analysis stack."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

HEAVY = ("numpy", "pandas", "scipy", "pyarrow", "matplotlib", "rich")

SERVE = """
import sys
import drawledger as dl
import drawledger.testing

ledger = dl.Ledger(sys.argv[1])


@ledger.decision("recipe-card")
def feature_card(scores: list[float], draw: dl.Draw) -> str:
    return draw.softmax(["a", "b", "c"], scores, temperature=0.7)


with drawledger.testing.capture(ledger, seed=1):
    feature_card([1.0, 2.0, 3.0])
feature_card([1.0, 2.0, 3.0])
ledger.outcome("req-1", "checkout", 1.0)
ledger.close()
heavy = {heavy!r}
print(sorted(m for m in sys.modules if m.split(".")[0] in heavy))
"""


def test_serving_side_imports_no_analysis_stack(tmp_path: Path) -> None:
    """Importing drawledger and drawledger.testing, recording decisions and writing them to
    SQLite loads none of numpy, pandas, scipy, pyarrow, matplotlib, rich (fresh interpreter)."""
    script = tmp_path / "serve.py"
    script.write_text(SERVE.format(heavy=HEAVY), encoding="utf-8")
    done = subprocess.run([sys.executable, str(script), str(tmp_path / "light.db")],
                          capture_output=True, text=True, timeout=120)  # fmt: skip
    assert 0 == done.returncode, done.stderr
    assert "[]" == done.stdout.strip()


def test_the_analysis_side_imports_scipy_and_matplotlib_only_when_used() -> None:
    """``import drawledger.replay`` (every command, and each process that replays another code
    version) loads neither SciPy nor matplotlib: the statistics and figures import them."""
    code = ("import sys, drawledger.replay; print(sorted({m.split('.')[0] for m in sys.modules}"
            " & {'scipy', 'matplotlib'}))")  # fmt: skip
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120)  # fmt: skip
    assert 0 == done.returncode, done.stderr
    assert "[]" == done.stdout.strip()


GUARD = """
import contextlib, io, sys
import drawledger as dl
from drawledger.cli import main

ledger = dl.Ledger(sys.argv[1])


@ledger.decision("coin")
def flip(draw: dl.Draw) -> str:
    return draw.categorical(["heads", "tails"], [0.5, 0.5])


for _ in range(400):
    flip()
ledger.close()
with contextlib.redirect_stdout(io.StringIO()) as shown:
    code = main(["guard", sys.argv[1], "--path", sys.argv[2], "--once"])
assert code == 0 and "coin" in shown.getvalue(), (code, shown.getvalue())
print(sorted(m for m in sys.modules if m in ("scipy.stats", "scipy.sparse")))
"""


def test_a_once_guard_loads_neither_scipy_stats_nor_scipy_sparse(tmp_path: Path) -> None:
    """``drawledger guard --once`` (cron-style, a fresh interpreter per look) reads its tails
    from scipy.special: scipy.stats and scipy.sparse would add about a second to every look."""
    script = tmp_path / "guard.py"
    script.write_text(GUARD, encoding="utf-8")
    done = subprocess.run([sys.executable, str(script), str(tmp_path / "coin.db"), str(tmp_path)],
                          capture_output=True, text=True, timeout=120)  # fmt: skip
    assert 0 == done.returncode, done.stderr
    assert "[]" == done.stdout.strip().splitlines()[-1]
