"""``@ledger.decision``: what a decision call records, its propensity, and its failures."""

from __future__ import annotations

import datetime
import inspect
import math
import threading
import warnings
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import BaseModel
from recipe_card import CARDS, SCORES, make_decision
from strategies import json_values

import drawledger as dl
from drawledger._code import module_file, source_identity
from drawledger._records import to_json
from drawledger.exceptions import (
    DecisionDefinitionError,
    DrawArgumentError,
    DuplicateDecisionError,
    LedgerClosedError,
    LedgerError,
    NotSerializableError,
)
from drawledger.ledger import REGISTRY
from drawledger.testing import capture


def test_call_records_inputs_params_action_and_the_draw(ledger: dl.Ledger) -> None:
    """A call returns the plain action and records inputs, params, fn, code hash and seed."""
    feature_card = make_decision(ledger)
    with capture(ledger) as cap:
        card = feature_card(CARDS, SCORES, unit="shopper-000017", decision_id="req-8c1")
    (d,) = cap.decisions
    assert card in CARDS and card == d.action
    assert ("req-8c1", "recipe-card", "shopper-000017") == (d.decision_id, d.stream, d.unit)
    assert {"cards": CARDS, "scores": SCORES} == d.inputs
    assert {"temperature": 0.7} == d.params
    assert "recipe_card:make_decision.<locals>.feature_card" == d.fn == feature_card.name
    assert feature_card.code_hash == d.code_hash
    assert 32 == len(d.seed or "")
    assert ("exact", d.draws[0].prob) == (d.propensity_kind, d.propensity)
    assert ("card", "softmax", [card]) == (d.draws[0].name, d.draws[0].kind, [d.draws[0].value])
    assert REGISTRY[d.fn] is feature_card


def test_decision_exposes_its_signature(ledger: dl.Ledger) -> None:
    """inputs are the positional parameters; params the keyword-only defaults."""
    feature_card = make_decision(ledger)
    assert ["cards", "scores"] == feature_card.inputs
    assert {"temperature": 0.7} == feature_card.params
    assert "recipe-card" == feature_card.stream
    assert "feature_card" == feature_card.__name__


def test_policy_parameter_override_and_keyword_inputs(ledger: dl.Ledger) -> None:
    """temperature=0.3 is recorded and used; inputs may be passed by keyword."""
    feature_card = make_decision(ledger)
    with capture(ledger, seed=1) as cap:
        feature_card(CARDS, scores=SCORES, temperature=0.3)
    (d,) = cap.decisions
    assert {"temperature": 0.3} == d.params
    assert 0.3 == d.draws[0].args["temperature"]


def test_unit_and_decision_id_are_optional(ledger: dl.Ledger) -> None:
    """Without decision_id each call gets a unique id; unit stays empty."""
    feature_card = make_decision(ledger)
    with capture(ledger) as cap:
        for _ in range(3):
            feature_card(CARDS, SCORES)
    ids = [d.decision_id for d in cap.decisions]
    assert 3 == len(set(ids))
    assert [None, None, None] == [d.unit for d in cap.decisions]


def test_code_hash_follows_the_source(ledger: dl.Ledger) -> None:
    """Two functions with different bodies have different code hashes; the hash is stable."""

    @ledger.decision("a")
    def one(draw: dl.Draw) -> bool:
        return draw.bernoulli(0.5)

    @ledger.decision("b")
    def two(draw: dl.Draw) -> bool:
        return draw.bernoulli(0.25)

    assert one.code_hash != two.code_hash
    assert dl.ledger.code_hash(one.fn) == one.code_hash


def test_code_identity_ignores_comments_blank_lines_formatting_and_docstrings() -> None:
    plain = "def pick(draw):\n    return draw.bernoulli(0.5)\n"
    dressed = (
        "    def pick(  draw ):\n"
        '        """Flip a coin.\n\n        Docstrings do not run."""\n'
        "\n        # the probability of a reminder\n"
        "        return draw.bernoulli(\n            0.5,\n        )  # half\n"
    )
    assert source_identity(plain) == source_identity(dressed)
    assert source_identity(plain).startswith("v2:")


def test_code_identity_of_a_fixed_text_never_changes() -> None:
    """A stored identity must mean the same code in every later release and Python version:
    this value was computed once (CPython 3.11) and is pinned, so that a change of the
    normalized form, or of what a Python version's parser yields, fails here first."""
    text = (
        '@ledger.decision("recipe-card")\n'
        "def feature_card(ctx, draw, *, temperature=0.7):\n"
        '    return draw.softmax(ctx.cards, ctx.scores, temperature=temperature, name="card")\n'
    )
    assert "v2:194607abbce9d42e692f6dc86c48f658" == source_identity(text)


@pytest.mark.parametrize(
    "edit",
    [
        "def pick(draw):\n    return draw.bernoulli(0.25)\n",
        "def pick(draw):\n    return draw.bernoulli(0.5, name='coin')\n",
        "def pick(draw):\n    x = 'not a docstring'\n    return draw.bernoulli(0.5)\n",
        "def pick(draw, *, p=0.5):\n    return draw.bernoulli(p)\n",
    ],
)
def test_code_identity_changes_with_behaviour(edit: str) -> None:
    plain = "def pick(draw):\n    return draw.bernoulli(0.5)\n"
    assert source_identity(plain) != source_identity(edit)


def test_a_string_after_the_first_statement_is_code_not_a_docstring() -> None:
    plain = "def pick(draw):\n    return draw.bernoulli(0.5)\n"
    late = "def pick(draw):\n    draw.bernoulli(0.5)\n    'late'\n    return None\n"
    also = "def pick(draw):\n    draw.bernoulli(0.5)\n    return None\n"
    assert source_identity(also) != source_identity(late)
    assert source_identity(plain) != source_identity(also)


def test_code_identity_is_computed_once_at_decoration(ledger: dl.Ledger, monkeypatch) -> None:
    @ledger.decision("coin")
    def coin(draw: dl.Draw) -> bool:
        return draw.bernoulli(0.5)

    def fail(*_args: object) -> None:
        raise AssertionError("source read on the serving path")

    monkeypatch.setattr(inspect, "getsource", fail)
    with capture(ledger) as cap:
        coin()
    assert coin.code_hash == cap.decisions[0].code_hash


def test_module_file_is_relative_to_the_import_root() -> None:
    assert "drawledger/ledger.py" == module_file(dl.ledger.Ledger.flush)


def test_draw_found_by_annotation(ledger: dl.Ledger) -> None:
    """The injected parameter may have another name when annotated as dl.Draw."""

    @ledger.decision("coin")
    def coin(p: float, d: dl.Draw) -> bool:
        return d.bernoulli(p)

    with capture(ledger) as cap:
        coin(0.5)
    assert ["p"] == coin.inputs
    assert {"p": 0.5} == cap.decisions[0].inputs


@pytest.mark.parametrize(
    ("source", "problem"),
    [
        ("def f(unit, draw): pass", "'unit' is reserved"),
        ("def f(draw, decision_id=None): pass", "'decision_id' is reserved"),
        ("def f(draw, *args): pass", r"\*args and \*\*kwargs"),
        ("def f(draw, **kw): pass", r"\*args and \*\*kwargs"),
        ("def f(draw, *, t): pass", "needs a default"),
        ("def f(x): pass", "needs a 'draw' parameter"),
        ("async def f(draw): pass", "not async"),
        ("def f(draw):\n    yield 1", "not a generator"),
    ],
)
def test_definition_errors(ledger: dl.Ledger, source: str, problem: str) -> None:
    """Functions that cannot be recorded are refused at registration (a TypeError)."""
    namespace: dict[str, Any] = {}
    exec(source, namespace)
    with pytest.raises(DecisionDefinitionError, match=problem) as info:
        ledger.decision("s")(namespace["f"])
    assert isinstance(info.value, TypeError)


def test_definition_refuses_unrecordable_defaults_and_stream_names(ledger: dl.Ledger) -> None:
    """A policy default that is not JSON, or an empty stream name, is refused."""

    def f(draw: dl.Draw, *, level: object = object()) -> None:
        pass

    with pytest.raises(NotSerializableError, match="policy parameter defaults"):
        ledger.decision("s")(f)
    with pytest.raises(DecisionDefinitionError, match="stream name"):
        ledger.decision("")


@pytest.mark.parametrize(
    ("args", "kwargs", "problem"),
    [
        ((CARDS, SCORES, "extra"), {}, "takes 2 inputs, got 3"),
        ((CARDS,), {}, "missing inputs: scores"),
        ((CARDS, SCORES), {"colour": "red"}, "unexpected keyword argument 'colour'"),
        ((CARDS, SCORES), {"cards": CARDS}, "unexpected keyword argument 'cards'"),
    ],
)
def test_call_errors_are_type_errors_and_record_nothing(
    ledger: dl.Ledger, args: tuple, kwargs: dict, problem: str
) -> None:
    """Calls Python itself would refuse raise TypeError; nothing is recorded."""
    feature_card = make_decision(ledger)
    with capture(ledger) as cap, pytest.raises(TypeError, match=problem):
        feature_card(*args, **kwargs)
    assert [] == cap.decisions


@pytest.mark.parametrize(
    ("bad_input", "problem"),
    [
        (object(), "inputs cannot be recorded as JSON"),
        ([1.0, math.nan], "NaN or an infinity"),
        ({3, 1, 2}, "not JSON serializable: set"),
        (b"bytes", "inputs cannot be recorded as JSON"),
    ],
)
def test_non_serializable_inputs_raise_and_record_nothing(
    ledger: dl.Ledger, bad_input: object, problem: str
) -> None:
    """An input JSON cannot hold raises NotSerializableError (a TypeError) before any draw."""

    @ledger.decision("echo")
    def echo(x: Any, draw: dl.Draw) -> bool:
        return draw.bernoulli(0.5)

    with capture(ledger) as cap:
        with pytest.raises(NotSerializableError, match=problem) as info:
            echo(bad_input)
        assert isinstance(info.value, TypeError)
        echo([1, 2])  # the ledger is still usable
    assert 1 == len(cap.decisions)
    assert 0 == cap.decisions[0].seq


@pytest.mark.filterwarnings("ignore:decision .* is a numpy array")  # its own test
@pytest.mark.parametrize(
    ("bad_input", "where"),
    [
        (np.float32("inf"), "basket_total"),
        (np.float64("nan"), "basket_total"),
        (np.array([12.5, np.nan]), r"basket_total\[1\]"),
        ({"fees": [np.float16("-inf")]}, r"basket_total\.fees\[0\]"),
    ],
)
def test_numpy_nan_and_infinity_in_inputs_are_refused_naming_the_input(
    ledger: dl.Ledger, bad_input: object, where: str
) -> None:
    """numpy NaN and infinities are refused like Python's (orjson would write them as null),
    and the error names where they sit; nothing is recorded."""

    @ledger.decision("basket-reminder")
    def remind(basket_total: Any, draw: dl.Draw) -> bool:
        return draw.bernoulli(0.5)

    with capture(ledger) as cap:
        with pytest.raises(NotSerializableError, match=f"inputs: {where} is NaN or an infinity"):
            remind(bad_input)
        remind(np.array([12.5, 3.0]))  # finite numpy values are recorded as numbers
    assert [{"basket_total": [12.5, 3.0]}] == [d.inputs for d in cap.decisions]


NON_FINITE = [math.nan, -math.inf, np.float32("nan"), np.float64("inf"), np.float16("-inf")]


@settings(max_examples=60, deadline=None)
@given(
    value=json_values,
    bad=st.sampled_from(NON_FINITE),
    at=st.integers(0, 3),
    in_array=st.booleans(),
)
def test_any_nan_or_infinity_anywhere_is_refused_naming_its_place(
    value: Any, bad: Any, at: int, in_array: bool
) -> None:
    """Wherever a NaN or an infinity sits among JSON values (Python's or numpy's, alone or
    inside a numpy array), recording JSON refuses it and names the path to it."""
    fee = np.array([1.5, bad, 2.0]) if in_array else bad
    basket = [value] * 3
    basket.insert(at, {"fee": fee})
    where = rf"basket\[{at}\]\.fee" + (r"\[1\]" if in_array else "")
    with pytest.raises(NotSerializableError, match=f"^inputs: {where} is NaN or an infinity"):
        to_json({"basket": basket}, "inputs")


def test_a_raising_decision_records_nothing(ledger_path: Any) -> None:
    """An exception inside the function propagates; nothing of it is written; the ledger
    stays usable and the sequence has no gap."""
    ledger = dl.Ledger(ledger_path)

    @ledger.decision("fragile")
    def fragile(fail: bool, draw: dl.Draw) -> int:
        value = draw.integers(0, 10)
        if fail:
            raise RuntimeError("downstream service unavailable")
        return value

    with pytest.raises(RuntimeError, match="downstream"):
        fragile(True)
    with pytest.raises(DrawArgumentError, match="integers draw"):
        ledger.decision("broken")(lambda draw: draw.integers(3, 3))()
    fragile(False)
    ledger.close()
    import sqlite3

    with sqlite3.connect(ledger_path) as con:
        rows = con.execute("SELECT seq, inputs FROM decisions").fetchall()
        draws = con.execute("SELECT COUNT(*) FROM draws").fetchone()[0]
    assert [(0, '{"fail":false}')] == rows
    assert 1 == draws


def test_unrecordable_actions_and_options_name_the_culprit(ledger: dl.Ledger) -> None:
    """An action or an option JSON cannot hold raises NotSerializableError; nothing recorded."""

    class Card:
        pass

    @ledger.decision("objects")
    def pick(draw: dl.Draw) -> str:
        draw.categorical([Card(), Card()], [0.5, 0.5], name="card")
        return "picked"

    @ledger.decision("action")
    def act(draw: dl.Draw) -> Any:
        draw.bernoulli(0.5)
        return Card()

    with capture(ledger) as cap:
        with pytest.raises(NotSerializableError, match="categorical draw 'card'"):
            pick()
        with pytest.raises(NotSerializableError, match="action cannot be recorded"):
            act()
    assert [] == cap.decisions


def test_unit_and_decision_id_must_be_text(ledger: dl.Ledger) -> None:
    """A non-string unit or an empty decision id is refused; nothing is recorded."""
    feature_card = make_decision(ledger)
    with capture(ledger) as cap:
        with pytest.raises(NotSerializableError, match="unit must be a string"):
            feature_card(CARDS, SCORES, unit=17)  # type: ignore[arg-type]
        with pytest.raises(NotSerializableError, match="decision_id"):
            feature_card(CARDS, SCORES, decision_id="")
        with pytest.raises(NotSerializableError, match="decision_id"):
            feature_card(CARDS, SCORES, decision_id=["req-8c1"])  # type: ignore[arg-type]
    assert [] == cap.decisions


def test_propensity_exact_and_path(ledger: dl.Ledger) -> None:
    """exact: the action is one draw's value; path: the product over the draws made."""

    @ledger.decision("shown")
    def shown(draw: dl.Draw) -> str:
        return draw.categorical(["a", "b"], [0.25, 0.75])

    @ledger.decision("transformed")
    def transformed(draw: dl.Draw) -> str:
        return draw.categorical(["a", "b"], [0.25, 0.75]).upper()

    @ledger.decision("two-steps")
    def two_steps(draw: dl.Draw) -> float:
        if draw.bernoulli(0.2, name="explore"):
            return draw.uniform(0.0, 10.0)
        return 5.0

    @ledger.decision("fixed")
    def fixed(draw: dl.Draw) -> str:
        return "always"

    @ledger.decision("slate")
    def slate(draw: dl.Draw) -> list[str]:
        return draw.slate(["a", "b", "c"], [1.0, 2.0, 3.0], 2)

    with capture(ledger) as cap:
        shown(), transformed(), fixed(), slate()
        for _ in range(200):  # both branches appear but for 0.8**200, about 4e-20
            two_steps()
    by = {d.stream: d for d in cap.decisions}
    assert ("exact", by["shown"].draws[0].prob) == (
        by["shown"].propensity_kind,
        by["shown"].propensity,
    )
    assert ("path", by["transformed"].draws[0].prob) == (
        by["transformed"].propensity_kind, by["transformed"].propensity)  # fmt: skip
    assert ("exact", 1.0) == (by["fixed"].propensity_kind, by["fixed"].propensity)
    assert ("exact", by["slate"].draws[0].prob) == (
        by["slate"].propensity_kind,
        by["slate"].propensity,
    )
    assert {1, 2} == {len(d.draws) for d in cap.stream("two-steps")}
    for d in cap.stream("two-steps"):  # 5.0 is not the bernoulli's value: a path either way
        product = 1.0
        for r in d.draws:
            product *= r.prob
        assert ("path", product) == (d.propensity_kind, d.propensity)


def test_pydantic_model_inputs_are_recorded_as_objects(ledger: dl.Ledger) -> None:
    """A pydantic model input is recorded as its JSON object."""

    class CardContext(BaseModel):
        segment: str
        scores: list[float]

    @ledger.decision("recipe-card")
    def feature(ctx: CardContext, draw: dl.Draw) -> str:
        return draw.softmax(CARDS, ctx.scores, temperature=0.7)

    # a class of the test's own: its name cannot be resolved from the annotation, so a
    # replay could not rebuild it either, and the first call says so
    unresolved = "annotations cannot be resolved: NameError: name 'CardContext'"
    with capture(ledger) as cap, pytest.warns(dl.UnreplayableDecisionWarning, match=unresolved):
        feature(CardContext(segment="family", scores=SCORES))
    assert {"ctx": {"segment": "family", "scores": SCORES}} == cap.decisions[0].inputs


def test_run_reexecutes_without_recording(ledger: dl.Ledger) -> None:
    """Decision.run with a Draw of the recorded seed gives the recorded action and draws."""
    feature_card = make_decision(ledger)
    with capture(ledger) as cap:
        feature_card(CARDS, SCORES)
        (d,) = cap.decisions
        draw = dl.Draw(bytes.fromhex(d.seed or ""))
        assert d.action == feature_card.run(draw, d.inputs, d.params)
        assert 1 == len(cap.decisions)  # run records nothing
    assert d.draws[0].u == draw.records[0].u
    assert d.draws[0].prob == draw.records[0].prob


def test_outcomes_are_recorded_and_checked(ledger: dl.Ledger) -> None:
    """outcome() records (decision_id, name, value); bad values are refused."""
    with capture(ledger) as cap:
        ledger.outcome("req-8c1", "checkout", 1.0)
        ledger.outcome("req-8c1", "basket-value", True)
        with pytest.raises(NotSerializableError, match="finite number"):
            ledger.outcome("req-8c1", "checkout", math.nan)
        with pytest.raises(NotSerializableError, match="decision_id"):
            ledger.outcome("", "checkout", 1.0)
    assert [("req-8c1", "checkout", 1.0), ("req-8c1", "basket-value", 1.0)] == [
        (o.decision_id, o.name, o.value) for o in cap.outcomes
    ]


def test_outcomes_accept_numpy_numbers_and_refuse_what_is_not_finite(ledger: dl.Ledger) -> None:
    """numpy integer, float and bool scalars are numbers (as Python's); NaN, infinities and
    integers too large for a float are refused with the usual one-line error."""
    with capture(ledger) as cap:
        ledger.outcome("req-8c1", "checkout", np.int64(1))
        ledger.outcome("req-8c1", "basket-value", np.float32(23.5))
        ledger.outcome("req-8c1", "reordered", np.bool_(True))  # as a Python bool: 1.0
        for bad in (np.float64("nan"), np.float32("inf"), 10**400, np.str_("1.0")):
            with pytest.raises(NotSerializableError, match="value must be a finite number"):
                ledger.outcome("req-8c1", "checkout", bad)
    assert [1.0, 23.5, 1.0] == [o.value for o in cap.outcomes]
    assert [float] * 3 == [type(o.value) for o in cap.outcomes]


def test_a_reused_decision_id_is_refused_at_the_call(ledger_path: Any) -> None:
    """A retried request that records its decision id again gets DuplicateDecisionError (a
    ValueError) before its function runs or anything is queued; the ledger stays whole (it
    used to hold the id twice and fail integrity for good)."""
    from drawledger.replay import check_integrity

    ledger = dl.Ledger(ledger_path)
    calls: list[str] = []

    @ledger.decision("recipe-card")
    def feature_card(scores: list[float], draw: dl.Draw) -> str:
        calls.append("ran")
        return draw.softmax(CARDS, scores, name="card")

    feature_card(SCORES, decision_id="req-8c1")
    with pytest.raises(DuplicateDecisionError, match="'req-8c1' was already recorded") as info:
        feature_card(SCORES, decision_id="req-8c1")
    assert isinstance(info.value, ValueError)
    assert ["ran"] == calls  # refused before the function ran: no draw, no side effect
    with pytest.raises(DuplicateDecisionError):
        ledger.record_draw("free-delivery", "bernoulli", {"p": 0.2}, True, 0.2,
                           decision_id="req-8c1")  # fmt: skip
    with pytest.raises(DuplicateDecisionError):
        ledger.bucket("shopper-1", {"a": 0.5, "b": 0.5}, "menu", decision_id="req-8c1")
    with pytest.raises(ZeroDivisionError):  # a call that fails does not use up its id
        ledger.decision("broken")(lambda draw: 1 / 0 if draw else None)(decision_id="req-2")
    ledger.record_draw("free-delivery", "bernoulli", {"p": 0.2}, True, 0.2, decision_id="req-2")
    ledger.outcome("req-8c1", "checkout", 1.0)  # outcomes are recorded by id, many per id
    ledger.outcome("req-8c1", "checkout", 0.0)
    ledger.close()
    assert (4, 4, 0) == (ledger.stats()["recorded"], ledger.stats()["written"],
                         ledger.stats()["rejected"])  # fmt: skip
    report = check_integrity(ledger_path)
    assert (True, 2, 0) == (report.ok, report.decisions, report.duplicates)


def test_calls_after_close_raise(ledger_path: Any) -> None:
    """A closed ledger refuses new records with LedgerClosedError (an OSError)."""
    ledger = dl.Ledger(ledger_path)
    feature_card = make_decision(ledger)
    ledger.close()
    ledger.close()  # twice is fine
    with pytest.raises(LedgerClosedError, match="closed") as info:
        feature_card(CARDS, SCORES)
    assert isinstance(info.value, LedgerError) and isinstance(info.value, OSError)
    with pytest.raises(LedgerClosedError):
        ledger.outcome("req-8c1", "checkout", 1.0)


def test_threads_record_without_losing_or_reordering(ledger: dl.Ledger) -> None:
    """Four threads x 300 calls: every decision recorded once, seq 0..1199 without gaps."""
    feature_card = make_decision(ledger)
    with capture(ledger) as cap:
        threads = [
            threading.Thread(target=lambda: [feature_card(CARDS, SCORES) for _ in range(300)])
            for _ in range(4)
        ]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    assert list(range(1200)) == [d.seq for d in cap.decisions]
    assert 1200 == len({d.decision_id for d in cap.decisions})
    assert 1200 == len({d.seed for d in cap.decisions})


def test_bucket_assignment_is_recorded_and_stable(ledger: dl.Ledger) -> None:
    """ledger.bucket records one bucket draw (no seed); the same unit always gets the same arm."""
    shares = {"control": 0.5, "treatment": 0.5}
    with capture(ledger) as cap:
        arms = [ledger.bucket("shopper-000017", shares, "reminder-test") for _ in range(3)]
        ledger.bucket("shopper-000018", shares, "reminder-test", stream="reminders")
    assert 1 == len(set(arms))
    first = cap.decisions[0]
    assert ("reminder-test", "shopper-000017", None) == (first.stream, first.unit, first.seed)
    assert ("exact", 0.5, arms[0]) == (first.propensity_kind, first.propensity, first.action)
    (draw,) = first.draws
    assert "bucket" == draw.kind
    assert {"unit": "shopper-000017", "shares": shares, "salt": "reminder-test"} == draw.args
    assert "reminders" == cap.decisions[-1].stream


def test_a_decision_defined_in_main_warns_that_replay_cannot_import_it(
    ledger: dl.Ledger,
) -> None:
    """Replay never imports __main__: a decision defined in a script run directly is
    recorded, but its records can never be verified, so defining it warns."""

    def feature_card(draw: dl.Draw) -> bool:
        return draw.bernoulli(0.5, name="show")

    feature_card.__module__ = "__main__"
    with pytest.warns(dl.UnreplayableDecisionWarning, match="defined in __main__.*cannot be verif"):
        ledger.decision("recipe-card-script")(feature_card)


def test_inputs_replay_cannot_rebuild_without_an_annotation_warn_once(ledger: dl.Ledger) -> None:
    """A numpy array is recorded as a JSON list and a datetime as text: without an annotation
    they come back as such in a replay, so the writer's first call says so. Annotated ones
    (np.ndarray, datetime) are rebuilt and do not warn; numpy scalars need nothing."""

    def bare(scores, draw: dl.Draw) -> bool:  # type: ignore[no-untyped-def]
        return draw.bernoulli(float(scores.mean()), name="show")

    def typed(scores: np.ndarray, draw: dl.Draw) -> bool:
        return draw.bernoulli(float(scores.mean()), name="show")

    def at(when, draw: dl.Draw) -> bool:  # type: ignore[no-untyped-def]
        return draw.bernoulli(0.7 if when.hour < 12 else 0.3, name="early")

    def at_typed(when: datetime.datetime, share: float, draw: dl.Draw) -> bool:
        return draw.bernoulli(share if when.hour < 12 else 0.3, name="early")

    warned = ledger.decision("array-bare")(bare)
    with pytest.warns(dl.UnreplayableDecisionWarning, match="input scores is a numpy array"):
        warned(np.array([0.2, 0.4]))
    nine = datetime.datetime(2026, 12, 4, 9)
    with pytest.warns(dl.UnreplayableDecisionWarning, match="input when is a datetime"):
        ledger.decision("slot-bare")(at)(nine)
    quiet = ledger.decision("array-typed")(typed)
    quiet_at = ledger.decision("slot-typed")(at_typed)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warned(np.array([0.2, 0.4]))  # once per writer and decision
        quiet(np.array([0.2, 0.4]))
        quiet_at(nine, np.float64(0.6))


def test_a_decision_defined_in_a_module_does_not_warn(ledger: dl.Ledger) -> None:
    def feature_card(draw: dl.Draw) -> bool:
        return draw.bernoulli(0.5, name="show")

    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ledger.decision("recipe-card-module")(feature_card)
