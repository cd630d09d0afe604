"""Large tables encoded piece by piece: the bytes of JSON, CSV or Parquet written as they are made.

A daily series of 200 communities over 48 years is 3.5 million rows; encoded whole, its JSON form took 95 s
and 4.5 GB. Here the table arrives as frames of a few tens of thousands of rows and each is encoded on its
own, so memory stays flat whatever the number of features, days and the length of the ids. The bytes equal
those of service.encode.encode on the whole table (Parquet's row groups are cut at the same rows).
"""

from __future__ import annotations

import io
import json
from collections.abc import Iterable, Iterator
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from service.encode.formats import FORMATS
from service.encode.result import json_value, stable_frame
from service.encode.tables import PARQUET_METADATA_KEY, PARQUET_ROW_GROUP_ROWS, PARQUET_WARNINGS_KEY, to_csv
from service.errors import NotAcceptableError

# The formats written piece by piece (.dta and the bundle: service.encode.stata.stata_pieces,
# service.encode.bundle.write_bundle, which read their pieces twice).
STREAMED_FORMATS = ("json", "csv", "parquet")
# Rows encoded at a time: about 10 MB of JSON, and a few tens of MB of Python objects on the way; one Parquet
# row group, as the whole-table writer cuts them (so that both give the same bytes).
PIECE_ROWS = PARQUET_ROW_GROUP_ROWS


def pieces(frames: Iterable[pd.DataFrame], rows: int | None = None) -> Iterator[pd.DataFrame]:
    """The rows of ``frames`` in pieces of exactly ``rows`` rows (default PIECE_ROWS), the last one shorter:
    the pieces do not depend on where the frames were cut."""
    rows = rows or PIECE_ROWS
    held: list[pd.DataFrame] = []
    count = 0
    for frame in frames:
        start = 0
        while start < len(frame):
            part = frame.iloc[start : start + rows - count]
            start += len(part)
            if not held and len(part) == rows:
                yield part
                continue
            held.append(part)
            count += len(part)
            if count == rows:
                yield pd.concat(held, ignore_index=True)
                held, count = [], 0
    if held:
        yield held[0] if len(held) == 1 else pd.concat(held, ignore_index=True)


def stream(
    frames: Iterable[pd.DataFrame],
    columns: list[str],
    provenance: dict[str, Any],
    warnings: list[dict[str, Any]],
    fmt: str,
) -> Iterator[bytes]:
    """The bytes of the table made of ``frames`` (all with ``columns``) in the format ``fmt``."""
    if fmt == "json":
        return _json(frames, columns, provenance, warnings)
    if fmt == "csv":
        return _csv(frames, columns)
    if fmt == "parquet":
        return _parquet(frames, columns, provenance, warnings)
    raise NotAcceptableError(
        f"format {fmt!r} is not offered; choose one of {', '.join(FORMATS)}", field="format"
    )


def _compact(value: Any) -> bytes:
    """Compact, key-sorted JSON bytes, as service.encode.tables writes Parquet metadata."""
    return json.dumps(value, separators=(",", ":"), sort_keys=True, ensure_ascii=False).encode("utf-8")


def _dumps(value: Any) -> str:
    """JSON as service.encode writes it (compact, UTF-8 kept, no NaN)."""
    return json.dumps(value, ensure_ascii=False, separators=(",", ":"), allow_nan=False)


def _json(
    frames: Iterable[pd.DataFrame],
    columns: list[str],
    provenance: dict[str, Any],
    warnings: list[dict[str, Any]],
) -> Iterator[bytes]:
    """{"provenance", "columns", "rows", "warnings"} with the rows written piece by piece."""
    names = [str(c) for c in columns]
    yield f'{{"provenance":{_dumps(provenance)},"columns":{_dumps(names)},"rows":['.encode()
    first = True
    for piece in pieces(frames):
        rows = [
            {col: json_value(val) for col, val in zip(names, record, strict=True)}
            for record in stable_frame(piece).itertuples(index=False, name=None)
        ]
        if rows:
            text = _dumps(rows)[1:-1]
            yield (text if first else "," + text).encode("utf-8")
            first = False
    yield f'],"warnings":{_dumps(warnings)}}}'.encode()


def _csv(frames: Iterable[pd.DataFrame], columns: list[str]) -> Iterator[bytes]:
    """The header, then each piece's rows as service.encode.to_csv writes them."""
    header_sent = False
    for piece in pieces(frames):
        text = to_csv(stable_frame(piece))
        if header_sent:
            text = text[text.index(b"\n") + 1 :]
        header_sent = True
        yield text
    if not header_sent:
        yield to_csv(pd.DataFrame(columns=columns))


class _Drain(io.RawIOBase):
    """A write-only file whose bytes are taken away as they come (it remembers only its length)."""

    def __init__(self) -> None:
        self._parts: list[bytes] = []
        self._position = 0

    def writable(self) -> bool:
        return True

    def write(self, data: Any) -> int:
        chunk = bytes(data)
        self._parts.append(chunk)
        self._position += len(chunk)
        return len(chunk)

    def tell(self) -> int:
        return self._position

    def take(self) -> bytes:
        """The bytes written since the last take."""
        data, self._parts = b"".join(self._parts), []
        return data


def _parquet(
    frames: Iterable[pd.DataFrame],
    columns: list[str],
    provenance: dict[str, Any],
    warnings: list[dict[str, Any]],
) -> Iterator[bytes]:
    """A Parquet file of one row group per piece, with the metadata and encodings of to_parquet."""
    sink = _Drain()
    writer: pq.ParquetWriter | None = None
    schema: pa.Schema | None = None

    def with_metadata(table: pa.Table) -> pa.Schema:
        metadata = dict(table.schema.metadata or {})
        metadata[PARQUET_METADATA_KEY] = _compact(provenance)
        metadata[PARQUET_WARNINGS_KEY] = _compact(warnings)
        return table.schema.with_metadata(metadata)

    try:
        for piece in pieces(frames):
            table = pa.Table.from_pandas(stable_frame(piece), schema=schema, preserve_index=False)
            if writer is None:
                schema = with_metadata(table)
                table = table.replace_schema_metadata(schema.metadata)
                writer = pq.ParquetWriter(sink, schema, compression="zstd", use_dictionary=True)
            writer.write_table(table)
            yield sink.take()
        if writer is None:
            empty = pa.Table.from_pandas(pd.DataFrame(columns=columns), preserve_index=False)
            writer = pq.ParquetWriter(sink, with_metadata(empty), compression="zstd", use_dictionary=True)
    finally:
        if writer is not None:
            writer.close()
    yield sink.take()
