"""Result tables to bytes in every format we offer, each carrying the result's provenance.

The same result always encodes to the same bytes: columns keep the table's order, floats are rounded to
a fixed number of decimals (far below the store's 0.1 precision, far above summation noise), and nothing
time-dependent is written.

Modules: ``result`` (RunResult and the byte-stable frame), ``formats`` (which format a request asks for,
and ``encode``, the one entry point), ``tables`` (JSON, CSV, Parquet), ``stata`` (.dta), ``bundle`` (the replication zip), ``codebook`` (what each
column is), ``files`` (result files on disk). The public names below are the ones
to import; the modules behind them may move.
"""

from __future__ import annotations

from service.encode.files import write_atomically
from service.encode.formats import (
    FORMATS,
    SERIES_FORMATS,
    SUFFIXES,
    SeriesFormat,
    TableFormat,
    download_name,
    encode,
    format_from,
    format_from_suffix,
)
from service.encode.result import FLOAT_DECIMALS, RunResult, json_value, provenance_headers, stable_frame
from service.encode.tables import (
    PARQUET_METADATA_KEY,
    read_parquet_provenance,
    to_csv,
    to_json,
    to_parquet,
)

__all__ = [
    "FLOAT_DECIMALS",
    "FORMATS",
    "SERIES_FORMATS",
    "SUFFIXES",
    "SeriesFormat",
    "TableFormat",
    "download_name",
    "PARQUET_METADATA_KEY",
    "RunResult",
    "encode",
    "format_from",
    "format_from_suffix",
    "json_value",
    "provenance_headers",
    "read_parquet_provenance",
    "stable_frame",
    "to_csv",
    "to_json",
    "to_parquet",
    "write_atomically",
]
