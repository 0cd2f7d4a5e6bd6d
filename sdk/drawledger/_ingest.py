"""``drawledger.ingest``: load spill files and declared draws (JSON Lines) into a ledger.

A line is one of (docs/ledger.md):

- a spilled decision ``{"decision": [...16 values...], "draws": [[...9 values...], ...]}`` or a
  spilled outcome ``{"outcome": [...8 values...]}``, as the writer spills them. They are stored
  as they are (same writer, seq and hash) after their hash is checked with the ledger's
  integrity key; a record whose (writer, seq) is already in the ledger is skipped, so loading a
  file twice, or a file the writer later managed to write anyway, adds each record once;
- a declared draw ``{"decision_id", "stream", "unit", "ts", "kind", "args", "value", "prob"}``
  with optional ``"u"``, recorded as by ``Ledger.record_draw``; a declared draw whose
  decision id is already among the decisions of its stream is skipped.

A malformed line is reported with its line number and skipped; every other line is loaded.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import orjson

from drawledger import _records, _sinks
from drawledger._schema import (
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
    malformed: list[tuple[int, str]] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """Every line was loaded (or was already present)."""
        return not self.malformed and not self.spilled

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
            "malformed": [{"line": n, "reason": r} for n, r in self.malformed],
        }

    def render(self) -> str:
        """Plain-text summary for the terminal."""
        out = [
            f"{self.file}: {counted(self.lines, 'line')}; loaded "
            f"{counted(self.decisions, 'spilled decision')}, "
            f"{counted(self.outcomes, 'spilled outcome')}, "
            f"{counted(self.declared, 'declared draw')}; "
            f"{self.already_present} already in the ledger; {len(self.malformed)} malformed"
        ]
        out += [f"  line {n}: {visible(reason)}" for n, reason in self.malformed[:MAX_SHOWN]]
        if len(self.malformed) > MAX_SHOWN:
            out.append(f"  ... and {len(self.malformed) - MAX_SHOWN} more malformed lines")
        if self.spilled:
            out.append(f"  {counted(self.spilled, 'declared draw')} could not be written and "
                       "were spilled")  # fmt: skip
        return "\n".join(out)

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


class _Loader:
    def __init__(self, path: Path, ledger: Ledger, sink: _sinks.Sink) -> None:
        self.path = path
        self.ledger = ledger
        self.sink = sink
        self.key = ledger._key
        self.report = IngestReport(os.fspath(path))
        self.spilled_before = ledger.stats()["spilled"]
        self.seen_declared: set[str] = set()

    def run(self) -> IngestReport:
        spilled: list[tuple[str, Row, list[Row]]] = []
        declared: list[tuple[int, dict[str, Any]]] = []
        for number, obj in self._objects():
            try:
                if "decision" in obj or "outcome" in obj:
                    spilled.append(_spill_record(obj, self.key))
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
        self.ledger.flush()
        self.report.spilled = self.ledger.stats()["spilled"] - self.spilled_before
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
                        self.report.malformed.append((number, f"not valid JSON ({exc})"))
                        continue
                    if not isinstance(obj, dict):
                        self.report.malformed.append((number, "not a JSON object"))
                        continue
                    yield number, obj
        except OSError as exc:
            raise LedgerError(f"cannot read {os.fspath(self.path)!r}: {exc}") from None

    def _load_spilled(self, records: list[tuple[str, Row, list[Row]]]) -> None:
        if not records:
            return
        fresh: list[tuple[str, Row, list[Row]]] = []
        taken: set[tuple[str, str, int]] = set()
        for kind, table in (("d", "decisions"), ("o", "outcomes")):
            at = _POSITIONS[kind]
            by_writer: dict[str, list[int]] = {}
            for k, row, _ in records:
                if k == kind:
                    by_writer.setdefault(row[at.writer], []).append(row[at.seq])
            for writer, seqs in by_writer.items():
                present = self.sink.present_seqs(table, writer, min(seqs), max(seqs))
                taken.update((kind, writer, s) for s in present)
        for rec in records:
            kind, row, _ = rec
            at = _POSITIONS[kind]
            key = (kind, row[at.writer], row[at.seq])
            if key in taken:
                self.report.already_present += 1
            else:
                taken.add(key)
                fresh.append(rec)
        decisions = [row for k, row, _ in fresh if k == "d"]
        draws = [d for k, _, d in fresh if k == "d"]
        outcomes = [row for k, row, _ in fresh if k == "o"]
        self.sink.write(decisions, draws, outcomes)
        self.report.decisions += len(decisions)
        self.report.outcomes += len(outcomes)

    def _load_declared(self, lines: list[tuple[int, dict[str, Any]]]) -> None:
        if not lines:
            return
        ids = [obj["decision_id"] for _, obj in lines]
        present = self.sink.present_ids(ids, {obj["stream"] for _, obj in lines})
        for number, obj in lines:
            did = obj["decision_id"]
            if did in present or did in self.seen_declared:
                self.report.already_present += 1
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
            self.seen_declared.add(did)
            self.report.declared += 1
        self.ledger.flush()


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


def _count(x: Any, what: str) -> int:
    if isinstance(x, bool) or not isinstance(x, int) or x < 0:
        raise _Bad(f"{what} must be a non-negative integer, got {x!r}")
    return x


def _field(column: Column, x: Any, what: str) -> Any:
    """One stored value, checked against its column's logical type (no number is nullable)."""
    if column.kind == "float":
        return _number(x, what)
    if column.kind == "integer":
        return _count(x, what)
    return _text(x, what, nullable=column.nullable)


def _row(values: Any, table: TableSpec, what: str) -> Row:
    """A spilled row of ``table``, checked column by column."""
    columns = table.columns
    if not isinstance(values, list) or len(values) != len(columns):
        raise _Bad(f"{what} must be a list of {len(columns)} values")
    return tuple(_field(c, x, f"{what} {c.name}") for c, x in zip(columns, values, strict=True))


def _spill_record(obj: dict[str, Any], key: bytes) -> tuple[str, Row, list[Row]]:
    """A spilled decision or outcome, checked field by field and against its hash."""
    if "decision" in obj:
        if set(obj) != {"decision", "draws"} or not isinstance(obj["draws"], list):
            raise _Bad('a spilled decision has exactly the keys "decision" and "draws" (a list)')
        row = _row(obj["decision"], DECISIONS, "decision")
        draws = [_row(d, DRAWS, "draw") for d in obj["draws"]]
        did = row[DEC.decision_id]
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
