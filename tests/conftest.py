"""Shared fixtures: temporary ledgers, the PostgreSQL URL, and importable decision code."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

import drawledger as dl

TESTS = Path(__file__).parent
SUPPORT = TESTS / "support"
POSTGRES_ENV = "DRAWLEDGER_TEST_POSTGRES_URL"

# Decision modules used by replay tests live in tests/support and are imported by name.
if str(SUPPORT) not in sys.path:
    sys.path.insert(0, str(SUPPORT))


@pytest.fixture
def ledger_path(tmp_path: Path) -> Path:
    """A path for a new SQLite ledger file."""
    return tmp_path / "decisions.db"


@pytest.fixture
def ledger(ledger_path: Path) -> Iterator[dl.Ledger]:
    """An open SQLite ledger, closed after the test."""
    led = dl.Ledger(ledger_path)
    yield led
    led.close()


@pytest.fixture
def postgres_url() -> Iterator[str]:
    """A PostgreSQL URL with a fresh schema of its own, dropped after the test.

    Skipped with a reason when DRAWLEDGER_TEST_POSTGRES_URL is not set; .ci/run sets it, so
    there a missing server fails instead of skipping.
    """
    base = os.environ.get(POSTGRES_ENV)
    if not base:
        pytest.skip(f"PostgreSQL tests need {POSTGRES_ENV}=postgresql+psycopg://user@host/db")
    import sqlalchemy as sa

    schema = f"dl_{uuid.uuid4().hex[:12]}"
    admin = sa.create_engine(base)
    with admin.begin() as conn:
        conn.exec_driver_sql(f"CREATE SCHEMA {schema}")
    sep = "&" if "?" in base else "?"
    yield f"{base}{sep}options=-csearch_path%3D{schema}"
    with admin.begin() as conn:
        conn.exec_driver_sql(f"DROP SCHEMA {schema} CASCADE")
    admin.dispose()


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory: pytest.TempPathFactory) -> Any:
    """The grocery-delivery demo at a small size (300 sessions), run once per test session.

    Returns the ``DemoResult``: its ledger, report.html and the verify, audit and estimate
    reports, for the report tests.
    """
    from drawledger.replay import run_demo

    return run_demo(300, tmp_path_factory.mktemp("demo"))


ROOT = TESTS.parent


def file_blocks(text: str) -> list[tuple[str, str]]:
    """The file blocks of a Markdown page: (file name, content) of each ```python title="..."."""
    found = re.findall(r'^```python title="([^"/\\]+)"\n(.*?)^```$', text, flags=re.S | re.M)
    return [(name, body) for name, body in found]


@pytest.fixture
def cli_pipe() -> Callable[..., subprocess.CompletedProcess[str]]:
    """Runs ``drawledger ARGS`` in a fresh process as a CI job does: stdout and stderr are
    pipes, ``COLUMNS`` is 80 (the width rich assumes for output that is not a terminal)."""

    def run(*argv: str, columns: int = 80) -> subprocess.CompletedProcess[str]:
        env = {**os.environ, "COLUMNS": str(columns)}
        return subprocess.run([sys.executable, "-m", "drawledger.cli", *argv],
                              capture_output=True, text=True, env=env, timeout=300)  # fmt: skip

    return run


@pytest.fixture
def run_markdown(tmp_path: Path) -> Callable[..., subprocess.CompletedProcess[str]]:
    """Run the ```python blocks of a Markdown page, in order, as one script in a new interpreter.

    A file block, ```python title="name.py"```, is not run: it is saved as ``name.py`` first,
    for the other blocks to import. The script runs in ``tmp_path`` (so files it writes land
    there); returns the finished process, whose exit code and output the test checks.
    """

    def run(page: str | Path, timeout: float = 120) -> subprocess.CompletedProcess[str]:
        text = (ROOT / page).read_text(encoding="utf-8")
        for name, body in file_blocks(text):
            (tmp_path / name).write_text(body, encoding="utf-8")
        blocks = re.findall(r"^```python\n(.*?)^```$", text, flags=re.S | re.M)
        assert blocks, f"{page} has no python blocks"
        script = tmp_path / (Path(page).stem + "_blocks.py")
        script.write_text("\n\n".join(blocks), encoding="utf-8")
        return subprocess.run(
            [sys.executable, str(script)],
            cwd=tmp_path,
            capture_output=True,
            text=True,
            timeout=timeout,
        )

    return run
