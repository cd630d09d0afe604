"""Result tables to JSON, CSV or Parquet bytes, each carrying the result's provenance."""

from __future__ import annotations

import io
import json
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from service.encode.result import json_value

PARQUET_METADATA_KEY = b"wxshock.provenance"


def to_json(frame: pd.DataFrame, provenance: dict[str, Any], warnings: list[dict[str, Any]]) -> bytes:
    """The JSON document {provenance, columns, rows, warnings}; rows are records in column order."""
    columns = [str(c) for c in frame.columns]
    rows = [
        {col: json_value(val) for col, val in zip(columns, record, strict=True)}
        for record in frame.itertuples(index=False, name=None)
    ]
    document = {"provenance": provenance, "columns": columns, "rows": rows, "warnings": warnings}
    return json.dumps(document, ensure_ascii=False, separators=(",", ":"), allow_nan=False).encode("utf-8")


def to_csv(frame: pd.DataFrame) -> bytes:
    """CSV with a header row, empty cells for missing values, '\\n' line ends."""
    return frame.to_csv(index=False, lineterminator="\n", na_rep="").encode("utf-8")


def to_parquet(frame: pd.DataFrame, provenance: dict[str, Any], warnings: list[dict[str, Any]]) -> bytes:
    """Parquet with provenance and warnings as JSON in the file's key-value metadata."""
    table = pa.Table.from_pandas(frame, preserve_index=False)
    metadata = dict(table.schema.metadata or {})
    metadata[PARQUET_METADATA_KEY] = json.dumps(
        {"provenance": provenance, "warnings": warnings}, separators=(",", ":"), sort_keys=True
    ).encode("utf-8")
    table = table.replace_schema_metadata(metadata)
    sink = io.BytesIO()
    pq.write_table(table, sink, compression="zstd")
    return sink.getvalue()


def read_parquet_provenance(data: bytes) -> dict[str, Any]:
    """The {provenance, warnings} document stored in a wxshock Parquet file's metadata."""
    schema = pq.read_schema(io.BytesIO(data))
    raw = (schema.metadata or {}).get(PARQUET_METADATA_KEY)
    if raw is None:
        raise ValueError("this Parquet file carries no wxshock provenance")
    return json.loads(raw)
