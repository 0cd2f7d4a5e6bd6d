"""The integrity check: re-hashing, per-writer chains, duplicates, orphans, keyed mode."""

from __future__ import annotations

import hashlib
import json
import sqlite3
import struct
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq
import pytest
from coin_batches import coin_batches

import drawledger as dl
from drawledger import _parquet, _records
from drawledger.replay.integrity import IntegrityReport, check_integrity

KEY = b"grocery-ledger-key"


def _fill(target: Path, n: int = 60, *, format: str | None = None, key: bytes | None = None,
          outcomes_every: int = 3, prefix: str = "req") -> dl.Ledger:  # fmt: skip
    """A ledger of ``n`` recipe-card decisions and an outcome for every third one."""
    led = dl.Ledger(target, format=format, integrity_key=key)

    @led.decision("recipe-card")
    def feature_card(scores: list[float], draw: dl.Draw, *, temperature: float = 0.7) -> str:
        cards = ["shakshuka", "ramen", "tacos"]
        return draw.softmax(cards, scores, temperature=temperature, name="card")

    for i in range(n):
        feature_card([1.0, 2.0, 0.5], unit=f"shopper-{i % 7}", decision_id=f"{prefix}-{i}")
        if i % outcomes_every == 0:
            led.outcome(f"{prefix}-{i}", "checkout", 1.0)
    led.close()
    return led


def _sql(path: Path, *statements: str) -> None:
    with sqlite3.connect(path) as conn:
        for statement in statements:
            conn.execute(statement)


def test_clean_sqlite_ledger_passes_with_exact_counts(ledger_path: Path) -> None:
    _fill(ledger_path, 60)
    report = check_integrity(ledger_path)
    assert report.ok
    assert (60, 20, 1) == (report.decisions, report.outcomes, report.writers)
    assert set() == report.decision_ids
    assert {"ok": True, "gaps": 0, "broken_links": 0, "duplicates": 0, "bad_hashes": 0,
            "orphan_draws": 0, "orphan_outcomes": 0} == {
        k: v for k, v in report.to_dict().items() if k in (
            "ok", "gaps", "broken_links", "duplicates", "bad_hashes", "orphan_draws",
            "orphan_outcomes")
    }  # fmt: skip


def test_to_dict_carries_the_verify_contract_keys(ledger_path: Path) -> None:
    """verify's "integrity" object needs ok, gaps, broken_links, duplicates (design)."""
    _fill(ledger_path, 3)
    out = check_integrity(ledger_path).to_dict()
    assert {"ok", "gaps", "broken_links", "duplicates", "examples"} <= set(out)
    json.dumps(out)  # JSON-ready


def test_edited_probability_is_a_bad_hash(ledger_path: Path) -> None:
    _fill(ledger_path)
    _sql(ledger_path, "UPDATE decisions SET propensity = 0.5 WHERE decision_id = 'req-7'")
    report = check_integrity(ledger_path)
    assert not report.ok
    assert 1 == report.bad_hashes
    assert {"req-7"} == report.decision_ids
    assert ["req-7"] == report.examples["bad_hashes"]


def test_edited_draw_probability_is_a_bad_hash_of_its_decision(ledger_path: Path) -> None:
    _fill(ledger_path)
    _sql(ledger_path, "UPDATE draws SET prob = prob / 2 WHERE decision_id = 'req-11'")
    report = check_integrity(ledger_path)
    assert (False, 1, {"req-11"}) == (report.ok, report.bad_hashes, report.decision_ids)


def test_deleted_decision_leaves_a_gap_and_orphan_draws(ledger_path: Path) -> None:
    _fill(ledger_path)
    _sql(ledger_path, "DELETE FROM decisions WHERE decision_id = 'req-10'")
    report = check_integrity(ledger_path)
    assert not report.ok
    assert 1 == report.gaps
    assert 1 == report.orphan_draws
    assert 0 == report.broken_links  # a gap explains the break; not counted twice
    assert ["req-10"] == report.examples["orphan_draws"]


def test_swapped_sequence_numbers_are_detected(ledger_path: Path) -> None:
    """Reordering two records by swapping their seq breaks their hashes."""
    _fill(ledger_path)
    with sqlite3.connect(ledger_path) as conn:
        (a,) = conn.execute("SELECT seq FROM decisions WHERE decision_id = 'req-4'").fetchone()
        (b,) = conn.execute("SELECT seq FROM decisions WHERE decision_id = 'req-5'").fetchone()
        conn.execute("UPDATE decisions SET seq = -1 WHERE decision_id = 'req-4'")
        conn.execute("UPDATE decisions SET seq = ? WHERE decision_id = 'req-5'", (a,))
        conn.execute("UPDATE decisions SET seq = ? WHERE decision_id = 'req-4'", (b,))
    report = check_integrity(ledger_path)
    assert not report.ok
    assert 2 == report.bad_hashes
    assert {"req-4", "req-5"} <= report.decision_ids


def test_physical_row_order_does_not_matter(ledger_path: Path) -> None:
    """Rows copied back in reverse order are the same ledger: the chain is ordered by seq."""
    _fill(ledger_path, 20)
    _sql(ledger_path,
         "CREATE TABLE copy AS SELECT * FROM decisions ORDER BY seq DESC",
         "DELETE FROM decisions",
         "INSERT INTO decisions SELECT * FROM copy",
         "DROP TABLE copy")  # fmt: skip
    assert check_integrity(ledger_path).ok


def _forge_next_decision(path: Path, key: bytes) -> str:
    """Append a decision to the chain as a forger would, hashing with ``key``."""
    with sqlite3.connect(path) as conn:
        cols = ", ".join(_records.DECISION_COLUMNS)
        last = conn.execute(
            "SELECT writer, seq, hash FROM (SELECT writer, seq, hash FROM decisions UNION ALL "
            "SELECT writer, seq, hash FROM outcomes) ORDER BY seq DESC LIMIT 1"
        ).fetchone()
        template = conn.execute(f"SELECT {cols} FROM decisions LIMIT 1").fetchone()
        row = ("forged-1", *template[1:12], last[0], last[1] + 1, last[2])
        draws: list[tuple[Any, ...]] = []
        forged = (*row, _records.decision_hash(row, draws, key))
        conn.execute(f"INSERT INTO decisions ({cols}) VALUES ({', '.join('?' * 16)})", forged)
    return "forged-1"


def test_inserted_row_with_a_wrong_hash_is_detected(ledger_path: Path) -> None:
    _fill(ledger_path)
    _forge_next_decision(ledger_path, b"not the key")
    report = check_integrity(ledger_path)
    assert (False, 1, ["forged-1"]) == (report.ok, report.bad_hashes, report.examples["bad_hashes"])


def test_keyed_mode_stops_a_forger_who_recomputes_the_chain(tmp_path: Path) -> None:
    """Without the key a forged record that extends the chain looks valid; with it, it is not."""
    plain, keyed = tmp_path / "plain.db", tmp_path / "keyed.db"
    _fill(plain)
    _fill(keyed, key=KEY)
    _forge_next_decision(plain, b"")
    _forge_next_decision(keyed, b"")
    assert check_integrity(plain).ok  # documented limit of unkeyed hashes
    report = check_integrity(keyed, integrity_key=KEY)
    assert (False, 1) == (report.ok, report.bad_hashes)
    assert report.keyed


def test_keyed_ledger_checked_without_its_key_fails_everywhere(ledger_path: Path) -> None:
    _fill(ledger_path, 9, key=KEY)
    assert check_integrity(ledger_path, integrity_key=KEY).ok
    report = check_integrity(ledger_path)
    assert 9 + 3 == report.bad_hashes
    assert "another integrity key" in report.render()


def test_duplicate_decision_id_is_a_duplicate(tmp_path: Path) -> None:
    """Two writers that use the same decision id: outcomes can no longer be attributed. (A
    Parquet writer does not look ids up in the ledger, so the second copy gets stored.)"""
    path = tmp_path / "dup"
    for _ in range(2):
        led = dl.Ledger(path, format="parquet")
        led.record_draw("reminder-delay", "bernoulli", {"p": 0.5}, True, 0.5, decision_id="req-1")
        led.close()
    report = check_integrity(path)
    assert (False, 1, 2) == (report.ok, report.duplicates, report.writers)
    assert ["req-1"] == report.examples["duplicates"]


def test_outcome_sharing_a_decisions_seq_is_a_duplicate(ledger_path: Path) -> None:
    _fill(ledger_path, 6)
    _sql(ledger_path, "UPDATE outcomes SET seq = 2 WHERE decision_id = 'req-3'")
    report = check_integrity(ledger_path)
    assert not report.ok
    assert 1 == report.duplicates
    assert 1 == report.gaps  # the outcome's own seq is now missing


def test_orphan_outcome_is_reported_but_does_not_fail(ledger_path: Path) -> None:
    """Outcomes may arrive for decisions still in a spill file or kept in another ledger."""
    led = dl.Ledger(ledger_path)
    led.record_draw("reminder-delay", "bernoulli", {"p": 0.5}, True, 0.5, decision_id="req-1")
    led.outcome("req-from-elsewhere", "checkout", 1.0)
    led.close()
    report = check_integrity(ledger_path)
    assert report.ok
    assert 1 == report.orphan_outcomes
    assert ["req-from-elsewhere"] == report.examples["orphan_outcomes"]


def test_chunk_size_does_not_change_the_report(ledger_path: Path) -> None:
    _fill(ledger_path, 50)
    _sql(ledger_path, "UPDATE decisions SET propensity = 0.25 WHERE decision_id = 'req-33'",
         "DELETE FROM decisions WHERE decision_id = 'req-12'")  # fmt: skip
    small = check_integrity(ledger_path, chunk_size=3).to_dict()
    assert check_integrity(ledger_path, chunk_size=10_000).to_dict() == small


def test_missing_table_and_non_ledger_file_are_clear_errors(tmp_path: Path) -> None:
    path = tmp_path / "partial.db"
    _sql(path, "CREATE TABLE decisions (x)")
    with pytest.raises(dl.LedgerError, match="no table draws, outcomes"):
        check_integrity(path)
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"this is not a database" * 100)
    with pytest.raises(dl.LedgerError, match="not a drawledger ledger or its database is corrupt"):
        check_integrity(junk)
    with pytest.raises(dl.LedgerError, match="no such file"):
        check_integrity(tmp_path / "absent.db")


def _loosen(path: Path, table: str) -> None:
    """The table without its NOT NULL constraints, as a hand-made or damaged copy may be."""
    with sqlite3.connect(path) as conn:
        conn.executescript(f"CREATE TABLE loose AS SELECT * FROM {table}; DROP TABLE {table}; "
                           f"ALTER TABLE loose RENAME TO {table};")  # fmt: skip


@pytest.mark.parametrize(
    ("table", "statement", "reason"),
    [
        ("decisions", "UPDATE decisions SET propensity = NULL WHERE decision_id = 'req-5'",
         "decisions.propensity is NULL"),
        ("decisions", "UPDATE decisions SET ts = 'noon' WHERE decision_id = 'req-5'",
         "decisions.ts is 'noon', not a number"),
        ("draws", "UPDATE draws SET prob = NULL WHERE decision_id = 'req-5'",
         "draws.prob is NULL"),
        ("outcomes", "UPDATE outcomes SET value = 'x' WHERE decision_id = 'req-6'",
         "outcomes.value is 'x', not a number"),
    ],
)  # fmt: skip
def test_a_null_or_text_where_a_number_belongs_is_a_bad_record_with_its_reason(
    ledger_path: Path, table: str, statement: str, reason: str
) -> None:
    _fill(ledger_path, 12)
    _loosen(ledger_path, table)
    _sql(ledger_path, statement)
    report = check_integrity(ledger_path)
    assert not report.ok
    assert (1, 0) == (report.bad_records, report.bad_hashes)
    assert [reason] == list(report.reasons.values())
    assert reason in report.render()
    json.dumps(report.to_dict())


@pytest.mark.parametrize(
    ("table", "statement"),
    [
        ("decisions", "UPDATE decisions SET seq = 'x' WHERE decision_id = 'req-5'"),
        ("decisions", "UPDATE decisions SET seq = NULL WHERE decision_id = 'req-5'"),
        ("decisions", "UPDATE decisions SET writer = NULL WHERE decision_id = 'req-5'"),
        ("decisions", "UPDATE decisions SET decision_id = X'00ff' WHERE decision_id = 'req-5'"),
        ("outcomes", "UPDATE outcomes SET seq = 'q' WHERE decision_id = 'req-6'"),
    ],
)
def test_a_damaged_chain_column_is_a_bad_record_not_a_crash(
    ledger_path: Path, table: str, statement: str
) -> None:
    _fill(ledger_path, 12)
    _loosen(ledger_path, table)
    _sql(ledger_path, statement)
    report = check_integrity(ledger_path)
    assert not report.ok
    assert 1 == report.bad_records
    json.dumps(report.to_dict())


def test_a_parquet_part_without_a_column_is_refused(tmp_path: Path) -> None:
    _fill(tmp_path / "pq", 10, format="parquet")
    part = _parquet.parts(tmp_path / "pq", "decisions")[0].path
    pq.write_table(pq.read_table(part).drop_columns(["seed"]), part)
    with pytest.raises(dl.LedgerError, match="has no column seed"):
        check_integrity(tmp_path / "pq")


def test_stored_hash_follows_the_documented_encoding(ledger_path: Path) -> None:
    """Re-derive one decision hash with json + hashlib from the rules in docs/ledger.md."""
    _fill(ledger_path, 2, key=KEY)
    with sqlite3.connect(ledger_path) as conn:
        row = conn.execute(
            f"SELECT {', '.join(_records.DECISION_COLUMNS)} FROM decisions WHERE seq = 0"
        ).fetchone()
        draws = conn.execute(
            f"SELECT {', '.join(_records.DRAW_COLUMNS)} FROM draws WHERE decision_id = ? "
            "ORDER BY idx", (row[0],)
        ).fetchall()  # fmt: skip

    def fhex(x: float) -> str:
        return struct.pack(">d", x).hex()

    its_draws = [[d[1], d[2], d[3], d[4], d[5], d[6], fhex(d[7]), bool(d[8])] for d in draws]
    body = ["drawledger.decision.v1", *row[:3], fhex(row[3]), *row[4:9], fhex(row[9]),
            *row[10:15], its_draws]  # fmt: skip
    canonical = json.dumps(body, separators=(",", ":"), ensure_ascii=False).encode()
    expected = hashlib.blake2b(canonical, digest_size=32, key=KEY, person=b"drawledger.h1")
    assert expected.hexdigest() == row[15]


def test_blake2b_is_the_rfc_7693_function() -> None:
    """RFC 7693 Appendix A: BLAKE2b-512("abc")."""
    expected = (
        "ba80a53f981c4d0d6a2797b69f12f6e94c212f14685ac4b74b12bb6fdbffa2d1"
        "7d87c5392aab792dc252d5de4533cc9518d38aa8dbf1925ab92386edd4009923"
    )
    assert expected == hashlib.blake2b(b"abc").hexdigest()


# -- Parquet ledgers ---------------------------------------------------------------------------
def _parquet_ledger(tmp_path: Path, n: int = 40) -> Path:
    root = tmp_path / "ledger"
    _fill(root, n, format="parquet")
    return root


def test_clean_parquet_ledger_passes(tmp_path: Path) -> None:
    root = _parquet_ledger(tmp_path)
    report = check_integrity(root)
    assert report.ok
    assert (40, 14, 1) == (report.decisions, report.outcomes, report.writers)


def test_edited_parquet_part_is_detected(tmp_path: Path) -> None:
    root = _parquet_ledger(tmp_path)
    part = _parquet.parts(root, "decisions")[0].path
    table = pq.read_table(part).to_pydict()
    table["propensity"][3] = 0.999
    pq.write_table(_parquet.pa.table(table, schema=_parquet.SCHEMAS["decisions"]), part)
    report = check_integrity(root)
    assert (False, 1) == (report.ok, report.bad_hashes)
    assert [table["decision_id"][3]] == report.examples["bad_hashes"]


def test_deleted_parquet_part_in_the_middle_is_detected(tmp_path: Path) -> None:
    root = tmp_path / "ledger"
    led = dl.Ledger(root, format="parquet", batch_size=5)
    for i in range(30):
        led.record_draw("reminder-delay", "bernoulli", {"p": 0.5}, i % 2 == 0, 0.5,
                        decision_id=f"req-{i}")  # fmt: skip
        if i % 5 == 4:
            led.flush()
    led.close()
    middle = _parquet.parts(root, "decisions")[2].path
    middle.unlink()
    report = check_integrity(root)
    assert not report.ok
    assert 5 == report.gaps
    assert 5 == report.orphan_draws


def test_draws_part_left_by_an_interrupted_batch_is_not_a_failure(tmp_path: Path) -> None:
    """A writer killed between the renames of its last batch leaves a draws part only."""
    root = _parquet_ledger(tmp_path, 10)
    sink = _parquet.ParquetSink(str(root))
    tail_draws = [("req-late", 0, None, "bernoulli", '{"p":0.5}', "[0.2]", "true", 0.5, 0)]
    folder = root / "draws" / "recipe-card" / "2001-01-01"
    folder.mkdir(parents=True)
    name = f"{999:012d}-{999:012d}-{_parquet.writer_tag(_writer_of(root))}.parquet"
    pq.write_table(_parquet.rows_to_table(tail_draws, "draws"), folder / name)
    sink.close()
    report = check_integrity(root)
    assert report.ok
    assert 1 == report.uncommitted_parts


def test_outcomes_part_missing_from_the_last_batch_is_uncommitted_not_a_gap(
    tmp_path: Path,
) -> None:
    """A writer stopped after the decisions rename of its last batch: its outcomes never came."""
    root = tmp_path / "ledger"
    coin_batches(root, 3, 4)
    _parquet.parts(root, "outcomes")[-1].path.unlink()
    report = check_integrity(root)
    assert report.ok, report.render()
    assert (0, 4, 12, 8) == (report.gaps, report.uncommitted_records, report.decisions,
                             report.outcomes)  # fmt: skip
    assert "4 records of a writer's last batch not in place" in report.render()
    assert 4 == report.to_dict()["uncommitted_records"]
    assert "<td>uncommitted records (not a failure)</td><td>4</td>" in report._repr_html_()


@pytest.mark.parametrize(
    ("table", "at"), [("outcomes", 1), ("decisions", -1)], ids=["earlier-batch", "renamed-first"]
)
def test_a_part_missing_where_no_crash_leaves_one_is_a_gap(
    tmp_path: Path, table: str, at: int
) -> None:
    """The outcomes part of an earlier batch, or the decisions part of the last batch while its
    outcomes (renamed after it) are in place: what a deletion leaves, not a crash."""
    root = tmp_path / "ledger"
    coin_batches(root, 3, 4)
    _parquet.parts(root, table)[at].path.unlink()
    report = check_integrity(root)
    assert (False, 4, 0) == (report.ok, report.gaps, report.uncommitted_records)


def _forge_footer(part: Path, names: Any, key: bytes = b"") -> None:
    body = json.dumps({"parts": names, "hash": _records.batch_hash(names, key)})
    data = pq.read_table(part)
    pq.write_table(data.replace_schema_metadata({_parquet.BATCH_KEY: body.encode()}), part)


@pytest.mark.parametrize(
    "names",
    [["outcomes/../../elsewhere/000000000009-000000000011-ab.parquet"], ["x"], [3], {"a": 1}],
)
def test_a_footer_naming_anything_but_parts_of_its_writer_excuses_nothing(
    tmp_path: Path, names: Any
) -> None:
    """A footer signed (no key: anyone can) but naming a path outside the ledger, another
    writer's part, or no part at all is not taken: the deleted outcomes stay a gap."""
    root = tmp_path / "ledger"
    coin_batches(root, 3, 4)
    _parquet.parts(root, "outcomes")[-1].path.unlink()
    _forge_footer(_parquet.parts(root, "decisions")[-1].path, names)  # the batch's last part
    report = check_integrity(root)
    assert (False, 0) == (report.ok, report.uncommitted_records)
    assert 0 < report.gaps


def test_a_crash_of_a_keyed_writer_is_excused_and_a_footer_forged_without_its_key_is_not(
    tmp_path: Path,
) -> None:
    """Keyed mode: the part names of a batch are signed with the integrity key. A footer
    rewritten without the key to name an outcomes part deleted from the middle batch as
    the missing end of the last batch excuses nothing: the deletion stays a gap."""
    crashed, edited = tmp_path / "crashed", tmp_path / "edited"
    for root in (crashed, edited):
        coin_batches(root, 3, 4, key="s3cret")
    _parquet.parts(crashed, "outcomes")[-1].path.unlink()
    report = check_integrity(crashed, integrity_key="s3cret")
    assert (True, 0, 4) == (report.ok, report.gaps, report.uncommitted_records)

    decisions, outcomes = _parquet.parts(edited, "decisions"), _parquet.parts(edited, "outcomes")
    outcomes[1].path.unlink()  # the middle batch's outcomes
    names = [p.path.relative_to(edited).as_posix()
             for p in (decisions[1], decisions[2], outcomes[2], outcomes[1])]  # fmt: skip
    _forge_footer(outcomes[2].path, names)
    report = check_integrity(edited, integrity_key="s3cret")
    assert (False, 4, 0) == (report.ok, report.gaps, report.uncommitted_records)
    _forge_footer(outcomes[2].path, names, b"s3cret")  # with the key it would pass
    assert check_integrity(edited, integrity_key="s3cret").ok


def _writer_of(root: Path) -> str:
    part = _parquet.parts(root, "decisions")[0].path
    writer: str = pq.read_table(part, columns=["writer"]).column(0)[0].as_py()
    return writer


def test_report_renders_problems_with_examples() -> None:
    report = IntegrityReport()
    report.note("gaps", "req-9", 2)
    report.finish()
    assert not report.ok
    assert "gaps: 2" in report.render()
    assert "req-9" in str(report)


def test_ledger_doc_python_blocks_run(run_markdown: Callable[..., Any]) -> None:
    """docs/ledger.md runs as written: its ```python blocks, in order, in a fresh interpreter."""
    done = run_markdown("docs/ledger.md")
    assert 0 == done.returncode, done.stderr
    assert "integrity ok" in done.stdout


# -- ledger identity and writer registry (docs/ledger.md) ---------------------------------------
def _target(kind: str, tmp_path: Path, request: pytest.FixtureRequest, name: str = "a") -> str:
    if kind == "postgres":
        return str(request.getfixturevalue("postgres_url"))  # one schema per test
    return str(tmp_path / (f"{name}.db" if kind == "sqlite" else name))


def _fmt(kind: str) -> str | None:
    return "parquet" if kind == "parquet" else None


def _two_writers(target: str, kind: str) -> tuple[str, str]:
    """Two writers (two ledgers on one target), keyed; their writer ids."""
    first = _fill(Path(target) if kind != "postgres" else target, 6, format=_fmt(kind), key=KEY)  # type: ignore[arg-type]
    second = _fill(Path(target) if kind != "postgres" else target, 4, format=_fmt(kind), key=KEY,  # type: ignore[arg-type]
                   outcomes_every=2, prefix="late")  # fmt: skip
    return first.writer, second.writer


def _delete_writer(target: str, kind: str, writer: str) -> None:
    """Every record of ``writer`` deleted, as someone with write access could."""
    if kind == "parquet":
        for table in ("decisions", "draws", "outcomes"):
            for part in _parquet.parts(target, table):
                if part.tag == _parquet.writer_tag(writer):
                    part.path.unlink()
        return
    import sqlalchemy as sa

    from drawledger._sinks import sqlalchemy_url

    engine = sa.create_engine(sqlalchemy_url(target))
    with engine.begin() as conn:
        bind = {"w": writer}
        conn.execute(sa.text("DELETE FROM draws WHERE decision_id IN "
                             "(SELECT decision_id FROM decisions WHERE writer = :w)"),
                     bind)  # fmt: skip
        conn.execute(sa.text("DELETE FROM decisions WHERE writer = :w"), bind)
        conn.execute(sa.text("DELETE FROM outcomes WHERE writer = :w"), bind)
    engine.dispose()


KINDS = ["sqlite", "parquet", "postgres"]


@pytest.mark.parametrize("kind", KINDS)
def test_a_keyed_writer_whose_records_were_all_deleted_is_missing(
    kind: str, tmp_path: Path, request: pytest.FixtureRequest
) -> None:
    target = _target(kind, tmp_path, request)
    _, second = _two_writers(target, kind)
    assert check_integrity(target, format=_fmt(kind), integrity_key=KEY).ok
    _delete_writer(target, kind, second)
    report = check_integrity(target, format=_fmt(kind), integrity_key=KEY)
    assert not report.ok
    assert (1, [second]) == (report.missing_writers, report.examples["missing_writers"])
    assert (0, 0, 0) == (report.gaps, report.bad_hashes, report.broken_links)


@pytest.mark.parametrize("kind", ["sqlite", "parquet"])
def test_a_chain_grafted_from_another_ledger_with_the_same_key_is_foreign(
    kind: str, tmp_path: Path, request: pytest.FixtureRequest
) -> None:
    mine = _target(kind, tmp_path, request, "mine")
    other = _target(kind, tmp_path, request, "other")
    _fill(Path(mine), 5, format=_fmt(kind), key=KEY)
    graft = _fill(Path(other), 3, format=_fmt(kind), key=KEY, prefix="graft").writer
    if kind == "parquet":
        for table in ("decisions", "draws", "outcomes"):
            for part in _parquet.parts(other, table):
                rel = part.path.relative_to(Path(other))
                (Path(mine) / rel).parent.mkdir(parents=True, exist_ok=True)
                (Path(mine) / rel).write_bytes(part.path.read_bytes())
    else:
        with sqlite3.connect(mine) as conn:
            conn.execute("ATTACH DATABASE ? AS other", (other,))
            for table in ("decisions", "draws", "outcomes"):
                conn.execute(f"INSERT INTO {table} SELECT * FROM other.{table}")
    report = check_integrity(mine, format=_fmt(kind), integrity_key=KEY)
    assert not report.ok
    assert (1, [graft]) == (report.foreign_chains, report.examples["foreign_chains"])
    assert 0 == report.bad_hashes  # each record is a valid MAC under the shared key


def test_a_deleted_registry_row_makes_its_writer_unregistered(ledger_path: Path) -> None:
    writer = _fill(ledger_path, 5, key=KEY).writer
    _sql(ledger_path, "DELETE FROM writers")
    report = check_integrity(ledger_path, integrity_key=KEY)
    assert (False, 1, [writer]) == (
        report.ok,
        report.unregistered_writers,
        report.examples["unregistered_writers"],
    )


def test_a_registry_row_or_identity_without_the_key_is_a_bad_registry(ledger_path: Path) -> None:
    _fill(ledger_path, 5, key=KEY)
    _sql(ledger_path, "UPDATE writers SET started = started + 1")
    assert 1 == check_integrity(ledger_path, integrity_key=KEY).bad_registry
    _sql(ledger_path, "UPDATE ledger_meta SET value = '00' WHERE name = 'ledger_id'")
    report = check_integrity(ledger_path, integrity_key=KEY)
    assert (False, 1, ["(ledger identity)"]) == (
        report.ok,
        report.bad_registry,
        report.examples["bad_registry"],
    )


def _old_ledger(path: Path, monkeypatch: pytest.MonkeyPatch, n: int = 5) -> str:
    """A ledger as written before the registry: chains start from null, no registry tables."""
    with monkeypatch.context() as m:
        m.setattr(dl.Ledger, "_bind_chain", lambda self: None)
        m.setattr("drawledger._writer.Writer._register_late", lambda self: True)
        writer = _fill(path, n, key=KEY).writer
    _sql(path, "DROP TABLE writers", "DROP TABLE ledger_meta")
    return writer


def test_a_ledger_from_before_the_registry_checks_as_before_with_a_note(
    ledger_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    _old_ledger(ledger_path, monkeypatch)
    report = check_integrity(ledger_path, integrity_key=KEY)
    assert (True, False) == (report.ok, report.registry)
    assert "no ledger identity or writer registry" in report.render()


def test_writers_of_an_upgraded_ledger_are_legacy_not_a_failure(
    ledger_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    _old_ledger(ledger_path, monkeypatch)
    _fill(ledger_path, 3, key=KEY, prefix="new")  # a writer of this version: makes the registry
    report = check_integrity(ledger_path, integrity_key=KEY)
    assert (True, True, 1, 2) == (report.ok, report.registry, report.legacy_writers,
                                  report.writers)  # fmt: skip
    assert "1 writers from before the registry" in report.render()


def test_a_writer_that_started_while_its_ledger_was_out_of_reach_registers_later(
    ledger_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(dl.Ledger, "_bind_chain", lambda self: None)
    _fill(ledger_path, 4, key=KEY)
    report = check_integrity(ledger_path, integrity_key=KEY)
    assert (True, 0) == (report.ok, report.unregistered_writers)


def test_a_corrupt_sqlite_file_is_one_ledger_error(ledger_path: Path) -> None:
    _fill(ledger_path, 400)
    data = bytearray(ledger_path.read_bytes())
    data[len(data) // 4 :] = b"\xa5" * (len(data) - len(data) // 4)  # every page after a quarter
    ledger_path.write_bytes(bytes(data))
    with pytest.raises(dl.LedgerError, match="database is corrupt: database disk image"):
        check_integrity(ledger_path)


@pytest.mark.parametrize("prev", [None, "ab" * 32])
def test_sealing_a_decision_appends_seq_prev_and_the_hash_of_the_whole_row(
    prev: str | None,
) -> None:
    """``seal_decision`` (the writer's path) gives the row ``decision_hash`` signs, bit for bit."""
    row = ("req-8c1", "recipe-card", "rider-17", 1.5, "m:f", "0" * 32, '{"scores":[1.6]}',
           '{"temperature":0.7}', '"ramen"', 0.25, "exact", "ab" * 16, "w1")  # fmt: skip
    draws = [("req-8c1", 0, "card", "softmax", '{"options":["ramen"]}', "[0.5]", '"ramen"',
              0.25, 0)]  # fmt: skip
    full = (*row, 7, prev)
    assert (*full, _records.decision_hash(full, draws, KEY)) == _records.seal_decision(
        row, 7, prev, draws, KEY
    )
