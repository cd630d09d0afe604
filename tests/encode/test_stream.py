"""service.encode.stream: tables encoded piece by piece give the bytes (JSON, CSV) or the table (Parquet) of
the whole-table encoders."""

from __future__ import annotations

import io
from collections.abc import Iterator

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from service.encode import RunResult, encode, read_parquet_provenance
from service.encode import stream as stream_module
from service.encode.stream import pieces, stream

PROVENANCE = {"dataset": "demo", "fingerprint": "sha256:abc", "software": "wxshock test", "request_hash": "h",
              "request": {"features": {"count": 3}}}  # fmt: skip
WARNINGS = [{"code": "x", "feature_id": "é-1", "year": None, "indicator": None, "reason": "r"}]


def _frame(rows: int) -> pd.DataFrame:
    """A table with text, floats (some missing, some needing rounding) and integers."""
    rng = np.random.default_rng(3)
    values = rng.normal(size=rows)
    values[::7] = np.nan
    return pd.DataFrame(
        {
            "feature_id": np.repeat(np.asarray(["é-1", "b,2", 'c"3'], dtype=object), -(-rows // 3))[:rows],
            "date": [f"2000-01-{i % 28 + 1:02d}" for i in range(rows)],
            "tmax": values / 3,
            "cells": np.arange(rows, dtype=np.int64),
        }
    )


def _split(frame: pd.DataFrame, size: int) -> Iterator[pd.DataFrame]:
    """The frame as consecutive parts of ``size`` rows."""
    for start in range(0, len(frame), size):
        yield frame.iloc[start : start + size]


@pytest.mark.parametrize("rows", [0, 1, 25, 1000])
@pytest.mark.parametrize("fmt", ["json", "csv"])
def test_json_and_csv_in_pieces_equal_the_whole_encoding(
    monkeypatch: pytest.MonkeyPatch, fmt: str, rows: int
) -> None:
    monkeypatch.setattr(stream_module, "PIECE_ROWS", 7)  # many pieces, cut across the frames given
    frame = _frame(rows)
    whole, _, _ = encode(RunResult(frame, PROVENANCE, WARNINGS), fmt)
    streamed = b"".join(stream(_split(frame, 10), list(frame.columns), PROVENANCE, WARNINGS, fmt))
    assert streamed == whole


@pytest.mark.parametrize("rows", [0, 1, 1000])
def test_parquet_in_row_groups_holds_the_whole_table_and_metadata(
    monkeypatch: pytest.MonkeyPatch, rows: int
) -> None:
    monkeypatch.setattr(stream_module, "PIECE_ROWS", 100)
    frame = _frame(rows)
    whole, _, _ = encode(RunResult(frame, PROVENANCE, WARNINGS), "parquet")
    streamed = b"".join(stream(_split(frame, 333), list(frame.columns), PROVENANCE, WARNINGS, "parquet"))
    expected = pq.read_table(io.BytesIO(whole)).to_pandas()
    got = pq.read_table(io.BytesIO(streamed)).to_pandas()
    pd.testing.assert_frame_equal(got, expected, check_dtype=rows > 0)
    assert read_parquet_provenance(streamed) == read_parquet_provenance(whole)
    ours, theirs = (pq.read_schema(io.BytesIO(b)).metadata for b in (streamed, whole))
    assert {k: v for k, v in ours.items() if k.startswith(b"wxshock")} == {
        k: v for k, v in theirs.items() if k.startswith(b"wxshock")
    }
    if rows == 1000:  # row groups of 100 rows across the parts of 333, as the whole-table writer cuts them
        assert pq.ParquetFile(io.BytesIO(streamed)).num_row_groups == 10


@pytest.mark.parametrize("rows", [0, 1, 1000])
def test_parquet_in_pieces_is_the_whole_file_when_row_groups_are_cut_alike(
    monkeypatch: pytest.MonkeyPatch, rows: int
) -> None:
    from service.encode import tables

    monkeypatch.setattr(stream_module, "PIECE_ROWS", 100)
    monkeypatch.setattr(tables, "PARQUET_ROW_GROUP_ROWS", 100)
    frame = _frame(rows)
    whole, _, _ = encode(RunResult(frame, PROVENANCE, WARNINGS), "parquet")
    streamed = b"".join(stream(_split(frame, 333), list(frame.columns), PROVENANCE, WARNINGS, "parquet"))
    if rows:  # (an empty table's column types are not known from its pieces)
        assert streamed == whole


def test_pieces_have_the_size_asked_for_wherever_the_frames_were_cut() -> None:
    sizes = [len(p) for p in pieces(_split(_frame(1000), 300), rows=128)]
    assert sizes == [128] * 7 + [104]
    joined = pd.concat(pieces(_split(_frame(1000), 300), rows=128), ignore_index=True)
    pd.testing.assert_frame_equal(joined, _frame(1000))
