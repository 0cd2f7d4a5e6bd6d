"""Safe imports of recorded decision functions and rebuilding their inputs from JSON."""

from __future__ import annotations

import os
import sys
import tempfile
import uuid
from pathlib import Path

import pytest
import shop_decisions as sd
from hypothesis import given, settings
from strategies import json_values, plain_text

import drawledger as dl
from drawledger.exceptions import (
    BadRecordError,
    MissingFunctionError,
    NotADecisionError,
    ReplayError,
)
from drawledger.replay.verify import load_inputs, load_params, resolve_decision

CANARY = """
from pathlib import Path
Path({imported!r}).write_text("imported")

def boom(*args, **kwargs):
    Path({called!r}).write_text("called")
"""


@pytest.fixture
def canary(tmp_path: Path) -> tuple[str, Path, Path, Path]:
    """A module that leaves a file behind when imported and another when ``boom`` is called."""
    name = f"canary_{uuid.uuid4().hex[:10]}"
    code = tmp_path / "code"
    code.mkdir()
    imported, called = tmp_path / "imported", tmp_path / "called"
    (code / f"{name}.py").write_text(CANARY.format(imported=str(imported), called=str(called)))
    yield name, code, imported, called
    sys.modules.pop(name, None)


def test_registered_decision_resolves_without_importing_anything() -> None:
    """A decision already registered in this process is found by its recorded name."""
    assert sd.feature_card is resolve_decision("shop_decisions:feature_card")


def test_os_system_is_not_a_decision_and_is_never_called(monkeypatch: pytest.MonkeyPatch) -> None:
    """``os:system`` resolves to a plain function: refused, and nothing of it runs."""
    calls: list[object] = []
    monkeypatch.setattr(os, "system", lambda *a: calls.append(a))
    with pytest.raises(NotADecisionError, match="os:system"):
        resolve_decision("os:system", allow=["os"])
    assert [] == calls


def test_module_outside_path_and_allow_is_never_imported(canary: tuple) -> None:
    """A module not under --path or --allow is not imported: its top-level code never runs."""
    name, _code, imported, called = canary
    with pytest.raises(MissingFunctionError, match="not under a --path"):
        resolve_decision(f"{name}:boom")
    assert name not in sys.modules
    assert not imported.exists() and not called.exists()


def test_unregistered_function_under_path_is_not_called(canary: tuple) -> None:
    """Under --path the module may be imported, but a plain function in it is never called."""
    name, code, imported, called = canary
    with pytest.raises(NotADecisionError, match="not a function registered"):
        resolve_decision(f"{name}:boom", path=[code])
    assert imported.exists()
    assert not called.exists()
    assert str(code) not in sys.path  # the directory is only on sys.path while importing


def test_allow_prefix_matches_whole_module_names(canary: tuple) -> None:
    """``--allow canary`` admits ``canary`` and ``canary.x`` but not ``canaryx``."""
    name, _code, imported, _called = canary
    with pytest.raises(MissingFunctionError):
        resolve_decision(f"{name}:boom", allow=[name[:-1]])
    assert not imported.exists()


def test_missing_function_in_an_allowed_module(canary: tuple) -> None:
    name, code, _imported, _called = canary
    with pytest.raises(MissingFunctionError, match="has no function 'nothing'"):
        resolve_decision(f"{name}:nothing", path=[code])


def test_missing_module_under_allow_prefix() -> None:
    with pytest.raises(MissingFunctionError, match="cannot be imported"):
        resolve_decision("shop_nowhere_at_all.decisions:f", allow=["shop_nowhere_at_all"])


def test_module_that_raises_on_import_is_a_replay_error(tmp_path: Path) -> None:
    """Importing is allowed but fails: a replay error with the module's message."""
    name = f"broken_{uuid.uuid4().hex[:10]}"
    (tmp_path / f"{name}.py").write_text("raise RuntimeError('no database here')\n")
    with pytest.raises(ReplayError, match="no database here") as info:
        resolve_decision(f"{name}:f", path=[tmp_path])
    assert not isinstance(info.value, (MissingFunctionError, NotADecisionError))
    sys.modules.pop(name, None)


def test_attribute_hooks_of_modules_do_not_run(tmp_path: Path) -> None:
    """Lookup walks ``vars()``: a module-level ``__getattr__`` is never called."""
    name = f"hooked_{uuid.uuid4().hex[:10]}"
    hit = tmp_path / "hit"
    (tmp_path / f"{name}.py").write_text(
        f"from pathlib import Path\ndef __getattr__(n):\n    Path({str(hit)!r}).write_text(n)\n"
    )
    with pytest.raises(MissingFunctionError):
        resolve_decision(f"{name}:anything", path=[tmp_path])
    assert not hit.exists()
    sys.modules.pop(name, None)


@pytest.mark.parametrize(
    "name", ["no_colon", "a:b:c", "os:system()", "../evil:f", "a b:c", "", "mod:", ":fn"]
)
def test_malformed_names_are_bad_records(name: str) -> None:
    with pytest.raises(BadRecordError):
        resolve_decision(name)


@settings(max_examples=60, deadline=None)
@given(plain_text)
def test_arbitrary_names_never_import_or_escape(text: str) -> None:
    """Any recorded name gives a replay error (or a registered decision), never anything else."""
    before = set(sys.modules)
    try:
        found = resolve_decision(text)
    except ReplayError:
        pass
    else:
        assert isinstance(found, dl.Decision)
    assert set() == set(sys.modules) - before


# -- inputs and parameters ----------------------------------------------------------------------
def test_inputs_rebuild_pydantic_models_and_dataclasses() -> None:
    ctx = sd.context(3)
    rebuilt = load_inputs(sd.feature_card, f'{{"ctx": {ctx.model_dump_json()}}}')
    assert {"ctx": ctx} == rebuilt
    assert isinstance(rebuilt["ctx"], sd.CardContext)
    basket = load_inputs(sd.reminder_delay, '{"basket": {"items": 2, "value": 18.5}}')
    assert {"basket": sd.Basket(items=2, value=18.5)} == basket


@pytest.mark.parametrize(
    ("text", "problem"),
    [
        ('{"ctx": {"user_tier": "plus", "cards": "soup", "scores": []}}', "cards"),
        ('{"ctx": ', "not valid JSON"),
        ("[1, 2]", "not a JSON object"),
        ("{}", "'ctx' is missing"),
        ('{"ctx": {"user_tier": 7, "cards": [], "scores": []}}', "user_tier"),
    ],
)
def test_bad_inputs_are_bad_records_naming_the_problem(text: str, problem: str) -> None:
    with pytest.raises(BadRecordError, match=problem):
        load_inputs(sd.feature_card, text)


def test_params_are_typed_and_unknown_ones_refused() -> None:
    assert {"temperature": 0.5} == load_params(sd.feature_card, '{"temperature": 0.5}')
    assert {"temperature": 2.0} == load_params(sd.feature_card, {"temperature": 2})
    with pytest.raises(ReplayError, match="no policy parameter 'heat'"):
        load_params(sd.feature_card, '{"heat": 0.5}')
    with pytest.raises(BadRecordError, match="temperature"):
        load_params(sd.feature_card, '{"temperature": "warm"}')
    with pytest.raises(BadRecordError, match="nan"):
        load_params(sd.feature_card, {"temperature": float("nan")})


led = dl.Ledger(Path(tempfile.gettempdir()) / "drawledger-imports-never-written.db")


@led.decision("untyped")
def untyped(payload, draw: dl.Draw):  # type: ignore[no-untyped-def]
    return draw.bernoulli(0.5)


@settings(max_examples=80, deadline=None)
@given(json_values)
def test_untyped_inputs_come_back_as_recorded_json(value: object) -> None:
    """Without type hints an input is the recorded JSON value itself."""
    from drawledger._records import to_json

    assert {"payload": value} == load_inputs(untyped, to_json({"payload": value}, "inputs"))
