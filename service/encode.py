"""Result tables to JSON, CSV or Parquet bytes, each carrying the result's provenance.

The same result always encodes to the same bytes: columns keep the table's order, floats are rounded to
a fixed number of decimals (far below the store's 0.1 precision, far above summation noise), and nothing
time-dependent is written.
"""

from __future__ import annotations

import io
import json
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from service.errors import NotAcceptableError

FORMATS: dict[str, str] = {
    "json": "application/json",
    "csv": "text/csv",
    "parquet": "application/vnd.apache.parquet",
}
_MEDIA_TO_FORMAT = {media: fmt for fmt, media in FORMATS.items()} | {"application/x-parquet": "parquet"}
PARQUET_METADATA_KEY = b"wxshock.provenance"
FLOAT_DECIMALS = 6


@dataclass
class RunResult:
    """A computed table with what produced it and the values it left null, and why."""

    frame: pd.DataFrame
    provenance: dict[str, Any]
    warnings: list[dict[str, Any]] = field(default_factory=list)


def format_from(accept: str | None, format_param: str | None, default: str = "json") -> str:
    """The output format named by a ``format`` parameter, else by the Accept header, else ``default``."""
    if format_param:
        if format_param not in FORMATS:
            raise NotAcceptableError(
                f"format {format_param!r} is not offered; choose one of {', '.join(FORMATS)}", field="format"
            )
        return format_param
    if not accept:
        return default
    # Honour q-values; ties keep the client's order.
    choices: list[tuple[float, int, str]] = []
    for position, part in enumerate(accept.split(",")):
        media, *params = (p.strip() for p in part.split(";"))
        quality = 1.0
        for param in params:
            key, _, value = param.partition("=")
            if key.strip() == "q":
                try:
                    quality = float(value)
                except ValueError:
                    quality = 0.0
        if quality > 0:
            choices.append((-quality, position, media.lower()))
    for _, _, media in sorted(choices):
        if media in _MEDIA_TO_FORMAT:
            return _MEDIA_TO_FORMAT[media]
        if media in ("*/*", "application/*", "text/*"):
            return default if media != "text/*" else "csv"
    raise NotAcceptableError(
        f"none of the media types in Accept {accept!r} is offered; offered: {', '.join(FORMATS.values())}",
        field="Accept",
    )


def format_from_suffix(path_suffix: str) -> str:
    """The output format of a file name's suffix (.json, .csv, .parquet or .pq)."""
    suffix = path_suffix.lower().lstrip(".")
    fmt = {"pq": "parquet"}.get(suffix, suffix)
    if fmt not in FORMATS:
        raise NotAcceptableError(
            f"cannot tell the output format from the suffix {path_suffix!r}; use .parquet, .csv or .json",
            field="out",
        )
    return fmt


def stable_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """The table with floats rounded to FLOAT_DECIMALS so that equal results give equal bytes."""
    out = frame.copy()
    for column in out.columns:
        if pd.api.types.is_float_dtype(out[column].dtype):
            out[column] = out[column].round(FLOAT_DECIMALS)
    return out


def _json_value(value: Any) -> Any:
    """A JSON-ready scalar: NaN and pandas' missing markers become None, numpy scalars become Python ones."""
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def provenance_headers(provenance: dict[str, Any]) -> dict[str, str]:
    """Provenance as HTTP response headers (for CSV, which has no place for metadata)."""
    return {
        "X-Wxshock-Dataset": str(provenance["dataset"]),
        "X-Wxshock-Fingerprint": str(provenance["fingerprint"]),
        "X-Wxshock-Request-Hash": str(provenance["request_hash"]),
        "X-Wxshock-Software": str(provenance["software"]),
    }


def to_json(frame: pd.DataFrame, provenance: dict[str, Any], warnings: list[dict[str, Any]]) -> bytes:
    """The JSON document {provenance, columns, rows, warnings}; rows are records in column order."""
    columns = [str(c) for c in frame.columns]
    rows = [
        {col: _json_value(val) for col, val in zip(columns, record, strict=True)}
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


def encode(result: RunResult, fmt: str) -> tuple[bytes, str, dict[str, str]]:
    """Bytes, media type and headers of a RunResult in the format ``fmt`` (json, csv or parquet)."""
    if fmt not in FORMATS:
        raise NotAcceptableError(
            f"format {fmt!r} is not offered; choose one of {', '.join(FORMATS)}", field="format"
        )
    frame = stable_frame(result.frame)
    headers = provenance_headers(result.provenance)
    if fmt == "json":
        body = to_json(frame, result.provenance, result.warnings)
    elif fmt == "csv":
        body = to_csv(frame)
    else:
        body = to_parquet(frame, result.provenance, result.warnings)
    return body, FORMATS[fmt], headers


def read_parquet_provenance(data: bytes) -> dict[str, Any]:
    """The {provenance, warnings} document stored in a wxshock Parquet file's metadata."""
    schema = pq.read_schema(io.BytesIO(data))
    raw = (schema.metadata or {}).get(PARQUET_METADATA_KEY)
    if raw is None:
        raise ValueError("this Parquet file carries no wxshock provenance")
    return json.loads(raw)
