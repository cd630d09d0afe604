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


@pytest.mark.parametrize(
    ("cell", "written"),
    [
        ('=HYPERLINK("x")', '\'=HYPERLINK("x")'),
        ("+1+2", "'+1+2"),
        ("-2+3+cmd", "'-2+3+cmd"),
        ("@SUM(A1)", "'@SUM(A1)"),
        ("\tx", "'\tx"),
        ("-1.5", "-1.5"),  # a plain number stays what it is
        ("+3e5", "+3e5"),
        ("qu-001", "qu-001"),
        ("much drier", "much drier"),
    ],
)
def test_csv_neutralises_formula_like_text(cell: str, written: str) -> None:
    # OWASP, "CSV Injection": a leading quote makes spreadsheets show the text instead of running it.
    frame = pd.DataFrame(
        {"feature_id": pd.array([cell], dtype="string"), "value": [-1.5], "label": pd.Categorical([cell])}
    )
    body, _, _ = encode(RunResult(frame, PROVENANCE, []), "csv")
    back = pd.read_csv(io.BytesIO(body), dtype=str, keep_default_na=False)
    assert back["feature_id"].tolist() == [written]
    assert back["label"].tolist() == [written]
    assert back["value"].tolist() == ["-1.5"]  # numbers are never touched


def test_json_and_parquet_keep_formula_like_text_as_it_is() -> None:
    frame = pd.DataFrame({"feature_id": pd.array(["=1+1"], dtype="string")})
    result = RunResult(frame, PROVENANCE, [])
    assert json.loads(encode(result, "json")[0])["rows"][0]["feature_id"] == "=1+1"
    assert pq.read_table(io.BytesIO(encode(result, "parquet")[0]))["feature_id"].to_pylist() == ["=1+1"]


def test_parquet_keeps_provenance_and_warnings_under_their_own_keys() -> None:
    body, _, _ = encode(_result(), "parquet")
    metadata = pq.read_schema(io.BytesIO(body)).metadata
    assert json.loads(metadata[b"wxshock.provenance"]) == PROVENANCE
    assert json.loads(metadata[b"wxshock.warnings"]) == _result().warnings
    assert read_parquet_provenance(body) == {"provenance": PROVENANCE, "warnings": _result().warnings}


def test_old_parquet_files_still_read() -> None:
    # Before the split, one key held {provenance, warnings}.
    import pyarrow as pa

    table = pa.table({"feature_id": ["a"]}).replace_schema_metadata(
        {b"wxshock.provenance": json.dumps({"provenance": PROVENANCE, "warnings": [{"reason": "x"}]})}
    )
    sink = io.BytesIO()
    pq.write_table(table, sink)
    assert read_parquet_provenance(sink.getvalue()) == {
        "provenance": PROVENANCE,
        "warnings": [{"reason": "x"}],
    }


def test_parquet_stores_repeated_ids_once_per_row_group_but_reads_them_as_plain_strings() -> None:
    frame = pd.DataFrame(
        {"feature_id": pd.array(["qu-001"] * 500 + ["qu-002"] * 500, dtype="string"), "year": range(1000)}
    )
    body, _, _ = encode(RunResult(frame, PROVENANCE, []), "parquet")
    parquet = pq.ParquetFile(io.BytesIO(body))
    column = parquet.metadata.row_group(0).column(0)
    assert column.path_in_schema == "feature_id"
    assert "RLE_DICTIONARY" in column.encodings or "PLAIN_DICTIONARY" in column.encodings
    assert str(parquet.schema_arrow.field("feature_id").type) in ("string", "large_string")
    assert pd.read_parquet(io.BytesIO(body))["feature_id"].iloc[-1] == "qu-002"
