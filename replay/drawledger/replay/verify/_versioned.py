"""Verify across deploys: which code version replays which records (docs/deploys.md).

``plan_versions`` reads the versions a ledger records and the sources it stores, finds the current
code's identity of each function under ``--path``, and (with history) the git revision of
every other version. ``replay_revisions`` replays the records of each revision found in a
process of its own, on the tree of that revision.
"""

from __future__ import annotations

import os
import pickle
import shutil
import subprocess
import sys
import tempfile
from collections.abc import Set as AbstractSet
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from drawledger._schema import DEC, DRAW
from drawledger.exceptions import ReplayError
from drawledger.replay.sources import decision_versions, plan, read_code_versions
from drawledger.replay.verify import _history
from drawledger.replay.verify._chunk import verify_chunk
from drawledger.replay.verify._types import ChunkResult, Settings


@dataclass
class Revision:
    """The records of some code versions, replayed on the tree of one git revision."""

    rev: str
    top: Path
    base: Path
    pairs: frozenset[tuple[str, str]]


@dataclass
class Plan:
    settings: Settings
    revisions: list[Revision] = field(default_factory=list)
    versions: list[dict[str, Any]] = field(default_factory=list)


def plan_versions(ledger: str | os.PathLike[str], format: str | None, settings: Settings,
            history: bool) -> Plan:  # fmt: skip
    """The plan: stored sources for every chunk, the revisions to replay apart, and the
    versions table of the report."""
    sources: dict[str, str] = {}
    for row in read_code_versions(ledger, format=format):
        identity, source = row[0], row[4]
        if isinstance(identity, str) and isinstance(source, str):
            sources.setdefault(identity, source)
    uses = decision_versions(ledger, format=format)
    current = _history.current_identities({u.fn for u in uses}, settings.path)
    wanted: dict[str, set[str]] = {}
    for use in uses:
        now = current.get(use.fn)
        if now is not None and use.identity != now[0]:
            wanted.setdefault(use.fn, set()).add(use.identity)
    found = _history.search(wanted, current) if history and wanted else _history.Found()
    by_rev: dict[str, set[tuple[str, str]]] = {}
    for pair, rev in found.revisions.items():
        by_rev.setdefault(rev, set()).add(pair)
    revisions = [Revision(rev, *found.bases[rev], frozenset(pairs))
                 for rev, pairs in sorted(by_rev.items())]  # fmt: skip
    versions = []
    for use in uses:
        now = current.get(use.fn)
        rev = found.revisions.get((use.fn, use.identity), "")
        if now is not None and use.identity == now[0]:
            under = "current code"
        elif rev:
            under = f"git {rev[:12]}"
        elif now is None:
            under = "current code (not under --path)"
        else:
            under = "not found"
        versions.append({"stream": use.stream, "fn": use.fn, "identity": use.identity,
                         "decisions": use.decisions, "replayed_under": under})  # fmt: skip
    elsewhere = frozenset(found.revisions)
    stored = tuple(sorted(sources.items()))
    return Plan(replace(settings, sources=stored, elsewhere=elsewhere), revisions, versions)


def _replay_revision(ledger: str, format: str | None, size: int, settings: Settings,
                     flagged: AbstractSet[str]) -> ChunkResult:  # fmt: skip
    """Every record of ``settings.only`` replayed in this process (one revision's code)."""
    total = ChunkResult()
    for task in plan(ledger, format=format, size=size):
        rows, draws = task.read()
        only = settings.only or frozenset()
        mine = {r[DEC.decision_id] for r in rows if (r[DEC.fn], r[DEC.code_hash]) in only}
        if mine:
            its_draws = [d for d in draws if d[DRAW.decision_id] in mine]
            total.add(verify_chunk(rows, its_draws, flagged & mine, settings))
    return total


def replay_revisions(plan_: Plan, ledger: str | os.PathLike[str], format: str | None,
                     size: int, flagged: AbstractSet[str]) -> list[ChunkResult]:  # fmt: skip
    """Each revision's records replayed in a fresh process on a temporary copy of its tree.

    A revision whose tree cannot be extracted leaves its records to the current code (where
    they are reported as ``version-not-found``)."""
    results: list[ChunkResult] = []
    leftover: set[tuple[str, str]] = set()
    for revision in plan_.revisions:
        tree = _history.temporary_tree(revision.top, revision.rev)
        if tree is None:
            leftover |= revision.pairs
            continue
        try:
            moved = _history.moved_path(revision.base, revision.top, tree)
            settings = replace(plan_.settings, path=(moved,), elsewhere=frozenset(),
                               only=revision.pairs)  # fmt: skip
            args = (os.fspath(ledger), format, size, settings, frozenset(flagged))
            results.append(_in_fresh_process(revision.rev, args))
        finally:
            shutil.rmtree(tree, ignore_errors=True)
    if leftover:
        settings = replace(plan_.settings, elsewhere=frozenset(), only=frozenset(leftover))
        results.append(_replay_revision(os.fspath(ledger), format, size, settings, flagged))
    return results


def _in_fresh_process(rev: str, args: tuple[Any, ...]) -> ChunkResult:
    """``_replay_revision(*args)`` in a new interpreter: nothing of this process's modules (the
    current code version) and nothing of the calling script runs there."""
    with tempfile.TemporaryDirectory(prefix="drawledger-replay-") as work:
        out = Path(work) / "result.pickle"
        payload = pickle.dumps((list(sys.path), args, os.fspath(out)))
        command = [sys.executable, "-c", f"from {__name__} import worker_main; worker_main()"]
        done = subprocess.run(command, input=payload, capture_output=True, check=False)
        if not out.is_file():
            last = done.stderr.decode(errors="replace").strip().splitlines()[-1:] or ["no output"]
            raise ReplayError(f"replaying the code version of git {rev[:12]} failed: {last[0]}")
        status, value = pickle.loads(out.read_bytes())
    if status != "ok":
        raise ReplayError(f"replaying the code version of git {rev[:12]} failed: {value}")
    result: ChunkResult = value
    return result


def worker_main() -> None:
    """The fresh process of ``_in_fresh_process``: arguments on stdin, result to a file."""
    path, args, out = pickle.loads(sys.stdin.buffer.read())
    sys.path[:] = path
    try:
        outcome: tuple[str, Any] = ("ok", _replay_revision(*args))
    except Exception as exc:  # reported to the parent in one line
        outcome = ("error", f"{type(exc).__name__}: {exc}")
    Path(out).write_bytes(pickle.dumps(outcome))
