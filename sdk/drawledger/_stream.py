"""Seeds and the uniform stream of draw specification v1 (docs/draw-spec.md).

A decision's seed is 16 bytes from the operating system's CSPRNG. Block ``b`` of its stream is
``blake2b(b as 8 little-endian bytes, digest_size=64, key=seed, person=b"drawledger.v1")``;
the 64 bytes are eight little-endian 64-bit words, and word ``x`` maps to the double
``((x >> 11) + 0.5) * 2**-53`` evaluated in IEEE-754 binary64 arithmetic.
"""

from __future__ import annotations

import hashlib
import os
import struct

__all__ = [
    "BUCKET_PERSON",
    "SEED_BYTES",
    "STREAM_PERSON",
    "block",
    "block_bytes",
    "bucket_uniform",
    "new_seed",
    "to_unit",
    "uniforms",
    "words",
]

SEED_BYTES = 16
STREAM_PERSON = b"drawledger.v1"
BUCKET_PERSON = b"drawledger.b1"
SCALE = 2.0**-53
WORDS = struct.Struct("<8Q")
_WORD = struct.Struct("<Q")
_blake2b = hashlib.blake2b

# Seeds are taken from the CSPRNG 256 at a time: one system call serves many decisions.
# ``list.pop`` is atomic, so threads never share a seed; a forked child drops the pool it
# inherited, so parent and child never share one either.
_POOL_SEEDS = 256
_pool: list[bytes] = []


def _refill() -> None:
    data = os.urandom(SEED_BYTES * _POOL_SEEDS)
    _pool.extend([data[i : i + SEED_BYTES] for i in range(0, len(data), SEED_BYTES)])


def new_seed() -> bytes:
    """Return 16 fresh bytes from the operating system's CSPRNG (never from user input)."""
    while True:
        try:
            return _pool.pop()
        except IndexError:
            _refill()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_pool.clear)


def to_unit(x: int) -> float:
    """Map a 64-bit word to a double: ((x >> 11) + 0.5) * 2**-53.

    The result lies in (0, 1]: it is 1.0 only for x >> 11 == 2**53 - 1, because the sum
    2**53 - 0.5 rounds to the even neighbour 2**53 (probability 2**-53; docs/draw-spec.md).
    """
    return ((x >> 11) + 0.5) * SCALE


# The counters of the first blocks, encoded once (most decisions use block 0 alone).
_COUNTERS = tuple(b.to_bytes(8, "little") for b in range(16))


def block_bytes(seed: bytes, b: int) -> bytes:
    """The 64 bytes of block ``b`` of the stream keyed by ``seed``: eight little-endian words."""
    counter = _COUNTERS[b] if b < 16 else b.to_bytes(8, "little")
    # digest_size 64 is blake2b's default; leaving it out spares an argument on the hot path
    return _blake2b(counter, key=seed, person=STREAM_PERSON).digest()


def words(seed: bytes, b: int) -> tuple[int, ...]:
    """The eight 64-bit words of block ``b`` of the stream keyed by ``seed``."""
    return WORDS.unpack(block_bytes(seed, b))


def block(seed: bytes, b: int) -> list[float]:
    """The eight uniforms of block ``b`` of the stream keyed by ``seed``."""
    return [((x >> 11) + 0.5) * SCALE for x in words(seed, b)]


def uniforms(seed: bytes, n: int) -> list[float]:
    """The first ``n`` uniforms of the stream keyed by ``seed``."""
    out: list[float] = []
    b = 0
    while len(out) < n:
        out.extend(block(seed, b))
        b += 1
    return out[:n]


def bucket_uniform(unit: str, salt: bytes) -> float:
    """The uniform of hashed assignment: blake2b(unit, key=salt, person=b"drawledger.b1")."""
    digest = _blake2b(unit.encode(), digest_size=8, key=salt, person=BUCKET_PERSON).digest()
    return to_unit(_WORD.unpack(digest)[0])
