"""``drawledger.testing.capture``: the in-memory capture for a service's own unit tests."""

from __future__ import annotations

import hashlib
import sqlite3
from pathlib import Path

import pytest
from recipe_card import CARDS, SCORES, make_decision

import drawledger as dl
import drawledger.testing
from drawledger.exceptions import DrawArgumentError
from drawledger.replay.integrity import check_integrity
from drawledger.testing import capture


def register(ledger: dl.Ledger) -> tuple[dl.Decision[str], dl.Decision[float]]:
    feature_card = make_decision(ledger)

    @ledger.decision("reminder-delay")
    def reminder_delay(nominal: float, draw: dl.Draw, *, sigma: float = 0.35365) -> float:
        return nominal * draw.lognormal(0.0, sigma, name="multiplier")

    return feature_card, reminder_delay


def rows(path: Path, table: str) -> list[tuple]:
    if not path.exists():
        return []
    with sqlite3.connect(path) as con:
        return con.execute(f"SELECT * FROM {table}").fetchall()


def test_capture_parses_decisions_draws_and_outcomes(ledger: dl.Ledger) -> None:
    """Captured records are plain objects with the JSON fields parsed."""
    feature_card, reminder_delay = register(ledger)
    with drawledger.testing.capture(ledger) as cap:
        card = feature_card(CARDS, SCORES, unit="shopper-000017", decision_id="req-8c1")
        delay = reminder_delay(30.0)
        ledger.outcome("req-8c1", "checkout", 1.0)
    assert [card, delay] == cap.actions
    first, second = cap.decisions
    assert {"cards": CARDS, "scores": SCORES} == first.inputs
    assert "softmax" == first.draws[0].kind
    assert {"options": CARDS, "scores": SCORES, "temperature": 0.7} == first.draws[0].args
    assert ("path", "lognormal", True) == (
        second.propensity_kind, second.draws[0].kind, second.draws[0].is_density)  # fmt: skip
    assert [first.draws[0], second.draws[0]] == cap.draws
    assert [second] == cap.stream("reminder-delay")
    ((did, name, value),) = [(o.decision_id, o.name, o.value) for o in cap.outcomes]
    assert ("req-8c1", "checkout", 1.0) == (did, name, value)
    assert "<Capture decisions=2 outcomes=1>" == repr(cap)


def test_capture_writes_nothing_by_default(ledger: dl.Ledger, ledger_path: Path) -> None:
    """With write=False the records stop at the capture; the chain continues unbroken after."""
    feature_card, _ = register(ledger)
    with capture(ledger) as cap:
        for _ in range(5):
            feature_card(CARDS, SCORES)
        ledger.outcome("x", "checkout", 0.0)
    ledger.flush()
    assert [] == rows(ledger_path, "decisions")
    feature_card(CARDS, SCORES)
    ledger.flush()
    ((seq, prev),) = [(r[13], r[14]) for r in rows(ledger_path, "decisions")]
    ((genesis,),) = [(r[2],) for r in rows(ledger_path, "writers")]
    assert (0, genesis) == (seq, prev)  # as if the captured records had never been made
    assert 5 == len(cap.decisions)


def test_capture_after_queued_records_keeps_one_gapless_chain(
    ledger: dl.Ledger, ledger_path: Path
) -> None:
    """Records queued before a capture keep seq 0..n-1; the ones after it continue at n."""
    feature_card, _ = register(ledger)
    for _ in range(50):  # queued: the writer thread links them into the chain later
        feature_card(CARDS, SCORES)
    with capture(ledger) as cap:
        feature_card(CARDS, SCORES)
    for _ in range(3):
        feature_card(CARDS, SCORES)
    ledger.flush()
    assert 50 == cap.decisions[0].seq  # after the 50 queued before the block
    assert list(range(53)) == sorted(r[13] for r in rows(ledger_path, "decisions"))
    assert check_integrity(ledger_path).ok


def test_capture_can_let_records_through(ledger: dl.Ledger, ledger_path: Path) -> None:
    """With write=True the records are captured and written."""
    feature_card, _ = register(ledger)
    with capture(ledger, write=True) as cap:
        feature_card(CARDS, SCORES, decision_id="req-1")
    ledger.flush()
    written = rows(ledger_path, "decisions")
    assert ["req-1"] == [r[0] for r in written]
    assert written[0][15] == cap.decisions[0].hash


def test_seed_makes_draws_reproducible(ledger: dl.Ledger) -> None:
    """The same capture seed gives the same seeds and actions; another seed other ones."""
    feature_card, reminder_delay = register(ledger)

    def run(seed: object) -> list[tuple]:
        with capture(ledger, seed=seed) as cap:  # type: ignore[arg-type]
            for _ in range(10):
                feature_card(CARDS, SCORES)
                reminder_delay(30.0)
        return [(d.seed, d.action) for d in cap.decisions]

    first = run(2026)
    assert first == run(2026)
    assert first != run(2027)
    assert 20 == len({seed for seed, _ in first})
    assert run(b"a byte seed") == run(b"a byte seed")
    assert run("text") == run(b"text")


def test_seed_sequence_is_the_documented_one(ledger: dl.Ledger) -> None:
    """Seed n of a capture is blake2b(n, digest_size=16, key=base, person=b"drawledger.t1")."""
    feature_card, _ = register(ledger)
    with capture(ledger, seed=7) as cap:
        feature_card(CARDS, SCORES)
        feature_card(CARDS, SCORES)
    base = (7).to_bytes(16, "little")
    expected = [
        hashlib.blake2b(n.to_bytes(8, "little"), digest_size=16, key=base,
                        person=b"drawledger.t1").hexdigest()
        for n in range(2)
    ]  # fmt: skip
    assert expected == [d.seed for d in cap.decisions]


def test_seed_source_is_restored(ledger: dl.Ledger) -> None:
    """After the block, decisions get CSPRNG seeds again (and the tap is gone)."""
    feature_card, _ = register(ledger)
    with capture(ledger, seed=1) as inside:
        feature_card(CARDS, SCORES)
    with capture(ledger) as after:
        feature_card(CARDS, SCORES)
        feature_card(CARDS, SCORES)
    assert inside.decisions[0].seed not in {d.seed for d in after.decisions}
    assert [] == ledger._taps


def test_capture_is_undone_when_the_block_raises(ledger: dl.Ledger) -> None:
    """An exception in the block still removes the capture and restores the seed source."""
    feature_card, _ = register(ledger)
    source = ledger._seed_source
    with pytest.raises(RuntimeError), capture(ledger, seed=3):
        feature_card(CARDS, SCORES)
        raise RuntimeError("test failed")
    assert [] == ledger._taps
    assert source is ledger._seed_source


def test_nested_captures_both_see_records(ledger: dl.Ledger) -> None:
    """An inner capture and an outer one both receive what the inner block records."""
    feature_card, _ = register(ledger)
    with capture(ledger) as outer:
        feature_card(CARDS, SCORES)
        with capture(ledger) as inner:
            feature_card(CARDS, SCORES)
    assert (2, 1) == (len(outer.decisions), len(inner.decisions))


def test_clear_forgets_what_was_captured(ledger: dl.Ledger) -> None:
    """clear() empties the capture, which keeps collecting."""
    feature_card, _ = register(ledger)
    with capture(ledger) as cap:
        feature_card(CARDS, SCORES)
        cap.clear()
        feature_card(CARDS, SCORES)
    assert 1 == len(cap.decisions)


@pytest.mark.parametrize(
    ("seed", "problem"),
    [(-1, r"\[0, 2\*\*128\)"), (2**128, r"\[0, 2\*\*128\)"), (b"", "1 to 64 bytes"),
     ("x" * 65, "1 to 64 bytes"), (1.5, "int, bytes or str"), (True, "int, bytes or str")],
)  # fmt: skip
def test_bad_capture_seeds(ledger: dl.Ledger, seed: object, problem: str) -> None:
    """A seed that is not an int in [0, 2**128), 1..64 bytes or text is refused."""
    with pytest.raises(DrawArgumentError, match=problem), capture(ledger, seed=seed):  # type: ignore[arg-type]
        pass
    assert [] == ledger._taps
