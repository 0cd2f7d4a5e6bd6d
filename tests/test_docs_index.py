"""docs/README.md links every page, its links resolve, and docs/concepts.md runs as written."""

from __future__ import annotations

import re
import sqlite3
from collections.abc import Callable
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
DOCS = ROOT / "docs"
LINK = re.compile(r"\]\(([^)#\s]+)(?:#[^)]*)?\)")


def links(page: Path) -> list[str]:
    return [t for t in LINK.findall(page.read_text(encoding="utf-8")) if "://" not in t]


def test_index_links_every_page() -> None:
    """Every Markdown page in docs/ is linked from docs/README.md."""
    linked = {(DOCS / t).resolve() for t in links(DOCS / "README.md")}
    pages = {p.resolve() for p in DOCS.glob("*.md") if p.name != "README.md"}
    assert set() == pages - linked


def test_relative_links_resolve() -> None:
    """Every relative link of the index, the concepts page and the examples README exists."""
    for page in (DOCS / "README.md", DOCS / "concepts.md", ROOT / "examples" / "README.md"):
        for target in links(page):
            assert (page.parent / target).exists(), f"{page.name}: {target}"


def test_concepts_python_runs(tmp_path: Path, run_markdown: Callable[..., Any]) -> None:
    """The Python blocks of docs/concepts.md run, in order, in a fresh interpreter."""
    done = run_markdown("docs/concepts.md")
    assert 0 == done.returncode, done.stderr
    assert (tmp_path / "concepts.db").exists()


def test_cautions_are_stated() -> None:
    """The index, the concepts page and the examples README carry the cautions."""
    for page in (DOCS / "README.md", DOCS / "concepts.md", ROOT / "examples" / "README.md"):
        text = " ".join(page.read_text(encoding="utf-8").split()).lower()
        for words in ("consent", "ethics review", "consumer-protection", "personal data",
                      "redact", "qualified review"):  # fmt: skip
            assert words in text, f"{page.name}: {words}"


def test_readme_python_runs(tmp_path: Path, run_markdown: Callable[..., Any]) -> None:
    """The README's service example runs as written and records its decision and outcome."""
    done = run_markdown("README.md")
    assert 0 == done.returncode, done.stderr
    with sqlite3.connect(tmp_path / "decisions.db") as conn:
        assert (1, 1) == (
            conn.execute("SELECT COUNT(*) FROM decisions").fetchone()[0],
            conn.execute("SELECT COUNT(*) FROM outcomes").fetchone()[0],
        )
