"""One decision of any ledger by its id: its rows, its draws and its outcomes."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import sqlalchemy as sa

from drawledger import _parquet
from drawledger._records import DECISION_COLUMNS, DRAW_COLUMNS, OUTCOME_COLUMNS
from drawledger.exceptions import LedgerError
from drawledger.replay.sources._tables import is_parquet, open_engine

Row = tuple[Any, ...]


@dataclass(frozen=True)
class DecisionRows:
    """The rows of one decision id: its decision rows (more than one when the id is
    duplicated), its draw rows by index, and its outcome rows in (writer, seq) order."""

    decisions: list[Row]
    draws: list[Row]
    outcomes: list[Row]


def read_decision(
    target: str | os.PathLike[str], decision_id: str, *, format: str | None = None
) -> DecisionRows:
    """The rows of ``decision_id`` in a ledger (SQLite path, SQLAlchemy URL or Parquet
    directory); empty lists when the ledger has no such decision."""
    if is_parquet(target, format):
        return _read_parquet(os.fspath(target), decision_id)
    engine = open_engine(target)
    queries = (
        ("decisions", DECISION_COLUMNS, "writer, seq"),
        ("draws", DRAW_COLUMNS, "idx"),
        ("outcomes", OUTCOME_COLUMNS, "writer, seq"),
    )
    try:
        with engine.connect() as conn:
            found = [
                [tuple(r) for r in conn.execute(sa.text(
                    f"SELECT {', '.join(cols)} FROM {table} WHERE decision_id = :d "
                    f"ORDER BY {order}"), {"d": decision_id})]
                for table, cols, order in queries
            ]  # fmt: skip
    except sa.exc.SQLAlchemyError as exc:
        raise LedgerError(f"cannot read ledger: {str(exc).splitlines()[0]}") from None
    finally:
        engine.dispose()
    return DecisionRows(*found)


def _matching(path: Path, table: str, decision_id: str) -> list[Row]:
    """The rows of one part file whose decision id is ``decision_id``."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        data = pq.read_table(path, schema=_parquet.SCHEMAS[table],
                             filters=[("decision_id", "==", decision_id)])  # fmt: skip
    except (OSError, pa.ArrowException) as exc:
        raise _parquet.unreadable(path, exc) from None
    return list(zip(*(col.to_pylist() for col in data.columns), strict=True))


def _read_parquet(root: str, decision_id: str) -> DecisionRows:
    _parquet.check_ledger_dir(root)
    decisions: list[Row] = []
    draws: list[Row] = []
    for part, sibling in _parquet.iter_part_pairs(root):
        rows = _matching(part.path, "decisions", decision_id)
        decisions += rows
        if rows and sibling is not None:
            draws += _matching(sibling, "draws", decision_id)
    outcomes = [row for part in _parquet.parts(root, "outcomes")
                for row in _matching(part.path, "outcomes", decision_id)]  # fmt: skip
    draws.sort(key=lambda d: d[DRAW_COLUMNS.index("idx")])
    return DecisionRows(decisions, draws, outcomes)
