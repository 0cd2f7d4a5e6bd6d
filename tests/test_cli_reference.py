"""docs/cli.md is the command line's own ``--help``, regenerated and compared."""

from __future__ import annotations

import gen_cli_reference

from drawledger.cli import build_parser


def test_cli_reference_matches_help() -> None:
    """docs/cli.md equals what tests/gen_cli_reference.py generates from --help now."""
    expected = gen_cli_reference.reference()
    actual = gen_cli_reference.DOC.read_text(encoding="utf-8")
    assert expected == actual, "docs/cli.md is stale: run python tests/gen_cli_reference.py"


def test_every_command_help_has_an_example() -> None:
    """Each subcommand's --help ends with an example that starts with 'drawledger NAME'."""
    for name, sub in gen_cli_reference.subcommands(build_parser()).items():
        text = sub.format_help()
        assert "example" in text, name
        assert f"drawledger {name}" in text.split("example", 1)[1], name


def test_every_command_is_documented() -> None:
    """The reference has a section per subcommand."""
    text = gen_cli_reference.DOC.read_text(encoding="utf-8")
    for name in gen_cli_reference.subcommands(build_parser()):
        assert f"## drawledger {name}\n" in text
