"""The marginal probability of an action: one draw, every branch, densities, or Monte Carlo.

A decision that made several draws (an explore-or-exploit coin then a pick, a slate, nested
choices) returns an action whose probability is the sum over every sequence of draws that
returns it. ``BranchingDraw`` re-runs the decision once per branch of its discrete draws
(depth first, each run following a forced prefix of choices), within a budget of paths.
"""

from __future__ import annotations

import hashlib
import math
import random
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from typing import Any, NamedTuple

from drawledger._probability import DISCRETE_KINDS, density, probability
from drawledger._records import from_json, to_json
from drawledger.draw import Draw, DrawRecord
from drawledger.exceptions import ReplayError
from drawledger.ledger import Decision

__all__ = [
    "DENSITY",
    "ENUMERATED",
    "EXACT",
    "MONTE_CARLO",
    "ONE_DRAW",
    "BranchingDraw",
    "Found",
    "Memo",
    "Propensity",
    "action_distribution",
    "distribution",
    "from_run",
    "propensity",
    "read",
    "remembered",
    "single_draw_probability",
]

EXACT, ENUMERATED, DENSITY, MONTE_CARLO = "exact", "enumerated", "density", "monte-carlo"
ONE_DRAW = "one-draw"
DEFAULT_BUDGET = 4096
DEFAULT_MC_SAMPLES = 2000
PROBE_RUNS = 16  # random branches tried when there are too many to list
_NO_SEED = bytes(16)


class Propensity(NamedTuple):
    """The probability (or density) of an action and how it was obtained.

    ``method`` is "exact" (every branch was replayed: each made one draw and returned its
    value, so the action's probability is that of its option), "enumerated" (summed over every
    branch of the discrete draws), "one-draw" (the probability of the one draw's value when
    there are too many branches to replay: random branches returned their draw's value, but no
    other value returning the same action is ruled out), "density" (the action is a
    continuous draw's value) or "monte-carlo" (re-executions with fresh seeds; ``stderr`` is
    the standard error).
    """

    value: float
    method: str
    stderr: float = 0.0


class _Unenumerable(BaseException):
    """A continuous draw: branches cannot be listed (BaseException: user code won't catch it)."""


class BranchingDraw(Draw):
    """A ``Draw`` that follows a forced prefix of discrete choices, then the first branch.

    ``weight`` is the probability of the path taken; ``alternatives`` lists, for each step past
    the prefix, the other branches (with positive probability) still to explore.
    """

    __slots__ = ("_forced", "alternatives", "choices", "weight")

    def __init__(self, forced: Sequence[int] = ()) -> None:
        super().__init__(_NO_SEED)
        self._forced = forced
        self.choices: list[int] = []
        self.alternatives: list[tuple[int, Sequence[int]]] = []
        self.weight = 1.0

    def _pick(self, probs: list[float]) -> tuple[int, float]:
        step = len(self.choices)
        if step < len(self._forced):
            j = self._forced[step]
        else:
            positive = [i for i, p in enumerate(probs) if p > 0.0]
            j = positive[0]
            if len(positive) > 1:
                self.alternatives.append((step, positive[1:]))
        self.choices.append(j)
        self.weight *= probs[j]
        return j, 0.5  # the uniform is not used: the branch is chosen, not drawn

    def _pick_integer(self, n: int) -> tuple[int, float]:
        step = len(self.choices)
        if step < len(self._forced):
            j = self._forced[step]
        else:
            j = 0
            if n > 1:
                self.alternatives.append((step, range(1, n)))
        self.choices.append(j)
        self.weight /= n
        return j, 0.5

    def _uniform(self) -> float:
        raise _Unenumerable


class _DensityDraw(BranchingDraw):
    """Branches over discrete draws; the one continuous draw of a path takes the value ``target``.

    The path's weight is then its probability times that draw's density at ``target``.
    """

    __slots__ = ("continuous", "target")

    def __init__(self, forced: Sequence[int], target: float) -> None:
        super().__init__(forced)
        self.target = target
        self.continuous = False

    def _uniform(self) -> float:
        return 0.5  # the parent method validates its arguments; the value is replaced below

    def _at(self, density: float) -> float:
        if self.continuous:
            raise _Unenumerable
        self.continuous = True
        self.weight *= density
        return self.target

    def uniform(self, low: float, high: float, *, name: str | None = None) -> float:
        super().uniform(low, high, name=name)
        return self._at(_density_at(self.records[-1], self.target))

    def normal(self, mean: float, sd: float, *, name: str | None = None) -> float:
        super().normal(mean, sd, name=name)
        return self._at(_density_at(self.records[-1], self.target))

    def lognormal(self, mu: float, sigma: float, *, name: str | None = None) -> float:
        super().lognormal(mu, sigma, name=name)
        return self._at(_density_at(self.records[-1], self.target))


def _density_at(rec: DrawRecord, x: float) -> float:
    return density(rec.kind, rec.args, x)


Run = Callable[[Draw], Any]


def walk(run: Run, make: Callable[[list[int]], BranchingDraw], budget: int) -> (
    list[tuple[BranchingDraw, Any]] | None
):  # fmt: skip
    """Every path as (draw, action), or None past ``budget`` paths or on an unlistable draw."""
    stack: list[list[int]] = [[]]
    done: list[tuple[BranchingDraw, Any]] = []
    while stack:
        draw = make(stack.pop())
        try:
            action = run(draw)
        except _Unenumerable:
            return None
        except ReplayError:
            raise
        except Exception as exc:
            raise ReplayError(f"branch {draw.choices} raised {type(exc).__name__}: {exc}") from exc
        done.append((draw, action))
        more = sum(len(others) for _, others in draw.alternatives)
        if len(done) + len(stack) + more > budget:
            return None
        for step, others in draw.alternatives:
            prefix = draw.choices[:step]
            stack.extend([*prefix, j] for j in others)
    return done


def _runner(decision: Decision[Any], inputs: Mapping[str, Any], params: Mapping[str, Any]) -> Run:
    return lambda draw: decision.run(draw, inputs, params)


def action_distribution(
    decision: Decision[Any],
    inputs: Mapping[str, Any],
    params: Mapping[str, Any],
    *,
    budget: int = DEFAULT_BUDGET,
) -> dict[str, float] | None:
    """The exact distribution of a decision's action, keyed by the action's canonical JSON.

    Re-runs the decision over every branch of its discrete draws. Returns None when there are
    more than ``budget`` paths or when the decision makes a continuous draw. A branch that
    raises raises ``ReplayError`` naming the branch.
    """
    paths = walk(_runner(decision, inputs, params), BranchingDraw, budget)
    if paths is None:
        return None
    dist: dict[str, float] = {}
    for draw, action in paths:
        key = to_json(action, "action")
        dist[key] = dist.get(key, 0.0) + draw.weight
    return dist


def _density(run: Run, target_json: str, budget: int) -> float | None:
    """Density of a continuous action summed over discrete branches, or None if not computable."""
    target = from_json(target_json)
    if not isinstance(target, float):
        return None
    paths = walk(run, lambda forced: _DensityDraw(forced, target), budget)
    if paths is None:
        return None
    total = 0.0
    for draw, action in paths:
        if (
            isinstance(draw, _DensityDraw)
            and draw.continuous
            and to_json(action, "action") == target_json
        ):
            total += draw.weight
    return total if total > 0.0 else None


def _distinct_values(rec: DrawRecord) -> bool:
    """Each outcome of the draw has a value of its own (so its probability is the value's)."""
    if rec.kind in ("bernoulli", "integers"):
        return True
    options = rec.args.get("options")
    if rec.kind not in _WITH_OPTIONS or not isinstance(options, list):
        return False
    return set(map(type, options)) == _TEXT and len(set(options)) == len(options)


_TEXT = {str}
_WITH_OPTIONS = ("categorical", "softmax", "epsilon_greedy", "slate")


def single_draw_probability(
    rec: DrawRecord, action_json: str, value_json: str | None = None
) -> float | None:
    """P(action) when the decision's one discrete draw returns it, from the draw's arguments.

    ``value_json`` is the draw's value as JSON, when known. None for a kind this cannot
    compute (then the caller enumerates).
    """
    if value_json == action_json and _distinct_values(rec):
        return rec.prob
    if rec.kind not in DISCRETE_KINDS:
        return None
    return probability(rec.kind, rec.args, from_json(action_json))


class Found(NamedTuple):
    """What is known of the action distribution of one (function, inputs, params).

    ``dist`` maps actions (canonical JSON) to probabilities, densities or Monte Carlo counts
    (``samples`` runs); ``complete`` says an action missing from it has probability 0.
    ``single`` says every branch tried made one draw and returned its value.
    """

    method: str
    dist: Mapping[str, float]
    samples: int
    complete: bool
    single: bool


class Memo:
    """Distributions of recent (function, inputs, params), at most ``size`` of them."""

    def __init__(self, size: int = 4096) -> None:
        self.size = size
        self._items: dict[tuple[str, str, str], Found] = {}

    def get(self, key: tuple[str, str, str]) -> Found | None:
        return self._items.get(key)

    def put(self, key: tuple[str, str, str], value: Found) -> None:
        if len(self._items) >= self.size:
            del self._items[next(iter(self._items))]
        self._items[key] = value


class _ProbeDraw(Draw):
    """Takes a random branch at every discrete draw (each branch alike) and random uniforms."""

    __slots__ = ("_rng",)

    def __init__(self, rng: random.Random) -> None:
        super().__init__(_NO_SEED)
        self._rng = rng

    def _pick(self, probs: list[float]) -> tuple[int, float]:
        j = self._rng.choice([i for i, p in enumerate(probs) if p > 0.0])
        return j, 0.5

    def _pick_integer(self, n: int) -> tuple[int, float]:
        return self._rng.randrange(n), 0.5

    def _uniform(self) -> float:
        return self._rng.random() or 0.5


def _probe(run: Run, samples: int, seed: int) -> DrawRecord | None:
    """The first draw, when ``samples`` runs down random branches each made one draw and
    returned its value; else None."""
    rng = random.Random(seed)
    first = None
    for _ in range(samples):
        draw = _ProbeDraw(rng)
        try:
            action = run(draw)
        except Exception as exc:
            raise ReplayError(f"a random branch raised {type(exc).__name__}: {exc}") from exc
        if len(draw.records) != 1:
            return None
        rec = draw.records[0]
        if to_json(rec.value, "value") != to_json(action, "action"):
            return None
        first = first or rec
    return first


def _seeds(seed: int, n: int) -> list[bytes]:
    rng = random.Random(seed)
    return [rng.randbytes(16) for _ in range(n)]


def _single(paths: list[tuple[BranchingDraw, Any]]) -> bool:
    """Every path made one draw and returned its value (or the only path made none)."""
    if len(paths) == 1 and not paths[0][0].records:
        return True
    return all(
        len(d.records) == 1 and to_json(d.records[0].value, "value") == to_json(a, "action")
        for d, a in paths
    )


def distribution(
    decision: Decision[Any],
    inputs: Mapping[str, Any],
    params: Mapping[str, Any],
    action_json: str,
    *,
    budget: int = DEFAULT_BUDGET,
    mc_samples: int = DEFAULT_MC_SAMPLES,
    seed: int = 0,
    probes: int = PROBE_RUNS,
) -> Found:
    """Everything needed for the propensity of ``action_json`` (see ``propensity``)."""
    run = _runner(decision, inputs, params)
    paths = walk(run, BranchingDraw, budget)
    if paths is not None:
        dist: dict[str, float] = {}
        for draw, action in paths:
            key = to_json(action, "action")
            dist[key] = dist.get(key, 0.0) + draw.weight
        single = _single(paths)
        return Found(EXACT if single else ENUMERATED, dist, 0, True, single)
    first = _probe(run, probes, seed)
    if first is not None:  # one draw returns the action on every branch tried
        if first.is_density:
            target = from_json(action_json)
            if isinstance(target, float):
                return Found(DENSITY, {action_json: _density_at(first, target)}, 0, False, True)
        else:
            p = single_draw_probability(first, action_json)
            if p is not None:  # not proven: only sampled branches were replayed
                return Found(ONE_DRAW, {action_json: p}, 0, False, True)
    density = _density(run, action_json, budget)
    if density is not None:
        return Found(DENSITY, {action_json: density}, 0, False, False)
    counts: Counter[str] = Counter()
    for s in _seeds(seed, mc_samples):
        try:
            counts[to_json(run(Draw(s)), "action")] += 1
        except Exception as exc:
            raise ReplayError(f"Monte Carlo run raised {type(exc).__name__}: {exc}") from exc
    return Found(MONTE_CARLO, counts, mc_samples, True, False)


def remembered(
    memo: Memo,
    decision: Decision[Any],
    inputs: Mapping[str, Any],
    params: Mapping[str, Any],
    action_json: str,
    *,
    budget: int = DEFAULT_BUDGET,
    mc_samples: int = DEFAULT_MC_SAMPLES,
    seed: int = 0,
    texts: tuple[str, str] | None = None,
) -> Found:
    """``distribution`` through ``memo``, keyed by the function, inputs and parameters.

    ``texts`` are the inputs' and parameters' JSON when known (the recorded texts). Monte
    Carlo seeds mix ``seed`` with the key: equal inputs get equal estimates, whichever
    decision (or chunk, or process) computes them.
    """
    if texts is None:
        texts = (to_json(inputs, "inputs"), to_json(params, "params"))
    key = (decision.name, *texts)
    found = memo.get(key)
    if found is None or (not found.complete and action_json not in found.dist):
        digest = hashlib.blake2b("\0".join(key).encode(), digest_size=8).digest()
        found = distribution(decision, inputs, params, action_json, budget=budget,
                             mc_samples=mc_samples,
                             seed=seed ^ int.from_bytes(digest, "little"))  # fmt: skip
        memo.put(key, found)
    return found


def read(found: Found, action_json: str) -> Propensity:
    """The propensity of one action from a ``Found``."""
    if found.method == MONTE_CARLO:
        p = found.dist.get(action_json, 0) / found.samples
        return Propensity(p, MONTE_CARLO, math.sqrt(p * (1.0 - p) / found.samples))
    return Propensity(found.dist.get(action_json, 0.0), found.method)


def from_run(
    decision: Decision[Any],
    inputs: Mapping[str, Any],
    params: Mapping[str, Any],
    action_json: str,
    records: Sequence[DrawRecord],
    returned_json: str,
    *,
    budget: int = DEFAULT_BUDGET,
    mc_samples: int = DEFAULT_MC_SAMPLES,
    seed: int = 0,
    memo: Memo | None = None,
) -> Propensity:
    """``propensity`` given one run of the decision (its draws and returned action's JSON).

    A run without draws shows the function deterministic: probability 1 or 0, at no cost.
    """
    if not records:
        return Propensity(1.0 if returned_json == action_json else 0.0, EXACT)
    if memo is None:
        found = distribution(decision, inputs, params, action_json, budget=budget,
                             mc_samples=mc_samples, seed=seed)  # fmt: skip
    else:
        found = remembered(memo, decision, inputs, params, action_json, budget=budget,
                           mc_samples=mc_samples, seed=seed)  # fmt: skip
    return read(found, action_json)


def propensity(
    decision: Decision[Any],
    inputs: Mapping[str, Any],
    params: Mapping[str, Any],
    action_json: str,
    *,
    budget: int = DEFAULT_BUDGET,
    mc_samples: int = DEFAULT_MC_SAMPLES,
    seed: int = 0,
) -> Propensity:
    """The probability (or density) that the decision returns the action ``action_json``.

    ``inputs`` are the decision's inputs by name (see ``load_inputs``), ``params`` its policy
    parameters (changed ones give target propensities of a what-if policy). In order:

    1. every branch of the discrete draws, up to ``budget`` paths: "exact" when each branch
       makes one draw and returns its value, else "enumerated" (the sum over branches);
    2. beyond the budget, when random branches each make one draw that returns the action:
       that draw's probability ("one-draw": not proven, as other values of the draw could
       return the same action) or density ("density");
    3. the density of the continuous draw whose value is the action, summed over the
       discrete branches ("density");
    4. ``mc_samples`` re-executions with seeds derived from ``seed`` ("monte-carlo", with
       the standard error of the estimate).
    """
    if budget < 1 or mc_samples < 1:
        raise ValueError("budget and mc_samples must be at least 1")
    found = distribution(decision, inputs, params, action_json, budget=budget,
                         mc_samples=mc_samples, seed=seed)  # fmt: skip
    return read(found, action_json)
