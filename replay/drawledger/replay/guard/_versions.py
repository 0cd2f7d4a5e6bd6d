"""The guard across deploys: each record replayed under the code version that logged it.

The guard pins, for each decision function, the identity of its code under ``--path`` when it
first meets the function (the code it imports then). Records of another identity (logged
before a deploy, or after one while the guard still runs the old code) are replayed under
the git revision that holds their version, in a process of their own, as ``verify`` does
(docs/deploys.md); a version the history does not hold is ``code-changed``.
"""

from __future__ import annotations

from collections.abc import Sequence
from collections.abc import Set as AbstractSet
from dataclasses import dataclass, field, replace
from typing import Any

from drawledger._schema import DEC
from drawledger.replay.propensity import Memo
from drawledger.replay.verify import (
    ChunkResult,
    RevisionServer,
    Settings,
    VersionPlan,
    current_identities,
    in_revisions,
    plan_pairs,
    verify_chunk,
)

Row = tuple[Any, ...]

MAX_PLANS = 64  # plans kept (one per set of versions a piece holds)


def _replay(settings: Settings, rows: Sequence[Row], draws: Sequence[Row],
            flagged: AbstractSet[str]) -> ChunkResult:  # fmt: skip
    """In a version's process: its records of the piece, verified."""
    return verify_chunk(rows, draws, flagged, settings)


@dataclass
class Versions:
    """The identities pinned so far and the plans made for them (kept for the guard's run)."""

    current: dict[str, Any] = field(default_factory=dict)
    plans: dict[frozenset[tuple[str, str]], VersionPlan] = field(default_factory=dict)
    server: RevisionServer = field(default_factory=RevisionServer)  # kept for the whole run

    def plan(self, rows: Sequence[Row], settings: Settings) -> VersionPlan:
        pairs = frozenset((r[DEC.fn], r[DEC.code_hash]) for r in rows
                          if isinstance(r[DEC.fn], str)
                          and isinstance(r[DEC.code_hash], str))  # fmt: skip
        known = self.plans.get(pairs)
        if known is not None:
            return known
        new = {fn for fn, _ in pairs} - self.current.keys()
        if new:
            found = current_identities(new, settings.path)
            self.current.update({fn: found.get(fn) for fn in new})
        pinned = {fn: now for fn, now in self.current.items() if now is not None}
        made = plan_pairs(pairs, settings, pinned)
        if len(self.plans) < MAX_PLANS:
            self.plans[pairs] = made
        return made

    def verify(self, rows: Sequence[Row], draws: Sequence[Row], flagged: AbstractSet[str],
               settings: Settings, memo: Memo | None = None) -> ChunkResult:  # fmt: skip
        """``verify_chunk`` of a piece, each record under its own code version; ``memo``
        serves the records replayed here, under the current code."""
        plan = self.plan(rows, settings)
        checked = verify_chunk(rows, draws, flagged, plan.settings, memo)
        if not plan.revisions:
            return checked
        results, leftover = in_revisions(plan, _replay, list(rows), list(draws), flagged,
                                         server=self.server)  # fmt: skip
        for part in results:
            checked.add(part)
        if leftover:  # a tree that could not be extracted: here, where it is code-changed
            here = replace(plan.settings, elsewhere=frozenset(), only=frozenset(leftover))
            checked.add(verify_chunk(rows, draws, flagged, here, memo))
        return checked
