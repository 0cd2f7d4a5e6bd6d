"""The reward of every decision, and the streams of a ledger."""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from drawledger.exceptions import ReplayError
from drawledger.replay.sources import outcome_values


def _digests(ids: Iterable[Any]) -> np.ndarray:
    """16-byte blake2b digests of decision ids, as sortable numpy bytes."""
    return np.array(
        [hashlib.blake2b(str(i).encode(), digest_size=16).digest() for i in ids], dtype="S16"
    )


_REWARD = np.dtype([("key", "S16"), ("value", np.float64)])


@dataclass(frozen=True)
class Rewards:
    """The total of one outcome per decision, looked up by a digest of the decision id."""

    table: np.ndarray  # (key, value) records sorted by key, keys distinct
    count: int  # outcome records of that name
    several: np.ndarray  # sorted keys of the decisions with several such outcomes (summed)

    @classmethod
    def of(cls, parts: Iterable[tuple[np.ndarray, np.ndarray]], capacity: int) -> Rewards:
        """Digests and values, summed per decision; ``capacity`` bounds their number (pages
        of the table beyond what is filled are never touched, so never resident)."""
        table = np.empty(capacity, dtype=_REWARD)
        at = 0
        for keys, values in parts:
            table["key"][at : at + keys.size] = keys
            table["value"][at : at + keys.size] = values
            at += keys.size
        table = table[:at]
        table.sort(order="key")  # in place
        keys = table["key"]
        first = np.ones(at, dtype=bool)
        np.not_equal(keys[1:], keys[:-1], out=first[1:])
        several = np.unique(keys[1:][~first[1:]])  # a key repeated: its decision's outcomes
        if several.size:  # several outcomes of that name for a decision: their sum
            starts = np.flatnonzero(first)
            summed = np.empty(starts.size, dtype=_REWARD)
            summed["key"] = keys[starts]
            summed["value"] = np.add.reduceat(table["value"], starts)
            table = summed
        return cls(table, at, several)

    def lookup(self, ids: Iterable[Any]) -> tuple[np.ndarray, np.ndarray]:
        """The total of each decision id (NaN: no such outcome), and whether it sums several
        outcomes."""
        wanted = _digests(ids)
        keys = self.table["key"]
        out = np.full(wanted.size, np.nan)
        if keys.size and wanted.size:
            pos = np.minimum(np.searchsorted(keys, wanted), keys.size - 1)
            hit = keys[pos] == wanted
            out[hit] = self.table["value"][pos[hit]]
        return out, np.isin(wanted, self.several)


def read_rewards(ledger: str, format: str | None, reward: str) -> Rewards:
    """The ``reward`` outcome of every decision of a ledger (24 bytes per decision)."""
    capacity, parts = outcome_values(ledger, format, reward)
    return Rewards.of(((_digests(ids), values) for ids, values in parts), capacity)


def choose_stream(streams: Sequence[str], stream: str | None, ledger: str) -> str:
    """The stream an estimate uses: the one asked for, or the ledger's only one."""
    if not streams:
        raise ReplayError(f"ledger {ledger!r} has no decisions")
    if stream is not None:
        if stream not in streams:
            raise ReplayError(f"no decisions of stream {stream!r}; streams in the ledger: "
                              f"{', '.join(streams)}")  # fmt: skip
        return stream
    if len(streams) > 1:
        raise ReplayError(f"the ledger has several decision streams ({', '.join(streams)}); "
                          "choose one with --stream")  # fmt: skip
    return streams[0]
