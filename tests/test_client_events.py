"""Events and variants through the API, the jobs, the command line and the Python client (a real server)."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from service.cli import main as wxshock
from service.client import Client, events_list
from service.encode import read_parquet_provenance
from service.errors import RequestError
from tests._support_events import easternmost_community, west_communities, write_west_product
from tests._support_server import live_server  # noqa: F401 - fixture

EXAMPLES = Path(__file__).parents[1] / "examples"
WINDOWS = [
    {"name": "prior_year", "start": {"months": -12}, "end": {"days": -1}},
    {"name": "tri3", "start": {"days": -91}, "end": {"days": -1}},
]
REQUEST = {
    "indicators": ["prcp_total", "tmean"],
    "baseline": {"start": 1981, "end": 2010},
    "windows": WINDOWS,
}


@pytest.fixture(scope="module")
def five(tiny_communities: dict) -> dict:
    return {"type": "FeatureCollection", "features": tiny_communities["features"][:5]}


@pytest.fixture(scope="module")
def events_csv(tmp_path_factory: pytest.TempPathFactory, five: dict) -> Path:
    """The invented birth and interview file of the README (examples/make_events.py) for five communities."""
    folder = tmp_path_factory.mktemp("events")
    (folder / "five.geojson").write_text(json.dumps(five), encoding="utf-8")
    subprocess.run(
        [
            sys.executable,
            str(EXAMPLES / "make_events.py"),
            str(folder / "five.geojson"),
            str(folder / "events.csv"),
        ],
        check=True,
        capture_output=True,
    )
    return folder / "events.csv"


@pytest.fixture(scope="module")
def client(live_server) -> Iterator[Client]:  # noqa: F811
    with Client(live_server.base_url) as c:
        yield c


def test_events_file_forms(events_csv: Path, tmp_path: Path) -> None:
    from_csv = events_list(events_csv)
    frame = pd.read_csv(events_csv, dtype=str)
    assert from_csv[0] == {
        "id": frame["id"][0],
        "feature_id": frame["feature_id"][0],
        "date": frame["date"][0],
    }
    assert any(e["date"] == "2004-02-29" for e in from_csv)
    # Parquet with real dates and an event_id column (a survey's own naming) gives the same events
    parquet = tmp_path / "events.parquet"
    typed = frame.rename(columns={"id": "event_id"}).assign(date=pd.to_datetime(frame["date"]))
    typed.to_parquet(parquet)
    assert events_list(parquet) == from_csv
    assert events_list(typed) == from_csv
    with pytest.raises(RequestError, match="no column 'date'"):
        events_list(frame.drop(columns=["date"]))
    with pytest.raises(RequestError, match=r"\.csv or \.parquet"):
        events_list(tmp_path)


def test_client_events_on_demand(client: Client, five: dict, events_csv: Path) -> None:
    table = client.indicators(five, events=events_csv, lags=[0, 1], lag_values=True, **REQUEST)
    events = pd.read_csv(events_csv, dtype=str)
    assert table["event_id"].tolist() == events["id"].tolist()
    assert "prior_year__prcp_total_lag1" in table.columns and "tri3__tmean_z" in table.columns
    assert table.attrs["provenance"]["request"]["events"]["count"] == len(events)
    survey = events.merge(table, left_on="id", right_on="event_id", validate="one_to_one")
    assert len(survey) == len(events)


def test_job_with_events_and_variants(client: Client, five: dict, events_csv: Path) -> None:
    variants = [{"name": "main"}, {"name": "recent", "baseline": {"start": 2001, "end": 2020}}]
    job = client.submit(five, events=events_csv, variants=variants, layout="long", **REQUEST)
    table = job.wait(progress=False).result()
    n_events = len(pd.read_csv(events_csv))
    assert len(table) == n_events * 2 * 2 * 2  # events x windows x indicators x variants
    assert table.columns[:4].tolist() == ["event_id", "feature_id", "date", "variant"]
    provenance = table.attrs["provenance"]
    assert [v["name"] for v in provenance["variants"]] == ["main", "recent"]
    on_demand = client.indicators(five, events=events_csv, variants=variants, layout="long", **REQUEST)
    pd.testing.assert_frame_equal(table, on_demand, check_like=False)


def test_api_refuses_events_with_years(live_server, five: dict) -> None:  # noqa: F811
    body = {
        "features": five,
        "events": [{"id": "e1", "feature_id": five["features"][0]["id"], "date": "2004-05-01"}],
        "years": {"start": 2000, "end": 2004},
        **REQUEST,
    }
    with live_server.client() as http:
        answer = http.post("/v1/indicators", json=body)
        assert answer.status_code == 422
        assert answer.json()["pointer"] == "/years"
        job = http.post("/v1/jobs", json=body)
        assert job.status_code == 422
        late = {
            **body,
            "events": [{"id": "e1", "feature_id": five["features"][0]["id"], "date": "2050-05-01"}],
        }
        late.pop("years")
        refused = http.post("/v1/jobs", json=late)  # refused at submission, not when the job runs
        assert refused.status_code == 422 and refused.json()["pointer"] == "/events/0/date"
        pictured = http.post("/v1/plots/map", json={**late, "events": body["events"]})
        assert pictured.status_code == 422 and pictured.json()["pointer"] == "/events"


def test_command_line_compute_with_an_events_file(
    tiny_demo: Path, five: dict, events_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    request = tmp_path / "request.json"
    request.write_text(json.dumps({"features": five, **REQUEST}), encoding="utf-8")
    out = tmp_path / "exposure.parquet"
    code = wxshock(
        [
            "compute",
            "--store",
            str(tiny_demo),
            "--request",
            str(request),
            "--events",
            str(events_csv),
            "--out",
            str(out),
            "--quiet",
        ]
    )
    assert code == 0
    data = out.read_bytes()
    table = pd.read_parquet(io.BytesIO(data))
    assert table["event_id"].tolist() == pd.read_csv(events_csv, dtype=str)["id"].tolist()
    assert read_parquet_provenance(data)["provenance"]["request"]["windows"][0]["name"] == "prior_year"


def test_command_line_submit_with_an_events_file(
    live_server,  # noqa: F811
    five: dict,
    events_csv: Path,
    tmp_path: Path,  # noqa: F811
) -> None:
    request = tmp_path / "request.json"
    request.write_text(json.dumps({**REQUEST, "variants": [{"name": "main"}]}), encoding="utf-8")
    (tmp_path / "five.geojson").write_text(json.dumps(five), encoding="utf-8")
    out = tmp_path / "exposure.csv"
    code = wxshock(
        [
            "submit",
            "--server",
            live_server.base_url,
            "--request",
            str(request),
            "--features",
            str(tmp_path / "five.geojson"),
            "--events",
            str(events_csv),
            "--out",
            str(out),
            "--quiet",
        ]
    )
    assert code == 0
    table = pd.read_csv(out, dtype={"event_id": str})
    assert table["event_id"].tolist() == pd.read_csv(events_csv, dtype=str)["id"].tolist()
    assert "main__prior_year__prcp_total_z" in table.columns
    sidecar = json.loads(out.with_name(out.name + ".provenance.json").read_text())
    assert "main=demo@sha256:" in json.dumps(sidecar)


# --- a variant naming another served dataset ----------------------------------------------------------------


@pytest.fixture(scope="module")
def two_products(tiny_demo: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Any, Path]]:
    """A server serving the tiny demo ('demo') and a warmer western product ('west'), and west's path."""
    from service.settings import Settings
    from tests._support_server import thread_server

    west = write_west_product(tmp_path_factory.mktemp("west") / "west.zarr")
    settings = Settings(
        stores=[str(tiny_demo), str(west)], data_dir=tmp_path_factory.mktemp("two-data"), threads=2
    )
    with thread_server(settings) as server:
        yield server, west


def test_a_variant_on_another_dataset_through_api_jobs_client_and_command(
    two_products: tuple[Any, Path], tiny_demo: Path, tiny_communities: dict, tmp_path: Path
) -> None:
    """Events with a variant on another product: the API (on demand 'fail', jobs 'skip' for a community
    outside that product's grid), the Python client and `wxshock compute --store A --store B` agree."""
    server, west_path = two_products
    inside = west_communities(tiny_communities, count=2)
    outside = easternmost_community(tiny_communities)
    some = {**inside, "features": [*inside["features"], outside]}
    events = [
        {"id": f"ev-{k}", "feature_id": str(f["id"]), "date": "2010-06-15"}
        for k, f in enumerate(some["features"])
    ]
    variants = [{"name": "demo"}, {"name": "west", "dataset": "west"}]
    body = {"features": some, "events": events, "variants": variants, **REQUEST}
    with server.client() as http:  # on demand, invalid_features defaults to 'fail': one 422 names the variant
        refused = http.post("/v1/indicators", json=body)
    assert refused.status_code == 422, refused.text
    assert "variant 'west'" in refused.json()["detail"] and str(outside["id"]) in refused.text
    with Client(server.base_url) as client:
        job = client.submit(some, events=events, variants=variants, **REQUEST)  # jobs skip by default
        table = job.wait(progress=False).result()
        alone = client.indicators(inside, events=events[:2], dataset="west", **REQUEST)
    provenance = table.attrs["provenance"]
    entries = {v["name"]: v for v in provenance["variants"]}
    assert entries["west"]["dataset"] == "west" and entries["demo"]["dataset"] == "demo"
    assert entries["west"]["fingerprint"] != entries["demo"]["fingerprint"]
    skipped = entries["west"]["request"]["features"]["skipped"]
    assert [s["feature_id"] for s in skipped] == [str(outside["id"])]
    assert not entries["demo"]["request"]["features"]["skipped"]
    last = table[table["event_id"] == "ev-2"].iloc[0]
    assert pd.isna(last["west__prior_year__tmean"]) and pd.notna(last["demo__prior_year__tmean"])
    assert last["west__notes"] == "feature_skipped"
    first_two = table[table["event_id"].isin(["ev-0", "ev-1"])]
    assert first_two["west__prior_year__tmean"].tolist() == alone["prior_year__tmean"].tolist()
    assert (first_two["west__prior_year__tmean"] > first_two["demo__prior_year__tmean"]).all()  # warmer
    # the command: one --store per dataset, the first the request's own
    request = tmp_path / "request.json"
    request.write_text(
        json.dumps({"features": inside, "events": events[:2], "variants": variants, **REQUEST}),
        encoding="utf-8",
    )
    out = tmp_path / "sweep.parquet"
    command = ["compute", "--store", str(tiny_demo), "--store", str(west_path), "--request", str(request)]
    assert wxshock([*command, "--out", str(out), "--quiet"]) == 0
    from_command = pd.read_parquet(out)
    assert from_command["west__prior_year__tmean"].tolist() == alone["prior_year__tmean"].tolist()
    assert from_command["demo__tri3__prcp_total"].tolist() == first_two["demo__tri3__prcp_total"].tolist()
