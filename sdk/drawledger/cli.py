"""The ``drawledger`` command: a thin layer over the library.

Each subcommand calls one library function. Library errors become one line on stderr and
exit code 2 (``--debug`` shows the traceback); a check that ran and found a problem exits 1.
A command whose optional extra is not installed says which one, in one line, and exits 2.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Callable, Sequence
from typing import Any

from drawledger import __version__
from drawledger._cli_estimate import (
    accept_options,
    accepted,
    assignments,
    estimate_command,
    estimate_options,
    history_option,
)
from drawledger._cli_output import EXIT_FOUND, EXIT_OK, EXIT_USAGE, OneLineParser, run_quietly
from drawledger._cli_output import console as _console
from drawledger._cli_output import json_option as _json_option
from drawledger._cli_output import write_json as _write_json
from drawledger._text import visible
from drawledger.exceptions import DrawledgerError, EstimateRefusedError

Handler = Callable[[argparse.Namespace], int]

# The extra that installs each optional module a command imports (pip install 'drawledger[X]').
_EXTRAS = {
    "numpy": "replay", "pandas": "replay", "scipy": "replay", "pyarrow": "replay",
    "rich": "replay", "matplotlib": "replay", "pydantic": "replay",
    "dask": "dask", "distributed": "dask", "prometheus_client": "guard",
}  # fmt: skip

# Commands whose statistics need SciPy: checked before any work starts.
_STATISTICS = frozenset({"audit", "guard", "report", "demo"})

_EXTRA_NAMES = {
    "replay": "the analysis extras",
    "dask": "the Dask extras",
    "parquet": "the Parquet extras",
    "guard": "the guard extras",
}


def _missing_name(exc: ImportError) -> str:
    """The module an import missed; pandas re-raises a missing numpy without a name, so the
    name of the error's cause."""
    return exc.name or getattr(exc.__cause__, "name", None) or ""


def _missing_extra(exc: ImportError, command: str) -> str | None:
    """The extra that provides the module ``exc`` misses (None: not an optional module)."""
    module = _missing_name(exc).split(".")[0]
    if module == "pyarrow" and command == "ingest":  # the SDK writes Parquet with pyarrow alone
        return "parquet"
    return _EXTRAS.get(module)


def _not_yet(command: str) -> Handler:
    def run(_args: argparse.Namespace) -> int:
        print(f"drawledger {command}: not yet available in this version", file=sys.stderr)
        return EXIT_USAGE

    return run


PLOT_SUFFIXES = (".png", ".svg", ".pdf")


def _check_outputs(args: argparse.Namespace) -> None:
    """Every output file of the command can be written, checked before any work starts."""
    from drawledger._files import check_output

    for flag in ("json", "export", "plot", "html"):
        path = getattr(args, flag, None)
        if path == "-" and flag != "json":
            raise ValueError(f"--{flag} -: only --json can write to stdout; give a file name")
        if path is not None and not (flag == "json" and path == "-"):
            check_output(path, f"--{flag}")
    plot = getattr(args, "plot", None)
    if plot is not None and not plot.lower().endswith(PLOT_SUFFIXES):
        raise ValueError(f"--plot {visible(plot)}: give a name ending in .png, .svg or .pdf")


def _ingest(args: argparse.Namespace) -> int:
    """Load a spill file or declared draws; exit 2 when a line or record could not be loaded,
    1 when a record conflicts with a stored one or reuses a stored decision id."""
    import os

    from drawledger import ingest

    key = os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None
    report = ingest(args.file, args.ledger, integrity_key=key)
    if args.json:
        _write_json(args.json, report.to_dict())
    print(report.render())
    problems = report.problems()
    if problems:
        print(f"drawledger ingest: error: {'; '.join(problems)}", file=sys.stderr)
    if report.malformed or report.spilled:
        return EXIT_USAGE
    return EXIT_FOUND if report.conflicting or report.duplicate_ids or report.rejected else EXIT_OK


def _verify(args: argparse.Namespace) -> int:
    """Replay every decision; exit 1 when one is not verified or the integrity check fails."""
    import os

    from drawledger.replay import verify

    report = verify(
        args.ledger, path=args.path, allow=args.allow, jobs=args.jobs, budget=args.budget,
        mc_samples=args.mc_samples, export=args.export, keep_rows=args.export is not None,
        progress=not args.quiet,
        integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None, engine=args.engine,
        scheduler=args.scheduler, history=not args.no_history,
        run_stored_source=args.run_stored_source,
    )  # fmt: skip
    if args.json:
        _write_json(args.json, report.to_dict())
    _console().print(report)
    return EXIT_OK if report.ok else EXIT_FOUND


def _versions(args: argparse.Namespace) -> int:
    """List the code versions of a ledger, or diff two; exit 1 when a stored source does not
    hash to its identity."""
    from drawledger.replay import code_versions, version_diff

    if args.diff:
        report = version_diff(args.ledger, *args.diff, stream=args.stream)
    else:
        report = code_versions(args.ledger, stream=args.stream)
    if args.json:
        _write_json(args.json, report.to_dict())
    print(report.render())
    return EXIT_OK if report.ok else EXIT_FOUND


def _show(args: argparse.Namespace) -> int:
    """One decision in full, replayed; exit 1 when its replay does not verify it."""
    from drawledger.replay import verify_one

    view = verify_one(args.ledger, args.decision_id, path=args.path, allow=args.allow,
                      integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None,
                      history=not args.no_history)  # fmt: skip
    if args.json:
        _write_json(args.json, view.to_dict())
    _console().print(view)
    return EXIT_OK if view.ok else EXIT_FOUND


def _audit(args: argparse.Namespace) -> int:
    """Test the randomization of every stream; exit 1 on an alarm or a draw too rare to test."""
    from drawledger.replay import audit

    report = audit(
        args.ledger, progress=not args.quiet, engine=args.engine, scheduler=args.scheduler
    )
    if args.json:
        _write_json(args.json, report.to_dict())
    _console().print(report)
    return EXIT_OK if report.ok else EXIT_FOUND


DEMO_SESSIONS = 4_000


def _demo(args: argparse.Namespace) -> int:
    """Run the grocery-delivery demo; exit 1 when verification or the audit found a problem."""
    from drawledger.replay import run_demo

    result = run_demo(args.decisions, args.out, progress=not args.quiet)
    if args.json:
        _write_json(args.json, result.to_dict())
    print(result.render())
    return EXIT_OK if result.ok else EXIT_FOUND


def _report(args: argparse.Namespace) -> int:
    """Write the HTML report; exit 1 when verification or the audit found a problem, or the
    estimate was refused or shown under an alert (``HtmlReport.ok``)."""
    import os

    from drawledger.replay import write_report

    report = write_report(
        args.ledger, args.html, path=args.path, allow=args.allow, reward=args.reward,
        overrides=assignments(args.overrides, "--set") or None, stream=args.stream,
        progress=not args.quiet, integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None,
        **accepted(args),
    )  # fmt: skip
    if args.json:
        _write_json(args.json, report.to_dict())
    print(report.render())
    return EXIT_OK if report.ok else EXIT_FOUND


def _guard(args: argparse.Namespace) -> int:
    """Follow a ledger; with --once exit 1 when an alarm stands, 0 when none does."""
    import os
    import shlex

    from drawledger.replay.guard import alarm_line, guard

    command = shlex.split(args.on_alarm) if args.on_alarm else None
    if args.on_alarm is not None and not command:
        raise ValueError("--on-alarm: give a command, for example 'notify-qa --channel ops'")
    if args.metrics_port is not None:
        import prometheus_client  # noqa: F401  (missing: the one line naming the extra)

    def on_alarm(alarm: dict[str, Any]) -> None:
        print(alarm_line(alarm), file=sys.stderr, flush=True)
        if command is not None:
            _run_on_alarm(command, alarm)

    report = guard(
        args.ledger, path=args.path, allow=args.allow, state=args.state, once=args.once,
        interval=args.interval, alpha=args.alpha, window=args.window, gap_wait=args.gap_wait,
        integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None, on_alarm=on_alarm,
        metrics_port=args.metrics_port,
    )  # fmt: skip
    if args.json:
        _write_json(args.json, report.to_dict())
    _console().print(report)
    return EXIT_OK if report.ok else EXIT_FOUND


def _run_on_alarm(command: list[str], alarm: dict[str, Any]) -> None:
    """Run the operator's command with the alarm as JSON on stdin (an argument list: nothing
    from the ledger reaches a shell); a failure is reported in one line, the guard goes on."""
    import subprocess

    import orjson

    body = orjson.dumps({k: v for k, v in alarm.items() if k != "key"})
    try:
        done = subprocess.run(command, input=body, capture_output=True, timeout=60, check=False)
    except (OSError, subprocess.TimeoutExpired) as exc:
        print(f"drawledger guard: --on-alarm command failed: {exc}", file=sys.stderr)
        return
    if done.returncode != 0:
        print(f"drawledger guard: --on-alarm command exited {done.returncode}", file=sys.stderr)


def _engine_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--engine", choices=("local", "dask"), default="local",
                   help="where the work runs (default: local)")  # fmt: skip
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="address of a running Dask scheduler (with --engine dask)")  # fmt: skip


def _replay_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--path", action="append", default=[], metavar="DIR",
                   help="directory decision code may be imported from (repeatable); replay "
                   "imports nothing that --path or --allow does not name")  # fmt: skip
    p.add_argument("--allow", action="append", default=[], metavar="PREFIX",
                   help="module name prefix decision code may be imported from, for example "
                   "shop.decisions (repeatable)")  # fmt: skip


class _Formatter(argparse.RawDescriptionHelpFormatter):
    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=32, width=100)


def build_parser() -> argparse.ArgumentParser:
    parser = OneLineParser(
        prog="drawledger",
        formatter_class=_Formatter,
        description="Record randomized decisions with their true probabilities, replay and "
        "audit them, and estimate what other policies would have achieved.",
        epilog="Exit codes: 0 passed, 1 a check found a problem, 2 bad usage or unreadable input.\n"
        "New here? Run drawledger demo; drawledger COMMAND --help describes each command.",
    )
    parser.add_argument("--version", action="version", version=f"drawledger {__version__}",
                        help="print the version and exit")  # fmt: skip
    parser.add_argument("--debug", action="store_true",
                        help="show tracebacks of errors (before the command: drawledger --debug "
                        "verify ...)")  # fmt: skip
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def add(name: str, help: str, example: str, handler: Handler) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help, description=help, formatter_class=_Formatter,
                           epilog=f"example:\n  {example}")  # fmt: skip
        p.set_defaults(handler=handler, subparser=p)
        p.add_argument("-q", "--quiet", action="store_true",
                       help="print nothing but errors (exit code and files only)")  # fmt: skip
        return p

    p = add("demo", "run the grocery-delivery demo end to end",
            "drawledger demo --decisions 2000 --out demo-out", _demo)  # fmt: skip
    p.description = (
        "Simulate the shoppers of an invented grocery-delivery app, record two randomized\n"
        "decisions (recipe-card, reminder-delay) through the SDK into DIR/decisions.db, verify\n"
        "and audit the ledger, estimate two what-if policies beside the simulator's true\n"
        "values, and write DIR/report.html. Exit 0 when every check passed, 1 when verification\n"
        "or the audit found a problem."
    )
    p.add_argument("--decisions", type=int, default=DEMO_SESSIONS, metavar="N",
                   help="number of shopper sessions to simulate, each making one recipe-card "
                   f"and one reminder-delay decision (default {DEMO_SESSIONS})")  # fmt: skip
    p.add_argument("--out", default="drawledger-demo", metavar="DIR",
                   help="output directory for decisions.db and report.html; a previous demo "
                   "ledger there is replaced (default drawledger-demo)")  # fmt: skip
    _json_option(p)

    p = add("verify", "replay every decision and check the ledger's integrity",
            "drawledger verify decisions.db --path . --json verify.json --export props.parquet",
            _verify)  # fmt: skip
    p.description = (
        "Re-run every recorded decision from its inputs, parameters and seed, compare each\n"
        "draw, probability and the action with the record, compute the exact propensity of\n"
        "the action, and check the ledger's integrity (hash chains, gaps, duplicates).\n"
        "Decision code is imported only from --path directories and --allow module prefixes:\n"
        "a decision whose module neither names fails as not-allowed (docs/replay.md lists\n"
        "the reasons). Exit 0 when every decision verified and the integrity holds, 1 when\n"
        "not."
    )
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    _replay_options(p)
    _json_option(p)
    p.add_argument("--export", metavar="FILE",
                   help="write one row per decision (.csv or .parquet)")  # fmt: skip
    p.add_argument("--jobs", type=int, default=1, metavar="N",
                   help="replay in N processes (default 1)")  # fmt: skip
    p.add_argument("--budget", type=int, default=4096, metavar="N",
                   help="enumerate at most N branches of a decision's draws for its exact "
                   "propensity; past that, Monte Carlo (default 4096)")  # fmt: skip
    p.add_argument("--mc-samples", type=int, default=2000, metavar="N",
                   help="Monte Carlo runs per decision past --budget (default 2000)")  # fmt: skip
    history_option(p)
    p.add_argument("--run-stored-source", action="store_true",
                   help="replay the records of a code version the git history does not hold "
                   "from the source the ledger stores; needs DRAWLEDGER_INTEGRITY_KEY and a "
                   "ledger that passes the keyed integrity check (docs/deploys.md)")  # fmt: skip
    _engine_options(p)

    p = add("versions", "list the code versions that made a ledger's decisions, or diff two",
            "drawledger versions decisions.db --diff v2:1f0c v2:9a7e", _versions)  # fmt: skip
    p.description = (
        "List each code version of each decision function in the ledger: its identity, stream,\n"
        "function, first and last decision and number of decisions; with --diff A B, a unified\n"
        "diff between the source texts stored for two versions (identities, or unique\n"
        "beginnings of them). Read from the ledger alone; stored source is never executed.\n"
        "Exit 1 when a stored source does not hash to the identity its decisions recorded."
    )
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    p.add_argument("--stream", metavar="STREAM", help="only this decision stream")
    p.add_argument("--diff", nargs=2, metavar=("A", "B"),
                   help="show a unified diff from version A to version B")  # fmt: skip
    _json_option(p)

    p = add("show", "print one decision in full, beside its replay",
            "drawledger show decisions.db card-000012 --allow drawledger.replay.demo.grocery",
            _show)  # fmt: skip
    p.description = (
        "Print one decision: its inputs, policy parameters, seed and code identity, every\n"
        "draw (kind, name, arguments, uniforms, value, probability) beside its replayed value\n"
        "and probability, its outcomes, and the verdict verify gives it, with the reasons.\n"
        "The hashes of its records are checked; links between records (gaps) are verify's.\n"
        "Exit 0 when the replay verifies the decision (or it is a declared draw), 1 when it\n"
        "does not, 2 for an unknown decision id."
    )
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    p.add_argument("decision_id", metavar="DECISION_ID", help="the decision's id")
    _replay_options(p)
    history_option(p)
    _json_option(p)

    p = add("audit", "test statistically that randomization happened as declared",
            "drawledger audit decisions.db --json audit.json", _audit)  # fmt: skip
    p.description = (
        "Test, stream by stream, that the recorded draws follow the distributions they\n"
        "declare: uniforms, probability integral transforms, assignment ratios, repeated\n"
        "seeds (docs/audit.md). No decision code runs, so declared draws are tested too.\n"
        "p-values are Holm-corrected across a stream's tests. Exit 0 when no alarm fires,\n"
        "1 when one does or a draw is too rare to test."
    )
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    _json_option(p)
    _engine_options(p)

    p = add("estimate", "estimate the reward of a changed policy from verified records",
            "drawledger estimate decisions.db --reward checkout --set temperature=0.3 --path .",
            estimate_command)  # fmt: skip
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    p.add_argument("--reward", required=True, metavar="NAME", help="outcome name to estimate")
    p.add_argument("--set", action="append", default=[], metavar="K=V", dest="overrides",
                   help="the target policy: the logged code with policy parameter K set to V "
                   "(V is read as JSON when it parses, else as text; repeatable)")  # fmt: skip
    p.add_argument(
        "--stream",
        metavar="STREAM",
        help="the decision stream to estimate (needed when there are several)",
    )
    _replay_options(p)
    _json_option(p)
    estimate_options(p)
    _engine_options(p)

    p = add("report", "write a self-contained HTML report of a ledger",
            "drawledger report decisions.db --html report.html --path . --reward checkout "
            "--set temperature=0.3 --stream recipe-card", _report)  # fmt: skip
    p.description = (
        "Write one self-contained HTML file (no external requests, figures inline): integrity\n"
        "and verification with reasons, the randomization audit with its figures and, with\n"
        "--reward and --set, the estimate of a target policy with its weights. The 20 streams\n"
        "with alarms or the most decisions are shown in full, the others one row each. Exit 0\n"
        "when verification and the audit passed, 1 when they found a problem or the estimate\n"
        "was refused or shown under an alert (the page then says why: accepted failures,\n"
        "many rewards filled in, a support deficit, too uneven weights)."
    )
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    p.add_argument("--html", required=True, metavar="FILE", help="where to write the report")
    _json_option(p)
    _replay_options(p)
    p.add_argument("--reward", metavar="NAME",
                   help="outcome name: add the estimate of the --set target policy")  # fmt: skip
    p.add_argument("--set", action="append", default=[], metavar="K=V", dest="overrides",
                   help="policy parameter of the target policy (repeatable)")  # fmt: skip
    p.add_argument("--stream", metavar="STREAM",
                   help="decision stream of the estimate (with --reward)")  # fmt: skip
    accept_options(p)

    p = add("guard", "follow a growing ledger: verify, check and audit new records",
            "drawledger guard decisions.db --path . --state guard.json --once",
            _guard)  # fmt: skip
    p.description = (
        "Follow a ledger as it grows: replay each new decision, continue each writer's hash\n"
        "chain, and update anytime-valid evidence that randomization is as declared (an alarm\n"
        "per draw fires falsely with probability at most --alpha however long it watches).\n"
        "One line per alarm on stderr. With --once: take in what is new since --state, then\n"
        "exit 0 when no alarm stands, 1 when one does (docs/guard.md)."
    )
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    _replay_options(p)
    p.add_argument("--state", metavar="FILE",
                   help="JSON file keeping where the guard stands, to resume after a "
                   "restart")  # fmt: skip
    p.add_argument("--once", action="store_true", help="take in what is new, report and exit")
    p.add_argument("--interval", type=float, default=5.0, metavar="SECONDS",
                   help="seconds between looks at the ledger (default 5)")  # fmt: skip
    _json_option(p)
    p.add_argument("--on-alarm", metavar="COMMAND",
                   help="run COMMAND (split like a shell line, never run by one) with each "
                   "new alarm as JSON on stdin")  # fmt: skip
    p.add_argument("--metrics-port", type=int, metavar="N",
                   help="serve Prometheus metrics on 127.0.0.1:N")  # fmt: skip
    p.add_argument("--alpha", type=float, default=0.01,
                   help="false-alarm probability per draw over the whole run "
                   "(default 0.01)")  # fmt: skip
    p.add_argument("--window", type=int, default=10_000, metavar="N",
                   help="draws in the windowed drift view (default 10000)")  # fmt: skip
    p.add_argument("--gap-wait", type=float, default=30.0, metavar="SECONDS",
                   help="how long a hole in a writer's chain is waited for before it is "
                   "reported as a gap (default 30)")  # fmt: skip

    p = add("ingest", "load declared draws or spill files into a ledger",
            "drawledger ingest legacy-draws.jsonl decisions.db", _ingest)  # fmt: skip
    p.description = (
        "Load a JSON Lines file into LEDGER: declared draws of other systems (one a line:\n"
        "decision_id, stream, unit, ts, kind, args, value, prob and optionally u), or a spill\n"
        "file the SDK wrote when its ledger was unreachable. Records already in the ledger\n"
        "are skipped, so a file can be ingested again. Exit 0 when every line was loaded, 2\n"
        "when a line is malformed or a record could not be written."
    )
    p.add_argument("file", metavar="FILE", help="JSON Lines: declared draws or a spill file")
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    _json_option(p)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args, unknown = parser.parse_known_args(argv)
    if unknown:  # named by the command's own parser: "drawledger verify: error: ..."
        args.subparser.error(f"unrecognized arguments: {' '.join(unknown)}")
    handler: Handler = args.handler
    try:
        if getattr(args, "engine", "local") == "dask":
            import dask  # noqa: F401  (missing: the one line below, before any work starts)
            import distributed  # noqa: F401
        if args.command in _STATISTICS:
            import scipy  # noqa: F401  (the analysis side imports it where it is used)
        _check_outputs(args)
        return run_quietly(handler, args)
    except KeyboardInterrupt:
        print(f"drawledger {args.command}: interrupted", file=sys.stderr)
        return 130
    except ImportError as exc:
        extra = _missing_extra(exc, args.command)
        if extra is None or args.debug:
            raise
        print(f"drawledger: {args.command} needs {_EXTRA_NAMES[extra]} ({_missing_name(exc)} is "
              f"missing): "
              f"pip install 'drawledger[{extra}]'", file=sys.stderr)  # fmt: skip
        return EXIT_USAGE
    except EstimateRefusedError as exc:  # a verdict about the data, not bad usage
        if args.debug:
            raise
        print(f"drawledger {args.command}: refused: {str(exc).splitlines()[0]}", file=sys.stderr)
        return EXIT_FOUND
    except (DrawledgerError, OSError, ValueError) as exc:
        if args.debug:
            raise
        message = visible(str(exc).splitlines()[0]) if str(exc) else exc.__class__.__name__
        print(f"drawledger {args.command}: error: {message}", file=sys.stderr)
        return EXIT_USAGE


def _entry() -> Any:  # pragma: no cover - console script shim
    sys.exit(main())


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
