"""``estimate`` and ``sweep``: off-policy estimates of target policies from verified records."""

from __future__ import annotations

import math
import os
from collections import Counter
from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass, replace
from numbers import Real
from typing import TYPE_CHECKING, Any

import numpy as np

from drawledger._text import counted
from drawledger.exceptions import ReplayError
from drawledger.replay.engines import open_engine
from drawledger.replay.estimate import _estimators as est
from drawledger.replay.estimate._piece import Job
from drawledger.replay.estimate._policies import Policy, Target
from drawledger.replay.estimate._refuse import accepted_reasons, alerts, failure_fields
from drawledger.replay.estimate._report import (
    DEFAULT_BOOTSTRAP,
    DEFAULT_CAP,
    DR_NOTE,
    ESTIMATORS,
    INTERVALS,
    EstimateReport,
    SweepReport,
    other_versions,
)
from drawledger.replay.estimate._rewards import choose_stream
from drawledger.replay.estimate._runner import estimate_on
from drawledger.replay.estimate._stages import Group, Pass
from drawledger.replay.propensity import (
    DEFAULT_BUDGET,
    DEFAULT_MC_SAMPLES,
    MONTE_CARLO,
    ONE_DRAW,
)
from drawledger.replay.sources import (
    CHUNK_SIZE,
    Task,
    is_parquet,
    parquet_root,
    pieces,
    plan,
    sql_streams,
    stream_partitions,
)
from drawledger.replay.verify import Settings, absolute_paths, plan_versions

if TYPE_CHECKING:
    pass


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
        if isinstance(reward_range, (str, bytes)) or not isinstance(reward_range, Sequence) \
                or len(reward_range) != 2 or not all(isinstance(x, Real) and not isinstance(
                    x, bool) for x in reward_range):  # fmt: skip
            raise ReplayError(f"reward_range must be a pair (low, high) of numbers, "
                              f"got {reward_range!r}")  # fmt: skip
        lo, hi = reward_range
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise ReplayError(
                f"reward_range must be (low, high) with low < high, got {reward_range!r}"
            )
    b = (bootstrap or DEFAULT_BOOTSTRAP) if interval == "bootstrap" else 0
    return float(cap), b


def _baseline(policy: Policy, summary: dict[str, Any]) -> dict[str, Any]:
    """The baseline as described in the JSON, with its weights' diagnostics unless it is the
    logging policy (whose weights are all 1)."""
    if policy is None:
        return _describe(policy)
    return {**_describe(policy), "diagnostics": summary["baseline_diagnostics"]}


def _describe(policy: Policy) -> dict[str, Any]:
    if policy is None:
        return {"policy": "logging"}
    if isinstance(policy, str):
        return {"callable": policy}
    return {"overrides": dict(policy)}


@dataclass(frozen=True)
class _Question:
    """Where the records come from and how they are read (shared by estimate and sweep)."""

    reward: str
    stream: str | None
    path: tuple[str, ...]
    allow: tuple[str, ...]
    seed: int
    missing_reward: float | None
    reward_range: tuple[float, float] | None
    format: str | None
    progress: bool
    jobs: int
    integrity_key: bytes | str | None
    engine: str
    scheduler: str | None
    accept_integrity: bool
    accept: frozenset[str]
    history: bool


def _pass(
    ledger: str | os.PathLike[str], q: _Question, policies: Sequence[Policy], *, cap: float,
    bootstrap: int, by: str | None, weights: bool,
) -> tuple[Pass, str, list[dict[str, Any]]]:  # fmt: skip
    """The chosen stream's records, replayed and evaluated under ``policies`` piece by piece
    (locally or on Dask) and reduced to the estimators' statistics."""
    text = os.fspath(ledger)
    if isinstance(q.jobs, bool) or not isinstance(q.jobs, int) or q.jobs < 1:
        raise ReplayError(f"jobs must be a positive integer, got {q.jobs!r}")
    settings = Settings(path=q.path, allow=q.allow, budget=DEFAULT_BUDGET,
                        mc_samples=DEFAULT_MC_SAMPLES, keep_rows=True)  # fmt: skip
    # As in verify: a record of another code version is replayed under its own version when
    # the history holds it (local engine), else it is version-not-found.
    versions = plan_versions(text, q.format, settings, q.history and q.engine == "local")
    settings = versions.settings
    if q.engine == "dask" or is_parquet(text, q.format):
        root = parquet_root(text, q.format if q.engine == "dask" else "parquet", "estimate")
        by_stream = stream_partitions(root)
        stream = choose_stream(sorted(by_stream), q.stream, text)
        tasks = [Task(text, p.rows, piece=p) for p in pieces(by_stream[stream], CHUNK_SIZE)]
    else:
        stream = choose_stream(sql_streams(text), q.stream, text)
        tasks = plan(text, format=q.format)
    job = Job(tuple(policies), q.reward, stream, settings, q.seed, q.missing_reward,
              q.reward_range, by, q.accept)  # fmt: skip
    target, format = text, q.format
    if q.engine == "dask":  # the workers may run elsewhere: absolute paths
        target, format = os.fspath(root), "parquet"
        job = replace(job, settings=absolute_paths(settings))
    with open_engine(q.engine, jobs=q.jobs, scheduler=q.scheduler, progress=q.progress,
                     command="estimate") as engine:  # fmt: skip
        p = estimate_on(engine, target, format, tasks, job, integrity_key=q.integrity_key,
                        cap=cap, bootstrap=bootstrap, weights=weights,
                        accept_integrity=q.accept_integrity, versions=versions)  # fmt: skip
    return p, stream, _versions(versions.versions, stream, p)


def _versions(planned: Sequence[Mapping[str, Any]], stream: str, p: Pass) -> list[dict[str, Any]]:
    """The code versions of the stream: decisions, records used, and the code that replayed
    them (the logging side of each record)."""
    return [{"fn": v["fn"], "identity": v["identity"], "decisions": v["decisions"],
             "used": p.versions.get((v["fn"], v["identity"]), 0),
             "logged_under": v["replayed_under"]}
            for v in planned if v["stream"] == stream]  # fmt: skip


@dataclass
class _Settings:
    cap: float
    interval: str
    level: float
    bootstrap: int
    seed: int
    reward_range: tuple[float, float]
    range_given: bool  # fixed in advance (reward_range=), not the observed rewards

    def to_dict(self) -> dict[str, Any]:
        return {"clip": self.cap, "interval": self.interval, "level": self.level,
                "bootstrap": self.bootstrap, "seed": self.seed,
                "reward_range": list(self.reward_range),
                "reward_range_source": "given" if self.range_given else "observed"}  # fmt: skip

    def notes(self) -> list[str]:
        """The Bernstein bound's guarantee needs a reward range fixed in advance (Maurer &
        Pontil 2009): without one, the interval says it has none."""
        if self.interval != "bernstein" or self.range_given:
            return []
        lo, hi = self.reward_range
        return [f"the bernstein intervals use the observed reward range [{lo:g}, {hi:g}] "
                "(widened to include 0), so they carry no finite-sample guarantee; give "
                "reward_range (--reward-range LOW,HIGH) fixed in advance for one"]  # fmt: skip


def _summary(g: Group, has_dr: bool, bounds: tuple[float, float], s: _Settings,
             weights: np.ndarray | None = None) -> dict[str, Any]:  # fmt: skip
    """Estimates, baseline values, paired differences and diagnostics of a group of records."""
    m = g.moments
    names = [n for n in ESTIMATORS if n != "dr" or has_dr]
    boot = None
    if g.boot is not None and g.boot_n is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            boot = g.boot / g.boot_n[:, None]
    spans = np.concatenate([est.column_spans(b, s.cap, s.reward_range) for b in bounds])
    common: dict[str, Any] = {"reward_range": s.reward_range, "level": s.level,
                              "interval": s.interval, "boot": boot, "spans": spans,
                              "names": names, "clip": s.range_given}  # fmt: skip
    return {
        "n": int(m.n),
        "estimates": est.summarize(m, offset=0, **common),
        "baseline": est.summarize(m, offset=est.WIDTH, **common),
        "difference": est.summarize(m, offset=0, baseline=est.WIDTH, **common),
        "diagnostics": {
            "ess": est.kish_ess(m, est.W),
            "max_weight": float(m.high[est.W]),
            "max_weight_share": est.max_weight_share(m, est.W),
            "support_deficit": g.deficit / g.known if g.known else None,
            "weight_quantiles": {} if weights is None else est.weight_quantiles(weights),
            "zero_weight_share": g.zeros / m.n,
        },
        "baseline_diagnostics": {
            "ess": est.kish_ess(m, est.WIDTH + est.W),
            "max_weight_share": est.max_weight_share(m, est.WIDTH + est.W),
            "support_deficit": g.base_deficit / g.base_known if g.base_known else None,
        },
    }


def _excluded_warnings(p: Pass, reward: str) -> list[str]:
    out = []
    if p.failures.summed:
        out.append(f"{p.failures.summed} of {p.n} records used have several {reward!r} "
                   "outcomes; each uses their sum (a retried event counts twice: record one "
                   "outcome per decision if that is not what the reward means)")  # fmt: skip
    if p.failures.one_draw:
        out.append(_one_draw_warning(f"{p.failures.one_draw} of {p.n} logging propensities"))
    if p.failures.code_changed:
        changed = counted(p.failures.code_changed, "decision")
        out.append(f"{changed} ran under decision code that has changed since; they replayed "
                   "every draw as recorded and are used (code-changed or version-not-found "
                   "accepted)")  # fmt: skip
    if not p.excluded:
        return out
    parts = ", ".join(f"{k}: {v}" for k, v in sorted(p.excluded.items()))
    return [*out, f"{p.total - p.n} of {p.total} decisions were excluded ({parts})"]


def _one_draw_warning(which: str) -> str:
    return (f"{which} are one-draw: the probability of one draw's value, not proven to be the "
            "action's (another value of the draw could return the same action; a draw with "
            "more outcomes than the enumeration budget, docs/replay.md)")  # fmt: skip


def _deficit_warning(deficit: float, reward_range: tuple[float, float], dr: bool,
                     policy: str = "target") -> str:  # fmt: skip
    """What a support deficit does to each estimator (docs/estimators.md): IPS and clipped IPS
    count the unseen share as reward 0; SNIPS and DR fill it, so their error has either sign."""
    lo, hi = reward_range
    toward = deficit * max(abs(lo), abs(hi))
    either = deficit * (hi - lo)
    fill = ("snips gives it the seen actions' mean reward and dr its reward model's "
            "predictions" if dr else "snips gives it the seen actions' mean reward")  # fmt: skip
    return (f"support deficit {deficit:.3g}: the {policy} puts that share of its probability on "
            "actions the logging policy could not take; the data cannot answer this question. "
            f"ips and clipped count that share as reward 0 (biased toward 0 by up to "
            f"{toward:.3g}); {fill} (biased up or down by up to {either:.3g})")  # fmt: skip


def _weight_warnings(summary: dict[str, Any], reward_range: tuple[float, float], dr: bool,
                     baseline: bool = False) -> list[str]:  # fmt: skip
    """The support-deficit and uneven-weight warnings of the target's weights; with
    ``baseline``, of a baseline other than the logging policy (weighted too)."""
    d = summary["baseline_diagnostics" if baseline else "diagnostics"]
    policy, who = ("baseline", "baseline: ") if baseline else ("target", "")
    out = []
    if d["support_deficit"] is not None and d["support_deficit"] > 0.0:
        out.append(who + _deficit_warning(d["support_deficit"], reward_range, dr, policy))
    uneven = est.overlap_problems(d["ess"], summary["n"], d["max_weight_share"])
    if uneven:
        out.append(f"{who}{'; '.join(uneven)}: the estimate rests on few records or a few "
                   "heavy weights, so its intervals may be too narrow")  # fmt: skip
    return out


def _warnings(summary: dict[str, Any], methods: Counter[str], dr: bool,
              reward_range: tuple[float, float]) -> list[str]:  # fmt: skip
    out = []
    if summary["diagnostics"]["support_deficit"] is None:
        out.append("the support deficit could not be computed (Monte Carlo propensities or a "
                   "callable target on continuous actions)")  # fmt: skip
    out += _weight_warnings(summary, reward_range, dr)
    if methods.get(ONE_DRAW, 0):
        out.append(_one_draw_warning(f"{methods[ONE_DRAW]} target propensities"))
    mc = methods.get(MONTE_CARLO, 0)
    if mc:
        out.append(f"{mc} target propensities were estimated by Monte Carlo (noisy weights)")
    if not dr:
        out.append(DR_NOTE)
    return out


def _found(p: Pass, missing_reward: float | None) -> dict[str, Any]:
    return failure_fields(p.failures, p.integrity, missing_reward, p.n)


def _cannot_answer(summary: dict[str, Any], baseline: bool = False) -> list[str]:
    """Why the data cannot answer the question as asked (a support deficit, too uneven
    weights), one line each, for the top of the output; the warnings give the details. With
    ``baseline``, the same rule on the baseline's weights (a baseline other than the logging
    policy is weighted too)."""
    d = summary["baseline_diagnostics" if baseline else "diagnostics"]
    who = "baseline: " if baseline else ""
    out = []
    if d["support_deficit"] is not None and d["support_deficit"] > 0.0:
        out.append(f"{who}support deficit {d['support_deficit']:.3g}: the data cannot answer "
                   "this question as asked (see the warning below)")  # fmt: skip
    uneven = est.overlap_problems(d["ess"], summary["n"], d["max_weight_share"])
    if uneven:
        out.append(f"{who}{'; '.join(uneven)}: the estimate rests on few records or a few "
                   "heavy weights (see the warning below)")  # fmt: skip
    return out


def _segments(p: Pass, bounds: tuple[float, float], s: _Settings, by: str) -> dict[str, Any]:
    groups = []
    for value in sorted(p.segments):
        summary = _summary(p.segments[value], p.dr[0] and p.dr[-1], bounds, s)
        groups.append({"value": value, "n": summary["n"], "alerts": _cannot_answer(summary),
                       "estimates": summary["estimates"], "difference": summary["difference"],
                       "diagnostics": {k: summary["diagnostics"][k] for k in
                                       ("ess", "max_weight", "max_weight_share",
                                        "support_deficit")}})  # fmt: skip
    return {"by": by, "groups": groups}


def _question(
    reward: str, interval: str, bootstrap: int, clip: float | None, level: float,
    reward_range: tuple[float, float] | None, **kw: Any,
) -> tuple[_Question, float, int]:  # fmt: skip
    cap, b = _check_options(reward, interval, bootstrap, clip, level, kw["engine"],
                            kw["scheduler"], reward_range)  # fmt: skip
    kw["accept"] = accepted_reasons(kw.pop("accept_verification_failures"),
                                    kw["accept_integrity"])  # fmt: skip
    kw["path"] = tuple(os.fspath(p) for p in kw["path"])
    kw["allow"] = tuple(kw["allow"])
    given = None if reward_range is None else (float(reward_range[0]), float(reward_range[1]))
    return _Question(reward=reward, reward_range=given, **kw), cap, b


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
    accept_integrity_failures: bool = False,
    accept_verification_failures: Collection[str] = (),
    history: bool = True,
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
    ``ReplayError`` when the question cannot be run (a reward no decision of the stream has).

    No estimate is made from a ledger that fails its integrity check, or from a stream whose
    decisions failed verification (the ones that replayed by chance are a biased subset):
    ``EstimateRefusedError`` names the failures. ``accept_integrity_failures=True`` and
    ``accept_verification_failures`` (reasons such as ``["code-changed"]``, or ``["all"]``)
    accept them: the failing decisions are dropped, the report's ``alerts`` say so first,
    ``accepted_failures`` counts them, and ``ok`` is False.

    Across deploys (docs/deploys.md): each record's logging propensity comes from the code
    version that logged it, replayed from the git history of a ``path`` directory as
    ``verify`` does (``history=False`` turns it off); the target is the current code under
    ``path`` with the record's logged parameters and ``overrides``. The report's ``versions``
    counts the decisions and the records used of each version.
    """
    if overrides is not None and target is not None:
        raise ReplayError("give either overrides (changed parameters) or a callable target")
    q, cap, b = _question(reward, interval, bootstrap, clip, level, reward_range, stream=stream,
                          path=path, allow=allow, seed=seed, missing_reward=missing_reward,
                          format=format, progress=progress, jobs=jobs, engine=engine,
                          integrity_key=integrity_key, scheduler=scheduler,
                          accept_integrity=accept_integrity_failures,
                          accept_verification_failures=accept_verification_failures,
                          history=history)  # fmt: skip
    spec: Policy = target if target is not None else dict(overrides or {})
    for policy in (spec, baseline):  # refuse a bad callable before the long pass
        Target(policy, q.path, q.allow)
    p, stream_name, versions = _pass(
        ledger, q, [spec, baseline], cap=cap, bootstrap=b, by=by, weights=True
    )
    s = _Settings(cap, interval, level, b, seed, p.reward_range, reward_range is not None)
    bounds = (p.bounds[0], p.bounds[-1])
    has_dr = p.dr[0] and p.dr[-1]
    summary = _summary(p.pairs[0], has_dr, bounds, s, p.weights)
    warnings = [*_excluded_warnings(p, reward),
                *_warnings(summary, p.methods[0], has_dr, s.reward_range),
                *(_weight_warnings(summary, s.reward_range, has_dr, baseline=True)
                  if baseline is not None else []),
                *s.notes()]  # fmt: skip
    top = [*alerts(p.failures, p.integrity, reward, missing_reward, p.n),
           *_cannot_answer(summary),
           *(_cannot_answer(summary, baseline=True) if baseline is not None else [])]  # fmt: skip
    found = _found(p, missing_reward)
    describe = {**_describe(spec), "stream": stream_name, "functions": p.functions,
                "reward": reward, "propensities": dict(p.methods[0])}  # fmt: skip
    if spec is not None and not isinstance(spec, str) and other_versions(versions):
        describe["code"] = "current code"
    assert p.weights is not None
    return EstimateReport(
        n=summary["n"], target=describe, estimates=summary["estimates"],
        diagnostics=summary["diagnostics"], baseline=_baseline(baseline, summary),
        baseline_estimates=summary["baseline"], difference=summary["difference"],
        excluded=dict(p.excluded), warnings=warnings, settings=s.to_dict(),
        segments=None if by is None else _segments(p, bounds, s, by),
        decisions=p.total, weights=p.weights, ok=not top,
        alerts=top, accepted_failures=found["accepted_failures"],
        missing_rewards=found["missing_rewards"], versions=versions,
    )  # fmt: skip


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
    accept_integrity_failures: bool = False,
    accept_verification_failures: Collection[str] = (),
    history: bool = True,
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
    q, cap, b = _question(reward, interval, bootstrap, clip, level, reward_range, stream=stream,
                          path=path, allow=allow, seed=seed, missing_reward=missing_reward,
                          format=format, progress=progress, jobs=jobs, engine=engine,
                          integrity_key=integrity_key, scheduler=scheduler,
                          accept_integrity=accept_integrity_failures,
                          accept_verification_failures=accept_verification_failures,
                          history=history)  # fmt: skip
    fixed = dict(overrides or {})
    policies: list[Policy] = [{**fixed, param: v} for v in grid]
    policies.append(baseline)
    Target(baseline, q.path, q.allow)
    p, stream_name, versions = _pass(
        ledger, q, policies, cap=cap, bootstrap=b, by=None, weights=False
    )
    s = _Settings(cap, interval, level, b, seed, p.reward_range, reward_range is not None)
    top = alerts(p.failures, p.integrity, reward, missing_reward, p.n)
    points, warnings = [], []
    base_estimates: dict[str, Any] = {}
    for j, (value, pair) in enumerate(zip(grid, p.pairs, strict=True)):
        has_dr = p.dr[j] and p.dr[-1]
        summary = _summary(pair, has_dr, (p.bounds[j], p.bounds[-1]), s)
        base_estimates = summary["baseline"]
        for w in _warnings(summary, p.methods[j], has_dr, s.reward_range):
            warnings.append(f"{param}={value!r}: {w}")
        cannot = _cannot_answer(summary)
        top.extend(f"{param}={value!r}: {line}" for line in cannot)
        points.append({"value": value, "alerts": cannot, "estimates": summary["estimates"],
                       "difference": summary["difference"],
                       "diagnostics": {k: summary["diagnostics"][k] for k in
                                       ("ess", "max_weight", "max_weight_share",
                                        "support_deficit")}})  # fmt: skip
    if baseline is not None:  # the same baseline weights at every point
        top.extend(_cannot_answer(summary, baseline=True))
        warnings.extend(_weight_warnings(summary, s.reward_range, has_dr, baseline=True))
    return SweepReport(
        param=param, values=grid, points=points,
        baseline={**_baseline(baseline, summary), "estimates": base_estimates},
        settings={**s.to_dict(), "overrides": fixed, "stream": stream_name, "reward": reward},
        warnings=_excluded_warnings(p, reward) + warnings + s.notes(), n=p.n, ok=not top,
        alerts=top,
        versions=versions, **_found(p, missing_reward),
    )  # fmt: skip
