"""The sequential statistics of each draw, updated from the audit's statistics of a piece."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from drawledger.replay.audit import AuditState
from drawledger.replay.guard._evidence import (
    UNIFORM_BINS,
    coarsen_uniform,
    log_mixture_e,
    threshold,
    window_test,
)
from drawledger.replay.guard._state import GuardState, Watch, new_alarm

# Draw kinds that pick one option with one uniform: with fixed declared probabilities their
# picks are multinomial, and the ratio test applies. Every other draw is watched by its PIT.
RATIO_KINDS = frozenset({"categorical", "bernoulli", "integers", "softmax", "epsilon_greedy"})

# Declared probabilities agreeing to this relative tolerance are the same declaration.
SAME_P = 1e-9

HOW = {
    "ratio": "picks per option against the declared probabilities",
    "pit": "probability integral transforms in 10 bins against 0.1 each",
    "uniforms": "recorded uniforms in 10 bins against 0.1 each",
}

PIT_KEYS = [f"[{i / UNIFORM_BINS:g}, {(i + 1) / UNIFORM_BINS:g})" for i in range(UNIFORM_BINS)]


def new_watch(key: tuple[str, str, str | None], ratio: tuple[list[str], list[float]] | None
              ) -> Watch:  # fmt: skip
    stream, kind, draw = key
    if ratio is not None:
        keys, declared = ratio
        return Watch(stream, kind, draw, "ratio", keys, declared, [0.0] * len(keys))
    return Watch(stream, kind, draw, "pit", list(PIT_KEYS), [1.0 / UNIFORM_BINS] * UNIFORM_BINS,
                 [0.0] * UNIFORM_BINS)  # fmt: skip


def _fixed_ratio(kind: str, group: Any) -> tuple[list[str], list[float]] | None:
    """The options and declared probabilities of a piece's picks, when they are fixed."""
    cells = group.ratio
    if kind not in RATIO_KINDS or cells is None or group.varying or group.signature is None:
        return None
    picks = float(cells.observed.sum())
    if picks <= 0:
        return None
    return list(cells.keys), [float(e) / picks for e in cells.expected]


def update_watches(
    state: GuardState, audit: AuditState, first_ids: Mapping[str, str], alpha: float,
    window: int,
) -> list[dict[str, Any]]:  # fmt: skip
    """Add a piece's statistics into the watches; the alarms it raises (not yet recorded).

    ``first_ids`` gives the piece's first decision of each stream (the first decision an
    alarm can point to: the evidence crossed its threshold within this piece).
    """
    alarms: list[dict[str, Any]] = []
    limit = threshold(alpha)
    for key, group in sorted(audit.groups.items(), key=lambda kv: repr(kv[0])):
        stream, kind, draw = key
        first = first_ids.get(stream)
        if group.problems:
            detail = "; ".join(f"{n} {what}" for what, n in sorted(group.problems.items()))
            alarms.append(new_alarm(stream, draw, "consistency", first, detail))
        if kind == "bucket" or not group.steps:
            continue  # buckets are tested over units by ``drawledger audit``
        ratio = _fixed_ratio(kind, group)
        name = Watch(stream, kind, draw, "pit", [], [], []).key
        watch = state.watches.get(name)
        if watch is None:
            watch = state.watches[name] = new_watch(key, ratio)
        piece: list[float] | None
        if watch.test == "ratio":
            piece = _ratio_counts(watch, None if group.ratio is None else group.ratio.observed,
                                  ratio)  # fmt: skip
            if piece is None and watch.stopped is None:
                watch.stopped = ("the declared probabilities changed at or after decision "
                                 f"{first}; the ratio process stopped there")  # fmt: skip
        else:
            piece = [float(x) for x in coarsen_uniform(group.pit_hist)]
        if piece is not None and watch.stopped is None:
            watch.counts = [a + b for a, b in zip(watch.counts, piece, strict=True)]
            watch.log_e = log_mixture_e(watch.counts, watch.declared)
            _slide(watch, piece, window)
        if group.uniforms:
            more = coarsen_uniform(group.u_hist)
            watch.uniforms = [a + b for a, b in zip(watch.uniforms, more, strict=True)]
            watch.log_e_uniforms = log_mixture_e(
                watch.uniforms, [1.0 / UNIFORM_BINS] * UNIFORM_BINS
            )
        for test, log_e in ((watch.test, watch.log_e), ("uniforms", watch.log_e_uniforms)):
            if log_e >= limit:
                how = HOW[test]
                alarms.append(new_alarm(stream, draw, test, first, how, math.exp(min(log_e, 700.0)),
                                        math.exp(limit)))  # fmt: skip
    return alarms


def _ratio_counts(
    watch: Watch, observed: Any, ratio: tuple[list[str], list[float]] | None
) -> list[float] | None:
    """The piece's picks in the watch's cells; None when the piece's declaration differs."""
    if ratio is None:
        return None
    at = {k: i for i, k in enumerate(watch.keys)}
    out = [0.0] * len(watch.keys)
    keys, declared = ratio
    for k, p, n in zip(keys, declared, observed, strict=True):
        if k not in at:
            if p > 0 or n > 0:
                return None
            continue
        if not math.isclose(p, watch.declared[at[k]], rel_tol=SAME_P, abs_tol=1e-12):
            return None
        out[at[k]] += float(n)
    missing = set(watch.keys) - set(keys)
    return None if any(watch.declared[at[k]] > 0 for k in missing) else out


def _slide(watch: Watch, piece: list[float], window: int) -> None:
    """Keep the latest pieces holding at least ``window`` draws."""
    watch.window.append(piece)
    while len(watch.window) > 1 and sum(map(sum, watch.window[1:])) >= window:
        watch.window.pop(0)


def window_view(watch: Watch, alpha: float) -> dict[str, Any]:
    """The window's fixed-n test (information about drift, not an anytime-valid alarm)."""
    if not watch.window:
        return {"n": 0, "p_value": None, "drift": False}
    counts = np.sum(np.array(watch.window, dtype=np.float64), axis=0)
    p = window_test(list(counts), watch.declared)
    return {"n": int(counts.sum()), "p_value": p, "drift": p is not None and p < alpha}
