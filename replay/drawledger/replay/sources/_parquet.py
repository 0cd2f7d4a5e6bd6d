"""Parquet ledgers cut into pieces: consecutive committed part files, read as rows or frames."""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from drawledger import _parquet
from drawledger.exceptions import ReplayError
from drawledger.replay.sources._tables import is_parquet

Row = tuple[Any, ...]


@dataclass(frozen=True)
class Partition:
    """One ``<stream>/<date>`` directory of the decisions table and its committed part files."""

    name: str
    parts: tuple[str, ...]
    draws: tuple[str | None, ...]
    counts: tuple[int, ...]  # decisions in each part (from the Parquet footers)

    @property
    def rows(self) -> int:
        return sum(self.counts)


@dataclass(frozen=True)
class Piece:
    """Consecutive part files processed by one task; ``rows`` decisions in all."""

    index: int
    parts: tuple[str, ...]
    draws: tuple[str | None, ...]
    rows: int
    partitions: tuple[str, ...]

    def label(self) -> str:
        shown = ", ".join(self.partitions[:3]) + (", ..." if len(self.partitions) > 3 else "")
        return f"piece {self.index} ({self.rows} decisions of {shown})"


def parquet_root(ledger: str | os.PathLike[str], format: str | None, command: str) -> Path:
    """The absolute directory of a Parquet ledger; ``ReplayError`` for other ledgers."""
    text = os.fspath(ledger)
    if not is_parquet(text, format):
        raise ReplayError(
            f"{command}: the dask engine reads partitioned Parquet ledgers (a directory written "
            f"with format='parquet'); {text!r} is not one, use --engine local"
        )
    root = Path(text).expanduser().resolve()
    _parquet.check_ledger_dir(root)
    return root


def partitions(root: str | os.PathLike[str]) -> list[Partition]:
    """The partitions of a Parquet ledger in path order (stream, then date)."""
    base = Path(root)
    _parquet.check_ledger_dir(base)
    found: dict[str, tuple[list[str], list[str | None], list[int]]] = {}
    decisions_dir = base / "decisions"
    for part, sibling in _parquet.iter_part_pairs(base):
        name = part.path.parent.relative_to(decisions_dir).as_posix()
        parts, draws, counts = found.setdefault(name, ([], [], []))
        parts.append(os.fspath(part.path))
        draws.append(None if sibling is None else os.fspath(sibling))
        counts.append(_footer_rows(part.path))
    return [
        Partition(name, tuple(p), tuple(d), tuple(c)) for name, (p, d, c) in sorted(found.items())
    ]


def _footer_rows(path: Path) -> int:
    """The decisions of a part file, from its footer (its schema checked on the way)."""
    return int(_parquet.open_part(path, "decisions").metadata.num_rows)


def pieces(parts: Sequence[Partition], chunk_size: int) -> list[Piece]:
    """Part files cut into pieces of at least ``chunk_size`` decisions, as the local engine.

    The local engine reads part files in path order and yields a chunk as soon as it holds
    ``chunk_size`` decisions or more (``iter_chunks``, ``iter_decision_chunks``): the same cut
    here gives every task exactly one local chunk.
    """
    out: list[Piece] = []
    files: list[str] = []
    draws: list[str | None] = []
    names: list[str] = []
    rows = 0

    def cut() -> None:
        nonlocal files, draws, names, rows
        out.append(Piece(len(out), tuple(files), tuple(draws), rows, tuple(dict.fromkeys(names))))
        files, draws, names, rows = [], [], [], 0

    for partition in parts:
        for path, sibling, count in zip(
            partition.parts, partition.draws, partition.counts, strict=True
        ):
            files.append(path)
            draws.append(sibling)
            names.append(partition.name)
            rows += count
            if rows >= chunk_size:
                cut()
    if files:
        cut()
    return out


def read_piece(
    piece: Piece, codes: frozenset[str] | None = None
) -> tuple[list[Row], list[Row], int]:
    """Decision rows and draw rows of a piece, as tuples in the ledger's column order, and the
    number of decisions its part files hold. With ``codes``, only the decisions whose code
    identity is one of them, and their draws: chosen in Arrow, before any row becomes Python
    (a process replaying one code version reads every piece)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    wanted = None if codes is None else pa.array(sorted(codes), pa.string())
    rows: list[Row] = []
    draws: list[Row] = []
    total = 0
    for path, sibling in zip(piece.parts, piece.draws, strict=True):
        decisions = _parquet.read_part(Path(path), "decisions")
        total += decisions.num_rows
        if wanted is not None:
            decisions = decisions.filter(pc.is_in(decisions["code_hash"], value_set=wanted))
        rows.extend(_parquet.table_rows(decisions))
        if sibling is None or (wanted is not None and not decisions.num_rows):
            continue
        found = _parquet.read_part(Path(sibling), "draws")
        if wanted is not None:
            ids = decisions["decision_id"].combine_chunks()
            found = found.filter(pc.is_in(found["decision_id"], value_set=ids))
        draws.extend(_parquet.table_rows(found))
    return rows, draws, total


def piece_ids(piece: Piece) -> set[str]:
    """The decision ids of a piece, read alone (one column of each part file)."""
    ids: set[str] = set()
    for path in piece.parts:
        ids.update(_parquet.read_columns(Path(path), "decisions", ["decision_id"]).column(0)
                   .to_pylist())  # fmt: skip
    return ids


def read_piece_frames(piece: Piece) -> tuple[Any, Any]:
    """Decisions and draws of a piece as DataFrames, as ``iter_decision_chunks`` gives them."""
    decisions = [_parquet.read_part(Path(p), "decisions") for p in piece.parts]
    draws = [_parquet.read_part(Path(d), "draws") for d in piece.draws if d is not None]
    return _parquet.to_frame(decisions, "decisions"), _parquet.to_frame(draws, "draws")


def stream_partitions(root: str | os.PathLike[str]) -> dict[str, list[Partition]]:
    """The partitions of each decision stream (read from the first row of each partition)."""
    out: dict[str, list[Partition]] = {}
    for partition in partitions(root):
        column = _parquet.read_columns(Path(partition.parts[0]), "decisions", ["stream"]).column(0)
        stream = str(column[0].as_py()) if len(column) else ""
        out.setdefault(stream, []).append(partition)
    return out
