"""The injected ``Draw``: every random draw of a decision, by draw specification v1.

A ``Draw`` consumes the decision's uniform stream in order and keeps, for each draw, its kind,
name, arguments (keyed by parameter name), the uniforms it used, the realized value and its
probability (or density). docs/draw-spec.md states every formula and its float evaluation
order; the code below follows it operation by operation. Validation errors name the draw and
the problem, and a draw that fails consumes no uniform and records nothing.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Collection, Mapping, Sequence
from typing import Any, NamedTuple, TypeVar

from drawledger import _stream
from drawledger._normal import ppnd16
from drawledger.exceptions import DrawArgumentError

__all__ = [
    "Draw",
    "DrawRecord",
    "bucket_assign",
    "categorical_index",
    "epsilon_greedy_probs",
    "lognormal_pdf",
    "normal_pdf",
    "softmax_probs",
]

T = TypeVar("T")

PROB_SUM_TOLERANCE = 1e-9
# The largest double below 1: normal and lognormal use it in place of a uniform equal to 1.0.
BELOW_ONE = 1.0 - 2.0**-53
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

_SCALE = _stream.SCALE
_exp = math.exp
_log = math.log
_isfinite = math.isfinite
_INF = math.inf
_PLAIN = (list, tuple)  # taken as they are; other collections go through the full checks


class DrawRecord(NamedTuple):
    """One draw as recorded: the row of the ``draws`` table before JSON encoding."""

    idx: int
    name: str | None
    kind: str
    args: dict[str, Any]
    u: list[float]
    value: Any
    prob: float
    is_density: bool


_new_record = tuple.__new__  # DrawRecord without the Python-level __new__ of NamedTuple


# -- the formulas of the specification --------------------------------------------------------
def categorical_index(probs: Sequence[float], u: float) -> int:
    """The first j with u < c_j (running left-to-right float sum of probs); else the last j > 0."""
    c = 0.0
    for j, p in enumerate(probs):
        c += p
        if u < c:
            return j
    for j in range(len(probs) - 1, -1, -1):
        if probs[j] > 0.0:
            return j
    raise AssertionError("validated probabilities have a positive entry")  # pragma: no cover


def softmax_probs(scores: Sequence[float], temperature: float) -> list[float]:
    """p_j = exp((s_j - max s) / T) / sum_k exp((s_k - max s) / T), the sum left to right."""
    top = max(scores)
    e = [_exp((s - top) / temperature) for s in scores]
    total = 0.0
    for x in e:
        total += x
    return [x / total for x in e]


def epsilon_greedy_probs(scores: Sequence[float], epsilon: float) -> list[float]:
    """epsilon / K for every option, plus (1 - epsilon) / |A| for each option in the argmax set A.

    K is the number of options; A the set of options whose score equals the maximum.
    """
    top = max(scores)
    explore = epsilon / len(scores)
    best = explore + (1.0 - epsilon) / scores.count(top)
    return [best if s == top else explore for s in scores]


def normal_pdf(x: float, mean: float, sd: float) -> float:
    """Density of N(mean, sd^2) at x: exp(-0.5 * z * z) / (sd * sqrt(2 pi)), z = (x - mean) / sd."""
    z = (x - mean) / sd
    return _exp(-0.5 * z * z) / (sd * SQRT_2PI)


def lognormal_pdf(x: float, mu: float, sigma: float) -> float:
    """Density of the log-normal at x: exp(-0.5 * z * z) / (sigma * x * sqrt(2 pi)).

    z = (ln x - mu) / sigma; 0 for x <= 0.
    """
    if x <= 0.0:
        return 0.0
    z = (_log(x) - mu) / sigma
    return _exp(-0.5 * z * z) / (sigma * x * SQRT_2PI)


# -- validation ---------------------------------------------------------------------------------
def _fail(kind: str, name: str | None, problem: str) -> DrawArgumentError:
    label = f"{kind} draw {name!r}" if name is not None else f"{kind} draw"
    return DrawArgumentError(f"{label}: {problem}")


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


def _options(kind: str, name: str | None, options: Any) -> list[Any]:
    opts = list(options) if type(options) in _PLAIN else _collection(kind, name, "options", options)
    if not opts:
        raise _fail(kind, name, "options is empty")
    return opts


def _numbers(kind: str, name: str | None, label: str, xs: Any, n: int) -> list[float]:
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


class Draw:
    """Random draws of one decision, recorded in order.

    The SDK creates it and passes it to a decision function as the ``draw`` argument. Tests
    and other implementations can build one from a known seed with ``Draw(seed)`` and compare
    ``records``.
    """

    __slots__ = ("_block", "_n", "_words", "records", "seed")

    def __init__(self, seed: bytes | None = None) -> None:
        if seed is None:
            seed = _stream.new_seed()
        elif type(seed) is not bytes or len(seed) != _stream.SEED_BYTES:
            raise DrawArgumentError(f"seed must be {_stream.SEED_BYTES} bytes, got {seed!r}")
        self.seed = seed
        self.records: list[DrawRecord] = []
        self._n = 0  # uniforms used so far
        self._block = -1
        self._words: tuple[int, ...] = ()

    # -- sources of randomness (replay overrides these) -------------------------------------
    def _uniform(self) -> float:
        """The next uniform of the decision's stream (uniform n is word n % 8 of block n // 8)."""
        n = self._n
        self._n = n + 1
        b = n >> 3
        if b != self._block:
            self._words = _stream.words(self.seed, b)
            self._block = b
        return ((self._words[n & 7] >> 11) + 0.5) * _SCALE

    def _pick(self, probs: list[float]) -> tuple[int, float]:
        """One categorical step: the chosen index and the uniform it used."""
        u = self._uniform()
        c = 0.0
        for j, p in enumerate(probs):  # categorical_index, inlined: this is the serving path
            c += p
            if u < c:
                return j, u
        return categorical_index(probs, u), u

    def _pick_integer(self, n: int) -> tuple[int, float]:
        """floor(u * n), clamped to n - 1 (u can be 1.0), and the uniform used."""
        u = self._uniform()
        return min(math.floor(u * n), n - 1), u

    def _record(
        self,
        kind: str,
        name: str | None,
        args: dict[str, Any],
        u: list[float],
        value: Any,
        prob: float,
        is_density: bool = False,
    ) -> None:
        records = self.records
        records.append(
            _new_record(DrawRecord, (len(records), name, kind, args, u, value, prob, is_density))
        )

    # -- discrete draws -------------------------------------------------------------------
    def categorical(
        self, options: Sequence[T], probs: Sequence[float], *, name: str | None = None
    ) -> T:
        """One option with the given probabilities (finite, >= 0, summing to 1 within 1e-9)."""
        opts = _options("categorical", name, options)
        p = _numbers("categorical", name, "probs", probs, len(opts))
        _check_probs("categorical", name, "probs", p)
        j, u = self._pick(p)
        self._record("categorical", name, {"options": opts, "probs": p}, [u], opts[j], p[j])
        return opts[j]

    def bernoulli(self, p: float, *, name: str | None = None) -> bool:
        """True with probability ``p``: a categorical draw over [True, False] with [p, 1 - p]."""
        q = _real("bernoulli", name, "p", p)
        if not 0.0 <= q <= 1.0:
            raise _fail("bernoulli", name, f"p must lie in [0, 1], got {q!r}")
        j, u = self._pick([q, 1.0 - q])
        value = j == 0
        self._record("bernoulli", name, {"p": q}, [u], value, q if value else 1.0 - q)
        return value

    def integers(self, low: int, high: int, *, name: str | None = None) -> int:
        """A uniform integer in [low, high) (high exclusive); probability 1 / (high - low)."""
        lo = _integer("integers", name, "low", low)
        hi = _integer("integers", name, "high", high)
        if lo >= hi:
            raise _fail("integers", name, f"low ({lo}) must be below high ({hi})")
        n = hi - lo
        if n > INT_RANGE_LIMIT:
            raise _fail("integers", name, f"high - low ({n}) exceeds 2**53")
        if lo < -(2**63) or hi > 2**63:
            raise _fail("integers", name, "low and high must lie within [-2**63, 2**63]")
        j, u = self._pick_integer(n)
        value = lo + j
        self._record("integers", name, {"low": lo, "high": hi}, [u], value, 1.0 / n)
        return value

    def softmax(
        self,
        options: Sequence[T],
        scores: Sequence[float],
        temperature: float = 1.0,
        *,
        name: str | None = None,
    ) -> T:
        """One option with probability proportional to exp(score / temperature)."""
        opts = _options("softmax", name, options)
        s = _numbers("softmax", name, "scores", scores, len(opts))
        t = (
            temperature
            if type(temperature) is float
            else _real("softmax", name, "temperature", temperature)
        )
        if not t > 0.0 or t == _INF:
            raise _fail("softmax", name, f"temperature must be a finite number > 0, got {t!r}")
        p = softmax_probs(s, t)
        j, u = self._pick(p)
        args = {"options": opts, "scores": s, "temperature": t}
        self._record("softmax", name, args, [u], opts[j], p[j])
        return opts[j]

    def epsilon_greedy(
        self,
        options: Sequence[T],
        scores: Sequence[float],
        epsilon: float,
        *,
        name: str | None = None,
    ) -> T:
        """The best-scoring option (ties share) with probability 1 - epsilon, else any option."""
        opts = _options("epsilon_greedy", name, options)
        s = _numbers("epsilon_greedy", name, "scores", scores, len(opts))
        e = _real("epsilon_greedy", name, "epsilon", epsilon)
        if not 0.0 <= e <= 1.0:
            raise _fail("epsilon_greedy", name, f"epsilon must lie in [0, 1], got {e!r}")
        p = epsilon_greedy_probs(s, e)
        j, u = self._pick(p)
        args = {"options": opts, "scores": s, "epsilon": e}
        self._record("epsilon_greedy", name, args, [u], opts[j], p[j])
        return opts[j]

    def slate(
        self,
        options: Sequence[T],
        weights: Sequence[float],
        k: int,
        *,
        name: str | None = None,
    ) -> list[T]:
        """An ordered list of ``k`` distinct options, drawn one by one without replacement.

        Each step is a categorical draw over the remaining options (in their original order)
        with their weights divided by the remaining total (Plackett-Luce sampling). The
        probability is the product of the step probabilities.
        """
        opts = _options("slate", name, options)
        w = _numbers("slate", name, "weights", weights, len(opts))
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
                f"k ({kk}) exceeds the number of options with weight > 0 ({positive} "
                f"of {len(opts)})",
            )
        total = 0.0
        for x in w:
            total += x
        if not _isfinite(total):
            raise _fail("slate", name, "the sum of the weights overflows; scale them down")
        remaining = list(range(len(opts)))
        chosen: list[Any] = []
        used: list[float] = []
        prob = 1.0
        for _ in range(kk):
            total = 0.0
            for i in remaining:
                total += w[i]
            step = [w[i] / total for i in remaining]
            j, u = self._pick(step)
            used.append(u)
            prob *= step[j]
            chosen.append(opts[remaining.pop(j)])
        self._record("slate", name, {"options": opts, "weights": w, "k": kk}, used, chosen, prob)
        return chosen

    # -- continuous draws -----------------------------------------------------------------
    def uniform(self, low: float, high: float, *, name: str | None = None) -> float:
        """A real number uniform on [low, high]; density 1 / (high - low)."""
        lo = _real("uniform", name, "low", low)
        hi = _real("uniform", name, "high", high)
        if lo >= hi:
            raise _fail("uniform", name, f"low ({lo!r}) must be below high ({hi!r})")
        width = hi - lo
        if not MIN_SCALE <= width < math.inf:
            raise _fail("uniform", name, f"high - low ({width!r}) must lie in [1e-300, inf)")
        u = self._uniform()
        value = lo + width * u
        self._record("uniform", name, {"low": lo, "high": hi}, [u], value, 1.0 / width, True)
        return value

    def normal(self, mean: float, sd: float, *, name: str | None = None) -> float:
        """mean + sd * z with z = AS241 inverse normal CDF of one uniform; density at the value."""
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
        u = self._uniform()
        value = m + s * ppnd16(u if u < 1.0 else BELOW_ONE)
        density = normal_pdf(value, m, s)
        self._record("normal", name, {"mean": m, "sd": s}, [u], value, density, True)
        return value

    def lognormal(self, mu: float, sigma: float, *, name: str | None = None) -> float:
        """exp(mu + sigma * z) with z = AS241 inverse normal CDF of one uniform."""
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
        u = self._uniform()
        value = _exp(m + s * ppnd16(u if u < 1.0 else BELOW_ONE))
        density = lognormal_pdf(value, m, s)
        self._record("lognormal", name, {"mu": m, "sigma": s}, [u], value, density, True)
        return value


def bucket_assign(
    unit: str, shares: Mapping[Any, float], salt: str | bytes
) -> tuple[Any, float, float, list[Any], list[float]]:
    """Hashed assignment of ``unit``: (arm, u, prob, arms, shares). No seed: same unit, same arm."""
    if not isinstance(unit, str) or not unit:
        raise _fail("bucket", None, f"unit must be a non-empty string, got {unit!r}")
    if not isinstance(shares, Mapping):
        raise _fail("bucket", None, "shares must be a mapping of arm to share")
    key = salt.encode() if isinstance(salt, str) else salt
    if not isinstance(key, bytes) or not 1 <= len(key) <= 64:
        raise _fail("bucket", None, "salt must be 1 to 64 bytes (or a string that encodes to them)")
    arms = _collection("bucket", None, "shares", list(shares))
    if not arms:
        raise _fail("bucket", None, "shares is empty")
    p = _numbers("bucket", None, "shares", list(shares.values()), len(arms))
    _check_probs("bucket", None, "shares", p)
    u = _stream.bucket_uniform(unit, key)
    j = categorical_index(p, u)
    return arms[j], u, p[j], arms, p
