"""Write the declared draws of an invented legacy promotions service as JSON Lines.

The legacy service predates drawledger and cannot be instrumented; it logs each random draw it
makes, with the probabilities it declares, one JSON object a line (the ``drawledger ingest``
format: decision_id, stream, unit, ts, kind, args, value, prob, optionally u). Three streams:

* ``slot-discount``: the delivery-slot discount shown at checkout, 0, 5 or 10 percent,
  categorical with declared probabilities 0.6, 0.3, 0.1;
* ``tip-prompt``: whether to ask for a courier tip, bernoulli with p = 0.25;
* ``promo-countdown``: minutes on a promotion's countdown timer, uniform on [10, 30).

``examples/legacy-draws.jsonl`` is this script's output with the defaults. With ``--faulty``
the service really draws the discount with probabilities 0.5, 0.3, 0.2 while still declaring
0.6, 0.3, 0.1: the kind of silent drift ``drawledger audit`` is there to catch.

    python make_legacy_draws.py legacy-draws.jsonl
    python make_legacy_draws.py --faulty faulty-draws.jsonl
"""

from __future__ import annotations

import argparse
import json
import random
import sys

DISCOUNTS = [0, 5, 10]
DECLARED = [0.6, 0.3, 0.1]
FAULTY = [0.5, 0.3, 0.2]
START = 1_767_225_600.0  # 2026-01-01T00:00:00Z, in seconds since the epoch


def pick(probs: list[float], u: float) -> int:
    """The first j with u < p_0 + ... + p_j (the categorical rule of the draw specification)."""
    total = 0.0
    for j, p in enumerate(probs):
        total += p
        if u < total:
            return j
    return len(probs) - 1


def lines(per_stream: int, faulty: bool) -> list[dict[str, object]]:
    rng = random.Random(1234)
    real = FAULTY if faulty else DECLARED
    out: list[dict[str, object]] = []
    for i in range(per_stream):
        shopper = f"shopper-{rng.randrange(100_000):06d}"
        ts = START + 60.0 * i
        u = rng.random()
        j = pick(real, u)
        out.append(
            {
                "decision_id": f"legacy-discount-{i:05d}",
                "stream": "slot-discount",
                "unit": shopper,
                "ts": ts,
                "kind": "categorical",
                "args": {"options": DISCOUNTS, "probs": DECLARED},
                "value": DISCOUNTS[j],
                "prob": DECLARED[j],
                "u": [u],
            }
        )
        u = rng.random()
        asked = u < 0.25
        out.append(
            {
                "decision_id": f"legacy-tip-{i:05d}",
                "stream": "tip-prompt",
                "unit": shopper,
                "ts": ts + 1.0,
                "kind": "bernoulli",
                "args": {"p": 0.25},
                "value": asked,
                "prob": 0.25 if asked else 0.75,
                "u": [u],
            }
        )
        u = rng.random()
        out.append(
            {
                "decision_id": f"legacy-countdown-{i:05d}",
                "stream": "promo-countdown",
                "unit": shopper,
                "ts": ts + 2.0,
                "kind": "uniform",
                "args": {"low": 10.0, "high": 30.0},
                "value": 10.0 + 20.0 * u,
                "prob": 0.05,
                "u": [u],
            }
        )
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out", help="JSON Lines file to write")
    parser.add_argument("--per-stream", type=int, default=400, help="draws per stream")
    parser.add_argument("--faulty", action="store_true", help="draw discounts off-declaration")
    args = parser.parse_args()
    with open(args.out, "w", encoding="utf-8") as f:
        for line in lines(args.per_stream, args.faulty):
            f.write(json.dumps(line, separators=(",", ":")) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
