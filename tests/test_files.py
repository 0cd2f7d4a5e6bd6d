"""Output files: checked before work, written whole through a new file, links not followed."""

from __future__ import annotations

import secrets
from pathlib import Path

import pytest

from drawledger._files import check_output, replacing
from drawledger.exceptions import OutputError


def test_a_link_at_the_temporary_name_is_never_followed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Even a link planted at the very name drawn is skipped (O_CREAT | O_EXCL)."""
    names = iter(["0" * 16, "1" * 16])
    monkeypatch.setattr(secrets, "token_hex", lambda n: next(names))
    victim = tmp_path / "victim.txt"
    victim.write_text("keep")
    (tmp_path / f".out.json.{'0' * 16}.tmp").symlink_to(victim)
    with replacing(tmp_path / "out.json") as out:
        out.write(b"{}")
    assert "keep" == victim.read_text()
    assert "{}" == (tmp_path / "out.json").read_text()


def test_a_failed_write_leaves_the_old_file_and_no_temporary_file(tmp_path: Path) -> None:
    target = tmp_path / "out.json"
    target.write_text("old")
    with pytest.raises(RuntimeError), replacing(target) as out:
        out.write(b"half")
        raise RuntimeError("stopped")
    assert "old" == target.read_text()
    assert [target] == list(tmp_path.iterdir())


def test_a_link_at_the_target_is_replaced_not_written_through(tmp_path: Path) -> None:
    victim = tmp_path / "victim.txt"
    victim.write_text("keep")
    (tmp_path / "out.json").symlink_to(victim)
    with replacing(tmp_path / "out.json") as out:
        out.write(b"new")
    assert "keep" == victim.read_text()
    assert not (tmp_path / "out.json").is_symlink()


@pytest.mark.parametrize(
    ("name", "message"), [("missing/x.json", "no folder"), (".", "is a folder")]
)
def test_an_unwritable_destination_is_named(tmp_path: Path, name: str, message: str) -> None:
    with pytest.raises(OutputError, match=message):
        check_output(tmp_path / name, "--json")
