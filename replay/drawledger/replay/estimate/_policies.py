"""Re-running recorded decisions under other policies: the target side of an estimate.

A policy is the logging policy, the decision function with some policy parameters changed, or
a callable ``f(inputs, action) -> probability``. For each record, ``evaluate`` re-runs the
decision (seeded by the decision id) with its logged parameters and with each policy, and gets
the probability (or density) of the logged action under the policy, the policy's full action
distribution when it has one (exact by enumeration), and the support deficit: the policy's
mass on actions the logging policy could not take.
"""

from __future__ import annotations

import hashlib
import math
import sys
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from drawledger._probability import CONTINUOUS_KINDS, density, distribution
from drawledger._records import from_json, to_json
from drawledger._replaying import REPLAYING
from drawledger.draw import Draw, DrawRecord
from drawledger.exceptions import DrawledgerError, ReplayError
from drawledger.ledger import Decision
from drawledger.replay.propensity import (
    DEFAULT_BUDGET,
    DENSITY,
    MONTE_CARLO,
    action_distribution,
    from_run,
)
from drawledger.replay.verify import (
    immutable,
    import_allowed,
    load_inputs,
    load_params,
    lookup_qualname,
    resolve_decision,
)

__all__ = ["Evaluated", "Policy", "Records", "Target", "evaluate", "logging_distributions"]

Policy = Mapping[str, Any] | str | None


@dataclass
class Records:
    """The records of a piece an estimate uses (verified, of the chosen stream, rewarded)."""

    ids: list[str]
    fn: list[str]
    inputs: list[str]  # JSON texts as recorded
    params: list[str]
    actions: list[str]  # canonical JSON of the logged action
    mu: np.ndarray  # replayed logging propensity (or density)
    r: np.ndarray  # reward
    methods: list[str | None]  # how the verifier found mu
    # Records logged by another code version (record index: its logging action distribution
    # under that version, None when it has no exact one): they are re-run here only under the
    # targets, never under the logging policy.
    foreign: dict[int, dict[str, float] | None] = field(default_factory=dict)


class Target:
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
            hit = load_params(decision, self.overrides, given=True)
            self._checked[decision.name] = hit
        return hit

    def probability(self, inputs: Mapping[str, Any], action_json: str, where: str) -> float:
        assert self.fn is not None
        token = REPLAYING.set(f"target {self.spec}")
        try:
            p = self.fn(inputs, from_json(action_json))
        except Exception as exc:
            raise ReplayError(f"target {self.spec} raised {type(exc).__name__} on {where}: "
                              f"{exc}") from None  # fmt: skip
        finally:
            REPLAYING.reset(token)
        if isinstance(p, bool) or not isinstance(p, (int, float)) or not math.isfinite(p) \
                or p < 0.0:  # fmt: skip
            raise ReplayError(f"target {self.spec} returned {p!r} on {where}; it must return "
                              "a probability (or density) >= 0")  # fmt: skip
        return float(p)


def _load_callable(spec: str, path: Sequence[str], allow: Sequence[str]) -> Any:
    """``module:function`` under the same import rules as decision code (--path / --allow)."""
    if spec.count(":") != 1:
        raise ReplayError(f"target {spec!r} is not 'module:function'")
    module_name, qualname = spec.split(":")
    module = sys.modules.get(module_name)
    if module is None:
        module = import_allowed(module_name, path, allow)
    fn = lookup_qualname(module, qualname)
    if fn is None or not callable(fn):
        raise ReplayError(f"target {spec!r}: module {module_name!r} has no function {qualname!r}")
    return fn


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
    return distribution(rec.kind, rec.args, _key)


def _density_of(rec: DrawRecord, x: Any) -> float:
    """Density of a continuous draw, by its recorded arguments, at the value x."""
    if rec.kind not in CONTINUOUS_KINDS:
        raise ReplayError(f"no density for a {rec.kind} draw")
    return density(rec.kind, rec.args, x)


@dataclass
class _Run:
    records: list[DrawRecord]
    returned: str
    dist: dict[str, float] | None
    single: bool = False  # one draw, whose value the decision returned
    foreign: bool = False  # another code version's: only ``dist`` is known here

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


@dataclass
class Evaluated:
    """Per-record results of one policy over the records."""

    p: np.ndarray  # probability (density) of the logged action under the policy
    deficit: np.ndarray  # target mass the logging policy could not take (NaN: unknown)
    dists: list[dict[str, float]] | None  # full action distributions (None: not available)
    methods: Counter[str] = field(default_factory=Counter)


def _record_seed(decision_id: str, seed: int) -> bytes:
    return hashlib.blake2b(decision_id.encode(), digest_size=16,
                           key=seed.to_bytes(8, "little", signed=True)).digest()  # fmt: skip


def evaluate(
    recs: Records, targets: Sequence[Target], *, path: Sequence[str], allow: Sequence[str],
    seed: int, budget: int = DEFAULT_BUDGET,
) -> tuple[list[dict[str, float] | None], list[Evaluated]]:  # fmt: skip
    """Logging distributions and every target's per-record results, in one pass."""
    n = len(recs.actions)
    out = [Evaluated(np.empty(n), np.zeros(n), [] if not t.logging else None) for t in targets]
    logging_dists: list[dict[str, float] | None] = []
    decisions: dict[str, Decision[Any]] = {}
    params: dict[tuple[str, str], dict[str, Any]] = {}
    for i in range(n):
        did, action = recs.ids[i], recs.actions[i]
        where = f"decision {did}"
        dec = decisions.get(recs.fn[i])
        if dec is None:
            dec = resolve_decision(recs.fn[i], path=path, allow=allow)
            decisions[recs.fn[i]] = dec
        try:
            inputs = load_inputs(dec, recs.inputs[i])
            logged = params.get((dec.name, recs.params[i]))
            if logged is None:
                logged = load_params(dec, recs.params[i])
                if immutable(logged) and len(params) < 1024:
                    params[(dec.name, recs.params[i])] = logged
        except ReplayError as exc:
            if i not in recs.foreign:
                raise
            raise ReplayError(
                f"{where} was logged by another code version of {dec.name}, whose inputs or "
                f"parameters the current code does not take, so it cannot be re-run under the "
                f"target: {exc}"
            ) from None
        rseed = _record_seed(did, seed)
        by_density = recs.methods[i] == DENSITY
        if i in recs.foreign:
            lrun = _Run([], action, recs.foreign[i], foreign=True)
        else:
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
                _evaluate_params(dec, inputs, logged, changed, action, lrun, trun, res, i, seed,
                                 by_density)  # fmt: skip
    for t, res in zip(targets, out, strict=True):
        if t.logging:
            if all(d is not None for d in logging_dists):
                res.dists = [d for d in logging_dists if d is not None]
        elif res.dists is not None and len(res.dists) != n:
            res.dists = None
    return logging_dists, out


def logging_distributions(
    recs: Records, *, path: Sequence[str], allow: Sequence[str], seed: int,
    budget: int = DEFAULT_BUDGET,
) -> list[dict[str, float] | None]:  # fmt: skip
    """Each record's action distribution under its logged parameters (None: no exact one)."""
    return evaluate(recs, [], path=path, allow=allow, seed=seed, budget=budget)[0]


def _evaluate_callable(t: Target, res: Evaluated, i: int, inputs: Mapping[str, Any],
                       action: str, lrun: _Run, where: str) -> None:  # fmt: skip
    res.p[i] = t.probability(inputs, action, where)
    res.methods["callable"] += 1
    if lrun.dist is None:
        res.deficit[i] = math.nan
        res.dists = None
        return
    dist = {a: t.probability(inputs, a, where) for a, q in lrun.dist.items() if q > 0.0}
    total = math.fsum(dist.values())
    # discrete actions: probabilities, not densities; 1e-9 for float rounding (common practice)
    if total > 1.0 + 1e-9:
        raise ReplayError(f"target {t.spec} gives the actions of {where} probabilities "
                          f"that sum to {total:.6g}; a policy's sum to at most 1")  # fmt: skip
    res.deficit[i] = max(0.0, 1.0 - total)
    if res.dists is not None:
        res.dists.append(dist)


def _evaluate_params(
    dec: Decision[Any], inputs: Mapping[str, Any], logged: Mapping[str, Any],
    params: Mapping[str, Any], action: str, lrun: _Run, trun: _Run, res: Evaluated, i: int,
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
    if lrun.foreign:  # the logging policy's code is another version's: not run here
        res.deficit[i] = math.nan
        return
    # Support by sampling: trun.returned is a draw from the target (a seeded run); the record
    # counts as deficit when the logging policy gives that action probability (density) 0.
    back = from_run(dec, inputs, logged, trun.returned, lrun.records, lrun.returned, seed=seed)
    res.deficit[i] = math.nan if back.method == MONTE_CARLO else float(not back.value > 0.0)
