"""``run_demo``: the grocery-delivery scenario end to end, on the embedded SQLite default.

1. The seeded shopper simulator (``_grocery``) drives the two instrumented decisions,
   "recipe-card" and "reminder-delay", recording into ``OUT/decisions.db`` through the SDK,
   and records each session's ``checkout`` outcome against both decisions.
2. ``verify`` replays every decision and checks the ledger's integrity; ``audit`` tests the
   randomization of both streams.
3. Two what-if questions: the recipe card at a lower softmax temperature (``estimate``), and
   the reminder at shorter nominal delays (``sweep``). The simulator knows the true value of
   every policy, so each estimate is shown beside it.
4. ``write_report`` writes ``OUT/report.html``.
"""

from __future__ import annotations

import os
import shlex
import sys
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import sqlalchemy as sa

import drawledger as dl
from drawledger._text import counted
from drawledger.exceptions import LedgerError, ReplayError
from drawledger.replay._html import html_table
from drawledger.replay.audit import AuditReport, audit
from drawledger.replay.demo import grocery
from drawledger.replay.demo.grocery import LOGGING_POLICY as log
from drawledger.replay.estimate import EstimateReport, SweepReport, estimate, sweep
from drawledger.replay.report import WhatIf, write_report
from drawledger.replay.verify import VerifyReport, verify
from drawledger.testing import reproducible_seeds

__all__ = ["DEFAULT_SESSIONS", "DemoResult", "run_demo"]

DEFAULT_SESSIONS = 4_000
MAX_SESSIONS = 1_000_000
DEMO_MODULE = "drawledger.replay.demo.grocery"
EARLIER_DEMO_MODULE = "drawledger.replay._grocery"  # what demo ledgers before 0.1 recorded
ALLOW = (DEMO_MODULE,)
REWARD = "checkout"
TARGET_TEMPERATURE = 0.3
SWEEP_MINUTES = (45.0, 60.0, 75.0, 90.0)  # at 30 the weights are too uneven
LEDGER_FILES = ("decisions.db", "decisions.db-wal", "decisions.db-shm")


@dataclass
class DemoResult:
    """Everything the demo produced: the reports, the true values and the timings."""

    out: Path
    sessions: int
    seed: int
    verification: VerifyReport
    audit: AuditReport
    temperature: EstimateReport
    delay: SweepReport
    truth: dict[str, Any]
    seconds: dict[str, float] = field(default_factory=dict)

    @property
    def ledger(self) -> Path:
        return self.out / "decisions.db"

    @property
    def report(self) -> Path:
        return self.out / "report.html"

    @property
    def ok(self) -> bool:
        """Every decision verified, the integrity intact and no audit alarm."""
        return self.verification.ok and self.audit.ok

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "sessions": self.sessions,
            "seed": self.seed,
            "ledger": str(self.ledger),
            "report": str(self.report),
            "verify": self.verification.to_dict(),
            "audit": self.audit.to_dict(),
            "temperature": self.temperature.to_dict(),
            "delay": self.delay.to_dict(),
            "truth": self.truth,
            "seconds": self.seconds,
        }

    def _repr_html_(self) -> str:
        """The temperature estimates beside the simulator's true value (notebooks)."""
        t, truth = self.temperature, self.truth["temperature"]
        caption = (f"drawledger demo, {self.sessions} sessions: temperature "
                   f"{TARGET_TEMPERATURE:g} instead of {log['temperature']:g}, true checkout "
                   f"rate {_f(truth)}; verify {'passed' if self.verification.ok else 'FAILED'}, "
                   f"audit {self.audit.verdict}")  # fmt: skip
        rows = [(name, e.value, e.low, e.high) for name, e in t.results.items()]
        return html_table(caption, ("estimator", "estimate", "low", "high"), rows)

    def render(self) -> str:
        """The short summary printed by ``drawledger demo``."""

        v, a = self.verification, self.audit
        lines = [
            f"drawledger demo: grocery-delivery app, {self.sessions:,} shopper sessions "
            f"(simulator seed {self.seed})",
            f"  ledger   {self.ledger}: {v.decisions:,} decisions, "
            f"{v.integrity.outcomes:,} outcomes ({self.seconds.get('simulate', 0):.1f} s)",
            f"  verify   {v.verified:,} of {v.decisions:,} decisions verified, "
            f"{v.mismatched:,} mismatched, {v.unreplayable:,} unreplayable; integrity "
            f"{'intact' if v.integrity.ok else 'FAILED'}",
            f"  audit    {counted(len(a.tests), 'test')} on "
            f"{counted(len({t.stream for t in a.tests}), 'stream')}: "
            + a.verdict
            + f" (Holm-corrected p < {a.alpha:g})",
            "",
            f"What if the recipe card used temperature {TARGET_TEMPERATURE:g} instead of "
            f"{log['temperature']:g}? (reward: checkout within 24 h)",
        ]
        t = self.temperature
        truth = self.truth["temperature"]
        lines.append(
            f"  logged policy: observed {_f(t.logging_value)}, true {_f(self.truth['logging'])}; "
            f"target: true {_f(truth)}; ESS {t.diagnostics['ess']:,.0f} of {t.n:,}"
        )
        lines.append(f"  {'estimator':<10}{'estimate':>9}   {'95% interval':<18}  true value")
        missed = False
        for name, e in t.estimates.items():
            extra = ""
            if "outer_low" in e:
                extra = f"   outer band [{_f(e['outer_low'])}, {_f(e['outer_high'])}]"
            mark = _mark(e, truth)
            missed = missed or mark == " *"
            lines.append(
                f"  {name:<10}{_f(e['value']):>9}   [{_f(e['low'])}, {_f(e['high'])}]"
                f"  {_f(truth)}{mark}{extra}"
            )
        s = self.delay
        lines += [
            "",
            f"What if reminders went out sooner? Nominal delay swept from "
            f"{log['nominal_minutes']:g} down to {min(s.values):g} minutes (SNIPS)",
            f"  {'minutes':>7}{'estimate':>10}   {'95% interval':<18}  {'true':>6}  {'ESS':>6}",
        ]
        uneven = False
        for p, true in zip(s.points, self.truth["delay"], strict=True):
            e = p["estimates"]["snips"]
            mark = _mark(e, true)
            missed = missed or mark == " *"
            uneven = uneven or bool(p["alerts"])
            lines.append(
                f"  {p['value']:>7g}{_f(e['value']):>10}   [{_f(e['low'])}, {_f(e['high'])}]"
                f"  {_f(true)}{mark}  {p['diagnostics']['ess']:>6,.0f}"
                + ("  read with care" if p["alerts"] else "")
            )
        lines.append(
            "  (the interval widens as the target moves away from the logged "
            f"{log['nominal_minutes']:g} minutes: fewer records carry its weight)"
        )
        if missed:
            lines.append("  * the interval misses the true value (expected about 1 time in 20)")
        if uneven:
            lines.append("  read with care: the weights are too uneven there (the report says why)")
        lines += ["", "Re-run the checks on this ledger:"]
        lines += [f"  {command}" for command in self.commands()]
        lines += [
            "",
            f"report   {self.report}",
            f"done in {sum(self.seconds.values()):.1f} s; "
            + ("all checks passed" if self.ok else "problems found (see the report)"),
        ]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.render()

    def commands(self) -> list[str]:
        """The commands that re-run the demo's checks (verify, audit, estimate, report), as a
        shell runs them: the decision code is allowed by its public module's name."""
        db, allow = shlex.quote(str(self.ledger)), f"--allow {DEMO_MODULE}"
        what_if = f"--reward {REWARD} --stream recipe-card --set temperature={TARGET_TEMPERATURE:g}"
        html = shlex.quote(str(self.report))
        return [
            f"drawledger verify {db} {allow}",
            f"drawledger audit {db}",
            f"drawledger estimate {db} {what_if} {allow}",
            f"drawledger report {db} --html {html} {what_if} {allow}",
        ]


def _f(x: float | None) -> str:
    return "-" if x is None else f"{x:.4f}"


def _mark(e: dict[str, Any], truth: float) -> str:
    """' *' when the interval misses the true value, else blank."""
    if e["low"] is None or e["high"] is None:
        return "  "
    return "  " if e["low"] <= truth <= e["high"] else " *"


def _prepare_out(out: Path) -> Path:
    """Create ``out``; remove a previous demo ledger there (refuse any other file or ledger)."""
    if out.exists() and not out.is_dir():
        raise LedgerError(f"--out {out} is a file, not a directory")
    out.mkdir(parents=True, exist_ok=True)
    db = out / "decisions.db"
    if db.exists():
        engine = sa.create_engine(f"sqlite:///{db}")
        try:
            names = set(sa.inspect(engine).get_table_names())
            others = 0
            if "decisions" in names:
                with engine.connect() as conn:
                    others = conn.execute(
                        sa.text(
                            "SELECT COUNT(*) FROM decisions WHERE fn IS NULL OR "
                            "(fn NOT LIKE :p AND fn NOT LIKE :q)"
                        ),
                        {"p": f"{DEMO_MODULE}:%", "q": f"{EARLIER_DEMO_MODULE}:%"},
                    ).scalar_one()
        except sa.exc.SQLAlchemyError:
            names, others = set(), 0
        finally:
            engine.dispose()
        if not {"decisions", "draws", "outcomes"} <= names:
            raise LedgerError(f"{db} exists and is not a drawledger ledger; choose another --out")
        if others:
            raise LedgerError(
                f"{db} holds {others} decisions that are not the demo's; choose another --out"
            )
        for name in LEDGER_FILES:
            (out / name).unlink(missing_ok=True)
    return db


@contextmanager
def _stage(name: str, seconds: dict[str, float]) -> Iterator[None]:
    start = time.perf_counter()
    yield
    seconds[name] = time.perf_counter() - start


def _simulate(db: Path, sessions: int, seed: int, progress: bool) -> None:
    """Record ``sessions`` shopper sessions: two decisions and their checkout outcome each."""

    ledger = dl.Ledger(db)
    decisions: tuple[dl.Decision[Any], ...] = (grocery.feature_card, grocery.reminder_delay)
    previous = [d.ledger for d in decisions]
    for d in decisions:
        d.ledger = ledger
    sim = grocery.ShopperSimulator(seed)
    bar = _bar(progress, "simulating shoppers", sessions)
    try:
        # Reproducible draw seeds for the demo only (production seeds come from the OS CSPRNG).
        with reproducible_seeds(ledger, f"drawledger-demo-{seed}"):
            for i, s in enumerate(sim.sessions(sessions)):
                card_id, reminder_id = f"card-{i:06d}", f"reminder-{i:06d}"
                card = grocery.feature_card(s.card_context(), unit=s.shopper, decision_id=card_id)
                delay = grocery.reminder_delay(s.basket, unit=s.shopper, decision_id=reminder_id)
                checkout = 1.0 if sim.checkout(s, card, delay) else 0.0
                ledger.outcome(card_id, REWARD, checkout)
                ledger.outcome(reminder_id, REWARD, checkout)
                if bar is not None and i % 500 == 499:
                    bar(500)
        ledger.close()
        if ledger.stats()["spilled"]:
            raise LedgerError(f"some records could not be written to {db} and were spilled")
    finally:
        if bar is not None:
            bar(None)
        for d, led in zip(decisions, previous, strict=True):
            d.ledger = led


def _bar(enabled: bool, label: str, total: int) -> Any:
    """A rich progress bar on stderr; call with None to stop it."""
    if not enabled:
        return None
    from rich.console import Console
    from rich.progress import Progress

    bar = Progress(console=Console(stderr=True), transient=True)
    task = bar.add_task(label, total=total)
    bar.start()

    def advance(n: int | None) -> None:
        if n is None:
            bar.stop()
        else:
            bar.advance(task, n)

    return advance


def run_demo(
    decisions: int = DEFAULT_SESSIONS,
    out: str | os.PathLike[str] = "drawledger-demo",
    *,
    seed: int = 10,
    progress: bool = False,
    sweep_minutes: Sequence[float] = SWEEP_MINUTES,
) -> DemoResult:
    """Run the grocery-delivery demo: simulate, record, verify, audit, estimate, report.

    ``decisions`` is the number of shopper sessions; each records one "recipe-card" and one
    "reminder-delay" decision and their ``checkout`` outcome into ``out/decisions.db`` (a
    previous demo ledger there is replaced). ``seed`` seeds the shopper simulator and, for
    this demo only, the draws (production draws take fresh seeds from the operating system),
    so the demo's output is reproducible. ``progress``
    shows progress bars when stderr is a terminal. Returns a ``DemoResult``;
    ``out/report.html`` is the HTML report.
    """

    if isinstance(decisions, bool) or not isinstance(decisions, int):
        raise ReplayError(f"the number of sessions must be an integer, got {decisions!r}")
    if not 50 <= decisions <= MAX_SESSIONS:
        raise ReplayError(
            f"the demo needs between 50 and {MAX_SESSIONS:,} sessions, got {decisions}"
        )
    if not sweep_minutes or any(not m > 0 for m in sweep_minutes):
        raise ReplayError("sweep_minutes must be positive numbers of minutes")
    folder = Path(os.fspath(out))
    seconds: dict[str, float] = {}
    progress = progress and sys.stderr.isatty()
    db = _prepare_out(folder)
    with _stage("simulate", seconds):
        _simulate(db, decisions, seed, progress)
    with _stage("verify", seconds):
        verification = verify(db, allow=ALLOW, progress=progress)
    with _stage("audit", seconds):
        audit_report = audit(db, progress=progress)
    target = {"temperature": TARGET_TEMPERATURE}
    common: dict[str, Any] = {"reward": REWARD, "allow": ALLOW, "progress": progress}
    with _stage("estimate", seconds):
        temperature = estimate(db, overrides=target, stream="recipe-card", **common)
    grid = [float(m) for m in sweep_minutes]
    with _stage("sweep", seconds):
        delay = sweep(db, param="nominal_minutes", values=grid, stream="reminder-delay", **common)
    sim = grocery.ShopperSimulator
    truth: dict[str, Any] = {
        "logging": sim.true_value(),
        "temperature": sim.true_value(temperature=TARGET_TEMPERATURE),
        "delay": [sim.true_value(nominal_minutes=m) for m in grid],
    }
    whatifs = [
        WhatIf(
            f"recipe-card: temperature {grocery.LOGGING_POLICY['temperature']:g} → "
            f"{TARGET_TEMPERATURE:g}",
            temperature,
            truth["temperature"],
        ),
        WhatIf("reminder-delay: a shorter nominal delay (sweep)", delay, truth["delay"]),
    ]
    with _stage("report", seconds):
        write_report(
            db,
            folder / "report.html",
            verification=verification,
            audit_report=audit_report,
            whatifs=whatifs,
            title="drawledger demo: grocery-delivery app",
            progress=progress,
        )
    return DemoResult(
        out=folder,
        sessions=decisions,
        seed=seed,
        verification=verification,
        audit=audit_report,
        temperature=temperature,
        delay=delay,
        truth=truth,
        seconds=seconds,
    )
