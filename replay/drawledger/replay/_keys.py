"""64-bit keys of ids (decision ids, units) that no library upgrade changes.

The key of an id is ``blake2b(id as UTF-8, digest_size=8, key=KEY, person=b"drawledger.k1")``
read as a little-endian unsigned 64-bit integer. ``KEY`` names the use (the audit's sample,
the estimate's folds and bootstrap); the person string names this derivation, version 1.
Bootstrap counts, cross-fitting folds and bottom-k samples are functions of these keys, so
the same ledger and seed give the same numbers on every machine and library version.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable

import numpy as np
import numpy.typing as npt

PERSON = b"drawledger.k1"


def id_keys(ids: Iterable[str], key: bytes) -> npt.NDArray[np.uint64]:
    """The 64-bit key of each id (see the module docstring), in order."""
    # The keyed state is made once and copied per id: a copy skips compressing the key block
    # again for every id.
    copy = hashlib.blake2b(digest_size=8, key=key, person=PERSON).copy
    digests: list[bytes] = []
    append = digests.append
    for i in ids:
        h = copy()
        h.update(i.encode())
        append(h.digest())
    return np.frombuffer(b"".join(digests), dtype="<u8").astype(np.uint64)
