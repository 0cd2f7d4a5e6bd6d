"""The ``drawledger`` command: a thin layer over the library.

Each subcommand calls one library function. Library errors become one line on stderr and
exit code 2 (``--debug`` shows the traceback); a check that ran and found a problem exits 1.
A command whose optional extra is not installed says which one, in one line, and exits 2.
"""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Callable, Sequence
from typing import Any

from drawledger._text import visible
from drawledger.exceptions import DrawledgerError, EstimateRefusedError

EXIT_OK, EXIT_FOUND, EXIT_USAGE = 0, 1, 2

Handler = Callable[[argparse.Namespace], int]

# The extra that installs each optional module a command imports (pip install 'drawledger[X]').
_EXTRAS = {
    "numpy": "replay", "pandas": "replay", "scipy": "replay", "pyarrow": "replay",
    "rich": "replay", "matplotlib": "replay", "pydantic": "replay",
    "dask": "dask", "distributed": "dask", "prometheus_client": "guard",
}  # fmt: skip

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
        if path is not None:
            check_output(path, f"--{flag}")
    plot = getattr(args, "plot", None)
    if plot is not None and not plot.lower().endswith(PLOT_SUFFIXES):
        raise ValueError(f"--plot {visible(plot)}: give a name ending in .png, .svg or .pdf")


def _write_json(path: str, data: dict[str, Any]) -> None:
    """The result as indented JSON, written whole or not at all."""
    import orjson

    from drawledger._files import replacing

    with replacing(path) as out:
        out.write(orjson.dumps(data, option=orjson.OPT_INDENT_2) + b"\n")


def _ingest(args: argparse.Namespace) -> int:
    """Load a spill file or declared draws; exit 2 when a line or record could not be loaded,
    1 when a record conflicts with a stored one or reuses a stored decision id."""
    import os

    from drawledger import ingest

    key = os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None
    report = ingest(args.file, args.ledger, integrity_key=key)
    print(report.render())
    problems = []
    for label, found in (("conflicting records not loaded", report.conflicting),
                         ("records refused for a decision id already in the ledger",
                          report.duplicate_ids),
                         ("malformed lines skipped", report.malformed)):  # fmt: skip
        if found:
            n, reason = found[0]
            problems.append(f"{len(found)} {label} (first: line {n}: {visible(reason)})")
    if report.spilled:
        problems.append(f"{report.spilled} declared draws could not be written and were "
                        "spilled; ingest that spill file again")  # fmt: skip
    if report.rejected:
        problems.append(f"{report.rejected} declared draws were refused by the writer: their "
                        "decision id reached the ledger during the ingest")  # fmt: skip
    if problems:
        print(f"drawledger ingest: error: {'; '.join(problems)}", file=sys.stderr)
    if report.malformed or report.spilled:
        return EXIT_USAGE
    return EXIT_FOUND if report.conflicting or report.duplicate_ids or report.rejected else EXIT_OK


def _verify(args: argparse.Namespace) -> int:
    """Replay every decision; exit 1 when one is not verified or the integrity check fails."""
    import os

    from rich.console import Console

    from drawledger.replay import verify

    report = verify(
        args.ledger, path=args.path, allow=args.allow, jobs=args.jobs, budget=args.budget,
        mc_samples=args.mc_samples, export=args.export, keep_rows=args.export is not None,
        progress=True,
        integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None, engine=args.engine,
        scheduler=args.scheduler, history=not args.no_history,
    )  # fmt: skip
    if args.json:
        _write_json(args.json, report.to_dict())
    Console(highlight=False).print(report)
    return EXIT_OK if report.ok else EXIT_FOUND


def _versions(args: argparse.Namespace) -> int:
    """List the code versions of a ledger, or diff two; exit 1 when a stored source does not
    hash to its identity."""
    import orjson

    from drawledger.replay import code_versions, version_diff

    if args.diff:
        report = version_diff(args.ledger, *args.diff, stream=args.stream)
    else:
        report = code_versions(args.ledger, stream=args.stream)
    data = orjson.dumps(report.to_dict(), option=orjson.OPT_INDENT_2) + b"\n"
    if args.json == "-":
        sys.stdout.buffer.write(data)
    else:
        if args.json:
            with open(args.json, "wb") as out:
                out.write(data)
        print(report.render())
    return EXIT_OK if report.ok else EXIT_FOUND


def _audit(args: argparse.Namespace) -> int:
    """Test the randomization of every stream; exit 1 when an alarm fires."""
    from rich.console import Console

    from drawledger.replay import audit

    report = audit(args.ledger, progress=True, engine=args.engine, scheduler=args.scheduler)
    if args.json:
        _write_json(args.json, report.to_dict())
    Console(highlight=False).print(report)
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


def _sweep_grid(text: str) -> tuple[str, list[float]]:
    """``K=START:STOP:STEPS`` as the parameter name and STEPS evenly spaced values."""
    key, sep, spec = text.partition("=")
    parts = spec.split(":")
    try:
        if not sep or not key or len(parts) != 3:
            raise ValueError
        start, stop, steps = float(parts[0]), float(parts[1]), int(parts[2])
    except ValueError:
        raise ValueError(f"--sweep {text!r}: expected NAME=START:STOP:STEPS, for example "
                         "temperature=0.2:1.0:9") from None  # fmt: skip
    if steps < 2:
        raise ValueError(f"--sweep {text!r}: STEPS must be at least 2")
    return key, [round(start + (stop - start) * i / (steps - 1), 12) for i in range(steps)]


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

    from rich.console import Console

    from drawledger.replay import estimate, sweep

    if args.sweep is None and args.plot:
        raise ValueError("--plot draws the curve of --sweep; add --sweep NAME=START:STOP:STEPS")
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
        missing_reward=missing, progress=sys.stderr.isatty(), jobs=args.jobs,
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
    Console(highlight=False).print(report)
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
                   help="compare with these parameters, not logging (repeatable)")  # fmt: skip
    p.add_argument("--baseline-target", metavar="MODULE:FUNCTION",
                   help="compare with this callable, not the logging policy")  # fmt: skip
    p.add_argument("--sweep", metavar="K=START:STOP:STEPS",
                   help="a curve of estimates over STEPS values of policy parameter K")  # fmt: skip
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

    result = run_demo(args.decisions, args.out, progress=True)
    print(result.render())
    return EXIT_OK if result.ok else EXIT_FOUND


def _report(args: argparse.Namespace) -> int:
    """Write the HTML report; exit 1 when verification or the audit found a problem."""
    import os

    from drawledger.replay import write_report

    report = write_report(
        args.ledger, args.html, path=args.path, allow=args.allow, reward=args.reward,
        overrides=_assignments(args.overrides, "--set") or None, stream=args.stream,
        progress=True, integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None,
        **_accepted(args),
    )  # fmt: skip
    print(report.render())
    return EXIT_OK if report.ok else EXIT_FOUND


def _guard(args: argparse.Namespace) -> int:
    """Follow a ledger; with --once exit 1 when an alarm stands, 0 when none does."""
    import os
    import shlex

    import orjson

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
    data = orjson.dumps(report.to_dict(), option=orjson.OPT_INDENT_2) + b"\n"
    if args.json == "-":
        sys.stdout.buffer.write(data)
        sys.stdout.flush()
    else:
        if args.json:
            with open(args.json, "wb") as out:
                out.write(data)
        from rich.console import Console

        Console(highlight=False).print(report)
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
                   help="directory decision code may be imported from (repeatable)")  # fmt: skip
    p.add_argument("--allow", action="append", default=[], metavar="PREFIX",
                   help="module prefix decision code may come from (repeatable)")  # fmt: skip


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

    p = add("verify", "replay every decision and check the ledger's integrity",
            "drawledger verify decisions.db --path . --json verify.json --export props.parquet",
            _verify)  # fmt: skip
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    _replay_options(p)
    p.add_argument("--json", metavar="FILE", help="write the result as JSON")
    p.add_argument("--export", metavar="FILE",
                   help="write one row per decision (.csv or .parquet)")  # fmt: skip
    p.add_argument("--jobs", type=int, default=1, metavar="N",
                   help="replay in N processes (default 1)")  # fmt: skip
    p.add_argument("--budget", type=int, default=4096, metavar="PATHS",
                   help="most branches enumerated per decision before Monte Carlo "
                   "(default 4096)")  # fmt: skip
    p.add_argument("--mc-samples", type=int, default=2000, metavar="N",
                   help="Monte Carlo runs per decision past the budget (default 2000)")  # fmt: skip
    p.add_argument("--no-history", action="store_true",
                   help="do not search the git history of --path directories for the code "
                   "versions that logged older records (docs/deploys.md)")  # fmt: skip
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
    p.add_argument("--stream", metavar="S", help="only this decision stream")
    p.add_argument("--diff", nargs=2, metavar=("A", "B"),
                   help="show a unified diff from version A to version B")  # fmt: skip
    p.add_argument("--json", metavar="FILE", help="write the result as JSON ('-': stdout)")

    p = add("audit", "test statistically that randomization happened as declared",
            "drawledger audit decisions.db --json audit.json", _audit)  # fmt: skip
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    p.add_argument("--json", metavar="FILE", help="write the result as JSON")
    _engine_options(p)

    p = add("estimate", "estimate the reward of a changed policy from verified records",
            "drawledger estimate decisions.db --reward checkout --set temperature=0.3 --path .",
            _estimate)  # fmt: skip
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    p.add_argument("--reward", required=True, metavar="NAME", help="outcome name to estimate")
    p.add_argument("--set", action="append", default=[], metavar="K=V", dest="overrides",
                   help="policy parameter of the target policy (repeatable)")  # fmt: skip
    p.add_argument("--stream", metavar="S", help="only this decision stream")
    _replay_options(p)
    p.add_argument("--json", metavar="FILE", help="write the result as JSON")
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
    _replay_options(p)
    p.add_argument("--reward", metavar="NAME",
                   help="outcome name: add the estimate of the --set target policy")  # fmt: skip
    p.add_argument("--set", action="append", default=[], metavar="K=V", dest="overrides",
                   help="policy parameter of the target policy (repeatable)")  # fmt: skip
    p.add_argument("--stream", metavar="S", help="decision stream of the estimate")
    _accept_options(p)

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
    p.add_argument("--json", metavar="FILE", help="write the summary as JSON ('-': stdout)")
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
    p.add_argument("file", metavar="FILE", help="JSON Lines: declared draws or a spill file")
    p.add_argument("ledger", metavar="LEDGER", help="SQLite path, SQLAlchemy URL or Parquet dir")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    handler: Handler = args.handler
    try:
        if getattr(args, "engine", "local") == "dask":
            import dask  # noqa: F401  (missing: the one line below, before any work starts)
            import distributed  # noqa: F401
        _check_outputs(args)
        return handler(args)
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
