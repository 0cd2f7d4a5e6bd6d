"""``guard``: follow a growing ledger, piece by piece, and raise alarms people can route."""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterable
from typing import Any

from drawledger.exceptions import ReplayError
from drawledger.replay.guard._evidence import ALPHA
from drawledger.replay.guard._metrics import Metrics
from drawledger.replay.guard._report import GuardReport
from drawledger.replay.guard._state import GuardState, Mark, load_state, save_state
from drawledger.replay.guard._step import StepSettings, contiguous, take_piece, writer_of
from drawledger.replay.propensity import DEFAULT_BUDGET, DEFAULT_MC_SAMPLES
from drawledger.replay.sources import Follower, Head
from drawledger.replay.verify import Settings

# Records per piece: the unit the guard takes in and checks (the statistics and alarms are
# updated per piece).
PIECE_SIZE = 1_000

# Seconds between state saves while a look takes in pieces: the state is saved after a piece
# when this long has passed since the last save or when the piece raised an alarm, and always
# at the end of a look; a restart takes in again at most about this much work. (A save per
# piece, with its two fsyncs, cost more than a piece's statistics.)
SAVE_EVERY = 1.0

# Draws in the windowed drift view.
WINDOW = 10_000

# How long a hole in a writer's chain is waited for before it is reported as a gap: a Parquet
# batch's part files are renamed one after another, and a spilled batch is loaded later.
GAP_WAIT = 30.0

Alarm = dict[str, Any]


def _positive(name: str, value: object, *, integer: bool = False, zero: bool = False) -> None:
    kinds = (int,) if integer else (int, float)
    if isinstance(value, bool) or not isinstance(value, kinds) or not (
        value >= 0 if zero else value > 0):  # fmt: skip
        what = "a non-negative" if zero else "a positive"
        raise ReplayError(f"{name} must be {what} {'integer' if integer else 'number'}, "
                          f"got {value!r}")  # fmt: skip


def _lag(heads: dict[str, Head], state: GuardState) -> tuple[int, float | None]:
    records, seconds = 0, None
    for key, head in heads.items():
        mark = state.writers.get(key)
        covered = -1 if mark is None else mark.seq
        records += max(0, head.seq - covered)
        if head.ts is not None and mark is not None and mark.ts is not None:
            behind = max(0.0, head.ts - mark.ts)
            seconds = behind if seconds is None else max(seconds, behind)
    return records, seconds


def take_in(
    follower: Follower, state: GuardState, settings: StepSettings, *, piece_size: int,
    gap_wait: float, emit: Callable[[list[Alarm]], None],
    after_piece: Callable[[tuple[int, float | None]], None],
    clock: Callable[[], float] = time.time,
) -> tuple[int, float | None]:  # fmt: skip
    """Take in every new record of every writer, piece by piece; ``after_piece`` is called
    after each (to save the state, see SAVE_EVERY) with the lag behind the newest records
    seen when the look began. Returns the lag behind the ledger when done."""
    heads = follower.heads()
    for key, covered in state.writers.items():
        head = heads.get(key)
        if head is None or head.seq < covered.seq:
            ends = "has no records" if head is None else f"ends at seq {head.seq}"
            raise ReplayError(
                f"writer {covered.writer!r} {ends} but the guard's state covered it to seq "
                f"{covered.seq}: the ledger was replaced or records were removed; check it with "
                "drawledger verify and start a new state file"
            )
    for key in sorted(heads):
        while True:
            mark = state.writers.get(key)
            after = -1 if mark is None else mark.seq
            if heads[key].seq <= after:
                break
            piece = follower.read_after(key, after, piece_size)
            if piece is None:
                break
            whole, hole = contiguous(piece, after)
            if hole is None:
                if mark is not None:
                    mark.hole_since = None
            else:
                if mark is None:
                    mark = state.writers[key] = Mark(writer_of(piece))
                if mark.hole_since is None:
                    mark.hole_since = clock()
                if clock() - mark.hole_since < gap_wait:  # wait for the hole to fill
                    if whole is None:
                        break
                    piece = whole
                else:
                    mark.hole_since = None  # waited long enough: the walk reports a gap
            emit(take_piece(state, piece, settings))
            after_piece(_lag(heads, state))
    return _lag(follower.heads(), state)


def guard(
    ledger: str | os.PathLike[str],
    *,
    format: str | None = None,
    path: Iterable[str | os.PathLike[str]] = (),
    allow: Iterable[str] = (),
    state: str | os.PathLike[str] | None = None,
    once: bool = False,
    interval: float = 5.0,
    steps: int | None = None,
    alpha: float = ALPHA,
    window: int = WINDOW,
    piece_size: int = PIECE_SIZE,
    gap_wait: float = GAP_WAIT,
    integrity_key: bytes | str | None = None,
    on_alarm: Callable[[Alarm], None] | None = None,
    metrics_port: int | None = None,
    budget: int = DEFAULT_BUDGET,
    mc_samples: int = DEFAULT_MC_SAMPLES,
    sleep: Callable[[float], None] = time.sleep,
) -> GuardReport:
    """Follow ``ledger`` as it grows: verify each new decision by replay, continue each
    writer's hash chain, and update anytime-valid evidence that randomization is as declared.

    ``state`` is a JSON file that keeps where the guard stands, so that a restarted guard
    resumes where it stopped; without it every run starts from the beginning. ``once`` takes
    in what is new and returns; otherwise the guard looks again every ``interval`` seconds
    (``steps`` looks at most; an interrupt while waiting ends it). ``on_alarm`` is called
    with each new alarm. An alarm fires when a draw's e-value reaches 2 / ``alpha``: under
    correct randomization that happens with probability at most ``alpha`` per draw over the
    whole run (docs/guard.md).
    """
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0.0 < alpha < 1.0:
        raise ReplayError(f"alpha must be a number between 0 and 1, got {alpha!r}")
    _positive("interval", interval)
    _positive("window", window, integer=True)
    _positive("piece_size", piece_size, integer=True)
    _positive("gap_wait", gap_wait, zero=True)
    if steps is not None:
        _positive("steps", steps, integer=True)
    if metrics_port is not None and (isinstance(metrics_port, bool) or not isinstance(
            metrics_port, int) or not 0 <= metrics_port <= 65535):  # fmt: skip
        raise ReplayError(f"metrics port must be an integer from 0 to 65535, got {metrics_port!r}")
    key = integrity_key.encode() if isinstance(integrity_key, str) else (integrity_key or b"")
    settings = StepSettings(
        verify=Settings(path=tuple(os.fspath(p) for p in path), allow=tuple(allow),
                        budget=budget, mc_samples=mc_samples, keep_rows=False),
        key=key, alpha=float(alpha), window=window,
    )  # fmt: skip
    text = os.fspath(ledger)
    current = load_state(state, text)
    new: list[Alarm] = []

    def emit(alarms: list[Alarm]) -> None:
        for alarm in alarms:
            if current.alarmed(alarm["key"]) or any(a["key"] == alarm["key"] for a in new):
                continue
            alarm["time"] = time.time()
            current.alarms.append(alarm)
            new.append(alarm)
            if on_alarm is not None:
                on_alarm(alarm)

    saved: list[bytes | None] = [None]
    last_save = [time.monotonic(), len(current.alarms)]

    follower = Follower(ledger, format=format, key=key)
    served = Metrics(metrics_port) if metrics_port is not None else None

    def save(lag: tuple[int, float | None]) -> None:
        saved[0] = save_state(state, current, saved[0])
        last_save[:] = [time.monotonic(), len(current.alarms)]
        if served is not None:
            served.update(current, *lag)

    def after_piece(lag: tuple[int, float | None]) -> None:
        if (time.monotonic() - last_save[0] >= SAVE_EVERY
                or len(current.alarms) != last_save[1]):  # fmt: skip
            save(lag)
        elif served is not None:
            served.update(current, *lag)

    lag: tuple[int, float | None] = (0, None)
    try:
        looks = 0
        while True:
            lag = take_in(follower, current, settings, piece_size=piece_size,
                          gap_wait=gap_wait, emit=emit, after_piece=after_piece)  # fmt: skip
            save(lag)
            looks += 1
            if once or (steps is not None and looks >= steps):
                break
            try:
                sleep(interval)
            except KeyboardInterrupt:  # Ctrl-C between looks: stop following, report
                break
    finally:
        follower.close()
        settings.versions.server.close()
        if served is not None:
            served.close()
    return GuardReport(current, float(alpha), new, *lag)
