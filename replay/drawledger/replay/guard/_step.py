"""One piece taken in: its chain continued, its decisions replayed, its statistics merged."""

from __future__ import annotations

import heapq
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

from drawledger._schema import DEC, DRAW, OUT
from drawledger.replay.audit import chunk_state
from drawledger.replay.guard._state import INTEGRITY_PROBLEMS, GuardState, Mark, new_alarm
from drawledger.replay.guard._versions import Versions
from drawledger.replay.guard._watch import update_watches
from drawledger.replay.integrity import IntegrityReport, Rec, decision_rec, outcome_rec, walk
from drawledger.replay.propensity import Memo
from drawledger.replay.sources import WriterPiece, rows_frame
from drawledger.replay.verify import Settings

# The audit keeps bottom-k samples and sketches for its rank tests; the guard uses only the
# audit's counts and histograms (it asks for counts only), so the units of a bucket draw, the
# one sample still kept, stay few.
SAMPLE_SIZE = 16

# Verify reasons that do not fail a check: a declared draw was made by other code (the
# audit's statistics watch it).
NOT_FAILING = frozenset({"declared"})


@dataclass(frozen=True)
class StepSettings:
    """What taking in a piece needs besides the piece.

    ``memo`` keeps the replay's enumerated distributions from piece to piece (bounded; see
    ``verify_chunk``), so that a decision's inputs seen in an earlier piece are not enumerated
    again.
    """

    verify: Settings
    key: bytes
    alpha: float
    window: int
    versions: Versions = field(default_factory=Versions)  # what replays each code version
    memo: Memo = field(default_factory=Memo, compare=False)


def contiguous(piece: WriterPiece, after: int) -> tuple[WriterPiece | None, int | None]:
    """The records of ``piece`` up to its first hole in seq, and the hole's first seq (None
    when the piece has none)."""
    seqs = sorted({r[DEC.seq] for r in piece.decisions} | {o[OUT.seq] for o in piece.outcomes})
    expected = after + 1
    for s in seqs:
        if s > expected:
            hole = expected
            break
        expected = s + 1
    else:
        return piece, None
    rows = [r for r in piece.decisions if r[DEC.seq] < hole]
    outcomes = [o for o in piece.outcomes if o[OUT.seq] < hole]
    if not rows and not outcomes:
        return None, hole
    ids = {r[DEC.decision_id] for r in rows}
    draws = [d for d in piece.draws if d[DRAW.decision_id] in ids]
    return WriterPiece(piece.key, rows, draws, outcomes, hole - 1), hole


def writer_of(piece: WriterPiece) -> str:
    """The writer named by a piece's records."""
    return str(piece.decisions[0][DEC.writer] if piece.decisions else piece.outcomes[0][OUT.writer])


def take_piece(
    state: GuardState, piece: WriterPiece, settings: StepSettings
) -> list[dict[str, Any]]:
    """Merge one piece into ``state``; the alarms it raises (not yet recorded)."""
    alarms: list[dict[str, Any]] = []
    rows, draws = piece.decisions, piece.draws
    mark = state.writers.get(piece.key)
    if mark is None:
        mark = state.writers[piece.key] = Mark(writer_of(piece))
    writer = mark.writer

    # The chain, continued from where it stood.
    by_id: dict[str, list[tuple[Any, ...]]] = {}
    for d in draws:
        by_id.setdefault(d[DRAW.decision_id], []).append(d)
    recs: Iterable[Rec] = (decision_rec(r, list(by_id.get(r[DEC.decision_id], ())),
                                        settings.key, set()) for r in rows)  # fmt: skip
    if piece.outcomes:
        recs = heapq.merge(recs, (outcome_rec(o, settings.key) for o in piece.outcomes),
                           key=lambda r: (r.seq, r.order))  # fmt: skip
    found = IntegrityReport(keyed=bool(settings.key))
    chains = walk(found, recs, set(), {writer: (mark.seq + 1, mark.hash)},
                  unfinished=piece.unfinished)  # fmt: skip
    for problem in INTEGRITY_PROBLEMS:
        n = getattr(found, problem)
        if n:
            state.integrity[problem] += n
            first = next(iter(found.examples.get(problem, [])), None)
            detail = f"{n} {problem.replace('_', ' ')} in writer {writer}"
            alarms.append(new_alarm("", None, f"integrity:{problem}", first, detail))

    # Replay: every decision re-executed and compared with its record.
    checked = settings.versions.verify(rows, draws, frozenset(found.decision_ids),
                                       settings.verify, settings.memo)  # fmt: skip
    for stream, (_n, verified, mismatched, unreplayable) in checked.streams.items():
        state.verify["verified"] += verified
        state.verify["mismatched"] += mismatched
        state.verify["unreplayable"] += unreplayable
        for reason, count in checked.stream_reasons.get(stream, {}).items():
            state.by_reason[reason] = state.by_reason.get(reason, 0) + count
            if reason not in NOT_FAILING:
                shown = checked.examples.get(reason, [])
                mine = [d for d, _ in shown if d in {r[DEC.decision_id] for r in rows
                                                     if r[DEC.stream] == stream}]  # fmt: skip
                detail = f"{count} decisions of the piece not verified ({reason})"
                if shown:
                    detail += f": {shown[0][1]}"
                alarms.append(new_alarm(stream, None, f"verify:{reason}",
                                     mine[0] if mine else None, detail))  # fmt: skip

    # The audit's statistics of the piece, merged into the sequential evidence.
    if rows:
        audit = chunk_state(rows_frame(rows, "decisions"), rows_frame(draws, "draws"),
                            sample_size=SAMPLE_SIZE, counts_only=True)  # fmt: skip
        first_ids: dict[str, str] = {}
        for r in rows:
            first_ids.setdefault(str(r[DEC.stream]), r[DEC.decision_id])
        alarms.extend(update_watches(state, audit, first_ids, settings.alpha, settings.window))

    state.decisions += len(rows)
    state.outcomes += len(piece.outcomes)
    state.pieces += 1
    mark.seq, mark.hash = chains[writer][0] - 1, chains[writer][1]
    mark.seq = max(mark.seq, piece.last)
    if rows:
        mark.ts = max(float(r[DEC.ts]) for r in rows)
    return alarms
