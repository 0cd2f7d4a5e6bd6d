"""Stages 2 and 3 of an estimate (reward model, sums), and a pass through all three."""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol, TypeVar

import numpy as np
import pandas as pd

from drawledger._text import counted
from drawledger.exceptions import ReplayError
from drawledger.replay.estimate import _estimators as est
from drawledger.replay.estimate._piece import (
    BUCKET,
    FOLDS,
    MAX_FEATURES,
    MAX_SEGMENTS,
    MAX_STRING_LEVELS,
    RIDGE,
    Facts,
    Job,
    PieceData,
    too_many_segments,
)
from drawledger.replay.estimate._refuse import Failures
from drawledger.replay.estimate._reward_model import RewardModel, RidgeStats, dr_terms

T = TypeVar("T")

# The largest reward magnitude estimated: squares of weighted rewards summed over records must
# stay within float64 (about 1.8e308). A bound of our own, with room for large weights.
MAX_REWARD = 1e100


@dataclass(frozen=True)
class Schema:
    """The reward model's inputs over all pieces: action codes and standardized features."""

    codes: dict[str, int]
    columns: tuple[str, ...]
    mean: np.ndarray
    scale: np.ndarray


def _schema(facts: Sequence[Facts]) -> Schema:
    """Every action; numeric features and one-hot strings of few levels, the most variable
    ``MAX_FEATURES``, with their mean and standard deviation over all records."""
    codes: dict[str, int] = {}
    n: dict[str, float] = {}
    mean: dict[str, float] = {}
    m2: dict[str, float] = {}
    total = 0
    for f in facts:
        for a in f.actions:
            codes.setdefault(a, len(codes))
        if not f.n:
            continue
        seen = dict(zip(f.features, zip(f.feature_mean, f.feature_m2, strict=True), strict=True))
        for c in list(mean) + [c for c in f.features if c not in mean]:  # Chan et al. (1979)
            b_mean, b_m2 = seen.get(c, (0.0, 0.0))
            a_n = n.get(c, total)  # a column new in this piece was 0 in the ones before
            a_mean, a_m2 = mean.get(c, 0.0), m2.get(c, 0.0)
            both = a_n + f.n
            delta = b_mean - a_mean
            mean[c] = a_mean + delta * f.n / both
            m2[c] = a_m2 + b_m2 + delta * delta * a_n * f.n / both
            n[c] = both
        total += f.n
    levels = Counter(c.split("=", 1)[0] for c in mean if "=" in c)
    keep = [c for c in mean if "=" not in c or levels[c.split("=", 1)[0]] <= MAX_STRING_LEVELS]
    var = np.array([m2[c] / total for c in keep]) if keep else np.zeros(0)
    if len(keep) > MAX_FEATURES:  # the most variable ones (standardized, they weigh alike)
        chosen = np.sort(np.argsort(-var, kind="stable")[:MAX_FEATURES])
        keep, var = [keep[i] for i in chosen], var[chosen]
    sd = np.sqrt(var)
    return Schema(codes, tuple(keep), np.array([mean[c] for c in keep]),
                  np.where(sd > 0.0, sd, 1.0))  # fmt: skip


def _features(data: PieceData, schema: Schema) -> np.ndarray:
    """The piece's standardized feature matrix on the schema's columns, a row per record."""
    if data.x is None or data.x_index is None:
        return np.zeros((data.facts.n, len(schema.columns)))
    table = pd.DataFrame(data.x, columns=data.facts.features)
    x = table.reindex(columns=list(schema.columns), fill_value=0.0).to_numpy(dtype=np.float64)
    return ((x - schema.mean) / schema.scale)[data.x_index]


def _codes(data: PieceData, schema: Schema) -> np.ndarray:
    return np.array([schema.codes[a] for a in data.facts.actions], dtype=np.int64)


def ridge_piece(data: PieceData, schema: Schema) -> RidgeStats:
    """Stage 2: the reward model's Gram matrices of the piece."""
    action = _codes(data, schema)[data.action] if data.facts.n else data.action
    return RidgeStats.of(_features(data, schema), action, data.r,
                             (data.keys % FOLDS).astype(np.int64), folds=FOLDS,
                             actions=len(schema.codes))  # fmt: skip


@dataclass(frozen=True)
class SumPlan:
    """What the last stage needs: the reward model and the estimate's settings."""

    schema: Schema | None
    model: RewardModel | None
    dr: tuple[bool, ...]  # per policy: doubly robust column computed
    cap: float
    reward_range: tuple[float, float]
    bootstrap: int  # resamples (0: none)
    seed: int
    weights: bool  # return the first policy's weights
    segments: bool


@dataclass
class Group:
    """Combinable sums of a group of records for a target paired with the baseline."""

    moments: est.Moments
    boot: np.ndarray | None  # (B, columns) Poisson bootstrap sums
    boot_n: np.ndarray | None  # (B,) Poisson bootstrap counts
    deficit: float  # sum of the target's known support deficits
    known: int
    zeros: int  # records of weight 0
    base_deficit: float  # the baseline's (0 for the logging policy)
    base_known: int

    @classmethod
    def of(cls, z: np.ndarray, deficit: np.ndarray, base_deficit: np.ndarray, keys: np.ndarray,
           plan: SumPlan) -> Group:  # fmt: skip
        known, base_known = ~np.isnan(deficit), ~np.isnan(base_deficit)
        boot, boot_n = (est.bootstrap_sums(z, keys, plan.bootstrap, plan.seed)
                        if plan.bootstrap else (None, None))  # fmt: skip
        return cls(est.Moments.of(z), boot, boot_n, float(deficit[known].sum()),
                   int(known.sum()), int((z[:, est.W] == 0.0).sum()),
                   float(base_deficit[base_known].sum()), int(base_known.sum()))  # fmt: skip

    @staticmethod
    def combine(groups: Sequence[Group]) -> Group:
        boot = boot_n = None
        if groups[0].boot is not None:
            boot = np.sum([g.boot for g in groups if g.boot is not None], axis=0)
            boot_n = np.sum([g.boot_n for g in groups if g.boot_n is not None], axis=0)
        return Group(est.Moments.combine(g.moments for g in groups), boot, boot_n,
                     float(sum(g.deficit for g in groups)), sum(g.known for g in groups),
                     sum(g.zeros for g in groups), float(sum(g.base_deficit for g in groups)),
                     sum(g.base_known for g in groups))  # fmt: skip


@dataclass
class Sums:
    """The last stage's result of a piece."""

    pairs: list[Group]  # per target
    segments: dict[str, Group]  # the first target's, by segment value
    weights: np.ndarray | None


def sum_piece(data: PieceData, plan: SumPlan) -> Sums:
    """Stage 3: the estimator columns of every policy, reduced to combinable sums."""
    n = data.facts.n
    width = 2 * est.WIDTH
    if not n:
        empty = Group.of(np.zeros((0, width)), np.zeros(0), np.zeros(0), data.keys, plan)
        return Sums([empty] * (len(data.p) - 1), {}, np.zeros(0) if plan.weights else None)
    q = code = None
    if plan.model is not None and plan.schema is not None:
        q = plan.model.predict(_features(data, plan.schema), (data.keys % FOLDS).astype(np.int64))
        code = _codes(data, plan.schema)
    cols = []
    for j, p in enumerate(data.p):
        w = np.ones(n) if p is None else p / data.mu
        dr, dists = None, data.dists[j]
        if plan.dr[j] and q is not None and code is not None and dists is not None:
            dense = dists.dense(q.shape[1], code)
            dr = dr_terms(q, dense, code[data.action], w, data.r, plan.reward_range)
        cols.append(est.policy_columns(w, data.r, cap=plan.cap, dr=dr))
    base = cols[-1]
    deficits = [np.zeros(n) if d is None else d for d in data.deficit]
    pairs = [Group.of(np.hstack([c, base]), deficits[j], deficits[-1], data.keys, plan)
             for j, c in enumerate(cols[:-1])]  # fmt: skip
    segments = {}
    if plan.segments and data.label is not None:
        z = np.hstack([cols[0], base])
        for i, value in enumerate(data.facts.labels):
            rows = data.label == i
            segments[value] = Group.of(z[rows], deficits[0][rows], deficits[-1][rows],
                                       data.keys[rows], plan)  # fmt: skip
    return Sums(pairs, segments, cols[0][:, est.W].copy() if plan.weights else None)


class Runner(Protocol):
    """Runs the stages over every piece and returns their results in piece order."""

    def first(self, job: Job) -> list[Facts]: ...

    def map(self, fn: Callable[[PieceData, Any], T], arg: Any) -> list[T]: ...


@dataclass
class Pass:
    """The estimate's statistics over all pieces."""

    total: int
    excluded: Counter[str]
    n: int
    functions: list[str]
    methods: list[Counter[str]]  # per policy
    reward_range: tuple[float, float]
    dr: list[bool]  # per policy
    bounds: list[float]  # per policy: the largest weight over every action (or observed)
    pairs: list[Group]  # per target
    segments: dict[str, Group]
    weights: np.ndarray | None
    failures: Failures
    integrity: dict[str, int]  # integrity problems the caller accepted
    versions: Counter[tuple[str, str]]  # records used, by (function, code identity)


def run_pass(runner: Runner, job: Job, *, cap: float, bootstrap: int, weights: bool,
             check: Callable[[Sequence[Facts]], Failures],
             integrity: dict[str, int]) -> Pass:  # fmt: skip
    """The three stages over every piece; ``check`` refuses what stage 1 found unusable;
    raises ``ReplayError`` when nothing can be used."""
    facts = runner.first(job)
    failures = check(facts)
    k = len(job.policies)
    excluded: Counter[str] = Counter()
    for f in facts:
        excluded.update(f.excluded)
    outside = sum(f.outside for f in facts)
    if outside and job.reward_range is not None:
        raise ReplayError(f"{outside} {job.reward!r} rewards lie outside reward_range "
                          f"{tuple(job.reward_range)}")  # fmt: skip
    used = [f for f in facts if f.n]
    if not used:
        raise ReplayError(f"no verified decisions with a {job.reward!r} reward to estimate from"
                          + _excluded_text(excluded))  # fmt: skip
    if job.by is not None and len({v for f in used for v in f.labels}) > MAX_SEGMENTS:
        raise too_many_segments(job.by)
    low = min(f.reward_low for f in used)
    high = max(f.reward_high for f in used)
    rr = job.reward_range or (min(0.0, low), max(0.0, high))
    largest = max(abs(rr[0]), abs(rr[1]))
    if largest > MAX_REWARD:
        where = "reward_range" if job.reward_range else f"the {job.reward!r} rewards"
        raise ReplayError(f"{where} reach {largest:g}: beyond {MAX_REWARD:g} the weighted "
                          "rewards and their squares overflow; rescale the rewards (in "
                          "thousands or millions)")  # fmt: skip
    dists = [all(f.dists[j] for f in used) for j in range(k)]
    schema = model = None
    if any(dists):
        schema = _schema(facts)
        model = _fit(runner.map(ridge_piece, schema))
    plan = SumPlan(schema, model, tuple(dists), cap, (float(rr[0]), float(rr[1])), bootstrap,
                   job.seed, weights, job.by is not None)  # fmt: skip
    sums = runner.map(sum_piece, plan)
    pairs = [Group.combine([s.pairs[j] for s in sums]) for j in range(k - 1)]
    segments: dict[str, list[Group]] = {}
    for s in sums:
        for value, g in s.segments.items():
            segments.setdefault(value, []).append(g)
    ratio = [[f.bounds[j] for f in used] for j in range(k)]
    observed = [float(p.moments.high[est.W]) for p in pairs] + [
        float(pairs[0].moments.high[est.WIDTH + est.W])
    ]
    bounds = [observed[j] if any(b is None for b in ratio[j])
              else max(observed[j], *(b for b in ratio[j] if b is not None))
              for j in range(k)]  # fmt: skip
    kept = [s.weights for s in sums if s.weights is not None]
    methods: list[Counter[str]] = [Counter() for _ in range(k)]
    for f in used:
        for j in range(k):
            methods[j].update(f.methods[j])
    return Pass(
        total=sum(f.total for f in facts), excluded=excluded, n=sum(f.n for f in used),
        functions=sorted({fn for f in used for fn in f.functions}), methods=methods,
        reward_range=plan.reward_range, dr=dists, bounds=bounds, pairs=pairs,
        segments={v: Group.combine(g) for v, g in segments.items()},
        weights=np.concatenate(kept) if weights else None, failures=failures,
        integrity=integrity, versions=sum((f.versions for f in used), Counter()),
    )  # fmt: skip


def _fit(stats: Sequence[RidgeStats]) -> RewardModel:
    total = stats[0]
    for s in stats[1:]:
        total = total + s
    return total.fit(RIDGE)


def _excluded_text(excluded: Mapping[str, int]) -> str:
    """Why records were left out, as readable text ("" when none were)."""
    if not excluded:
        return ""
    text = "; excluded: " + ", ".join(f"{counted(n, 'decision')} ({reason})"
                                      for reason, n in sorted(excluded.items()))  # fmt: skip
    if BUCKET in excluded:
        text += ("; a hashed bucket assignment has no decision function to re-run under "
                 "another policy")  # fmt: skip
    return text
