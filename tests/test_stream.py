"""Seeds and the uniform stream of draw specification v1 (sdk/drawledger/_stream.py)."""

from __future__ import annotations

import hashlib
import os
import threading

import pytest
from hypothesis import given
from scipy import stats
from strategies import seeds

from drawledger import _stream
from drawledger.draw import Draw
from drawledger.exceptions import DrawArgumentError


def fixed_seed(i: int) -> bytes:
    return hashlib.blake2b(i.to_bytes(8, "little"), digest_size=16).digest()


def test_seed_is_16_fresh_bytes() -> None:
    """Seeds are 16 bytes and never repeat (10^4 seeds, no collision)."""
    got = [_stream.new_seed() for _ in range(10_000)]
    assert {16} == {len(s) for s in got}
    assert len(got) == len(set(got))


def test_threads_never_share_a_seed() -> None:
    """Four threads taking seeds at once get pairwise different seeds."""
    out: list[list[bytes]] = [[] for _ in range(4)]

    def take(i: int) -> None:
        out[i].extend(_stream.new_seed() for _ in range(2_000))

    threads = [threading.Thread(target=take, args=(i,)) for i in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    every = [s for chunk in out for s in chunk]
    assert len(every) == len(set(every))


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs os.fork")
def test_forked_child_does_not_reuse_the_parents_seeds() -> None:
    """A forked child drops the seed pool it inherited: its seeds differ from the parent's."""
    _stream.new_seed()  # the pool now holds seeds the child must not use
    inherited = list(_stream._pool)
    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:  # child
        try:
            os.write(write, b"".join(_stream.new_seed() for _ in range(8)))
        finally:
            os._exit(0)
    os.close(write)
    data = b""
    while chunk := os.read(read, 4096):
        data += chunk
    os.close(read)
    os.waitpid(pid, 0)
    child = {data[i : i + 16] for i in range(0, len(data), 16)}
    assert 8 == len(child)
    assert not child & set(inherited)


def test_uniforms_follow_blocks_in_order() -> None:
    """uniforms(seed, n) is block 0 then block 1 ..., each of eight words."""
    seed = fixed_seed(1)
    assert _stream.block(seed, 0) + _stream.block(seed, 1) + _stream.block(seed, 2)[:3] == (
        _stream.uniforms(seed, 19)
    )


def test_word_mapping_ends() -> None:
    """The smallest uniform is 2**-54 and the largest 1.0 (IEEE rounding, docs/draw-spec.md)."""
    assert 2.0**-54 == _stream.to_unit(0)
    assert 1.0 == _stream.to_unit(2**64 - 1)
    assert 0.5 == _stream.to_unit(2**63)
    assert 1.0 - 2.0**-52 == _stream.to_unit(2**64 - 2**12)


@given(seeds)
def test_draw_and_stream_helper_agree(seed: bytes) -> None:
    """Draw._uniform consumes the same stream as _stream.uniforms, all inside (0, 1]."""
    draw = Draw(seed)
    got = [draw._uniform() for _ in range(20)]
    assert _stream.uniforms(seed, 20) == got
    assert all(0.0 < u <= 1.0 for u in got)


@pytest.mark.parametrize("bad", [b"short", b"x" * 17, "0" * 32, bytearray(16), 7])
def test_draw_refuses_a_malformed_seed(bad: object) -> None:
    """Draw(seed) needs exactly 16 bytes."""
    with pytest.raises(DrawArgumentError, match="16 bytes"):
        Draw(bad)  # type: ignore[arg-type]


def test_stream_of_one_seed_is_uniform() -> None:
    """10^5 uniforms of one seed: Kolmogorov-Smirnov against U(0, 1) does not reject at 0.001.

    Reference: scipy.stats.kstest (two-sided one-sample KS test).
    """
    u = _stream.uniforms(fixed_seed(2026), 100_000)
    assert stats.kstest(u, "uniform").pvalue > 0.001


def test_first_uniforms_across_seeds_are_uniform() -> None:
    """The first uniform of 10^5 different seeds (one per decision) passes the same KS test.

    Reference: scipy.stats.kstest.
    """
    u = [Draw(fixed_seed(i))._uniform() for i in range(100_000)]
    assert stats.kstest(u, "uniform").pvalue > 0.001


def test_successive_uniforms_are_uncorrelated() -> None:
    """Pairs (u_n, u_n+1) of one stream: Pearson correlation test does not reject at 0.001.

    Reference: scipy.stats.pearsonr.
    """
    u = _stream.uniforms(fixed_seed(7), 100_001)
    assert stats.pearsonr(u[:-1], u[1:]).pvalue > 0.001


def test_bucket_uniform_depends_on_unit_and_salt() -> None:
    """Same unit and salt, same uniform; another unit or salt, another one."""
    a = _stream.bucket_uniform("shopper-000017", b"salt-a")
    assert a == _stream.bucket_uniform("shopper-000017", b"salt-a")
    assert a != _stream.bucket_uniform("shopper-000018", b"salt-a")
    assert a != _stream.bucket_uniform("shopper-000017", b"salt-b")
