"""service.routes.series: the daily area-weighted series themselves."""

from __future__ import annotations

import io
from typing import Any

import pandas as pd
import pyarrow.parquet as pq

from service.encode import read_parquet_provenance
from tests import _support_server as server_support

live_server = server_support.live_server


def _body(communities: dict[str, Any], n: int = 2, **fields: Any) -> dict[str, Any]:
    """A series request for the first n demo communities over two years."""
    features = dict(communities, features=communities["features"][:n])
    return {"features": features, "years": {"start": 2000, "end": 2001}, **fields}


def test_parquet_is_the_default_with_one_row_per_feature_and_day(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    with live_server.client() as client:
        response = client.post("/v1/series", json=_body(tiny_communities))
    assert response.status_code == 200, response.text
    assert response.headers["content-type"] == "application/vnd.apache.parquet"
    table = pq.read_table(io.BytesIO(response.content)).to_pandas()
    assert list(table.columns) == ["feature_id", "date", "tmax", "tmin", "tmean", "prcp"]
    assert len(table) == 2 * (366 + 365)  # 2000 is a leap year
    assert table["date"].iloc[0] == "2000-01-01" and table["date"].iloc[-1] == "2001-12-31"
    # tmean is the mean of tmax and tmin (to the encoder's rounding); precipitation is never negative
    assert ((table["tmax"] + table["tmin"]) / 2 - table["tmean"]).abs().max() < 1e-5
    assert (table["tmax"] >= table["tmin"]).all() and (table["prcp"] >= 0).all()
    assert read_parquet_provenance(response.content)["provenance"]["dataset"] == "demo"


def test_csv_of_chosen_variables_equals_the_parquet(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = _body(tiny_communities, 1, variables=["prcp", "tmax"])
    with live_server.client() as client:
        csv = client.post("/v1/series", json=body, headers={"Accept": "text/csv"})
        parquet = client.post("/v1/series", json=body, params={"format": "parquet"})
    assert csv.status_code == parquet.status_code == 200
    from_csv = pd.read_csv(io.StringIO(csv.text))
    from_parquet = pq.read_table(io.BytesIO(parquet.content)).to_pandas()
    assert list(from_csv.columns) == ["feature_id", "date", "prcp", "tmax"]
    pd.testing.assert_frame_equal(from_csv, from_parquet, check_dtype=False)
    assert csv.headers["X-Wxshock-Dataset"] == "demo"


def test_years_outside_the_data_are_a_problem(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    with live_server.client() as client:
        response = client.post(
            "/v1/series", json=_body(tiny_communities, 1, years={"start": 1900, "end": 1901})
        )
    assert response.status_code == 422
    assert response.headers["content-type"] == "application/problem+json"
    assert response.json()["pointer"] == "/years" and "1975-2022" in response.json()["detail"]
