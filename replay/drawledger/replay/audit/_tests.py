"""The audit's tests on merged statistics, and their verdicts."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from drawledger.replay.audit import _stats
from drawledger.replay.audit._limits import (
    AS_DECLARED,
    HOUR_BINS,
    MAX_INPUT_FIELDS,
    MIN_KS,
    MIN_RANK,
    NOT_AS_DECLARED,
    NOT_ENOUGH_DATA,
    GroupKey,
    IntArray,
)
from drawledger.replay.audit._report import AuditFigure, AuditTest
from drawledger.replay.audit._state import Cells, GroupState, Sketch, StreamState
from drawledger.replay.audit._stats import FloatArray, TestResult
from drawledger.replay.audit._units import sticky_test

if TYPE_CHECKING:
    pass


@dataclass
class Found:
    """A test computed but not yet judged (Holm's correction needs all tests of the stream)."""

    stream: str
    draw: str | None
    kind: str | None
    test: str
    n: int
    result: TestResult | None  # None: not enough data
    count: int | None = None  # deterministic checks: the number of violations
    field: str | None = None
    detail: str = ""
    chisq: bool = False


def group_tests(key: GroupKey, g: GroupState) -> list[Found]:
    stream, kind, name = key

    def found(test: str, n: int, result: TestResult | None, **kw: Any) -> Found:
        return Found(stream, name, kind, test, n, result, **kw)

    bad = sum(g.problems.values())
    detail = "; ".join(f"{v} {k}" for k, v in sorted(g.problems.items()))
    if g.examples:
        shown = ", ".join(repr(x[:40]) for x in g.examples)
        detail += f" (contradicting their uniforms: decisions {shown})"
    out = [found("consistency", g.draws, None, count=bad, detail=detail)]
    if kind == "bucket" and g.units is not None:
        units = g.units
        split = int((units["arm_min"] != units["arm_max"]).sum())
        out.append(
            found(
                "unit_in_two_arms",
                len(units),
                None,
                count=split,
                detail="counts units; each unit's first draw enters the other tests",
            )
        )
    if g.pairs is not None and g.pairs.pairs:
        pairs = g.pairs
        how = (f"{pairs.matches} of {pairs.pairs} consecutive draws of a unit repeat its "
               f"previous pick, {pairs.expected:.1f} expected")  # fmt: skip
        out.append(found("unit_repeats", pairs.pairs, sticky_test(pairs), detail=how))
    if not g.steps:
        return out
    if g.ratio is not None and int((g.ratio.expected > 0).sum()) >= 2:
        res, how = _ratio(g.ratio, g.signature is not None)
        out.append(found("ratio", int(g.ratio.observed.sum()), res, detail=how, chisq=True))
    elif g.note:
        out[0].detail = "; ".join(filter(None, [out[0].detail, f"no ratio test: {g.note}"]))
    if g.varying and g.calibration is not None:
        res, _ = _ratio(g.calibration, False)
        out.append(
            found(
                "calibration",
                g.steps,
                res,
                chisq=True,
                detail="picks grouped by their declared probability",
            )
        )
    sample = g.sample.frame()
    if g.uniforms:
        u = sample["u"].to_numpy()
        u = u[~np.isnan(u)]
        out.append(found("uniforms_ks", len(u), _ks(u), detail=_sampled(len(u), g.uniforms)))
        out.append(
            found("uniforms_chisq", g.uniforms, _stats.binned_uniformity(g.u_hist), chisq=True)
        )
    pit = sample["pit"].to_numpy()
    out.append(found("pit_ks", len(pit), _ks(pit), detail=_sampled(len(pit), g.steps)))
    out.append(found("pit_chisq", g.steps, _stats.binned_uniformity(g.pit_hist), chisq=True))
    fields = _input_fields(sample)
    for series in ("uniforms", "pit") if g.uniforms else ("pit",):
        y = sample["u" if series == "uniforms" else "pit"].to_numpy()
        out.append(found(f"{series}_vs_time", *_rank(y, sample["ts"].to_numpy())))
        for f in fields:
            n, res = _rank(y, sample[f].to_numpy())
            out.append(found(f"{series}_vs_input", n, res, field=f[len("input:") :]))
    res, hours = _by_hour(g.hour_hist)
    out.append(
        found(
            "pit_vs_hour", g.steps, res, chisq=True, detail=f"{hours} hours (UTC) with enough draws"
        )
    )
    return out


def _sampled(n: int, total: int) -> str:
    return "" if n == total else f"on a sample of {n} of {total}"


def _ks(x: FloatArray) -> TestResult | None:
    return _stats.ks_uniform(x) if len(x) >= MIN_KS else None


def _rank(y: FloatArray, x: FloatArray) -> tuple[int, TestResult | None]:
    mask = ~(np.isnan(y) | np.isnan(x))
    y, x = y[mask], x[mask]
    if len(y) < MIN_RANK or np.all(x == x[0]) or np.all(y == y[0]):
        return len(y), None
    return len(y), _stats.spearman(y, x)


def _input_fields(sample: pd.DataFrame) -> list[str]:
    cols = [c for c in sample.columns if c.startswith("input:")]
    present = sample[cols].notna().sum().sort_values(ascending=False, kind="stable")
    varying = [c for c in present.index if sample[c].nunique() > 1]
    return sorted(varying[:MAX_INPUT_FIELDS])


def _ratio(cells: Cells, fixed: bool) -> tuple[TestResult | None, str]:
    """Observed picks per cell against the sums of declared probabilities (docs/audit.md)."""
    groups = _stats.pool_cells(cells.expected)
    if not groups:
        return None, ""
    a = _stats.grouping_matrix(groups, len(cells.keys))
    observed, expected = a @ cells.observed, a @ cells.expected
    pooled = sum(len(g) for g in groups) != len(groups)
    how = " (cells with expected count < 5 pooled)" if pooled else ""
    if fixed:
        return _stats.pearson(observed, expected), "Pearson chi-square, fixed probabilities" + how
    cov = a @ (np.diag(cells.expected) - cells.outer) @ a.T
    res = _stats.quadratic_chisq(observed - expected, cov)
    return res, "chi-square with Poisson-binomial variances, varying probabilities" + how


def _by_hour(hist: IntArray) -> tuple[TestResult | None, int]:
    """PIT values against U(0, 1) within each hour of the day: sum of Pearson chi-squares."""
    from scipy import stats

    per_hour = _stats.coarsen(hist, HOUR_BINS)
    n_h = per_hour.sum(axis=1)
    used = per_hour[n_h / HOUR_BINS >= _stats.MIN_EXPECTED]
    if len(used) < 2:
        return None, len(used)
    expected = used.sum(axis=1, keepdims=True) / HOUR_BINS
    stat = float(np.sum((used - expected) ** 2 / expected))
    df = len(used) * (HOUR_BINS - 1)
    return TestResult(stat, float(stats.chi2.sf(stat, df)), df), len(used)


UNDRAWN_CAUSE = (
    "the same function, inputs and parameters gave different actions without a recorded draw: "
    "likely randomness outside `draw` (the `random` module, a global numpy generator) or a clock"
)


def stream_tests(stream: str, s: StreamState) -> list[Found]:
    out = []
    if s.undrawn is not None:
        u = s.undrawn
        varied = u.varied
        detail = (
            f"{varied} record(s): {UNDRAWN_CAUSE}"
            if varied
            else ("decisions without draws give one action per function, inputs and parameters")
        )
        if u.truncated:
            detail += f" (on a sample of {len(u.actions)} records)"
        out.append(Found(stream, None, None, "actions_without_draws", u.decisions, None,
                         count=varied, detail=detail))  # fmt: skip
    if s.seeded:
        kept = int(s.seeds.counts.sum())
        share = _seed_share(s.seeds) if s.seeds.truncated else 1.0
        res = _stats.repeats(kept, len(s.seeds.values), 2.0**128 * share)
        out.append(
            Found(
                stream, None, None, "repeated_seeds", s.seeded, res, detail=_sampled(kept, s.seeded)
            )
        )
    if s.uniform_count:
        values = s.uniforms.values.astype(np.float64)
        kept = int(s.uniforms.counts.sum())
        share = float(values[-1]) if s.uniforms.truncated else 1.0
        cells = _stats.resolution(values)
        res = _stats.repeats(kept, len(values), cells * share)
        detail = f"{cells:.3g} possible values" + (
            f", {_sampled(kept, s.uniform_count)}" if kept != s.uniform_count else ""
        )
        out.append(
            Found(stream, None, None, "repeated_uniforms", s.uniform_count, res, detail=detail)
        )
    return out


def _seed_share(sketch: Sketch) -> float:
    try:
        return int(str(sketch.values[-1])[:16], 16) / 2.0**64
    except ValueError:
        return 1.0


def verdicts(found: list[Found], alpha: float) -> list[AuditTest]:
    """Holm's correction across the p-values of one stream, then a verdict for each test."""
    p_values = {id(f): f.result.p_value for f in found if f.result is not None}
    adjusted = dict(zip(p_values, _stats.holm(list(p_values.values())), strict=True))
    out = []
    for f in found:
        if f.count is not None:
            alarm = f.count > 0
            stat: float | None = float(f.count)
            p = p_adj = None
            df = None
        elif f.result is None:
            alarm, stat, p, p_adj, df = False, None, None, None, None
        else:
            p_adj = adjusted[id(f)]
            alarm = p_adj < alpha
            stat, p = _finite(f.result.statistic), f.result.p_value
            df = f.result.df if f.chisq else None
        verdict = (
            NOT_ENOUGH_DATA
            if (f.count is None and f.result is None)
            else (NOT_AS_DECLARED if alarm else AS_DECLARED)
        )
        out.append(
            AuditTest(
                f.stream,
                f.draw,
                f.kind,
                f.test,
                f.n,
                stat,
                p,
                p_adj,
                verdict,
                alarm,
                df,
                f.field,
                f.detail,
            )
        )
    return out


def _finite(x: float) -> float | None:
    return x if math.isfinite(x) else None


def group_figure(key: GroupKey, g: GroupState) -> AuditFigure:
    stream, kind, name = key
    cells = g.ratio
    return AuditFigure(
        stream=stream,
        draw=name,
        kind=kind,
        n=g.steps,
        pit_counts=tuple(int(x) for x in g.pit_hist),
        uniform_counts=tuple(int(x) for x in g.u_hist) if g.uniforms else (),
        options=tuple(cells.keys) if cells else (),
        observed=tuple(float(x) for x in cells.observed) if cells else (),
        expected=tuple(float(x) for x in cells.expected) if cells else (),
    )
