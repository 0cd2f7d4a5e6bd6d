"""What an estimate refuses: a ledger that fails its integrity check, a reward its stream never
received, and a stream whose decisions failed verification; and the alerts an estimate from
failures the caller accepted carries at the top of its output."""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Collection, Iterable, Sequence
from dataclasses import dataclass
from typing import Any

from drawledger.exceptions import EstimateRefusedError, ReplayError
from drawledger.replay.estimate._piece import Facts
from drawledger.replay.integrity import PROBLEMS, IntegrityReport
from drawledger.replay.verify import REASONS

# Above this share of decisions without the reward (filled with the missing-reward value), the
# estimate carries an alert at the top. Common practice (no published threshold): a few per
# cent of outcomes lost or late is usual in event pipelines; beyond that the fill value decides
# a visible part of the estimate.
MISSING_SHARE = 0.05

ALL = "all"

SHOW_NAMES = 10  # outcome names listed when a reward is refused


def accepted_reasons(accept: Collection[str], integrity: bool) -> frozenset[str]:
    """The verification reasons the caller accepts (``"all"``: every one); accepting
    integrity failures accepts the ``integrity`` reason they give the decisions involved."""
    items = None if isinstance(accept, str | bytes) or not isinstance(accept, Iterable) \
        else list(accept)  # fmt: skip
    if items is None or not all(isinstance(r, str) for r in items):
        raise ReplayError("accept_verification_failures must be a list of reasons, such as "
                          f"['code-changed'], got {accept!r}")  # fmt: skip
    if not isinstance(integrity, bool):
        raise ReplayError(f"accept_integrity_failures must be True or False, got {integrity!r}")
    chosen = set(items)
    unknown = sorted(str(r) for r in chosen - set(REASONS) - {ALL})
    if unknown:
        raise ReplayError(f"unknown verification reason {unknown[0]!r} to accept; use "
                          f"{ALL!r} or some of: {', '.join(REASONS)}")  # fmt: skip
    if ALL in chosen:
        chosen = set(REASONS)
    if integrity:
        chosen.add("integrity")
    return frozenset(chosen)


def _counts(problems: dict[str, int]) -> str:
    return ", ".join(f"{k}: {v}" for k, v in sorted(problems.items()))


def integrity_verdict(report: IntegrityReport, accept: bool) -> dict[str, int]:
    """The integrity problems the estimate goes on with ({}: none); ``EstimateRefusedError``
    when the check failed and the caller did not accept it."""
    if report.ok:
        return {}
    problems = {p: int(getattr(report, p)) for p in PROBLEMS
                if getattr(report, p) and p != "orphan_outcomes"}  # fmt: skip
    if not accept:
        raise EstimateRefusedError(
            f"the ledger fails its integrity check ({_counts(problems)}): records may have "
            "been edited, deleted or duplicated, so no estimate is made from it; run "
            "'drawledger verify' for the details, or accept the failures explicitly with "
            "--accept-integrity-failures (accept_integrity_failures=True)",
            "integrity", problems,
        )  # fmt: skip
    return problems


@dataclass(frozen=True)
class Failures:
    """What stage 1 found about the stream: decisions without the reward, and decisions that
    failed verification (left out of the estimate)."""

    total: int  # decisions of the stream
    rewarded: int  # of them, with the reward
    filled: int  # records used whose reward is the missing-reward value
    failed: int  # decisions that failed verification (all left out)
    reasons: dict[str, int]  # their reasons
    code_changed: int  # decisions used although their code changed (accepted)
    summed: int = 0  # records used whose reward is the sum of several outcomes
    one_draw: int = 0  # records used whose logging propensity is one-draw (not proven)

    @classmethod
    def of(cls, facts: Sequence[Facts]) -> Failures:
        reasons: Counter[str] = Counter()
        for f in facts:
            reasons.update(f.failed_reasons)
        return cls(sum(f.total for f in facts), sum(f.rewarded for f in facts),
                   sum(f.filled for f in facts), sum(f.failed for f in facts),
                   dict(sorted(reasons.items())), sum(f.code_changed for f in facts),
                   sum(f.summed for f in facts), sum(f.one_draw for f in facts))  # fmt: skip


def check_stream(facts: Sequence[Facts], reward: str, stream: str,
                 names: Callable[[], list[str]]) -> Failures:  # fmt: skip
    """Refuse a reward no decision of the stream has (``ReplayError``, a usage error) and a
    stream with verification failures the caller did not accept (``EstimateRefusedError``)."""
    found = Failures.of(facts)
    if found.total and not found.rewarded:
        have = names()
        shown = ", ".join(repr(n) for n in have[:SHOW_NAMES]) or "none"
        if len(have) > SHOW_NAMES:
            shown += f" and {len(have) - SHOW_NAMES} more"
        raise ReplayError(f"no decision of stream {stream!r} has a {reward!r} outcome; its "
                          f"outcomes are: {shown}")  # fmt: skip
    refused: Counter[str] = Counter()
    for f in facts:
        refused.update(f.refused)
    if refused:
        n = sum(f.refused_n for f in facts)
        raise EstimateRefusedError(
            f"{n} of {found.total} decisions of stream {stream!r} failed verification "
            f"({_counts(dict(refused))}); the ones that replayed by chance are a biased "
            "subset, so no estimate is made; fix the decision code, or accept these reasons "
            "explicitly with --accept-verification-failures REASON "
            "(accept_verification_failures=[...])",
            "verification", dict(refused),
        )  # fmt: skip
    return found


def alerts(found: Failures, integrity: dict[str, int], reward: str,
           missing_reward: float | None, n: int) -> list[str]:  # fmt: skip
    """The lines an estimate shows above everything else."""
    out = []
    if integrity:
        out.append(f"INTEGRITY FAILURES ACCEPTED ({_counts(integrity)}): the ledger fails its "
                   "integrity check, so its records may have been edited; this estimate is "
                   "not trustworthy")  # fmt: skip
    if found.failed:
        share = found.failed / found.total if found.total else 0.0
        out.append(f"VERIFICATION FAILURES ACCEPTED: {found.failed} of {found.total} decisions "
                   f"({share:.1%}) failed verification ({_counts(found.reasons)}) and were "
                   "dropped; the records left are not a random sample of the stream, so this "
                   "estimate is biased")  # fmt: skip
    if missing_reward is not None and found.filled:
        share = found.filled / n if n else 0.0
        if share > MISSING_SHARE:
            out.append(f"{found.filled} of {n} records used ({share:.1%}) have no {reward!r} "
                       f"outcome and count as {missing_reward:g} (--missing-reward); above "
                       f"{MISSING_SHARE:.0%} that choice drives the estimate")  # fmt: skip
    return out


def failure_fields(found: Failures, integrity: dict[str, int],
            missing_reward: float | None, n: int) -> dict[str, Any]:  # fmt: skip
    """The JSON's ``accepted_failures`` (None when nothing was accepted) and
    ``missing_rewards`` objects."""
    accepted = None
    if integrity or found.failed:
        share = found.failed / found.total if found.total else 0.0
        accepted = {"integrity": integrity, "verification": found.reasons,
                    "dropped": found.failed, "decisions": found.total,
                    "dropped_share": share}  # fmt: skip
    return {"accepted_failures": accepted,
            "missing_rewards": {"filled": found.filled, "share": found.filled / n if n else 0.0,
                               "value": missing_reward}}  # fmt: skip
