"""Encoders: the same result gives the same bytes in every format, and the formats agree."""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from service.encode import (
    FLOAT_DECIMALS,
    RunResult,
    encode,
    format_from,
    format_from_suffix,
    read_parquet_provenance,
)
from service.errors import NotAcceptableError

PROVENANCE = {
    "dataset": "demo",
    "fingerprint": "sha256:abc",
    "software": "wxshock 0.1.0",
    "request_hash": "sha256:def",
    "request": {"lags": [0, 1]},
}


def _result() -> RunResult:
    frame = pd.DataFrame(
        {
            "feature_id": ["a", "a", "b"],
            "year": np.array([2000, 2001, 2000], dtype="int64"),
            "prcp_total": [512.25, np.nan, 301.0 + 1e-12],
            "prcp_total_class": pd.array([1, None, -2], dtype="Int64"),
            "prcp_total_label": ["wetter", None, "much drier"],
        }
    )
    return RunResult(
        frame=frame, provenance=PROVENANCE, warnings=[{"feature_id": "a", "year": 2001, "reason": "x"}]
    )


@pytest.mark.parametrize(
    ("accept", "param", "expected"),
    [
        (None, None, "json"),
        ("text/csv", None, "csv"),
        ("application/vnd.apache.parquet", None, "parquet"),
        ("text/csv;q=0.5, application/json", None, "json"),
        ("*/*", None, "json"),
        ("text/html, text/csv", None, "csv"),
        ("application/json", "csv", "csv"),
    ],
)
def test_format_from_accept_and_parameter(accept: str | None, param: str | None, expected: str) -> None:
    assert format_from(accept, param) == expected


@pytest.mark.parametrize(("accept", "param"), [("image/png", None), (None, "xlsx"), ("text/csv;q=0", None)])
def test_format_from_refuses_what_is_not_offered(accept: str | None, param: str | None) -> None:
    with pytest.raises(NotAcceptableError, match="not offered|none of the media types"):
        format_from(accept, param)


def test_format_from_suffix() -> None:
    assert format_from_suffix(".parquet") == "parquet"
    assert format_from_suffix(".PQ") == "parquet"
    with pytest.raises(NotAcceptableError, match="suffix '.xlsx'"):
        format_from_suffix(".xlsx")


def test_json_has_provenance_nulls_and_rounded_floats() -> None:
    body, media, headers = encode(_result(), "json")
    doc = json.loads(body)
    assert media == "application/json"
    assert doc["provenance"] == PROVENANCE
    assert doc["columns"] == ["feature_id", "year", "prcp_total", "prcp_total_class", "prcp_total_label"]
    assert doc["rows"][1]["prcp_total"] is None and doc["rows"][1]["prcp_total_class"] is None
    assert doc["rows"][2]["prcp_total"] == round(301.0, FLOAT_DECIMALS)
    assert headers["X-Wxshock-Fingerprint"] == "sha256:abc"


def test_parquet_equals_json_and_carries_provenance() -> None:
    body, media, _ = encode(_result(), "parquet")
    assert media == "application/vnd.apache.parquet"
    table = pq.read_table(io.BytesIO(body)).to_pandas()
    doc = json.loads(encode(_result(), "json")[0])
    back = pd.DataFrame(doc["rows"], columns=doc["columns"])
    assert list(table.columns) == doc["columns"]
    pd.testing.assert_series_equal(table["prcp_total"], back["prcp_total"].astype("float64"))
    assert table["prcp_total_class"].tolist()[0] == 1
    assert read_parquet_provenance(body)["provenance"] == PROVENANCE


def test_csv_has_empty_cells_for_missing_values() -> None:
    body, media, headers = encode(_result(), "csv")
    lines = body.decode().splitlines()
    assert media == "text/csv"
    assert lines[0] == "feature_id,year,prcp_total,prcp_total_class,prcp_total_label"
    assert lines[2] == "a,2001,,,"
    assert headers["X-Wxshock-Request-Hash"] == "sha256:def"


@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
def test_same_result_same_bytes(fmt: str) -> None:
    assert encode(_result(), fmt)[0] == encode(_result(), fmt)[0]


def test_float_noise_below_precision_does_not_change_bytes() -> None:
    noisy = _result()
    noisy.frame["prcp_total"] = noisy.frame["prcp_total"] + 1e-11
    assert encode(noisy, "csv")[0] == encode(_result(), "csv")[0]
