"""Arms repeated within units: do a unit's draws agree more often than their declarations allow?

A service that pins each unit to one arm (a cache keyed by user, a cookie) while recording
independent draws is caught here, not by the repeated-uniforms test: its uniforms need not
repeat. For every unit, its draws of one stream's draw are ordered by (ts, decision id, draw
index); each pair of consecutive draws (earlier e, later l) adds

    X = 1 if l picked e's option, else 0,   p = P_l(option of e), the later draw's declared
                                             probability of the earlier draw's pick.

Under the declaration, given everything before l, X is Bernoulli(p): so sum(X - p) is a
martingale with conditional variances p (1 - p), also when a later distribution depends on
earlier picks. The statistic is z = (M - E) / sqrt(V) with M = sum X, E = sum p,
V = sum p (1 - p), and the p-value is one-sided, P(N(0, 1) >= z): the martingale central limit
theorem (Hall & Heyde 1980, Martingale Limit Theory and Its Application, ch. 3; recalled from
memory); with independent pairs this is the normal approximation to the Poisson binomial.

Pairs inside a chunk are summed there. A unit's draws in different chunks meet at the merge:
each chunk keeps, per unit, its first draw (with that draw's declared distribution) and its
last pick, for at most ``MAX_UNITS`` units per draw (those with the smallest hash of the unit);
the first draw of the later chunk then pairs with the last pick of the earlier one. Units beyond
the bound lose only their pairs across chunks (so the test keeps its level, with a little less
power); memory stays within MAX_UNITS boundary records per draw.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import sparse, stats

from drawledger.replay.audit._declared import Parsed
from drawledger.replay.audit._stats import MIN_EXPECTED, TestResult

if TYPE_CHECKING:
    pass


# Boundary records kept per draw for pairs across chunks (about 200 bytes each plus the
# declared distribution of the unit's first draw in the chunk).
MAX_UNITS = 100_000


# Kinds with one pick per draw from listed options (bucket: the same arm is by design).
PAIRED_KINDS = frozenset({"categorical", "bernoulli", "integers", "softmax", "epsilon_greedy"})


Order = tuple[float, str, int]  # ts, decision id, draw index


@dataclass
class Edge:
    """A unit's first draw (order, pick, declared distribution) and last (order, pick)."""

    key: int  # hash of the unit: which units the bound keeps
    first: Order
    first_pick: str
    first_dist: dict[str, float]
    last: Order
    last_pick: str


@dataclass
class UnitPairs:
    """Sums over pairs of consecutive draws of the same unit, and the units' boundary draws."""

    pairs: int = 0
    matches: int = 0
    expected: float = 0.0
    variance: float = 0.0
    edges: dict[Any, Edge] = field(default_factory=dict)

    def add(self, matched: bool, p: float) -> None:
        self.pairs += 1
        self.matches += int(matched)
        self.expected += p
        self.variance += p * (1.0 - p)

    def merge(self, o: UnitPairs) -> None:
        """Add ``o``, the statistics of later chunks (pairs across the two are formed here)."""
        self.pairs += o.pairs
        self.matches += o.matches
        self.expected += o.expected
        self.variance += o.variance
        for unit, b in o.edges.items():
            a = self.edges.get(unit)
            if a is None:
                self.edges[unit] = b
                continue
            if a.last <= b.first:  # b's first draw comes after a's last: one more pair
                self.add(b.first_pick == a.last_pick, b.first_dist.get(a.last_pick, 0.0))
            elif b.last <= a.first:
                self.add(a.first_pick == b.last_pick, a.first_dist.get(b.last_pick, 0.0))
            # else the chunks interleave in time: no pair across them for this unit
            early = a if a.first <= b.first else b
            last = a if a.last >= b.last else b
            self.edges[unit] = Edge(a.key, early.first, early.first_pick, early.first_dist,
                                    last.last, last.last_pick)  # fmt: skip
        if len(self.edges) > MAX_UNITS:
            kept = sorted(self.edges.items(), key=lambda kv: kv[1].key)[:MAX_UNITS]
            self.edges = dict(kept)


def unit_pairs(
    kind: str, frame: pd.DataFrame, parsed: Parsed, keep: npt.NDArray[np.bool_],
    unit_keys: npt.NDArray[np.uint64],
) -> UnitPairs | None:  # fmt: skip
    """The pairs of one chunk of one draw; ``keep`` marks its consistent steps, ``unit_keys``
    the hash of each row's unit. None for kinds without one pick per draw."""
    if kind not in PAIRED_KINDS or parsed.keys is None or parsed.chosen is None:
        return None
    assert parsed.flat_step is not None and parsed.flat_key is not None
    assert parsed.flat_p is not None
    n_steps = len(parsed.row)
    dist = sparse.csr_matrix(
        (parsed.flat_p, (parsed.flat_step, parsed.flat_key)), shape=(n_steps, len(parsed.keys))
    )
    pick = parsed.flat_key[parsed.chosen]
    units = frame["unit"].to_numpy(dtype=object)[parsed.row]
    steps = np.flatnonzero(keep & ~pd.isna(units))
    out = UnitPairs()
    if not len(steps):
        return out
    rows = parsed.row[steps]
    table = pd.DataFrame({
        "unit": units[steps],
        "ts": frame["ts"].to_numpy(np.float64)[rows],
        "id": frame["decision_id"].to_numpy(dtype=object)[rows].astype(str),
        "idx": frame["idx"].to_numpy(np.int64)[rows],
        "step": steps,
        "key": unit_keys[rows],
    }).sort_values(["unit", "ts", "id", "idx"], kind="stable")  # fmt: skip
    unit = table["unit"].to_numpy(dtype=object)
    step = table["step"].to_numpy(np.int64)
    same = unit[1:] == unit[:-1]
    early, late = step[:-1][same], step[1:][same]
    if len(late):
        p = np.asarray(dist[late, pick[early]]).ravel()
        out.pairs = len(late)
        out.matches = int((pick[late] == pick[early]).sum())
        out.expected = float(p.sum())
        out.variance = float((p * (1.0 - p)).sum())
    firsts = np.flatnonzero(np.r_[True, ~same])
    lasts = np.r_[firsts[1:] - 1, len(unit) - 1]
    keys = table["key"].to_numpy(np.uint64)
    if len(firsts) > MAX_UNITS:
        chosen = np.sort(np.argpartition(keys[firsts], MAX_UNITS - 1)[:MAX_UNITS])
        firsts, lasts = firsts[chosen], lasts[chosen]
    ts, ids, idx = table["ts"].to_list(), table["id"].to_list(), table["idx"].to_list()
    names = parsed.keys
    for f, last in zip(firsts.tolist(), lasts.tolist(), strict=True):
        s = int(step[f])
        lo, hi = dist.indptr[s], dist.indptr[s + 1]
        options = dist.indices[lo:hi].tolist()
        first_dist = {names[k]: v for k, v in zip(options, dist.data[lo:hi].tolist(), strict=True)}
        out.edges[unit[f]] = Edge(
            int(keys[f]), (ts[f], ids[f], idx[f]), names[pick[s]], first_dist,
            (ts[last], ids[last], idx[last]), names[pick[int(step[last])]],
        )  # fmt: skip
    return out


def sticky_test(u: UnitPairs) -> TestResult | None:
    """One-sided z test of more repeated picks than declared; None below MIN_EXPECTED
    expected repeats or non-repeats (the normal approximation needs both; common practice)."""
    if u.expected < MIN_EXPECTED or u.pairs - u.expected < MIN_EXPECTED or u.variance <= 0.0:
        return None
    z = (u.matches - u.expected) / math.sqrt(u.variance)
    return TestResult(z, float(stats.norm.sf(z)))
