"""Counterfactual estimates from verified records: what would another policy have achieved?

The pipeline (docs/estimators.md):

1. ``verify`` replays the ledger; only verified decisions are used, the others are counted by
   reason. Decisions without the reward outcome count as ``missing_reward`` (default 0).
2. One pass over the records re-runs each decision function: with its logged parameters (the
   logging policy's full action distribution, for the support deficit and the doubly robust
   estimator) and with every asked-for policy (the ``overrides`` of its policy parameters, or a
   callable ``module:function`` giving the probability of an action). Discrete actions get
   their exact distribution by enumeration; continuous ones a density ratio.
3. The per-record columns of ``_estimators`` (weights, weighted rewards, clipped weights, doubly
   robust terms) reduce to combinable moments; estimates, intervals and diagnostics follow.
"""

from __future__ import annotations

import contextlib
import hashlib
import math
import os
from collections import Counter
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import sqlalchemy as sa

from drawledger._records import from_json, to_json
from drawledger.draw import (
    Draw,
    DrawRecord,
    epsilon_greedy_probs,
    lognormal_pdf,
    normal_pdf,
    softmax_probs,
)
from drawledger.exceptions import DrawledgerError, ReplayError
from drawledger.ledger import Decision
from drawledger.replay import _estimators as est
from drawledger.replay._enumerate import (
    DEFAULT_BUDGET,
    DENSITY,
    MONTE_CARLO,
    action_distribution,
    from_run,
)
from drawledger.replay._imports import (
    _import,
    _lookup,
    immutable,
    load_inputs,
    load_params,
    resolve_decision,
)
from drawledger.replay._io import is_parquet, open_engine, read_tables
from drawledger.replay._verify import verify

if TYPE_CHECKING:
    from matplotlib.figure import Figure
    from rich.console import Console, ConsoleOptions, RenderResult

__all__ = ["EstimateReport", "SweepReport", "estimate", "sweep"]

INTERVALS = ("clt", "bootstrap", "bernstein")
ESTIMATORS = ("ips", "snips", "clipped", "dr")
DEFAULT_CAP = 10.0
DEFAULT_BOOTSTRAP = 1000
FOLDS = 5
RIDGE = 1.0
# Warn below these effective sample sizes (common practice, no published threshold).
MIN_ESS = 100.0
MIN_ESS_SHARE = 0.01
MAX_STRING_LEVELS = 20  # a string input with more distinct values is not used as a feature
MAX_FEATURES = 200  # reward-model features kept (the most variable)

Policy = Mapping[str, Any] | str | None


# -- options ---------------------------------------------------------------------------------
def _check_options(
    reward: str, interval: str, bootstrap: int, clip: float | None, level: float,
    engine: str, scheduler: str | None, reward_range: tuple[float, float] | None,
) -> tuple[float, int]:  # fmt: skip
    if not isinstance(reward, str) or not reward:
        raise ReplayError("reward must name an outcome, for example 'checkout'")
    if engine not in ("local", "dask"):
        raise ReplayError(f"unknown engine {engine!r}; use 'local' or 'dask'")
    if scheduler is not None and engine != "dask":
        raise ReplayError("--scheduler needs --engine dask")
    if interval not in INTERVALS:
        raise ReplayError(f"unknown interval {interval!r}; use one of {', '.join(INTERVALS)}")
    if isinstance(bootstrap, bool) or not isinstance(bootstrap, int) or bootstrap < 0:
        raise ReplayError(f"bootstrap must be a number of resamples >= 0, got {bootstrap!r}")
    if bootstrap and interval != "bootstrap":
        raise ReplayError(f"bootstrap={bootstrap} resamples given but the interval is "
                          f"{interval!r}; ask for interval='bootstrap'")  # fmt: skip
    cap = DEFAULT_CAP if clip is None else clip
    if isinstance(cap, bool) or not isinstance(cap, (int, float)) or not cap > 0.0 \
            or not math.isfinite(cap):  # fmt: skip
        raise ReplayError(f"the clipping cap must be a finite number > 0, got {clip!r}")
    if not isinstance(level, float) or not 0.0 < level < 1.0:
        raise ReplayError(f"the confidence level must lie in (0, 1), got {level!r}")
    if reward_range is not None:
        lo, hi = reward_range
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise ReplayError(
                f"reward_range must be (low, high) with low < high, got {reward_range!r}"
            )
    b = (bootstrap or DEFAULT_BOOTSTRAP) if interval == "bootstrap" else 0
    return float(cap), b


def _describe(policy: Policy) -> dict[str, Any]:
    if policy is None:
        return {"policy": "logging"}
    if isinstance(policy, str):
        return {"callable": policy}
    return {"overrides": dict(policy)}


# -- reading the verified records -------------------------------------------------------------
@dataclass
class _Records:
    """The verified decisions an estimate uses, with what was excluded and why."""

    rows: pd.DataFrame  # verify's rows of the used decisions, in order
    fn: list[str]
    inputs: list[str]
    params: list[str]
    actions: list[str]
    mu: np.ndarray
    r: np.ndarray
    excluded: dict[str, int]
    total: int
    stream: str


def _decision_texts(ledger: str, format: str | None) -> pd.DataFrame:
    """decision_id, fn, inputs, params of every decision (only the columns needed)."""
    if is_parquet(ledger, format):
        return read_tables(ledger, format="parquet").decisions[
            ["decision_id", "fn", "inputs", "params"]
        ]
    engine = open_engine(ledger)
    try:
        with engine.connect() as conn:
            return pd.read_sql_query(
                sa.text("SELECT decision_id, fn, inputs, params FROM decisions"), conn
            )
    finally:
        engine.dispose()


def _verified_rows(
    ledger: str, path: Sequence[str], allow: Sequence[str], format: str | None, progress: bool,
    jobs: int, integrity_key: bytes | str | None,
) -> pd.DataFrame:  # fmt: skip
    return verify(ledger, path=path, allow=allow, format=format, progress=progress, jobs=jobs,
                  integrity_key=integrity_key).rows  # fmt: skip


def _load_records(
    ledger: str, *, reward: str, stream: str | None, path: Sequence[str], allow: Sequence[str],
    format: str | None, progress: bool, missing_reward: float | None,
    reward_range: tuple[float, float] | None, jobs: int, integrity_key: bytes | str | None,
) -> _Records:  # fmt: skip
    rows = _verified_rows(ledger, path, allow, format, progress, jobs, integrity_key)
    if rows.empty:
        raise ReplayError(f"ledger {ledger!r} has no decisions")
    streams = sorted(rows["stream"].dropna().unique())
    if stream is not None:
        if stream not in streams:
            raise ReplayError(f"no decisions of stream {stream!r}; streams in the ledger: "
                              f"{', '.join(streams) or 'none'}")  # fmt: skip
        rows = rows[rows["stream"] == stream]
    elif len(streams) > 1:
        raise ReplayError(f"the ledger has several decision streams ({', '.join(streams)}); "
                          "choose one with --stream")  # fmt: skip
    else:
        stream = streams[0]
    if reward not in rows.columns:
        raise ReplayError(f"no outcome named {reward!r} in the ledger")
    total = len(rows)
    excluded: Counter[str] = Counter()

    def drop(mask: np.ndarray, reason: str) -> None:
        nonlocal rows
        if mask.any():
            excluded[reason] += int(mask.sum())
            rows = rows[~mask]

    verified = rows["verified"].astype(bool).to_numpy()
    for reasons in rows.loc[~verified, "reason"].fillna("not verified"):
        excluded.update(str(reasons).split(";"))
    rows = rows[verified]
    texts = _decision_texts(ledger, format).drop_duplicates("decision_id").set_index("decision_id")
    drop(texts["fn"].reindex(rows["decision_id"]).isna().to_numpy(),
         "no decision function (bucket assignment)")  # fmt: skip
    drop((rows["propensity_method"] == MONTE_CARLO).to_numpy(),
         "logging propensity only estimated by Monte Carlo")  # fmt: skip
    drop(~(pd.to_numeric(rows["propensity"], errors="coerce").to_numpy(dtype=float) > 0.0),
         "no positive replayed propensity")  # fmt: skip
    outcome = pd.to_numeric(rows[reward], errors="coerce")
    if missing_reward is None:
        drop(outcome.isna().to_numpy(), f"no {reward} outcome")
        outcome = pd.to_numeric(rows[reward], errors="coerce")
    else:
        outcome = outcome.fillna(missing_reward)
    if rows.empty:
        raise ReplayError(f"no verified decisions with a {reward!r} reward to estimate from"
                          + (f" (excluded: {dict(excluded)})" if excluded else ""))  # fmt: skip
    r = outcome.to_numpy(dtype=float)
    if reward_range is not None:
        outside = (r < reward_range[0]) | (r > reward_range[1])
        if outside.any():
            raise ReplayError(f"{int(outside.sum())} {reward!r} rewards lie outside "
                              f"reward_range {tuple(reward_range)}")  # fmt: skip
    joined = texts.reindex(rows["decision_id"])
    return _Records(
        rows=rows.reset_index(drop=True), fn=joined["fn"].tolist(),
        inputs=joined["inputs"].tolist(), params=joined["params"].tolist(),
        actions=rows["action"].astype(str).tolist(),
        mu=rows["propensity"].to_numpy(dtype=float), r=r, excluded=dict(excluded),
        total=total, stream=str(stream),
    )  # fmt: skip


# -- policies and one pass over the records ---------------------------------------------------
class _Target:
    """A policy to evaluate: the logging policy, changed parameters, or a callable."""

    def __init__(self, spec: Policy, path: Sequence[str], allow: Sequence[str]) -> None:
        self.spec = spec
        self.logging = spec is None
        self.fn: Callable[[Mapping[str, Any], Any], float] | None = None
        self.overrides: dict[str, Any] = {}
        self._checked: dict[str, dict[str, Any]] = {}
        if isinstance(spec, str):
            self.fn = _load_callable(spec, path, allow)
        elif spec is not None:
            if not isinstance(spec, Mapping):
                raise ReplayError("a policy is None (logging), a mapping of parameter "
                                  "overrides or a 'module:function' callable")  # fmt: skip
            self.overrides = dict(spec)

    def params(self, decision: Decision[Any]) -> dict[str, Any]:
        """The overrides, checked and typed for one decision function."""
        hit = self._checked.get(decision.name)
        if hit is None:
            unknown = sorted(set(self.overrides) - set(decision.params))
            if unknown:
                known = ", ".join(sorted(decision.params)) or "none"
                raise ReplayError(f"{', '.join(unknown)} is not a policy parameter of "
                                  f"{decision.name} (its parameters: {known})")  # fmt: skip
            hit = load_params(decision, self.overrides)
            self._checked[decision.name] = hit
        return hit

    def probability(self, inputs: Mapping[str, Any], action_json: str, where: str) -> float:
        assert self.fn is not None
        try:
            p = self.fn(inputs, from_json(action_json))
        except Exception as exc:
            raise ReplayError(f"target {self.spec} raised {type(exc).__name__} on {where}: "
                              f"{exc}") from None  # fmt: skip
        if isinstance(p, bool) or not isinstance(p, (int, float)) or not math.isfinite(p) \
                or p < 0.0:  # fmt: skip
            raise ReplayError(f"target {self.spec} returned {p!r} on {where}; it must return "
                              "a probability (or density) >= 0")  # fmt: skip
        return float(p)


def _load_callable(spec: str, path: Sequence[str], allow: Sequence[str]) -> Any:
    """``module:function`` under the same import rules as decision code (--path / --allow)."""
    import sys

    if spec.count(":") != 1:
        raise ReplayError(f"target {spec!r} is not 'module:function'")
    module_name, qualname = spec.split(":")
    module = sys.modules.get(module_name)
    if module is None:
        module = _import(module_name, path, allow)
    fn = _lookup(module, qualname)
    if fn is None or not callable(fn):
        raise ReplayError(f"target {spec!r}: module {module_name!r} has no function {qualname!r}")
    return fn


_OPTION_KINDS = ("categorical", "softmax", "epsilon_greedy")


_TEXT_KEYS: dict[str, str] = {}


def _key(value: Any) -> str:
    """Canonical action JSON; text options (the common case) are cached."""
    if type(value) is str:
        key = _TEXT_KEYS.get(value)
        if key is None:
            key = to_json(value, "action")
            if len(_TEXT_KEYS) < 100_000:
                _TEXT_KEYS[value] = key
        return key
    return to_json(value, "action")


def _single_draw_distribution(rec: DrawRecord) -> dict[str, float] | None:
    a = rec.args
    if rec.kind in _OPTION_KINDS:
        if rec.kind == "categorical":
            probs = a["probs"]
        elif rec.kind == "softmax":
            probs = softmax_probs(a["scores"], a["temperature"])
        else:
            probs = epsilon_greedy_probs(a["scores"], a["epsilon"])
        dist: dict[str, float] = {}
        for option, p in zip(a["options"], probs, strict=True):
            key = _key(option)
            dist[key] = dist.get(key, 0.0) + p
        return dist
    if rec.kind == "bernoulli":
        return {"true": a["p"], "false": 1.0 - a["p"]}
    return None


def _density_of(rec: DrawRecord, x: Any) -> float:
    """Density of a continuous draw, by its recorded arguments, at the value x."""
    a = rec.args
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return 0.0
    if rec.kind == "uniform":
        return 1.0 / (a["high"] - a["low"]) if a["low"] <= x <= a["high"] else 0.0
    if rec.kind == "normal":
        return normal_pdf(x, a["mean"], a["sd"])
    if rec.kind == "lognormal":
        return lognormal_pdf(x, a["mu"], a["sigma"])
    raise ReplayError(f"no density for a {rec.kind} draw")


@dataclass
class _Run:
    records: list[DrawRecord]
    returned: str
    dist: dict[str, float] | None
    single: bool = False  # one draw, whose value the decision returned

    @property
    def density(self) -> DrawRecord | None:
        """The one continuous draw whose value is the action, if that is how the run went."""
        return self.records[0] if self.single and self.records[0].is_density else None


def _run(decision: Decision[Any], inputs: Mapping[str, Any], params: Mapping[str, Any],
         seed: bytes, budget: int, where: str) -> _Run:  # fmt: skip
    """Run the decision once (seeded) and get its exact action distribution when it has one."""
    draw = Draw(seed)
    try:
        action = decision.run(draw, inputs, params)
        returned = _key(action)
        recs = draw.records
        if not recs:
            return _Run(recs, returned, {returned: 1.0})
        single = len(recs) == 1 and (recs[0].value is action or _key(recs[0].value) == returned)
        if single and recs[0].is_density:  # nothing discrete before it: no list of actions
            return _Run(recs, returned, None, True)
        if single:
            dist = _single_draw_distribution(recs[0])
            if dist is not None:
                return _Run(recs, returned, dist, True)
        dist = action_distribution(decision, inputs, params, budget=budget)
        return _Run(recs, returned, dist, single)
    except DrawledgerError as exc:
        raise ReplayError(f"{where}: {exc}") from None
    except Exception as exc:
        raise ReplayError(f"{where}: {decision.name} raised {type(exc).__name__}: {exc}") from None


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


def _features(inputs_json: Sequence[str]) -> np.ndarray:
    """Flattened inputs as numbers: numbers and booleans as is, strings one-hot (few levels).

    At most ``MAX_FEATURES`` columns, the most variable ones.
    """
    seen: dict[str, dict[str, float]] = {}
    flat = []
    for text in inputs_json:
        out = seen.get(text)
        if out is None:
            out = {}
            _flatten(from_json(text), "", out)
            if len(seen) < 100_000:
                seen[text] = out
        flat.append(out)
    frame = pd.DataFrame.from_records(flat).fillna(0.0)
    levels = Counter(c.split("=", 1)[0] for c in frame.columns if "=" in c)
    keep = [
        c for c in frame.columns if "=" not in c or levels[c.split("=", 1)[0]] <= MAX_STRING_LEVELS
    ]
    if not keep:
        return np.zeros((len(flat), 0))
    x = frame[keep].to_numpy(dtype=float)
    if x.shape[1] > MAX_FEATURES:  # the most variable ones (standardized, they weigh alike)
        x = x[:, np.sort(np.argsort(-x.var(axis=0), kind="stable")[:MAX_FEATURES])]
    return x


@dataclass
class _Evaluated:
    """Per-record results of one policy over the records."""

    p: np.ndarray  # probability (density) of the logged action under the policy
    deficit: np.ndarray  # target mass the logging policy could not take (NaN: unknown)
    dists: list[dict[str, float]] | None  # full action distributions (None: not available)
    methods: Counter[str] = field(default_factory=Counter)


def _record_seed(decision_id: str, seed: int) -> bytes:
    return hashlib.blake2b(decision_id.encode(), digest_size=16,
                           key=seed.to_bytes(8, "little", signed=True)).digest()  # fmt: skip


def _evaluate(
    recs: _Records, targets: Sequence[_Target], *, path: Sequence[str], allow: Sequence[str],
    seed: int, progress: bool, budget: int = DEFAULT_BUDGET,
) -> tuple[list[dict[str, float] | None], list[_Evaluated]]:  # fmt: skip
    """Logging distributions and every target's per-record results, in one pass."""
    n = len(recs.actions)
    out = [_Evaluated(np.empty(n), np.zeros(n), [] if not t.logging else None) for t in targets]
    logging_dists: list[dict[str, float] | None] = []
    decisions: dict[str, Decision[Any]] = {}
    ids = recs.rows["decision_id"].astype(str).tolist()
    columns = recs.rows.columns
    logged_methods = (recs.rows["propensity_method"].tolist() if "propensity_method" in columns
                      else [None] * n)  # fmt: skip
    params: dict[tuple[str, str], dict[str, Any]] = {}
    with _progress(progress, n) as advance:
        for i in range(n):
            did, action = ids[i], recs.actions[i]
            where = f"decision {did}"
            dec = decisions.get(recs.fn[i])
            if dec is None:
                dec = resolve_decision(recs.fn[i], path=path, allow=allow)
                decisions[recs.fn[i]] = dec
            inputs = load_inputs(dec, recs.inputs[i])
            logged = params.get((dec.name, recs.params[i]))
            if logged is None:
                logged = load_params(dec, recs.params[i])
                if immutable(logged) and len(params) < 1024:
                    params[(dec.name, recs.params[i])] = logged
            rseed = _record_seed(did, seed)
            by_density = logged_methods[i] == DENSITY
            lrun = _run(dec, inputs, logged, rseed, budget, where)
            logging_dists.append(lrun.dist)
            for t, res in zip(targets, out, strict=True):
                if t.logging:
                    res.p[i] = recs.mu[i]
                    res.methods["logged"] += 1
                elif t.fn is not None:
                    _evaluate_callable(t, res, i, inputs, action, lrun, where)
                else:
                    changed = {**logged, **t.params(dec)}
                    trun = _run(dec, inputs, changed, rseed, budget, f"{where} under the target")
                    _evaluate_params(dec, inputs, logged, changed, action, lrun, trun, res, i,
                                     seed, by_density)  # fmt: skip
            if i % 1000 == 999:
                advance(1000)
    for t, res in zip(targets, out, strict=True):
        if t.logging:
            if all(d is not None for d in logging_dists):
                res.dists = [d for d in logging_dists if d is not None]
        elif res.dists is not None and len(res.dists) != n:
            res.dists = None
    return logging_dists, out


def _evaluate_callable(t: _Target, res: _Evaluated, i: int, inputs: Mapping[str, Any],
                       action: str, lrun: _Run, where: str) -> None:  # fmt: skip
    res.p[i] = t.probability(inputs, action, where)
    res.methods["callable"] += 1
    if lrun.dist is None:
        res.deficit[i] = math.nan
        res.dists = None
        return
    dist = {a: t.probability(inputs, a, where) for a, q in lrun.dist.items() if q > 0.0}
    res.deficit[i] = max(0.0, 1.0 - math.fsum(dist.values()))
    if res.dists is not None:
        res.dists.append(dist)


def _evaluate_params(
    dec: Decision[Any], inputs: Mapping[str, Any], logged: Mapping[str, Any],
    params: Mapping[str, Any], action: str, lrun: _Run, trun: _Run, res: _Evaluated, i: int,
    seed: int, by_density: bool,
) -> None:  # fmt: skip
    """Target probability, distribution and support deficit of record i.

    ``by_density``: the verifier found the logged action's density as that of the one
    continuous draw returning it; when both runs here went the same way, the densities come
    straight from the draws' arguments.
    """
    if trun.dist is not None:
        res.p[i] = trun.dist.get(action, 0.0)
        res.methods["enumerated"] += 1
        if res.dists is not None:
            res.dists.append(trun.dist)
        if lrun.dist is not None:
            res.deficit[i] = math.fsum(
                q for a, q in trun.dist.items() if not lrun.dist.get(a, 0.0) > 0.0
            )
            return
    else:
        res.dists = None
        t_rec, l_rec = trun.density, lrun.density
        if by_density and t_rec is not None and l_rec is not None:
            res.p[i] = _density_of(t_rec, from_json(action))
            res.methods[DENSITY] += 1
            # trun's draw is a sample of the target: is it outside the logging support?
            res.deficit[i] = float(not _density_of(l_rec, t_rec.value) > 0.0)
            return
        prop = from_run(dec, inputs, params, action, trun.records, trun.returned, seed=seed)
        res.p[i] = prop.value
        res.methods[prop.method] += 1
    # Support by sampling: trun.returned is a draw from the target (a seeded run); the record
    # counts as deficit when the logging policy gives that action probability (density) 0.
    back = from_run(dec, inputs, logged, trun.returned, lrun.records, lrun.returned, seed=seed)
    res.deficit[i] = math.nan if back.method == MONTE_CARLO else float(not back.value > 0.0)


@contextlib.contextmanager
def _progress(enabled: bool, total: int) -> Iterator[Callable[[int], None]]:
    """A progress bar on stderr (when enabled); yields the function that advances it."""
    if not enabled:
        yield lambda k: None
        return
    from rich.console import Console
    from rich.progress import Progress

    bar = Progress(console=Console(stderr=True), transient=True)
    task = bar.add_task("target propensities", total=total)
    bar.start()
    try:
        yield lambda k: bar.advance(task, k)
    finally:
        bar.stop()


# -- from per-record results to columns -------------------------------------------------------
@dataclass
class _Columns:
    """The per-record matrix of the target (and baseline) columns, with what produced it."""

    z: np.ndarray
    weights: np.ndarray
    deficit: np.ndarray
    has_dr: bool
    weight_bound: float
    baseline_bound: float
    methods: Counter[str]
    dr_note: str | None


@dataclass
class _Sparse:
    """Action distributions of every record: (record, action code, probability) triples."""

    row: np.ndarray
    col: np.ndarray
    val: np.ndarray

    @classmethod
    def of(cls, dists: Sequence[Mapping[str, float] | None], codes: dict[str, int]) -> _Sparse:
        sizes: list[int] = []
        col: list[int] = []
        val: list[float] = []
        for d in dists:
            assert d is not None
            sizes.append(len(d))
            col.extend([codes.setdefault(a, len(codes)) for a in d])
            val.extend(d.values())
        row = np.repeat(np.arange(len(sizes), dtype=np.int64), sizes)
        return cls(row, np.array(col, dtype=np.int64), np.array(val, dtype=float))

    def dense(self, start: int, stop: int, width: int) -> np.ndarray:
        """Rows start:stop as an (stop - start, width) matrix."""
        lo, hi = np.searchsorted(self.row, [start, stop])
        out = np.zeros((stop - start, width))
        out[self.row[lo:hi] - start, self.col[lo:hi]] = self.val[lo:hi]
        return out


CHUNK = 50_000


class _RewardModel:
    """The cross-fitted ridge reward model of the doubly robust estimator, fitted once."""

    def __init__(self, recs: _Records, codes: dict[str, int], reward_range: tuple[float, float]):
        x = _features(recs.inputs)
        self.x = (x - x.mean(axis=0)) / _scale(x)
        ids = recs.rows["decision_id"].astype(str)
        self.fold = (pd.util.hash_pandas_object(ids, index=False).to_numpy() % FOLDS).astype(int)
        self.action = np.array([codes[a] for a in recs.actions], dtype=np.int64)
        self.width = len(codes)
        self.range = reward_range
        stats = est.RidgeStats.of(self.x, self.action, recs.r, self.fold, folds=FOLDS,
                                  actions=self.width)  # fmt: skip
        self.model = stats.fit(RIDGE)

    def terms(self, dists: _Sparse, w: np.ndarray, r: np.ndarray) -> np.ndarray:
        out = np.empty(w.size)
        for s in range(0, w.size, CHUNK):
            e = min(s + CHUNK, w.size)
            q_hat = self.model.predict(self.x[s:e], self.fold[s:e])
            out[s:e] = est.dr_terms(q_hat, dists.dense(s, e, self.width), self.action[s:e],
                                    w[s:e], r[s:e], self.range)  # fmt: skip
        return out


def _scale(x: np.ndarray) -> np.ndarray:
    sd = x.std(axis=0)
    return np.where(sd > 0.0, sd, 1.0)


def _weight_bound(target: _Sparse | None, logging: _Sparse | None, n: int, width: int,
                  observed: float) -> float:  # fmt: skip
    """The largest weight over every action of every record, when distributions are known."""
    if target is None or logging is None:
        return observed
    bound = observed
    for s in range(0, n, CHUNK):
        e = min(s + CHUNK, n)
        t, lg = target.dense(s, e, width), logging.dense(s, e, width)
        ratio = np.divide(t, lg, out=np.zeros_like(t), where=lg > 0.0)
        bound = max(bound, float(ratio.max()))
    return bound


def _build_columns(
    recs: _Records, logging: list[dict[str, float] | None], results: list[_Evaluated],
    cap: float, rr: tuple[float, float], bounds: bool,
) -> list[_Columns]:  # fmt: skip
    """Columns of each result in ``results[:-1]`` paired with the baseline ``results[-1]``.

    ``bounds``: compute the largest possible weights (for the Bernstein interval).
    """
    codes: dict[str, int] = {}
    for a in recs.actions:
        codes.setdefault(a, len(codes))
    sparse = [None if r.dists is None else _Sparse.of(r.dists, codes) for r in results]
    logged = None if any(d is None for d in logging) else _Sparse.of(logging, codes)
    model = _RewardModel(recs, codes, rr) if any(sp is not None for sp in sparse) else None
    blocks: list[tuple[np.ndarray, float, str | None]] = []
    for res, sp in zip(results, sparse, strict=True):
        w = res.p / recs.mu
        dr, note = None, None
        if model is not None and sp is not None:
            dr = model.terms(sp, w, recs.r)
        else:
            note = ("dr needs the policy's full action distribution (continuous actions, or "
                    "more branches than the enumeration budget)")  # fmt: skip
        observed = float(w.max())
        bound = _weight_bound(sp, logged, w.size, len(codes), observed) if bounds else observed
        blocks.append((est.policy_columns(w, recs.r, cap=cap, dr=dr), bound, note))
    base_z, base_bound, base_note = blocks[-1]
    out = []
    for res, (z, bound, note) in zip(results, blocks[:-1], strict=False):
        out.append(_Columns(
            z=np.hstack([z, base_z]), weights=z[:, est.W].copy(), deficit=res.deficit,
            has_dr=note is None and base_note is None, weight_bound=bound,
            baseline_bound=base_bound, methods=res.methods, dr_note=note or base_note,
        ))  # fmt: skip
    return out


# -- summaries ----------------------------------------------------------------------------------
@dataclass
class _Settings:
    cap: float
    interval: str
    level: float
    bootstrap: int
    seed: int
    reward_range: tuple[float, float]

    def to_dict(self) -> dict[str, Any]:
        return {"clip": self.cap, "interval": self.interval, "level": self.level,
                "bootstrap": self.bootstrap, "seed": self.seed,
                "reward_range": list(self.reward_range)}  # fmt: skip


def _mean_or_none(x: np.ndarray) -> float | None:
    known = x[~np.isnan(x)]
    return float(known.mean()) if known.size else None


def _summary(cols: _Columns, rows: np.ndarray | None, s: _Settings) -> dict[str, Any]:
    """Estimates, baseline values, paired differences and diagnostics of a set of records."""
    z = cols.z if rows is None else cols.z[rows]
    m = est.Moments.of(z)
    names = [n for n in ESTIMATORS if n != "dr" or cols.has_dr]
    boot = est.bootstrap_means(z, s.bootstrap, s.seed) if s.interval == "bootstrap" else None
    spans = np.concatenate([
        est.column_spans(cols.weight_bound, s.cap, s.reward_range),
        est.column_spans(cols.baseline_bound, s.cap, s.reward_range),
    ])  # fmt: skip
    common = {"reward_range": s.reward_range, "level": s.level, "interval": s.interval,
              "boot": boot, "spans": spans, "names": names}  # fmt: skip
    deficit = cols.deficit if rows is None else cols.deficit[rows]
    weights = cols.weights if rows is None else cols.weights[rows]
    return {
        "n": int(m.n),
        "estimates": est.summarize(m, offset=0, **common),
        "baseline": est.summarize(m, offset=est.WIDTH, **common),
        "difference": est.summarize(m, offset=0, baseline=est.WIDTH, **common),
        "diagnostics": {
            "ess": est.kish_ess(m, est.W),
            "max_weight": float(m.high[est.W]),
            "support_deficit": _mean_or_none(deficit),
            "weight_quantiles": est.weight_quantiles(weights),
            "zero_weight_share": float(np.mean(weights == 0.0)),
        },
    }


def _excluded_warnings(recs: _Records) -> list[str]:
    if not recs.excluded:
        return []
    parts = ", ".join(f"{k}: {v}" for k, v in sorted(recs.excluded.items()))
    used = len(recs.actions)
    return [f"{recs.total - used} of {recs.total} decisions were excluded ({parts})"]


def _warnings(summary: dict[str, Any], cols: _Columns) -> list[str]:
    out = []
    d = summary["diagnostics"]
    deficit = d["support_deficit"]
    if deficit is None:
        out.append("the support deficit could not be computed (Monte Carlo propensities or a "
                   "callable target on continuous actions)")  # fmt: skip
    elif deficit > 0.0:
        out.append(f"support deficit {deficit:.3g}: the target puts that share of its "
                   "probability on actions the logging policy could not take; the data cannot "
                   "answer this question (the estimates leave that part out)")  # fmt: skip
    ess, n = d["ess"], summary["n"]
    if ess < MIN_ESS or ess < MIN_ESS_SHARE * n:
        out.append(f"effective sample size {ess:.1f} of {n} records is small: a few heavy "
                   "weights drive the estimate, so intervals may be too narrow")  # fmt: skip
    mc = cols.methods.get(MONTE_CARLO, 0)
    if mc:
        out.append(f"{mc} target propensities were estimated by Monte Carlo (noisy weights)")
    if cols.dr_note:
        out.append(cols.dr_note)
    return out


def _problem(summary: dict[str, Any]) -> bool:
    d = summary["diagnostics"]
    deficit = d["support_deficit"]
    small = d["ess"] < MIN_ESS or d["ess"] < MIN_ESS_SHARE * summary["n"]
    return bool((deficit is not None and deficit > 0.0) or small)


# -- reports ------------------------------------------------------------------------------------
def _fmt(x: float | None) -> str:
    return "-" if x is None else f"{x:.4f}"


def _span(e: Mapping[str, float | None]) -> str:
    return f"[{_fmt(e['low'])}, {_fmt(e['high'])}]"


def _policy_text(d: Mapping[str, Any]) -> str:
    if "callable" in d:
        return str(d["callable"])
    if d.get("overrides"):
        return ", ".join(f"{k}={v!r}" for k, v in d["overrides"].items())
    return "logging policy"


@dataclass
class EstimateReport:
    """The estimate of a target policy's mean reward from verified records.

    ``to_dict()`` is the JSON of ``drawledger estimate --json``; ``weights`` holds the
    importance weight of every record used (for histograms). ``decisions`` counts the
    decisions of the stream before exclusions; ``excluded`` counts them by reason (a decision
    can fail for several reasons).
    """

    n: int
    target: dict[str, Any]
    estimates: dict[str, dict[str, float | None]]
    diagnostics: dict[str, Any]
    baseline: dict[str, Any]
    baseline_estimates: dict[str, dict[str, float | None]]
    difference: dict[str, dict[str, float | None]]
    excluded: dict[str, int]
    warnings: list[str]
    settings: dict[str, Any]
    segments: dict[str, Any] | None
    decisions: int
    weights: np.ndarray = field(repr=False)
    ok: bool = True

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "n": self.n,
            "target": self.target,
            "estimates": self.estimates,
            "diagnostics": self.diagnostics,
            "baseline": {**self.baseline, "estimates": self.baseline_estimates},
            "difference": self.difference,
            "logging_value": self.logging_value,
            "excluded": {"total": self.decisions - self.n, "by_reason": self.excluded},
            "settings": self.settings,
            "warnings": self.warnings,
            "ok": self.ok,
        }
        if self.segments is not None:
            out["segments"] = self.segments
        return out

    @property
    def logging_value(self) -> float | None:
        """The mean reward of the logging policy on the records (None with another baseline)."""
        if self.baseline.get("policy") != "logging":
            return None
        return self.baseline_estimates["ips"]["value"]

    def _tables(self) -> list[Any]:
        from rich.box import SIMPLE
        from rich.table import Table

        level = self.settings["level"]
        t = Table(title=f"{_policy_text(self.target)} (diff: minus "
                  f"{_policy_text(self.baseline)}), {self.n} verified records, {level:.0%} "
                  f"{self.settings['interval']} intervals", title_justify="left",
                  box=SIMPLE)  # fmt: skip
        for col in ("estimator", "value", "interval", "bias", "diff", "interval"):
            t.add_column(col, justify="left" if col == "estimator" else "right", no_wrap=True)
        for name, e in self.estimates.items():
            d = self.difference[name]
            bias = _fmt(e.get("bias_bound")) if name == "clipped" else ""
            t.add_row(name, _fmt(e["value"]), _span(e), bias, _fmt(d["value"]), _span(d))
        g = Table(title="diagnostics", title_justify="left", box=SIMPLE)
        g.add_column("measure")
        g.add_column("value", justify="right")
        diag = self.diagnostics
        g.add_row("effective sample size (Kish)", f"{diag['ess']:.1f}")
        g.add_row("max weight", f"{diag['max_weight']:.4g}")
        for q, v in diag["weight_quantiles"].items():
            g.add_row(f"weight quantile {q}", f"{v:.4g}")
        g.add_row("support deficit", _fmt(diag["support_deficit"]))
        if self.logging_value is not None:
            g.add_row("logging policy mean reward", _fmt(self.logging_value))
        out: list[Any] = [t, g]
        if self.segments is not None:
            s = Table(title=f"segments by {self.segments['by']}", title_justify="left", box=SIMPLE)
            for col in ("segment", "n", "snips", "interval", "ess", "deficit"):
                s.add_column(col, justify="left" if col == "segment" else "right", no_wrap=True)
            for seg in self.segments["groups"]:
                e = seg["estimates"]["snips"]
                s.add_row(str(seg["value"]), str(seg["n"]), _fmt(e["value"]), _span(e),
                          f"{seg['diagnostics']['ess']:.1f}",
                          _fmt(seg["diagnostics"]["support_deficit"]))  # fmt: skip
            out.append(s)
        return out

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        yield from self._tables()
        for w in self.warnings:
            yield f"[yellow]warning:[/yellow] {w}"

    def __str__(self) -> str:
        return _plain(self)


def _plain(renderable: Any) -> str:
    from rich.console import Console

    console = Console(width=110, record=True, file=open(os.devnull, "w"), color_system=None)  # noqa: SIM115
    console.print(renderable)
    console.file.close()
    return console.export_text()


# -- the library functions ----------------------------------------------------------------------
def _reward_range(r: np.ndarray, given: tuple[float, float] | None) -> tuple[float, float]:
    if given is not None:
        return float(given[0]), float(given[1])
    return min(0.0, float(r.min())), max(0.0, float(r.max()))


def _segments(by: str, labels: list[str], cols: _Columns, s: _Settings) -> dict[str, Any]:
    groups = []
    array = np.asarray(labels)
    for value in sorted(set(labels)):
        rows = array == value
        summary = _summary(cols, rows, s)
        groups.append({"value": value, "n": summary["n"], "estimates": summary["estimates"],
                       "difference": summary["difference"],
                       "diagnostics": {k: summary["diagnostics"][k] for k in
                                       ("ess", "max_weight", "support_deficit")}})  # fmt: skip
    return {"by": by, "groups": groups}


def _segment_labels(by: str, recs: _Records) -> list[str]:
    if by in recs.rows.columns:
        return [str(x) for x in recs.rows[by].tolist()]
    labels = []
    for text in recs.inputs:
        obj: Any = from_json(text)
        for part in by.split("."):
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


def _prepare(ledger: str | os.PathLike[str], **kw: Any) -> _Records:
    return _load_records(os.fspath(ledger), **kw)


def estimate(
    ledger: str | os.PathLike[str],
    *,
    reward: str,
    overrides: Mapping[str, Any] | None = None,
    stream: str | None = None,
    path: Sequence[str | os.PathLike[str]] = (),
    allow: Sequence[str] = (),
    target: str | None = None,
    baseline: Policy = None,
    clip: float | None = None,
    interval: str = "clt",
    bootstrap: int = 0,
    level: float = 0.95,
    seed: int = 0,
    by: str | None = None,
    reward_range: tuple[float, float] | None = None,
    missing_reward: float | None = 0.0,
    format: str | None = None,
    progress: bool = False,
    jobs: int = 1,
    integrity_key: bytes | str | None = None,
    engine: str = "local",
    scheduler: str | None = None,
) -> EstimateReport:
    """Estimate the mean ``reward`` of a target policy from the verified records of a ledger.

    The target is the logged decision function with its policy parameters changed by
    ``overrides`` (``{"temperature": 0.3}``), or ``target="module:function"``, a callable
    ``f(inputs, action) -> probability`` (imported under the ``path``/``allow`` rules).
    ``baseline`` (default: the logging policy) is compared with the target on the same
    records, with a paired interval. ``clip`` is the cap R of clipped IPS (default 10);
    ``interval`` is "clt", "bootstrap" (``bootstrap`` resamples, default 1000) or "bernstein";
    ``reward_range`` bounds the rewards (default: the observed range, widened to include 0);
    ``missing_reward`` is the reward of a decision without that outcome (None: exclude it);
    ``by`` splits the estimate into segments by a column of the verified records or a dotted
    field of the inputs. ``jobs`` and ``integrity_key`` go to ``verify``; ``engine="dask"``
    replays and re-executes the decisions on the Dask cluster at ``scheduler``. Raises
    ``ReplayError`` when the question cannot be run.
    """
    if overrides is not None and target is not None:
        raise ReplayError("give either overrides (changed parameters) or a callable target")
    cap, b = _check_options(reward, interval, bootstrap, clip, level, engine, scheduler,
                            reward_range)  # fmt: skip
    paths = [os.fspath(p) for p in path]
    spec: Policy = target if target is not None else dict(overrides or {})
    targets = [_Target(spec, paths, allow), _Target(baseline, paths, allow)]
    if engine == "dask":  # replay and evaluation per piece on a cluster (replay/_dask.py)
        from drawledger.replay._dask import evaluate_on_dask

        recs, logging, (tres, bres) = evaluate_on_dask(
            ledger, policies=[spec, baseline], reward=reward, stream=stream, path=paths,
            allow=list(allow), format=format, seed=seed, missing_reward=missing_reward,
            reward_range=reward_range, integrity_key=integrity_key, scheduler=scheduler,
            progress=progress)  # fmt: skip
        labels = _segment_labels(by, recs) if by is not None else None
    else:
        recs = _prepare(ledger, reward=reward, stream=stream, path=paths, allow=list(allow),
                        format=format, progress=progress, missing_reward=missing_reward,
                        reward_range=reward_range, jobs=jobs,
                        integrity_key=integrity_key)  # fmt: skip
        labels = _segment_labels(by, recs) if by is not None else None
        logging, (tres, bres) = _evaluate(recs, targets, path=paths, allow=list(allow),
                                          seed=seed, progress=progress)  # fmt: skip
    rr = _reward_range(recs.r, reward_range)
    cols = _build_columns(recs, logging, [tres, bres], cap, rr, interval == "bernstein")[0]
    s = _Settings(cap, interval, level, b, seed, rr)
    summary = _summary(cols, None, s)
    warnings = _excluded_warnings(recs) + _warnings(summary, cols)
    describe = {**_describe(spec), "stream": recs.stream,
                "functions": sorted(set(recs.fn)), "reward": reward}  # fmt: skip
    describe["propensities"] = dict(cols.methods)
    return EstimateReport(
        n=summary["n"], target=describe, estimates=summary["estimates"],
        diagnostics=summary["diagnostics"], baseline=_describe(baseline),
        baseline_estimates=summary["baseline"], difference=summary["difference"],
        excluded=recs.excluded, warnings=warnings, settings=s.to_dict(),
        segments=None if by is None or labels is None else _segments(by, labels, cols, s),
        decisions=recs.total, weights=cols.weights, ok=not _problem(summary),
    )  # fmt: skip


@dataclass
class SweepReport:
    """Estimates of a curve of policies: one policy parameter swept over a grid."""

    param: str
    values: list[Any]
    points: list[dict[str, Any]]
    baseline: dict[str, Any]
    settings: dict[str, Any]
    warnings: list[str]
    n: int
    ok: bool = True

    @property
    def table(self) -> pd.DataFrame:
        """One row per (value, estimator): value, low, high, and the point's diagnostics."""
        rows = []
        for p in self.points:
            for name, e in p["estimates"].items():
                rows.append({self.param: p["value"], "estimator": name, "estimate": e["value"],
                             "low": e["low"], "high": e["high"], "ess": p["diagnostics"]["ess"],
                             "support_deficit": p["diagnostics"]["support_deficit"]})  # fmt: skip
        return pd.DataFrame(rows)

    def figure(self) -> Figure:
        """The curve of each estimator, with interval bands for SNIPS and DR (no display)."""
        from matplotlib.figure import Figure

        fig = Figure(figsize=(7.0, 4.2))
        ax = fig.add_subplot()
        table = self.table
        for name, part in table.groupby("estimator", sort=False):
            x = part[self.param].to_numpy(dtype=float)
            line = ax.plot(x, part["estimate"].to_numpy(dtype=float), marker="o", ms=3,
                           label=str(name))[0]  # fmt: skip
            if name in ("snips", "dr"):
                ax.fill_between(x, part["low"].to_numpy(dtype=float),
                                part["high"].to_numpy(dtype=float), color=line.get_color(),
                                alpha=0.15)  # fmt: skip
        logging_value = self.baseline.get("estimates", {}).get("ips", {}).get("value")
        if self.baseline.get("policy") == "logging" and logging_value is not None:
            ax.axhline(logging_value, color="grey", ls="--", lw=1, label="logging policy")
        ax.set_xlabel(self.param)
        ax.set_ylabel("estimated mean reward")
        level = self.settings["level"]
        ax.set_title(f"{self.param} sweep ({level:.0%} {self.settings['interval']} intervals)")
        ax.legend(fontsize="small")
        fig.tight_layout()
        return fig

    def to_dict(self) -> dict[str, Any]:
        return {"n": self.n, "param": self.param, "points": self.points,
                "baseline": self.baseline, "settings": self.settings,
                "warnings": self.warnings, "ok": self.ok}  # fmt: skip

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        from rich.box import SIMPLE
        from rich.table import Table

        t = Table(title=f"{self.param} sweep: {self.n} verified records, "
                  f"{self.settings['level']:.0%} {self.settings['interval']} intervals",
                  title_justify="left", box=SIMPLE)  # fmt: skip
        shown = [n for n in ("snips", "dr") if self.points and n in self.points[0]["estimates"]]
        t.add_column(self.param, justify="right")
        for name in shown:
            t.add_column(name, justify="right")
            t.add_column("interval", justify="right", no_wrap=True)
        t.add_column("ess", justify="right")
        for p in self.points:
            cells = []
            for name in shown:
                e = p["estimates"][name]
                cells += [_fmt(e["value"]), _span(e)]
            t.add_row(f"{p['value']:g}" if isinstance(p["value"], float) else str(p["value"]),
                      *cells, f"{p['diagnostics']['ess']:.1f}")  # fmt: skip
        yield t
        for w in self.warnings:
            yield f"[yellow]warning:[/yellow] {w}"

    def __str__(self) -> str:
        return _plain(self)


def sweep(
    ledger: str | os.PathLike[str],
    *,
    reward: str,
    param: str,
    values: Sequence[Any],
    overrides: Mapping[str, Any] | None = None,
    stream: str | None = None,
    path: Sequence[str | os.PathLike[str]] = (),
    allow: Sequence[str] = (),
    baseline: Policy = None,
    clip: float | None = None,
    interval: str = "clt",
    bootstrap: int = 0,
    level: float = 0.95,
    seed: int = 0,
    reward_range: tuple[float, float] | None = None,
    missing_reward: float | None = 0.0,
    format: str | None = None,
    progress: bool = False,
    jobs: int = 1,
    integrity_key: bytes | str | None = None,
    engine: str = "local",
    scheduler: str | None = None,
) -> SweepReport:
    """Estimates of the policies ``overrides + {param: v}`` for each v in ``values``.

    The records are verified and read once; every policy is evaluated in the same pass. Other
    arguments are those of ``estimate``.
    """
    if not isinstance(param, str) or not param:
        raise ReplayError("a sweep needs the name of a policy parameter")
    grid = list(values)
    if not grid:
        raise ReplayError(f"the sweep of {param!r} has no values")
    cap, b = _check_options(reward, interval, bootstrap, clip, level, engine, scheduler,
                            reward_range)  # fmt: skip
    paths = [os.fspath(p) for p in path]
    fixed = dict(overrides or {})
    targets = [_Target({**fixed, param: v}, paths, allow) for v in grid]
    targets.append(_Target(baseline, paths, allow))
    if engine == "dask":  # replay and evaluation per piece on a cluster (replay/_dask.py)
        from drawledger.replay._dask import evaluate_on_dask

        recs, logging, results = evaluate_on_dask(
            ledger, policies=[t.spec for t in targets], reward=reward, stream=stream,
            path=paths, allow=list(allow), format=format, seed=seed,
            missing_reward=missing_reward, reward_range=reward_range,
            integrity_key=integrity_key, scheduler=scheduler, progress=progress)  # fmt: skip
    else:
        recs = _prepare(ledger, reward=reward, stream=stream, path=paths, allow=list(allow),
                        format=format, progress=progress, missing_reward=missing_reward,
                        reward_range=reward_range, jobs=jobs,
                        integrity_key=integrity_key)  # fmt: skip
        logging, results = _evaluate(recs, targets, path=paths, allow=list(allow), seed=seed,
                                     progress=progress)  # fmt: skip
    rr = _reward_range(recs.r, reward_range)
    s = _Settings(cap, interval, level, b, seed, rr)
    points, warnings, ok = [], [], True
    base_estimates: dict[str, Any] = {}
    for value, cols in zip(
        grid, _build_columns(recs, logging, results, cap, rr, interval == "bernstein"), strict=True
    ):
        summary = _summary(cols, None, s)
        base_estimates = summary["baseline"]
        for w in _warnings(summary, cols):
            warnings.append(f"{param}={value!r}: {w}")
        ok = ok and not _problem(summary)
        points.append({"value": value, "estimates": summary["estimates"],
                       "difference": summary["difference"],
                       "diagnostics": {k: summary["diagnostics"][k] for k in
                                       ("ess", "max_weight", "support_deficit")}})  # fmt: skip
    return SweepReport(
        param=param, values=grid, points=points,
        baseline={**_describe(baseline), "estimates": base_estimates},
        settings={**s.to_dict(), "overrides": fixed, "stream": recs.stream, "reward": reward},
        warnings=_excluded_warnings(recs) + warnings, n=len(recs.actions), ok=ok,
    )  # fmt: skip
