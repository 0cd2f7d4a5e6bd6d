"""The published test vectors (docs/draw-vectors.json) reproduce bit for bit.

The vectors freeze draw specification v1: a change to any value, probability or uniform makes
these tests fail. Floats are compared by their IEEE-754 bits (``float.hex``), not within a
tolerance.
"""

from __future__ import annotations

import hashlib
import json
import math
import struct
from fractions import Fraction
from pathlib import Path
from typing import Any

import pytest
from scipy import special, stats

from drawledger import _stream
from drawledger._normal import ppnd16
from drawledger.draw import Draw, bucket_assign

VECTORS_PATH = Path(__file__).resolve().parent.parent / "docs" / "draw-vectors.json"
VECTORS: dict[str, Any] = json.loads(VECTORS_PATH.read_text(encoding="utf-8"))


def bits(x: Any) -> Any:
    """A structure with every float replaced by its exact hex form (types kept apart)."""
    if isinstance(x, float):
        return ("float", x.hex())
    if isinstance(x, bool):
        return ("bool", x)
    if isinstance(x, int):
        return ("int", x)
    if isinstance(x, (list, tuple)):
        return [bits(v) for v in x]
    if isinstance(x, dict):
        return {k: bits(v) for k, v in x.items()}
    return x


def assert_same_record(expected: dict[str, Any], draw: Draw) -> None:
    rec = draw.records[-1]
    assert expected["kind"] == rec.kind
    assert bits(expected["args"]) == bits(rec.args)
    assert bits(expected["uniforms"]) == bits(rec.u)
    assert bits(expected["value"]) == bits(rec.value)
    assert bits(expected["prob"]) == bits(rec.prob)
    assert expected["is_density"] == rec.is_density


def test_every_kind_has_several_vectors() -> None:
    """The file covers each draw kind at least three times, and bucket."""
    kinds = [v["kind"] for v in VECTORS["draws"]]
    for kind in ("categorical", "bernoulli", "uniform", "integers", "normal", "lognormal",
                 "softmax", "epsilon_greedy", "slate"):  # fmt: skip
        assert kinds.count(kind) >= 3, kind
    assert len(VECTORS["bucket"]) >= 3


@pytest.mark.parametrize("vec", VECTORS["word_to_uniform"], ids=lambda v: v["x"])
def test_word_to_uniform_vectors(vec: dict[str, Any]) -> None:
    """u = ((x >> 11) + 0.5) * 2**-53 in doubles, and the vector says the same bits."""
    x = int(vec["x"], 16)
    assert bits(vec["u"]) == bits(_stream.to_unit(x))
    # Independent check by exact rationals and IEEE-754 round-half-to-even (IEEE 754-2008,
    # section 4.3.1): m + 1/2 is exact below 2**52; from 2**52 on the spacing of doubles is 1,
    # so m + 1/2 is a tie and goes to the even one of m and m + 1.
    m = x >> 11
    exact = Fraction(2 * m + 1, 2) if m < 2**52 else Fraction(m + (m & 1))
    assert Fraction(vec["u"]) == exact * Fraction(1, 2**53)


@pytest.mark.parametrize(
    "vec", VECTORS["stream_blocks"], ids=lambda v: f"{v['seed'][:8]}-{v['block']}"
)
def test_stream_block_vectors(vec: dict[str, Any]) -> None:
    """Block b is blake2b(b as 8 LE bytes, digest_size=64, key=seed, person="drawledger.v1")."""
    seed = bytes.fromhex(vec["seed"])
    # Independent of drawledger: hashlib's BLAKE2b (RFC 7693) and struct, written out here.
    digest = hashlib.blake2b(
        vec["block"].to_bytes(8, "little"), digest_size=64, key=seed, person=b"drawledger.v1"
    ).digest()
    assert vec["digest"] == digest.hex()
    words = struct.unpack("<8Q", digest)
    assert vec["words"] == [f"{x:016x}" for x in words]
    assert bits(vec["uniforms"]) == bits([((x >> 11) + 0.5) * 2.0**-53 for x in words])
    assert bits(vec["uniforms"]) == bits(_stream.block(seed, vec["block"]))


def test_stream_uniform_order() -> None:
    """Uniform n of a seed is word n % 8 of block n // 8 (the Draw and the helper agree)."""
    vec = VECTORS["stream_blocks"][0]
    seed = bytes.fromhex(vec["seed"])
    draw = Draw(seed)
    got = [draw._uniform() for _ in range(16)]
    blocks = [v for v in VECTORS["stream_blocks"] if v["seed"] == vec["seed"]]
    assert bits(blocks[0]["uniforms"] + blocks[1]["uniforms"]) == bits(got)
    assert bits(got) == bits(_stream.uniforms(seed, 16))


@pytest.mark.parametrize("vec", VECTORS["ppnd16"], ids=lambda v: repr(v["p"]))
def test_ppnd16_vectors(vec: dict[str, Any]) -> None:
    """AS241 gives the recorded z bit for bit, and agrees with scipy.special.ndtri."""
    z = ppnd16(vec["p"])
    assert bits(vec["z"]) == bits(z)
    # scipy.special.ndtri (Cephes) as the outside reference: AS241 is good to about 1e-16.
    assert float(special.ndtri(vec["p"])) == pytest.approx(z, rel=1e-15, abs=1e-300)


@pytest.mark.parametrize("vec", VECTORS["draws"], ids=lambda v: f"{v['kind']}-{v['seed'][:6]}")
def test_draw_vectors(vec: dict[str, Any]) -> None:
    """Each single-draw vector reproduces: arguments, uniforms, value, probability."""
    draw = Draw(bytes.fromhex(vec["seed"]))
    getattr(draw, vec["kind"])(**vec["args"])
    assert_same_record(vec, draw)


def test_sequence_vector() -> None:
    """Draws made in order on one seed consume the stream in order, across blocks."""
    seq = VECTORS["sequence"]
    draw = Draw(bytes.fromhex(seq["seed"]))
    used: list[float] = []
    for vec in seq["draws"]:
        getattr(draw, vec["kind"])(**vec["args"])
        assert_same_record(vec, draw)
        used.extend(vec["uniforms"])
    assert len(used) > 8  # the sequence reaches the second block
    assert bits(_stream.uniforms(bytes.fromhex(seq["seed"]), len(used))) == bits(used)


@pytest.mark.parametrize("vec", VECTORS["bucket"], ids=lambda v: v["args"]["unit"])
def test_bucket_vectors(vec: dict[str, Any]) -> None:
    """Hashed assignment: u from blake2b(unit, digest_size=8, key=salt, person="drawledger.b1")."""
    a = vec["args"]
    arm, u, prob, _, _ = bucket_assign(a["unit"], a["shares"], a["salt"])
    assert bits(vec["uniforms"]) == bits([u])
    assert vec["value"] == arm
    assert bits(vec["prob"]) == bits(prob)
    digest = hashlib.blake2b(a["unit"].encode(), digest_size=8, key=a["salt"].encode(),
                             person=b"drawledger.b1").digest()  # fmt: skip
    x = int.from_bytes(digest, "little")
    assert bits(vec["uniforms"][0]) == bits(((x >> 11) + 0.5) * 2.0**-53)


def test_vectors_agree_with_scipy() -> None:
    """Every vector's probability or density matches scipy.stats to 1e-12 (relative)."""
    for vec in VECTORS["draws"] + VECTORS["sequence"]["draws"]:
        a, x, kind = vec["args"], vec["value"], vec["kind"]
        if kind == "normal":
            ref = stats.norm.pdf(x, a["mean"], a["sd"])  # scipy.stats.norm
            # the value itself: mean + sd * ndtri(u) (scipy.special.ndtri)
            assert mean_sd(a, vec["uniforms"][0]) == pytest.approx(x, rel=1e-14)
        elif kind == "lognormal":
            # scipy.stats.lognorm: shape s = sigma, scale = exp(mu)
            ref = stats.lognorm.pdf(x, a["sigma"], scale=math.exp(a["mu"]))
        elif kind == "uniform":
            ref = stats.uniform.pdf(x, a["low"], a["high"] - a["low"])  # scipy.stats.uniform
        elif kind == "integers":
            ref = stats.randint.pmf(x, a["low"], a["high"])  # scipy.stats.randint
        elif kind == "bernoulli":
            ref = stats.bernoulli.pmf(int(x), a["p"])  # scipy.stats.bernoulli
        else:
            continue  # discrete choices are checked against scipy in tests/test_draw.py
        assert float(ref) == pytest.approx(vec["prob"], rel=1e-12)


def mean_sd(args: dict[str, float], u: float) -> float:
    return args["mean"] + args["sd"] * float(special.ndtri(u))
