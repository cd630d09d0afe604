"""Stata files and replication bundles over HTTP, from jobs, and from the command line: one set of bytes."""

from __future__ import annotations

import io
import json
import time
import zipfile
from pathlib import Path
from typing import Any

import httpx
import pandas as pd

from service import cli
from service.encode.stata import read_stata
from tests import _support_server as server_support

live_server = server_support.live_server


def _body(communities: dict[str, Any], n: int = 3) -> dict[str, Any]:
    features = dict(communities, features=communities["features"][:n])
    return {
        "dataset": "demo",
        "features": features,
        "indicators": ["prcp_total", "tmean"],
        "lags": [0, 1],
        "baseline": {"start": 1981, "end": 1990},
    }


def _follow(client: httpx.Client, location: str, timeout: float = 90.0) -> dict[str, Any]:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        status = client.get(location).json()
        if status["state"] in ("succeeded", "failed", "cancelled"):
            return status
        time.sleep(0.05)
    raise AssertionError(f"{location} never finished")


def test_stata_and_bundle_on_demand_by_parameter_and_by_accept(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = _body(tiny_communities)
    with live_server.client() as client:
        dta = client.post("/v1/indicators", json=body, params={"format": "dta"})
        dta_accept = client.post("/v1/indicators", json=body, headers={"Accept": "application/x-stata-dta"})
        bundle = client.post("/v1/indicators", json=body, headers={"Accept": "application/zip"})
        as_json = client.post("/v1/indicators", json=body).json()
    assert dta.status_code == 200 and dta.headers["content-type"] == "application/x-stata-dta"
    assert dta.content == dta_accept.content
    assert dta.headers["content-disposition"].startswith('attachment; filename="wxshock-')
    table, labels, value_labels = read_stata(dta.content)
    assert table["feature_id"].tolist() == [r["feature_id"] for r in as_json["rows"]]
    assert labels["tmean_z"].startswith("Mean over the season of the daily mean temperature: z")
    assert value_labels["tmean_class"][1] == "warmer"
    assert bundle.status_code == 200 and bundle.headers["content-type"] == "application/zip"
    archive = zipfile.ZipFile(io.BytesIO(bundle.content))
    assert archive.read("table.dta") == dta.content
    assert json.loads(archive.read("provenance.json")) == as_json["provenance"]


def test_a_bundle_job_gives_the_on_demand_bytes_as_a_zip_file(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = _body(tiny_communities)
    with live_server.client() as client:
        accepted = client.post("/v1/jobs", json=body, params={"format": "bundle"})
        assert accepted.status_code == 202, accepted.text
        assert accepted.json()["format"] == "bundle"
        done = _follow(client, accepted.headers["Location"])
        assert done["state"] == "succeeded", done
        result = client.get(done["links"]["result"])
        on_demand = client.post("/v1/indicators", json=body, params={"format": "bundle"})
    assert result.headers["content-type"] == "application/zip"
    assert result.headers["content-disposition"].endswith('.zip"')
    assert result.content == on_demand.content


def test_the_daily_series_offer_stata_but_no_bundle(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = {"dataset": "demo", "features": dict(tiny_communities, features=tiny_communities["features"][:1])}
    body["years"] = {"start": 2000, "end": 2000}
    with live_server.client() as client:
        dta = client.post("/v1/series", json=body, params={"format": "dta"})
        bundle = client.post("/v1/series", json=body, headers={"Accept": "application/zip"})
    assert dta.status_code == 200, dta.text
    assert len(read_stata(dta.content)[0]) > 300
    assert bundle.status_code == 406 and bundle.headers["content-type"] == "application/problem+json"


def test_the_command_writes_stata_and_bundles_readable_by_the_umask(
    live_server: server_support.LiveServer, tiny_demo: Path, tiny_communities: dict, tmp_path: Path
) -> None:
    body = _body(tiny_communities)
    features = tmp_path / "features.geojson"
    features.write_text(json.dumps(body.pop("features")), encoding="utf-8")
    request = tmp_path / "request.json"
    request.write_text(json.dumps(body), encoding="utf-8")
    written = {}
    for suffix in ("dta", "zip"):
        out = tmp_path / f"shocks.{suffix}"
        argv = ["compute", "--store", str(tiny_demo), "--request", str(request), "--features", str(features)]
        assert cli.main([*argv, "--out", str(out), "--quiet"]) == 0
        submitted = tmp_path / f"submitted.{suffix}"
        argv = [
            "submit",
            "--server",
            live_server.base_url,
            "--request",
            str(request),
            "--features",
            str(features),
        ]
        assert cli.main([*argv, "--out", str(submitted), "--quiet"]) == 0
        assert out.read_bytes() == submitted.read_bytes()
        written[suffix] = out.read_bytes()
    assert zipfile.ZipFile(io.BytesIO(written["zip"])).read("table.dta") == written["dta"]
    assert len(pd.read_stata(io.BytesIO(written["dta"]))) == 3 * len(range(1976, 2023))  # lag 1 from 1975
