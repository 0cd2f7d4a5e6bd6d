"""From a ledger to an export to a what-if estimate: the analyst's side of the example service.

1. Verify: replay every decision of the ledger (decision code is imported only from --path)
   and export one row per decision, with the replayed propensity and the checkout outcome.
2. Look at the export with pandas: checkout rate per featured card, and the propensities.
3. Estimate: what would the checkout rate have been with a lower softmax temperature
   (temperature 0.3 instead of the logged 0.7) on the recipe card?

    python analyst.py grocery.db --path . --export propensities.csv

Exit code 0 when every decision verified, 1 otherwise.
"""

from __future__ import annotations

import argparse
import sys

import pandas as pd

from drawledger.replay import estimate, verify


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("ledger", help="the service's ledger (SQLite file)")
    parser.add_argument("--path", action="append", default=[], help="where the decision code is")
    parser.add_argument("--export", default="propensities.csv", help="export file (.csv/.parquet)")
    parser.add_argument("--temperature", type=float, default=0.3, help="target temperature")
    args = parser.parse_args()

    # 1. Verify and export.
    report = verify(args.ledger, path=args.path, export=args.export)
    print(report.render())

    # 2. The export is a plain table: one row per decision.
    rows = (
        pd.read_csv(args.export) if args.export.endswith(".csv") else pd.read_parquet(args.export)
    )
    cards = rows[rows["stream"] == "recipe-card"]
    by_card = cards.groupby("action")["checkout"].agg(["count", "mean"])
    print("\ncheckout rate by featured card (logged policy):")
    print(by_card.round(3).to_string())
    print(
        f"\nreplayed propensities of the cards shown: min {cards['propensity'].min():.3f}, "
        f"median {cards['propensity'].median():.3f}, max {cards['propensity'].max():.3f}"
    )

    # 3. What if the card were chosen with a lower temperature?
    result = estimate(
        args.ledger,
        reward="checkout",
        overrides={"temperature": args.temperature},
        stream="recipe-card",
        path=args.path,
    )
    print()
    print(result)
    snips = result.estimates["snips"]
    print(
        f"temperature {args.temperature:g}: estimated checkout rate {snips['value']:.3f} "
        f"[{snips['low']:.3f}, {snips['high']:.3f}] (SNIPS, 95%), "
        f"logged policy {result.logging_value:.3f}"
    )
    return 0 if report.ok else 1


if __name__ == "__main__":
    sys.exit(main())
