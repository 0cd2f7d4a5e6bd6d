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
