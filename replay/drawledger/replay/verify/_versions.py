"""``drawledger versions``: the code versions that ran, and a diff between two of them.

Read from the ledger alone (docs/deploys.md): each version's stored source, its decisions and
when they ran. Stored source text is only read and compared, never executed.
"""

from __future__ import annotations

import difflib
import hashlib
import os
import re
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

from drawledger._code import CODE_IDENTITY_VERSION, source_identity
from drawledger.exceptions import ReplayError
from drawledger.replay.sources import decision_versions, read_code_versions

_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")


def plain(text: str) -> str:
    """Text from a ledger made safe for a terminal: control characters shown as escapes."""
    return _CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}", text)


def source_matches(identity: str, source: str | None) -> bool | None:
    """Whether stored source text hashes to the identity its decisions recorded (None: no
    source stored). This binds the stored text to the hash chain, which covers the identity."""
    if source is None:
        return None
    if identity.startswith(CODE_IDENTITY_VERSION):
        try:
            return source_identity(source) == identity
        except SyntaxError:
            return False
    return hashlib.blake2b(source.encode(), digest_size=16).hexdigest() == identity


@dataclass
class CodeVersion:
    """One version of one decision function, as the ledger knows it."""

    identity: str
    stream: str
    fn: str
    decisions: int
    first_ts: float | None
    last_ts: float | None
    module_file: str | None = None
    source: str | None = None
    source_ok: bool | None = None  # None: no source stored

    def to_dict(self) -> dict[str, Any]:
        return {
            "identity": self.identity,
            "stream": self.stream,
            "fn": self.fn,
            "module_file": self.module_file,
            "first_seen": self.first_ts,
            "last_seen": self.last_ts,
            "decisions": self.decisions,
            "source_stored": self.source is not None,
            "source_matches_identity": self.source_ok,
        }


def _when(ts: float | None) -> str:
    if ts is None:
        return "-"
    return datetime.fromtimestamp(ts, tz=timezone.utc).strftime("%Y-%m-%d %H:%M:%S")


@dataclass
class VersionsReport:
    """The code versions of a ledger; ``diff`` is set when two were compared."""

    versions: list[CodeVersion]
    diff: str | None = None
    compared: tuple[str, str] | None = None
    problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """No stored source differs from the identity its decisions recorded."""
        return not self.problems

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "ok": self.ok,
            "problems": list(self.problems),
            "versions": [v.to_dict() for v in self.versions],
        }
        if self.compared is not None:
            out["diff"] = {"from": self.compared[0], "to": self.compared[1], "text": self.diff}
        return out

    def render(self) -> str:
        lines = [f"PROBLEM: {plain(p)}" for p in self.problems]
        if self.compared is not None:
            lines.append(plain(self.diff or "") or "(the two versions have the same source text)")
            return "\n".join(lines)
        header = ("identity", "stream", "function", "first seen", "last seen", "decisions")
        table = [header] + [
            (v.identity, v.stream, v.fn, _when(v.first_ts), _when(v.last_ts), str(v.decisions))
            for v in self.versions
        ]
        widths = [max(len(plain(r[i])) for r in table) for i in range(len(header))]
        for row in table:
            cells = [plain(c).rjust(w) if i == 5 else plain(c).ljust(w)
                     for i, (c, w) in enumerate(zip(row, widths, strict=True))]  # fmt: skip
            lines.append("  ".join(cells).rstrip())
        distinct = len({v.identity for v in self.versions})
        lines.append(f"{distinct} code versions of {len({v.fn for v in self.versions})} functions")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.render()


def code_versions(
    ledger: str | os.PathLike[str], *, format: str | None = None, stream: str | None = None
) -> VersionsReport:
    """The code versions that made the decisions of a ledger (of ``stream``): identity,
    function, first and last decision, number of decisions, and whether its source is stored."""
    stored: dict[str, list[Any]] = {}
    for identity, _s, _fn, module_file, source, _ts, _w in read_code_versions(
        ledger, format=format
    ):
        if identity not in stored or (stored[identity][1] is None and source is not None):
            stored[identity] = [module_file, source]
    versions = []
    for use in decision_versions(ledger, format=format):
        if stream is not None and use.stream != stream:
            continue
        module_file, source = stored.get(use.identity, [None, None])
        versions.append(CodeVersion(
            use.identity, use.stream, use.fn, use.decisions, use.first_ts, use.last_ts,
            module_file, source, source_matches(use.identity, source),
        ))  # fmt: skip
    problems = [
        f"the stored source of {v.fn} {v.identity} does not hash to its identity "
        "(edited after it was recorded?)"
        for v in versions
        if v.source_ok is False
    ]
    return VersionsReport(versions, problems=problems)


def _find(versions: list[CodeVersion], wanted: str) -> CodeVersion:
    found = {v.identity: v for v in versions if v.identity == wanted}
    if not found:
        bare = wanted.removeprefix(CODE_IDENTITY_VERSION)
        found = {v.identity: v for v in versions
                 if v.identity.removeprefix(CODE_IDENTITY_VERSION).startswith(bare)}  # fmt: skip
    if not found or not wanted:
        raise ReplayError(f"no code version {wanted!r} in this ledger (drawledger versions "
                          "lists them)")  # fmt: skip
    if len(found) > 1:
        raise ReplayError(f"code version {wanted!r} is ambiguous: it begins {len(found)} "
                          "identities; give more digits")  # fmt: skip
    return next(iter(found.values()))


def version_diff(
    ledger: str | os.PathLike[str], a: str, b: str, *, format: str | None = None,
    stream: str | None = None,
) -> VersionsReport:  # fmt: skip
    """A unified diff between the stored sources of two code versions (identities or unique
    beginnings of them, with or without ``v2:``)."""
    report = code_versions(ledger, format=format, stream=stream)
    old, new = _find(report.versions, a), _find(report.versions, b)
    for v in (old, new):
        if v.source is None:
            raise ReplayError(f"the ledger holds no source of {v.fn} {v.identity} (written "
                              "before sources were stored, or none was readable)")  # fmt: skip
    report.diff = unified_diff(old.source or "", new.source or "",
                               f"{old.fn} {old.identity}", f"{new.fn} {new.identity}")  # fmt: skip
    report.compared = (old.identity, new.identity)
    report.problems = [p for p in report.problems if old.identity in p or new.identity in p]
    return report


def unified_diff(old: str, new: str, old_name: str, new_name: str) -> str:
    """A unified diff of two source texts (difflib)."""
    lines = difflib.unified_diff(old.splitlines(keepends=True), new.splitlines(keepends=True),
                                 fromfile=old_name, tofile=new_name)  # fmt: skip
    return "".join(line if line.endswith("\n") else line + "\n" for line in lines).rstrip("\n")
