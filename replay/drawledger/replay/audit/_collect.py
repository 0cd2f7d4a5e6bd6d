"""The audit's state over chunks: built per chunk, merged in order, finished into a report."""

from __future__ import annotations

from typing import TYPE_CHECKING

import pandas as pd

from drawledger.exceptions import ReplayError
from drawledger.replay.audit._limits import (
    ALPHA,
    AUDIT_DECISION_COLUMNS,
    AUDIT_DRAW_COLUMNS,
    SAMPLE_SIZE,
    UNDRAWN_COLUMNS,
    GroupKey,
)
from drawledger.replay.audit._report import AuditFigure, AuditReport, AuditTest
from drawledger.replay.audit._state import (
    GroupState,
    Sketch,
    StreamState,
    Undrawn,
    group_state,
    unit_frame,
)
from drawledger.replay.audit._tests import Found, group_figure, group_tests, stream_tests, verdicts

if TYPE_CHECKING:
    pass


class AuditState:
    """Sufficient statistics of the audit over the chunks merged so far."""

    def __init__(self, sample_size: int = SAMPLE_SIZE) -> None:
        if isinstance(sample_size, bool) or not isinstance(sample_size, int) or sample_size < 1:
            raise ReplayError(f"sample_size must be a positive integer, got {sample_size!r}")
        self.sample_size = sample_size
        self.counts_only = False  # built by chunk_state(counts_only=True): no report from it
        self.decisions = 0
        self.groups: dict[GroupKey, GroupState] = {}
        self.streams: dict[str, StreamState] = {}

    def _stream(self, name: str) -> StreamState:
        if name not in self.streams:
            size = self.sample_size
            self.streams[name] = StreamState(Sketch(size), Sketch(size))
        return self.streams[name]

    def merge(self, other: AuditState) -> None:
        """Add ``other`` (another chunk or partition) into this state."""
        self.counts_only |= other.counts_only
        self.decisions += other.decisions
        for key, g in other.groups.items():
            if key in self.groups:
                self.groups[key].merge(g)
            else:
                self.groups[key] = g
        for name, s in other.streams.items():
            self._stream(name).merge(s)

    def finish(self, alpha: float = ALPHA) -> AuditReport:
        """Run every test on the statistics gathered and return the report."""
        check_alpha(alpha)
        if self.counts_only:
            raise ReplayError("an audit state of counts only (the guard's) has no report: "
                              "build it with chunk_state(..., counts_only=False)")  # fmt: skip
        tests: list[AuditTest] = []
        figures: list[AuditFigure] = []
        for stream in sorted(self.streams):
            found: list[Found] = []
            for key in sorted(k for k in self.groups if k[0] == stream):
                group = self.groups[key]
                if group.units is not None:
                    group = _bucket_state(group, self.sample_size)
                found.extend(group_tests(key, group))
                figures.append(group_figure(key, group))
            found.extend(stream_tests(stream, self.streams[stream]))
            tests.extend(verdicts(found, alpha))
        return AuditReport(tuple(tests), tuple(figures), self.decisions, alpha)


def chunk_state(
    decisions: pd.DataFrame,
    draws: pd.DataFrame,
    *,
    sample_size: int = SAMPLE_SIZE,
    counts_only: bool = False,
) -> AuditState:
    """Sufficient statistics of one chunk of the ``decisions`` and ``draws`` tables.

    ``draws`` may hold draws of other decisions (they are ignored); decisions without draws
    count towards the number of decisions and their seeds. ``counts_only``: only each draw's
    consistency problems, counts and histograms (what the guard's sequential tests read); the
    streams' sketches, the samples, unit pairs, calibration and hours are left empty (and
    ``finish`` refuses such a state).
    """
    state = AuditState(sample_size)
    state.counts_only = counts_only
    _check_columns(decisions, AUDIT_DECISION_COLUMNS, "decisions")
    _check_columns(draws, AUDIT_DRAW_COLUMNS, "draws")
    decisions = decisions.drop_duplicates("decision_id")
    state.decisions = len(decisions)
    for stream, part in () if counts_only else decisions.groupby("stream", sort=False):
        s = state._stream(str(stream))
        seeds = part["seed"].dropna().to_numpy(dtype=object)
        s.decisions += len(part)
        s.seeded += len(seeds)
        s.seeds.merge(Sketch(sample_size, seeds.astype(str)))
        if UNDRAWN_COLUMNS <= set(part.columns):
            bare = part[~part["decision_id"].isin(draws["decision_id"])]
            if len(bare):
                record = bare["fn"].astype(str) + "\0" + bare["inputs"].astype(str) + "\0"
                record += bare["params"].astype(str)
                s.undrawn = Undrawn(sample_size)
                s.undrawn.add(record.to_numpy(dtype=object), bare["action"].to_numpy(dtype=object))
    columns = ["decision_id", "stream", "unit", "ts", "inputs"]
    columns += ["fn"] if "fn" in decisions.columns else []  # no function: a declared draw
    rows = draws[list(AUDIT_DRAW_COLUMNS)].merge(decisions[columns], on="decision_id")
    for (g_stream, kind, name), part in rows.groupby(
        ["stream", "kind", "name"], dropna=False, sort=False
    ):
        key: GroupKey = (
            str(g_stream),
            str(kind),
            None if name is None or name != name else str(name),
        )
        if kind == "bucket":
            g = GroupState(sample_size)
            g.units = unit_frame(part, sample_size)
            g.draws = len(part)
        else:
            g, flat_u = group_state(str(kind), part, sample_size, counts_only=counts_only)
            if not counts_only:
                s = state._stream(key[0])
                s.uniform_count += len(flat_u)
                s.uniforms.merge(Sketch(sample_size, flat_u))
        if key in state.groups:
            state.groups[key].merge(g)
        else:
            state.groups[key] = g
    return state


def _bucket_state(group: GroupState, size: int) -> GroupState:
    """Statistics of a bucket draw computed over its units (one row per unit)."""
    assert group.units is not None
    units = group.units
    st, _ = group_state("bucket", units, size)
    st.problems.update(group.problems)
    st.units = units
    return st


def _check_columns(df: pd.DataFrame, columns: tuple[str, ...], table: str) -> None:
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise ReplayError(f"the {table} table has no column {', '.join(missing)}")


def check_alpha(alpha: float) -> None:
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0.0 < alpha < 1.0:
        raise ReplayError(f"alpha must be a number between 0 and 1, got {alpha!r}")
