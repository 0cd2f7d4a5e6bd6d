"""The ``drawledger`` command: a thin layer over the library.

Each subcommand calls one library function. Library errors become one line on stderr and
exit code 2 (``--debug`` shows the traceback); a check that ran and found a problem exits 1.
A command whose optional extra is not installed says which one, in one line, and exits 2.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
from collections.abc import Callable, Sequence
from typing import Any

from drawledger import __version__
from drawledger._cli_output import OneLineParser, run_quietly
from drawledger._cli_output import console as _console
from drawledger._cli_output import json_option as _json_option
from drawledger._cli_output import write_json as _write_json
from drawledger._text import counted, visible
from drawledger.exceptions import DrawledgerError, EstimateRefusedError

EXIT_OK, EXIT_FOUND, EXIT_USAGE = 0, 1, 2

Handler = Callable[[argparse.Namespace], int]

# The extra that installs each optional module a command imports (pip install 'drawledger[X]').
_EXTRAS = {
    "numpy": "replay", "pandas": "replay", "scipy": "replay", "pyarrow": "replay",
    "rich": "replay", "matplotlib": "replay", "pydantic": "replay",
    "dask": "dask", "distributed": "dask",
}  # fmt: skip

_EXTRA_NAMES = {
    "replay": "the analysis extras",
    "dask": "the Dask extras",
    "parquet": "the Parquet extras",
}


def _missing_extra(exc: ImportError, command: str) -> str | None:
    """The extra that provides the module ``exc`` misses (None: not an optional module)."""
    module = (exc.name or "").split(".")[0]
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
    """Load a spill file or declared draws; exit 2 when a line or record could not be loaded."""
    import os

    from drawledger import ingest

    key = os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None
    report = ingest(args.file, args.ledger, integrity_key=key)
    if args.json:
        _write_json(args.json, report.to_dict())
    print(report.render())
    if report.malformed:
        n, reason = report.malformed[0]
        print(f"drawledger ingest: error: {counted(len(report.malformed), 'malformed line')} "
              f"skipped (first: line {n}: {visible(reason)})", file=sys.stderr)  # fmt: skip
    elif report.spilled:
        draws = counted(report.spilled, "declared draw")
        print(f"drawledger ingest: error: {draws} could not be written and were spilled; "
              "ingest that spill file again", file=sys.stderr)  # fmt: skip
    return EXIT_OK if report.ok else EXIT_USAGE


def _verify(args: argparse.Namespace) -> int:
    """Replay every decision; exit 1 when one is not verified or the integrity check fails."""
    import os

    from drawledger.replay import verify

    report = verify(
        args.ledger, path=args.path, allow=args.allow, jobs=args.jobs, budget=args.budget,
        mc_samples=args.mc_samples, export=args.export, keep_rows=args.export is not None,
        progress=not args.quiet,
        integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None, engine=args.engine,
        scheduler=args.scheduler,
    )  # fmt: skip
    if args.json:
        _write_json(args.json, report.to_dict())
    _console().print(report)
    return EXIT_OK if report.ok else EXIT_FOUND


def _show(args: argparse.Namespace) -> int:
    """One decision in full, replayed; exit 1 when its replay does not verify it."""
    from drawledger.replay import verify_one

    view = verify_one(args.ledger, args.decision_id, path=args.path, allow=args.allow,
                      integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None)  # fmt: skip
    if args.json:
        _write_json(args.json, view.to_dict())
    _console().print(view)
    return EXIT_OK if view.ok else EXIT_FOUND


def _audit(args: argparse.Namespace) -> int:
    """Test the randomization of every stream; exit 1 when an alarm fires."""
    from drawledger.replay import audit

    report = audit(
        args.ledger, progress=not args.quiet, engine=args.engine, scheduler=args.scheduler
    )
    if args.json:
        _write_json(args.json, report.to_dict())
    _console().print(report)
    return EXIT_OK if report.ok else EXIT_FOUND


def _assignments(items: Sequence[str], flag: str) -> dict[str, Any]:
    """``K=V`` pairs; V is read as JSON when it parses (0.3, true, "x", [1, 2]), else as text."""
    import orjson

    out: dict[str, Any] = {}
    for item in items:
        key, sep, text = item.partition("=")
        if not sep or not key:
            raise ValueError(f"{flag} {item!r}: expected NAME=VALUE, for example temperature=0.3")
        try:
            out[key] = orjson.loads(text)
        except orjson.JSONDecodeError:
            out[key] = text
    return out


MAX_SWEEP_POINTS = 1000  # each point is a whole estimate


def _sweep_grid(text: str) -> tuple[str, list[float]]:
    """``K=START:STOP:POINTS`` as the parameter name and POINTS evenly spaced values."""
    key, sep, spec = text.partition("=")
    parts = spec.split(":")
    try:
        if not sep or not key or len(parts) != 3:
            raise ValueError
        start, stop, steps = float(parts[0]), float(parts[1]), int(parts[2])
    except ValueError:
        raise ValueError(f"--sweep {text!r}: expected NAME=START:STOP:POINTS, for example "
                         "temperature=0.2:1.0:9") from None  # fmt: skip
    if not (math.isfinite(start) and math.isfinite(stop) and math.isfinite(stop - start)):
        raise ValueError(f"--sweep {text!r}: START and STOP must be finite numbers")
    if not 2 <= steps <= MAX_SWEEP_POINTS:
        raise ValueError(f"--sweep {text!r}: POINTS must be between 2 and {MAX_SWEEP_POINTS}")
    return key, [round(start + (stop - start) * (i / (steps - 1)), 12) for i in range(steps)]


def _reward_range(text: str) -> tuple[float, float]:
    """``LOW,HIGH`` (or ``LOW:HIGH``) as two finite numbers with LOW < HIGH."""
    parts = text.replace(":", ",").split(",")
    try:
        if len(parts) != 2:
            raise ValueError
        lo, hi = float(parts[0]), float(parts[1])
    except ValueError:
        raise ValueError(f"--reward-range {text!r}: expected LOW,HIGH, for example "
                         "0,1") from None  # fmt: skip
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise ValueError(f"--reward-range {text!r}: LOW and HIGH must be finite with LOW < HIGH")
    return lo, hi


def _estimate(args: argparse.Namespace) -> int:
    """Estimate a target policy; exit 1 when the data cannot answer (support deficit, tiny ESS)."""
    import os

    from drawledger.replay import estimate, sweep

    if args.sweep is None and args.plot:
        raise ValueError("--plot draws the curve of --sweep; add --sweep NAME=START:STOP:POINTS")
    if args.sweep is not None and (args.by or args.target):
        raise ValueError("--sweep varies --set parameters; it cannot be combined with --by "
                         "or --target")  # fmt: skip
    if args.baseline_set and args.baseline_target:
        raise ValueError("give either --baseline-set or --baseline-target, not both")
    overrides = _assignments(args.overrides, "--set")
    if overrides and args.target:
        raise ValueError("give either --set (changed parameters) or --target (a callable)")
    baseline = _assignments(args.baseline_set, "--baseline-set") or args.baseline_target
    reward_range = None if args.reward_range is None else _reward_range(args.reward_range)
    missing: float | None = None
    if args.missing_reward != "exclude":
        try:
            missing = float(args.missing_reward)
        except ValueError:
            raise ValueError(f"--missing-reward {args.missing_reward!r}: a number or "
                             "'exclude'") from None  # fmt: skip
    common: dict[str, Any] = dict(
        reward=args.reward, stream=args.stream, path=args.path, allow=args.allow,
        baseline=baseline or None, clip=args.clip, interval=args.interval,
        bootstrap=args.bootstrap, level=args.level, seed=args.seed, reward_range=reward_range,
        missing_reward=missing, progress=sys.stderr.isatty() and not args.quiet, jobs=args.jobs,
        integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None,
        engine=args.engine, scheduler=args.scheduler, **_accepted(args),
    )  # fmt: skip
    report: Any
    try:
        if args.sweep is not None:
            param, values = _sweep_grid(args.sweep)
            report = sweep(args.ledger, param=param, values=values, overrides=overrides or None,
                           **common)  # fmt: skip
        else:
            report = estimate(args.ledger, overrides=overrides or None, target=args.target,
                              by=args.by, **common)  # fmt: skip
    except EstimateRefusedError as exc:
        if args.json:  # never leave an earlier run's estimate in the file
            refused = {"check": exc.check, "problems": exc.problems, "message": str(exc)}
            _write_json(args.json, {"ok": False, "refused": refused})
        raise
    if args.sweep is not None and args.plot:
        from drawledger._files import replacing

        with replacing(args.plot) as out:
            report.figure().savefig(out, format=args.plot.rsplit(".", 1)[-1].lower())
    if args.json:
        _write_json(args.json, report.to_dict())
    _console().print(report)
    return EXIT_OK if report.ok else EXIT_FOUND


def _accepted(args: argparse.Namespace) -> dict[str, Any]:
    """The failures the user accepts (``--accept-verification-failures a,b`` or repeated)."""
    reasons = [r.strip() for item in args.accept_verification_failures for r in item.split(",")]
    return {"accept_integrity_failures": args.accept_integrity_failures,
            "accept_verification_failures": [r for r in reasons if r]}  # fmt: skip


def _accept_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--accept-integrity-failures", action="store_true",
                   help="estimate even though the ledger fails its integrity check: the "
                   "flagged decisions are dropped, the output says so first, exit 1")  # fmt: skip
    p.add_argument("--accept-verification-failures", action="append", default=[],
                   metavar="REASON",
                   help="estimate even though decisions failed verification for REASON "
                   "(repeatable or comma-separated; 'all': any reason): they are dropped, "
                   "the output says so first, exit 1")  # fmt: skip


def _estimate_options(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Verify the ledger, then estimate the mean reward of a target policy (the logged\n"
        "decision function with --set parameters, or a --target callable) from the verified\n"
        "records: IPS, SNIPS, clipped IPS and doubly robust, each with an interval, the paired\n"
        "difference to a baseline (default: the logging policy), and overlap diagnostics.\n"
        "Exit 0 when the data can answer; 1 when the target has a support deficit or uneven\n"
        "weights (a small effective sample size or one dominant weight), when the estimate is\n"
        "refused because the ledger fails its integrity check or decisions of the stream failed\n"
        "verification, or when such failures were accepted (docs/estimators.md); 2 for bad\n"
        "usage, such as a reward that no decision of the stream has."
    )
    p.add_argument("--target", metavar="MODULE:FUNCTION",
                   help="target policy as a callable f(inputs, action) -> probability, "
                   "imported under the --path/--allow rules")  # fmt: skip
    p.add_argument("--baseline-set", action="append", default=[], metavar="K=V",
                   help="compare with the logged code under these parameters instead of "
                   "the logging policy (repeatable)")  # fmt: skip
    p.add_argument("--baseline-target", metavar="MODULE:FUNCTION",
                   help="compare with this callable, not the logging policy")  # fmt: skip
    p.add_argument("--sweep", metavar="K=START:STOP:POINTS",
                   help="a curve of estimates at POINTS evenly spaced values of policy "
                   "parameter K from START to STOP, for example temperature=0.2:1.0:9")  # fmt: skip
    p.add_argument("--plot", metavar="FILE", help="with --sweep: save the curve (.png, .svg, .pdf)")
    p.add_argument("--by", metavar="FIELD",
                   help="estimates per segment: a column of verify's export or an input "
                   "field such as ctx.segment")  # fmt: skip
    p.add_argument("--clip", type=float, metavar="R",
                   help="cap of clipped IPS: weights >= R count as 0 (default 10)")  # fmt: skip
    p.add_argument("--interval", choices=("clt", "bootstrap", "bernstein"), default="clt",
                   help="interval method (default clt: normal / delta method)")  # fmt: skip
    p.add_argument("--bootstrap", type=int, default=0, metavar="B",
                   help="bootstrap resamples with --interval bootstrap (default 1000)")  # fmt: skip
    p.add_argument("--level", type=float, default=0.95, help="confidence level (default 0.95)")
    p.add_argument("--seed", type=int, default=0, help="seed of the bootstrap and sampled checks")
    p.add_argument("--reward-range", metavar="LOW,HIGH",
                   help="reward bounds fixed in advance: used by the bernstein bound, clip the "
                   "intervals, refuse rewards outside (default: the observed range, widened "
                   "to include 0; for a negative LOW write --reward-range=-1,1)")  # fmt: skip
    p.add_argument("--missing-reward", default="0", metavar="VALUE",
                   help="reward when the outcome is missing, or 'exclude' (default 0)")  # fmt: skip
    p.add_argument("--jobs", type=int, default=1, metavar="N",
                   help="verify in N processes (default 1)")  # fmt: skip
    _accept_options(p)


# The default demo size: the whole demo finishes in well under a minute on a laptop.
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
    """Write the HTML report; exit 1 when verification or the audit found a problem."""
    import os

    from drawledger.replay import write_report

    report = write_report(
        args.ledger, args.html, path=args.path, allow=args.allow, reward=args.reward,
        overrides=_assignments(args.overrides, "--set") or None, stream=args.stream,
        progress=not args.quiet, integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None,
        **_accepted(args),
    )  # fmt: skip
    if args.json:
        _write_json(args.json, report.to_dict())
    print(report.render())
    return EXIT_OK if report.ok else EXIT_FOUND


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
    _engine_options(p)

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
    _json_option(p)

    p = add("audit", "test statistically that randomization happened as declared",
            "drawledger audit decisions.db --json audit.json", _audit)  # fmt: skip
    p.description = (
        "Test, stream by stream, that the recorded draws follow the distributions they\n"
        "declare: uniforms, probability integral transforms, assignment ratios, repeated\n"
        "seeds (docs/audit.md). No decision code runs, so declared draws are tested too.\n"
        "p-values are Holm-corrected across a stream's tests. Exit 0 when no alarm fires,\n"
        "1 when one does."
    )
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    _json_option(p)
    _engine_options(p)

    p = add("estimate", "estimate the reward of a changed policy from verified records",
            "drawledger estimate decisions.db --reward checkout --set temperature=0.3 --path .",
            _estimate)  # fmt: skip
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
    _estimate_options(p)
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
        "was refused (the page then says why) or made from accepted failures."
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
    _accept_options(p)

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
        _check_outputs(args)
        return run_quietly(handler, args)
    except KeyboardInterrupt:
        print(f"drawledger {args.command}: interrupted", file=sys.stderr)
        return 130
    except ImportError as exc:
        extra = _missing_extra(exc, args.command)
        if extra is None or args.debug:
            raise
        print(f"drawledger: {args.command} needs {_EXTRA_NAMES[extra]} ({exc.name} is missing): "
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
