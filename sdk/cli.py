"""The ``drawledger`` command: a thin layer over the library.

Each subcommand calls one library function. Library errors become one line on stderr and
exit code 2 (``--debug`` shows the traceback); a check that ran and found a problem exits 1.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence
from typing import Any

from drawledger.exceptions import DrawledgerError

EXIT_OK, EXIT_FOUND, EXIT_USAGE = 0, 1, 2

Handler = Callable[[argparse.Namespace], int]


def _not_yet(command: str) -> Handler:
    def run(_args: argparse.Namespace) -> int:
        print(f"drawledger {command}: not yet available in this version", file=sys.stderr)
        return EXIT_USAGE

    return run


def _engine_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--engine", choices=("local", "dask"), default="local",
                   help="where the work runs (default: local)")  # fmt: skip
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="address of a running Dask scheduler (with --engine dask)")  # fmt: skip


def _replay_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--path", action="append", default=[], metavar="DIR",
                   help="directory decision code may be imported from (repeatable)")  # fmt: skip
    p.add_argument("--allow", action="append", default=[], metavar="PREFIX",
                   help="module prefix decision code may be imported from (repeatable)")  # fmt: skip


class _Formatter(argparse.RawDescriptionHelpFormatter):
    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=32, width=100)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="drawledger",
        formatter_class=_Formatter,
        description="Record randomized decisions with their true probabilities, replay and "
        "audit them, and estimate what other policies would have achieved.",
        epilog="Exit codes: 0 passed, 1 a check found a problem, 2 bad usage or unreadable input.",
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks of errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def add(name: str, help: str, example: str, handler: Handler) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help, description=help, formatter_class=_Formatter,
                           epilog=f"example:\n  {example}")  # fmt: skip
        p.set_defaults(handler=handler)
        return p

    p = add("demo", "run the grocery-delivery demo end to end",
            "drawledger demo --decisions 5000 --out demo-out", _not_yet("demo"))  # fmt: skip
    p.add_argument("--decisions", type=int, default=20_000, metavar="N",
                   help="number of shopper sessions to simulate (default 20000)")  # fmt: skip
    p.add_argument("--out", default="drawledger-demo", metavar="DIR",
                   help="output directory (default drawledger-demo)")  # fmt: skip

    p = add("verify", "replay every decision and check the ledger's integrity",
            "drawledger verify decisions.db --path . --json verify.json --export props.parquet",
            _not_yet("verify"))  # fmt: skip
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    _replay_options(p)
    p.add_argument("--json", metavar="FILE", help="write the result as JSON")
    p.add_argument("--export", metavar="FILE",
                   help="write one row per decision (.csv or .parquet)")  # fmt: skip
    _engine_options(p)

    p = add("audit", "test statistically that randomization happened as declared",
            "drawledger audit decisions.db --json audit.json", _not_yet("audit"))  # fmt: skip
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    p.add_argument("--json", metavar="FILE", help="write the result as JSON")
    _engine_options(p)

    p = add("estimate", "estimate the reward of a changed policy from verified records",
            "drawledger estimate decisions.db --reward checkout --set temperature=0.3 --path .",
            _not_yet("estimate"))  # fmt: skip
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    p.add_argument("--reward", required=True, metavar="NAME", help="outcome name to estimate")
    p.add_argument("--set", action="append", default=[], metavar="K=V", dest="overrides",
                   help="policy parameter of the target policy (repeatable)")  # fmt: skip
    p.add_argument("--stream", metavar="S", help="only this decision stream")
    _replay_options(p)
    p.add_argument("--json", metavar="FILE", help="write the result as JSON")
    _engine_options(p)

    p = add("report", "write a self-contained HTML report of a ledger",
            "drawledger report decisions.db --html report.html", _not_yet("report"))  # fmt: skip
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    p.add_argument("--html", required=True, metavar="FILE", help="where to write the report")

    p = add("ingest", "load declared draws or spill files into a ledger",
            "drawledger ingest legacy-draws.jsonl decisions.db", _not_yet("ingest"))  # fmt: skip
    p.add_argument("file", metavar="FILE", help="JSON Lines: declared draws or a spill file")
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    handler: Handler = args.handler
    try:
        return handler(args)
    except KeyboardInterrupt:
        print(f"drawledger {args.command}: interrupted", file=sys.stderr)
        return 130
    except (DrawledgerError, OSError, ValueError) as exc:
        if args.debug:
            raise
        message = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        print(f"drawledger {args.command}: error: {message}", file=sys.stderr)
        return EXIT_USAGE


def _entry() -> Any:  # pragma: no cover - console script shim
    sys.exit(main())


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
