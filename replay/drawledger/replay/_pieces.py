"""The pass of an estimate over a ledger, piece by piece, in memory bounded by a piece.

A piece is one chunk of the ledger: the local engine's chunk or one Dask task, cut the same way
(``_verify.plan``; for Parquet ledgers only the chosen stream's partitions). Each piece goes
through three stages, all pure functions of the piece and small shared settings:

1. ``evaluate_piece`` replays the piece (``verify_chunk``), keeps the records an estimate can
   use (verified, of the stream, with a decision function, a positive exact propensity and a
   reward) and re-runs each under every policy (``_policies.evaluate``). It returns the piece's
   ``PieceData``: compact per-record arrays (weights' parts, rewards, distinct feature rows,
   action distributions) that stay where they were made (a temporary file of the local engine,
   a Dask worker's memory), with its ``Facts``: counts and column statistics sent to the client.
2. ``ridge_piece``: the reward model's sufficient statistics (``RidgeStats``) on the feature
   columns the client chose from every piece's facts (only when a doubly robust column exists).
3. ``sum_piece``: per policy, the ``Moments`` of the estimator columns, the Poisson bootstrap
   sums and the support deficit sums, overall and per segment; and the target's weights.

The client combines the results of each stage in piece order, so the local and the Dask engine
give the same numbers (up to floating-point rounding of the combine steps), and the client
holds only combined statistics and one weight per record.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import pickle
import tempfile
from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Protocol, TypeVar

import numpy as np
import pandas as pd
import sqlalchemy as sa

from drawledger._records import from_json
from drawledger.exceptions import LedgerError, ReplayError
from drawledger.replay import _estimators as est
from drawledger.replay._enumerate import MONTE_CARLO
from drawledger.replay._export import BASE_COLUMNS
from drawledger.replay._io import is_parquet, open_engine
from drawledger.replay._policies import Policy, Records, Target, evaluate
from drawledger.replay._verify import Settings, Task, verify_chunk

__all__ = [
    "Facts",
    "Job",
    "LocalRunner",
    "Pass",
    "PieceData",
    "Rewards",
    "Runner",
    "choose_stream",
    "evaluate_piece",
    "load",
    "local_runner",
    "read_rewards",
    "ridge_piece",
    "run_pass",
    "save",
    "sum_piece",
]

T = TypeVar("T")
FOLDS = 5
RIDGE = 1.0
MAX_STRING_LEVELS = 20  # a string input with more distinct values is not used as a feature
MAX_FEATURES = 200  # reward-model features kept (the most variable)
MAX_SEGMENTS = 1000  # distinct values of --by


# -- rewards ------------------------------------------------------------------------------------
def _digests(ids: Iterable[Any]) -> np.ndarray:
    """16-byte blake2b digests of decision ids, as sortable numpy bytes."""
    return np.array(
        [hashlib.blake2b(str(i).encode(), digest_size=16).digest() for i in ids], dtype="S16"
    )


_REWARD = np.dtype([("key", "S16"), ("value", np.float64)])


@dataclass(frozen=True)
class Rewards:
    """The total of one outcome per decision, looked up by a digest of the decision id."""

    table: np.ndarray  # (key, value) records sorted by key, keys distinct
    count: int  # outcome records of that name

    @classmethod
    def of(cls, parts: Iterable[tuple[np.ndarray, np.ndarray]], capacity: int) -> Rewards:
        """Digests and values, summed per decision; ``capacity`` bounds their number (pages
        of the table beyond what is filled are never touched, so never resident)."""
        table = np.empty(capacity, dtype=_REWARD)
        at = 0
        for keys, values in parts:
            table["key"][at : at + keys.size] = keys
            table["value"][at : at + keys.size] = values
            at += keys.size
        table = table[:at]
        table.sort(order="key")  # in place
        keys = table["key"]
        first = np.ones(at, dtype=bool)
        np.not_equal(keys[1:], keys[:-1], out=first[1:])
        if not first.all():  # several outcomes of that name for a decision: their sum
            starts = np.flatnonzero(first)
            summed = np.empty(starts.size, dtype=_REWARD)
            summed["key"] = keys[starts]
            summed["value"] = np.add.reduceat(table["value"], starts)
            table = summed
        return cls(table, at)

    def lookup(self, ids: Iterable[Any]) -> np.ndarray:
        """The total of each decision id (NaN: no such outcome)."""
        wanted = _digests(ids)
        keys = self.table["key"]
        out = np.full(wanted.size, np.nan)
        if keys.size and wanted.size:
            pos = np.minimum(np.searchsorted(keys, wanted), keys.size - 1)
            hit = keys[pos] == wanted
            out[hit] = self.table["value"][pos[hit]]
        return out


def _reward_part(path: str, reward: str) -> tuple[np.ndarray, np.ndarray]:
    """Digests of the decision ids and values of the ``reward`` outcomes of one Parquet part."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    from drawledger import _parquet

    columns = ["decision_id", "name", "value"]
    try:
        table = pq.read_table(path, columns=columns, schema=_parquet.SCHEMAS["outcomes"])
    except (OSError, pa.ArrowException) as exc:
        raise LedgerError(f"cannot read ledger part {path!r}: {exc}") from None
    table = table.filter(pc.equal(table.column("name"), reward))
    values = table.column("value").to_numpy(zero_copy_only=False).astype(np.float64)
    return _digests(table.column("decision_id").to_pylist()), values


def read_rewards(ledger: str, format: str | None, reward: str) -> Rewards:
    """The ``reward`` outcome of every decision of a ledger (24 bytes per decision)."""
    if is_parquet(ledger, format):
        import pyarrow.parquet as pq

        from drawledger import _parquet

        files = [os.fspath(p.path) for p in _parquet.parts(ledger, "outcomes")]
        capacity = sum(pq.read_metadata(f).num_rows for f in files)
        return Rewards.of((_reward_part(f, reward) for f in files), capacity)
    engine = open_engine(ledger)
    try:
        with engine.connect() as conn:
            capacity = conn.execute(sa.text("SELECT COUNT(*) FROM outcomes WHERE name = :n"),
                                    {"n": reward}).scalar_one()  # fmt: skip
            result = conn.execution_options(yield_per=100_000).execute(
                sa.text("SELECT decision_id, value FROM outcomes WHERE name = :n"), {"n": reward}
            )
            parts = ((_digests(r[0] for r in rows), np.array([r[1] for r in rows], dtype=float))
                     for rows in result.partitions())  # fmt: skip
            return Rewards.of(parts, int(capacity))
    finally:
        engine.dispose()


# -- streams and pieces -------------------------------------------------------------------------
def choose_stream(streams: Sequence[str], stream: str | None, ledger: str) -> str:
    """The stream an estimate uses: the one asked for, or the ledger's only one."""
    if not streams:
        raise ReplayError(f"ledger {ledger!r} has no decisions")
    if stream is not None:
        if stream not in streams:
            raise ReplayError(f"no decisions of stream {stream!r}; streams in the ledger: "
                              f"{', '.join(streams)}")  # fmt: skip
        return stream
    if len(streams) > 1:
        raise ReplayError(f"the ledger has several decision streams ({', '.join(streams)}); "
                          "choose one with --stream")  # fmt: skip
    return streams[0]


def sql_streams(ledger: str) -> list[str]:
    engine = open_engine(ledger)
    try:
        with engine.connect() as conn:
            found = conn.execute(sa.text("SELECT DISTINCT stream FROM decisions")).scalars()
            return sorted(str(s) for s in found if s is not None)
    finally:
        engine.dispose()


# -- stage 1: replay and evaluate a piece -------------------------------------------------------
@dataclass(frozen=True)
class Job:
    """What every piece needs besides its rows (picklable: sent with each task)."""

    policies: tuple[Policy, ...]  # the targets, then the baseline
    reward: str
    stream: str
    settings: Settings  # the verifier's (rows kept)
    seed: int
    missing_reward: float | None
    reward_range: tuple[float, float] | None
    by: str | None = None


@dataclass
class Facts:
    """What the client learns of a piece from its first stage (small)."""

    rows: int  # decisions read, every stream
    total: int = 0  # decisions of the stream
    excluded: Counter[str] = field(default_factory=Counter)
    outside: int = 0  # rewards outside the given range
    n: int = 0  # records used
    functions: set[str] = field(default_factory=set)
    actions: list[str] = field(default_factory=list)  # the piece's action codes index this
    reward_low: float = np.inf
    reward_high: float = -np.inf
    features: list[str] = field(default_factory=list)
    feature_mean: np.ndarray = field(default_factory=lambda: np.zeros(0))
    feature_m2: np.ndarray = field(default_factory=lambda: np.zeros(0))
    methods: list[Counter[str]] = field(default_factory=list)  # per policy
    dists: list[bool] = field(default_factory=list)  # per policy: full distributions known
    bounds: list[float | None] = field(default_factory=list)  # per policy: largest weight
    labels: list[str] = field(default_factory=list)  # segment values, codes index this


@dataclass
class _Dists:
    """Action distributions of the records: the distinct ones as (row, action code,
    probability) triples, and the row of each record (records with the same inputs and
    parameters usually share one)."""

    row: np.ndarray
    col: np.ndarray
    val: np.ndarray
    index: np.ndarray

    @classmethod
    def of(cls, dists: Sequence[dict[str, float] | None], same: Sequence[Any],
           codes: dict[str, int]) -> _Dists:  # fmt: skip
        """``same[i]`` names what record i's distribution depends on (a hint: equal dicts
        are checked, so the result is exact)."""
        rows: dict[Any, list[int]] = {}
        table: list[dict[str, float]] = []
        index = np.empty(len(dists), dtype=np.int32)
        for i, (d, hint) in enumerate(zip(dists, same, strict=True)):
            assert d is not None
            for j in rows.get(hint, ()):
                if table[j] == d:
                    index[i] = j
                    break
            else:
                rows.setdefault(hint, []).append(len(table))
                index[i] = len(table)
                table.append(d)
        sizes = [len(d) for d in table]
        col = [codes.setdefault(a, len(codes)) for d in table for a in d]
        val = [v for d in table for v in d.values()]
        row = np.repeat(np.arange(len(table), dtype=np.int32), sizes)
        return cls(row, np.array(col, dtype=np.int32), np.array(val, dtype=np.float64), index)

    def dense(self, width: int, code: np.ndarray | None = None) -> np.ndarray:
        """An (n, width) matrix of the records; ``code`` maps the piece's action codes."""
        out = np.zeros((int(self.row.max(initial=-1)) + 1, width))
        out[self.row, self.col if code is None else code[self.col]] = self.val
        return out[self.index]


@dataclass
class PieceData:
    """A piece's usable records after the first stage (stays where it was made)."""

    facts: Facts
    mu: np.ndarray
    r: np.ndarray
    action: np.ndarray  # codes into facts.actions
    keys: np.ndarray  # 64-bit hash of the decision id: cross-fitting fold and bootstrap counts
    p: list[np.ndarray | None]  # per policy: probability of the logged action (None: mu)
    deficit: list[np.ndarray | None]  # per policy (NaN: unknown; None: all 0)
    dists: list[_Dists | None]  # per policy
    x: np.ndarray | None  # distinct feature rows (columns facts.features)
    x_index: np.ndarray | None  # each record's row of x
    label: np.ndarray | None  # codes into facts.labels


def _empty(facts: Facts, k: int) -> PieceData:
    facts.methods = [Counter() for _ in range(k)]
    facts.dists = [True] * k
    facts.bounds = [0.0] * k
    none = np.zeros(0)
    return PieceData(facts, none, none, np.zeros(0, np.int64), np.zeros(0, np.uint64),
                     [none] * k, [none] * k, [None] * k, None, None, None)  # fmt: skip


def _usable(frame: pd.DataFrame, fns: dict[str, Any], rewards: Rewards,
            job: Job) -> tuple[pd.DataFrame, np.ndarray, Counter[str]]:  # fmt: skip
    """The records an estimate uses, their rewards, and the others counted by reason."""
    excluded: Counter[str] = Counter()

    def drop(mask: np.ndarray, reason: str) -> None:
        nonlocal frame
        if mask.any():
            excluded[reason] += int(mask.sum())
            frame = frame[~mask]

    verified = frame["verified"].astype(bool).to_numpy()
    for reasons in frame.loc[~verified, "reason"].fillna("not verified"):
        excluded.update(str(reasons).split(";"))
    frame = frame[verified]
    drop(np.array([not fns[d] for d in frame["decision_id"]], dtype=bool),
         "no decision function (bucket assignment)")  # fmt: skip
    drop((frame["propensity_method"] == MONTE_CARLO).to_numpy(),
         "logging propensity only estimated by Monte Carlo")  # fmt: skip
    drop(~(pd.to_numeric(frame["propensity"], errors="coerce").to_numpy(dtype=float) > 0.0),
         "no positive replayed propensity")  # fmt: skip
    r = rewards.lookup(frame["decision_id"])
    if job.missing_reward is None:
        missing = np.isnan(r)
        drop(missing, f"no {job.reward} outcome")
        r = r[~missing]
    else:
        r = np.where(np.isnan(r), job.missing_reward, r)
    return frame, r, excluded


def _flatten(obj: Any, prefix: str, out: dict[str, float]) -> None:
    kind = type(obj)
    if kind is float or kind is int or kind is bool:
        out[prefix] = float(obj)
    elif kind is str:
        out[f"{prefix}={obj}"] = 1.0
    elif kind is dict:
        for k, v in obj.items():
            _flatten(v, f"{prefix}.{k}" if prefix else str(k), out)
    elif kind is list:
        for i, v in enumerate(obj):
            _flatten(v, f"{prefix}.{i}", out)


def _feature_rows(inputs: Sequence[str]) -> tuple[pd.DataFrame, np.ndarray]:
    """Distinct inputs flattened to numbers (strings one-hot as ``path=value``), and the row
    of each record."""
    index, distinct = pd.factorize(pd.Series(inputs, dtype=object))
    flat = []
    for text in distinct:
        out: dict[str, float] = {}
        _flatten(from_json(text), "", out)
        flat.append(out)
    table = pd.DataFrame.from_records(flat, index=pd.RangeIndex(len(flat))).fillna(0.0)
    return table, index.astype(np.int32)


def _labels(by: str, frame: pd.DataFrame, inputs: Sequence[str]) -> list[str]:
    """The segment of each record: a column of the verifier's rows or a dotted inputs field."""
    if by in BASE_COLUMNS:
        return [str(x) for x in frame[by].tolist()]
    path = by.removeprefix("input.").split(".")
    labels = []
    for text in inputs:
        obj: Any = from_json(text)
        for part in path:
            if isinstance(obj, dict) and part in obj:
                obj = obj[part]
            else:
                raise ReplayError(
                    f"--by {by!r}: neither a column of the verified records nor a field of "
                    "the decision inputs (use dots: ctx.segment)"
                )
        if isinstance(obj, (dict, list)):
            raise ReplayError(
                f"--by {by!r} is not a single value (it holds a {type(obj).__name__})"
            )
        labels.append(str(obj))
    return labels


def _too_many(by: str) -> ReplayError:
    return ReplayError(f"--by {by!r} has more than {MAX_SEGMENTS} distinct values; segments "
                       "need a field with few values")  # fmt: skip


def _ratio_bound(target: _Dists | None, logging: _Dists | None, width: int) -> float | None:
    """The largest target / logging probability ratio over every action of every record."""
    if target is None or logging is None:
        return None
    t, lg = target.dense(width), logging.dense(width)
    ratio = np.divide(t, lg, out=np.zeros_like(t), where=lg > 0.0)
    return float(ratio.max()) if ratio.size else 0.0


def evaluate_piece(rows: Sequence[tuple[Any, ...]], draws: Iterable[tuple[Any, ...]],
                   flagged: frozenset[str], job: Job, rewards: Rewards) -> PieceData:  # fmt: skip
    """Stage 1: replay the piece and re-run its usable records under every policy."""
    k = len(job.policies)
    facts = Facts(rows=len(rows))
    rows = [r for r in rows if str(r[1]) == job.stream]  # other streams are not replayed
    mine = flagged & {r[0] for r in rows} if flagged else frozenset()
    checked = verify_chunk(rows, draws, mine, job.settings)
    if not checked.rows:
        return _empty(facts, k)
    frame = pd.concat(checked.rows, ignore_index=True)
    facts.total = len(frame)
    texts: dict[str, tuple[Any, Any, Any]] = {}
    for row in rows:
        texts.setdefault(row[0], (row[4], row[6], row[7]))
    frame, r, facts.excluded = _usable(frame, {d: t[0] for d, t in texts.items()}, rewards, job)
    if job.reward_range is not None:
        facts.outside = int(((r < job.reward_range[0]) | (r > job.reward_range[1])).sum())
    if frame.empty or facts.outside:
        return _empty(facts, k)
    ids = frame["decision_id"].astype(str).tolist()
    chosen = [texts[d] for d in ids]
    recs = Records(ids=ids, fn=[c[0] for c in chosen], inputs=[c[1] for c in chosen],
                   params=[c[2] for c in chosen], actions=frame["action"].astype(str).tolist(),
                   mu=frame["propensity"].to_numpy(dtype=float, copy=True), r=r,
                   methods=frame["propensity_method"].tolist())  # fmt: skip
    path, allow = list(job.settings.path), list(job.settings.allow)
    targets = [Target(p, path, allow) for p in job.policies]
    logging, results = evaluate(recs, targets, path=path, allow=allow, seed=job.seed)
    n = len(ids)
    codes: dict[str, int] = {}
    for a in recs.actions:
        codes.setdefault(a, len(codes))
    same = list(zip(recs.inputs, recs.params, strict=True))
    dists = [None if res.dists is None else _Dists.of(res.dists, same, codes) for res in results]
    logged = None if any(d is None for d in logging) else _Dists.of(logging, same, codes)
    facts.n, facts.functions = n, set(recs.fn)
    facts.reward_low, facts.reward_high = float(r.min()), float(r.max())
    facts.methods = [res.methods for res in results]
    facts.dists = [d is not None for d in dists]
    facts.bounds = [_ratio_bound(d, logged, len(codes)) for d in dists]
    facts.actions = list(codes)
    x = x_index = label = None
    if any(facts.dists):
        table, x_index = _feature_rows(recs.inputs)
        x = table.to_numpy(dtype=np.float64)
        count = np.bincount(x_index, minlength=x.shape[0]).astype(np.float64)
        facts.features = [str(c) for c in table.columns]
        facts.feature_mean = count @ x / n
        facts.feature_m2 = count @ (x - facts.feature_mean) ** 2
    if job.by is not None:
        codes_l, values = pd.factorize(pd.Series(_labels(job.by, frame, recs.inputs)))
        if len(values) > MAX_SEGMENTS:
            raise _too_many(job.by)
        label, facts.labels = codes_l.astype(np.int32), [str(v) for v in values]
    keys = pd.util.hash_pandas_object(pd.Series(ids), index=False).to_numpy()
    return PieceData(
        facts, recs.mu, r, np.array([codes[a] for a in recs.actions], dtype=np.int32), keys,
        [None if t.logging else res.p for t, res in zip(targets, results, strict=True)],
        [res.deficit if res.deficit.any() or np.isnan(res.deficit).any() else None
         for res in results], dists, x, x_index, label,
    )  # fmt: skip


# -- stage 2: the reward model ------------------------------------------------------------------
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


def ridge_piece(data: PieceData, schema: Schema) -> est.RidgeStats:
    """Stage 2: the reward model's Gram matrices of the piece."""
    action = _codes(data, schema)[data.action] if data.facts.n else data.action
    return est.RidgeStats.of(_features(data, schema), action, data.r,
                             (data.keys % FOLDS).astype(np.int64), folds=FOLDS,
                             actions=len(schema.codes))  # fmt: skip


# -- stage 3: sums of the estimator columns -----------------------------------------------------
@dataclass(frozen=True)
class SumPlan:
    """What the last stage needs: the reward model and the estimate's settings."""

    schema: Schema | None
    model: est.RewardModel | None
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
    deficit: float  # sum of the known support deficits
    known: int
    zeros: int  # records of weight 0

    @classmethod
    def of(cls, z: np.ndarray, deficit: np.ndarray, keys: np.ndarray, plan: SumPlan) -> Group:
        known = ~np.isnan(deficit)
        boot, boot_n = (est.bootstrap_sums(z, keys, plan.bootstrap, plan.seed)
                        if plan.bootstrap else (None, None))  # fmt: skip
        return cls(est.Moments.of(z), boot, boot_n, float(deficit[known].sum()),
                   int(known.sum()), int((z[:, est.W] == 0.0).sum()))  # fmt: skip

    @staticmethod
    def combine(groups: Sequence[Group]) -> Group:
        boot = boot_n = None
        if groups[0].boot is not None:
            boot = np.sum([g.boot for g in groups if g.boot is not None], axis=0)
            boot_n = np.sum([g.boot_n for g in groups if g.boot_n is not None], axis=0)
        return Group(est.Moments.combine(g.moments for g in groups), boot, boot_n,
                     float(sum(g.deficit for g in groups)), sum(g.known for g in groups),
                     sum(g.zeros for g in groups))  # fmt: skip


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
        empty = Group.of(np.zeros((0, width)), np.zeros(0), data.keys, plan)
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
            dr = est.dr_terms(q, dense, code[data.action], w, data.r, plan.reward_range)
        cols.append(est.policy_columns(w, data.r, cap=plan.cap, dr=dr))
    base = cols[-1]
    deficits = [np.zeros(n) if d is None else d for d in data.deficit]
    pairs = [Group.of(np.hstack([c, base]), deficits[j], data.keys, plan)
             for j, c in enumerate(cols[:-1])]  # fmt: skip
    segments = {}
    if plan.segments and data.label is not None:
        z = np.hstack([cols[0], base])
        for i, value in enumerate(data.facts.labels):
            rows = data.label == i
            segments[value] = Group.of(z[rows], deficits[0][rows], data.keys[rows], plan)
    return Sums(pairs, segments, cols[0][:, est.W].copy() if plan.weights else None)


# -- running the stages -------------------------------------------------------------------------
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


def run_pass(runner: Runner, job: Job, *, cap: float, bootstrap: int, weights: bool) -> Pass:
    """The three stages over every piece; raises ``ReplayError`` when nothing can be used."""
    facts = runner.first(job)
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
                          + (f" (excluded: {dict(excluded)})" if excluded else ""))  # fmt: skip
    if job.by is not None and len({v for f in used for v in f.labels}) > MAX_SEGMENTS:
        raise _too_many(job.by)
    low = min(f.reward_low for f in used)
    high = max(f.reward_high for f in used)
    rr = job.reward_range or (min(0.0, low), max(0.0, high))
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
        weights=np.concatenate(kept) if weights else None,
    )  # fmt: skip


def _fit(stats: Sequence[est.RidgeStats]) -> est.RewardModel:
    total = stats[0]
    for s in stats[1:]:
        total = total + s
    return total.fit(RIDGE)


# -- the local engine ---------------------------------------------------------------------------
_SHARED: dict[str, Any] = {}  # what every stage-1 task of a process pool shares


def _share(flagged: frozenset[str], rewards: Rewards) -> None:
    _SHARED.update(flagged=flagged, rewards=rewards)


def save(data: PieceData, where: str) -> None:
    with open(where, "wb") as f:
        pickle.dump(data, f, protocol=pickle.HIGHEST_PROTOCOL)


def load(where: str) -> PieceData:
    with open(where, "rb") as f:
        data: PieceData = pickle.load(f)  # a file this run wrote (``save``)
        return data


def _first(task: Task, job: Job, where: str) -> Facts:
    """Stage 1 of one local chunk; its data goes to the file ``where``, its facts back."""
    rows, draws = task.read()
    data = evaluate_piece(rows, draws, _SHARED["flagged"], job, _SHARED["rewards"])
    save(data, where)
    return data.facts


class LocalRunner:
    """The stages in this process (or stage 1 in ``jobs`` processes); each piece's data is kept
    in a temporary file between the stages, so memory stays bounded by a piece."""

    def __init__(self, tasks: Sequence[Task], flagged: frozenset[str], rewards: Rewards,
                 jobs: int, progress: bool, directory: str) -> None:  # fmt: skip
        self.tasks = tasks
        self.flagged = flagged
        self.rewards = rewards
        self.jobs = jobs
        self.progress = progress
        self.files = [os.path.join(directory, f"piece-{i}.pickle") for i in range(len(tasks))]

    def first(self, job: Job) -> list[Facts]:
        from drawledger.replay._verify import _progress_bar, _result, fork_context

        bar = _progress_bar(self.progress, sum(t.rows for t in self.tasks))
        facts: list[Facts] = []
        try:
            if self.jobs == 1:
                _share(self.flagged, self.rewards)
                results: Iterator[Facts] = (_first(t, job, f) for t, f in
                                            zip(self.tasks, self.files, strict=True))  # fmt: skip
                for found in results:
                    facts.append(found)
                    if bar is not None:
                        bar[0].advance(bar[1], found.rows)
            else:
                with ProcessPoolExecutor(
                    self.jobs, mp_context=fork_context(), initializer=_share,
                    initargs=(self.flagged, self.rewards),
                ) as pool:  # fmt: skip
                    futures = [pool.submit(_first, t, job, f)
                               for t, f in zip(self.tasks, self.files, strict=True)]  # fmt: skip
                    for fut in futures:
                        facts.append(_result(fut))
                        if bar is not None:
                            bar[0].advance(bar[1], facts[-1].rows)
        finally:
            _SHARED.clear()
            if bar is not None:
                bar[0].stop()
        return facts

    def map(self, fn: Callable[[PieceData, Any], T], arg: Any) -> list[T]:
        return [fn(load(where), arg) for where in self.files]


@contextlib.contextmanager
def local_runner(tasks: Sequence[Task], flagged: frozenset[str], rewards: Rewards, jobs: int,
                 progress: bool) -> Iterator[LocalRunner]:  # fmt: skip
    with tempfile.TemporaryDirectory(prefix="drawledger-estimate-") as directory:
        yield LocalRunner(tasks, flagged, rewards, jobs, progress, directory)
