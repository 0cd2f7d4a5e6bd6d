"""The Parquet directory ledger: one subdirectory per table, part files partitioned by stream/date.

Layout (docs/ledger.md)::

    LEDGER/decisions/<stream>/<YYYY-MM-DD>/<first>-<last>-<writer>.parquet
    LEDGER/draws/<stream>/<YYYY-MM-DD>/<same name as its decisions part>.parquet
    LEDGER/outcomes/<YYYY-MM-DD>/<first>-<last>-<writer>.parquet

``<stream>`` is the percent-encoded stream name, ``<YYYY-MM-DD>`` the UTC date of the record's
``ts``, ``<first>``/``<last>`` the zero-padded first and last ``seq`` in the part, and
``<writer>`` 16 hex digits of a hash of the writer id: every part holds the records of one writer.
A part is written to a hidden temporary name and renamed into place, so readers (this module,
pandas, pyarrow) never see half a file. The draws part of a batch is renamed before its decisions
part: a decisions part in place means its draws are in place too.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any
from urllib.parse import quote

import pyarrow as pa
import pyarrow.parquet as pq

from drawledger import _records, _registry
from drawledger._schema import CODE_VERSIONS, DEC, OUT, REGISTRY, SPECS, TableSpec, damaged
from drawledger.exceptions import LedgerError

if TYPE_CHECKING:
    import pandas as pd

Row = tuple[Any, ...]


_ARROW_TYPES = {"text": pa.string(), "float": pa.float64(), "integer": pa.int64()}


def _arrow_schema(table: TableSpec) -> pa.Schema:
    # Every field is nullable in Arrow, as in every part file written so far; the writer and
    # ingest refuse a null where the table does not allow one.
    return pa.schema([(c.name, _ARROW_TYPES[c.kind]) for c in table.columns])


SCHEMAS = {table.name: _arrow_schema(table) for table in SPECS}
REGISTRY_SCHEMAS = {table.name: _arrow_schema(table) for table in REGISTRY}
IDENTITY = "ledger_meta/ledger.parquet"  # the one part file of the ledger's identity
_REQUIRED = {table.name: [c.name for c in table.columns if not c.nullable] for table in SPECS}
TABLES = tuple(SCHEMAS)
VERSIONS = CODE_VERSIONS.name
SCHEMAS[VERSIONS] = _arrow_schema(CODE_VERSIONS)  # an added table: older ledgers lack it

# Dictionary encoding only where values repeat, statistics only on numbers (what readers filter
# on): unique text such as ids and hashes costs time in both and gains nothing.
_REPEATING = {"stream", "unit", "fn", "code_hash", "params", "action", "propensity_kind",
              "writer", "name", "kind", "args", "value"}  # fmt: skip
_WRITE_OPTIONS: dict[str, dict[str, Any]] = {
    table: {
        "use_dictionary": [f.name for f in schema if f.name in _REPEATING],
        "write_statistics": [f.name for f in schema if not pa.types.is_string(f.type)],
    }
    for table, schema in SCHEMAS.items()
}
SUFFIX = ".parquet"
BATCH_KEY = b"drawledger.batch"  # footer metadata: the part files of its batch


def writer_tag(writer: str) -> str:
    """16 hex digits naming a writer in part file names."""
    return hashlib.blake2b(writer.encode(), digest_size=8).hexdigest()


MAX_DIR_NAME = 120


def stream_dir(stream: str) -> str:
    """A stream name as one directory name: percent-encoded, never hidden from readers.

    A name longer than 120 characters once encoded is cut to about 100 and followed by ``~``
    and 16 hex digits of a hash of the full stream name (file systems limit names to 255 bytes).
    """
    text = quote(stream, safe="")
    if text[:1] in (".", "_"):  # readers skip names starting with "." or "_"
        text = f"%{ord(text[0]):02X}{text[1:]}"
    if len(text) > MAX_DIR_NAME:
        head = text[:100]
        cut = head.rfind("%")
        if cut >= 98:  # do not split a %XX escape
            head = head[:cut]
        text = f"{head}~{hashlib.blake2b(stream.encode(), digest_size=8).hexdigest()}"
    return text


_DAYS: dict[int, str] = {}


def day(ts: float) -> str:
    """The UTC date of a timestamp as YYYY-MM-DD (partition directory name).

    Timestamps outside the years 1000 to 9999 go to the partition ``out-of-range``.
    """
    key = int(ts // 86400)
    name = _DAYS.get(key)
    if name is None:
        try:
            name = time.strftime("%Y-%m-%d", time.gmtime(key * 86400))
        except (OverflowError, OSError, ValueError):
            name = "out-of-range"
        if len(name) != 10 or not name[:4].isdigit():
            name = "out-of-range"
        _DAYS[key] = name
    return name


@dataclass(frozen=True)
class Part:
    """One committed part file of a table."""

    path: Path
    first: int
    last: int
    tag: str


def parse_part(path: Path) -> Part | None:
    """The part described by a file name, or None for anything else (temporary files)."""
    name = path.name
    if name.startswith(".") or not name.endswith(SUFFIX):
        return None
    fields = name[: -len(SUFFIX)].split("-")
    if len(fields) != 3 or not (fields[0].isdigit() and fields[1].isdigit()):
        return None
    return Part(path, int(fields[0]), int(fields[1]), fields[2])


def parts(root: str | os.PathLike[str], table: str) -> list[Part]:
    """Committed part files of ``table``, sorted by path (stream, date, first seq)."""
    base = Path(root) / table
    if not base.is_dir():
        return []
    found = (parse_part(p) for p in base.rglob(f"*{SUFFIX}"))
    return sorted((p for p in found if p is not None), key=lambda p: p.path)


def batch_parts(root: str | os.PathLike[str], part: Part, key: bytes) -> list[Part] | None:
    """The parts of decisions and outcomes written in one batch with ``part``, as its footer
    names them; None for a part written alone or before batches named their parts, and for a
    footer that does not carry its signature under ``key`` (the integrity key) or names
    anything but committed parts of the same writer (it is not taken: a missing part is then
    a gap).
    """
    try:
        meta = pq.read_metadata(part.path).metadata or {}
    except (OSError, pa.ArrowException) as exc:
        raise unreadable(part.path, exc) from None
    try:
        found = json.loads(meta[BATCH_KEY])
        names = found["parts"]
        if found["hash"] != _records.batch_hash(names, key):
            return None
        out = []
        for fields in (name.split("/") for name in names):
            named = parse_part(Path(root, *fields))
            if (
                named is None
                or named.tag != part.tag
                or ".." in fields
                or (fields[0] not in ("decisions", "outcomes", "draws"))
            ):
                return None
            if fields[0] != "draws":
                out.append(named)
    except (ValueError, TypeError, AttributeError, KeyError):
        return None
    return out


def unfinished_batch(root: str | os.PathLike[str], parts: list[Part], key: bytes) -> list[Part]:
    """The parts of a writer's last batch that never came into place: the writer stopped
    between the renames of the batch. ``parts`` are the writer's decisions and outcomes parts.

    The parts of a batch name each other in their footers, in the order of their renames,
    signed with the integrity key ``key``. Only the last batch counts, only when every part it
    names lies above every other part of the writer, and only when the missing parts are the
    last ones to be renamed: a part missing anywhere else leaves gaps.
    """
    if not parts:
        return []
    batch = batch_parts(root, max(parts, key=lambda p: p.last), key)
    if not batch:
        return []
    named = {b.path for b in batch}
    below = max((p.last for p in parts if p.path not in named), default=-1)
    present = {p.path for p in parts}
    came = [b.path in present for b in batch]
    if any(b.first <= below for b in batch) or came != sorted(came, reverse=True):
        return []
    return [b for b in batch if b.path not in present]


def draws_sibling(root: str | os.PathLike[str], part: Part) -> Path:
    """The draws part written together with a decisions part."""
    rel = part.path.relative_to(Path(root) / "decisions")
    return Path(root) / "draws" / rel


def check_ledger_dir(root: str | os.PathLike[str]) -> None:
    """Raise LedgerError unless ``root`` is a Parquet ledger directory with its three tables."""
    base = Path(root)
    if not base.is_dir():
        raise LedgerError(f"no Parquet ledger at {os.fspath(root)!r} (no such directory)")
    missing = [t for t in TABLES if not (base / t).is_dir()]
    if missing:
        raise LedgerError(
            f"{os.fspath(root)!r} is not a drawledger Parquet ledger: no table {', '.join(missing)}"
        )


def _same_type(found: pa.DataType, wanted: pa.DataType) -> bool:
    if pa.types.is_dictionary(found):
        found = found.value_type
    if pa.types.is_large_string(found):
        found = pa.string()
    return bool(found.equals(wanted))


def schema_problem(found: pa.Schema, table: str) -> str | None:
    """Why a part file's schema is not its table's (a missing column, another type), or None."""
    for wanted in SCHEMAS[table]:
        at = found.get_field_index(wanted.name)
        if at < 0:
            return f"it has no column {wanted.name}"
        if not _same_type(found.field(at).type, wanted.type):
            return f"its column {wanted.name} is {found.field(at).type}, not {wanted.type}"
    return None


def unreadable(path: str | os.PathLike[str], exc: Exception) -> LedgerError:
    """The error for a part file that cannot be read, with what to do when a power loss cut it
    short (docs/operations.md, "After a power loss")."""
    return LedgerError(
        f"cannot read ledger part {os.fspath(path)!r}: {exc} (a part left empty or cut short "
        "by a power loss? docs/operations.md says what to do)"
    )


def open_part(path: Path, table: str) -> pq.ParquetFile:
    """A part file of ``table`` with its schema checked (``LedgerError`` when it is not one)."""
    try:
        part = pq.ParquetFile(path)
    except (OSError, pa.ArrowException) as exc:
        raise unreadable(path, exc) from None
    problem = schema_problem(part.schema_arrow, table)
    if problem is not None:
        raise LedgerError(
            f"ledger part {os.fspath(path)!r} is not a part of the {table} table: {problem}"
        )
    return part


def read_columns(path: Path, table: str, columns: list[str]) -> pa.Table:
    """Some columns of a part file of ``table``, its schema checked."""
    part = open_part(path, table)
    try:
        return part.read(columns=columns)
    except (OSError, pa.ArrowException) as exc:
        raise unreadable(path, exc) from None


def read_part(path: Path, table: str) -> pa.Table:
    """One part file as an Arrow table with the table's schema."""
    schema = SCHEMAS[table]
    data = read_columns(path, table, schema.names)
    return data if data.schema.equals(schema) else data.cast(schema)


def table_rows(data: pa.Table) -> list[Row]:
    """The rows of an Arrow table as tuples in its column order (values bit for bit)."""
    return list(zip(*(col.to_pylist() for col in data.columns), strict=True))


def part_rows(path: Path, table: str) -> list[Row]:
    """The rows of a part file as tuples in the table's column order (values bit for bit)."""
    return table_rows(read_part(path, table))


def iter_part_pairs(root: str | os.PathLike[str]) -> Iterator[tuple[Part, Path | None]]:
    """Each decisions part with its draws part (None when the batch had no draws)."""
    for part in parts(root, "decisions"):
        sibling = draws_sibling(root, part)
        yield part, sibling if sibling.exists() else None


def read_table(root: str | os.PathLike[str], table: str) -> pd.DataFrame:
    """One table of a Parquet ledger as a DataFrame (decisions and outcomes sorted by writer, seq).

    Reads only committed part files; safe while writers are running. Draws parts without their
    decisions part (a writer stopped between the renames of a batch) are left out.
    """
    if table not in SCHEMAS:
        raise LedgerError(f"no table {table!r} in a drawledger ledger")
    check_ledger_dir(root)
    if table == "draws":
        paths = [d for _, d in iter_part_pairs(root) if d is not None]
    else:
        paths = [p.path for p in parts(root, table)]
    return to_frame([read_part(p, table) for p in paths], table)


def read_tables(root: str | os.PathLike[str]) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Decisions, draws and outcomes; the draws are those of exactly the decisions read."""
    check_ledger_dir(root)
    pairs = list(iter_part_pairs(root))
    decisions = to_frame([read_part(p.path, "decisions") for p, _ in pairs], "decisions")
    draws = to_frame([read_part(d, "draws") for _, d in pairs if d is not None], "draws")
    return decisions, draws, read_table(root, "outcomes")


def to_frame(tables: list[pa.Table], table: str) -> pd.DataFrame:
    """Arrow tables of one ledger table as one DataFrame, in the readers' row order."""
    data = pa.concat_tables(tables) if tables else SCHEMAS[table].empty_table()
    for name in _REQUIRED[table]:  # null_count is kept by Arrow: this costs nothing
        column = data.column(name)
        if column.null_count:
            at = column.is_null().to_numpy(zero_copy_only=False).argmax()
            did = data.column("decision_id")[int(at)].as_py()
            raise damaged(table, did, f"{table}.{name} is NULL")
    keys = ["decision_id", "idx"] if table == "draws" else ["writer", "seq"]
    frame: pd.DataFrame = data.sort_by([(k, "ascending") for k in keys]).to_pandas()
    return frame


def rows_to_table(rows: Sequence[Row], table: str) -> pa.Table:
    """Row tuples in the table's column order as an Arrow table (converted in one pass in C++)."""
    schema = SCHEMAS[table]
    return pa.Table.from_struct_array(pa.array(rows, type=pa.struct(list(schema))))


class ParquetSink:
    """Writes each batch as part files; ``durability="full"`` also fsyncs files and directories."""

    indexed_ids = False  # stored_ids reads every part: ingest asks, the writer does not

    def __init__(self, root: str, *, durability: str = "normal", key: bytes = b"") -> None:
        self.root = Path(root).expanduser()
        self.full = durability == "full"
        self.key = key  # signs the part names of each batch (unfinished_batch)
        self._ids: dict[str, str] | None = None  # stream of each decision id (stored_ids)
        try:
            for table in TABLES:
                (self.root / table).mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise LedgerError(f"cannot create Parquet ledger {root!r}: {exc}") from None

    def write(self, decisions: list[Row], draws: list[list[Row]], outcomes: list[Row]) -> None:
        """Write a batch: every part to a temporary file first, then all the renames.

        Renames run draws, then decisions, then outcomes, right after each other, so a crash
        leaves none of a batch or nearly all of it (docs/operations.md). Part names are a
        function of their rows (writer and seq range): a retried batch replaces its own parts.
        """
        writer_at, stream_at, ts_at = DEC.writer, DEC.stream, DEC.ts  # read once per batch
        groups: dict[tuple[str, str, int], tuple[list[Row], list[Row]]] = {}
        for row, its_draws in zip(decisions, draws, strict=True):
            key = (row[writer_at], row[stream_at], int(row[ts_at] // 86400))  # UTC day
            group = groups.get(key)
            if group is None:
                group = groups[key] = ([], [])
            group[0].append(row)
            group[1].extend(its_draws)
        planned: list[tuple[Path, str, list[Row], str]] = []
        for (writer, stream, days), (rows, draw_rows) in groups.items():
            if draw_rows:
                folder = self.root / "draws" / stream_dir(stream) / day(days * 86400)
                planned.append((folder, _part_name(writer, rows, DEC.seq), draw_rows, "draws"))
        for (writer, stream, days), (rows, _) in groups.items():
            folder = self.root / "decisions" / stream_dir(stream) / day(days * 86400)
            planned.append((folder, _part_name(writer, rows, DEC.seq), rows, "decisions"))
        ogroups: dict[tuple[str, int], list[Row]] = {}
        for row in outcomes:
            ogroups.setdefault((row[OUT.writer], int(row[OUT.ts] // 86400)), []).append(row)
        for (writer, days), rows in ogroups.items():
            folder = self.root / "outcomes" / day(days * 86400)
            planned.append((folder, _part_name(writer, rows, OUT.seq), rows, "outcomes"))
        # Every part of a batch of several names them all: a crash between the renames leaves
        # parts that say which of their batch never came (unfinished_batch).
        names = [(folder / name).relative_to(self.root).as_posix() for folder, name, *_ in planned]
        body = {"parts": names, "hash": _records.batch_hash(names, self.key)}
        meta = {BATCH_KEY: json.dumps(body).encode()} if len(names) > 1 else None
        staged: list[tuple[Path, Path]] = []
        try:
            for folder, name, rows, table in planned:
                folder.mkdir(parents=True, exist_ok=True)
                tmp = folder / f".{name}.{os.getpid()}.{os.urandom(4).hex()}.tmp"
                staged.append((tmp, folder / name))
                data = rows_to_table(rows, table)
                if meta is not None:
                    data = data.replace_schema_metadata(meta)
                pq.write_table(data, tmp, **_WRITE_OPTIONS[table])
                if self.full:
                    _fsync_path(tmp)
            for tmp, final in staged:
                os.replace(tmp, final)
        finally:
            for tmp, _ in staged:
                tmp.unlink(missing_ok=True)
        if self.full:
            for folder in {final.parent for _, final in staged}:
                _fsync_path(folder, directory=True)

    def write_versions(self, rows: list[Row]) -> None:
        """Store code version rows (docs/deploys.md) as one part file of ``code_versions``."""
        if not rows:
            return
        folder = self.root / VERSIONS
        folder.mkdir(parents=True, exist_ok=True)
        n = time.time_ns()  # a sink reopened by the same writer never reuses a name
        name = f"{n:020d}-{n:020d}-{writer_tag(str(rows[0][-1]))}{SUFFIX}"
        tmp = folder / f".{name}.{os.getpid()}.{os.urandom(4).hex()}.tmp"
        try:
            pq.write_table(rows_to_table(rows, VERSIONS), tmp)
            if self.full:
                _fsync_path(tmp)
            os.replace(tmp, folder / name)
        finally:
            tmp.unlink(missing_ok=True)

    def present_hashes(self, table: str, writer: str, low: int, high: int) -> dict[int, str]:
        """The hash of each record of ``writer`` with a seq from ``low`` to ``high``, by seq."""
        tag = writer_tag(writer)
        found: dict[int, str] = {}
        for part in parts(self.root, table):
            if part.tag == tag and part.first <= high and part.last >= low:
                data = pq.read_table(part.path, columns=["writer", "seq", "hash"]).to_pydict()
                rows = zip(data["writer"], data["seq"], data["hash"], strict=True)
                found.update((s, h) for w, s, h in rows if w == writer and low <= s <= high)
        return found

    def stored_ids(self, ids: list[str]) -> dict[str, str]:
        """Which of these decision ids are already in the ledger, with their decision's stream.

        Reads every decision id once per sink (ingest opens a sink of its own for this).
        """
        if self._ids is None:
            self._ids = {}
            for part in parts(self.root, "decisions"):
                data = pq.read_table(part.path, columns=["decision_id", "stream"]).to_pydict()
                self._ids.update(zip(data["decision_id"], data["stream"], strict=True))
        known = self._ids
        return {i: known[i] for i in ids if i in known}

    def register_writer(
        self, writer: str, started: float, key: bytes, genesis: str | None = _registry.BIND
    ) -> str | None:
        """Register ``writer`` (once: ``writers/<writer tag>.parquet``); its chain's genesis."""
        ledger_id = self._identity(key)
        genesis = _registry.genesis_for(ledger_id, writer, key, genesis)
        path = self.root / "writers" / f"{writer_tag(writer)}{SUFFIX}"
        if not path.exists():
            row = _registry.writer_row(ledger_id, writer, started, key, genesis)
            self._place(path, [row], "writers", replace=True)
        return genesis

    def _identity(self, key: bytes) -> str:
        path = self.root / IDENTITY
        if not path.exists():
            legacy = any(parts(self.root, t) for t in ("decisions", "outcomes"))
            self._place(path, _registry.new_identity(key, legacy), "ledger_meta", replace=False)
        identity = read_registry(self.root)[0]
        if identity is None or "ledger_id" not in identity:
            raise LedgerError(f"the identity of ledger {os.fspath(self.root)!r} is damaged")
        return identity["ledger_id"]

    def _place(self, path: Path, rows: list[Row], table: str, *, replace: bool) -> None:
        """Write a registry part under a temporary name, then move it into place; without
        ``replace``, a part another writer placed first is kept."""
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.parent / f".{path.name}.{os.getpid()}.{os.urandom(4).hex()}.tmp"
        try:
            data = pa.Table.from_struct_array(
                pa.array(rows, type=pa.struct(list(REGISTRY_SCHEMAS[table])))
            )
            pq.write_table(data, tmp)
            if self.full:
                _fsync_path(tmp)
            if replace:
                os.replace(tmp, path)
            else:
                with contextlib.suppress(FileExistsError):  # another writer placed it first
                    os.link(tmp, path)
        finally:
            tmp.unlink(missing_ok=True)
        if self.full:
            _fsync_path(path.parent, directory=True)

    def close(self) -> None:
        """Nothing to release: every part is complete once ``write`` returns."""


def read_registry(root: str | os.PathLike[str]) -> tuple[dict[str, str] | None, list[Row]]:
    """The identity (None in a ledger from before the registry) and the writer rows."""
    base = Path(root)
    identity: dict[str, str] | None = None
    try:
        if (base / IDENTITY).exists():
            data = pq.read_table(base / IDENTITY, schema=REGISTRY_SCHEMAS["ledger_meta"])
            identity = dict(zip(*(c.to_pylist() for c in data.columns), strict=True))
        rows: list[Row] = []
        for path in sorted((base / "writers").glob(f"*{SUFFIX}")):
            data = pq.read_table(path, schema=REGISTRY_SCHEMAS["writers"])
            rows.extend(zip(*(c.to_pylist() for c in data.columns), strict=True))
    except (OSError, pa.ArrowException) as exc:
        where = os.fspath(root)
        raise LedgerError(f"cannot read the registry of ledger {where!r}: {exc}") from None
    return identity, rows


def _part_name(writer: str, rows: list[Row], seq: int) -> str:
    first = min(r[seq] for r in rows)
    last = max(r[seq] for r in rows)
    return f"{first:012d}-{last:012d}-{writer_tag(writer)}{SUFFIX}"


def _fsync_path(path: Path, *, directory: bool = False) -> None:
    fd = os.open(path, os.O_RDONLY | (os.O_DIRECTORY if directory else 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
