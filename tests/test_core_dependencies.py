"""The core dependencies are what the serving side imports: pydantic belongs to the replay extra.

Recording takes pydantic models as inputs without importing pydantic (it calls their
``model_dump``); only replay rebuilds typed inputs with it.
"""

from __future__ import annotations

import re
import sqlite3
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

SERVE = """
import sys
sys.modules["pydantic"] = None  # as if it were not installed
import drawledger as dl
import drawledger.testing

ledger = dl.Ledger(sys.argv[1])


class Basket:  # a model recorded through its model_dump, as a pydantic model is
    def model_dump(self, mode: str = "python") -> dict[str, int]:
        return {"items": 3}


@ledger.decision("recipe-card")
def feature_card(basket: Basket, scores: list[float], draw: dl.Draw) -> str:
    return draw.softmax(["a", "b", "c"], scores, temperature=0.7)


with drawledger.testing.capture(ledger, seed=1):
    feature_card(Basket(), [1.0, 2.0, 3.0])
feature_card(Basket(), [1.0, 2.0, 3.0], decision_id="req-1")
ledger.outcome("req-1", "checkout", 1.0)
ledger.bucket("shopper-1", {"standard": 0.5, "free": 0.5}, "free-delivery")
ledger.record_draw("legacy-coupon", "bernoulli", {"p": 0.3}, True, 0.3)
ledger.close()
"""


def test_serving_side_records_without_pydantic_installed(tmp_path: Path) -> None:
    """Decisions with a model input, an outcome, a bucket and a declared draw are written to
    SQLite while every import of pydantic fails (fresh interpreter)."""
    done = subprocess.run([sys.executable, "-c", SERVE, str(tmp_path / "serve.db")],
                          capture_output=True, text=True, timeout=120)  # fmt: skip
    assert 0 == done.returncode, done.stderr
    with sqlite3.connect(tmp_path / "serve.db") as db:
        streams = db.execute("SELECT stream FROM decisions ORDER BY seq").fetchall()
        inputs = db.execute("SELECT inputs FROM decisions WHERE decision_id = 'req-1'").fetchone()
        outcomes = db.execute("SELECT COUNT(*) FROM outcomes").fetchone()
    # the captured call stays on the capture: one recipe card reaches the ledger
    assert [("recipe-card",), ("free-delivery",), ("legacy-coupon",)] == streams
    assert '{"basket":{"items":3},"scores":[1.0,2.0,3.0]}' == inputs[0]
    assert (1,) == outcomes


def test_pydantic_is_a_replay_extra_not_a_core_dependency() -> None:
    text = (ROOT / "pyproject.toml").read_text(encoding="utf-8")
    core = re.search(r"^dependencies = \[(.*?)\]", text, re.S | re.M)
    replay = re.search(r"^replay = \[(.*?)\]", text, re.S | re.M)
    assert core is not None and replay is not None
    assert ["orjson", "sqlalchemy"] == re.findall(r'"([a-z_-]+)', core.group(1))
    assert "pydantic" in re.findall(r'"([a-z_-]+)', replay.group(1))
