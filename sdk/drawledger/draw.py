"""The injected ``Draw``: every random draw of a decision, by draw specification v1.

A ``Draw`` consumes the decision's uniform stream in order and keeps, for each draw, its kind,
name, arguments (keyed by parameter name), the uniforms it used, the realized value and its
probability (or density). docs/draw-spec.md states every formula and its float evaluation
order. The checks of the arguments and every probability and density come from
``drawledger._probability`` (the replay side computes them there too); this module turns
uniforms into values, by the picking rule and AS241. Validation errors name the draw and the
problem, and a draw that fails consumes no uniform and records nothing.
"""

from __future__ import annotations

import math
import struct
from collections.abc import Mapping, Sequence
from typing import Any, NamedTuple, TypeVar

from drawledger import _stream
from drawledger._normal import ppnd16
from drawledger._probability import (
    PROB_SUM_TOLERANCE,
    bernoulli_probs,
    bucket_args,
    categorical_args,
    epsilon_greedy_args,
    epsilon_greedy_probs,
    integers_args,
    lognormal_args,
    lognormal_pdf,
    normal_args,
    normal_pdf,
    plackett_luce,
    recordable_density,
    slate_args,
    softmax_args,
    softmax_probs,
    uniform_args,
)
from drawledger.exceptions import DrawArgumentError

__all__ = [
    "PROB_SUM_TOLERANCE",
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

# The largest double below 1: normal and lognormal use it in place of a uniform equal to 1.0.
BELOW_ONE = 1.0 - 2.0**-53

_SCALE = _stream.SCALE
_exp = math.exp
_word_at = struct.Struct("<Q").unpack_from  # one word of a block: no tuple of all eight


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


def _check_name(kind: str, name: Any) -> None:
    """A draw's ``name=``: a string or None (str subclasses pass here; others raise)."""
    if not isinstance(name, str):
        raise DrawArgumentError(
            f"{kind} draw: name must be a string or None, got {type(name).__name__} {name!r}"
        )


# -- the picking rule of the specification ----------------------------------------------------
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


class Draw:
    """Random draws of one decision, recorded in order.

    The SDK creates it and passes it to a decision function as the ``draw`` argument. Tests
    and other implementations can build one from a known seed with ``Draw(seed)`` and compare
    ``records``.
    """

    __slots__ = ("_block", "_bytes", "_n", "records", "seed")

    def __init__(self, seed: bytes | None = None) -> None:
        if seed is None:
            seed = _stream.new_seed()
        elif type(seed) is not bytes or len(seed) != _stream.SEED_BYTES:
            raise DrawArgumentError(f"seed must be {_stream.SEED_BYTES} bytes, got {seed!r}")
        self.seed = seed
        self.records: list[DrawRecord] = []
        self._n = 0  # uniforms used so far
        self._block = -1
        self._bytes = b""  # the current block of the stream

    # -- sources of randomness (replay overrides these) -------------------------------------
    def _uniform(self) -> float:
        """The next uniform of the decision's stream (uniform n is word n % 8 of block n // 8)."""
        n = self._n
        self._n = n + 1
        b = n >> 3
        if b != self._block:
            self._bytes = _stream.block_bytes(self.seed, b)
            self._block = b
        return ((_word_at(self._bytes, (n & 7) << 3)[0] >> 11) + 0.5) * _SCALE

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
        if name is not None and type(name) is not str:
            _check_name("categorical", name)
        opts, p = categorical_args(options, probs, name)
        j, u = self._pick(p)
        self._record("categorical", name, {"options": opts, "probs": p}, [u], opts[j], p[j])
        return opts[j]

    def bernoulli(self, p: float, *, name: str | None = None) -> bool:
        """True with probability ``p``: a categorical draw over [True, False] with [p, 1 - p]."""
        if name is not None and type(name) is not str:
            _check_name("bernoulli", name)
        probs = bernoulli_probs(p, name)
        j, u = self._pick(probs)
        value = j == 0
        self._record("bernoulli", name, {"p": probs[0]}, [u], value, probs[j])
        return value

    def integers(self, low: int, high: int, *, name: str | None = None) -> int:
        """A uniform integer in [low, high) (high exclusive); probability 1 / (high - low)."""
        if name is not None and type(name) is not str:
            _check_name("integers", name)
        lo, hi, prob = integers_args(low, high, name)
        j, u = self._pick_integer(hi - lo)
        value = lo + j
        self._record("integers", name, {"low": lo, "high": hi}, [u], value, prob)
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
        if name is not None and type(name) is not str:
            _check_name("softmax", name)
        opts, s, t = softmax_args(options, scores, temperature, name)
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
        if name is not None and type(name) is not str:
            _check_name("epsilon_greedy", name)
        opts, s, e = epsilon_greedy_args(options, scores, epsilon, name)
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
        if name is not None and type(name) is not str:
            _check_name("slate", name)
        opts, w, kk = slate_args(options, weights, k, name)
        chosen, used, prob = plackett_luce(opts, w, kk, self._pick)
        self._record("slate", name, {"options": opts, "weights": w, "k": kk}, used, chosen, prob)
        return chosen

    # -- continuous draws -----------------------------------------------------------------
    def uniform(self, low: float, high: float, *, name: str | None = None) -> float:
        """A real number uniform on [low, high]; density 1 / (high - low)."""
        if name is not None and type(name) is not str:
            _check_name("uniform", name)
        lo, hi, density = uniform_args(low, high, name)
        u = self._uniform()
        value = lo + (hi - lo) * u
        self._record("uniform", name, {"low": lo, "high": hi}, [u], value, density, True)
        return value

    def normal(self, mean: float, sd: float, *, name: str | None = None) -> float:
        """mean + sd * z with z = AS241 inverse normal CDF of one uniform; density at the value."""
        if name is not None and type(name) is not str:
            _check_name("normal", name)
        m, s = normal_args(mean, sd, name)
        u = self._uniform()
        value = m + s * ppnd16(u if u < 1.0 else BELOW_ONE)
        density = recordable_density("normal", name, value, normal_pdf(value, m, s))
        self._record("normal", name, {"mean": m, "sd": s}, [u], value, density, True)
        return value

    def lognormal(self, mu: float, sigma: float, *, name: str | None = None) -> float:
        """exp(mu + sigma * z) with z = AS241 inverse normal CDF of one uniform."""
        if name is not None and type(name) is not str:
            _check_name("lognormal", name)
        m, s = lognormal_args(mu, sigma, name)
        u = self._uniform()
        value = _exp(m + s * ppnd16(u if u < 1.0 else BELOW_ONE))
        density = recordable_density("lognormal", name, value, lognormal_pdf(value, m, s))
        self._record("lognormal", name, {"mu": m, "sigma": s}, [u], value, density, True)
        return value


def bucket_assign(
    unit: str, shares: Mapping[Any, float], salt: str | bytes
) -> tuple[Any, float, float, list[Any], list[float]]:
    """Hashed assignment of ``unit``: (arm, u, prob, arms, shares). No seed: same unit, same arm."""
    arms, p, key = bucket_args(unit, shares, salt)
    u = _stream.bucket_uniform(unit, key)
    j = categorical_index(p, u)
    return arms[j], u, p[j], arms, p
