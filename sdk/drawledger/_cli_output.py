"""Where the command line's output goes: tables as wide as they need in pipes and files,
``--json -`` alone on stdout, ``--quiet``, and usage errors in one line.

Rich lays out output that is not a terminal 80 columns wide, cutting table columns; here
such output is ``PIPE_WIDTH`` wide, so CI logs and scripts get every number in full.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Callable
from contextlib import nullcontext, redirect_stdout
from typing import IO, Any, NoReturn

from drawledger._text import visible

__all__ = [
    "EXIT_FOUND",
    "EXIT_OK",
    "EXIT_USAGE",
    "PIPE_WIDTH",
    "OneLineParser",
    "console",
    "json_option",
    "run_quietly",
    "write_json",
]

# 0: the check ran and found nothing; 1: it ran and found a problem; 2: bad usage or input.
EXIT_OK, EXIT_FOUND, EXIT_USAGE = 0, 1, 2

# Tables printed to a pipe or a file (CI logs, scripts) are laid out this wide.
PIPE_WIDTH = 400

# Where ``--json -`` writes: the standard output the command started with (its human output
# goes to stderr meanwhile, or nowhere with --quiet).
_machine_out: list[IO[str]] = []


def console() -> Any:
    """A rich console on stdout: the terminal's width, or ``PIPE_WIDTH`` when not a terminal."""
    from rich.console import Console

    out = sys.stdout
    tty = hasattr(out, "isatty") and out.isatty()
    return Console(file=out, highlight=False, width=None if tty else PIPE_WIDTH)


def write_json(path: str, data: dict[str, Any]) -> None:
    """The result as indented JSON, written whole or not at all (``-``: alone on stdout)."""
    import orjson

    from drawledger._files import replacing

    text = orjson.dumps(data, option=orjson.OPT_INDENT_2) + b"\n"
    if path == "-":
        stdout = _machine_out[-1] if _machine_out else sys.stdout
        stdout.write(text.decode())
        stdout.flush()
        return
    with replacing(path) as out:
        out.write(text)


def run_quietly(handler: Callable[[argparse.Namespace], int], args: argparse.Namespace) -> int:
    """Run a command; with --quiet its human output goes nowhere, with ``--json -`` to stderr
    (stdout then holds the JSON alone)."""
    quiet = getattr(args, "quiet", False)
    if not quiet and getattr(args, "json", None) != "-":
        return handler(args)
    _machine_out.append(sys.stdout)
    try:
        with (
            open(os.devnull, "w") if quiet else nullcontext(sys.stderr) as human,
            redirect_stdout(human),
        ):
            return handler(args)
    finally:
        _machine_out.pop()


class OneLineParser(argparse.ArgumentParser):
    """Usage errors in one line on stderr, exit 2 (the usage itself is in --help)."""

    def error(self, message: str) -> NoReturn:
        self.exit(2, f"{self.prog}: error: {visible(message)} (see {self.prog} --help)\n")


def json_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", metavar="FILE",
                   help="write the result as JSON to FILE; '-' writes it alone to stdout "
                   "(the human-readable output then goes to stderr)")  # fmt: skip
