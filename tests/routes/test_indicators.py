"""service.routes.indicators: the catalog, and indicators on demand in each format."""

from __future__ import annotations

import io
import json
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow.parquet as pq
import pytest

from service import cli
from service.encode import read_parquet_provenance
from tests import _support_server as server_support

live_server = server_support.live_server

INDICATORS = ["prcp_total", "tmean", {"name": "gdd", "base": 10, "cap": 30}]


def _body(communities: dict[str, Any], n: int = 4, **fields: Any) -> dict[str, Any]:
    """An indicator request for the first n demo communities."""
    features = dict(communities, features=communities["features"][:n])
    return {"dataset": "demo", "features": features, "indicators": INDICATORS, "lags": [0, 1], **fields}


def _from_json(document: dict[str, Any]) -> pd.DataFrame:
    """The JSON answer's rows as a DataFrame in its column order."""
    return pd.DataFrame(document["rows"], columns=document["columns"])


def _same_table(left: pd.DataFrame, right: pd.DataFrame) -> None:
    """Equal columns, rows and values (missing values equal each other; dtypes may differ by format)."""
    assert list(left.columns) == list(right.columns)
    pd.testing.assert_frame_equal(
        left.astype(object).where(left.notna(), None).reset_index(drop=True),
        right.astype(object).where(right.notna(), None).reset_index(drop=True),
        check_dtype=False,
    )


def test_the_catalog_lists_indicators_with_units_sources_and_parameters(
    live_server: server_support.LiveServer,
) -> None:
    with live_server.client() as client:
        response = client.get("/v1/indicators")
    assert response.status_code == 200
    catalog = {i["name"]: i for i in response.json()["indicators"]}
    assert {"prcp_total", "tmean", "gdd", "edd"} <= set(catalog)
    assert catalog["prcp_total"]["unit"] == "mm" and catalog["prcp_total"]["percent_of_normal"]
    assert set(catalog["gdd"]["parameters"]) == {"base", "cap"}
    assert catalog["gdd"]["parameters"]["base"]["default"] == 10
    for entry in catalog.values():
        assert entry["definition"] and entry["source"] and entry["unit"]


@pytest.fixture(scope="module")
def answers(live_server: server_support.LiveServer, tiny_communities: dict) -> dict[str, Any]:
    """The same request answered as JSON, CSV and Parquet (by ?format=)."""
    out = {}
    with live_server.client() as client:
        for fmt in ("json", "csv", "parquet"):
            out[fmt] = client.post("/v1/indicators", json=_body(tiny_communities), params={"format": fmt})
    return out


def test_json_has_rows_per_feature_and_year_with_provenance(answers: dict, tiny_demo: Path) -> None:
    response = answers["json"]
    assert response.status_code == 200, response.text
    assert response.headers["content-type"] == "application/json"
    document = response.json()
    table = _from_json(document)
    assert table["feature_id"].nunique() == 4
    assert not table.duplicated(["feature_id", "year"]).any()
    assert {"prcp_total_z", "tmean_class", "gdd_z_lag1", "coverage", "season_complete"} <= set(table.columns)
    provenance = document["provenance"]
    assert provenance["dataset"] == "demo" and provenance["fingerprint"].startswith("sha256:")
    assert provenance["request"]["lags"] == [0, 1]


def test_parquet_read_back_with_pyarrow_equals_the_json(answers: dict) -> None:
    response = answers["parquet"]
    assert (
        response.status_code == 200 and response.headers["content-type"] == "application/vnd.apache.parquet"
    )
    table = pq.read_table(io.BytesIO(response.content)).to_pandas()
    document = answers["json"].json()
    _same_table(table, _from_json(document))
    stored = read_parquet_provenance(response.content)
    assert stored["provenance"] == document["provenance"]
    assert stored["warnings"] == document["warnings"]


def test_csv_equals_the_json_and_carries_provenance_in_headers(answers: dict) -> None:
    response = answers["csv"]
    assert response.status_code == 200 and response.headers["content-type"].startswith("text/csv")
    document = answers["json"].json()
    table = pd.read_csv(io.StringIO(response.text), keep_default_na=True)
    expected = _from_json(document)
    # CSV carries no types: compare numbers as numbers and labels as text.
    for column in expected.columns:
        if pd.api.types.is_numeric_dtype(table[column]):
            expected[column] = pd.to_numeric(expected[column])
    _same_table(table, expected)
    provenance = document["provenance"]
    assert response.headers["X-Wxshock-Fingerprint"] == provenance["fingerprint"]
    assert response.headers["X-Wxshock-Request-Hash"] == provenance["request_hash"]
    assert response.headers["X-Wxshock-Dataset"] == "demo"


@pytest.mark.parametrize(
    ("accept", "params", "media_type"),
    [
        ("text/csv", {}, "text/csv"),
        ("application/vnd.apache.parquet", {}, "application/vnd.apache.parquet"),
        ("application/json;q=0.5, text/csv;q=0.9", {}, "text/csv"),
        ("*/*", {}, "application/json"),
        ("text/csv", {"format": "json"}, "application/json"),  # ?format= wins over Accept
    ],
)
def test_the_format_follows_accept_unless_a_format_parameter_is_given(
    live_server: server_support.LiveServer, tiny_communities: dict, accept: str, params: dict, media_type: str
) -> None:
    with live_server.client() as client:
        response = client.post(
            "/v1/indicators", json=_body(tiny_communities, 1), params=params, headers={"Accept": accept}
        )
    assert response.status_code == 200, response.text
    assert response.headers["content-type"].split(";")[0] == media_type


def test_the_same_request_gives_the_same_bytes_as_wxshock_compute(
    live_server: server_support.LiveServer, tiny_communities: dict, tiny_demo: Path, tmp_path: Path
) -> None:
    body = _body(tiny_communities, 3)
    (tmp_path / "request.json").write_text(json.dumps(body), encoding="utf-8")
    out = tmp_path / "out.parquet"
    args = [
        "compute",
        "--store",
        str(tiny_demo),
        "--request",
        str(tmp_path / "request.json"),
        "--out",
        str(out),
    ]
    assert cli.main([*args, "--quiet"]) == 0
    with live_server.client() as client:
        response = client.post("/v1/indicators", json=body, params={"format": "parquet"})
    assert response.status_code == 200
    assert response.content == out.read_bytes()


def test_the_same_request_twice_gives_the_same_bytes(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    with live_server.client() as client:
        first = client.post("/v1/indicators", json=_body(tiny_communities, 2), params={"format": "json"})
        second = client.post("/v1/indicators", json=_body(tiny_communities, 2), params={"format": "json"})
    assert first.status_code == 200 and first.content == second.content


def test_the_catalog_states_the_event_window_rule(live_server: server_support.LiveServer) -> None:
    from service.indicators.windows.instances import WINDOW_RULE

    with live_server.client() as client:
        rule = client.get("/v1/indicators").json()["event_windows"]
    assert rule == WINDOW_RULE
    # the parts of the rule a reader needs: the same calendar days, 29 February, calendars, the new year,
    # the baseline and lags (docs/methods.md, "Event windows", says the same; tests/indicators/test_windows.py)
    for part in (
        "same calendar days",
        "29 February",
        "1 March",
        "28 February",
        "noleap and 360_day",
        "crossing the new year",
        "window-year",
        "trailing",
        "Lag k is the same window k years earlier",
        "max_missing_share",
    ):
        assert part in rule, part
