"""The ledger's three tables (docs/ledger.md), declared once.

``DECISIONS``, ``DRAWS`` and ``OUTCOMES`` give each table's columns in their stored order (name,
logical type, nullability) and its indexes. Everything else is derived from them: the SQLAlchemy
tables below, the column tuples of ``_records``, the Arrow schemas of ``_parquet``, the field
checks of ``_ingest`` and the capture of ``testing``. Rows travel as plain tuples in column
order; ``DEC``, ``DRAW`` and ``OUT`` name the positions in a decision, draw and outcome row
(``row[DEC.writer]``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

import sqlalchemy as sa

from drawledger.exceptions import LedgerError

Kind = Literal["text", "float", "integer"]


@dataclass(frozen=True)
class Column:
    """One column: ``kind`` is its logical type; ``json`` marks text holding a JSON document;
    ``wide`` marks an integer stored as a 64-bit SQL BIGINT (Arrow stores every integer as
    int64)."""

    name: str
    kind: Kind
    nullable: bool = False
    json: bool = False
    wide: bool = False


@dataclass(frozen=True)
class Index:
    name: str
    columns: tuple[str, ...]
    unique: bool = False


@dataclass(frozen=True)
class TableSpec:
    name: str
    columns: tuple[Column, ...]
    indexes: tuple[Index, ...]

    @property
    def names(self) -> tuple[str, ...]:
        """The column names in stored order."""
        return tuple(c.name for c in self.columns)


def _text(name: str, *, nullable: bool = False, json: bool = False) -> Column:
    return Column(name, "text", nullable=nullable, json=json)


def _float(name: str) -> Column:
    return Column(name, "float")


def _integer(name: str, *, wide: bool = False) -> Column:
    return Column(name, "integer", wide=wide)


# The integrity chain's columns, last in decisions and outcomes (docs/ledger.md).
_CHAIN = (
    _text("writer"),
    _integer("seq", wide=True),
    _text("prev_hash", nullable=True),
    _text("hash"),
)

DECISIONS = TableSpec(
    "decisions",
    (
        _text("decision_id"),
        _text("stream"),
        _text("unit", nullable=True),
        _float("ts"),
        _text("fn", nullable=True),
        _text("code_hash", nullable=True),
        _text("inputs", json=True),
        _text("params", json=True),
        _text("action", json=True),
        _float("propensity"),
        _text("propensity_kind"),
        _text("seed", nullable=True),
        *_CHAIN,
    ),
    (
        Index("decisions_writer_seq", ("writer", "seq"), unique=True),
        Index("decisions_decision_id", ("decision_id",)),
    ),
)

DRAWS = TableSpec(
    "draws",
    (
        _text("decision_id"),
        _integer("idx"),
        _text("name", nullable=True),
        _text("kind"),
        _text("args", json=True),
        _text("u", json=True),
        _text("value", json=True),
        _float("prob"),
        _integer("is_density"),
    ),
    (Index("draws_decision_id", ("decision_id",)),),
)

OUTCOMES = TableSpec(
    "outcomes",
    (
        _text("decision_id"),
        _text("name"),
        _float("value"),
        _float("ts"),
        *_CHAIN,
    ),
    (
        Index("outcomes_writer_seq", ("writer", "seq"), unique=True),
        Index("outcomes_decision_id", ("decision_id",)),
    ),
)

SPECS = (DECISIONS, DRAWS, OUTCOMES)

# The registry (docs/ledger.md, "Ledger identity and writer registry"): the ledger's signed
# identity, created with the ledger, and one signed row per writer, written when it starts.
# Ledgers from before the registry have neither table and are checked as before.
LEDGER_META = TableSpec(
    "ledger_meta",
    (_text("name"), _text("value")),
    (Index("ledger_meta_name", ("name",), unique=True),),
)

WRITERS = TableSpec(
    "writers",
    (_text("writer"), _float("started"), _text("genesis", nullable=True), _text("tag")),
    (Index("writers_writer", ("writer",), unique=True),),
)

REGISTRY = (LEDGER_META, WRITERS)

# The source of each decision function's code version, one row per version and writer
# (docs/deploys.md). Not a record of the hash chain: a row is bound to the decisions by its
# identity, which the decisions' hashes cover and which the source must hash to.
CODE_VERSIONS = TableSpec(
    "code_versions",
    (
        _text("identity"),
        _text("stream"),
        _text("fn"),
        _text("module_file", nullable=True),
        _text("source", nullable=True),
        _float("first_ts"),
        _text("writer"),
    ),
    (Index("code_versions_identity", ("identity",)),),
)


class Positions:
    """The position of each column in a table's row tuples, by name: ``DEC.hash == 15``.

    The positions are plain instance attributes; a name that is not a column raises
    AttributeError.
    """

    def __init__(self, table: TableSpec) -> None:
        self.__dict__.update((name, i) for i, name in enumerate(table.names))

    if TYPE_CHECKING:  # the type checker's view: every column is an int attribute

        def __getattr__(self, name: str) -> int: ...

    # (Not at run time: a class with __getattr__ reads every attribute through a slower path.)


DEC = Positions(DECISIONS)
DRAW = Positions(DRAWS)
OUT = Positions(OUTCOMES)

# -- SQLAlchemy Core metadata ---------------------------------------------------------------
_SQL_TYPES = {"text": sa.Text, "float": sa.Double, "integer": sa.Integer}


def _sql_type(column: Column) -> type[sa.types.TypeEngine[object]]:
    return sa.BigInteger if column.wide else _SQL_TYPES[column.kind]


def _sql_table(spec: TableSpec) -> sa.Table:
    return sa.Table(
        spec.name,
        metadata,
        *(sa.Column(c.name, _sql_type(c), nullable=c.nullable) for c in spec.columns),
        *(sa.Index(i.name, *i.columns, unique=i.unique) for i in spec.indexes),
    )


metadata = sa.MetaData()
decisions = _sql_table(DECISIONS)
draws = _sql_table(DRAWS)
outcomes = _sql_table(OUTCOMES)

TABLES = (decisions, draws, outcomes)
ledger_meta = _sql_table(LEDGER_META)
writers = _sql_table(WRITERS)

code_versions = _sql_table(CODE_VERSIONS)

# -- stored rows that do not fit their table ---------------------------------------------------
_WANTED = {"text": "text", "float": "a number", "integer": "an integer"}


def _fits(kind: Kind, value: object) -> bool:
    cls = value.__class__
    if kind == "text":
        return cls is str
    if kind == "float":
        return cls is float or cls is int
    return cls is int


def value_problem(column: Column, value: object) -> str | None:
    """Why a value read from a ledger does not fit ``column``, or None when it does."""
    if value is None:
        return None if column.nullable else f"{column.name} is NULL"
    if _fits(column.kind, value):
        return None
    shown = repr(value)
    shown = shown if len(shown) <= 40 else shown[:37] + "..."
    return f"{column.name} is {shown}, not {_WANTED[column.kind]}"


# Per table (by identity, the table kept with its shapes), the tuples of field types of rows
# found to fit it. A fit depends only on each field's class, so a row of plain values whose
# types were seen fitting fits: replay checks every row it reads, and a ledger's rows come in
# a handful of such shapes.
_FITTING: dict[int, tuple[TableSpec, set[tuple[type, ...]]]] = {}
_PLAIN = frozenset({str, int, float, type(None)})
_MAX_SHAPES = 64


def row_problem(table: TableSpec, row: tuple[object, ...]) -> str | None:
    """Why a row read from a ledger does not fit ``table``'s columns, or None when it does.

    A damaged ledger (edited by hand, written by another tool) can hold a NULL where the table
    allows none, or text or a blob where a number belongs; readers report such a record with
    this reason instead of computing with it.
    """
    shape = tuple(map(type, row))
    known = _FITTING.get(id(table))
    if known is not None and known[0] is table and shape in known[1]:
        return None
    problem = _row_problem(table, row)
    if problem is None and _PLAIN.issuperset(shape):
        if known is None or known[0] is not table:
            known = _FITTING[id(table)] = (table, set())
        if len(known[1]) < _MAX_SHAPES:
            known[1].add(shape)
    return problem


def _row_problem(table: TableSpec, row: tuple[object, ...]) -> str | None:
    if len(row) != len(table.columns):
        return f"{table.name} row has {len(row)} fields, not {len(table.columns)}"
    for column, value in zip(table.columns, row, strict=True):
        problem = value_problem(column, value)
        if problem is not None:
            return f"{table.name}.{problem}"
    return None


def damaged(table: str, decision_id: object, problem: str) -> LedgerError:
    """The error of a reader that cannot go on past a damaged record (a NULL or a value of
    another type where its computation needs one): one line naming the record and the field."""
    return LedgerError(
        f"{table} record of decision {decision_id!r}: {problem}; the ledger is damaged "
        "(check_integrity lists such records)"
    )
