"""verify_chunk: a pure function of one chunk of decisions with their draws."""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from collections.abc import Set as AbstractSet
from typing import Any

import pandas as pd

from drawledger._schema import DEC, DRAW
from drawledger.replay.propensity import Memo
from drawledger.replay.verify import _export
from drawledger.replay.verify._decision import Context, as_text, check_decision
from drawledger.replay.verify._types import (
    MAX_EXAMPLES,
    MISMATCHED,
    UNREPLAYABLE,
    UNREPLAYABLE_,
    VERIFIED,
    ChunkResult,
    Row,
    Settings,
)


def _category(reasons: Mapping[str, str]) -> int:
    if not reasons:
        return VERIFIED
    found = set(reasons)
    if found & UNREPLAYABLE:
        return UNREPLAYABLE_
    return MISMATCHED if found else VERIFIED


def _here(row: Row, settings: Settings) -> bool:
    """Whether this run replays the row (the others run under their own code version)."""
    key = (row[DEC.fn], row[DEC.code_hash])
    if settings.only is not None:
        return key in settings.only
    return key not in settings.elsewhere


def verify_chunk(
    decisions: Sequence[Row],
    draws: Iterable[Row],
    flagged: AbstractSet[str],
    settings: Settings,
    memo: Memo | None = None,
) -> ChunkResult:
    """Check a chunk of decision rows with their draw rows (tuples in the ledger's column order).

    ``flagged`` holds the ids among them that the integrity check found in a problem. Pure:
    the result depends only on the arguments (and the decision code they name). ``memo``
    keeps the enumerated distributions of (function, inputs, parameters) from one chunk to
    the next, for a caller that checks chunks one after another (the guard; ``verify`` gives
    each chunk its own). A remembered distribution is the one the chunk would compute, as
    within a chunk: only a Monte Carlo estimate made for one action also serves the other
    actions of the same inputs and parameters, where one of them might have had a density.
    """
    if settings.elsewhere or settings.only is not None:
        decisions = [r for r in decisions if _here(r, settings)]
    by_id: dict[str, list[Row]] = {}
    for d in draws:
        by_id.setdefault(d[DRAW.decision_id], []).append(d)
    ctx = Context(settings, memo)
    result = ChunkResult()
    base: list[tuple[Any, ...]] = []
    flat: list[dict[str, Any]] = []
    for row in decisions:
        did = row[DEC.decision_id]
        checked = check_decision(row, list(by_id.get(did, ())), ctx, did in flagged)
        if not isinstance(did, str):  # a damaged id (bad-record): shown as it was read
            did = repr(did)
        reasons = checked.reasons
        category = _category(reasons)
        stream = row[DEC.stream] if isinstance(row[DEC.stream], str) else str(row[DEC.stream])
        counts = result.streams.setdefault(stream, [0, 0, 0, 0])
        counts[0] += 1
        counts[category] += 1
        if reasons:
            result.stream_reasons.setdefault(stream, Counter()).update(reasons.keys())
        for reason, detail in reasons.items():
            result.by_reason[reason] += 1
            shown = result.examples.setdefault(reason, [])
            if not shown and reason in checked.short:
                result.short[reason] = checked.short[reason]
            if len(shown) < MAX_EXAMPLES:
                shown.append((did, detail))
        prop = checked.propensity
        if prop is not None:
            result.methods[prop.method] += 1
        if settings.keep_rows:
            base.append((
                did, row[DEC.stream], as_text(row[DEC.unit]), row[DEC.ts], row[DEC.action],
                math.nan if prop is None else prop.value,
                None if prop is None else prop.method,
                math.nan if prop is None else prop.stderr,
                row[DEC.propensity], row[DEC.propensity_kind], category == VERIFIED,
                ";".join(reasons) or None, next(iter(reasons.values()), None),
            ))  # fmt: skip
            flat.append(_export.flatten_inputs(checked.inputs))
    if settings.keep_rows and base:
        frame = pd.DataFrame.from_records(base, columns=list(_export.BASE_COLUMNS))
        if any(flat):
            frame = pd.concat([frame, pd.DataFrame.from_records(flat)], axis=1)
        result.rows.append(frame)
    return result
