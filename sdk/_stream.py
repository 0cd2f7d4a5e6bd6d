"""Seeds and the uniform stream of draw specification v1 (see docs/draw-spec.md)."""

from __future__ import annotations

import hashlib
import os
import struct

SEED_BYTES = 16
STREAM_PERSON = b"drawledger.v1"
BUCKET_PERSON = b"drawledger.b1"
_SCALE = 2.0**-53
_WORDS = struct.Struct("<8Q")
_WORD = struct.Struct("<Q")


def new_seed() -> bytes:
    """Return 16 bytes from the operating system's CSPRNG (never from user input)."""
    return os.urandom(SEED_BYTES)


def to_unit(x: int) -> float:
    """Map a 64-bit word to a float in (0, 1): ((x >> 11) + 0.5) * 2**-53, in IEEE doubles."""
    return ((x >> 11) + 0.5) * _SCALE


def block(seed: bytes, b: int) -> list[float]:
    """The eight uniforms of block ``b`` of the stream keyed by ``seed``."""
    digest = hashlib.blake2b(
        b.to_bytes(8, "little"), digest_size=64, key=seed, person=STREAM_PERSON
    ).digest()
    return [((x >> 11) + 0.5) * _SCALE for x in _WORDS.unpack(digest)]


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
    digest = hashlib.blake2b(
        unit.encode(), digest_size=8, key=salt, person=BUCKET_PERSON
    ).digest()
    return to_unit(_WORD.unpack(digest)[0])
