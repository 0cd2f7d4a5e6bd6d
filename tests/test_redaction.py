"""Redaction: chosen input fields become keyed hashes before anything is written or spilled."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import pytest

import drawledger as dl
from drawledger.replay.sources import read_tables

KEY = b"redaction-secret"
EMAIL = "rider17@example.org"


def _ledger(target: Path | str, **options: Any) -> tuple[dl.Ledger, Any]:
    led = dl.Ledger(target, **options)

    @led.decision("recipe-card")
    def feature_card(shopper: dict[str, Any], draw: dl.Draw) -> str:
        return draw.categorical(["ramen", "tacos"], [0.5, 0.5], name="card")

    return led, feature_card


def _inputs(target: Path) -> dict[str, Any]:
    loaded: dict[str, Any] = json.loads(read_tables(target).decisions["inputs"].iloc[0])
    return loaded


def test_redacted_field_is_a_keyed_hash_and_the_raw_value_is_nowhere(ledger_path: Path) -> None:
    led, feature_card = _ledger(ledger_path, redact=["shopper.email"], redact_key=KEY)
    feature_card({"email": EMAIL, "basket_size": 4})
    led.close()
    token = hashlib.blake2b(json.dumps(EMAIL).encode(), digest_size=16, key=KEY,
                            person=b"drawledger.r1").hexdigest()  # fmt: skip
    assert {"shopper": {"email": f"redacted:{token}", "basket_size": 4}} == _inputs(ledger_path)
    for path in ledger_path.parent.iterdir():
        assert EMAIL.encode() not in path.read_bytes()


def test_redaction_applies_before_spilling(tmp_path: Path) -> None:
    led, feature_card = _ledger("postgresql+psycopg://postgres@127.0.0.1:1/test",
                                redact=["shopper.email"], redact_key=KEY,
                                spill_dir=tmp_path)  # fmt: skip
    feature_card({"email": EMAIL})
    led.close()
    assert 1 == led.stats()["spilled"]
    assert EMAIL.encode() not in led.spill_path.read_bytes()


def test_same_value_same_token_other_key_other_token(tmp_path: Path) -> None:
    tokens = []
    for name, key in (("a.db", KEY), ("b.db", KEY), ("c.db", b"another-secret")):
        led, feature_card = _ledger(tmp_path / name, redact=["shopper.email"], redact_key=key)
        feature_card({"email": EMAIL})
        led.close()
        tokens.append(_inputs(tmp_path / name)["shopper"]["email"])
    assert tokens[0] == tokens[1] != tokens[2]


def test_paths_reach_into_lists_and_missing_fields_are_skipped(ledger_path: Path) -> None:
    led, feature_card = _ledger(ledger_path, redact=["shopper.contacts.phone", "shopper.nope"],
                                integrity_key=KEY)  # fmt: skip
    feature_card({"contacts": [{"phone": "555-0101"}, {"phone": "555-0102"}, {"fax": "x"}]})
    led.close()
    contacts = _inputs(ledger_path)["shopper"]["contacts"]
    assert [True, True] == [c["phone"].startswith("redacted:") for c in contacts[:2]]
    assert {"fax": "x"} == contacts[2]


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"redact": ["shopper.email"]}, "needs a secret redact_key"),
        ({"redact": "shopper.email", "redact_key": KEY}, "list of dotted field paths"),
        ({"redact": ["shopper..email"], "redact_key": KEY}, "list of dotted field paths"),
        ({"redact": ["shopper.email"], "redact_key": b"k" * 65}, "1 to 64 bytes"),
    ],
)
def test_bad_redaction_options_are_refused(ledger_path: Path, options: dict[str, Any],
                                           message: str) -> None:  # fmt: skip
    with pytest.raises(ValueError, match=message):
        dl.Ledger(ledger_path, **options)
