"""The Python client against a real server on 127.0.0.1: every input form, jobs, errors, retries, `submit`."""

from __future__ import annotations

import json
import os
import socket
import stat
import threading
from collections.abc import Iterator
from pathlib import Path

import geopandas
import pandas as pd
import pytest

from service.cli import main as wxshock
from service.client import (
    Client,
    JobFailedError,
    ServerError,
    ServerUnreachableError,
    features_document,
)
from service.encode import read_parquet_provenance
from service.errors import RequestError, RequestValidationFailed
from service.settings import Settings
from tests._support_server import free_port, live_server, thread_server  # noqa: F401 - fixture

REQUEST = {
    "baseline": {"start": 1981, "end": 1990},
    "years": {"start": 1991, "end": 2010},
    "lags": [0, 1],
    "indicators": ["prcp_total", "tmean"],
}


@pytest.fixture(scope="module")
def five(tiny_communities: dict) -> dict:
    """The first five demo communities."""
    return {"type": "FeatureCollection", "features": tiny_communities["features"][:5]}


@pytest.fixture(scope="module")
def client(live_server) -> Iterator[Client]:  # noqa: F811
    """A client of the shared tiny-demo server."""
    with Client(live_server.base_url) as c:
        yield c


@pytest.fixture(scope="module")
def reference(client: Client, five: dict) -> pd.DataFrame:
    """The five communities' table from a GeoJSON dict: what every other input form must give."""
    return client.indicators(five, **REQUEST)


def _same(frame: pd.DataFrame, reference: pd.DataFrame, rtol: float = 1e-9) -> None:
    """Equal tables: same rows and columns, numbers equal within rtol."""
    pd.testing.assert_frame_equal(
        frame.reset_index(drop=True),
        reference.reset_index(drop=True),
        check_exact=False,
        rtol=rtol,
        check_dtype=False,
    )


def test_indicators_returns_the_table_with_provenance(
    client: Client,
    reference: pd.DataFrame,
    five: dict,
    live_server,  # noqa: F811
) -> None:
    ids = [f["id"] for f in five["features"]]
    assert reference["feature_id"].unique().tolist() == ids
    assert sorted(reference["year"].unique().tolist()) == list(range(1991, 2011))
    assert len(reference) == 5 * 20
    for column in ("prcp_total_z", "tmean_z_lag1", "prcp_total_class", "coverage"):
        assert column in reference.columns
    provenance = reference.attrs["provenance"]
    assert provenance["dataset"] == "demo"
    assert provenance["request"]["baseline"] == {"start": 1981, "end": 1990}
    # The same request as JSON, straight over HTTP: same provenance, same numbers.
    with live_server.client() as http:
        document = http.post(
            "/v1/indicators", json=REQUEST | {"features": five}, params={"format": "json"}
        ).json()
    assert document["provenance"] == provenance
    from_json = pd.DataFrame(document["rows"], columns=document["columns"])
    assert from_json["prcp_total_z"].round(6).tolist() == reference["prcp_total_z"].round(6).tolist()


def test_every_input_form_gives_the_same_table(
    client: Client, reference: pd.DataFrame, five: dict, tmp_path: Path
) -> None:
    geojson = tmp_path / "five.geojson"
    geojson.write_text(json.dumps(five), encoding="utf-8")
    _same(client.indicators(geojson, **REQUEST), reference)
    _same(client.indicators(str(geojson), **REQUEST), reference)

    frame = geopandas.GeoDataFrame.from_features(five["features"], crs="EPSG:4326")
    frame.insert(0, "feature_id", [f["id"] for f in five["features"]])
    _same(client.indicators(frame, **REQUEST), reference)
    for suffix, driver in ((".gpkg", "GPKG"), (".shp", "ESRI Shapefile")):
        path = tmp_path / f"five{suffix}"
        frame.to_file(path, driver=driver)
        _same(client.indicators(path, id_column="feature_id", **REQUEST), reference)
        _same(client.indicators(path, **REQUEST), reference)  # 'feature_id' is found without being named

    # A projected GeoDataFrame goes with its CRS; the server reprojects (straight edges in the projection
    # differ from straight edges in lon/lat by metres, so the weights differ slightly).
    projected = frame.to_crs("EPSG:32724")
    body, crs = features_document(projected)
    assert crs == "EPSG:32724" and body["features"][0]["id"] == five["features"][0]["id"]
    _same(client.indicators(projected, **REQUEST), reference, rtol=1e-3)


def test_shorthands_match_the_request_schema(client: Client, reference: pd.DataFrame, five: dict) -> None:
    table = client.indicators(
        five, baseline=(1981, 1990), years=(1991, 2010), lags=(0, 1), indicators=["prcp_total", "tmean"]
    )
    _same(table, reference)


def test_a_large_input_goes_as_a_job(live_server, five: dict, reference: pd.DataFrame) -> None:  # noqa: F811
    with Client(live_server.base_url, on_demand_features=3) as small:
        table = small.indicators(five, progress=False, **REQUEST)
        assert "job_id" in table.attrs
        assert small.job(table.attrs["job_id"]).state == "succeeded"
    _same(table, reference)
    assert table.attrs["provenance"]["request_hash"] == reference.attrs["provenance"]["request_hash"]


def test_submit_wait_result_with_a_progress_bar(
    client: Client, five: dict, reference: pd.DataFrame, capsys: pytest.CaptureFixture[str]
) -> None:
    seen: list[dict] = []
    job = client.submit(five, **REQUEST)
    assert job.state in ("queued", "running", "succeeded")
    job.wait(progress=True, poll=0.1, on_status=seen.append)
    assert job.state == "succeeded" and seen[-1]["features_done"] == 5
    bar = capsys.readouterr().err
    assert f"job {job.id[:8]}" in bar and "5/5" in bar and "feature" in bar
    _same(job.result(), reference)
    csv_job = client.submit(five, format="csv", **REQUEST).wait(progress=False)
    from_csv = csv_job.result()
    assert from_csv["prcp_total_z"].round(6).tolist() == reference["prcp_total_z"].round(6).tolist()
    assert from_csv.attrs["provenance"]["fingerprint"] == reference.attrs["provenance"]["fingerprint"]
    with pytest.raises(ServerError, match="409") as failure:
        job.cancel()  # a finished job cannot be cancelled
    assert failure.value.status == 409


def test_a_cancelled_job_raises_with_its_problem(client: Client, tiny_communities: dict) -> None:
    # One job worker: the second job waits in the queue behind the first, so it can be cancelled there.
    client.submit(tiny_communities, **REQUEST)
    queued = client.submit(tiny_communities, **(REQUEST | {"lags": [0]}))
    try:
        queued.cancel()
    except ServerError as exc:
        assert exc.status == 409
        pytest.skip("the second job finished before it could be cancelled; the machine was fast")
    with pytest.raises(JobFailedError, match="cancelled") as failure:
        queued.wait(progress=False, poll=0.1)
    assert queued.state == "cancelled" and failure.value.status == 409


@pytest.mark.parametrize(
    ("request_fields", "status", "pointer", "message"),
    [
        ({"baseline": {"start": 1900, "end": 1910}}, 422, None, "baseline 1900-1910 is outside"),
        ({"dataset": "elsewhere"}, 404, "/dataset", "unknown dataset 'elsewhere'"),
        ({"indicators": ["rainfall_total"]}, 422, None, "unknown indicator 'rainfall_total'"),
    ],
)
def test_server_errors_carry_the_problem_document(
    client: Client, five: dict, request_fields: dict, status: int, pointer: str | None, message: str
) -> None:
    with pytest.raises(ServerError) as failure:
        client.indicators(five, **(REQUEST | request_fields))
    error = failure.value
    assert error.status == status
    assert message in error.server_detail
    assert error.problem()["status"] == status and error.problem()["type"].startswith("tag:wxshock")
    if pointer is not None:
        assert error.pointer == pointer


@pytest.mark.parametrize(
    ("features", "fields", "error", "message"),
    [
        ("nowhere.geojson", {}, RequestError, "does not exist"),
        ({"type": "Polygon", "coordinates": []}, {}, RequestError, "give a GeoJSON FeatureCollection"),
        (42, {}, RequestError, "features of type 'int' are not understood"),
        (None, {"lagz": [1]}, RequestValidationFailed, "lagz"),
        (None, {"baseline": (1990, 1981)}, RequestValidationFailed, "after its end"),
    ],
)
def test_bad_input_fails_before_anything_is_sent(
    five: dict, features: object, fields: dict, error: type, message: str
) -> None:
    with Client(f"http://127.0.0.1:{free_port()}", retries=0) as nowhere, pytest.raises(error, match=message):
        nowhere.indicators(five if features is None else features, **fields)


def test_a_geodataframe_needs_unique_ids(five: dict) -> None:
    frame = geopandas.GeoDataFrame.from_features(five["features"], crs="EPSG:4326")
    with pytest.raises(RequestError, match="has no id column"):
        features_document(frame)
    frame["feature_id"] = ["a", "a", "b", "c", "d"]
    with pytest.raises(RequestError, match=r"repeated: \['a'\]"):
        features_document(frame)


def test_bearer_token(tiny_demo: Path, tmp_path: Path, five: dict, monkeypatch: pytest.MonkeyPatch) -> None:
    settings = Settings(stores=[str(tiny_demo)], data_dir=tmp_path, tokens=["s3cret-token-0123456"])
    with thread_server(settings) as server:
        with Client(server.base_url) as anonymous, pytest.raises(ServerError) as failure:
            anonymous.datasets()
        assert failure.value.status == 401
        with Client(server.base_url, token="s3cret-token-0123456") as member:
            assert member.datasets()[0]["name"] == "demo"
        monkeypatch.setenv("WXSHOCK_TOKEN", "s3cret-token-0123456")  # as `wxshock submit` documents
        with Client(server.base_url) as from_environment:
            assert from_environment.datasets()[0]["name"] == "demo"


class _FlakyServer:
    """A raw TCP server on 127.0.0.1: drops the first ``drops`` connections unanswered, then answers ``reply``."""

    def __init__(self, drops: int, reply: bytes) -> None:
        self.drops = drops
        self.reply = reply
        self.connections = 0
        self._socket = socket.create_server(("127.0.0.1", 0))
        self.url = f"http://127.0.0.1:{self._socket.getsockname()[1]}"
        self._thread = threading.Thread(target=self._serve, daemon=True)
        self._thread.start()

    def _serve(self) -> None:
        while True:
            try:
                connection, _ = self._socket.accept()
            except OSError:
                return
            with connection:
                self.connections += 1
                connection.recv(65536)
                if self.connections > self.drops:
                    connection.sendall(self.reply)

    def close(self) -> None:
        self._socket.close()


def _http(status: str, body: dict, media: str = "application/json") -> bytes:
    """A whole HTTP/1.1 response."""
    data = json.dumps(body).encode()
    head = f"HTTP/1.1 {status}\r\nContent-Type: {media}\r\nContent-Length: {len(data)}\r\nConnection: close\r\n\r\n"
    return head.encode() + data


def test_connection_errors_are_retried() -> None:
    server = _FlakyServer(drops=2, reply=_http("200 OK", {"status": "ok", "version": "x"}))
    try:
        with Client(server.url, retries=3, backoff=0.01) as c:
            assert c.health()["status"] == "ok"
        assert server.connections == 3
    finally:
        server.close()


def test_user_mistakes_are_never_retried() -> None:
    problem = {
        "type": "tag:wxshock,2026:problem/invalid-request",
        "title": "Invalid request",
        "status": 422,
        "detail": "lag -1 is negative",
        "pointer": "/lags/0",
    }
    server = _FlakyServer(
        drops=0, reply=_http("422 Unprocessable Entity", problem, "application/problem+json")
    )
    try:
        with Client(server.url, retries=3, backoff=0.01) as c, pytest.raises(ServerError) as failure:
            c.health()
        assert server.connections == 1
        assert failure.value.pointer == "/lags/0" and failure.value.server_detail == "lag -1 is negative"
        assert "(at /lags/0)" in str(failure.value)
    finally:
        server.close()


def test_no_server_is_a_clear_error() -> None:
    with Client(f"http://127.0.0.1:{free_port()}", retries=1, backoff=0.01) as c:
        with pytest.raises(ServerUnreachableError, match="no answer after 2 attempts"):
            c.health()
    with pytest.raises(RequestError, match="must start with http"):
        Client("127.0.0.1:8000")


def test_wxshock_submit_writes_the_same_bytes_as_wxshock_compute(
    live_server,  # noqa: F811
    tiny_demo: Path,
    five: dict,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],  # noqa: F811
) -> None:
    request = tmp_path / "request.json"
    request.write_text(json.dumps(REQUEST), encoding="utf-8")
    features = tmp_path / "five.geojson"
    features.write_text(json.dumps(five), encoding="utf-8")
    submitted = tmp_path / "submitted.parquet"
    args = ["--request", str(request), "--features", str(features)]
    assert wxshock(["submit", "--server", live_server.base_url, *args, "--out", str(submitted)]) == 0
    printed = capsys.readouterr()
    assert "accepted (5 features)" in printed.out and "5/5" in printed.err
    computed = tmp_path / "computed.parquet"
    assert wxshock(["compute", "--store", str(tiny_demo), *args, "--out", str(computed), "--quiet"]) == 0
    assert submitted.read_bytes() == computed.read_bytes()
    umask = os.umask(0)
    os.umask(umask)
    for written in (submitted, computed):  # result files follow the umask (not mkstemp's 0600)
        assert stat.S_IMODE(written.stat().st_mode) == 0o666 & ~umask

    as_csv = tmp_path / "submitted.csv"
    assert wxshock(["submit", "--server", live_server.base_url, *args, "--out", str(as_csv), "--quiet"]) == 0
    sidecar = json.loads((tmp_path / "submitted.csv.provenance.json").read_text())
    parquet_provenance = read_parquet_provenance(submitted.read_bytes())["provenance"]
    assert sidecar["provenance"]["fingerprint"] == parquet_provenance["fingerprint"]
    assert sidecar["provenance"]["request_hash"] == parquet_provenance["request_hash"]
    assert len(pd.read_csv(as_csv)) == 100


def test_wxshock_submit_reports_a_bad_request(live_server, tmp_path: Path, capsys) -> None:  # noqa: F811
    request = tmp_path / "request.json"
    request.write_text(json.dumps(REQUEST | {"lags": [-1]}), encoding="utf-8")
    code = wxshock(
        [
            "submit",
            "--server",
            live_server.base_url,
            "--request",
            str(request),
            "--out",
            str(tmp_path / "x.parquet"),
        ]
    )
    assert code == 2
    assert "has no 'features'" in capsys.readouterr().err


def test_client_is_importable_from_the_package() -> None:
    import service

    assert service.Client is Client


EXAMPLES = Path(__file__).resolve().parent.parent / "examples" / "python"


def test_the_python_examples_run(live_server, tiny_demo: Path, tmp_path: Path) -> None:  # noqa: F811
    import subprocess
    import sys

    communities = str(tiny_demo.parent / "communities.geojson")
    quick = subprocess.run(
        [sys.executable, str(EXAMPLES / "quickstart.py"), live_server.base_url, communities],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert quick.returncode == 0, quick.stderr
    assert quick.stdout.startswith("(1860, 28) sha256:")  # 28 with the notes column (issue 10)
    assert "qu-007  2005" in quick.stdout
    batch = subprocess.run(
        [
            sys.executable,
            str(EXAMPLES / "batch_and_pictures.py"),
            live_server.base_url,
            communities,
            str(tmp_path),
        ],
        capture_output=True,
        text=True,
        timeout=180,
    )
    assert batch.returncode == 0, batch.stderr
    assert "62 communities" in batch.stdout and "62/62" in batch.stderr
    assert len(pd.read_parquet(tmp_path / "shocks.parquet")) > 0
    for name in ("series.png", "map.png"):
        assert (tmp_path / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_daily_series_as_a_frame(client: Client, five: dict) -> None:
    one = {"type": "FeatureCollection", "features": five["features"][:2]}
    daily = client.series(one, years=(2000, 2001), variables=["prcp", "tmean"])
    assert list(daily.columns) == ["feature_id", "date", "prcp", "tmean"]
    assert len(daily) == 2 * 731  # 2000 is a leap year in the standard calendar
    assert daily["date"].iloc[0] == "2000-01-01" and daily["date"].iloc[-1] == "2001-12-31"
    assert daily.attrs["provenance"]["dataset"] == "demo"
    # A season total from the daily series equals the table's (the table's floats are rounded to 1e-6).
    table = client.indicators(one, baseline=(1981, 1990), years=(2000, 2000), indicators=["prcp_total"])
    first = five["features"][0]["id"]
    total = daily[(daily["feature_id"] == first) & daily["date"].str.startswith("2000")]["prcp"].sum()
    assert table.loc[table["feature_id"] == first, "prcp_total"].item() == pytest.approx(total, abs=1e-5)


def test_wxshock_submit_lists_skipped_features_beside_a_csv(
    live_server,  # noqa: F811
    five: dict,
    tmp_path: Path,
) -> None:
    # A batch that loses a feature keeps the others; the CSV's sidecar says which one and why (issue 12).
    features = json.loads(json.dumps(five))
    lost = features["features"][2]
    lost["geometry"] = {"type": "Polygon", "coordinates": [[[10, 10], [10.1, 10], [10.1, 10.1], [10, 10]]]}
    request = tmp_path / "request.json"
    request.write_text(json.dumps(REQUEST), encoding="utf-8")
    path = tmp_path / "five.geojson"
    path.write_text(json.dumps(features), encoding="utf-8")
    out = tmp_path / "batch.csv"
    args = ["submit", "--server", live_server.base_url, "--request", str(request), "--features", str(path)]
    assert wxshock([*args, "--out", str(out), "--quiet"]) == 0
    sidecar = json.loads((tmp_path / "batch.csv.provenance.json").read_text())
    assert [(s["feature_id"], s["code"]) for s in sidecar["skipped_features"]] == [
        (str(lost["id"]), "outside_grid")
    ]
    table = pd.read_csv(out)
    assert set(table["feature_id"].astype(str)) == {str(f["id"]) for f in features["features"]}
    assert table.loc[table["feature_id"].astype(str) == str(lost["id"]), "notes"].eq("feature_skipped").all()
