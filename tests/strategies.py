"""Hypothesis strategies shared by the test modules (the one place they are defined)."""

from __future__ import annotations

import math
from typing import Any

import orjson
from hypothesis import strategies as st

seeds = st.binary(min_size=16, max_size=16)
finite = st.floats(allow_nan=False, allow_infinity=False, width=64)
probabilities = st.floats(min_value=0.0, max_value=1.0, allow_nan=False)
json_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**53), max_value=2**53),
    finite,
    st.text(max_size=20),
)
json_values = st.recursive(
    json_scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=8), inner, max_size=4)
    ),
    max_leaves=12,
)


@st.composite
def prob_vectors(draw: st.DrawFn, min_size: int = 1, max_size: int = 8) -> list[float]:
    """Non-negative weights normalized to sum to 1 (within float rounding)."""
    weights = draw(
        st.lists(st.floats(0.0, 1e6, allow_nan=False), min_size=min_size, max_size=max_size).filter(
            lambda w: sum(w) > 0
        )
    )
    total = sum(weights)
    return [w / total for w in weights]


# -- ledger rows (round trips across sinks) -------------------------------------------------
# PostgreSQL text cannot hold NUL characters (the SDK refuses them), and lone surrogates are
# not text that UTF-8 can encode: plain text columns leave both out.
storable_chars = st.characters(exclude_categories=("Cs",), exclude_characters="\x00")
plain_text = st.text(storable_chars, max_size=12)
stream_names = st.one_of(
    st.text(storable_chars, min_size=1, max_size=12),
    st.sampled_from([".", "..", "_hidden", "a/b", "recipe-card", "x" * 300, "é" * 80]),
)
json_texts = json_values.map(lambda v: orjson.dumps(v).decode())
draw_specs = st.tuples(
    st.none() | plain_text,  # name
    st.sampled_from(["categorical", "bernoulli", "uniform", "normal", "slate"]),  # kind
    json_texts,  # args
    json_texts,  # u
    json_texts,  # value
    finite,  # prob (or density)
    st.booleans(),  # is_density
)
decision_specs = st.tuples(
    st.just("d"),
    stream_names,
    st.none() | plain_text,  # unit
    finite,  # ts
    st.none() | plain_text,  # fn
    json_texts,  # inputs
    json_texts,  # action
    finite,  # propensity
    st.sampled_from(["exact", "path"]),
    st.none() | st.binary(min_size=16, max_size=16).map(bytes.hex),  # seed
    st.lists(draw_specs, max_size=3),
)
outcome_specs = st.tuples(st.just("o"), plain_text, finite, finite)  # name, value, ts
record_specs = st.lists(st.one_of(decision_specs, outcome_specs), min_size=1, max_size=12)


# -- importance weights and rewards (estimators) ---------------------------------------------
@st.composite
def weighted_rewards(
    draw: st.DrawFn, min_size: int = 2, max_size: int = 60
) -> tuple[list[float], list[float]]:
    """Importance weights, 0 or in [1e-6, 50], with rewards in [0, 1], one pair per record."""
    n = draw(st.integers(min_size, max_size))
    weights = draw(
        st.lists(
            st.one_of(st.just(0.0), st.floats(1e-6, 50.0, allow_nan=False)),
            min_size=n, max_size=n,
        ).filter(lambda w: sum(w) > 0)
    )  # fmt: skip
    rewards = draw(st.lists(st.floats(0.0, 1.0, allow_nan=False), min_size=n, max_size=n))
    return weights, rewards


@st.composite
def chunk_cuts(draw: st.DrawFn, n: int) -> list[int]:
    """Sorted cut points splitting range(n) into chunks (some possibly empty)."""
    return sorted(draw(st.lists(st.integers(0, n), max_size=6)))


# -- draw arguments (fuzzing the draw engine) ------------------------------------------------
labels = st.text(st.characters(codec="utf-8", blacklist_characters="\x00"), max_size=6)
scores = st.floats(-1e6, 1e6, allow_nan=False) | finite


@st.composite
def option_lists(draw: st.DrawFn, min_size: int = 1, max_size: int = 8) -> list[str]:
    """Distinct option labels."""
    return draw(st.lists(labels, min_size=min_size, max_size=max_size, unique=True))


@st.composite
def valid_draws(draw: st.DrawFn) -> tuple[str, dict[str, Any]]:
    """A draw kind with arguments that satisfy every rule of draw specification v1."""
    kind = draw(st.sampled_from(["categorical", "bernoulli", "uniform", "integers", "normal",
                                 "lognormal", "softmax", "epsilon_greedy", "slate"]))  # fmt: skip
    if kind == "bernoulli":
        return kind, {"p": draw(probabilities)}
    if kind == "uniform":
        low = draw(finite)
        high = draw(finite.filter(lambda h: h > low and 1e-300 <= h - low < math.inf))
        return kind, {"low": low, "high": high}
    if kind == "integers":
        n = draw(st.integers(1, 2**53))
        low = draw(st.integers(-(2**63), 2**63 - n))
        return kind, {"low": low, "high": low + n}
    if kind == "normal":
        sd = draw(st.floats(1e-290, 1e290))
        mean = draw(st.floats(-1e300, 1e300).filter(lambda m: math.isfinite(abs(m) + 8.5 * sd)))
        return kind, {"mean": mean, "sd": sd}
    if kind == "lognormal":
        sigma = draw(st.floats(1e-12, 80.0))
        limit = 700.0 - 8.5 * sigma
        smallest = 1e-300 / (sigma * math.sqrt(2 * math.pi))  # the density limit of the spec
        mu = draw(st.floats(-limit, limit).filter(lambda m: math.exp(m - 8.5 * sigma) > smallest))
        return kind, {"mu": mu, "sigma": sigma}
    options = draw(option_lists())
    n = len(options)
    if kind == "categorical":
        return kind, {"options": options, "probs": draw(prob_vectors(n, n))}
    if kind in ("softmax", "epsilon_greedy"):
        values = draw(st.lists(scores, min_size=n, max_size=n))
        if kind == "softmax":
            temperature = draw(st.floats(1e-300, 1e300))
            return kind, {"options": options, "scores": values, "temperature": temperature}
        return kind, {"options": options, "scores": values, "epsilon": draw(probabilities)}
    weights = draw(
        st.lists(st.one_of(st.just(0.0), st.floats(0.0, 1e300)), min_size=n, max_size=n)
        .filter(lambda w: any(x > 0 for x in w) and math.isfinite(sum(w)))
    )  # fmt: skip
    k = draw(st.integers(1, sum(1 for x in weights if x > 0)))
    return kind, {"options": options, "weights": weights, "k": k}


# Anything a caller might pass by mistake: wrong types, NaN, infinities, huge integers, sets.
junk = st.one_of(
    json_values,
    st.floats(),
    st.integers(),
    st.sets(st.integers(), max_size=3),
    st.lists(st.floats(), max_size=4),
    st.lists(st.one_of(st.floats(), st.integers(), st.text(max_size=2), st.none()), max_size=4),
    st.just(b"bytes"),
    st.builds(object),
)


@st.composite
def junk_draws(draw: st.DrawFn) -> tuple[str, dict[str, Any]]:
    """A draw kind with each argument either valid or junk."""
    kind, args = draw(valid_draws())
    return kind, {name: draw(st.one_of(st.just(value), junk)) for name, value in args.items()}


@st.composite
def small_slates(draw: st.DrawFn) -> dict[str, Any]:
    """slate arguments small enough to list every ordered slate (at most 5 options, k <= 3)."""
    options = draw(option_lists(max_size=5))
    weights = draw(
        st.lists(st.one_of(st.just(0.0), st.floats(1e-3, 1e3)), min_size=len(options),
                 max_size=len(options)).filter(lambda w: any(x > 0 for x in w))
    )  # fmt: skip
    k = draw(st.integers(1, min(3, sum(1 for x in weights if x > 0))))
    return {"options": options, "weights": weights, "k": k}


@st.composite
def bucket_shares(draw: st.DrawFn) -> dict[str, float]:
    """Shares of a bucket draw: distinct arms with shares summing to 1 (within rounding)."""
    arms = draw(option_lists())
    return dict(zip(arms, draw(prob_vectors(len(arms), len(arms))), strict=True))


# Pieces of text a ledger may hold to attack a terminal or a page: rich markup, emoji codes,
# escape sequences (CSI, OSC hyperlinks, C1 CSI), lone control characters, bidirectional
# overrides and isolates, line separators, a lone surrogate, HTML.
HOSTILE_PIECES = (
    "[/]", "[bold red]", "[link=https://example.invalid]", "price[eur]", ":warning:", "\x1b",
    "\x1b[2J", "\x1b[31m", "\x1b]8;;https://example.invalid\x07", "\x9b1m", "\r", "\n", "\t",
    "\x00", "\x07", "\x08", "\x7f", "\x85", "\u202e", "\u2066", "\u200f", "\u2028", "\ufeff",
    "\ud800", "<script>", "&amp;", "$x$", "\\",
)  # fmt: skip
hostile_text = st.lists(
    st.one_of(st.sampled_from(HOSTILE_PIECES), st.text(min_size=1, max_size=3)),
    min_size=1,
    max_size=4,
).map("".join)
# What a damaged ledger can hand a reader in any column (SQLite's flexible typing, hand edits).
stored_values = st.one_of(
    st.none(), st.booleans(), st.integers(-(2**63), 2**63 - 1), finite, st.text(max_size=8),
    st.binary(max_size=8),
)  # fmt: skip
