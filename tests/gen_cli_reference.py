"""Generate docs/cli.md from the ``--help`` of every ``drawledger`` command.

    python tests/gen_cli_reference.py          # rewrite docs/cli.md
    python tests/gen_cli_reference.py --check  # exit 1 if docs/cli.md is stale

tests/test_cli_reference.py runs the same comparison, so the reference cannot drift from the
command line.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from drawledger.cli import build_parser

DOC = Path(__file__).resolve().parent.parent / "docs" / "cli.md"

INTRO = """\
# Command-line reference

Generated from `drawledger --help` and `drawledger COMMAND --help` by
`python tests/gen_cli_reference.py`; `tests/test_cli_reference.py` fails when this page and the
command line disagree. Do not edit it by hand.

Every command exits with 0 when the check passed, 1 when it ran and found a problem, and 2 on
bad usage or unreadable input (one line on stderr; `drawledger --debug COMMAND ...` shows the
traceback). LEDGER is an SQLite file path, a SQLAlchemy URL (`postgresql+psycopg://...`) or a
Parquet ledger directory, as for `dl.Ledger`.

In scripts and CI jobs: `--json -` writes the result as JSON alone on stdout (the tables then go
to stderr), `--quiet` prints nothing but errors (the exit code and the files only), and output
to a pipe or a file is never cut to the terminal's width. `drawledger --version` prints the
version.
"""


def subcommands(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return dict(action.choices)
    return {}


def reference() -> str:
    """The text of docs/cli.md for the command line as it is now."""
    parser = build_parser()
    parts = [INTRO, "## drawledger\n", "```text\n" + parser.format_help().rstrip() + "\n```\n"]
    for name, sub in subcommands(parser).items():
        parts.append(f"## drawledger {name}\n")
        parts.append("```text\n" + sub.format_help().rstrip() + "\n```\n")
    return "\n".join(parts)


def main() -> int:
    check = "--check" in sys.argv[1:]
    text = reference()
    if check:
        if DOC.read_text(encoding="utf-8") != text:
            print(f"{DOC} is stale: run python tests/gen_cli_reference.py", file=sys.stderr)
            return 1
        return 0
    DOC.write_text(text, encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
