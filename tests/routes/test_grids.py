"""A dataset built as a researcher builds it from two products, served over HTTP (issue 11, "Done when"):
`wxshock ingest` of a precipitation-only product, then of temperatures on a coarser grid into the same store,
a weight layer added by `wxshock layer`, then requests and a job through a real server."""

from __future__ import annotations

import time
from typing import Any

import httpx
import numpy as np
import pyproj
import pytest

from service.cli import main as wxshock
from service.settings import Settings
from tests import _support_server as server_support
from tests._support_products import precipitation_only_product, temperature_product
from tests.test_ingest_layers import write_geotiff

YEARS = (2001, 2002, 2003, 2004, 2005, 2006)
BASELINE = {"start": 2001, "end": 2006}
# One community inside both products' region (the rain grid: 30.0-30.4 E, 10.0-9.7 S in cells of 0.05 degree;
# the temperature grid: 30.0-30.4 E, 10.0-9.6 S in cells of 0.2 degree).
RING = [[30.05, -9.95], [30.35, -9.95], [30.35, -9.75], [30.05, -9.75], [30.05, -9.95]]
FEATURES = {
    "type": "FeatureCollection",
    "features": [
        {
            "type": "Feature",
            "id": "q-1",
            "properties": {},
            "geometry": {"type": "Polygon", "coordinates": [RING]},
        }
    ],
}


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory):
    """Dataset 'rain' (precipitation only) and dataset 'both' (rain, then temperatures on a coarser grid, and
    a population layer), both made by the command, behind a thread server."""
    root = tmp_path_factory.mktemp("grids-api")
    rain = precipitation_only_product(root / "rain", YEARS)
    heat = temperature_product(root / "heat", YEARS)
    quiet = ["--quiet"]
    assert wxshock(["ingest", *map(str, rain.files), "--out", str(root / "rain.zarr"), *quiet]) == 0
    assert wxshock(["ingest", *map(str, rain.files), "--out", str(root / "both.zarr"), *quiet]) == 0
    assert wxshock(["ingest", *map(str, heat.files), "--out", str(root / "both.zarr"), *quiet]) == 0
    people = np.zeros((40, 40))
    people[:, :20] = 5.0  # everybody in the western half of the region
    raster = write_geotiff(root / "people.tif", people, pyproj.CRS.from_epsg(4326), 30.0, -9.6, 0.01)
    layer = ["layer", str(root / "both.zarr"), "population", str(raster), "--kind", "count", *quiet]
    assert wxshock(layer) == 0
    settings = Settings(stores=[str(root / "rain.zarr"), str(root / "both.zarr")], data_dir=root / "data")
    with server_support.thread_server(settings) as live:
        yield live


def _body(dataset: str, indicators: list[Any] | None, **fields: Any) -> dict[str, Any]:
    body = {"dataset": dataset, "features": FEATURES, "baseline": BASELINE, **fields}
    return body if indicators is None else {**body, "indicators": indicators}


def _rows(response: httpx.Response) -> list[dict[str, Any]]:
    assert response.status_code == 200, response.text
    return response.json()["rows"]


def test_every_grid_is_listed(server) -> None:
    with server.client() as client:
        datasets = {d["name"]: d for d in client.get("/v1/datasets").json()["datasets"]}
    both = datasets["both"]
    assert list(both["grids"]) == ["grid", "grid2"]
    assert {v: d["grid"] for v, d in both["variables"].items()} == {
        "prcp": "grid",
        "tmax": "grid2",
        "tmin": "grid2",
    }
    assert both["grids"]["grid"]["shape"] != both["grids"]["grid2"]["shape"]
    assert list(datasets["rain"]["variables"]) == ["prcp"]


def test_a_precipitation_only_dataset_serves_the_precipitation_indicators(server) -> None:
    with server.client() as client:
        rows = _rows(
            client.post("/v1/indicators", json=_body("rain", ["prcp_total", "cdd", "spi", "rx5day"]))
        )
        refused = client.post("/v1/indicators", json=_body("rain", ["prcp_total", "tmean"]))
        refused_job = client.post("/v1/jobs", json=_body("rain", ["tmean"]))
        series = {"dataset": "rain", "features": FEATURES, "variables": ["prcp", "tmax"]}
        refused_series = client.post("/v1/series", json=series)
        defaults = _rows(client.post("/v1/indicators", json=_body("rain", None)))
    assert len(rows) == len(YEARS)
    for column in ("prcp_total", "cdd", "spi", "rx5day"):
        assert all(row[column] is not None for row in rows), column
    assert refused.status_code == 422 and refused.headers["content-type"] == "application/problem+json"
    detail = refused.json()["detail"]
    assert "'tmean'" in detail and "tmax" in detail, detail
    assert refused_job.status_code == 422 and "'tmean'" in refused_job.json()["detail"], refused_job.text
    assert refused_series.status_code == 422 and "'tmax'" in refused_series.json()["detail"], (
        refused_series.text
    )
    # with no indicators named, the defaults are those its variables can compute: none of temperature
    assert "prcp_total" in defaults[0] and "tmean" not in defaults[0]


def _follow(client: httpx.Client, location: str, timeout: float = 120.0) -> dict[str, Any]:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        status = client.get(location).json()
        if status["state"] in ("succeeded", "failed", "cancelled"):
            return status
        time.sleep(0.1)
    raise AssertionError(f"{location} did not finish in {timeout} s")


@pytest.mark.parametrize("weighting", ["area", {"layer": "population"}])
def test_a_request_across_both_grids_on_demand_and_as_a_job(server, weighting: Any) -> None:
    body = _body("both", ["prcp_total", "tmean", "gdd"], weighting=weighting)
    with server.client() as client:
        on_demand = client.post("/v1/indicators", json=body, params={"format": "csv"})
        rows = _rows(client.post("/v1/indicators", json=body))
        submitted = client.post("/v1/jobs", json=body, params={"format": "csv"})
        assert submitted.status_code == 202, submitted.text
        done = _follow(client, submitted.headers["Location"])
        assert done["state"] == "succeeded", done
        result = client.get(done["links"]["result"])
        rain_only = _rows(client.post("/v1/indicators", json=_body("rain", ["prcp_total"])))
    assert on_demand.status_code == 200 and result.content == on_demand.content
    assert len(rows) == len(YEARS)
    cells = (24, 4) if weighting == "area" else (12, 2)
    # coverage and cells per grid: the community covers 6 x 4 rain cells and 2 x 2 temperature cells in part; with
    # the people all in the west (west of 30.2 E), 3 x 4 and 1 x 2 of them have a weight
    assert all((r["cells_grid"], r["cells_grid2"]) == cells for r in rows)
    assert all(
        r["coverage_grid"] == pytest.approx(1.0) and r["coverage_grid2"] == pytest.approx(1.0) for r in rows
    )
    assert all(r["tmean"] is not None and r["gdd"] is not None for r in rows)
    if weighting == "area":  # the rain grid of 'both' holds the same values as dataset 'rain'
        assert [r["prcp_total"] for r in rows] == [r["prcp_total"] for r in rain_only]


def test_maps_are_drawn_on_the_grid_of_the_indicators_variables(server) -> None:
    from service.maps import anomaly_field
    from service.store import open_store

    body = {"dataset": "both", "features": FEATURES, "baseline": BASELINE}
    with server.client() as client:
        rain = client.post("/v1/plots/map", params={"year": 2006, "indicator": "prcp_total"}, json=body)
        heat = client.post("/v1/plots/map", params={"year": 2006, "indicator": "tmean"}, json=body)
        none = client.post(
            "/v1/plots/map", params={"year": 2006, "indicator": "tmean"}, json={**body, "dataset": "rain"}
        )
    assert rain.status_code == 200 and heat.status_code == 200, (rain.text, heat.text)
    assert rain.content.startswith(b"\x89PNG") and rain.content != heat.content
    assert none.status_code == 422 and "tmax" in none.json()["detail"], none.text
    # the fields behind them: 6 x 8 cells of rain, 2 x 2 of temperature
    store = open_store(server.data_dir.parent / "both.zarr")
    assert anomaly_field(store, "prcp_total", 2006).z.shape == (6, 8)
    assert anomaly_field(store, "tmean", 2006).z.shape == (2, 2)


def test_describe_shows_every_grid(server, capsys: pytest.CaptureFixture[str]) -> None:
    assert wxshock(["describe", str(server.data_dir.parent / "both.zarr")]) == 0
    out = capsys.readouterr().out
    assert "grid2" in out and "population" in out and "prcp" in out and "tmax" in out
