"""Write examples/analyst.ipynb: the steps of analyst.py as a notebook, without outputs.

The notebook runs the grocery-delivery demo (400 invented shopper sessions), verifies the
ledger, looks at the rows with pandas, estimates a colder recipe-card softmax (temperature 0.3)
beside the simulator's true value, draws a curve of temperatures and shows the audit.
``tests/test_examples.py`` checks that the committed notebook is this script's output and runs
it in a Jupyter kernel.

    python make_analyst_notebook.py analyst.ipynb
"""

from __future__ import annotations

import sys
import textwrap

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook

# (kind, source): "md" for a Markdown cell, "py" for a code cell.
CELLS = [
    (
        "md",
        """
        # The analyst's side of the grocery-delivery app

        The invented grocery-delivery app randomizes which recipe card its home screen
        features (`recipe-card`, a softmax over relevance scores) and how long it waits before
        a basket reminder (`reminder-delay`, a log-normal delay). The outcome is `checkout`:
        did the shopper check out within 24 hours? This notebook follows `analyst.py`: verify
        the ledger, look at the rows with pandas, then ask what a colder softmax would have
        achieved. Every result shows itself as a table here and has `.to_frame()` for pandas.
    """,
    ),
    (
        "md",
        """
        ## A ledger to analyse

        The demo simulates 400 shopper sessions (invented shoppers whose true checkout rates
        the simulator knows) and records both decisions through the SDK into
        `analyst-demo/decisions.db`. With your own service, start from its ledger instead.
    """,
    ),
    (
        "py",
        """
        import drawledger.replay as replay
        from drawledger.replay import run_demo

        demo = run_demo(400, "analyst-demo")
        print(demo.ledger)
    """,
    ),
    (
        "md",
        """
        ## 1. Verify

        Replay every decision with the production code. `allow=` says which modules replay may
        import (here the demo's decision module; `path=["src"]` names a folder instead). The
        same on the command line: `drawledger verify analyst-demo/decisions.db --allow
        drawledger.replay.demo`.
    """,
    ),
    (
        "py",
        """
        ledger = replay.open(demo.ledger, allow=["drawledger.replay.demo"])
        checked = ledger.verify()
        checked
    """,
    ),
    (
        "md",
        """
        ## 2. The rows, with pandas

        One row per decision: the action as a value (a card name, a delay in minutes), the
        replayed propensity and whether it is a probability or a density, the `checkout`
        outcome, and the inputs' scalar fields. `ts` is a UTC timestamp.
    """,
    ),
    (
        "py",
        """
        rows = checked.to_frame()
        cards = rows[rows["stream"] == "recipe-card"]
        cards.groupby("action")["checkout"].agg(["count", "mean"]).round(3)
    """,
    ),
    (
        "py",
        """
        delays = rows[rows["stream"] == "reminder-delay"]
        delays[["ts", "action", "propensity", "propensity_type", "checkout"]].head()
    """,
    ),
    (
        "md",
        """
        ## 3. What if the card were chosen with temperature 0.3?

        `overrides=` is the command line's `--set temperature=0.3`: the same decision code, run
        with the changed parameter, gives each logged card its probability under the new
        policy.
    """,
    ),
    (
        "py",
        """
        cooler = ledger.estimate("checkout", overrides={"temperature": 0.3}, stream="recipe-card")
        cooler
    """,
    ),
    (
        "py",
        """
        truth = demo.truth["temperature"]
        print(f"true checkout rate at temperature 0.3 (the simulator): {truth:.3f}")
        cooler.to_frame()[["value", "low", "high"]].round(3)
    """,
    ),
    (
        "md",
        """
        ## 4. A curve of temperatures

        The same question over a grid; the shaded bands are 95% intervals.
    """,
    ),
    (
        "py",
        """
        %matplotlib inline
        grid = [0.3, 0.5, 0.7, 1.0]
        curve = ledger.sweep("checkout", "temperature", grid, stream="recipe-card")
        curve.figure()
    """,
    ),
    (
        "py",
        """
        snips = curve.to_frame().xs("snips", level="estimator")
        snips[["value", "low", "high", "ess"]].round(3)
    """,
    ),
    (
        "md",
        """
        ## 5. The randomization audit

        Did the draws happen as the code declares? One row per statistical test.
    """,
    ),
    (
        "py",
        """
        ledger.audit()
    """,
    ),
]


def notebook() -> nbformat.NotebookNode:
    """The notebook, cells in order, without outputs."""
    cells = []
    for i, (kind, source) in enumerate(CELLS):
        text = textwrap.dedent(source).strip("\n")
        cell = new_markdown_cell(text) if kind == "md" else new_code_cell(text)
        cell["id"] = f"cell-{i:02d}"  # stable ids: the file changes only when cells do
        cells.append(cell)
    kernel = {"display_name": "Python 3", "language": "python", "name": "python3"}
    nb = new_notebook(cells=cells, metadata={"kernelspec": kernel,
                                             "language_info": {"name": "python"}})  # fmt: skip
    nbformat.validate(nb)
    return nb


def main(argv: list[str]) -> int:
    if len(argv) != 1:
        print("usage: python make_analyst_notebook.py OUT.ipynb", file=sys.stderr)
        return 2
    nbformat.write(notebook(), argv[0])
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
