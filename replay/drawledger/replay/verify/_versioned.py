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
import struct
import subprocess
import sys
import tempfile
from collections.abc import Callable, Iterable
from collections.abc import Set as AbstractSet
from contextlib import nullcontext
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, TypeVar

from drawledger._schema import DEC, DRAW
from drawledger.exceptions import ReplayError
from drawledger.replay.sources import decision_versions, plan, read_code_versions
from drawledger.replay.verify import _history
from drawledger.replay.verify._chunk import verify_chunk
from drawledger.replay.verify._types import ChunkResult, Settings
from drawledger.replay.verify._versions import source_matches

T = TypeVar("T")

Pair = tuple[str, str]  # (function, code identity)

Current = dict[str, tuple[str, Path]]  # function: its current identity, the --path directory


@dataclass
class Revision:
    """The records of some code versions, replayed on the tree of one git revision, or (with
    ``source``) on a copy of the ``--path`` directory holding a version's stored source."""

    rev: str
    top: Path
    base: Path
    pairs: frozenset[Pair]
    source: str | None = None

    @property
    def label(self) -> str:
        if self.source is None:
            return f"the code version of git {self.rev[:12]}"
        return f"the stored source of {self.rev}"

    def tree(self) -> tuple[Path, str] | None:
        """A temporary tree (the caller removes it) and the ``--path`` directory in it."""
        if self.source is None:
            tree = _history.temporary_tree(self.top, self.rev)
            return None if tree is None else (tree, _history.moved_path(self.base, self.top, tree))
        ((fn, _),) = self.pairs
        tree = _history.stored_tree(self.base, fn, self.source)
        return None if tree is None else (tree, os.fspath(tree / self.base.name))


@dataclass
class VersionPlan:
    settings: Settings
    revisions: list[Revision] = field(default_factory=list)
    versions: list[dict[str, Any]] = field(default_factory=list)
    # Versions whose stored source was asked for but does not hash to their identity.
    unmatched: list[Pair] = field(default_factory=list)

    @property
    def runs_stored_source(self) -> bool:
        return any(r.source is not None for r in self.revisions)


def plan_versions(ledger: str | os.PathLike[str], format: str | None, settings: Settings,
                  history: bool, stored: bool = False) -> VersionPlan:  # fmt: skip
    """The plan: stored sources for every chunk, the revisions to replay apart, and the
    versions table of the report. ``stored``: a version the history does not hold is replayed
    from its stored source (the caller checks the ledger's keyed integrity first)."""
    sources: dict[str, str] = {}
    for row in read_code_versions(ledger, format=format):
        identity, source = row[0], row[4]
        if isinstance(identity, str) and isinstance(source, str):
            sources.setdefault(identity, source)
    uses = decision_versions(ledger, format=format)
    current = current_identities({u.fn for u in uses}, settings.path)
    found = _found({(u.fn, u.identity) for u in uses}, current) if history else _history.Found()
    revisions = _revisions(found)
    unmatched: list[Pair] = []
    for use in uses if stored else ():
        pair, now = (use.fn, use.identity), current.get(use.fn)
        source = sources.get(use.identity)
        if now is None or use.identity == now[0] or pair in found.revisions or source is None:
            continue
        if source_matches(use.identity, source):
            revisions.append(Revision(use.identity, now[1], now[1], frozenset({pair}), source))
        else:
            unmatched.append(pair)
    from_source = {p for r in revisions if r.source is not None for p in r.pairs}
    versions = []
    for use in uses:
        now = current.get(use.fn)
        rev = found.revisions.get((use.fn, use.identity), "")
        if now is not None and use.identity == now[0]:
            under = "current code"
        elif rev:
            under = f"git {rev[:12]}"
        elif (use.fn, use.identity) in from_source:
            under = "stored source"
        elif now is None:
            under = "current code (not under --path)"
        else:
            under = "not found"
        versions.append({"stream": use.stream, "fn": use.fn, "identity": use.identity,
                         "decisions": use.decisions, "replayed_under": under})  # fmt: skip
    elsewhere = frozenset(found.revisions) | from_source
    kept = tuple(sorted(sources.items()))
    return VersionPlan(replace(settings, sources=kept, elsewhere=elsewhere), revisions, versions,
                       unmatched)  # fmt: skip


def current_identities(fns: Iterable[str], path: Iterable[str]) -> Current:
    """The code identity of each function in its file under the ``path`` directories (parsed,
    not imported), with the directory it was found under; functions not there are left out."""
    return _history.current_identities(fns, path)


def _found(pairs: Iterable[Pair], current: Current) -> _history.Found:
    """The git revisions that hold the versions of ``pairs`` that are not current."""
    wanted: dict[str, set[str]] = {}
    for fn, identity in pairs:
        now = current.get(fn)
        if now is not None and identity != now[0]:
            wanted.setdefault(fn, set()).add(identity)
    return _history.search(wanted, current) if wanted else _history.Found()


def _revisions(found: _history.Found) -> list[Revision]:
    by_rev: dict[str, set[Pair]] = {}
    for pair, rev in found.revisions.items():
        by_rev.setdefault(rev, set()).add(pair)
    return [Revision(rev, *found.bases[rev], frozenset(pairs))
            for rev, pairs in sorted(by_rev.items())]  # fmt: skip


def plan_pairs(pairs: Iterable[Pair], settings: Settings, current: Current) -> VersionPlan:
    """The plan for records of ``pairs`` (function, identity): those whose identity is not the
    ``current`` one of their function are replayed under the git revision that holds it (when
    the history does), the others here."""
    found = _found(pairs, current)
    return VersionPlan(replace(settings, elsewhere=frozenset(found.revisions)), _revisions(found))


def replay_revision(settings: Settings, ledger: str, format: str | None, size: int,
                    flagged: AbstractSet[str]) -> ChunkResult:  # fmt: skip
    """Every record of ``settings.only`` replayed in this process (one revision's code)."""
    total = ChunkResult()
    only = settings.only or frozenset()
    codes = frozenset(code for _, code in only)
    for task in plan(ledger, format=format, size=size):
        rows, draws = task.read(codes=codes)  # the other versions' records are not read
        mine = {r[DEC.decision_id] for r in rows if (r[DEC.fn], r[DEC.code_hash]) in only}
        if mine:
            its_draws = [d for d in draws if d[DRAW.decision_id] in mine]
            total.add(verify_chunk(rows, its_draws, flagged & mine, settings))
    return total


def replay_revisions(plan_: VersionPlan, ledger: str | os.PathLike[str], format: str | None,
                     size: int, flagged: AbstractSet[str]) -> list[ChunkResult]:  # fmt: skip
    """Each revision's records replayed in a fresh process on a temporary copy of its tree.

    A revision whose tree cannot be extracted leaves its records to the current code (where
    they are reported as ``version-not-found``)."""
    args = (os.fspath(ledger), format, size, frozenset(flagged))
    results, leftover = in_revisions(plan_, replay_revision, *args)
    if leftover:
        settings = replace(plan_.settings, elsewhere=frozenset(), only=frozenset(leftover))
        results.append(replay_revision(settings, *args))
    return results


def in_revisions(
    plan_: VersionPlan, work: Callable[..., T], *args: Any, server: RevisionServer | None = None
) -> tuple[list[T], set[Pair]]:
    """``work(settings, *args)`` for each revision of the plan, in a fresh process on a
    temporary copy of its tree, with ``settings`` replaying only that revision's versions (the
    ``--path`` directories moved into the tree). ``work`` is a module-level function; its
    arguments and result are pickled. ``server`` starts the processes (default: a server of
    this call's own; a caller that comes back often keeps one). Returns the results and the
    (function, identity) pairs of the revisions whose tree could not be extracted."""
    results: list[T] = []
    leftover: set[Pair] = set()
    with nullcontext(server) if server is not None else RevisionServer() as processes:
        for revision in plan_.revisions:
            made = revision.tree()
            if made is None:
                leftover |= revision.pairs
                continue
            tree, moved = made
            try:
                settings = replace(plan_.settings, path=(moved,), elsewhere=frozenset(),
                                   only=revision.pairs)  # fmt: skip
                results.append(processes.run(revision.label, work, (settings, *args)))
            finally:
                shutil.rmtree(tree, ignore_errors=True)
    return results, leftover


class RevisionServer:
    """Processes that share nothing with this one, one per code version: a server process
    started as a new interpreter imports this module once, then forks a process per version
    (so each starts in milliseconds instead of importing everything again). Nothing of this
    process's modules (the current code version) and nothing of the calling script runs there.
    Where there is no fork (Windows), the server does the work itself and a new one starts for
    the next version."""

    def __init__(self) -> None:
        self.server: subprocess.Popen[bytes] | None = None

    def __enter__(self) -> RevisionServer:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Stop the server process, if one runs."""
        if self.server is not None:
            self._stop(self.server)
            self.server = None

    @staticmethod
    def _stop(server: subprocess.Popen[bytes]) -> None:
        assert server.stdin is not None
        server.stdin.close()
        try:
            server.wait(timeout=30)
        except subprocess.TimeoutExpired:
            server.kill()
            server.wait()

    def run(self, label: str, work: Callable[..., T], args: tuple[Any, ...]) -> T:
        """``work(*args)`` in a process of its own (the search path set to this process's)."""
        failed = f"replaying {label} failed"
        if self.server is None or self.server.poll() is not None:
            command = [sys.executable, "-c", f"from {__name__} import serve; serve()"]
            self.server = subprocess.Popen(command, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                           stderr=subprocess.DEVNULL)  # fmt: skip
        server = self.server
        assert server.stdin is not None and server.stdout is not None
        with tempfile.TemporaryDirectory(prefix="drawledger-replay-") as work_dir:
            out = os.path.join(work_dir, "result.pickle")
            request = pickle.dumps((list(sys.path), pickle.dumps((work, args)), out))
            try:
                server.stdin.write(struct.pack("<Q", len(request)) + request)
                server.stdin.flush()
                status = server.stdout.readline().strip().decode() or "no status"
            except OSError:
                status = "no status"
            if not os.path.isfile(out):
                raise ReplayError(f"{failed}: its process ended without a result ({status})")
            with open(out, "rb") as f:
                outcome, value = pickle.load(f)
        if outcome != "ok":
            raise ReplayError(f"{failed}: {value}")
        result: T = value
        return result


def serve() -> None:
    """The server of ``RevisionServer``: requests on stdin, a status line per request on stdout."""
    requests, replies = sys.stdin.buffer, sys.stdout.buffer
    fork = getattr(os, "fork", None)
    while head := requests.read(8):
        request = requests.read(struct.unpack("<Q", head)[0])
        if fork is None:
            _work(request)
            replies.write(b"done\n")
            replies.flush()
            return
        child = fork()
        if child == 0:
            try:
                null = os.open(os.devnull, os.O_WRONLY)
                os.dup2(null, 1)  # what decision code prints never mixes with the replies
                _work(request)
            finally:
                os._exit(0)
        _, code = os.waitpid(child, 0)
        replies.write(f"exit status {os.waitstatus_to_exitcode(code)}\n".encode())
        replies.flush()


def _work(request: bytes) -> None:
    """One request: the search path set before the work and its arguments are unpickled; the
    outcome pickled to the request's file."""
    path, payload, out = pickle.loads(request)
    sys.path[:] = path
    try:
        work, args = pickle.loads(payload)
        outcome: tuple[str, Any] = ("ok", work(*args))
    except Exception as exc:  # reported to the parent in one line
        outcome = ("error", f"{type(exc).__name__}: {exc}")
    with open(out, "wb") as f:
        pickle.dump(outcome, f)
