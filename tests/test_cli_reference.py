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


def test_replay_page_maps_every_option_to_its_python_keyword() -> None:
    """docs/replay.md's table of command-line options and Python keywords names every option of
    verify, estimate and report, and every keyword it names is a parameter of those functions."""
    import inspect
    import re

    import drawledger.replay as replay

    page = (gen_cli_reference.DOC.parent / "replay.md").read_text(encoding="utf-8")
    section = page.split("## Command line and Python", 1)[1].split("\n## ", 1)[0]
    subs = gen_cli_reference.subcommands(build_parser())
    for name in ("verify", "estimate", "report"):
        for action in subs[name]._actions:
            for option in action.option_strings:
                if option.startswith("--") and option != "--help":
                    assert f"`{option}" in section, f"{name} {option}"
    functions = (replay.verify, replay.estimate, replay.sweep, replay.write_report, replay.open)
    keywords = {p for f in functions for p in inspect.signature(f).parameters}
    named = set(re.findall(r"`(?:[a-z_]+\([^`]*?)?\b([a-z_]+)=", section))
    assert set() == named - keywords
