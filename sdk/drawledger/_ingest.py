"""``drawledger.ingest``: load spill files and declared draws (JSON Lines) into a ledger.

A line is one of (docs/ledger.md):

- a spilled decision ``{"decision": [...16 values...], "draws": [[...9 values...], ...]}`` or a
  spilled outcome ``{"outcome": [...8 values...]}``, as the writer spills them. They are stored
  as they are (same writer, seq and hash) after their hash is checked with the ledger's
  integrity key; a record whose (writer, seq) is already in the ledger with the same hash is
  skipped, so loading a file twice, or a file the writer later managed to write anyway, adds
  each record once; one whose (writer, seq) is stored with another hash is a *conflict*
  (tampering or a bug), reported and not loaded;
- a declared draw ``{"decision_id", "stream", "unit", "ts", "kind", "args", "value", "prob"}``
  with optional ``"u"``, recorded as by ``Ledger.record_draw``; a declared draw whose
  decision id is already among the decisions of its stream is skipped.

A decision whose id is already in the ledger under another record (another stream, or another
writer and seq) is refused and reported: decision ids are unique per ledger. A malformed line is
reported with its line number and skipped; every other line is loaded. A spill record cut short
(a write that failed on a full disk, or a crash in the middle of one) is a torn line: the last
line of a file, without its line break, is counted under ``torn`` (the writer counts a record as
spilled only once its whole line is on disk); a torn line inside the file is malformed, and a
complete record glued after it on the same line is still loaded.
"""

from __future__ import annotations

import codecs
import math
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import orjson

from drawledger import _records, _sinks
from drawledger._schema import (
    CODE_VERSIONS,
    DEC,
    DECISIONS,
    DRAW,
    DRAWS,
    OUT,
    OUTCOMES,
    Column,
    Positions,
    TableSpec,
)
from drawledger._text import counted, visible
from drawledger.exceptions import DrawledgerError, LedgerError
from drawledger.ledger import Ledger

__all__ = ["IngestReport", "ingest"]

BATCH = 5_000
MAX_SHOWN = 20
DECLARED_REQUIRED = ("decision_id", "stream", "ts", "kind", "args", "value", "prob")
DECLARED_FIELDS = frozenset((*DECLARED_REQUIRED, "unit", "u"))
Row = tuple[Any, ...]
# Positions in a spilled record's row by its kind ("d" decision, "o" outcome).
_POSITIONS: dict[str, Positions] = {"d": DEC, "o": OUT}


@dataclass
class IngestReport:
    """What ``ingest`` loaded, skipped and rejected."""

    file: str
    lines: int = 0
    decisions: int = 0
    outcomes: int = 0
    declared: int = 0
    already_present: int = 0
    spilled: int = 0
    rejected: int = 0
    malformed: list[tuple[int, str]] = field(default_factory=list)
    torn: list[int] = field(default_factory=list)
    conflicting: list[tuple[int, str]] = field(default_factory=list)
    duplicate_ids: list[tuple[int, str]] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """Every line was loaded (or was already present)."""
        return not (self.malformed or self.spilled or self.rejected or self.conflicting
                    or self.duplicate_ids)  # fmt: skip

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "file": self.file,
            "lines": self.lines,
            "decisions": self.decisions,
            "outcomes": self.outcomes,
            "declared": self.declared,
            "already_present": self.already_present,
            "spilled": self.spilled,
            "rejected": self.rejected,
            "malformed": [{"line": n, "reason": r} for n, r in self.malformed],
            "torn": list(self.torn),
            "conflicting": [{"line": n, "reason": r} for n, r in self.conflicting],
            "duplicate_ids": [{"line": n, "reason": r} for n, r in self.duplicate_ids],
        }

    def render(self) -> str:
        """Plain-text summary for the terminal; conflicts first, above everything else."""
        out = []
        if self.conflicting:
            out.append(
                f"CONFLICT: {counted(len(self.conflicting), 'record')} differ from the stored "
                "records with the same writer and seq (tampering or a bug); not loaded"
            )
        out.append(
            f"{self.file}: {counted(self.lines, 'line')}; loaded "
            f"{counted(self.decisions, 'spilled decision')}, "
            f"{counted(self.outcomes, 'spilled outcome')}, "
            f"{counted(self.declared, 'declared draw')}; "
            f"{self.already_present} already in the ledger; {len(self.conflicting)} conflicting; "
            f"{len(self.duplicate_ids)} refused for a decision id already in the ledger; "
            f"{len(self.malformed)} malformed"
            + (f"; torn last line {self.torn[0]} skipped (a write cut short)" if self.torn else "")
        )
        for label, found in (
            ("conflicting", self.conflicting),
            ("refused", self.duplicate_ids),
            ("malformed", self.malformed),
        ):
            out += [f"  line {n}: {visible(reason)}" for n, reason in found[:MAX_SHOWN]]
            if len(found) > MAX_SHOWN:
                out.append(f"  ... and {len(found) - MAX_SHOWN} more {label} lines")
        out += [f"  {problem}" for problem in self._unwritten()]
        return "\n".join(out)

    def _unwritten(self) -> list[str]:
        out = []
        if self.spilled:
            out.append(f"{counted(self.spilled, 'declared draw')} could not be written and "
                       "were spilled; ingest that spill file again")  # fmt: skip
        if self.rejected:
            out.append(f"{counted(self.rejected, 'declared draw')} refused by the writer: "
                       "their decision id reached the ledger during the ingest")  # fmt: skip
        return out

    def problems(self) -> list[str]:
        """One line per kind of problem, with its first example: what the command reports."""
        out = []
        for label, found in (("conflicting records not loaded", self.conflicting),
                             ("records refused for a decision id already in the ledger",
                              self.duplicate_ids),
                             ("malformed lines skipped", self.malformed)):  # fmt: skip
            if found:
                n, reason = found[0]
                out.append(f"{len(found)} {label} (first: line {n}: {visible(reason)})")
        return out + self._unwritten()

    def __str__(self) -> str:
        return self.render()


class _Bad(ValueError):
    """A malformed line (the message says why)."""


def ingest(
    file: str | os.PathLike[str],
    ledger: Ledger | str | os.PathLike[str],
    *,
    format: str | None = None,
    integrity_key: bytes | str | None = None,
) -> IngestReport:
    """Load a spill file or declared draws (JSON Lines) into ``ledger``; returns a report.

    ``ledger`` is an open ``Ledger`` or a target as for ``Ledger`` (then opened and closed
    here with ``format`` and ``integrity_key``). Raises ``LedgerError`` when the file cannot
    be read or the ledger cannot be written; batches loaded before such an error stay loaded,
    and loading the file again adds only what is missing.
    """
    path = Path(os.fspath(file)).expanduser()
    if not path.is_file():
        raise LedgerError(f"cannot ingest {os.fspath(file)!r}: no such file")
    own = not isinstance(ledger, Ledger)
    if isinstance(ledger, Ledger):
        led = ledger
    else:
        fmt = format if format is not None else _sinks.guess_format(ledger)
        led = Ledger(ledger, format=fmt, integrity_key=integrity_key)
    try:
        sink = _sinks.open_sink(led.target, led.format, durability=led.durability)
        try:
            return _Loader(path, led, sink).run()
        except DrawledgerError:
            raise
        except Exception as exc:  # a database or file-system error of the sink
            text = str(exc).strip().splitlines()
            raise LedgerError(
                f"cannot write to ledger {led.target!r}: {exc.__class__.__name__}: "
                f"{text[0] if text else ''}"
            ) from None
        finally:
            sink.close()
    finally:
        if own:
            led.close()


Spilled = tuple[int, str, Row, list[Row]]  # line number, kind ("d" or "o"), row, draw rows


class _Loader:
    def __init__(self, path: Path, ledger: Ledger, sink: _sinks.Sink) -> None:
        self.path = path
        self.ledger = ledger
        self.sink = sink
        self.key = ledger._key
        self.report = IngestReport(os.fspath(path))
        before = ledger.stats()
        self.spilled_before, self.rejected_before = before["spilled"], before["rejected"]
        self.loaded: dict[str, str] = {}  # stream of each decision id loaded by this run

    def run(self) -> IngestReport:
        spilled: list[Spilled] = []
        declared: list[tuple[int, dict[str, Any]]] = []
        versions: list[Row] = []
        for number, obj in self._objects():
            try:
                if "code_version" in obj:  # docs/deploys.md: stored as it was spilled
                    versions.append(_code_version(obj))
                elif "decision" in obj or "outcome" in obj:
                    spilled.append((number, *_spill_record(obj, self.key)))
                else:
                    declared.append((number, _declared(obj)))
            except _Bad as exc:
                self.report.malformed.append((number, str(exc)))
            if len(spilled) >= BATCH:
                self._load_spilled(spilled)
                spilled = []
            if len(declared) >= BATCH:
                self._load_declared(declared)
                declared = []
        self._load_spilled(spilled)
        self._load_declared(declared)
        write_versions = getattr(self.sink, "write_versions", None)
        if versions and write_versions is not None:
            write_versions(versions)
        self.ledger.flush()
        after = self.ledger.stats()
        self.report.spilled = after["spilled"] - self.spilled_before
        self.report.rejected = after["rejected"] - self.rejected_before
        self.report.declared -= self.report.rejected  # recorded, then refused by the writer
        return self.report

    def _objects(self) -> Iterator[tuple[int, dict[str, Any]]]:
        try:
            with self.path.open("rb") as fh:
                for number, line in enumerate(fh, start=1):
                    self.report.lines = number
                    if not line.strip():
                        continue
                    try:
                        obj = orjson.loads(line)
                    except orjson.JSONDecodeError as exc:
                        glued = _after_torn(line)
                        if glued is not None:
                            why = f"not valid JSON: {_TORN} before a complete one, loaded"
                            self.report.malformed.append((number, why))
                            yield number, glued
                        elif _is_torn(line) and not line.endswith(b"\n"):
                            self.report.torn.append(number)
                        elif _is_torn(line):
                            self.report.malformed.append((number, f"not valid JSON: {_TORN}"))
                        else:
                            self.report.malformed.append((number, f"not valid JSON ({exc})"))
                        continue
                    if not isinstance(obj, dict):
                        self.report.malformed.append((number, "not a JSON object"))
                        continue
                    yield number, obj
        except OSError as exc:
            raise LedgerError(f"cannot read {os.fspath(self.path)!r}: {exc}") from None

    def _load_spilled(self, records: list[Spilled]) -> None:
        if not records:
            return
        stored: dict[tuple[str, str, int], str] = {}  # (kind, writer, seq) -> hash
        for kind, table in (("d", "decisions"), ("o", "outcomes")):
            at = _POSITIONS[kind]
            by_writer: dict[str, list[int]] = {}
            for _, k, row, _ in records:
                if k == kind:
                    by_writer.setdefault(row[at.writer], []).append(row[at.seq])
            for writer, seqs in by_writer.items():
                present = self.sink.present_hashes(table, writer, min(seqs), max(seqs))
                stored.update(((kind, writer, s), h) for s, h in present.items())
        fresh: list[Spilled] = []
        for rec in records:
            number, kind, row, _ = rec
            at = _POSITIONS[kind]
            key = (kind, row[at.writer], row[at.seq])
            have = stored.get(key)
            if have is None:
                stored[key] = row[at.hash]
                fresh.append(rec)
            elif have == row[at.hash]:
                self.report.already_present += 1
            else:
                what = "decision" if kind == "d" else "outcome of"
                self.report.conflicting.append((number, (
                    f"{what} {row[at.decision_id]!r} (writer {row[at.writer]!r}, seq "
                    f"{row[at.seq]}) differs from the stored record with the same writer and "
                    "seq: tampering or a bug; not loaded"
                )))  # fmt: skip
        ids = [row[DEC.decision_id] for _, k, row, _ in fresh if k == "d"]
        taken = self.sink.stored_ids(ids) if ids else {}
        decisions, draws, outcomes = [], [], []
        for number, kind, row, its_draws in fresh:
            if kind == "o":
                outcomes.append(row)
                continue
            did = row[DEC.decision_id]
            stream = taken.get(did, self.loaded.get(did))
            if stream is not None:
                self.report.duplicate_ids.append((number, _duplicate(did, stream)))
                continue
            self.loaded[did] = row[DEC.stream]
            decisions.append(row)
            draws.append(its_draws)
        self.sink.write(decisions, draws, outcomes)
        for _, kind, row, _ in fresh:  # a chain that starts here: its writer never registered
            at = _POSITIONS[kind]
            if row[at.seq] == 0:
                self.sink.register_writer(row[at.writer], row[at.ts], self.key, row[at.prev_hash])
        self.report.decisions += len(decisions)
        self.report.outcomes += len(outcomes)

    def _load_declared(self, lines: list[tuple[int, dict[str, Any]]]) -> None:
        if not lines:
            return
        taken = self.sink.stored_ids([obj["decision_id"] for _, obj in lines])
        for number, obj in lines:
            did = obj["decision_id"]
            stream = taken.get(did, self.loaded.get(did))
            if stream is not None:
                if stream == obj["stream"]:
                    self.report.already_present += 1
                else:
                    self.report.duplicate_ids.append((number, _duplicate(did, stream)))
                continue
            try:
                self.ledger.record_draw(
                    obj["stream"], obj["kind"], obj["args"], obj["value"], obj["prob"],
                    unit=obj.get("unit"), decision_id=did, ts=float(obj["ts"]), u=obj.get("u"),
                )  # fmt: skip
            except DrawledgerError as exc:
                if isinstance(exc, LedgerError):
                    raise
                self.report.malformed.append((number, str(exc)))
                continue
            self.loaded[did] = obj["stream"]
            self.report.declared += 1
        self.ledger.flush()


_STARTS = (b'{"decision":', b'{"outcome":')
_TORN = "a torn line (the start of a spill record whose write was cut short)"


def _is_torn(line: bytes) -> bool:
    """A spill record cut short: it starts like one and is valid JSON up to where it ends."""
    text = line.rstrip(b"\r\n")
    if not text.startswith(_STARTS):
        return False
    try:  # a cut inside a character leaves the first bytes of it: drop them
        chars = codecs.getincrementaldecoder("utf-8")().decode(text)
    except UnicodeDecodeError:
        return False
    try:
        orjson.loads(chars)
    except orjson.JSONDecodeError as exc:
        return exc.pos >= len(chars)  # it failed only for want of what was never written
    return False


def _after_torn(line: bytes) -> dict[str, Any] | None:
    """The complete spill record glued after a torn one on the same line, if there is one."""
    starts = [i for i in (line.find(s, 1) for s in _STARTS) if i > 0]
    if not starts or not _is_torn(line[: min(starts)]):
        return None
    try:
        obj = orjson.loads(line[min(starts) :])
    except orjson.JSONDecodeError:
        return None
    return obj if isinstance(obj, dict) else None


def _duplicate(did: str, stream: str) -> str:
    return (
        f"decision id {did!r} is already in the ledger (stream {stream!r}) under another "
        "record; decision ids are unique per ledger, so this one was not loaded"
    )


def _number(x: Any, what: str) -> float:
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
        raise _Bad(f"{what} must be a finite number, got {x!r}")
    return float(x) + 0.0  # -0.0 becomes 0.0, as when recorded


def _text(x: Any, what: str, *, nullable: bool = False) -> Any:
    if x is None and nullable:
        return None
    if not isinstance(x, str):
        raise _Bad(f"{what} must be a string{' or null' if nullable else ''}, got {x!r}")
    if "\x00" in x:
        raise _Bad(f"{what} contains a NUL character, which cannot be stored")
    return x


def _count(x: Any, what: str, bits: int) -> int:
    """A non-negative integer that fits its column in every sink: a wide column is a 64-bit
    BIGINT, the others a 32-bit INTEGER in PostgreSQL."""
    if isinstance(x, bool) or not isinstance(x, int) or not 0 <= x < 2**bits:
        raise _Bad(f"{what} must be an integer from 0 to 2**{bits} - 1, got {x!r}")
    return x


def _field(column: Column, x: Any, what: str) -> Any:
    """One stored value, checked against its column's logical type (no number is nullable)."""
    if column.kind == "float":
        return _number(x, what)
    if column.kind == "integer":
        return _count(x, what, 63 if column.wide else 31)
    return _text(x, what, nullable=column.nullable)


def _row(values: Any, table: TableSpec, what: str) -> Row:
    """A spilled row of ``table``, checked column by column."""
    columns = table.columns
    if not isinstance(values, list) or len(values) != len(columns):
        raise _Bad(f"{what} must be a list of {len(columns)} values")
    return tuple(_field(c, x, f"{what} {c.name}") for c, x in zip(columns, values, strict=True))


def _code_version(obj: dict[str, Any]) -> Row:
    """A spilled code version row, checked field by field."""
    if set(obj) != {"code_version"}:
        raise _Bad('a spilled code version has exactly the key "code_version"')
    return _row(obj["code_version"], CODE_VERSIONS, "code version")


def _spill_record(obj: dict[str, Any], key: bytes) -> tuple[str, Row, list[Row]]:
    """A spilled decision or outcome, checked field by field and against its hash."""
    if "rejected" in obj:
        raise _Bad("a decision refused by its writer (a reject file line, kept for inspection): "
                   "its id was already in the ledger; it cannot be loaded")  # fmt: skip
    if "decision" in obj:
        if set(obj) != {"decision", "draws"} or not isinstance(obj["draws"], list):
            raise _Bad('a spilled decision has exactly the keys "decision" and "draws" (a list)')
        row = _row(obj["decision"], DECISIONS, "decision")
        draws = [_row(d, DRAWS, "draw") for d in obj["draws"]]
        did = row[DEC.decision_id]
        if any(d[DRAW.is_density] not in (0, 1) for d in draws):
            raise _Bad(f"a draw of spilled decision {did!r} has is_density other than 0 or 1")
        if any(d[DRAW.decision_id] != did for d in draws):
            raise _Bad(f"a draw of spilled decision {did!r} names another decision")
        if _records.decision_hash(row[: DEC.hash], draws, key) != row[DEC.hash]:
            raise _Bad(f"decision {did!r}: {_HASH_MISMATCH}")
        return "d", row, draws
    if set(obj) != {"outcome"}:
        raise _Bad('a spilled outcome has exactly the key "outcome"')
    row = _row(obj["outcome"], OUTCOMES, "outcome")
    if _records.outcome_hash(row[: OUT.hash], key) != row[OUT.hash]:
        raise _Bad(f"outcome of {row[OUT.decision_id]!r}: {_HASH_MISMATCH}")
    return "o", row, []


_HASH_MISMATCH = (
    "hash does not match the record (the line was altered, or the ledger uses another "
    "integrity key)"
)


def _declared(obj: dict[str, Any]) -> dict[str, Any]:
    """A declared draw, checked for its fields (record_draw checks the values)."""
    missing = [k for k in DECLARED_REQUIRED if k not in obj]
    if missing:
        raise _Bad(f"declared draw without {', '.join(missing)}")
    unknown = sorted(set(obj) - DECLARED_FIELDS)
    if unknown:
        raise _Bad(f"declared draw with unknown field {', '.join(unknown)}")
    if not isinstance(obj["decision_id"], str) or not obj["decision_id"]:
        raise _Bad("declared draw: decision_id must be a non-empty string")
    if not isinstance(obj["stream"], str) or not obj["stream"]:
        raise _Bad("declared draw: stream must be a non-empty string")
    _text(obj.get("unit"), "declared draw: unit", nullable=True)
    _number(obj["ts"], "declared draw: ts")
    u = obj.get("u")
    if u is not None and (
        not isinstance(u, list) or not all(0.0 < _number(x, "declared draw: u") < 1.0 for x in u)
    ):
        raise _Bad("declared draw: u must be a list of uniforms strictly between 0 and 1")
    return obj
