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

from drawledger._probability import integers_args, option_probabilities
from drawledger.exceptions import DrawArgumentError
from drawledger.replay.audit._declared import Parsed, canon, load_texts
from drawledger.replay.audit._limits import MAX_OPTIONS
from drawledger.replay.audit._stats import MIN_EXPECTED, TestResult

if TYPE_CHECKING:
    pass


# Boundary records kept per draw for pairs across chunks (about 300 bytes each, with the
# declaration's JSON text of the unit's first draw in the chunk).
MAX_UNITS = 100_000


# Kinds with one pick per draw from listed options (bucket: the same arm is by design).
PAIRED_KINDS = frozenset({"categorical", "bernoulli", "integers", "softmax", "epsilon_greedy"})


EDGE_COLUMNS = ("unit", "key", "f_ts", "f_id", "f_idx", "f_pick", "f_args",
                "l_ts", "l_id", "l_idx", "l_pick")  # fmt: skip


def _before(ts: Any, ids: Any, idx: Any, ts2: Any, ids2: Any, idx2: Any) -> Any:
    """(ts, id, idx) <= (ts2, id2, idx2), elementwise."""
    return (ts < ts2) | ((ts == ts2) & ((ids < ids2) | ((ids == ids2) & (idx <= idx2))))


def declared_probability(
    kind: str, args_text: str, pick: str, seen: dict[str, dict[str, float]]
) -> float:
    """The probability a declaration gives to an option (canonical JSON), as the SDK has it;
    ``seen`` caches the distributions of declarations by their text."""
    dist = seen.get(args_text)
    if dist is None:
        dist = seen[args_text] = _distribution(kind, args_text)
    return dist.get(pick, 0.0)


def _distribution(kind: str, args_text: str) -> dict[str, float]:
    a = load_texts([args_text])[0]
    if not isinstance(a, dict):
        return {}
    dist: dict[str, float] = {}
    try:
        if kind == "integers":
            low, high, each = integers_args(a.get("low"), a.get("high"))
            return {str(v): each for v in range(low, high)} if high - low <= MAX_OPTIONS else {}
        options, probs = option_probabilities(kind, a)
    except (DrawArgumentError, TypeError):
        return {}
    for o, p in zip(options, probs, strict=True):
        k = canon(o)
        dist[k] = dist.get(k, 0.0) + p
    return dist


@dataclass
class UnitPairs:
    """Sums over pairs of consecutive draws of the same unit, and the units' boundary draws
    (``edges``: one row per unit, its first draw's order, pick and declaration, its last
    draw's order and pick)."""

    kind: str
    pairs: int = 0
    matches: int = 0
    expected: float = 0.0
    variance: float = 0.0
    edges: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=list(EDGE_COLUMNS)))

    def _add(self, matched: npt.NDArray[np.bool_], p: list[float]) -> None:
        q = np.asarray(p, np.float64)
        self.pairs += len(q)
        self.matches += int(matched.sum())
        self.expected += float(q.sum())
        self.variance += float((q * (1.0 - q)).sum())

    def merge(self, o: UnitPairs) -> None:
        """Add ``o``, the statistics of later chunks (pairs across the two are formed here)."""
        self.pairs += o.pairs
        self.matches += o.matches
        self.expected += o.expected
        self.variance += o.variance
        a, b = self.edges, o.edges
        both = a.merge(b, on="unit", suffixes=("_a", "_b"))
        if len(both):
            seen: dict[str, dict[str, float]] = {}
            c = {k: both[k].to_numpy() for k in both.columns}
            fwd = _before(c["l_ts_a"], c["l_id_a"], c["l_idx_a"],
                          c["f_ts_b"], c["f_id_b"], c["f_idx_b"])  # fmt: skip
            bwd = ~fwd & _before(c["l_ts_b"], c["l_id_b"], c["l_idx_b"],
                                 c["f_ts_a"], c["f_id_a"], c["f_idx_a"])  # fmt: skip
            for later, earlier, mask in (("b", "a", fwd), ("a", "b", bwd)):
                if mask.any():
                    picks, args = c[f"l_pick_{earlier}"][mask], c[f"f_args_{later}"][mask]
                    p = [declared_probability(self.kind, t, k, seen)
                         for t, k in zip(args.tolist(), picks.tolist(), strict=True)]  # fmt: skip
                    self._add(c[f"f_pick_{later}"][mask] == picks, p)
            # the union keeps each unit's earliest first draw and latest last draw
            first_b = ~_before(c["f_ts_a"], c["f_id_a"], c["f_idx_a"],
                               c["f_ts_b"], c["f_id_b"], c["f_idx_b"])  # fmt: skip
            last_a = ~_before(c["l_ts_a"], c["l_id_a"], c["l_idx_a"],
                              c["l_ts_b"], c["l_id_b"], c["l_idx_b"])  # fmt: skip
            joined = {"unit": c["unit"], "key": c["key_a"]}
            for col in ("f_ts", "f_id", "f_idx", "f_pick", "f_args"):
                joined[col] = np.where(first_b, c[col + "_b"], c[col + "_a"])
            for col in ("l_ts", "l_id", "l_idx", "l_pick"):
                joined[col] = np.where(last_a, c[col + "_a"], c[col + "_b"])
            parts = [a[~a["unit"].isin(b["unit"])], b[~b["unit"].isin(a["unit"])],
                     pd.DataFrame(joined)]  # fmt: skip
        else:
            parts = [a, b]
        parts = [x for x in parts if len(x)]
        merged = pd.concat(parts, ignore_index=True) if parts else a
        if len(merged) > MAX_UNITS:
            merged = merged.iloc[np.argsort(merged["key"].to_numpy(np.uint64))[:MAX_UNITS]]
        self.edges = merged.reset_index(drop=True)


def unit_pairs(
    kind: str, frame: pd.DataFrame, parsed: Parsed, keep: npt.NDArray[np.bool_],
    unit_keys: npt.NDArray[np.uint64],
) -> UnitPairs | None:  # fmt: skip
    """The pairs of one chunk of one draw; ``keep`` marks its consistent steps, ``unit_keys``
    the hash of each row's unit. None for kinds without one pick per draw."""
    from scipy import sparse

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
    out = UnitPairs(kind)
    if not len(steps):
        return out
    rows = parsed.row[steps]
    table = pd.DataFrame({
        "unit": units[steps],
        "ts": frame["ts"].to_numpy(np.float64)[rows],
        "id": frame["decision_id"].to_numpy(dtype=object)[rows].astype(str),
        "idx": frame["idx"].to_numpy(np.int64)[rows],
        "step": steps,
        "row": rows,
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
    row = table["row"].to_numpy(np.int64)
    keys = unit_keys[row[firsts]]
    if len(firsts) > MAX_UNITS:
        chosen = np.sort(np.argpartition(keys, MAX_UNITS - 1)[:MAX_UNITS])
        firsts, lasts, keys = firsts[chosen], lasts[chosen], keys[chosen]
    names = np.array(parsed.keys, dtype=object)
    ts, ids, idx = (table[c].to_numpy() for c in ("ts", "id", "idx"))
    out.edges = pd.DataFrame({
        "unit": unit[firsts], "key": keys,
        "f_ts": ts[firsts], "f_id": ids[firsts], "f_idx": idx[firsts],
        "f_pick": names[pick[step[firsts]]],
        "f_args": frame["args"].to_numpy(dtype=object)[row[firsts]],
        "l_ts": ts[lasts], "l_id": ids[lasts], "l_idx": idx[lasts],
        "l_pick": names[pick[step[lasts]]],
    })  # fmt: skip
    return out


def sticky_test(u: UnitPairs) -> TestResult | None:
    """One-sided z test of more repeated picks than declared; None below MIN_EXPECTED
    expected repeats or non-repeats (the normal approximation needs both; common practice)."""
    from scipy import stats

    if u.expected < MIN_EXPECTED or u.pairs - u.expected < MIN_EXPECTED or u.variance <= 0.0:
        return None
    z = (u.matches - u.expected) / math.sqrt(u.variance)
    return TestResult(z, float(stats.norm.sf(z)))
