"""Stage 1 of an estimate: replay a piece and re-run every record under every policy."""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, TypeVar

import numpy as np
import pandas as pd

from drawledger._records import from_json
from drawledger._schema import DEC
from drawledger.exceptions import ReplayError
from drawledger.replay._keys import id_keys
from drawledger.replay.estimate._elsewhere import Logged
from drawledger.replay.estimate._estimators import ID_KEY
from drawledger.replay.estimate._policies import Policy, Records, Target, evaluate
from drawledger.replay.estimate._rewards import Rewards
from drawledger.replay.propensity import MONTE_CARLO, ONE_DRAW
from drawledger.replay.verify import BASE_COLUMNS, NOT_FAILING, Settings, verify_chunk

T = TypeVar("T")


FOLDS = 5


RIDGE = 1.0


MAX_STRING_LEVELS = 20  # a string input with more distinct values is not used as a feature


MAX_FEATURES = 200  # reward-model features kept (the most variable)


MAX_SEGMENTS = 1000  # distinct values of --by


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
    accept: frozenset[str] = frozenset()  # verification reasons the caller accepts


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
    rewarded: int = 0  # decisions of the stream with the reward (verified or not)
    filled: int = 0  # records used whose reward is the missing-reward value
    summed: int = 0  # records used whose reward is the sum of several outcomes
    one_draw: int = 0  # records used whose logging propensity is one-draw (not proven)
    failed: int = 0  # decisions that failed verification
    failed_reasons: Counter[str] = field(default_factory=Counter)  # theirs
    refused_n: int = 0  # of them, with a reason the caller did not accept
    refused: Counter[str] = field(default_factory=Counter)  # those reasons
    code_changed: int = 0  # decisions used although their code changed (accepted)
    versions: Counter[tuple[str, str]] = field(default_factory=Counter)  # used, by (fn, identity)


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


BUCKET = "no decision function (bucket assignment)"  # a reason records are excluded


def _empty(facts: Facts, k: int) -> PieceData:
    facts.methods = [Counter() for _ in range(k)]
    facts.dists = [True] * k
    facts.bounds = [0.0] * k
    none = np.zeros(0)
    return PieceData(facts, none, none, np.zeros(0, np.int64), np.zeros(0, np.uint64),
                     [none] * k, [none] * k, [None] * k, None, None, None)  # fmt: skip


CHANGED = frozenset({"code-changed", "version-not-found"})


def _failures(reasons: pd.Series, facts: Facts, accept: frozenset[str]) -> np.ndarray:
    """Count the decisions that failed verification by reason, and those with a reason the
    caller did not accept (declared draws are not failures: the audit tests them). Returns
    which of them are kept: with ``code-changed`` accepted, a decision whose only reason it is
    replayed every draw, value, probability and action as recorded, so it is used."""
    keep = np.zeros(len(reasons), dtype=bool)
    for i, text in enumerate(reasons.fillna("not verified")):
        found = set(str(text).split(";"))
        if found <= NOT_FAILING:
            continue
        if len(found) == 1 and found <= CHANGED and found <= accept:
            facts.code_changed += 1
            keep[i] = True
            continue
        facts.failed += 1
        facts.failed_reasons.update(found)
        refused = found - accept
        if refused:
            facts.refused_n += 1
            facts.refused.update(refused)
    return keep


def _usable(frame: pd.DataFrame, fns: dict[str, Any], rewards: Rewards,
            job: Job, facts: Facts) -> tuple[pd.DataFrame, np.ndarray, Counter[str]]:  # fmt: skip
    """The records an estimate uses, their rewards, and the others counted by reason."""
    excluded: Counter[str] = Counter()
    found, several = rewards.lookup(frame["decision_id"])
    facts.rewarded = int((~np.isnan(found)).sum())
    frame = frame.assign(_reward=found, _several=several)

    def drop(mask: np.ndarray, reason: str) -> None:
        nonlocal frame
        if mask.any():
            excluded[reason] += int(mask.sum())
            frame = frame[~mask]

    failed = ~frame["verified"].astype(bool).to_numpy()
    usable = ~failed
    usable[failed] = _failures(frame.loc[failed, "reason"], facts, job.accept)
    for reasons in frame.loc[~usable, "reason"].fillna("not verified"):
        excluded.update(str(reasons).split(";"))
    frame = frame[usable]
    drop(np.array([not fns[d] for d in frame["decision_id"]], dtype=bool),
         BUCKET)  # fmt: skip
    drop((frame["propensity_method"] == MONTE_CARLO).to_numpy(),
         "logging propensity only estimated by Monte Carlo")  # fmt: skip
    drop(~(pd.to_numeric(frame["propensity"], errors="coerce").to_numpy(dtype=float) > 0.0),
         "no positive replayed propensity")  # fmt: skip
    r = frame["_reward"].to_numpy(dtype=np.float64)
    if job.missing_reward is None:
        missing = np.isnan(r)
        drop(missing, f"no {job.reward} outcome")
        r = r[~missing]
    else:
        facts.filled = int(np.isnan(r).sum())
        r = np.where(np.isnan(r), job.missing_reward, r)
    facts.summed = int(frame["_several"].sum())
    facts.one_draw = int((frame["propensity_method"] == ONE_DRAW).sum())
    return frame.drop(columns=["_reward", "_several"]), r, excluded


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


def too_many_segments(by: str) -> ReplayError:
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
                   flagged: frozenset[str], job: Job, rewards: Rewards,
                   logged: Logged | None = None) -> PieceData:  # fmt: skip
    """Stage 1: replay the piece and re-run its usable records under every policy.

    ``logged``: the piece's records of other code versions, already replayed under their own
    version (``job.settings.elsewhere`` leaves them out here)."""
    k = len(job.policies)
    facts = Facts(rows=len(rows))
    rows = [r for r in rows if str(r[DEC.stream]) == job.stream]  # other streams are not replayed
    mine = flagged & {r[DEC.decision_id] for r in rows} if flagged else frozenset()
    checked = verify_chunk(rows, draws, mine, job.settings)
    if logged is not None:
        checked.add(logged.checked)
    if not checked.rows:
        return _empty(facts, k)
    frame = pd.concat(checked.rows, ignore_index=True)
    facts.total = len(frame)
    texts: dict[str, tuple[Any, Any, Any, Any]] = {}
    for row in rows:
        text = (row[DEC.fn], row[DEC.inputs], row[DEC.params], row[DEC.code_hash])
        texts.setdefault(row[DEC.decision_id], text)
    fns = {d: t[0] for d, t in texts.items()}
    frame, r, facts.excluded = _usable(frame, fns, rewards, job, facts)
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
    if logged is not None:
        recs.foreign = {i: logged.dists.get(d) for i, (d, c) in enumerate(zip(ids, chosen,
                        strict=True)) if (c[0], c[3]) in job.settings.elsewhere}  # fmt: skip
    path, allow = list(job.settings.path), list(job.settings.allow)
    targets = [Target(p, path, allow) for p in job.policies]
    logging, results = evaluate(recs, targets, path=path, allow=allow, seed=job.seed)
    n = len(ids)
    codes: dict[str, int] = {}
    for a in recs.actions:
        codes.setdefault(a, len(codes))
    same = list(zip(recs.inputs, recs.params, strict=True))
    dists = [None if res.dists is None else _Dists.of(res.dists, same, codes) for res in results]
    logged_dists = None if any(d is None for d in logging) else _Dists.of(logging, same, codes)
    facts.n, facts.functions = n, set(recs.fn)
    facts.versions = Counter((c[0], c[3]) for c in chosen)
    facts.reward_low, facts.reward_high = float(r.min()), float(r.max())
    facts.methods = [res.methods for res in results]
    facts.dists = [d is not None for d in dists]
    facts.bounds = [_ratio_bound(d, logged_dists, len(codes)) for d in dists]
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
            raise too_many_segments(job.by)
        label, facts.labels = codes_l.astype(np.int32), [str(v) for v in values]
    keys = id_keys(ids, ID_KEY)
    return PieceData(
        facts, recs.mu, r, np.array([codes[a] for a in recs.actions], dtype=np.int32), keys,
        [None if t.logging else res.p for t, res in zip(targets, results, strict=True)],
        [res.deficit if res.deficit.any() or np.isnan(res.deficit).any() else None
         for res in results], dists, x, x_index, label,
    )  # fmt: skip
