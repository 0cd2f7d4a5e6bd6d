"""Estimates across a code change: each record's logging side from the version that logged it.

The records of a code version found in the git history (``plan_versions``) are verified, and
their action distributions computed, in a process of that revision (``in_revisions``), piece
by piece over the same pieces as the estimate; the estimate's pieces then re-run them under the
target (the current code) here. docs/deploys.md.
"""

from __future__ import annotations

import os
import pickle
import uuid
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from drawledger._schema import DEC, DRAW
from drawledger.replay.estimate._policies import Records, logging_distributions
from drawledger.replay.propensity import MONTE_CARLO
from drawledger.replay.sources import Task
from drawledger.replay.verify import (
    ChunkResult,
    Settings,
    VersionPlan,
    in_revisions,
    verify_chunk,
)

Dist = dict[str, float] | None


@dataclass
class Logged:
    """One piece's records of other code versions, replayed under their own version: the
    verifier's result (rows kept) and the logging action distribution of each verified record
    (None: it has no exact one)."""

    checked: ChunkResult
    dists: dict[str, Dist]


def logged_pieces(settings: Settings, tasks: Sequence[Task], stream: str,
                  flagged: frozenset[str], seed: int, folder: str) -> list[str | None]:  # fmt: skip
    """In a revision's process: each piece's records of ``settings.only`` (of ``stream``)
    verified, and the action distribution of the verified ones under their own code; each
    piece's ``Logged`` pickled to a file in ``folder`` (None: the piece has none of them), so
    that the caller holds one piece's at a time."""
    only = settings.only or frozenset()
    codes = frozenset(code for _, code in only)
    out: list[str | None] = []
    for i, task in enumerate(tasks):
        rows, draws = task.read(codes=codes)  # the other versions' records are not read
        mine = [r for r in rows if str(r[DEC.stream]) == stream
                and (r[DEC.fn], r[DEC.code_hash]) in only]  # fmt: skip
        if not mine:
            out.append(None)
            continue
        ids = {r[DEC.decision_id] for r in mine}
        its = [d for d in draws if d[DRAW.decision_id] in ids]
        checked = verify_chunk(mine, its, flagged & ids, settings)
        file = os.path.join(folder, f"{uuid.uuid4().hex}-{i}.pickle")
        with open(file, "wb") as f:
            pickle.dump(Logged(checked, _dists(checked, mine, settings, seed)), f)
        out.append(file)
    return out


def load_logged(files: Sequence[str]) -> Logged | None:
    """A piece's records of other versions, from the files of each revision (None: none)."""
    if not files:
        return None
    checked = ChunkResult()
    dists: dict[str, Dist] = {}
    for file in files:
        with open(file, "rb") as f:
            part: Logged = pickle.load(f)
        checked.add(part.checked)
        dists.update(part.dists)
    return Logged(checked, dists)


def _dists(checked: ChunkResult, rows: Sequence[tuple[object, ...]], settings: Settings,
           seed: int) -> dict[str, Dist]:  # fmt: skip
    """The action distributions of the verified records with an exact propensity."""
    if not checked.rows:
        return {}
    texts = {r[DEC.decision_id]: (r[DEC.fn], r[DEC.inputs], r[DEC.params]) for r in rows}
    frame = pd.concat(checked.rows, ignore_index=True)
    exact = frame["verified"].astype(bool) & (frame["propensity_method"] != MONTE_CARLO) \
        & (pd.to_numeric(frame["propensity"], errors="coerce") > 0.0)  # fmt: skip
    ids = frame.loc[exact, "decision_id"].astype(str).tolist()
    if not ids:
        return {}
    chosen = [texts[d] for d in ids]
    recs = Records(ids=ids, fn=[str(c[0]) for c in chosen], inputs=[str(c[1]) for c in chosen],
                   params=[str(c[2]) for c in chosen], actions=[""] * len(ids),
                   mu=np.ones(len(ids)), r=np.zeros(len(ids)),
                   methods=[None] * len(ids))  # fmt: skip
    found = logging_distributions(recs, path=settings.path, allow=settings.allow, seed=seed,
                                  budget=settings.budget)  # fmt: skip
    return dict(zip(ids, found, strict=True))


def logged_elsewhere(plan: VersionPlan, tasks: Sequence[Task], stream: str,
                     flagged: frozenset[str], seed: int,
                     folder: str) -> tuple[list[list[str]], set[tuple[str, str]]]:  # fmt: skip
    """Per task, the files holding its records of the versions found in the history, replayed
    under their own version (``load_logged`` reads them); and the (function, identity) pairs
    whose tree could not be extracted (the estimate's pieces replay them, as
    ``version-not-found``)."""
    if not plan.revisions:
        return [[] for _ in tasks], set()
    results, leftover = in_revisions(plan, logged_pieces, list(tasks), stream, flagged, seed,
                                     folder)  # fmt: skip
    per_task: list[list[str]] = [[] for _ in tasks]
    for files in results:
        for mine, file in zip(per_task, files, strict=True):
            if file is not None:
                mine.append(file)
    return per_task, leftover
