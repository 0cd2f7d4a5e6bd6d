"""Synthetic ledgers for the audit tests: the grocery scenario's streams, built fast.

Each builder returns ``(decisions, draws)`` DataFrames in the ledger's column layout (JSON text
as the SDK writes it), drawn with numpy in one go instead of calling decision functions
100,000 times. Uniforms use the draw specification's mapping ((x >> 11) + 0.5) * 2**-53 of
64-bit words, so they have the resolution of real ones. A builder takes the distribution that
is *declared* and, separately, the one that is *really* drawn, so the same code makes correct
streams (calibration) and faulty ones (power).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import orjson
import pandas as pd
from scipy import special

from drawledger import _stream
from drawledger._records import DECISION_COLUMNS, DRAW_COLUMNS
from drawledger.draw import softmax_probs

START = 1_767_225_600.0  # 2026-01-01T00:00:00Z
CARDS = [
    "one-pot-pasta",
    "green-curry",
    "taco-night",
    "lentil-soup",
    "sheet-pan-salmon",
    "veggie-stir-fry",
]
RELEVANCE = [1.6, 0.7, 1.8, 1.2, 0.4, 1.0]


def uniforms(rng: np.random.Generator, n: int) -> np.ndarray:
    words = rng.integers(0, 2**64, size=n, dtype=np.uint64, endpoint=False)
    return ((words >> np.uint64(11)).astype(np.float64) + 0.5) * 2.0**-53


def pick(cum: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Row-wise categorical rule of the spec: the first j with u < c_j (cum: n x K)."""
    j = (u[:, None] >= cum).sum(axis=1)
    return np.minimum(j, cum.shape[1] - 1)


def _json(x: Any) -> str:
    return orjson.dumps(x).decode()


def tables(
    stream: str,
    kind: str,
    args: Sequence[str] | str,
    values: Sequence[str],
    probs: np.ndarray,
    u: np.ndarray | None,
    rng: np.random.Generator,
    *,
    ts: np.ndarray | None = None,
    units: Sequence[str] | None = None,
    inputs: Sequence[str] | str = "{}",
    seeded: bool = True,
    name: str | None = None,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Decisions and draws tables of ``n`` one-draw decisions of one stream."""
    n = len(values)
    ids = [f"{stream}.{i}" for i in range(n)]
    if ts is None:
        ts = START + np.arange(n) * 2.0
    seeds = rng.bytes(16 * n).hex() if seeded else None
    u_text = ["[]"] * n if u is None else [f"[{x!r}]" for x in u.tolist()]
    decisions = pd.DataFrame(
        {
            "decision_id": ids,
            "stream": stream,
            "unit": list(units) if units is not None else None,
            "ts": ts,
            "fn": "grocery:decide" if seeded else None,
            "code_hash": None,
            "inputs": inputs if isinstance(inputs, str) else list(inputs),
            "params": "{}",
            "action": list(values),
            "propensity": probs,
            "propensity_kind": "exact",
            "seed": [seeds[32 * i : 32 * i + 32] for i in range(n)] if seeds else None,
            "writer": f"synthetic-{stream}",
            "seq": np.arange(n),
            "prev_hash": None,
            "hash": "0",
        }
    )
    draws = pd.DataFrame(
        {
            "decision_id": ids,
            "idx": 0,
            "name": name,
            "kind": kind,
            "args": args if isinstance(args, str) else list(args),
            "u": u_text,
            "value": list(values),
            "prob": probs,
            "is_density": int(kind in ("uniform", "normal", "lognormal")),
        }
    )
    return decisions[list(DECISION_COLUMNS)], draws[list(DRAW_COLUMNS)]


def combine(*parts: tuple[pd.DataFrame, pd.DataFrame]) -> tuple[pd.DataFrame, pd.DataFrame]:
    return (
        pd.concat([p[0] for p in parts], ignore_index=True),
        pd.concat([p[1] for p in parts], ignore_index=True),
    )


def categorical(
    rng: np.random.Generator,
    n: int,
    declared: Sequence[float],
    drawn: Sequence[float] | None = None,
    *,
    options: Sequence[Any] | None = None,
    reuse: int = 1,
    stream: str = "slot-discount",
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Fixed-probability categorical draws; ``reuse`` > 1 uses each uniform that many times."""
    opts = list(options) if options is not None else list(range(len(declared)))
    real = np.asarray(drawn if drawn is not None else declared)
    u = uniforms(rng, -(-n // reuse)).repeat(reuse)[:n]
    j = pick(np.cumsum(real)[None, :], u)
    texts = [_json(o) for o in opts]
    args = _json({"options": opts, "probs": list(declared)})
    return tables(
        stream,
        "categorical",
        args,
        [texts[k] for k in j],
        np.asarray(declared)[j],
        u,
        rng,
        name="discount",
    )


def softmax(
    rng: np.random.Generator,
    n: int,
    temperature: float = 0.7,
    drawn_temperature: float | None = None,
    *,
    stream: str = "recipe-card",
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Recipe cards by softmax over relevance scores that vary per shopper."""
    scores = np.asarray(RELEVANCE)[None, :] + rng.normal(0.0, 0.5, size=(n, len(CARDS)))
    scores = np.round(scores, 6)
    hour = rng.integers(0, 24, size=n)
    real_t = drawn_temperature if drawn_temperature is not None else temperature
    z = (scores - scores.max(axis=1, keepdims=True)) / real_t
    real = np.exp(z) / np.exp(z).sum(axis=1, keepdims=True)
    u = uniforms(rng, n)
    j = pick(np.cumsum(real, axis=1), u)
    score_lists = scores.tolist()
    declared = np.array(
        [softmax_probs(s, temperature)[k] for s, k in zip(score_lists, j, strict=True)]
    )
    args = [_json({"options": CARDS, "scores": s, "temperature": temperature}) for s in score_lists]
    texts = [_json(c) for c in CARDS]
    inputs = [
        _json({"ctx": {"hour": int(h), "basket_items": int(b)}})
        for h, b in zip(hour, rng.integers(0, 30, size=n), strict=True)
    ]
    return tables(
        stream, "softmax", args, [texts[k] for k in j], declared, u, rng, inputs=inputs, name="card"
    )


def lognormal(
    rng: np.random.Generator,
    n: int,
    sigma: float = 0.35,
    drawn_sigma: float | None = None,
    *,
    mu: float = 0.0,
    stream: str = "reminder-delay",
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Reminder-delay multipliers: log-normal around 1."""
    u = uniforms(rng, n)
    real = drawn_sigma if drawn_sigma is not None else sigma
    x = np.exp(mu + real * special.ndtri(u))
    z = (np.log(x) - mu) / sigma
    density = np.exp(-0.5 * z * z) / (sigma * x * math.sqrt(2.0 * math.pi))
    args = _json({"mu": mu, "sigma": sigma})
    return tables(
        stream, "lognormal", args, [repr(v) for v in x.tolist()], density, u, rng, name="multiplier"
    )


def bucket(
    rng: np.random.Generator,
    n: int,
    *,
    shares: dict[str, float] | None = None,
    units: int | None = None,
    hour_swing: float = 0.0,
    stream: str = "checkout-test",
    salt: str = "checkout-2026",
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Hashed assignment of shoppers (some visit several times) over two days.

    ``hour_swing`` > 0 makes the real share of the last arm move with the hour of the day,
    by +- hour_swing around the declared share (a sinusoid, so the overall share stays put).
    """
    shares = shares or {"control": 0.5, "treatment": 0.5}
    arms, p = list(shares), np.asarray(list(shares.values()))
    who = rng.integers(0, units or n, size=n)
    ts = np.sort(START + rng.uniform(0.0, 2 * 86_400.0, size=n))
    names = [f"shopper-{k:07d}" for k in who]
    key = salt.encode()
    cache: dict[str, float] = {}
    u = np.array(
        [cache.get(s) or cache.setdefault(s, _stream.bucket_uniform(s, key)) for s in names]
    )
    first = pd.Series(ts).groupby(who).transform("min").to_numpy()
    hour = np.floor(first / 3600.0) % 24
    cum = np.tile(np.cumsum(p), (n, 1))
    cum[:, -2] -= hour_swing * np.sin(2 * np.pi * hour / 24.0)
    j = pick(cum, u)
    args = [_json({"unit": s, "shares": shares, "salt": salt}) for s in names]
    texts = [_json(a) for a in arms]
    return tables(
        stream,
        "bucket",
        args,
        [texts[k] for k in j],
        p[j],
        u,
        rng,
        ts=ts,
        units=names,
        seeded=False,
    )


def repeat_visits(
    rng: np.random.Generator,
    units: int,
    visits: int,
    *,
    sticky: float = 0.0,
    stream: str = "slot-discount",
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Shoppers offered a discount on each of ``visits`` visits, visits interleaved in time.

    Each decision declares one of two probability vectors (varying declarations). A share
    ``sticky`` of the shoppers is pinned: every visit repeats the first visit's discount (the
    declared probability recorded with it) while the record claims an independent draw.
    """
    vectors = np.array([[0.5, 0.3, 0.2], [0.2, 0.3, 0.5]])
    opts = [0, 5, 10]
    n = units * visits
    which = rng.integers(0, 2, size=n)
    u = uniforms(rng, n)
    j = pick(np.cumsum(vectors[which], axis=1), u)
    who = np.arange(n) % units  # visit v of shopper k is decision v * units + k
    pinned = rng.random(units) < sticky
    first = j[:units]
    j = np.where(pinned[who], first[who], j)
    args = [_json({"options": opts, "probs": vectors[w].tolist()}) for w in range(2)]
    return tables(
        stream,
        "categorical",
        [args[w] for w in which],
        [_json(opts[k]) for k in j],
        vectors[which, j],
        u,
        rng,
        units=[f"shopper-{k:05d}" for k in who],
        name="discount",
    )
