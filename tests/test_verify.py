"""``verify``: re-execution, reasons, exact propensities, safe imports, chunks, jobs, export."""

from __future__ import annotations

import importlib
import json
import math
import os
import sqlite3
import sys
import tempfile
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from types import ModuleType

import pandas as pd
import pytest
import shop_decisions as sd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from strategies import decision_specs

import drawledger as dl
import drawledger.testing
from drawledger._code import legacy_code_hash
from drawledger._records import to_json
from drawledger.draw import bucket_assign
from drawledger.exceptions import LedgerError, ReplayError
from drawledger.ledger import REGISTRY
from drawledger.replay import verify
from drawledger.replay.verify import Settings, verify_chunk
from drawledger.replay.verify._decision import Checked, _compare_draws
from drawledger.replay.verify._diff import first_difference, mismatch, same, version_detail

SERVICE = """
import drawledger as dl
import drawledger.testing

ledger = dl.Ledger({ledger!r})
_served = 0


@ledger.decision("recipe-card")
def pick(scores: list[float], draw: dl.Draw, *, temperature: float = 0.7) -> str:
    cards = ["one-pot-pasta", "green-curry", "taco-night"]
{body}
"""
PLAIN = '    return draw.softmax(cards, scores, temperature=temperature, name="card")'


class Service:
    """A decision module written to ``code/``, recorded into ``ledger``, then edited."""

    def __init__(self, root: Path, body: str = PLAIN) -> None:
        self.name = f"shop_{uuid.uuid4().hex[:10]}"
        self.code = root / "code"
        self.code.mkdir(exist_ok=True)
        self.ledger = root / "decisions.db"
        self.write(body)
        sys.path.insert(0, str(self.code))
        try:
            self.module: ModuleType = importlib.import_module(self.name)
        finally:
            sys.path.remove(str(self.code))

    def write(self, body: str) -> None:
        text = SERVICE.format(ledger=str(self.ledger), body=body)
        (self.code / f"{self.name}.py").write_text(text)

    def record(self, n: int) -> None:
        for i in range(n):
            self.module.pick([1.0 + i % 3, 2.0, 0.5], unit=f"shopper-{i}", decision_id=f"d{i}")
        self.module.ledger.outcome("d0", "checkout", 1.0)
        self.module.ledger.close()

    def forget(self) -> None:
        """Drop the module from this process, as a fresh verify process would not have it."""
        sys.modules.pop(self.name, None)
        for key in [k for k in REGISTRY if k.startswith(self.name + ":")]:
            del REGISTRY[key]

    def edit(self, body: str) -> None:
        self.write(body)
        self.forget()

    def verify(self, **kwargs: object) -> dl.replay.VerifyReport:  # type: ignore[name-defined]
        return verify(self.ledger, path=[self.code], **kwargs)  # type: ignore[arg-type]


@pytest.fixture
def service(tmp_path: Path) -> Iterator[Callable[..., Service]]:
    made: list[Service] = []

    def make(body: str = PLAIN, n: int = 12) -> Service:
        s = Service(tmp_path, body)
        s.record(n)
        s.forget()
        made.append(s)
        return s

    yield make
    for s in made:
        s.forget()


def _sql(path: Path, *statements: str) -> None:
    with sqlite3.connect(path) as conn:
        for statement in statements:
            conn.execute(statement)


def _reasons(report: object, did: str) -> set[str]:
    rows = report.rows  # type: ignore[attr-defined]
    text = rows.loc[rows["decision_id"] == did, "reason"].iloc[0]
    return set() if not isinstance(text, str) else set(text.split(";"))


def test_propensities_not_proven_by_every_branch_are_noted(tmp_path: Path) -> None:
    """A slot out of 5000 codes modulo 7 (more branches than the budget of 4096) is a
    Monte Carlo propensity: verified, and the summary says so; exact ones need no note."""
    led = dl.Ledger(tmp_path / "slots.db")
    sd.use(led)
    for i in range(3):
        sd.delivery_slot(sd.Basket(items=1, value=5.0), decision_id=f"slot-{i}")
        sd.feature_card(sd.context(i), decision_id=f"card-{i}")
    led.close()
    report = verify(tmp_path / "slots.db", mc_samples=200)
    assert (6, {"monte-carlo": 3, "exact": 3}) == (report.verified, report.methods)
    assert ["note: 3 propensities are estimated by Monte Carlo (propensity_stderr in the "
            "export)"] == report.method_notes()  # fmt: skip
    assert report.method_notes()[0] in report.render()


def test_decision_code_that_records_is_unreplayable_and_its_replay_records_nothing(
    tmp_path: Path,
) -> None:
    """Before, each replay of a decision that calls another recorded the inner one into the
    ledger again (and one that records an outcome, the outcome); now the inner call raises,
    the record is a replay-error naming both, and the ledger holds what the service recorded,
    however often it is verified."""
    import nested_decisions as nd

    led = dl.Ledger(tmp_path / "nested.db")
    nd.use(led)
    for i in range(6):
        nd.checkout_banner(decision_id=f"banner-{i}")
    nd.send_reminder(decision_id="reminder-0")
    led.flush()  # the service keeps running (and its ledger open) while verify runs
    for _ in range(2):
        report = verify(tmp_path / "nested.db")
    led.close()
    with sqlite3.connect(tmp_path / "nested.db") as conn:
        stored = dict(conn.execute("SELECT stream, COUNT(*) FROM decisions GROUP BY stream"))
        outcomes = conn.execute("SELECT COUNT(*) FROM outcomes").fetchone()[0]
    assert ({"free-delivery": 6, "checkout-banner": 6, "reminder-sent": 1}, 1) == (
        stored, outcomes)  # fmt: skip
    assert (6, {"replay-error": 7}) == (report.verified, report.by_reason)
    details = report.rows.set_index("decision_id")["detail"]
    assert "nested_decisions:free_delivery was called inside decision " in details["banner-0"]
    assert "nested_decisions:checkout_banner, which was being re-executed" in details["banner-0"]
    assert "ledger.outcome was called inside decision " in details["reminder-0"]


def test_numpy_array_inputs_annotated_as_arrays_come_back_as_arrays(tmp_path: Path) -> None:
    """np.ndarray and npt.NDArray[np.float32] inputs are recorded as JSON lists and rebuilt
    with numpy.asarray and the annotated dtype (before, verify stopped with pydantic's
    traceback: it has no schema for numpy arrays). An annotation pydantic cannot build fails
    its own records with the reason, not the run."""
    import array_decisions as ad
    import numpy as np

    led = dl.Ledger(tmp_path / "arrays.db")
    ad.use(led)
    for i in range(4):
        ad.feature_card(np.array([1.0, 2.0, 3.0 + i]), decision_id=f"card-{i}")
        ad.feature_card_32(np.array([0.5, 1.5, 1.0], dtype=np.float32), decision_id=f"c32-{i}")
    ad.remind(ad.Basket(items=2), decision_id="basket-0")
    led.close()
    report = verify(tmp_path / "arrays.db")
    assert (9, 8, {"replay-error": 1}) == (report.decisions, report.verified, report.by_reason)
    detail = report.rows.set_index("decision_id")["detail"]["basket-0"]
    assert "input basket: its annotation <class 'array_decisions.Basket'> cannot be rebuilt" in (
        detail)  # fmt: skip


def _shop_ledger(path: Path, n: int = 12, *, format: str | None = None) -> dl.Ledger:
    """Every grocery decision of tests/support/shop_decisions.py, n times, plus a bucket and a
    declared draw."""
    led = dl.Ledger(path, format=format)
    sd.use(led)
    basket = sd.Basket(items=3, value=42.5)
    for i in range(n):
        ctx = sd.context(i, tier="plus" if i % 2 else "basic")
        sd.feature_card(ctx, unit=f"shopper-{i}", decision_id=f"card-{i}")
        sd.explore_card(ctx, decision_id=f"explore-{i}", epsilon=0.25)
        sd.card_row(ctx, decision_id=f"row-{i}")
        sd.card_with_badge(ctx, decision_id=f"badge-{i}")
        sd.reminder_delay(basket, decision_id=f"delay-{i}")
        led.outcome(f"card-{i}", "checkout", 1.0)
    led.outcome("card-0", "checkout", 0.5)
    led.outcome("card-0", "basket_value", 23.0)
    led.bucket("shopper-1", {"control": 0.5, "new-menu": 0.5}, "menu-test", decision_id="bk-1")
    led.record_draw("legacy-banner", "categorical", {"options": ["a", "b"], "probs": [0.5, 0.5]},
                    "a", 0.5, decision_id="legacy-1")  # fmt: skip
    led.close()
    return led


# -- a correct service ---------------------------------------------------------------------------
def test_a_correct_service_verifies_completely(ledger_path: Path) -> None:
    _shop_ledger(ledger_path)
    report = verify(ledger_path, mc_samples=200)
    assert report.ok
    assert (62, 61, 0, 1) == (
        report.decisions, report.verified, report.mismatched, report.unreplayable
    )  # fmt: skip
    assert {"declared": 1} == report.by_reason
    assert report.integrity.ok
    methods = report.rows.groupby("stream")["propensity_method"].first().to_dict()
    named = {k: v for k, v in methods.items() if isinstance(v, str)}
    assert {"recipe-card": "exact", "explore-card": "enumerated", "card-row": "exact",
            "card-badge": "enumerated", "reminder-delay": "density",
            "menu-test": "exact"} == named  # fmt: skip
    one_draw = report.rows[report.rows["stream"] == "recipe-card"]
    assert list(one_draw["logged_propensity"]) == list(one_draw["propensity"])


def test_epsilon_greedy_exported_propensity_is_analytic(ledger_path: Path) -> None:
    """(1 - eps) + eps / K for the greedy card, eps / K otherwise (worked by hand, eps = 0.25,
    K = 6: 0.7916..., 0.0416...), whatever path (explore or exploit) was logged."""
    _shop_ledger(ledger_path, n=30)
    rows = verify(ledger_path).rows
    rows = rows[rows["stream"] == "explore-card"]
    eps, k = 0.25, 6
    for i in range(30):
        ctx = sd.context(i)
        greedy = ctx.cards[ctx.scores.index(max(ctx.scores))]
        row = rows[rows["decision_id"] == f"explore-{i}"].iloc[0]
        expected = (1 - eps) + eps / k if row["action"] == greedy else eps / k
        assert pytest.approx(expected, rel=1e-12) == row["propensity"]
        assert "enumerated" == row["propensity_method"]
    # the logged propensity is the path's (exploit 0.75, explore 0.25 * 1/6), not the action's
    logged = {round(x / 0.25 * 6) for x in rows["logged_propensity"]}
    assert {1, 18} == logged


def test_plackett_luce_slate_exported_propensity(ledger_path: Path) -> None:
    """Plackett 1975 / Luce 1959: the product of w_i / (remaining total) along the slate."""
    _shop_ledger(ledger_path, n=6)
    rows = verify(ledger_path).rows
    for _, row in rows[rows["stream"] == "card-row"].iterrows():
        i = int(row["decision_id"].split("-")[1])
        ctx = sd.context(i)
        w = dict(zip(ctx.cards, ctx.scores, strict=True))
        total, expected = sum(ctx.scores), 1.0
        for card in row["action"]:  # the slate, a list
            expected *= w[card] / total
            total -= w[card]
        assert pytest.approx(expected, rel=1e-12) == row["propensity"]


# -- mutations are caught -------------------------------------------------------------------------
def test_code_edited_after_logging(service: Callable[..., Service]) -> None:
    s = service()
    s.edit('    return draw.softmax(cards, [2 * x for x in scores], temperature=temperature,'
           ' name="card")')  # fmt: skip
    report = s.verify()
    assert not report.ok
    assert 12 == report.mismatched
    assert {"version-not-found", "args"} <= set(report.by_reason)
    assert 12 == report.by_reason["version-not-found"]


def test_comment_docstring_and_formatting_edits_keep_the_code_identity(
    service: Callable[..., Service],
) -> None:
    """Comments, blank lines and reformatting cannot change behaviour: verified."""
    s = service()
    s.edit("\n    # a comment changes nothing\n"
           "    return draw.softmax(\n        cards, scores,  temperature=temperature,\n"
           "        name='card',\n    )")  # fmt: skip
    report = s.verify()
    assert {} == report.by_reason
    assert (12, 12) == (report.decisions, report.verified)


def test_a_draw_preserving_logic_edit_is_only_version_not_found(
    service: Callable[..., Service],
) -> None:
    s = service()
    s.edit(PLAIN.replace("temperature=temperature", "temperature=temperature * 1.0"))
    report = s.verify()
    assert {"version-not-found": 12} == report.by_reason
    assert report.rows["propensity"].equals(report.rows["logged_propensity"])


def test_without_a_stored_source_a_changed_version_is_code_changed(
    service: Callable[..., Service],
) -> None:
    """Ledgers written before sources were stored: the record's version is only a hash."""
    s = service()
    _sql(s.ledger, "DROP TABLE code_versions")
    s.edit(PLAIN.replace("temperature=temperature", "temperature=temperature * 1.0"))
    assert {"code-changed": 12} == s.verify().by_reason


def test_identities_recorded_before_v2_are_compared_with_the_old_hash(tmp_path: Path) -> None:
    """A ledger written before the versioned identity holds the hash of the source text: it
    still verifies against unchanged code, and a comment still counts as a change for it."""
    s = Service(tmp_path)
    try:
        pick = s.module.pick
        pick.code_hash = legacy_code_hash(pick.fn)  # what a writer before v2 recorded
        s.record(12)
        s.forget()
        assert {} == s.verify().by_reason
        s.edit("    # a comment\n" + PLAIN)
        assert {"version-not-found": 12} == s.verify().by_reason
    finally:
        s.forget()


def test_a_mismatch_names_the_differing_index_with_both_values(
    service: Callable[..., Service],
) -> None:
    """The detail points at the element that differs, not at the start of a long JSON text."""
    s = service()
    s.edit(PLAIN.replace("scores,", "[*scores[:2], scores[2] + 0.05],"))
    report = s.verify()
    detail = report.to_dict()["examples"]["args"][0]["detail"]
    assert "draw 0 (softmax 'card'): arguments scores[2]: 0.55 replayed, 0.5 recorded" == detail
    assert "scores[2]: 0.55 replayed, 0.5 recorded" in report.render()


def test_a_difference_deep_in_long_arguments_is_shown_in_json_and_the_terminal(
    service: Callable[..., Service],
) -> None:
    many = "    cards = [f'card-{i:03d}' for i in range(200)]\n    scores = [1.0] * 200\n"
    s = service(many + PLAIN)
    s.edit(many.replace("[1.0] * 200", "[1.0] * 199 + [1.5]") + PLAIN)
    report = s.verify()
    detail = report.to_dict()["examples"]["args"][0]["detail"]
    assert "draw 0 (softmax 'card'): arguments scores[199]: 1.5 replayed, 1.0 recorded" == detail
    s.edit(many.replace("f'card-{i:03d}'", "f'card-{i:03d}' + ('x' if i == 150 else '')") + PLAIN)
    report = s.verify()
    detail = report.to_dict()["examples"]["args"][0]["detail"]
    expected = "draw 0 (softmax 'card'): arguments options[150]: \"card-150x\" replayed, "
    assert expected + '"card-150" recorded' == detail
    shown = report.render()  # the table wraps the detail: its parts are there
    assert "options[150]:" in shown and '"card-150x" replayed' in shown


def test_a_long_differing_text_is_whole_in_json_and_cut_around_the_difference_in_the_terminal(
    service: Callable[..., Service],
) -> None:
    long = "    cards = ['pasta-' + 'a' * 300, 'curry', 'tacos']\n"
    s = service(long + PLAIN)
    s.edit(long.replace("'a' * 300", "'a' * 280 + 'B' + 'a' * 19") + PLAIN)
    report = s.verify()
    detail = report.to_dict()["examples"]["args"][0]["detail"]
    replayed, recorded = "pasta-" + "a" * 280 + "B" + "a" * 19, "pasta-" + "a" * 300
    assert f'draw 0 (softmax \'card\'): arguments options[0]: "{replayed}" replayed, ' \
        f'"{recorded}" recorded' == detail  # fmt: skip
    shown = report.short["args"]  # what the terminal's reasons table shows
    assert "aaaB" in shown
    assert "pasta-" not in shown  # cut before the difference, never at it
    assert "options[0]:" in report.render()


@pytest.mark.parametrize(
    ("replayed", "recorded", "expected"),
    [
        ({"scores": [1, 2, 1.2]}, {"scores": [1, 2, 1.25]},
         "x scores[2]: 1.2 replayed, 1.25 recorded"),
        ([1, 2], [1, 2, 3], "x [2]: (absent) replayed, 3 recorded"),
        ({"a": 1}, {"a": 1, "b-c": 2}, 'x ["b-c"]: (absent) replayed, 2 recorded'),
        ({"ctx": {"tier": "plus"}}, {"ctx": {"tier": "basic"}},
         'x ctx.tier: "plus" replayed, "basic" recorded'),
        (0.3, 0.2, "x 0.3 replayed, 0.2 recorded"),
        (1, True, "x 1 replayed, true recorded"),
    ],
)  # fmt: skip
def test_mismatch_words_the_first_difference(replayed, recorded, expected) -> None:
    assert expected == mismatch("x", replayed, recorded)[0]


def test_mismatch_of_long_text_is_cut_around_the_difference_for_the_terminal() -> None:
    a, b = "a" * 500 + "b" + "c" * 500, "a" * 500 + "B" + "c" * 500
    full, short = mismatch("action", a, b)
    assert f'action "{a}" replayed, "{b}" recorded' == full
    assert len(short) < 200
    assert "ab" in short and "aB" in short


def test_a_deleted_draw_and_a_renamed_draw_are_worded_like_every_mismatch() -> None:
    replayed = [("bernoulli", "coin", "{}", "[0.5]", "true", 0.5, False)]
    checked = Checked()
    _compare_draws(checked, replayed, [])
    assert "draws 1 replayed, 0 recorded" == checked.reasons["draw-count"]
    checked = Checked()
    _compare_draws(
        checked, replayed, [("d", 0, "toss", "bernoulli", "{}", "[0.5]", "true", 0.5, 0)]
    )
    assert "draw 0 (bernoulli 'coin'): kind and name name: \"coin\" replayed, \"toss\" recorded" \
        == checked.reasons["args"]  # fmt: skip


def test_a_version_not_found_shows_the_diff_whole_and_its_changes_cut_around_them() -> None:
    cards = ", ".join(f'"card-{i}"' for i in range(30))
    old = f"def pick(draw):\n    cards = [{cards}]\n    return draw.softmax(cards, s)\n"
    new = old.replace('"card-29"', '"card-29b"')
    full, short = version_detail("m:pick", "v2:aa", old, "v2:bb", new)
    assert full.startswith("code version v2:aa of m:pick was not found; replayed under the current")
    assert f"\n-    cards = [{cards}]\n+" in full
    assert '"card-28", "card-29"] | +...' in short
    assert short.endswith('"card-28", "card-29b"]')
    assert '"card-2", ' not in short  # cut before the change, not after it


json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-5, 5) | st.floats(allow_nan=False)
    | st.text(max_size=5),
    lambda inner: st.lists(inner, max_size=4)
    | st.dictionaries(st.text(max_size=3), inner, max_size=4),
    max_leaves=12,
)  # fmt: skip


@given(json_values, json_values)
@settings(max_examples=200, deadline=None)
def test_mismatch_finds_a_difference_exactly_when_values_differ(a, b) -> None:
    assert (first_difference(a, b) is None) == same(a, b)
    full, _ = mismatch("x", a, b)
    assert full.endswith(" recorded") and " replayed, " in full
    assert "\n" not in full


def test_hidden_global_counter_is_nondeterministic(service: Callable[..., Service]) -> None:
    body = (
        "    global _served\n    _served += 1\n"
        '    return draw.softmax(cards, [x + _served % 3 for x in scores], name="card")'
    )
    s = service(body)
    report = s.verify()
    assert 12 == report.by_reason["nondeterministic"]
    assert 12 == report.mismatched


@pytest.mark.parametrize(
    ("statement", "reason"),
    [
        ("UPDATE draws SET value = '\"taco-night-x\"' WHERE decision_id = 'd3'", "value"),
        ("UPDATE draws SET prob = prob * 1.000001 WHERE decision_id = 'd3'", "probability"),
        ("UPDATE draws SET prob = 9e999 WHERE decision_id = 'd3'", "bad-record"),  # +inf
        ("UPDATE draws SET prob = -9e999 WHERE decision_id = 'd3'", "bad-record"),  # -inf
        ("UPDATE decisions SET propensity = 0.5 WHERE decision_id = 'd3'", "probability"),
        ("UPDATE draws SET u = '[0.5]' WHERE decision_id = 'd3'", "value"),
        ("DELETE FROM draws WHERE decision_id = 'd3'", "draw-count"),
        ("UPDATE draws SET args = '{\"options\": []}' WHERE decision_id = 'd3'", "args"),
        ("UPDATE decisions SET action = '\"green-curry-x\"' WHERE decision_id = 'd3'", "action"),
        ("UPDATE decisions SET seed = '00112233445566778899aabbccddeeff' "
         "WHERE decision_id = 'd3'", "value"),
    ],
)  # fmt: skip
def test_tampered_records_are_caught(
    service: Callable[..., Service], statement: str, reason: str
) -> None:
    s = service()
    _sql(s.ledger, statement)
    report = s.verify()
    assert {reason, "integrity"} <= _reasons(report, "d3")
    assert 11 == report.verified
    assert not report.integrity.ok
    assert not report.ok


def test_foreign_function_name_is_refused_and_not_run(
    service: Callable[..., Service], monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    calls: list[object] = []
    monkeypatch.setattr(os, "system", lambda *a: calls.append(a))
    canary = f"canary_{uuid.uuid4().hex[:8]}"
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / f"{canary}.py").write_text(
        f"from pathlib import Path\nPath({str(tmp_path / 'ran')!r}).write_text('ran')\n"
        "def pick(*a, **k):\n    Path('ran-too').write_text('ran')\n"
    )
    s = service()
    _sql(s.ledger, "UPDATE decisions SET fn = 'os:system' WHERE decision_id = 'd1'",
         f"UPDATE decisions SET fn = '{canary}:pick' WHERE decision_id = 'd2'")  # fmt: skip
    monkeypatch.syspath_prepend(str(outside))  # importable, but not under --path
    report = s.verify(allow=["os"])
    assert {"not-a-decision", "integrity"} == _reasons(report, "d1")
    assert {"not-allowed", "integrity"} == _reasons(report, "d2")
    assert [] == calls
    assert canary not in sys.modules
    assert not (tmp_path / "ran").exists()
    assert 2 == report.unreplayable


def test_renamed_and_raising_functions(service: Callable[..., Service]) -> None:
    s = service()
    s.edit('    raise RuntimeError("recommender offline")')
    report = s.verify()
    assert 12 == report.by_reason["replay-error"]
    assert "RuntimeError: recommender offline" in report.examples["replay-error"][0][1]
    s.edit(PLAIN)
    source = s.code / f"{s.name}.py"
    source.write_text(source.read_text().replace("def pick(", "def choose("))
    assert {"missing-function": 12} == s.verify().by_reason


@pytest.mark.parametrize(
    ("statement", "detail"),
    [
        ("UPDATE decisions SET inputs = '{\"scores\": [1,' WHERE decision_id = 'd4'", "JSON"),
        ("UPDATE decisions SET inputs = '{\"scores\": \"hot\"}' WHERE decision_id = 'd4'",
         "scores"),
        ("UPDATE decisions SET seed = 'zz' WHERE decision_id = 'd4'", "seed"),
        ("UPDATE decisions SET params = '{\"temperature\": \"warm\"}' WHERE decision_id = 'd4'",
         "temperature"),
        ("UPDATE draws SET value = '\"unterminated' WHERE decision_id = 'd4'", "JSON"),
        ("UPDATE draws SET idx = 5 WHERE decision_id = 'd4'", "indexes"),
        ("UPDATE decisions SET fn = 'not a name' WHERE decision_id = 'd4'", "module:qualname"),
    ],
)  # fmt: skip
def test_bad_records_never_stop_the_run(
    service: Callable[..., Service], statement: str, detail: str
) -> None:
    s = service()
    _sql(s.ledger, statement)
    report = s.verify()
    assert {"bad-record", "integrity"} == _reasons(report, "d4")
    assert detail in report.examples["bad-record"][0][1]
    assert 11 == report.verified


def test_bucket_assignments_are_recomputed(ledger_path: Path) -> None:
    _shop_ledger(ledger_path, n=1)
    _sql(ledger_path, "UPDATE draws SET value = '\"new-menu-x\"' WHERE decision_id = 'bk-1'")
    report = verify(ledger_path)
    assert {"value", "integrity"} == _reasons(report, "bk-1")


def test_bytes_salts_and_non_string_arms_verify(ledger_path: Path) -> None:
    led = dl.Ledger(ledger_path)
    for i in range(20):
        led.bucket(f"shopper-{i}", {1: 0.2, 2: 0.8}, b"\x00menu", stream="menu")
    led.close()
    report = verify(ledger_path)
    assert (20, 20) == (report.decisions, report.verified)


# -- ledgers, chunks, jobs ------------------------------------------------------------------------
def test_parquet_ledger(tmp_path: Path) -> None:
    _shop_ledger(tmp_path / "ledger", n=4, format="parquet")
    report = verify(tmp_path / "ledger")
    assert (22, 21) == (report.decisions, report.verified)


@pytest.mark.postgres
def test_postgres_ledger(postgres_url: str) -> None:
    _shop_ledger(postgres_url, n=3)  # type: ignore[arg-type]
    report = verify(postgres_url)
    assert (17, 16, {"declared": 1}) == (report.decisions, report.verified, report.by_reason)


def test_jobs_and_chunks_give_the_same_report(ledger_path: Path) -> None:
    _shop_ledger(ledger_path, n=10)
    _sql(ledger_path, "UPDATE draws SET prob = 0.9 WHERE decision_id = 'card-3'")
    one = verify(ledger_path, chunk_size=7)
    two = verify(ledger_path, jobs=2, chunk_size=7)
    assert one.to_dict() == two.to_dict()
    pd.testing.assert_frame_equal(one.rows, two.rows)


def test_chunk_function_is_pure_and_checks_flags() -> None:
    """verify_chunk needs only rows: here a hashed bucket assignment, as the SDK records it."""
    shares = {"control": 0.5, "new-menu": 0.5}
    arm, u, prob, _, _ = bucket_assign("shopper-1", shares, "menu-test")
    row = ("b1", "menu-test", "shopper-1", 1.0, None, None, "{}", "{}", to_json(arm, "arm"),
           prob, "exact", None, "w", 0, None, "h")  # fmt: skip
    args = to_json({"unit": "shopper-1", "shares": shares, "salt": "menu-test"}, "args")
    draw = ("b1", 0, None, "bucket", args, to_json([u], "u"), to_json(arm, "arm"), prob, 0)
    assert {} == dict(verify_chunk([row], [draw], set(), Settings()).by_reason)
    assert {"integrity": 1} == dict(verify_chunk([row], [draw], {"b1"}, Settings()).by_reason)
    tampered = (*draw[:5], "[0.1]", *draw[6:])
    assert {"value": 1} == dict(verify_chunk([row], [tampered], set(), Settings()).by_reason)
    assert {"declared": 1} == dict(verify_chunk([row], [], set(), Settings()).by_reason)


def test_a_memo_shared_by_chunks_changes_no_result(ledger_path: Path) -> None:
    """verify_chunk with one memo passed to chunk after chunk (as the guard does) gives every
    chunk the result it has with a memo of its own: counts, reasons, propensities."""
    from drawledger.replay.propensity import Memo
    from drawledger.replay.sources import iter_chunks

    _shop_ledger(ledger_path, n=30)
    _sql(ledger_path, "UPDATE draws SET prob = 0.9 WHERE decision_id = 'card-3'")
    settings = Settings(path=(str(Path(sd.__file__).parent),))
    memo = Memo()
    chunks = list(iter_chunks(ledger_path, size=20))
    assert len(chunks) > 3
    for rows, draws in chunks:
        alone = verify_chunk(rows, draws, set(), settings)
        shared = verify_chunk(rows, draws, set(), settings, memo)
        assert (alone.streams, alone.by_reason, alone.examples, alone.methods) == (
            shared.streams, shared.by_reason, shared.examples, shared.methods)  # fmt: skip
        pd.testing.assert_frame_equal(alone.rows[0], shared.rows[0])


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(decision_specs)
def test_arbitrary_rows_give_reasons_never_exceptions(spec: tuple) -> None:
    """Any decision row with any draws is classified; nothing escapes as an exception."""
    _, stream, unit, ts, fn, inputs, action, prop, kind, seed, draws = spec
    row = ("x", stream, unit, ts, fn, "h", inputs, "{}", action, prop, kind, seed, "w", 0,
           None, "h")  # fmt: skip
    draw_rows = [("x", i, *d[:5], d[5], int(d[6])) for i, d in enumerate(draws)]
    result = verify_chunk([row], draw_rows, set(), Settings())
    assert 1 == sum(c[0] for c in result.streams.values())


def test_bad_ledgers_raise_ledger_errors(tmp_path: Path) -> None:
    with pytest.raises(LedgerError, match="no ledger"):
        verify(tmp_path / "missing.db")
    (tmp_path / "notes.db").write_text("not a database")
    with pytest.raises(LedgerError):
        verify(tmp_path / "notes.db")
    with pytest.raises(LedgerError):
        verify(tmp_path)  # a directory without ledger tables


def test_bad_arguments(ledger_path: Path) -> None:
    _shop_ledger(ledger_path, n=1)
    with pytest.raises(ReplayError, match="dask"):
        verify(ledger_path, engine="dask")  # the Dask engine reads Parquet ledgers only
    with pytest.raises(ValueError, match="engine"):
        verify(ledger_path, engine="spark")
    with pytest.raises(ValueError, match="jobs"):
        verify(ledger_path, jobs=0)
    with pytest.raises(ReplayError, match=r"\.csv or \.parquet"):
        verify(ledger_path, export=ledger_path.with_suffix(".xlsx"))


# -- export -------------------------------------------------------------------------------
@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_export_columns_outcomes_and_inputs(ledger_path: Path, suffix: str) -> None:
    _shop_ledger(ledger_path, n=4)
    target = ledger_path.with_name("props" + suffix)
    report = verify(ledger_path, export=target)
    data = pd.read_csv(target) if suffix == ".csv" else pd.read_parquet(target)
    assert ["decision_id", "stream", "unit", "ts", "action", "action_json", "propensity",
            "propensity_type", "propensity_method", "propensity_stderr", "logged_propensity",
            "logged_kind", "verified", "reason",
            "detail", "basket_value", "checkout", "input.basket.items", "input.basket.value",
            "input.ctx.user_tier"] == list(data.columns)  # fmt: skip
    assert len(report.rows) == len(data) == report.decisions
    card0 = data[data["decision_id"] == "card-0"].iloc[0]
    assert (1.5, 23.0, "basic") == (card0["checkout"], card0["basket_value"],
                                    card0["input.ctx.user_tier"])  # fmt: skip
    assert math.isnan(data[data["decision_id"] == "card-1"].iloc[0]["basket_value"])
    assert not (ledger_path.parent / f".props{suffix}.partial").exists()


def test_rows_type_each_column(ledger_path: Path) -> None:
    """In Python the action is its value (a card name, a delay, a slate), its JSON is kept in
    action_json, ts is a UTC timestamp of the recorded seconds, and propensity_type says
    whether the propensity is a probability or a density."""
    _shop_ledger(ledger_path, n=2)
    rows = verify(ledger_path).rows.set_index("decision_id")
    with sqlite3.connect(ledger_path) as conn:
        recorded = dict(conn.execute("SELECT decision_id, ts FROM decisions").fetchall())
    card, delay, slate = (rows.loc[d, "action"] for d in ("card-0", "delay-0", "row-0"))
    assert (str, float, list) == (type(card), type(delay), type(slate))
    assert to_json(card, "card") == rows.loc["card-0", "action_json"]
    assert to_json(slate, "slate") == rows.loc["row-0", "action_json"]
    assert "datetime64[us, UTC]" == str(rows["ts"].dtype)
    assert pytest.approx(recorded["card-0"], abs=1e-6) == rows.loc["card-0", "ts"].timestamp()
    assert ("density", "probability") == (rows.loc["delay-0", "propensity_type"],
                                          rows.loc["card-0", "propensity_type"])  # fmt: skip


def test_parquet_export_of_mixed_actions_holds_text_and_json(ledger_path: Path) -> None:
    """Card names, delays and slates in one export: no Arrow type holds them all, so the
    Parquet action is text (a name as it is, other values as JSON); the CSV action is a name
    unquoted, a number as a number, a slate as JSON."""
    _shop_ledger(ledger_path, n=2)
    parquet, csv = ledger_path.with_name("x.parquet"), ledger_path.with_name("x.csv")
    rows = verify(ledger_path, export=parquet).rows.set_index("decision_id")
    verify(ledger_path, export=csv)
    for data in (pd.read_parquet(parquet), pd.read_csv(csv)):
        data = data.set_index("decision_id")
        assert rows.loc["card-0", "action"] == data.loc["card-0", "action"]
        assert rows.loc["delay-0", "action"] == float(data.loc["delay-0", "action"])
        assert rows.loc["row-0", "action_json"] == data.loc["row-0", "action"]
        assert {"probability", "density"} == set(data["propensity_type"])


@pytest.mark.parametrize(
    ("decision", "dtype"), [("reminder_delay", "float64"), ("card_row", "object")]
)
def test_parquet_export_of_one_kind_of_action_is_native(
    ledger_path: Path, decision: str, dtype: str
) -> None:
    """Delays alone export as a float column, slates alone as lists of names, timestamps as
    UTC timestamps; the file says its export version (2) in its metadata."""
    import pyarrow.parquet as pq

    led = dl.Ledger(ledger_path)
    sd.use(led)
    for i in range(3):
        arg = sd.Basket(items=2, value=10.0) if decision == "reminder_delay" else sd.context(i)
        getattr(sd, decision)(arg, decision_id=f"d-{i}")
    led.close()
    target = ledger_path.with_name("one.parquet")
    rows = verify(ledger_path, export=target).rows
    data = pd.read_parquet(target)
    assert dtype == str(data["action"].dtype)
    assert [list(v) if dtype == "object" else v for v in data["action"]] == list(rows["action"])
    assert "timestamp[us, tz=UTC]" == str(pq.read_schema(target).field("ts").type)
    assert b"2" == pq.read_schema(target).metadata[b"drawledger.export"]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    actions=st.lists(st.one_of(st.none(), st.text(max_size=8), st.from_regex(r"[\[{\"0-9tfn]"
                                                                             r".{0,6}")),
                     min_size=1, max_size=6),
    stamps=st.lists(st.one_of(st.none(), st.floats(allow_nan=True), st.text(max_size=4)),
                    min_size=6, max_size=6),
)  # fmt: skip
def test_typed_rows_of_damaged_records_still_export(actions: list, stamps: list) -> None:
    """Actions that are not JSON and timestamps that are not numbers or out of range (a
    damaged ledger) become missing values; CSV and Parquet exports are still written."""
    from drawledger.replay.verify._export import BASE_COLUMNS, typed_rows, write_export

    n = len(actions)
    base = {c: [None] * n for c in BASE_COLUMNS}
    base.update(decision_id=[f"d-{i}" for i in range(n)], action=actions, ts=stamps[:n],
                propensity_method=["exact"] * n)  # fmt: skip
    rows = typed_rows(pd.DataFrame(base))
    assert "datetime64[us, UTC]" == str(rows["ts"].dtype)
    with tempfile.TemporaryDirectory() as folder:
        for suffix in (".csv", ".parquet"):
            written = write_export(rows, Path(folder) / f"x{suffix}")
            assert n == len(pd.read_csv(written) if suffix == ".csv" else pd.read_parquet(written))


@pytest.mark.parametrize("action", ["{}", '{"options":{}}', "[[{}]]"])
def test_actions_parquet_cannot_hold_as_such_are_exported_as_json_text(action: str) -> None:
    """An empty object becomes an Arrow struct without fields, which Parquet cannot write
    (pyarrow refuses it; found by the hypothesis test above): such actions are exported as
    their JSON text, as mixed ones are."""
    from drawledger.replay.verify._export import BASE_COLUMNS, typed_rows, write_export

    base = {c: [None, None] for c in BASE_COLUMNS}
    base.update(decision_id=["d-0", "d-1"], action=[action, action], ts=[1.0, 2.0],
                propensity_method=["exact", "exact"])  # fmt: skip
    with tempfile.TemporaryDirectory() as folder:
        written = write_export(typed_rows(pd.DataFrame(base)), Path(folder) / "x.parquet")
        assert [action, action] == pd.read_parquet(written)["action"].tolist()


def test_rows_can_be_left_out(ledger_path: Path) -> None:
    _shop_ledger(ledger_path, n=2)
    report = verify(ledger_path, keep_rows=False)
    assert report.rows.empty and 12 == report.decisions


def test_summary_names_streams_reasons_and_verdict(service: Callable[..., Service]) -> None:
    s = service()
    _sql(s.ledger, "DELETE FROM draws WHERE decision_id = 'd3'")
    text = s.verify().render()
    assert "recipe-card" in text and "draw-count" in text and "d3" in text
    assert "verify FAILED" in text


_mixed = dl.Ledger(Path(tempfile.gettempdir()) / "drawledger-verify-never-written.db")


@_mixed.decision("slot-by-number")
def slot_by_number(slot: int, draw: dl.Draw) -> bool:
    return draw.bernoulli(0.5)


@_mixed.decision("slot-by-name")
def slot_by_name(slot: str, draw: dl.Draw) -> bool:
    return draw.bernoulli(0.5)


def test_parquet_export_of_inputs_with_mixed_types(ledger_path: Path) -> None:
    """An input field holding numbers in one stream and text in another is exported as text."""
    led = dl.Ledger(ledger_path)
    for decision in (slot_by_number, slot_by_name):
        decision.ledger = led
    slot_by_number(7)
    slot_by_name("evening")
    led.close()
    target = ledger_path.with_name("mixed.parquet")
    verify(ledger_path, export=target)
    assert {"7", "evening"} == set(pd.read_parquet(target)["input.slot"])


def test_nested_choices_export_the_marginal_not_the_first_draw(ledger_path: Path) -> None:
    """A run that made one draw and returned it still gets the marginal over every path:
    P(first card) = 0.5 + 0.5 * 0.4 = 0.7, P(third card) = 0.5 * 0.6 = 0.3 (worked by hand)."""
    led = dl.Ledger(ledger_path)
    sd.use(led)
    for i in range(40):
        sd.card_swap(sd.context(i), decision_id=f"swap-{i}")
    led.close()
    rows = verify(ledger_path).rows
    first = rows["action"] == sd.CARDS[0]
    assert rows["verified"].all()
    assert 0 < first.sum() < 40
    assert list(rows.loc[first, "logged_propensity"].unique()) != [0.7]  # paths: 0.5 or 0.2
    for action, expected in ((sd.CARDS[0], 0.7), (sd.CARDS[2], 0.3)):
        chosen = rows[rows["action"] == action]
        assert pytest.approx([expected] * len(chosen), rel=1e-12) == list(chosen["propensity"])
    assert {"enumerated"} == set(rows["propensity_method"])


@pytest.mark.parametrize("chunk_size", [1, 2, 5, 10_000])
def test_duplicated_records_are_all_counted_whatever_the_chunks(
    service: Callable[..., Service], chunk_size: int
) -> None:
    """A copied decision row (same id, later seq) is read once per copy, never skipped."""
    s = service()
    columns = "decision_id, stream, unit, ts, fn, code_hash, inputs, params, action, propensity, "
    columns += "propensity_kind, seed, writer"
    _sql(s.ledger, f"INSERT INTO decisions ({columns}, seq, prev_hash, hash) SELECT {columns}, "
         "1000, prev_hash, hash FROM decisions WHERE decision_id = 'd5'")  # fmt: skip
    report = s.verify(chunk_size=chunk_size)
    assert 13 == report.decisions
    assert 11 == report.verified
    assert 2 == (report.rows["decision_id"] == "d5").sum()
    assert {"integrity"} <= _reasons(report, "d5")


GROUP_CARDS = [f"card-{i}" for i in range(10)]


@_mixed.decision("card-group")
def card_group(merge: dict[str, str], draw: dl.Draw) -> str:
    """One draw among ten cards; ``merge`` folds some cards into another card's group."""
    card = draw.categorical(GROUP_CARDS, [0.1] * 10, name="card")
    return merge.get(card, card)


def test_one_draw_returning_its_value_is_not_exact_when_two_cards_share_the_action(
    ledger_path: Path,
) -> None:
    """Ten cards at 0.1 each; card-1 folded into card-0: P(card-0) = 0.1 + 0.1 = 0.2.

    The first decisions fold nothing, so the function looks like "one draw, its value
    returned"; a later decision that drew card-0 itself must still sum both cards.
    """
    led = dl.Ledger(ledger_path)
    card_group.ledger = led
    with drawledger.testing.capture(led, seed=7, write=True):
        for i in range(40):
            card_group({} if i < 12 else {"card-1": "card-0"}, decision_id=f"g{i}")
    led.close()
    rows = verify(ledger_path).rows
    folded = rows[(rows["action"] == "card-0") & (rows["decision_id"].str[1:].astype(int) >= 12)]
    assert len(folded) > 0
    assert [0.2] * len(folded) == pytest.approx(list(folded["propensity"]), rel=1e-12)
    assert {"enumerated"} == set(folded["propensity_method"])


def test_randomness_outside_draw_is_named_as_the_likely_cause(
    service: Callable[..., Service],
) -> None:
    """A card picked with the `random` module makes no draw: the recorded actions cannot be
    replayed, and the reasons say why in plain words."""
    body = "    import random\n\n    return cards[random.randrange(3)]"
    s = service(body, n=30)
    import random

    random.seed(5)
    report = s.verify()
    assert {"action", "nondeterministic"} <= set(report.by_reason)
    action_detail = report.examples["action"][0][1]
    assert "although no draw was made: likely randomness outside `draw`" in action_detail
    assert "the `random` module, a global numpy generator), a clock" in action_detail
    assert "likely randomness outside `draw`" in report.examples["nondeterministic"][0][1]
    assert "likely randomness outside `draw`" in json.dumps(report.to_dict())
