"""docs/README.md links every page, its links resolve, docs/concepts.md and the README's
service example run as written."""

from __future__ import annotations

import re
import sqlite3
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
DOCS = ROOT / "docs"
README = ROOT / "README.md"
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


def service_files(text: str) -> dict[str, str]:
    """The python blocks of "In your service", keyed by the file name on their first line."""
    section = text.split("## In your service", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"^```python\n(.*?)^```$", section, flags=re.S | re.M)
    files = {}
    for block in blocks:
        first = block.splitlines()[0]
        assert first.startswith("# ") and first.endswith(".py"), first
        files[first[2:]] = block
    return files


def verify_command(text: str) -> list[str]:
    """The README's `drawledger verify ...` line, without its trailing comment."""
    line = next(x for x in text.splitlines() if x.startswith("drawledger verify "))
    return line.split("#", 1)[0].split()[1:]


def test_readme_service_example_is_recorded_and_verifies(tmp_path: Path) -> None:
    """Save the README's module and caller, run the caller (one decision, one outcome
    recorded), then the README's verify command in that folder: exit 0, no warning about
    __main__, and the export written."""
    text = README.read_text(encoding="utf-8")
    files = service_files(text)
    assert ["grocery_service.py", "serve.py"] == list(files)
    for name, code in files.items():
        (tmp_path / name).write_text(code, encoding="utf-8")
    served = subprocess.run([sys.executable, "serve.py"], cwd=tmp_path, capture_output=True,
                            text=True, timeout=120)  # fmt: skip
    assert 0 == served.returncode, served.stderr
    assert "__main__" not in served.stderr
    argv = verify_command(text)
    assert ["verify", "decisions.db", "--path", "."] == argv[:4]
    done = subprocess.run(
        [sys.executable, "-c", "import sys; from drawledger.cli import main; sys.exit(main())",
         *argv],
        cwd=tmp_path, capture_output=True, text=True, timeout=300,
    )  # fmt: skip
    assert 0 == done.returncode, done.stdout + done.stderr
    assert (tmp_path / "propensities.parquet").exists()
    with sqlite3.connect(tmp_path / "decisions.db") as conn:
        assert (1, 1) == (
            conn.execute("SELECT COUNT(*) FROM decisions").fetchone()[0],
            conn.execute("SELECT COUNT(*) FROM outcomes").fetchone()[0],
        )


def test_a_caller_that_defines_its_decision_in_main_is_warned(tmp_path: Path) -> None:
    """The old single-script form: the decision lives in __main__, and the SDK says so."""
    files = service_files(README.read_text(encoding="utf-8"))
    script = files["grocery_service.py"] + "\n" + files["serve.py"].replace(
        "from grocery_service import feature_card, ledger\n", "")  # fmt: skip
    (tmp_path / "one_script.py").write_text(script, encoding="utf-8")
    done = subprocess.run([sys.executable, "one_script.py"], cwd=tmp_path, capture_output=True,
                          text=True, timeout=120)  # fmt: skip
    assert 0 == done.returncode, done.stderr
    assert "UnreplayableDecisionWarning" in done.stderr
