"""The export of verify: one row per decision, outcomes as columns, scalar inputs flattened.

Columns (export version 2, docs/replay.md): decision_id, stream, unit, ts (a UTC timestamp),
action (the action as a native value), action_json (its canonical JSON), propensity (the
replayed probability or density of the action), propensity_type ("probability" or "density"),
propensity_method, propensity_stderr (Monte Carlo only), logged_propensity, logged_kind,
verified, reason (reasons joined by ";"), detail (what differed first), then one column per
outcome name (the sum of that outcome's values for the decision; empty when none was recorded)
and one ``input.<path>`` column per scalar input field (``input.ctx.user_tier``; lists are left
out).
"""

from __future__ import annotations

import os
import re
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import orjson
import pandas as pd

from drawledger._files import check_output, replacing
from drawledger.exceptions import ReplayError
from drawledger.replay.sources import outcome_totals

__all__ = [
    "BASE_COLUMNS",
    "EXPORT_COLUMNS",
    "EXPORT_VERSION",
    "csv_ready",
    "flatten_inputs",
    "join_outcomes",
    "read_outcomes",
    "typed_rows",
    "write_export",
]

BASE_COLUMNS = (
    "decision_id",
    "stream",
    "unit",
    "ts",
    "action",
    "propensity",
    "propensity_method",
    "propensity_stderr",
    "logged_propensity",
    "logged_kind",
    "verified",
    "reason",
    "detail",
)
EXPORT_VERSION = 2  # docs/replay.md lists the columns of each version
EXPORT_COLUMNS = (*BASE_COLUMNS[:5], "action_json", "propensity", "propensity_type",
                  *BASE_COLUMNS[6:])  # fmt: skip
SUFFIXES = (".csv", ".parquet")
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def _leaves(prefix: str, value: Any) -> Iterator[tuple[str, Any]]:
    if isinstance(value, dict):
        for key, inner in value.items():
            yield from _leaves(f"{prefix}.{key}", inner)
    elif not isinstance(value, list):
        yield prefix, value


def flatten_inputs(inputs: Mapping[str, Any]) -> dict[str, Any]:
    """Scalar fields of recorded inputs as ``input.<name>.<field>`` columns (lists left out)."""
    out: dict[str, Any] = {}
    for name, value in inputs.items():
        out.update(_leaves(f"input.{name}", value))
    return out


def check_export_path(path: str | os.PathLike[str]) -> Path:
    """The export path, if its extension names a format and its folder exists."""
    target = Path(path).expanduser()
    if target.suffix.lower() not in SUFFIXES:
        raise ReplayError(f"export file {os.fspath(path)!r} must end in .csv or .parquet")
    return check_output(target, "export")


def read_outcomes(target: str | os.PathLike[str], *, format: str | None = None) -> pd.DataFrame:
    """Outcome totals: one row per decision id, one column per outcome name (sum of values)."""
    totals = outcome_totals(target, format=format)
    if totals.empty:
        return pd.DataFrame(index=pd.Index([], name="decision_id"))
    wide = totals.pivot(index="decision_id", columns="name", values="value")
    wide.columns = [str(c) for c in wide.columns]
    return wide


def join_outcomes(rows: pd.DataFrame, outcomes: pd.DataFrame) -> pd.DataFrame:
    """Outcome columns after the base columns, before the input columns."""
    taken = set(rows.columns)
    renamed = {c: (f"outcome.{c}" if c in taken else c) for c in outcomes.columns}
    joined = rows.join(outcomes.rename(columns=renamed), on="decision_id")
    inputs = sorted(c for c in rows.columns if c.startswith("input."))
    base = [c for c in rows.columns if not c.startswith("input.")]
    return joined[[*base, *renamed.values(), *inputs]]


def _decoded(text: Any) -> Any:
    """A recorded action's value (None when it is missing or not JSON)."""
    if not isinstance(text, (str, bytes)):
        return None
    try:
        return orjson.loads(text)
    except orjson.JSONDecodeError:
        return None


def _native(values: pd.Series) -> pd.Series:
    """Decoded actions as one column: text, integers, floats or booleans when every action has
    that type (integers and floats together are floats), the values themselves otherwise."""
    found = [v for v in values if v is not None]
    kinds = {bool if isinstance(v, bool) else float if isinstance(v, int) else type(v)
             for v in found}  # fmt: skip
    ints = all(isinstance(v, int) and not isinstance(v, bool) for v in found)
    if found and kinds == {float} and len(found) == len(values):
        return values.astype("int64" if ints else "float64")
    if found and kinds <= {float}:
        return values.astype("Int64" if ints else "Float64")
    if found and kinds == {bool}:
        return values.astype("boolean")
    return values


def typed_rows(rows: pd.DataFrame) -> pd.DataFrame:
    """The rows of the export with typed columns: ``ts`` a UTC timestamp, ``action`` the
    action's value (its JSON kept as ``action_json``), ``propensity_type`` probability or
    density."""
    out = rows.copy()
    micros = (pd.to_numeric(out["ts"], errors="coerce") * 1e6).round()  # float seconds: to µs
    stamps = pd.to_datetime(micros, unit="us", utc=True, errors="coerce")
    out["ts"] = stamps.astype("datetime64[us, UTC]")
    out["action_json"] = out["action"]
    out["action"] = _native(out["action"].map(_decoded).astype(object))
    method = out["propensity_method"]
    out["propensity_type"] = method.map(
        lambda m: None if m is None else "density" if m == "density" else "probability"
    ).astype(object)
    return out[[*EXPORT_COLUMNS, *(c for c in out.columns if c not in EXPORT_COLUMNS)]]


def _as_text(value: Any) -> Any:
    """Text as it is, other values as canonical JSON (None stays missing)."""
    if value is None or isinstance(value, str):
        return value
    return orjson.dumps(value, option=orjson.OPT_SORT_KEYS).decode()


def _parquet_ready(rows: pd.DataFrame) -> pd.DataFrame:
    """Input columns holding mixed types (a number here, text there) become text; so do
    actions that no single Arrow type holds (card names in one stream, delays in another)."""
    import pyarrow as pa

    out = rows.copy()
    for col in out.columns:
        if not (col.startswith("input.") or col == "action") or out[col].dtype != object:
            continue
        if col == "action":
            try:
                if _writable(pa.array(out[col].tolist(), from_pandas=True).type):
                    continue
            except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, OverflowError):
                pass
            out[col] = out[col].map(_as_text).astype(object)
            continue
        kinds = {type(v) for v in out[col].dropna()}
        if len(kinds) > 1:
            out[col] = out[col].map(lambda v: v if v is None else str(v))
    return out


def _writable(kind: Any) -> bool:
    """Whether Parquet can hold an Arrow type: no struct without fields (an action ``{}``),
    at any depth."""
    import pyarrow as pa

    if pa.types.is_struct(kind):
        return kind.num_fields > 0 and all(_writable(f.type) for f in kind)
    if pa.types.is_list(kind) or pa.types.is_large_list(kind):
        return _writable(kind.value_type)
    return True


# A number as a spreadsheet reads it: text cells like this are left as they are.
_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")


def _inert(value: Any) -> Any:
    """A text cell a spreadsheet would read as a formula, with a single quote in front."""
    if isinstance(value, str) and value[:1] in FORMULA_STARTS and not _NUMBER.fullmatch(value):
        return "'" + value
    return value


def csv_ready(rows: pd.DataFrame) -> pd.DataFrame:
    """The rows with every text cell and column name that starts with ``=``, ``+``, ``-``,
    ``@``, a tab or a carriage return prefixed by a single quote, so that a spreadsheet shows
    it as text instead of running it as a formula (the OWASP guidance on CSV injection).
    Numbers, and text that is a plain number such as ``-0.5``, are left as they are."""
    out = rows.rename(columns=_inert)
    if "action" in out.columns and out["action"].dtype == object:  # lists, objects: JSON text
        out["action"] = out["action"].map(
            lambda v: _as_text(v) if isinstance(v, (list, dict)) else v
        )
    for col in out.columns:
        if pd.api.types.is_object_dtype(out[col]) or pd.api.types.is_string_dtype(out[col]):
            out[col] = out[col].map(_inert)
    return out


def _write_parquet(rows: pd.DataFrame, out: Any) -> None:
    """The rows as Parquet, the export's version in the schema's metadata."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(rows, preserve_index=False)
    meta = {**(table.schema.metadata or {}), b"drawledger.export": str(EXPORT_VERSION).encode()}
    pq.write_table(table.replace_schema_metadata(meta), out)


def write_export(rows: pd.DataFrame, path: str | os.PathLike[str]) -> Path:
    """Write the rows as CSV or Parquet (by extension), whole or not at all."""
    target = check_export_path(path)
    with replacing(target) as out:
        if target.suffix.lower() == ".csv":
            # CRLF line ends (RFC 4180): a carriage return inside a cell is then quoted too,
            # so that it cannot split a row in two
            csv_ready(rows).to_csv(out, index=False, encoding="utf-8", lineterminator="\r\n")
        else:
            _write_parquet(_parquet_ready(rows), out)
    return target
