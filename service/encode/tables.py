"""Result tables to JSON, CSV or Parquet bytes, each carrying the result's provenance.

Parquet keeps the provenance and the warnings under two key-value metadata keys of the file,
``wxshock.provenance`` (the provenance document) and ``wxshock.warnings`` (the list of warnings), each as
JSON. Files written before the split held ``{"provenance", "warnings"}`` under ``wxshock.provenance``;
:func:`read_parquet_provenance` reads both.

CSV cells are what a spreadsheet would run as a formula when they begin with ``=``, ``+``, ``-``, ``@``, a
tab or a carriage return; such a text cell gets a leading single quote (OWASP's advice on CSV injection),
unless the whole cell is a plain number. Numeric columns are never touched. JSON, Parquet and Stata keep
the text as it is.
"""

from __future__ import annotations

import io
import json
import re
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from service.encode.result import json_value

PARQUET_METADATA_KEY = b"wxshock.provenance"
PARQUET_WARNINGS_KEY = b"wxshock.warnings"
# Rows per Parquet row group. A table written piece by piece (a job's, service.encode.stream) cuts its rows
# into row groups of this size too, so that it gives the bytes of the whole table written at once.
PARQUET_ROW_GROUP_ROWS = 50_000
# What spreadsheets read as the start of a formula (OWASP, "CSV Injection").
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
_PLAIN_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")


def to_json(frame: pd.DataFrame, provenance: dict[str, Any], warnings: list[dict[str, Any]]) -> bytes:
    """The JSON document {provenance, columns, rows, warnings}; rows are records in column order."""
    columns = [str(c) for c in frame.columns]
    rows = [
        {col: json_value(val) for col, val in zip(columns, record, strict=True)}
        for record in frame.itertuples(index=False, name=None)
    ]
    document = {"provenance": provenance, "columns": columns, "rows": rows, "warnings": warnings}
    return json.dumps(document, ensure_ascii=False, separators=(",", ":"), allow_nan=False).encode("utf-8")


def neutralise_cell(text: str) -> str:
    """A text cell that a spreadsheet would run as a formula, with a leading quote ('=1+1' -> "'=1+1")."""
    if text.startswith(_FORMULA_START) and not _PLAIN_NUMBER.fullmatch(text):
        return "'" + text
    return text


def csv_safe(frame: pd.DataFrame) -> pd.DataFrame:
    """The frame with every risky text cell neutralised (numeric columns and plain numbers untouched)."""
    out = frame
    for column in frame.columns:
        values = frame[column]
        if isinstance(values.dtype, pd.CategoricalDtype):
            categories = [neutralise_cell(c) if isinstance(c, str) else c for c in values.cat.categories]
            if categories != list(values.cat.categories):
                out = out.copy() if out is frame else out
                out[column] = values.cat.rename_categories(categories)
        elif pd.api.types.is_string_dtype(values.dtype) or values.dtype == object:
            risky = values.map(lambda v: isinstance(v, str) and neutralise_cell(v) != v, na_action="ignore")
            if risky.fillna(False).astype(bool).any():
                out = out.copy() if out is frame else out
                out[column] = values.map(lambda v: neutralise_cell(v) if isinstance(v, str) else v)
    return out


def to_csv(frame: pd.DataFrame) -> bytes:
    """CSV with a header row, empty cells for missing values, '\\n' line ends, formula-like text quoted."""
    return csv_safe(frame).to_csv(index=False, lineterminator="\n", na_rep="").encode("utf-8")


def _compact_json(value: Any) -> bytes:
    """Compact, key-sorted JSON bytes (the same value always gives the same bytes)."""
    return json.dumps(value, separators=(",", ":"), sort_keys=True, ensure_ascii=False).encode("utf-8")


def to_parquet(frame: pd.DataFrame, provenance: dict[str, Any], warnings: list[dict[str, Any]]) -> bytes:
    """Parquet with the provenance and the warnings as JSON under their own metadata keys.

    Every column is dictionary-encoded in the file (Parquet's own encoding: each distinct id or label is
    stored once per row group and the rows refer to it), while ``feature_id`` and the other text columns
    keep their plain string type for readers. Row groups hold PARQUET_ROW_GROUP_ROWS rows.
    """
    table = pa.Table.from_pandas(frame, preserve_index=False)
    metadata = dict(table.schema.metadata or {})
    metadata[PARQUET_METADATA_KEY] = _compact_json(provenance)
    metadata[PARQUET_WARNINGS_KEY] = _compact_json(warnings)
    table = table.replace_schema_metadata(metadata)
    sink = io.BytesIO()
    pq.write_table(
        table, sink, compression="zstd", use_dictionary=True, row_group_size=PARQUET_ROW_GROUP_ROWS
    )
    return sink.getvalue()


def read_parquet_provenance(data: bytes) -> dict[str, Any]:
    """The {provenance, warnings} of a wxshock Parquet file (either metadata layout)."""
    schema = pq.read_schema(io.BytesIO(data))
    metadata = schema.metadata or {}
    raw = metadata.get(PARQUET_METADATA_KEY)
    if raw is None:
        raise ValueError("this Parquet file carries no wxshock provenance")
    document = json.loads(raw)
    if PARQUET_WARNINGS_KEY in metadata:
        return {"provenance": document, "warnings": json.loads(metadata[PARQUET_WARNINGS_KEY])}
    # A file from before the split: {provenance, warnings} under the one key.
    if isinstance(document, dict) and set(document) == {"provenance", "warnings"}:
        return document
    return {"provenance": document, "warnings": []}
