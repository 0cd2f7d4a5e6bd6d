"""The one way to read a ledger: cut any ledger (SQLite, PostgreSQL, Parquet) into pieces and read
them, whole tables or chunks of decisions with their draws."""

from drawledger.replay.sources._follow import Follower, Head, WriterPiece
from drawledger.replay.sources._one import DecisionRows, read_decision
from drawledger.replay.sources._outcomes import (
    outcome_totals,
    outcome_values,
    sql_streams,
    stream_outcome_names,
)
from drawledger.replay.sources._parquet import (
    Piece,
    parquet_root,
    partitions,
    pieces,
    read_piece,
    read_piece_frames,
    stream_partitions,
)
from drawledger.replay.sources._plan import (
    CHUNK_SIZE,
    PARALLEL_CHUNK_SIZE,
    Task,
    iter_chunks,
    iter_decision_chunks,
    plan,
)
from drawledger.replay.sources._registry import Registry, read_registry
from drawledger.replay.sources._sql import writer_pages
from drawledger.replay.sources._tables import (
    LedgerTables,
    is_parquet,
    open_engine,
    read_tables,
    reading,
    rows_frame,
)
from drawledger.replay.sources._versions import (
    VERSION_COLUMNS,
    VersionUse,
    decision_versions,
    read_code_versions,
)

__all__ = [
    "CHUNK_SIZE",
    "PARALLEL_CHUNK_SIZE",
    "VERSION_COLUMNS",
    "DecisionRows",
    "Follower",
    "Head",
    "LedgerTables",
    "Piece",
    "Registry",
    "Task",
    "VersionUse",
    "WriterPiece",
    "decision_versions",
    "is_parquet",
    "iter_chunks",
    "iter_decision_chunks",
    "open_engine",
    "outcome_totals",
    "outcome_values",
    "parquet_root",
    "partitions",
    "pieces",
    "plan",
    "read_code_versions",
    "read_decision",
    "read_piece",
    "read_piece_frames",
    "read_registry",
    "read_tables",
    "reading",
    "rows_frame",
    "sql_streams",
    "stream_outcome_names",
    "stream_partitions",
    "writer_pages",
]
