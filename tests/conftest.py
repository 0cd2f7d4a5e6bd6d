"""Shared fixtures: temporary ledgers, the PostgreSQL URL, and importable decision code."""

from __future__ import annotations

import os
import sys
import uuid
from collections.abc import Iterator
from pathlib import Path

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
