"""docs/quickstart.md runs as written: its Python blocks, in order, in a fresh interpreter."""

from __future__ import annotations

import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

QUICKSTART = Path(__file__).resolve().parent.parent / "docs" / "quickstart.md"


def python_blocks(text: str) -> list[str]:
    return re.findall(r"^```python\n(.*?)^```$", text, flags=re.S | re.M)


def test_quickstart_python_blocks_run(tmp_path: Path, run_markdown: Callable[..., Any]) -> None:
    """Every ```python block of the quickstart runs, in order, in one session, in a temp dir."""
    done = run_markdown("docs/quickstart.md")
    assert 0 == done.returncode, done.stderr
    assert "featured card:" in done.stdout
    assert "re-derived from the seed" in done.stdout
    assert (tmp_path / "quickstart.db").exists()
