"""The guard's state: where each writer's chain stands, and the merged statistics.

Saved as one JSON file, written atomically (a temporary file in the same directory, flushed
to disk, then renamed over the old one) between the pieces the guard takes in (``SAVE_EVERY``
in ``_run``), so that a guard killed at any moment resumes from the last saved piece: it
never skips a record, and takes in again only what came after that save.
"""

from __future__ import annotations

import contextlib
import math
import os
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import orjson

from drawledger.exceptions import ReplayError
from drawledger.replay.guard._evidence import UNIFORM_BINS

VERSION = 1

INTEGRITY_PROBLEMS = ("gaps", "broken_links", "duplicates", "bad_hashes")


@dataclass
class Mark:
    """How far a writer's records are covered: the last seq, its hash, its newest ts."""

    writer: str
    seq: int = -1
    hash: str | None = None
    ts: float | None = None
    hole_since: float | None = None  # wall time a hole in the chain was first seen


@dataclass
class Watch:
    """The sequential statistics of one draw (stream, kind, name).

    ``test`` is "ratio" (picks among options with fixed declared probabilities) or "pit"
    (randomized probability integral transforms in 10 bins, for every other draw). ``counts``
    and ``declared`` are its cells; ``uniforms`` the recorded uniforms in 10 bins.
    """

    stream: str
    kind: str
    draw: str | None
    test: str
    keys: list[str]
    declared: list[float]
    counts: list[float]
    uniforms: list[int] = field(default_factory=lambda: [0] * UNIFORM_BINS)
    log_e: float = 0.0
    log_e_uniforms: float = 0.0
    stopped: str | None = None  # why the assignment process stopped taking in picks
    window: list[list[float]] = field(default_factory=list)  # recent pieces' counts

    @property
    def key(self) -> str:
        return orjson.dumps([self.stream, self.kind, self.draw]).decode()

    @property
    def n(self) -> int:
        return int(sum(self.counts))


@dataclass
class GuardState:
    """Everything the guard carries from one piece to the next (and across restarts)."""

    ledger: str
    writers: dict[str, Mark] = field(default_factory=dict)
    watches: dict[str, Watch] = field(default_factory=dict)
    decisions: int = 0
    outcomes: int = 0
    verify: dict[str, int] = field(
        default_factory=lambda: {"verified": 0, "mismatched": 0, "unreplayable": 0}
    )
    by_reason: dict[str, int] = field(default_factory=dict)
    integrity: dict[str, int] = field(default_factory=lambda: dict.fromkeys(INTEGRITY_PROBLEMS, 0))
    alarms: list[dict[str, Any]] = field(default_factory=list)
    pieces: int = 0

    def alarmed(self, key: str) -> bool:
        return any(a["key"] == key for a in self.alarms)

    def to_dict(self) -> dict[str, Any]:
        return {
            "version": VERSION,
            "ledger": self.ledger,
            "writers": {k: asdict(m) for k, m in sorted(self.writers.items())},
            "watches": [asdict(w) for _, w in sorted(self.watches.items())],
            "decisions": self.decisions,
            "outcomes": self.outcomes,
            "verify": dict(self.verify),
            "by_reason": dict(sorted(self.by_reason.items())),
            "integrity": dict(self.integrity),
            "alarms": list(self.alarms),
            "pieces": self.pieces,
        }

    @classmethod
    def from_dict(cls, data: Any, source: str) -> GuardState:
        """The state saved in ``data``; ``ReplayError`` naming ``source`` when it is not one."""
        try:
            if not isinstance(data, dict) or data.get("version") != VERSION:
                raise TypeError("not a version 1 guard state")
            watches = [Watch(**w) for w in data["watches"]]
            for w in watches:
                _check_watch(w)
            state = cls(
                ledger=str(data["ledger"]),
                writers={str(k): Mark(**m) for k, m in data["writers"].items()},
                watches={w.key: w for w in watches},
                decisions=int(data["decisions"]),
                outcomes=int(data["outcomes"]),
                verify={str(k): int(v) for k, v in data["verify"].items()},
                by_reason={str(k): int(v) for k, v in data["by_reason"].items()},
                integrity={str(k): int(v) for k, v in data["integrity"].items()},
                alarms=[dict(a) for a in data["alarms"]],
                pieces=int(data["pieces"]),
            )
            for mark in state.writers.values():
                if not isinstance(mark.seq, int) or mark.seq < -1:
                    raise ValueError("a writer's seq is not an integer >= -1")
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise ReplayError(f"guard state {source!r} cannot be used: {exc}") from None
        return state


def new_alarm(
    stream: str, draw: str | None, test: str, decision: str | None, detail: str,
    evidence: float | None = None, threshold: float | None = None,
) -> dict[str, Any]:  # fmt: skip
    """An alarm as the guard records it; ``key`` says which alarms are the same one."""
    key = "\x1f".join((stream, draw or "", test))
    return {"key": key, "stream": stream, "draw": draw, "test": test, "evidence": evidence,
            "threshold": threshold, "decision": decision, "detail": detail}  # fmt: skip


def _check_watch(w: Watch) -> None:
    if w.test not in ("ratio", "pit"):
        raise ValueError(f"unknown test {w.test!r}")
    sizes = {len(w.keys), len(w.declared), len(w.counts)}
    if len(sizes) != 1 or len(w.uniforms) != UNIFORM_BINS:
        raise ValueError("a watch's cells disagree in length")
    for x in (*w.declared, *w.counts, w.log_e, w.log_e_uniforms):
        if not isinstance(x, (int, float)) or not math.isfinite(x):
            raise ValueError("a watch holds a value that is not a finite number")


def load_state(path: str | os.PathLike[str] | None, ledger: str) -> GuardState:
    """The state saved at ``path`` for ``ledger``, or a new state when there is no file yet."""
    if path is None or not Path(path).exists():
        return GuardState(ledger=ledger)
    text = os.fspath(path)
    try:
        data = orjson.loads(Path(path).read_bytes())
    except orjson.JSONDecodeError as exc:
        raise ReplayError(f"guard state {text!r} is not JSON: {exc}") from None
    state = GuardState.from_dict(data, text)
    if state.ledger != ledger:
        raise ReplayError(f"guard state {text!r} follows another ledger ({state.ledger!r}); "
                          "give each ledger its own --state file")  # fmt: skip
    return state


def save_state(
    path: str | os.PathLike[str] | None, state: GuardState, unchanged: bytes | None = None
) -> bytes:
    """Write the state atomically: a reader or a restart sees the old file or the new one.

    Returns the bytes written; when they equal ``unchanged`` (what the file already holds)
    nothing is written.
    """
    data = orjson.dumps(state.to_dict(), option=orjson.OPT_INDENT_2) + b"\n"
    if path is None or data == unchanged:
        return data
    target = Path(path)
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "wb") as out:
            out.write(data)
            out.flush()
            os.fsync(out.fileno())
        os.replace(tmp, target)
    finally:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
    flags = getattr(os, "O_DIRECTORY", 0)
    try:
        fd = os.open(target.parent, os.O_RDONLY | flags)
    except OSError:
        return data
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
    return data
