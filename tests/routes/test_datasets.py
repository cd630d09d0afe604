"""service.routes.datasets: what a dataset holds, addressed by name only."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.store import open_store
from tests import _support_server as server_support

live_server = server_support.live_server


def test_the_list_describes_each_dataset(live_server: server_support.LiveServer, tiny_demo: Path) -> None:
    with live_server.client() as client:
        response = client.get("/v1/datasets")
    assert response.status_code == 200
    (dataset,) = response.json()["datasets"]
    store = open_store(tiny_demo)
    assert dataset["name"] == "demo"
    assert dataset["fingerprint"] == store.fingerprint
    assert {v: d["units"] for v, d in dataset["variables"].items()} == {
        "tmax": "degC",
        "tmin": "degC",
        "prcp": "mm/day",
    }
    assert dataset["calendar"] == "standard" and dataset["years"] == [1975, 2022]
    assert dataset["layers"] == ["population"]
    assert dataset["crs"]["epsg"] == 4326
    # The server's own paths stay on the server.
    assert "location" not in dataset and str(tiny_demo) not in response.text


def test_one_dataset_by_name(live_server: server_support.LiveServer) -> None:
    with live_server.client() as client:
        listed = client.get("/v1/datasets").json()["datasets"][0]
        response = client.get("/v1/datasets/demo")
    assert response.status_code == 200
    assert response.json() == listed


@pytest.mark.parametrize("name", ["nowhere", "demo.zarr", "..%2F..%2Fetc", "%2Ftmp%2Fdemo.zarr"])
def test_an_unknown_name_is_a_404_problem_listing_the_datasets(
    live_server: server_support.LiveServer, name: str
) -> None:
    with live_server.client() as client:
        response = client.get(f"/v1/datasets/{name}")
    assert response.status_code == 404
    assert response.headers["content-type"] == "application/problem+json"
    problem = response.json()
    assert problem["status"] == 404
    assert problem["type"].endswith(("/unknown-dataset", "/not-found"))
    if problem["type"].endswith("/unknown-dataset"):
        assert "'demo'" in problem["detail"]
