"""The injected ``Draw``: every random draw of a decision, by draw specification v1.

A ``Draw`` consumes the decision's uniform stream in order and keeps, for each draw, its kind,
name, arguments, the uniforms it used, the realized value and its probability (or density).
Validation errors name the draw and the problem and leave nothing recorded.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any, NamedTuple, TypeVar

from drawledger import _stream
from drawledger._normal import ppnd16
from drawledger.exceptions import DrawArgumentError

__all__ = ["Draw", "DrawRecord", "bucket_assign", "categorical_index"]

T = TypeVar("T")

PROB_SUM_TOLERANCE = 1e-9
_SQRT_2PI = math.sqrt(2.0 * math.pi)


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


def _label(kind: str, name: str | None) -> str:
    return f"{kind} draw {name!r}" if name is not None else f"{kind} draw"


def _fail(kind: str, name: str | None, problem: str) -> DrawArgumentError:
    return DrawArgumentError(f"{_label(kind, name)}: {problem}")


def _finite(kind: str, name: str | None, label: str, x: Any) -> float:
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        raise _fail(kind, name, f"{label} must be a real number, got {x!r}")
    x = float(x)
    if not math.isfinite(x):
        raise _fail(kind, name, f"{label} must be finite, got {x!r}")
    return x


def _options(kind: str, name: str | None, options: Any) -> list[Any]:
    if isinstance(options, (str, bytes)) or not isinstance(options, Sequence):
        raise _fail(kind, name, f"options must be a list, got {type(options).__name__}")
    opts = list(options)
    if not opts:
        raise _fail(kind, name, "options is empty")
    return opts


def _numbers(kind: str, name: str | None, label: str, xs: Any, n: int) -> list[float]:
    if isinstance(xs, (str, bytes)) or not isinstance(xs, Sequence):
        raise _fail(kind, name, f"{label} must be a list of numbers, got {type(xs).__name__}")
    if len(xs) != n:
        raise _fail(kind, name, f"{label} has {len(xs)} entries but options has {n}")
    return [_finite(kind, name, f"{label}[{j}]", x) for j, x in enumerate(xs)]


def _check_probs(kind: str, name: str | None, probs: list[float]) -> None:
    total = 0.0
    for j, p in enumerate(probs):
        if p < 0.0:
            raise _fail(kind, name, f"probs[{j}] is negative ({p!r})")
        total += p
    if abs(total - 1.0) > PROB_SUM_TOLERANCE:
        raise _fail(kind, name, f"probs sum to {total!r}, not 1 (tolerance {PROB_SUM_TOLERANCE})")


def softmax_probs(scores: Sequence[float], temperature: float) -> list[float]:
    """p_j = exp((s_j - max s) / T) / sum_k exp((s_k - max s) / T), sums left to right."""
    top = max(scores)
    e = [math.exp((s - top) / temperature) for s in scores]
    total = 0.0
    for x in e:
        total += x
    return [x / total for x in e]


def epsilon_greedy_probs(scores: Sequence[float], epsilon: float) -> list[float]:
    """epsilon / K for every option, plus (1 - epsilon) / |A| for each option in the argmax set A."""
    k = len(scores)
    top = max(scores)
    best = sum(1 for s in scores if s == top)
    explore = epsilon / k
    exploit = (1.0 - epsilon) / best
    return [explore + exploit if s == top else explore for s in scores]


def normal_pdf(x: float, mean: float, sd: float) -> float:
    z = (x - mean) / sd
    return math.exp(-0.5 * z * z) / (sd * _SQRT_2PI)


def lognormal_pdf(x: float, mu: float, sigma: float) -> float:
    if x <= 0.0:
        return 0.0
    z = (math.log(x) - mu) / sigma
    return math.exp(-0.5 * z * z) / (sigma * x * _SQRT_2PI)


class Draw:
    """Random draws of one decision, recorded in order.

    The SDK creates it and passes it to a decision function as the ``draw`` argument; tests and
    other languages can build one from a known seed with ``Draw(seed)``.
    """

    __slots__ = ("_buffer", "_next_block", "records", "seed")

    def __init__(self, seed: bytes | None = None) -> None:
        if seed is None:
            seed = _stream.new_seed()
        elif not isinstance(seed, bytes) or len(seed) != _stream.SEED_BYTES:
            raise DrawArgumentError(f"seed must be {_stream.SEED_BYTES} bytes")
        self.seed = seed
        self.records: list[DrawRecord] = []
        self._buffer: list[float] = []
        self._next_block = 0

    # -- sources of randomness (replay overrides these) -------------------------------------
    def _uniform(self) -> float:
        """The next uniform of the decision's stream."""
        if not self._buffer:
            self._buffer = _stream.block(self.seed, self._next_block)
            self._buffer.reverse()
            self._next_block += 1
        return self._buffer.pop()

    def _pick(self, probs: list[float]) -> tuple[int, float]:
        """One categorical step: the chosen index and the uniform it used."""
        u = self._uniform()
        return categorical_index(probs, u), u

    def _pick_integer(self, n: int) -> tuple[int, float]:
        """floor(u * n), clamped to n - 1 against rounding, and the uniform used."""
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
        self.records.append(
            DrawRecord(len(self.records), name, kind, args, u, value, prob, is_density)
        )

    # -- discrete draws -------------------------------------------------------------------
    def categorical(
        self, options: Sequence[T], probs: Sequence[float], *, name: str | None = None
    ) -> T:
        """One option with the given probabilities (finite, >= 0, summing to 1 within 1e-9)."""
        opts = _options("categorical", name, options)
        p = _numbers("categorical", name, "probs", probs, len(opts))
        _check_probs("categorical", name, p)
        j, u = self._pick(p)
        self._record("categorical", name, {"options": opts, "probs": p}, [u], opts[j], p[j])
        return opts[j]

    def bernoulli(self, p: float, *, name: str | None = None) -> bool:
        """True with probability ``p`` (value = u < p)."""
        q = _finite("bernoulli", name, "p", p)
        if not 0.0 <= q <= 1.0:
            raise _fail("bernoulli", name, f"p must lie in [0, 1], got {q!r}")
        j, u = self._pick([q, 1.0 - q])
        value = j == 0
        self._record("bernoulli", name, {"p": q}, [u], value, q if value else 1.0 - q)
        return value

    def integers(self, low: int, high: int, *, name: str | None = None) -> int:
        """A uniform integer in [low, high) (high exclusive)."""
        for label, x in (("low", low), ("high", high)):
            if isinstance(x, bool) or not isinstance(x, int):
                raise _fail("integers", name, f"{label} must be an integer, got {x!r}")
        if low >= high:
            raise _fail("integers", name, f"low ({low}) must be below high ({high})")
        n = high - low
        j, u = self._pick_integer(n)
        value = low + j
        self._record("integers", name, {"low": low, "high": high}, [u], value, 1.0 / n)
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
        t = _finite("softmax", name, "temperature", temperature)
        if t <= 0.0:
            raise _fail("softmax", name, f"temperature must be > 0, got {t!r}")
        p = softmax_probs(s, t)
        if not all(math.isfinite(x) for x in p):
            raise _fail("softmax", name, "scores / temperature overflow; use a larger temperature")
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
        e = _finite("epsilon_greedy", name, "epsilon", epsilon)
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

        Each step is a categorical draw over the remaining options with their weights divided
        by the remaining total (Plackett-Luce sampling). The probability is the product of the
        step probabilities.
        """
        opts = _options("slate", name, options)
        w = _numbers("slate", name, "weights", weights, len(opts))
        if isinstance(k, bool) or not isinstance(k, int) or k < 1:
            raise _fail("slate", name, f"k must be a positive integer, got {k!r}")
        if any(x < 0.0 for x in w):
            raise _fail("slate", name, "weights must be >= 0")
        positive = sum(1 for x in w if x > 0.0)
        if k > positive:
            raise _fail(
                "slate", name, f"k ({k}) exceeds the number of options with weight > 0 ({positive})"
            )
        remaining = list(range(len(opts)))
        chosen: list[T] = []
        used: list[float] = []
        prob = 1.0
        for _ in range(k):
            total = 0.0
            for i in remaining:
                total += w[i]
            step = [w[i] / total for i in remaining]
            j, u = self._pick(step)
            used.append(u)
            prob *= step[j]
            chosen.append(opts[remaining.pop(j)])
        self._record("slate", name, {"options": opts, "weights": w, "k": k}, used, chosen, prob)
        return chosen

    # -- continuous draws -----------------------------------------------------------------
    def uniform(self, low: float, high: float, *, name: str | None = None) -> float:
        """A real number uniform on (low, high); density 1 / (high - low)."""
        lo = _finite("uniform", name, "low", low)
        hi = _finite("uniform", name, "high", high)
        if lo >= hi:
            raise _fail("uniform", name, f"low ({lo!r}) must be below high ({hi!r})")
        u = self._uniform()
        value = lo + (hi - lo) * u
        self._record("uniform", name, {"low": lo, "high": hi}, [u], value, 1.0 / (hi - lo), True)
        return value

    def normal(self, mean: float, sd: float, *, name: str | None = None) -> float:
        """mean + sd * z with z = AS241 inverse normal CDF of one uniform."""
        m = _finite("normal", name, "mean", mean)
        s = _finite("normal", name, "sd", sd)
        if s <= 0.0:
            raise _fail("normal", name, f"sd must be > 0, got {s!r}")
        u = self._uniform()
        value = m + s * ppnd16(u)
        density = normal_pdf(value, m, s)
        self._record("normal", name, {"mean": m, "sd": s}, [u], value, density, True)
        return value

    def lognormal(self, mu: float, sigma: float, *, name: str | None = None) -> float:
        """exp(mu + sigma * z) with z = AS241 inverse normal CDF of one uniform."""
        m = _finite("lognormal", name, "mu", mu)
        s = _finite("lognormal", name, "sigma", sigma)
        if s <= 0.0:
            raise _fail("lognormal", name, f"sigma must be > 0, got {s!r}")
        u = self._uniform()
        value = math.exp(m + s * ppnd16(u))
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
    arms = _options("bucket", None, list(shares))
    p = _numbers("bucket", None, "shares", list(shares.values()), len(arms))
    _check_probs("bucket", None, p)
    u = _stream.bucket_uniform(unit, key)
    j = categorical_index(p, u)
    return arms[j], u, p[j], arms, p
