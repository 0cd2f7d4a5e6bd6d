"""The ledger's tables are declared once (``drawledger._schema``): the SQL tables, the column
tuples, the Arrow schemas, the ingest field checks, the row positions and the capture all follow
that declaration, and the declaration follows the published schema in docs/ledger.md."""

from __future__ import annotations

import dataclasses
import re
import sqlite3
from pathlib import Path
from typing import Any

import orjson
import pyarrow as pa
import pytest
from hypothesis import given
from hypothesis import strategies as st
from sqlalchemy.dialects import sqlite
from strategies import stored_values

import drawledger as dl
from drawledger import _parquet, _records, _schema, _sinks
from drawledger._schema import DEC, DECISIONS, DRAW, DRAWS, OUT, OUTCOMES, SPECS, TableSpec
from drawledger.testing import CapturedDecision, CapturedDraw, CapturedOutcome

LEDGER_DOC = Path(__file__).resolve().parent.parent / "docs" / "ledger.md"


# -- the published schema --------------------------------------------------------------------
def _doc_section(table: str) -> str:
    """The text of docs/ledger.md that describes ``table``: from its name to the next table's."""
    text = LEDGER_DOC.read_text(encoding="utf-8")
    tables = text[text.index("## Tables") : text.index("## The integrity chain")]
    start = tables.index(f"`{table}` —")
    ends = [tables.find(f"`{t.name}` —", start + 1) for t in SPECS]
    return tables[start : min([e for e in ends if e > start], default=len(tables))]


def _split_top_level(text: str) -> list[str]:
    """``text`` split at the commas that are not inside parentheses."""
    parts, depth, current = [], 0, ""
    for ch in text:
        depth += {"(": 1, ")": -1}.get(ch, 0)
        if ch == "," and depth == 0:
            parts.append(current.strip())
            current = ""
        else:
            current += ch
    return [*parts, current.strip()]


def _doc_decisions_table() -> list[tuple[str, str]]:
    """(column, type as the doc writes it) for each column in the doc's `decisions` table."""
    out = []
    for line in _doc_section("decisions").splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if not line.startswith("|") or cells[0] in ("column", "---"):
            continue
        names = [n.strip() for n in cells[0].split(",")]
        types = [t.strip() for t in cells[1].split(",")]
        if len(names) == 1:  # "text, null": one column, nullable
            types = [cells[1]]
        elif len(types) == 1:  # "JSON text" for every column of the row
            types *= len(names)
        out += list(zip(names, types, strict=True))
    return out


def _doc_prose_columns(table: str) -> list[tuple[str, str]]:
    """(column, its parenthesized note or "") from the doc's sentence listing ``table``."""
    sentence = _doc_section(table).split("\n\n")[0].split("—", 1)[1]
    sentence = sentence.split(":", 1)[1] if sentence.lstrip().startswith("one row") else sentence
    sentence = sentence.strip().rstrip(".")
    out = []
    for part in _split_top_level(sentence):
        match = re.fullmatch(r"(\w+)(?:\s*\((.*)\))?", part, flags=re.S)
        assert match is not None, f"cannot read column {part!r} in docs/ledger.md"
        out.append((match[1], match[2] or ""))
    return out


def test_decisions_columns_types_and_nulls_are_those_published_in_docs_ledger_md() -> None:
    """Source: docs/ledger.md, "## Tables", the `decisions` table (type column: "text", "float",
    "int", "JSON text"; ", null" marks a nullable column; prev_hash is null for seq 0)."""
    doc = _doc_decisions_table()
    kinds = {"text": "text", "JSON text": "text", "float": "float", "int": "integer"}
    assert [name for name, _ in doc] == list(DECISIONS.names)
    assert [(kinds[t.removesuffix(", null")], t.startswith("JSON")) for _, t in doc] == [
        (c.kind, c.json) for c in DECISIONS.columns
    ]
    text = LEDGER_DOC.read_text(encoding="utf-8")
    documented_nulls = {n for n, t in doc if t.endswith(", null")}
    if "(`prev_hash`, null for seq 0)" in text:
        documented_nulls.add("prev_hash")
    assert documented_nulls == {c.name for c in DECISIONS.columns if c.nullable}


def test_draws_and_outcomes_columns_are_those_published_in_docs_ledger_md() -> None:
    """Source: docs/ledger.md, "## Tables": the sentences listing the `draws` and `outcomes`
    columns in order; "(JSON ...)" marks a JSON text column, "(float)" a float column."""
    draws = _doc_prose_columns("draws")
    assert [name for name, _ in draws] == list(DRAWS.names)
    assert [note.startswith("JSON") for _, note in draws] == [c.json for c in DRAWS.columns]
    outcomes = _doc_prose_columns("outcomes")
    assert [name for name, _ in outcomes] == list(OUTCOMES.names)
    assert ["value"] == [name for name, note in outcomes if note == "float"]
    assert "float" == OUTCOMES.columns[OUT.value].kind


def test_indexes_are_those_published_in_docs_ledger_md() -> None:
    """Source: docs/ledger.md, "Indexes: unique (writer, seq) on `decisions` and on `outcomes`
    ..., and decision_id on all three tables"."""
    text = " ".join(LEDGER_DOC.read_text(encoding="utf-8").split())
    assert "Indexes: unique (writer, seq) on `decisions` and on `outcomes`" in text
    assert "and decision_id on all three tables." in text
    expected = {
        ("decisions", ("writer", "seq"), True),
        ("decisions", ("decision_id",), False),
        ("draws", ("decision_id",), False),
        ("outcomes", ("writer", "seq"), True),
        ("outcomes", ("decision_id",), False),
    }
    assert expected == {(t.name, i.columns, i.unique) for t in SPECS for i in t.indexes}


# -- everything derived from the declaration ------------------------------------------------
SQL_TYPES = {"text": "TEXT", "float": "DOUBLE", "integer": "INTEGER"}


def _sql_type(column: _schema.Column) -> str:
    return "BIGINT" if column.wide else SQL_TYPES[column.kind]


@pytest.mark.parametrize("spec", SPECS, ids=lambda t: t.name)
def test_sql_table_has_the_declared_columns_types_nulls_and_indexes(spec: TableSpec) -> None:
    table = _schema.metadata.tables[spec.name]
    assert [(c.name, _sql_type(c), c.nullable) for c in spec.columns] == [
        (c.name, str(c.type.compile(sqlite.dialect())), c.nullable) for c in table.columns
    ]
    assert {(i.name, i.columns, i.unique) for i in spec.indexes} == {
        (i.name, tuple(c.name for c in i.columns), bool(i.unique)) for i in table.indexes
    }


def test_sqlite_file_gets_the_declared_columns_and_only_seq_as_bigint(tmp_path: Path) -> None:
    """What a real SQLite database holds after the ledger creates its tables."""
    path = tmp_path / "schema.db"
    _sinks.open_sink(path).close()  # creates the tables
    with sqlite3.connect(path) as conn:
        for spec in SPECS:
            info = conn.execute(f"PRAGMA table_info({spec.name})").fetchall()
            assert [(c.name, _sql_type(c), not c.nullable) for c in spec.columns] == [
                (name, kind, bool(notnull)) for _, name, kind, notnull, _, _ in info
            ]
    assert {("decisions", "seq"), ("outcomes", "seq")} == {
        (t.name, c.name) for t in SPECS for c in t.columns if c.wide
    }


def test_column_tuples_are_the_declared_names_in_order() -> None:
    assert DECISIONS.names == _records.DECISION_COLUMNS
    assert DRAWS.names == _records.DRAW_COLUMNS
    assert OUTCOMES.names == _records.OUTCOME_COLUMNS


@pytest.mark.parametrize("spec", SPECS, ids=lambda t: t.name)
def test_arrow_schema_has_the_declared_columns_and_types(spec: TableSpec) -> None:
    arrow = {"text": pa.string(), "float": pa.float64(), "integer": pa.int64()}
    # Every Arrow field is nullable, as in every part file written so far.
    expected = pa.schema([pa.field(c.name, arrow[c.kind], nullable=True) for c in spec.columns])
    assert expected == _parquet.SCHEMAS[spec.name]


def test_arrow_schemas_are_in_table_order() -> None:
    assert ("decisions", "draws", "outcomes") == _parquet.TABLES


@pytest.mark.parametrize(("positions", "spec"), [(DEC, DECISIONS), (DRAW, DRAWS), (OUT, OUTCOMES)])
def test_positions_name_every_column_at_its_index(
    positions: _schema.Positions, spec: TableSpec
) -> None:
    assert list(range(len(spec.names))) == [getattr(positions, n) for n in spec.names]
    with pytest.raises(AttributeError):
        positions.no_such_column  # noqa: B018


def test_captured_records_have_one_field_per_declared_column() -> None:
    names = [f.name for f in dataclasses.fields(CapturedDecision)]
    assert [*DECISIONS.names, "draws"] == names
    assert list(DRAWS.names) == [f.name for f in dataclasses.fields(CapturedDraw)]
    captured = [f.name for f in dataclasses.fields(CapturedOutcome)]  # the chain's links left out
    assert list(OUTCOMES.names[: OUT.prev_hash]) == captured


# -- ingest checks each field by its declared type and nullability ---------------------------
def _decision(seq: int, **changes: Any) -> tuple[list[Any], list[list[Any]]]:
    row = dict(zip(DECISIONS.names, (
        f"dec-{seq}", "free-delivery", "shopper-1", 1767225600.25, "checkout:offer", "ab" * 8,
        '{"basket":3}', "{}", "true", 0.25, "exact", "cd" * 16, "web1-42-a1b2c3", seq, None,
    ), strict=False))  # fmt: skip
    draw = dict(zip(DRAWS.names, (
        f"dec-{seq}", 0, "offer", "bernoulli", '{"p":0.25}', "[0.125]", "true", 0.25, 0,
    ), strict=True))  # fmt: skip
    for name, value in changes.items():
        (draw if name.startswith("draw.") else row)[name.removeprefix("draw.")] = value
    values = tuple(row.values())
    draw_values = tuple(draw.values())
    digest = _records.decision_hash(values, [draw_values])
    return [*values, digest], [list(draw_values)]


def _outcome(seq: int, **changes: Any) -> list[Any]:
    row = dict(zip(OUTCOMES.names, (
        "dec-0", "checkout", 1.0, 1767225601.5, "web1-42-a1b2c3", seq, None,
    ), strict=False))  # fmt: skip
    row.update(changes)
    values = tuple(row.values())
    return [*values, _records.outcome_hash(values)]


WRONG = {"text": 3, "float": "x", "integer": 1.5}


def _type_error(what: str, column: _schema.Column) -> str:
    wrong = WRONG[column.kind]
    if column.kind == "float":
        return f"{what} {column.name} must be a finite number, got {wrong!r}"
    if column.kind == "integer":
        bits = 63 if column.wide else 31
        return f"{what} {column.name} must be an integer from 0 to 2**{bits} - 1, got {wrong!r}"
    null = " or null" if column.nullable else ""
    return f"{what} {column.name} must be a string{null}, got {wrong!r}"


def test_ingest_refuses_a_wrong_type_in_every_column_naming_it(tmp_path: Path) -> None:
    lines, expected = [], []
    for column in DECISIONS.columns:
        decision, draws = _decision(0)
        decision[DECISIONS.names.index(column.name)] = WRONG[column.kind]
        lines.append({"decision": decision, "draws": draws})
        expected.append(_type_error("decision", column))
    for column in DRAWS.columns:
        decision, draws = _decision(0)
        draws[0][DRAWS.names.index(column.name)] = WRONG[column.kind]
        lines.append({"decision": decision, "draws": draws})
        expected.append(_type_error("draw", column))
    for column in OUTCOMES.columns:
        outcome = _outcome(1)
        outcome[OUTCOMES.names.index(column.name)] = WRONG[column.kind]
        lines.append({"outcome": outcome})
        expected.append(_type_error("outcome", column))
    spill = tmp_path / "spill.jsonl"
    spill.write_bytes(b"".join(orjson.dumps(line) + b"\n" for line in lines))

    report = dl.ingest(spill, tmp_path / "ledger.db")

    assert list(enumerate(expected, start=1)) == report.malformed
    assert (0, 0) == (report.decisions, report.outcomes)


def test_ingest_takes_null_exactly_in_the_nullable_columns(tmp_path: Path) -> None:
    nullable = [c.name for c in DECISIONS.columns if c.nullable]
    draw_nullable = [c.name for c in DRAWS.columns if c.nullable]
    out_nullable = [c.name for c in OUTCOMES.columns if c.nullable]
    lines: list[dict[str, Any]] = []
    for seq, name in enumerate([*nullable, *(f"draw.{n}" for n in draw_nullable)]):
        decision, draws = _decision(seq, **{name: None})
        lines.append({"decision": decision, "draws": draws})
    for seq, name in enumerate(out_nullable, start=100):
        lines.append({"outcome": _outcome(seq, **{name: None})})
    refused = [(t, c.name) for t in SPECS for c in t.columns if not c.nullable]
    for table, name in refused:
        decision, draws = _decision(200)
        outcome = _outcome(300)
        row = {"decisions": decision, "draws": draws[0], "outcomes": outcome}[table.name]
        row[table.names.index(name)] = None
        lines.append(
            {"outcome": outcome} if table is OUTCOMES else {"decision": decision, "draws": draws}
        )
    spill = tmp_path / "spill.jsonl"
    spill.write_bytes(b"".join(orjson.dumps(line) + b"\n" for line in lines))

    report = dl.ingest(spill, tmp_path / "ledger.db")

    assert ["unit", "fn", "code_hash", "seed", "prev_hash"] == nullable
    assert (["name"], ["prev_hash"]) == (draw_nullable, out_nullable)
    assert (len(nullable) + len(draw_nullable), len(out_nullable)) == (
        report.decisions,
        report.outcomes,
    )
    assert len(refused) == len(report.malformed)
    assert all(reason.endswith(", got None") for _, reason in report.malformed)


def _valid(column: _schema.Column) -> Any:
    return {"text": "x", "float": 0.5, "integer": 3}[column.kind]


@pytest.mark.parametrize("spec", SPECS, ids=lambda s: s.name)
def test_a_row_of_the_declared_types_has_no_problem(spec: TableSpec) -> None:
    assert None is _schema.row_problem(spec, tuple(_valid(c) for c in spec.columns))
    nullable = tuple(None if c.nullable else _valid(c) for c in spec.columns)
    assert None is _schema.row_problem(spec, nullable)


@pytest.mark.parametrize("spec", SPECS, ids=lambda s: s.name)
def test_a_null_or_another_type_is_named_with_its_column(spec: TableSpec) -> None:
    for at, column in enumerate(spec.columns):
        row = [_valid(c) for c in spec.columns]
        row[at] = b"\x00" if column.kind == "text" else "text"
        wanted = "text" if column.kind == "text" else "a number" if column.kind == "float" \
            else "an integer"  # fmt: skip
        assert f"{spec.name}.{column.name} is {row[at]!r}, not {wanted}" == \
            _schema.row_problem(spec, tuple(row))  # fmt: skip
        if not column.nullable:
            row[at] = None
            assert f"{spec.name}.{column.name} is NULL" == _schema.row_problem(spec, tuple(row))


@pytest.mark.parametrize("spec", SPECS, ids=lambda s: s.name)
def test_a_shape_seen_fitting_does_not_hide_a_problem_of_the_next_row(spec: TableSpec) -> None:
    """row_problem remembers the field types of rows that fit: a row that fits, then rows
    with one field of another type, each still gets its reason."""
    good = tuple(_valid(c) for c in spec.columns)
    for _ in range(2):
        assert None is _schema.row_problem(spec, good)
        for at, column in enumerate(spec.columns):
            row = list(good)
            row[at] = True if column.kind == "integer" else b"x"
            assert _schema.row_problem(spec, tuple(row)) is not None, column.name
        assert _schema.row_problem(spec, good[:-1]) is not None


def test_a_bool_is_not_an_integer_of_the_ledger() -> None:
    row = [_valid(c) for c in DRAWS.columns]
    row[DRAW.is_density] = True
    assert "draws.is_density is True, not an integer" == _schema.row_problem(DRAWS, tuple(row))


def test_registry_tables_are_those_published_in_docs_ledger_md() -> None:
    """Source: docs/ledger.md, "Ledger identity and writer registry"."""
    text = " ".join(LEDGER_DOC.read_text(encoding="utf-8").split())
    assert "`ledger_meta` — name, value:" in text
    assert "`writers` — writer, started (float), genesis (text, null), tag:" in text
    assert ("name", "value") == _schema.LEDGER_META.names
    assert ("writer", "started", "genesis", "tag") == _schema.WRITERS.names
    assert ["genesis"] == [c.name for c in _schema.WRITERS.columns if c.nullable]
    assert {"ledger_meta", "writers"} <= set(_schema.metadata.tables)


@given(data=st.data())
def test_row_problem_accepts_exactly_the_declared_types(data: st.DataObject) -> None:
    """Any value in any column: no problem iff it is of the column's kind (or a NULL where the
    column allows one); otherwise the reason names the table and the column."""
    spec = data.draw(st.sampled_from(SPECS))
    row = [data.draw(stored_values) for _ in spec.columns]
    problem = _schema.row_problem(spec, tuple(row))
    fits = [
        (v is None and c.nullable)
        or (c.kind == "text" and type(v) is str)
        or (c.kind == "float" and type(v) in (float, int))
        or (c.kind == "integer" and type(v) is int)
        for c, v in zip(spec.columns, row, strict=True)
    ]
    if all(fits):
        assert None is problem
    else:
        first = spec.columns[fits.index(False)]
        assert problem is not None and problem.startswith(f"{spec.name}.{first.name} is ")
