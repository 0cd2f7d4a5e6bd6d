"""How likely a draw's value is: the one implementation for every kind of draw spec v1.

What ``Draw`` records, what the replay verifier, the enumerator and the target policies
recompute from the recorded arguments, all comes from here. docs/draw-spec.md states every
formula and its float evaluation order; the code follows it operation by operation. Pure
Python: the serving side stays light.

Two layers:

* per kind, the checks of a draw method's arguments (``categorical_args``, ``softmax_args``,
  ``bernoulli_probs``, ...; each returns the arguments as the draw records them, with the
  probabilities where those follow from the arguments alone, or raises ``DrawArgumentError``
  naming the kind, the draw's name and the problem) and the formulas (``softmax_probs``,
  ``epsilon_greedy_probs``, ``plackett_luce``, ``normal_pdf``, ...). ``Draw`` calls these
  directly: they are the serving path, and kept as cheap as the code they replaced;
* by kind name, from the ``args`` a draw recorded (keyed by the draw method's parameter names,
  as in the ``draws`` table): ``option_probabilities``, ``probability``, ``density``,
  ``distribution``, and ``decision_propensity`` for a decision's draws together. These check
  the arguments with the same checks, so bad ones raise the draw method's own errors.

Values are compared by their canonical JSON, as the ledger stores them: options with the same
JSON are one value, and their probabilities add up.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable, Collection, Mapping, Sequence
from typing import Any, TypeVar

from drawledger._records import to_json
from drawledger.exceptions import DrawArgumentError

__all__ = [
    "CONTINUOUS_KINDS",
    "DISCRETE_KINDS",
    "INT_RANGE_LIMIT",
    "LOG_LIMIT",
    "MIN_SCALE",
    "OPTION_KINDS",
    "PROB_SUM_TOLERANCE",
    "SQRT_2PI",
    "Z_LIMIT",
    "bernoulli_probs",
    "bucket_args",
    "categorical_args",
    "decision_propensity",
    "density",
    "distribution",
    "epsilon_greedy_args",
    "epsilon_greedy_probs",
    "integers_args",
    "lognormal_args",
    "lognormal_pdf",
    "normal_args",
    "normal_pdf",
    "option_probabilities",
    "plackett_luce",
    "probability",
    "probability_among",
    "slate_args",
    "slate_probability",
    "softmax_args",
    "softmax_probs",
    "uniform_args",
]

PROB_SUM_TOLERANCE = 1e-9
# A bound on |z| over every uniform the stream can produce (|PPND16(2**-54)| is about 8.3);
# normal and lognormal refuse parameters whose value or density could leave the doubles.
Z_LIMIT = 8.5
# lognormal keeps mu +- Z_LIMIT * sigma within +-LOG_LIMIT, so values stay positive normal
# doubles (exp(709.78) is the largest double).
LOG_LIMIT = 700.0
# Continuous draws refuse parameters whose density could exceed 1 / MIN_SCALE.
MIN_SCALE = 1e-300
# integers keeps high - low <= 2**53: above that, floor(u * n) cannot reach every integer.
INT_RANGE_LIMIT = 2**53
SQRT_2PI = math.sqrt(2.0 * math.pi)

# Kinds whose arguments list every outcome with its probability.
OPTION_KINDS = frozenset({"categorical", "softmax", "epsilon_greedy", "bernoulli", "bucket"})
DISCRETE_KINDS = OPTION_KINDS | {"integers", "slate"}
CONTINUOUS_KINDS = frozenset({"uniform", "normal", "lognormal"})
# The recorded arguments each kind needs, in the order of the draw method's parameters.
_PARAMETERS = {
    "categorical": ("options", "probs"),
    "bernoulli": ("p",),
    "uniform": ("low", "high"),
    "integers": ("low", "high"),
    "normal": ("mean", "sd"),
    "lognormal": ("mu", "sigma"),
    "softmax": ("options", "scores", "temperature"),
    "epsilon_greedy": ("options", "scores", "epsilon"),
    "slate": ("options", "weights", "k"),
    "bucket": ("shares",),
}

_exp = math.exp
_log = math.log
_isfinite = math.isfinite
_INF = math.inf
_PLAIN = (list, tuple)  # taken as they are; other collections go through the full checks

Pick = Callable[[list[float]], tuple[int, float]]
D = TypeVar("D")
T = TypeVar("T")


# -- checks of arguments --------------------------------------------------------------------
def _fail(kind: str, name: str | None, problem: str) -> DrawArgumentError:
    """The error of a draw whose arguments break a rule: "<kind> draw '<name>': <problem>"."""
    label = f"{kind} draw {name!r}" if name is not None else f"{kind} draw"
    return DrawArgumentError(f"{label}: {problem}")


def recordable_density(kind: str, name: str | None, value: float, density: float) -> float:
    """``density`` when it can be recorded (finite and positive); an error otherwise (a spread
    so narrow that the density at the drawn value under- or overflows)."""
    if not 0.0 < density < math.inf:
        raise _fail(kind, name, f"the density at the drawn value {value!r} is {density!r}, "
                    "which cannot be recorded: the spread is too narrow")  # fmt: skip
    return density


def _real(kind: str, name: str | None, label: str, x: Any) -> float:
    """A finite real number as a float (bools, strings and non-finite values are refused)."""
    if type(x) is not float:
        if isinstance(x, bool) or not isinstance(x, numbers.Real):
            raise _fail(kind, name, f"{label} must be a real number, got {x!r}")
        try:
            x = float(x)
        except OverflowError:
            raise _fail(kind, name, f"{label} must be finite, got {x!r}") from None
    if not _isfinite(x):
        raise _fail(kind, name, f"{label} must be finite, got {x!r}")
    return x


def _integer(kind: str, name: str | None, label: str, x: Any) -> int:
    """An integer as an int (bools and floats are refused)."""
    if type(x) is int:
        return x
    if isinstance(x, bool) or not isinstance(x, numbers.Integral):
        raise _fail(kind, name, f"{label} must be an integer, got {x!r}")
    return int(x)


def _collection(kind: str, name: str | None, label: str, xs: Any) -> list[Any]:
    if type(xs) in _PLAIN:
        return list(xs)
    if isinstance(xs, (str, bytes, Mapping)) or not isinstance(xs, Collection):
        raise _fail(kind, name, f"{label} must be a list, got {type(xs).__name__}")
    if isinstance(xs, (set, frozenset)):
        raise _fail(kind, name, f"{label} must be a list (a set has no order)")
    return list(xs)


def _option_list(kind: str, name: str | None, options: Any) -> list[Any]:
    """The options as a non-empty list, in their order."""
    opts = list(options) if type(options) in _PLAIN else _collection(kind, name, "options", options)
    if not opts:
        raise _fail(kind, name, "options is empty")
    return opts


def _reals(kind: str, name: str | None, label: str, xs: Any, n: int) -> list[float]:
    """A list of ``n`` finite floats (one per option)."""
    out = list(xs) if type(xs) in _PLAIN else _collection(kind, name, label, xs)
    if len(out) != n:
        raise _fail(kind, name, f"{label} has {len(out)} entries but options has {n}")
    for x in out:
        if type(x) is not float:
            break
    else:
        if _isfinite(sum(out)):  # a NaN or an infinity would make the sum non-finite
            return out
    return [_real(kind, name, f"{label}[{j}]", x) for j, x in enumerate(out)]


def _check_probs(kind: str, name: str | None, label: str, probs: list[float]) -> None:
    """Probabilities >= 0 whose left-to-right sum is 1 within PROB_SUM_TOLERANCE."""
    total = 0.0
    for p in probs:
        total += p
    if min(probs) < 0.0:
        j = next(j for j, p in enumerate(probs) if p < 0.0)
        raise _fail(kind, name, f"{label}[{j}] is negative ({probs[j]!r})")
    if not abs(total - 1.0) <= PROB_SUM_TOLERANCE:
        raise _fail(
            kind, name, f"{label} sum to {total!r}, not 1 (tolerance {PROB_SUM_TOLERANCE:g})"
        )


# -- each kind: its checks and its formulas ----------------------------------------------------
def categorical_args(
    options: Any, probs: Any, name: str | None = None
) -> tuple[list[Any], list[float]]:
    """Options and their probabilities (finite, >= 0, summing to 1 within 1e-9)."""
    opts = _option_list("categorical", name, options)
    p = _reals("categorical", name, "probs", probs, len(opts))
    _check_probs("categorical", name, "probs", p)
    return opts, p


def bernoulli_probs(p: Any, name: str | None = None) -> list[float]:
    """[p, 1 - p], the probabilities of [True, False], for p finite and in [0, 1]."""
    q = _real("bernoulli", name, "p", p)
    if not 0.0 <= q <= 1.0:
        raise _fail("bernoulli", name, f"p must lie in [0, 1], got {q!r}")
    return [q, 1.0 - q]


def integers_args(low: Any, high: Any, name: str | None = None) -> tuple[int, int, float]:
    """Integers low < high (high exclusive), high - low <= 2**53, both within +-2**63, and the
    probability of each integer of [low, high): 1 / (high - low)."""
    lo = _integer("integers", name, "low", low)
    hi = _integer("integers", name, "high", high)
    if lo >= hi:
        raise _fail("integers", name, f"low ({lo}) must be below high ({hi})")
    n = hi - lo
    if n > INT_RANGE_LIMIT:
        raise _fail("integers", name, f"high - low ({n}) exceeds 2**53")
    if lo < -(2**63) or hi > 2**63:
        raise _fail("integers", name, "low and high must lie within [-2**63, 2**63]")
    return lo, hi, 1.0 / n


def softmax_args(
    options: Any, scores: Any, temperature: Any, name: str | None = None
) -> tuple[list[Any], list[float], float]:
    """Options, one finite score each, and a finite temperature > 0."""
    opts = _option_list("softmax", name, options)
    s = _reals("softmax", name, "scores", scores, len(opts))
    t = (
        temperature
        if type(temperature) is float
        else _real("softmax", name, "temperature", temperature)
    )
    if not t > 0.0 or t == _INF:
        raise _fail("softmax", name, f"temperature must be a finite number > 0, got {t!r}")
    return opts, s, t


def softmax_probs(scores: Sequence[float], temperature: float) -> list[float]:
    """p_j = exp((s_j - max s) / T) / sum_k exp((s_k - max s) / T), the sum left to right."""
    top = max(scores)
    e = []  # one loop for e and its sum: cheaper than two comprehensions on the serving path
    total = 0.0
    for s in scores:
        x = _exp((s - top) / temperature)
        e.append(x)
        total += x
    return [x / total for x in e]


def epsilon_greedy_args(
    options: Any, scores: Any, epsilon: Any, name: str | None = None
) -> tuple[list[Any], list[float], float]:
    """Options, one finite score each, and epsilon in [0, 1]."""
    opts = _option_list("epsilon_greedy", name, options)
    s = _reals("epsilon_greedy", name, "scores", scores, len(opts))
    e = _real("epsilon_greedy", name, "epsilon", epsilon)
    if not 0.0 <= e <= 1.0:
        raise _fail("epsilon_greedy", name, f"epsilon must lie in [0, 1], got {e!r}")
    return opts, s, e


def epsilon_greedy_probs(scores: Sequence[float], epsilon: float) -> list[float]:
    """epsilon / K for every option, plus (1 - epsilon) / |A| for each option in the argmax set A.

    K is the number of options; A the set of options whose score equals the maximum.
    """
    top = max(scores)
    explore = epsilon / len(scores)
    best = explore + (1.0 - epsilon) / scores.count(top)
    return [best if s == top else explore for s in scores]


def slate_args(
    options: Any, weights: Any, k: Any, name: str | None = None
) -> tuple[list[Any], list[float], int]:
    """Options, one finite weight >= 0 each with a finite sum, and 1 <= k <= the number of
    options with weight > 0."""
    opts = _option_list("slate", name, options)
    w = _reals("slate", name, "weights", weights, len(opts))
    kk = _integer("slate", name, "k", k)
    if kk < 1:
        raise _fail("slate", name, f"k must be at least 1, got {kk}")
    if min(w) < 0.0:
        raise _fail("slate", name, f"weights must be >= 0, got {min(w)!r}")
    positive = sum(1 for x in w if x > 0.0)
    if kk > positive:
        raise _fail(
            "slate",
            name,
            f"k ({kk}) exceeds the number of options with weight > 0 ({positive} of {len(opts)})",
        )
    total = 0.0
    for x in w:
        total += x
    if not _isfinite(total):
        raise _fail("slate", name, "the sum of the weights overflows; scale them down")
    return opts, w, kk


def plackett_luce(
    options: Sequence[T], weights: Sequence[float], k: int, pick: Pick
) -> tuple[list[T], list[float], float]:
    """k options without replacement: those chosen, the uniforms ``pick`` used, the probability.

    Each step's probabilities are the weights of the options left (in their original order)
    divided by their left-to-right sum; ``pick`` gets them and returns the position it chose
    and the uniform it used. The probability is the product of the chosen steps'
    probabilities, in order from 1.0.
    """
    remaining = list(range(len(options)))
    chosen: list[T] = []
    used: list[float] = []
    prob = 1.0
    for _ in range(k):
        total = 0.0
        for i in remaining:
            total += weights[i]
        step = [weights[i] / total for i in remaining]
        j, u = pick(step)
        used.append(u)
        prob *= step[j]
        chosen.append(options[remaining.pop(j)])
    return chosen, used, prob


def slate_probability(weights: Sequence[float], order: Sequence[int]) -> float:
    """The probability that a slate over ``weights`` picks the distinct indices ``order``."""
    picks = iter(order)
    taken: list[int] = []

    def pick(step: list[float]) -> tuple[int, float]:
        i = next(picks)
        j = i - sum(1 for t in taken if t < i)  # i's position among the indices left
        taken.append(i)
        return j, 0.0

    return plackett_luce(range(len(weights)), weights, len(order), pick)[2]


def uniform_args(low: Any, high: Any, name: str | None = None) -> tuple[float, float, float]:
    """Finite low < high with 1e-300 <= high - low < inf, and the density on [low, high]:
    1 / (high - low)."""
    lo = _real("uniform", name, "low", low)
    hi = _real("uniform", name, "high", high)
    if lo >= hi:
        raise _fail("uniform", name, f"low ({lo!r}) must be below high ({hi!r})")
    width = hi - lo
    if not MIN_SCALE <= width < math.inf:
        raise _fail("uniform", name, f"high - low ({width!r}) must lie in [1e-300, inf)")
    return lo, hi, 1.0 / width


def normal_args(mean: Any, sd: Any, name: str | None = None) -> tuple[float, float]:
    """Finite mean, sd > 0, with every value and density within the doubles."""
    m = _real("normal", name, "mean", mean)
    s = _real("normal", name, "sd", sd)
    if s <= 0.0:
        raise _fail("normal", name, f"sd must be > 0, got {s!r}")
    if not _isfinite(abs(m) + Z_LIMIT * s) or not s * SQRT_2PI >= MIN_SCALE:
        raise _fail(
            "normal",
            name,
            f"mean ({m!r}) and sd ({s!r}) leave the range of doubles: |mean| + "
            f"{Z_LIMIT} * sd must be finite and sd * sqrt(2 pi) at least {MIN_SCALE}",
        )
    return m, s


def normal_pdf(x: float, mean: float, sd: float) -> float:
    """Density of N(mean, sd^2) at x: exp(-0.5 * z * z) / (sd * sqrt(2 pi)), z = (x - mean) / sd."""
    z = (x - mean) / sd
    return _exp(-0.5 * z * z) / (sd * SQRT_2PI)


def lognormal_args(mu: Any, sigma: Any, name: str | None = None) -> tuple[float, float]:
    """Finite mu, sigma > 0, with every value and density within the doubles."""
    m = _real("lognormal", name, "mu", mu)
    s = _real("lognormal", name, "sigma", sigma)
    if s <= 0.0:
        raise _fail("lognormal", name, f"sigma must be > 0, got {s!r}")
    if not abs(m) + Z_LIMIT * s <= LOG_LIMIT or not (
        s * _exp(m - Z_LIMIT * s) * SQRT_2PI >= MIN_SCALE
    ):
        raise _fail(
            "lognormal",
            name,
            f"mu ({m!r}) and sigma ({s!r}) leave the range of doubles: |mu| + "
            f"{Z_LIMIT} * sigma must be at most {LOG_LIMIT} and sigma * exp(mu - "
            f"{Z_LIMIT} * sigma) * sqrt(2 pi) at least {MIN_SCALE}",
        )
    return m, s


def lognormal_pdf(x: float, mu: float, sigma: float) -> float:
    """Density of the log-normal at x: exp(-0.5 * z * z) / (sigma * x * sqrt(2 pi)).

    z = (ln x - mu) / sigma; 0 for x <= 0.
    """
    if x <= 0.0:
        return 0.0
    z = (_log(x) - mu) / sigma
    return _exp(-0.5 * z * z) / (sigma * x * SQRT_2PI)


def _shares_mapping(shares: Any) -> Mapping[Any, Any]:
    if not isinstance(shares, Mapping):
        raise _fail("bucket", None, "shares must be a mapping of arm to share")
    return shares


def _bucket_shares(shares: Mapping[Any, Any]) -> tuple[list[Any], list[float]]:
    arms = _collection("bucket", None, "shares", list(shares))
    if not arms:
        raise _fail("bucket", None, "shares is empty")
    p = _reals("bucket", None, "shares", list(shares.values()), len(arms))
    _check_probs("bucket", None, "shares", p)
    return arms, p


def bucket_args(unit: Any, shares: Any, salt: Any) -> tuple[list[Any], list[float], bytes]:
    """A non-empty unit, shares summing to 1 (the arms are their keys), a 1 to 64 byte salt.

    Returns the arms, their shares and the salt as bytes (a text salt is its UTF-8 bytes).
    """
    if not isinstance(unit, str) or not unit:
        raise _fail("bucket", None, f"unit must be a non-empty string, got {unit!r}")
    mapping = _shares_mapping(shares)
    key = salt.encode() if isinstance(salt, str) else salt
    if not isinstance(key, bytes) or not 1 <= len(key) <= 64:
        raise _fail("bucket", None, "salt must be 1 to 64 bytes (or a string that encodes to them)")
    return (*_bucket_shares(mapping), key)


# -- by kind, from recorded arguments ---------------------------------------------------------
def _recorded(kind: str, args: Any, name: str | None) -> Mapping[str, Any]:
    """A recorded ``args`` mapping, checked to hold every argument ``kind`` needs."""
    params = _PARAMETERS.get(kind)
    if params is None:
        raise _fail(kind, name, "not a draw kind of draw specification v1")
    if not isinstance(args, Mapping):
        raise _fail(kind, name, f"the arguments must be a mapping, got {type(args).__name__}")
    missing = [p for p in params if p not in args]
    if missing:
        raise _fail(kind, name, f"the arguments lack {', '.join(missing)}")
    return args


def option_probabilities(
    kind: str, args: Mapping[str, Any], *, name: str | None = None
) -> tuple[list[Any], list[float]]:
    """The outcomes of a draw of an option kind and their probabilities, in order.

    categorical: its options and probs; softmax and epsilon_greedy: their options and the
    kind's probabilities; bernoulli: [True, False] and [p, 1 - p]; bucket: the arms and shares.
    """
    a = _recorded(kind, args, name)
    if kind == "categorical":
        return categorical_args(a["options"], a["probs"], name)
    if kind == "softmax":
        opts, s, t = softmax_args(a["options"], a["scores"], a["temperature"], name)
        return opts, softmax_probs(s, t)
    if kind == "epsilon_greedy":
        opts, s, e = epsilon_greedy_args(a["options"], a["scores"], a["epsilon"], name)
        return opts, epsilon_greedy_probs(s, e)
    if kind == "bernoulli":
        return [True, False], bernoulli_probs(a["p"], name)
    if kind == "bucket":
        return _bucket_shares(_shares_mapping(a["shares"]))
    raise _fail(kind, name, "its outcomes are not a list of options")


def probability_among(options: Sequence[Any], probs: Sequence[float], value: Any) -> float:
    """The probability of ``value`` when one of ``options`` is picked with ``probs``: the sum
    (math.fsum) over the options with its canonical JSON."""
    if all(isinstance(o, str) for o in options) and len(set(options)) == len(options):
        return next((p for o, p in zip(options, probs, strict=True) if o == value), 0.0)
    key = to_json(value, "value")
    return math.fsum(p for o, p in zip(options, probs, strict=True) if to_json(o, "option") == key)


def probability(
    kind: str, args: Mapping[str, Any], value: Any, *, name: str | None = None
) -> float | None:
    """The probability that a draw of a discrete kind with these arguments returns ``value``.

    integers: 1 / (high - low) for an int in [low, high), else 0. slate: the product of the
    step probabilities of the items of ``value`` in order (0 for a value that is not k distinct
    options); None when options repeat (several orders of options give the same slate). Other
    kinds: see ``probability_among`` and ``option_probabilities``.
    """
    if kind == "integers":
        a = _recorded(kind, args, name)
        low, high, each = integers_args(a["low"], a["high"], name)
        return each if type(value) is int and low <= value < high else 0.0
    if kind == "slate":
        a = _recorded(kind, args, name)
        options, weights, k = slate_args(a["options"], a["weights"], a["k"], name)
        keys = [to_json(o, "option") for o in options]
        if len(set(keys)) != len(keys):
            return None
        if not isinstance(value, list) or len(value) != k:
            return 0.0
        where = {key: i for i, key in enumerate(keys)}
        order = [where.get(to_json(item, "slate item"), -1) for item in value]
        if -1 in order or len(set(order)) != k:
            return 0.0
        return slate_probability(weights, order)
    return probability_among(*option_probabilities(kind, args, name=name), value)


def density(kind: str, args: Mapping[str, Any], x: Any, *, name: str | None = None) -> float:
    """The density at ``x`` of a continuous draw (uniform, normal, lognormal) with these
    arguments; 0 outside its support and for an ``x`` that is not a real number."""
    if kind not in CONTINUOUS_KINDS:
        raise _fail(kind, name, "not a continuous draw: it has no density")
    a = _recorded(kind, args, name)
    number = not isinstance(x, bool) and isinstance(x, (int, float))
    if kind == "uniform":
        low, high, inside = uniform_args(a["low"], a["high"], name)
        return inside if number and low <= x <= high else 0.0
    if kind == "normal":
        mean, sd = normal_args(a["mean"], a["sd"], name)
        return normal_pdf(x, mean, sd) if number else 0.0
    mu, sigma = lognormal_args(a["mu"], a["sigma"], name)
    return lognormal_pdf(x, mu, sigma) if number else 0.0


def _json_key(value: Any) -> str:
    return to_json(value, "value")


def distribution(
    kind: str,
    args: Mapping[str, Any],
    key: Callable[[Any], str] = _json_key,
    *,
    name: str | None = None,
) -> dict[str, float] | None:
    """The probability of every distinct value of a draw of an option kind, by ``key(value)``
    (canonical JSON by default); options with the same key add up, left to right.

    None for the other kinds: the outcomes of integers and slate are not listed in their
    arguments, and continuous kinds have densities.
    """
    if kind not in OPTION_KINDS:
        return None
    options, probs = option_probabilities(kind, args, name=name)
    dist: dict[str, float] = {}
    for option, p in zip(options, probs, strict=True):
        k = key(option)
        dist[k] = dist.get(k, 0.0) + p
    return dist


def decision_propensity(
    draws: Sequence[D], single: bool, prob: Callable[[D], float]
) -> tuple[float, str]:
    """The propensity a decision records, and its kind, from its draws (``prob`` of each).

    1.0 without draws; the draw's prob when ``single`` (the decision made one draw and
    returned its value): "exact"; otherwise the product in draw order from 1.0: "path".
    """
    if not draws:
        return 1.0, "exact"
    if single:
        return prob(draws[0]), "exact"
    prop = 1.0
    for d in draws:
        prop *= prob(d)
    return prop, "path"
