"""Text from a ledger made safe to show: ``visible`` and ``clipped``."""

from __future__ import annotations

import unicodedata

from hypothesis import given
from hypothesis import strategies as st
from strategies import hostile_text

from drawledger._ingest import IngestReport
from drawledger._text import clipped, counted, visible


def test_controls_and_bidirectional_overrides_become_their_escapes() -> None:
    assert r"\x1b[2J\x0d\x0a\x00\x7f\x9b\u202e\u2066\ud800 ok" == visible(
        "\x1b[2J\r\n\x00\x7f\x9b\u202e\u2066\ud800 ok"
    )


def test_ordinary_text_is_left_as_written() -> None:
    text = "recipe-card [eur] café 料理 \\ <b>&"
    assert text == visible(text)


@given(st.one_of(hostile_text, st.text()))
def test_visible_text_holds_no_control_format_or_separator_character(text: str) -> None:
    # Unicode general categories: Cc control, Cf format, Cs surrogate, Zl/Zp separators.
    shown = visible(text)
    assert [] == [c for c in shown if unicodedata.category(c) in {"Cc", "Cf", "Cs", "Zl", "Zp"}]
    shown.encode("utf-8")  # a lone surrogate would not encode


def test_every_format_character_is_escaped_not_only_the_well_known_ones() -> None:
    """Format characters outside the bidirectional and zero-width ones (Egyptian hieroglyph
    and musical symbol format controls, Arabic number sign) and an unassigned code point."""
    text = "a\U00013430b\U0001d173c\u0600d\U000e0002"
    assert r"a\U00013430b\U0001d173c\u0600d\U000e0002" == visible(text)
    assert "grün, 食べる, 🥕" == visible("grün, 食べる, 🥕")


def test_clipped_text_ends_with_an_ellipsis_within_the_limit() -> None:
    assert "abcd…" == clipped("abcdefgh", 5)
    assert "abc" == clipped("abc", 5)
    assert r"\x1b…" == clipped("\x1b\x1b", 5)


def test_ingest_summary_shows_reasons_escaped() -> None:
    report = IngestReport("draws.jsonl", lines=1, malformed=[(1, "bad \x1b[2J\u202e")])
    assert r"  line 1: bad \x1b[2J\u202e" == report.render().splitlines()[1]


def test_counted_agrees_the_noun_with_the_number() -> None:
    assert ["0 writers", "1 writer", "2 writers", "1 draws part", "3 draws parts"] == [
        counted(0, "writer"), counted(1, "writer"), counted(2, "writer"),
        counted(1, "draws part"), counted(3, "draws part"),
    ]  # fmt: skip
    assert "2 analyses" == counted(2, "analysis", "analyses")
