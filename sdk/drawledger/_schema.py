"""The ledger's three tables as SQLAlchemy Core metadata (docs/ledger.md)."""

from __future__ import annotations

import sqlalchemy as sa

metadata = sa.MetaData()

decisions = sa.Table(
    "decisions",
    metadata,
    sa.Column("decision_id", sa.Text, nullable=False),
    sa.Column("stream", sa.Text, nullable=False),
    sa.Column("unit", sa.Text),
    sa.Column("ts", sa.Double, nullable=False),
    sa.Column("fn", sa.Text),
    sa.Column("code_hash", sa.Text),
    sa.Column("inputs", sa.Text, nullable=False),
    sa.Column("params", sa.Text, nullable=False),
    sa.Column("action", sa.Text, nullable=False),
    sa.Column("propensity", sa.Double, nullable=False),
    sa.Column("propensity_kind", sa.Text, nullable=False),
    sa.Column("seed", sa.Text),
    sa.Column("writer", sa.Text, nullable=False),
    sa.Column("seq", sa.BigInteger, nullable=False),
    sa.Column("prev_hash", sa.Text),
    sa.Column("hash", sa.Text, nullable=False),
    sa.Index("decisions_writer_seq", "writer", "seq", unique=True),
    sa.Index("decisions_decision_id", "decision_id"),
)

draws = sa.Table(
    "draws",
    metadata,
    sa.Column("decision_id", sa.Text, nullable=False),
    sa.Column("idx", sa.Integer, nullable=False),
    sa.Column("name", sa.Text),
    sa.Column("kind", sa.Text, nullable=False),
    sa.Column("args", sa.Text, nullable=False),
    sa.Column("u", sa.Text, nullable=False),
    sa.Column("value", sa.Text, nullable=False),
    sa.Column("prob", sa.Double, nullable=False),
    sa.Column("is_density", sa.Integer, nullable=False),
    sa.Index("draws_decision_id", "decision_id"),
)

outcomes = sa.Table(
    "outcomes",
    metadata,
    sa.Column("decision_id", sa.Text, nullable=False),
    sa.Column("name", sa.Text, nullable=False),
    sa.Column("value", sa.Double, nullable=False),
    sa.Column("ts", sa.Double, nullable=False),
    sa.Column("writer", sa.Text, nullable=False),
    sa.Column("seq", sa.BigInteger, nullable=False),
    sa.Column("prev_hash", sa.Text),
    sa.Column("hash", sa.Text, nullable=False),
    sa.Index("outcomes_writer_seq", "writer", "seq", unique=True),
    sa.Index("outcomes_decision_id", "decision_id"),
)

TABLES = (decisions, draws, outcomes)
