"""N recorded decisions for an instruction count of the serving path (docs/performance.md).

    valgrind --tool=callgrind python tests/benchmarks/serve_callgrind.py N LEDGER.db

The quickstart's decision (a softmax over six recipe cards), called once to warm up, then N
times under ``drawledger.testing.capture`` (each record sealed, none written); a run of N
minus a run of 0 is the cost of N decisions.
"""

from __future__ import annotations

import sys
import warnings

import drawledger as dl
from drawledger.testing import capture

CARDS = ["one-pot-pasta", "green-curry", "sheet-pan-salmon", "taco-night", "lentil-soup",
         "overnight-oats"]  # fmt: skip
SCORES = [1.6, 0.7, 1.2, 1.8, 0.5, 0.4]


def main(n: int, target: str) -> None:
    warnings.simplefilter("ignore", dl.UnreplayableDecisionWarning)  # nothing is replayed
    led = dl.Ledger(target)

    def feature_card(cards: list[str], scores: list[float], draw: dl.Draw, *,
                     temperature: float = 0.7) -> str:  # fmt: skip
        return draw.softmax(cards, scores, temperature=temperature, name="card")

    decision = led.decision("recipe-card")(feature_card)
    with capture(led):
        decision(CARDS, SCORES)  # the first call's one-time work
        for _ in range(n):
            decision(CARDS, SCORES)


if __name__ == "__main__":
    main(int(sys.argv[1]), sys.argv[2])
