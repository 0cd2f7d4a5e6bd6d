"""Reasons, settings and the mergeable result of verifying chunks of decisions."""

from __future__ import annotations

import os
from collections import Counter
from dataclasses import dataclass, field, replace
from typing import Any

import pandas as pd

from drawledger.replay.propensity import DEFAULT_BUDGET, DEFAULT_MC_SAMPLES

Row = tuple[Any, ...]


REASONS = (
    "value",
    "probability",
    "args",
    "draw-count",
    "action",
    "nondeterministic",
    "code-changed",
    "version-not-found",
    "integrity",
    "not-allowed",
    "missing-function",
    "not-a-decision",
    "bad-record",
    "replay-error",
    "declared",
)


UNREPLAYABLE = frozenset({"not-allowed", "missing-function", "not-a-decision", "bad-record",
                          "replay-error", "declared"})  # fmt: skip


# "declared" draws are counted as unreplayable but do not fail the check: they were made by
# other code, and ``drawledger audit`` tests them statistically.
NOT_FAILING = frozenset({"declared"})


VERIFIED, MISMATCHED, UNREPLAYABLE_ = 1, 2, 3


MAX_EXAMPLES = 5


COUNTS = ("decisions", "verified", "mismatched", "unreplayable")


REL_TOL = 1e-12


PROBES = 8  # decisions of each function checked fully per chunk before reading a density


SHOW = 70


@dataclass(frozen=True)
class Settings:
    """What every chunk needs to know (picklable: sent once per chunk to a worker)."""

    path: tuple[str, ...] = ()
    allow: tuple[str, ...] = ()
    budget: int = DEFAULT_BUDGET
    mc_samples: int = DEFAULT_MC_SAMPLES
    keep_rows: bool = True
    # Code versions (docs/deploys.md): stored source by identity; the (fn, identity) pairs
    # replayed in a process of their own (left out here); or only these pairs (that process).
    sources: tuple[tuple[str, str], ...] = ()
    elsewhere: frozenset[tuple[str, str]] = frozenset()
    only: frozenset[tuple[str, str]] | None = None


@dataclass
class ChunkResult:
    """Counts, examples and export rows of one chunk (or of several, once combined)."""

    streams: dict[str, list[int]] = field(default_factory=dict)  # decisions, verified, ...
    stream_reasons: dict[str, Counter[str]] = field(default_factory=dict)
    by_reason: Counter[str] = field(default_factory=Counter)
    examples: dict[str, list[tuple[str, str]]] = field(default_factory=dict)
    methods: Counter[str] = field(default_factory=Counter)
    rows: list[pd.DataFrame] = field(default_factory=list)
    # The first example of each reason cut for the terminal (when its detail is long).
    short: dict[str, str] = field(default_factory=dict)

    def add(self, other: ChunkResult) -> None:
        for reason, text in other.short.items():
            if not self.examples.get(reason):
                self.short.setdefault(reason, text)
        for stream, found in other.stream_reasons.items():
            self.stream_reasons.setdefault(stream, Counter()).update(found)
        for stream, counts in other.streams.items():
            mine = self.streams.setdefault(stream, [0, 0, 0, 0])
            for i, n in enumerate(counts):
                mine[i] += n
        self.by_reason.update(other.by_reason)
        self.methods.update(other.methods)
        for reason, shown in other.examples.items():
            mine_shown = self.examples.setdefault(reason, [])
            mine_shown.extend(shown[: MAX_EXAMPLES - len(mine_shown)])
        self.rows.extend(other.rows)


def absolute_paths(settings: Settings) -> Settings:
    return replace(settings, path=tuple(os.path.abspath(os.path.expanduser(p))
                                        for p in settings.path))  # fmt: skip
