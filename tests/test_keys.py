"""The 64-bit keys of ids (replay/_keys.py): blake2b digests, stable across library versions."""

from __future__ import annotations

import hashlib

import numpy as np

from drawledger.replay._keys import PERSON, id_keys


def test_the_key_of_an_id_is_its_personalized_keyed_blake2b_digest() -> None:
    """hashlib's blake2b (RFC 7693) with digest_size 8, key and person, read little-endian."""
    digest = hashlib.blake2b(b"card-7", digest_size=8, key=b"k", person=b"drawledger.k1")
    assert [int.from_bytes(digest.digest(), "little")] == id_keys(["card-7"], b"k").tolist()
    assert b"drawledger.k1" == PERSON


def test_keys_are_pinned_literal_values() -> None:
    """Produced by this implementation: they pin its stability, not its correctness."""
    assert [12129242579120538162, 12307564499806841691] == id_keys(["a", "é"], b"k").tolist()


def test_keys_depend_on_the_key_and_keep_the_order_of_the_ids() -> None:
    ids = [f"card-{i}" for i in range(50)]
    keys = id_keys(ids, b"drawledger.audit")
    assert np.dtype(np.uint64) == keys.dtype
    assert keys.tolist() == [id_keys([i], b"drawledger.audit")[0] for i in ids]
    assert 50 == len(set(keys.tolist()))
    assert not np.array_equal(keys, id_keys(ids, b"drawledger.estimate"))


def test_no_ids_give_an_empty_array() -> None:
    assert (0,) == id_keys([], b"k").shape
