"""The estimate and sweep commands' options and their parsing (``drawledger estimate``)."""

from __future__ import annotations

import argparse
import math
import os
import sys
from collections.abc import Sequence
from typing import Any

from drawledger._cli_output import EXIT_FOUND, EXIT_OK, console, write_json
from drawledger.exceptions import EstimateRefusedError

__all__ = [
    "MAX_SWEEP_POINTS",
    "accept_options",
    "accepted",
    "assignments",
    "estimate_command",
    "estimate_options",
    "reward_range",
    "sweep_grid",
]


def assignments(items: Sequence[str], flag: str) -> dict[str, Any]:
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


def sweep_grid(text: str) -> tuple[str, list[float]]:
    """``K=START:STOP:POINTS`` as the parameter name and POINTS evenly spaced values: integers
    when START and STOP are written as integers and every value is one (a count of options),
    else floats."""
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
    grid = [round(start + (stop - start) * (i / (steps - 1)), 12) for i in range(steps)]
    if _is_int(parts[0]) and _is_int(parts[1]) and all(v.is_integer() for v in grid):
        return key, [int(v) for v in grid]
    return key, grid


def _is_int(text: str) -> bool:
    try:
        int(text)
    except ValueError:
        return False
    return True


def reward_range(text: str) -> tuple[float, float]:
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


def estimate_command(args: argparse.Namespace) -> int:
    """Estimate a target policy; exit 1 when the data cannot answer (support deficit, tiny ESS)."""

    from drawledger.replay import estimate, sweep

    if args.sweep is None and args.plot:
        raise ValueError("--plot draws the curve of --sweep; add --sweep NAME=START:STOP:POINTS")
    if args.sweep is not None and (args.by or args.target):
        raise ValueError("--sweep varies --set parameters; it cannot be combined with --by "
                         "or --target")  # fmt: skip
    if args.baseline_set and args.baseline_target:
        raise ValueError("give either --baseline-set or --baseline-target, not both")
    overrides = assignments(args.overrides, "--set")
    if overrides and args.target:
        raise ValueError("give either --set (changed parameters) or --target (a callable)")
    baseline = assignments(args.baseline_set, "--baseline-set") or args.baseline_target
    given_range = None if args.reward_range is None else reward_range(args.reward_range)
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
        bootstrap=args.bootstrap, level=args.level, seed=args.seed, reward_range=given_range,
        missing_reward=missing, progress=sys.stderr.isatty() and not args.quiet, jobs=args.jobs,
        integrity_key=os.environ.get("DRAWLEDGER_INTEGRITY_KEY") or None,
        engine=args.engine, scheduler=args.scheduler, history=not args.no_history,
        **accepted(args),
    )  # fmt: skip
    report: Any
    try:
        if args.sweep is not None:
            param, values = sweep_grid(args.sweep)
            report = sweep(args.ledger, param=param, values=values, overrides=overrides or None,
                           **common)  # fmt: skip
        else:
            report = estimate(args.ledger, overrides=overrides or None, target=args.target,
                              by=args.by, **common)  # fmt: skip
    except EstimateRefusedError as exc:
        if args.json:  # never leave an earlier run's estimate in the file
            refused = {"check": exc.check, "problems": exc.problems, "message": str(exc)}
            write_json(args.json, {"ok": False, "refused": refused})
        raise
    if args.sweep is not None and args.plot:
        from drawledger._files import replacing

        with replacing(args.plot) as out:
            report.figure().savefig(out, format=args.plot.rsplit(".", 1)[-1].lower())
    if args.json:
        write_json(args.json, report.to_dict())
    console().print(report)
    return EXIT_OK if report.ok else EXIT_FOUND


def accepted(args: argparse.Namespace) -> dict[str, Any]:
    """The failures the user accepts (``--accept-verification-failures a,b`` or repeated)."""
    reasons = [r.strip() for item in args.accept_verification_failures for r in item.split(",")]
    return {"accept_integrity_failures": args.accept_integrity_failures,
            "accept_verification_failures": [r for r in reasons if r]}  # fmt: skip


def accept_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--accept-integrity-failures", action="store_true",
                   help="estimate even though the ledger fails its integrity check: the "
                   "flagged decisions are dropped, the output says so first, exit 1")  # fmt: skip
    p.add_argument("--accept-verification-failures", action="append", default=[],
                   metavar="REASON",
                   help="estimate even though decisions failed verification for REASON "
                   "(repeatable or comma-separated; 'all': any reason): they are dropped, "
                   "the output says so first, exit 1")  # fmt: skip


def history_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--no-history", action="store_true",
                   help="do not search the git history of --path directories for the code "
                   "versions that logged older records (docs/deploys.md)")  # fmt: skip


def estimate_options(p: argparse.ArgumentParser) -> None:
    p.description = (
        "Verify the ledger, then estimate the mean reward of a target policy (the decision\n"
        "function of the current code under --path with --set parameters, or a --target\n"
        "callable) from the verified records: IPS, SNIPS, clipped IPS and doubly robust, each\n"
        "with an interval, the paired difference to a baseline (default: the logging policy,\n"
        "each record under the code version that logged it), and overlap diagnostics.\n"
        "Exit 0 when the data can answer. Exit 1, with an ALERT line at the top saying why,\n"
        "when the target has a support deficit or uneven weights (a small effective sample\n"
        "size or one dominant weight), when more than 5% of the rewards were filled in, or\n"
        "when integrity or verification failures were accepted; exit 1 too when the estimate\n"
        "is refused because the ledger fails its integrity check or decisions of the stream\n"
        "failed verification (docs/estimators.md). Exit 2 for bad usage, such as a reward\n"
        "that no decision of the stream has."
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
    history_option(p)
    accept_options(p)


# The default demo size: the whole demo finishes in well under a minute on a laptop.
