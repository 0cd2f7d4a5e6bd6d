"""One decision in full: its record, every draw beside its replay, its outcomes, the verdict.

``verify_one`` reads the decision through the source layer and checks it with the same
per-decision function as ``verify`` (``check_decision``), so its verdict is the one ``verify``
gives that decision. Of the integrity check it runs what concerns the decision alone: the
hashes of its record and of its outcomes, and whether its id is recorded more than once. The
links between records (gaps, broken links) are the ledger's: ``drawledger verify`` checks them.
"""

from __future__ import annotations

import os
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from drawledger._records import DECISION_COLUMNS, decision_hash, from_json, outcome_hash
from drawledger._schema import DEC, DRAW, OUT
from drawledger.exceptions import ReplayError
from drawledger.replay._terminal import plain_text, shown
from drawledger.replay.propensity import DEFAULT_BUDGET, DEFAULT_MC_SAMPLES
from drawledger.replay.sources import read_code_versions, read_decision
from drawledger.replay.verify._decision import Checked, Context, check_decision
from drawledger.replay.verify._types import NOT_FAILING, UNREPLAYABLE, Settings
from drawledger.replay.verify._versioned import current_identities, in_revisions, plan_pairs

if TYPE_CHECKING:
    from rich.console import Console, ConsoleOptions, RenderResult

DRAW_FIELDS = ("kind", "name", "args", "u", "value", "prob", "is_density")


def _value(text: Any) -> Any:
    """Recorded JSON text as its value; text that is not JSON is kept as it is."""
    if not isinstance(text, str):
        return text
    try:
        return from_json(text)
    except ValueError:
        return text


def _draw(fields: Iterable[Any]) -> dict[str, Any]:
    kind, name, args, u, value, prob, dens = fields
    return {"kind": kind, "name": name, "args": _value(args), "u": _value(u),
            "value": _value(value), "prob": prob, "is_density": bool(dens)}  # fmt: skip


def _json_text(value: Any) -> str:
    """A value as compact JSON text for the terminal (``repr`` for what JSON cannot hold)."""
    import orjson

    try:
        return orjson.dumps(value).decode()
    except TypeError:
        return repr(value)


@dataclass
class DecisionView:
    """One decision as recorded and as replayed. ``to_dict()`` is the JSON of
    ``drawledger show --json``; ``verified`` is the replay verdict ``verify`` gives it."""

    decision_id: str
    record: dict[str, Any]
    draws: list[dict[str, Any]]
    replayed_draws: list[dict[str, Any]] | None
    replayed_action: Any
    propensity: dict[str, Any] | None
    reasons: dict[str, str]
    outcomes: list[dict[str, Any]]
    copies: int = 1
    notes: list[str] = field(default_factory=list)

    @property
    def verified(self) -> bool:
        return not self.reasons

    @property
    def ok(self) -> bool:
        """Verified, or a declared draw (audited, not replayed), as ``verify`` counts it."""
        return not set(self.reasons) - NOT_FAILING

    @property
    def status(self) -> str:
        if self.verified:
            return "verified"
        return "unreplayable" if set(self.reasons) & UNREPLAYABLE else "mismatched"

    def to_dict(self) -> dict[str, Any]:
        draws = []
        for i, d in enumerate(self.draws):
            again = self.replayed_draws
            draws.append({**d, "replayed": again[i] if again is not None and i < len(again)
                          else None})  # fmt: skip
        extra = (self.replayed_draws or [])[len(self.draws) :]
        return {
            "ok": self.ok,
            "decision_id": self.decision_id,
            **self.record,
            "draws": draws,
            "replayed_extra_draws": extra,
            "replayed_action": self.replayed_action,
            "propensity": self.propensity,
            "status": self.status,
            "verified": self.verified,
            "reasons": dict(self.reasons),
            "outcomes": self.outcomes,
            "copies": self.copies,
            "notes": list(self.notes),
        }

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        from rich.table import Table
        from rich.text import Text

        r = self.record
        yield Text.assemble(("decision ", "bold"), shown(self.decision_id, "bold"))
        facts = Table.grid(padding=(0, 2))
        facts.add_column(style="dim", no_wrap=True)
        facts.add_column(overflow="fold")
        for label, value in (
            ("stream", r["stream"]), ("unit", r["unit"]), ("ts", _when(r["ts"])),
            ("function", r["fn"]), ("code hash", r["code_hash"]),
            ("writer, seq", f"{r['writer']}, {r['seq']}"), ("seed", r["seed"]),
            ("inputs", _json_text(r["inputs"])), ("params", _json_text(r["params"])),
            ("action", _json_text(r["action"])),
            ("replayed action", "-" if self.replayed_draws is None
             else _json_text(self.replayed_action)),
            ("logged propensity", f"{r['propensity']!r} ({r['propensity_kind']})"),
            ("replayed propensity", "-" if self.propensity is None
             else f"{self.propensity['value']!r} ({self.propensity['method']})"),
        ):  # fmt: skip
            facts.add_row(label, shown(value))
        yield facts
        yield self._draw_table(Table)
        if self.outcomes:
            table = Table(title="outcomes", title_justify="left")
            for name in ("name", "value", "ts", "writer", "seq"):
                table.add_column(name, overflow="fold")
            for o in self.outcomes:
                table.add_row(*(shown(o[k]) for k in ("name", "value", "ts", "writer", "seq")))
            yield table
        else:
            yield Text("outcomes: none recorded")
        for note in self.notes:
            yield Text.assemble(("note: ", "yellow"), shown(note))
        if self.verified:
            yield Text("replay: verified", style="bold green")
        else:
            style = "bold yellow" if self.ok else "bold red"
            yield Text(f"replay: {self.status}", style=style)
            for reason, detail in self.reasons.items():
                yield Text.assemble("  ", (reason, "bold"), ": ", shown(detail))

    def _draw_table(self, table_type: Any) -> Any:
        table = table_type(title="draws (recorded | replayed)", title_justify="left")
        for name in ("idx", "kind", "name", "args", "uniforms", "value", "replayed value",
                     "probability", "replayed probability"):  # fmt: skip
            table.add_column(name, overflow="fold")
        again = self.replayed_draws or []
        for i in range(max(len(self.draws), len(again))):
            rec = self.draws[i] if i < len(self.draws) else None
            rep = again[i] if i < len(again) else None
            first = rec or rep or {}
            replayed = "-" if self.replayed_draws is None else "(none)"
            table.add_row(
                str(i), shown(first.get("kind")), shown(first.get("name") or ""),
                shown(_json_text(first.get("args"))), shown(_json_text(first.get("u"))),
                shown("(none)" if rec is None else _json_text(rec["value"])),
                shown(replayed if rep is None else _json_text(rep["value"])),
                shown("(none)" if rec is None else _prob(rec)),
                shown(replayed if rep is None else _prob(rep)),
            )  # fmt: skip
        return table

    def render(self) -> str:
        """The decision as plain text."""
        return plain_text(self, width=160)

    def __str__(self) -> str:
        return self.render()


def _when(ts: Any) -> str:
    """A timestamp as recorded, with its UTC date and time when it is one."""
    import datetime as dt

    try:
        utc = dt.datetime.fromtimestamp(float(ts), dt.timezone.utc)
    except (TypeError, ValueError, OverflowError, OSError):
        return repr(ts)
    return f"{ts!r} ({utc:%Y-%m-%d %H:%M:%S} UTC)"


def _prob(d: dict[str, Any]) -> str:
    return f"{d['prob']!r}{' (density)' if d['is_density'] else ''}"


def _record(row: tuple[Any, ...]) -> dict[str, Any]:
    """The decision's columns (JSON columns as values), without its id and hash chain."""
    parsed = {"inputs", "params", "action"}
    return {name: _value(row[i]) if name in parsed else row[i]
            for i, name in enumerate(DECISION_COLUMNS)
            if name not in ("decision_id", "prev_hash", "hash")}  # fmt: skip


def verify_one(
    ledger: str | os.PathLike[str],
    decision_id: str,
    *,
    format: str | None = None,
    path: Iterable[str | os.PathLike[str]] = (),
    allow: Iterable[str] = (),
    budget: int = DEFAULT_BUDGET,
    mc_samples: int = DEFAULT_MC_SAMPLES,
    integrity_key: bytes | str | None = None,
    history: bool = True,
) -> DecisionView:
    """One decision of ``ledger`` in full, replayed as ``verify`` replays it (importing decision
    code only from ``path`` and ``allow``; a decision of another code version under the git
    revision that holds it, unless ``history`` is False), with the hashes of its records
    checked (``integrity_key``: the key the ledger was written with, if any). ``ReplayError``
    when the ledger has no decision ``decision_id``."""
    rows = read_decision(ledger, decision_id, format=format)
    if not rows.decisions:
        raise ReplayError(f"no decision {decision_id!r} in the ledger")
    row = rows.decisions[0]
    copies = len(rows.decisions)
    stored = {r[0]: r[4] for r in read_code_versions(ledger, format=format)
              if isinstance(r[0], str) and isinstance(r[4], str)}  # fmt: skip
    settings = Settings(path=tuple(os.fspath(p) for p in path), allow=tuple(allow),
                        budget=budget, mc_samples=mc_samples, keep_rows=False,
                        sources=tuple(sorted(stored.items())))  # fmt: skip
    key = integrity_key.encode() if isinstance(integrity_key, str) else (integrity_key or b"")
    notes = []
    if copies > 1:
        notes.append(f"the ledger holds {copies} decisions with this id; the first is shown "
                     "and the draws of all of them are compared with it")  # fmt: skip
    elif decision_hash(row, list(rows.draws), key) != row[DEC.hash]:
        notes.append("the record's hash does not match its content: it was changed after it "
                     "was written, or written with another integrity key")  # fmt: skip
    bad = [o[OUT.name] for o in rows.outcomes if outcome_hash(o, key) != o[OUT.hash]]
    if bad:
        notes.append(f"the hash of its outcome {', '.join(map(str, bad))} does not match its "
                     "content")  # fmt: skip
    notes.append("links between records (gaps, broken links) are not checked here: "
                 "drawledger verify checks them")  # fmt: skip
    checked = _under_its_version(row, list(rows.draws), settings, len(notes) > 1, history,
                                 notes)  # fmt: skip
    prop = checked.propensity
    return DecisionView(
        decision_id=decision_id,
        record=_record(row),
        draws=[_draw(d[getattr(DRAW, f)] for f in DRAW_FIELDS) for d in rows.draws],
        replayed_draws=None if checked.replayed is None else [_draw(d) for d in checked.replayed],
        replayed_action=None if checked.action is None else _value(checked.action),
        propensity=None if prop is None else {"value": prop.value, "method": prop.method,
                                              "stderr": prop.stderr},
        reasons=dict(checked.reasons),
        outcomes=[{k: o[getattr(OUT, k)] for k in ("name", "value", "ts", "writer", "seq")}
                  for o in rows.outcomes],
        copies=copies,
        notes=notes,
    )  # fmt: skip


def _under_its_version(row: tuple[Any, ...], draws: list[tuple[Any, ...]], settings: Settings,
                       flagged: bool, history: bool, notes: list[str]) -> Checked:  # fmt: skip
    """The decision checked as ``verify`` checks it: under the git revision that holds its
    code version when that is not the current one (a note says so), else here."""
    pair = (row[DEC.fn], row[DEC.code_hash])
    if history and isinstance(pair[0], str) and isinstance(pair[1], str):
        plan = plan_pairs({pair}, settings, current_identities({pair[0]}, settings.path))
        if plan.revisions:
            results, _ = in_revisions(plan, _checked_elsewhere, row, draws, flagged)
            if results:
                notes.append(f"replayed under {plan.revisions[0].label}")
                return results[0]
    return check_decision(row, draws, Context(settings), flagged)


def _checked_elsewhere(settings: Settings, row: tuple[Any, ...], draws: list[tuple[Any, ...]],
                       flagged: bool) -> Checked:  # fmt: skip
    """In a code version's process: the decision checked; its inputs (objects of that version's
    types) stay there."""
    checked = check_decision(row, draws, Context(settings), flagged)
    checked.inputs = {}
    return checked
