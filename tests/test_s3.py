"""Stores on S3-compatible object storage (moto's server on 127.0.0.1): same values as from disk, no leaked keys."""

from __future__ import annotations

import io
import json
import logging
import pickle
from pathlib import Path

import numpy as np
import pytest

from service import cluster
from service.aggregate import aggregate
from service.errors import StoreError, problem_for
from service.geometry import compute_weights, parse_features
from service.settings import Settings
from service.store import open_store, write_store
from tests import _support_cluster as support
from tests._support_cluster import DaskProcesses, S3Server
from tests._support_store import make_dataset

s3_server = support.s3_server  # session fixtures, used by name below
dask_cluster = support.dask_cluster

pytestmark = [pytest.mark.s3, pytest.mark.timeout(120)]

WHOLE = (slice(None), slice(None), slice(None))


@pytest.fixture(scope="module")
def dataset():
    """A small geographic grid over two years with a water cell and a population layer."""
    return make_dataset(ny=8, nx=7, years=(2000, 2001), missing_cells=[(0, 0)], seed=11)


@pytest.fixture(scope="module")
def pair(dataset, s3_server: S3Server, tmp_path_factory: pytest.TempPathFactory):
    """The same Dataset written to disk and to s3://bucket/.../grid.zarr: (local store, s3 store, logs).

    ``logs`` is everything logged (DEBUG and up, botocore and s3fs included) while the S3 store was written,
    opened and read, as (level name, message) lines.
    """
    local_path = tmp_path_factory.mktemp("s3-pair") / "grid.zarr"
    local_fingerprint = write_store(dataset, local_path)
    url = f"s3://{s3_server.bucket}/round-trip/grid.zarr"
    logs = io.StringIO()
    handler = logging.StreamHandler(logs)
    handler.setFormatter(logging.Formatter("%(levelname)s %(name)s %(message)s"))
    root = logging.getLogger()
    level = root.level
    root.addHandler(handler)
    root.setLevel(logging.DEBUG)
    try:
        s3_fingerprint = write_store(dataset, url, storage_options=s3_server.storage_options())
        remote = open_store(url, storage_options=s3_server.storage_options())
        remote.read("tmax", *WHOLE)
    finally:
        root.removeHandler(handler)
        root.setLevel(level)
    local = open_store(local_path)
    assert local_fingerprint == s3_fingerprint
    return local, remote, logs.getvalue()


def _secrets(s3_server: S3Server) -> tuple[str, str]:
    return s3_server.access_key_id, s3_server.secret_access_key


def test_store_on_s3_reads_the_same_as_from_disk(pair) -> None:
    local, remote, _ = pair
    assert remote.fingerprint == local.fingerprint
    assert remote.name == local.name == "grid"
    assert remote.grid == local.grid and remote.calendar == local.calendar
    for variable in local.variables:
        a, b = local.read(variable, *WHOLE), remote.read(variable, *WHOLE)
        assert a.tobytes() == b.tobytes(), variable  # NaN bit patterns included
        assert np.isnan(b[0, 0]).all()  # the water cell stays missing
        assert local.read_raw(variable, *WHOLE).tobytes() == remote.read_raw(variable, *WHOLE).tobytes()
    for layer in local.layers:
        assert local.read_layer(layer).tobytes() == remote.read_layer(layer).tobytes()
    np.testing.assert_array_equal(local.data_mask(), remote.data_mask())
    local_description, remote_description = local.describe(), remote.describe()
    assert remote_description.pop("location") == "s3://wxshock-stores/round-trip/grid.zarr"
    local_description.pop("location")
    assert remote_description == local_description


def test_store_on_s3_reopens_after_pickling_as_a_worker_does(pair) -> None:
    _, remote, _ = pair
    copy = pickle.loads(pickle.dumps(remote))
    window = (slice(2, 5), slice(1, 4), slice(300, 400))
    assert copy.read("prcp", *window).tobytes() == remote.read("prcp", *window).tobytes()


def test_credentials_never_in_repr_or_description(pair, s3_server: S3Server) -> None:
    _, remote, _ = pair
    text = repr(remote) + str(remote) + json.dumps(remote.describe(), default=str)
    for secret in _secrets(s3_server):
        assert secret not in text


@pytest.mark.parametrize("case", ["missing store", "missing bucket", "not a store"])
def test_credentials_never_in_store_errors_or_problem_documents(
    case: str, s3_server: S3Server, caplog: pytest.LogCaptureFixture
) -> None:
    import s3fs

    options = s3_server.storage_options()
    if case == "not a store":
        fs = s3fs.S3FileSystem(**options, skip_instance_cache=True)
        fs.pipe(f"{s3_server.bucket}/junk/grid.zarr/readme.txt", b"not zarr")
    url = {
        "missing store": f"s3://{s3_server.bucket}/nowhere/grid.zarr",
        "missing bucket": "s3://no-such-bucket/grid.zarr",
        "not a store": f"s3://{s3_server.bucket}/junk/grid.zarr",
    }[case]
    with caplog.at_level(logging.DEBUG):
        with pytest.raises(StoreError) as caught:
            open_store(url, storage_options=options)
    status, document = problem_for(caught.value, instance="/v1/datasets/grid")
    assert status == 503 and url in document["detail"]
    everything = json.dumps(document) + str(caught.value) + repr(caught.value.__cause__)
    for secret in _secrets(s3_server):
        assert secret not in everything
    # Not even botocore's DEBUG log has the secret key (requests are signed with a key derived from it).
    assert s3_server.secret_access_key not in caplog.text


def test_logs_hold_no_credentials(pair, s3_server: S3Server) -> None:
    _, _, logs = pair
    lines = logs.splitlines()
    assert any(" botocore" in line for line in lines)  # the capture did see the S3 client's own log
    # The secret key never appears, at any level (requests are signed with a key derived from it).
    assert s3_server.secret_access_key not in logs
    # Above DEBUG nothing names the key id either (botocore's DEBUG request dumps may carry it in the
    # Authorization header; the service never logs below INFO unless told to).
    above_debug = "\n".join(line for line in lines if not line.startswith("DEBUG "))
    assert s3_server.access_key_id not in above_debug


def test_settings_give_the_storage_options_of_the_server(pair, s3_server: S3Server) -> None:
    _, remote, _ = pair
    settings = Settings(**s3_server.settings_env())
    reopened = open_store(remote.location, storage_options=settings.storage_options())
    assert reopened.fingerprint == remote.fingerprint
    for secret in _secrets(s3_server):
        assert secret not in repr(settings) and secret not in settings.model_dump_json()


@pytest.mark.cluster
def test_cluster_aggregates_an_s3_store_like_threads_on_disk(
    pair, s3_server: S3Server, dask_cluster: DaskProcesses
) -> None:
    local, remote, _ = pair
    features = {
        "type": "FeatureCollection",
        "features": [
            {
                "type": "Feature",
                "id": f"c-{i}",
                "properties": {},
                "geometry": {
                    "type": "Polygon",
                    "coordinates": [[[x, y], [x + 1.2, y], [x + 1.2, y + 0.9], [x, y + 0.9], [x, y]]],
                },
            }
            for i, (x, y) in enumerate([(-149.8, -39.9), (-148.6, -38.7), (-147.9, -37.1)])
        ],
    }
    parsed = parse_features(features)
    weights = compute_weights(parsed, local.grid, data_mask=local.data_mask())
    (on_disk,) = cluster.compute(aggregate(local, weights), settings=Settings(threads=2))
    (on_cluster,) = cluster.compute(
        aggregate(remote, weights), settings=Settings(scheduler=dask_cluster.address)
    )
    for variable in ("tmax", "tmin", "prcp"):
        assert on_cluster[variable].values.tobytes() == on_disk[variable].values.tobytes(), variable
    # The workers got the credentials inside the pickled Store, but wrote them to no log.
    for secret in _secrets(s3_server):
        assert secret not in dask_cluster.logs()
    assert Path(s3_server.log_path).exists()


# --- wxshock ingest --out s3://... ---------------------------------------------------------------------------------


def _netcdf(path: Path, years: tuple[int, int], seed: int) -> Path:
    """A CF NetCDF file of daily tmax, tmin (degC) and prcp (mm/day) on a small grid."""
    ds = make_dataset(ny=5, nx=4, years=years, layers=(), seed=seed)
    ds["tmax"].attrs.update(units="degC", standard_name="air_temperature", cell_methods="time: maximum")
    ds["tmin"].attrs.update(units="degC", standard_name="air_temperature", cell_methods="time: minimum")
    ds["prcp"].attrs.update(units="mm/day", standard_name="lwe_precipitation_rate")
    ds.to_netcdf(path)
    return path


def test_cli_ingest_writes_and_appends_to_s3_like_to_disk(
    s3_server: S3Server, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture
) -> None:
    from service.cli import main

    first = _netcdf(tmp_path / "first.nc", (2000, 2001), seed=3)
    later = _netcdf(tmp_path / "later.nc", (2002, 2002), seed=4)
    for name, value in s3_server.settings_env().items():
        monkeypatch.setenv("WXSHOCK_" + name.upper(), value)
    url = f"s3://{s3_server.bucket}/ingested/grid.zarr"
    local = tmp_path / "grid.zarr"
    for out in (url, str(local)):
        assert main(["ingest", str(first), "--out", out, "--quiet"]) == 0
        assert main(["ingest", str(later), "--out", out, "--quiet"]) == 0  # appended: the days that follow
    printed = capsys.readouterr()
    remote = open_store(url, storage_options=s3_server.storage_options())
    on_disk = open_store(local)
    assert remote.fingerprint == on_disk.fingerprint and remote.fingerprint in printed.out
    assert (int(remote.dates.year[0]), int(remote.dates.year[-1])) == (2000, 2002)
    for variable in ("tmax", "tmin", "prcp"):
        assert remote.read(variable, *WHOLE).tobytes() == on_disk.read(variable, *WHOLE).tobytes()
    for secret in _secrets(s3_server):
        assert secret not in printed.out + printed.err


def test_a_layout1_store_on_s3_migrates_like_one_on_disk(s3_server: S3Server, tmp_path: Path) -> None:
    """An object store has no hard links: the layout-1 store is rewritten aside in its own chunking, and gives the
    store (and fingerprint) that the migration on disk gives."""
    import shutil

    import s3fs

    from service.store import migrate_store

    source = Path(__file__).parent / "data" / "store_layout1.zarr"
    local = tmp_path / "old.zarr"
    shutil.copytree(source, local)
    fs = s3fs.S3FileSystem(**s3_server.storage_options(), skip_instance_cache=True)
    key = f"{s3_server.bucket}/layout1/old.zarr"
    fs.put(str(source), key, recursive=True)
    url, options = f"s3://{key}", s3_server.storage_options()
    old = open_store(url, storage_options=options)
    assert old.layout_version == 1
    fingerprint = migrate_store(url, storage_options=options)
    assert fingerprint == migrate_store(local)
    remote, on_disk = open_store(url, storage_options=options), open_store(local)
    assert remote.layout_version == 2 and remote.migrated_from == on_disk.migrated_from
    assert remote.migrated_from["fingerprint"] == old.fingerprint
    assert remote._var_arrays["prcp"].chunks == old._var_arrays["prcp"].chunks  # the chunking is kept
    for variable in old.variables:
        assert remote.read(variable, *WHOLE).tobytes() == on_disk.read(variable, *WHOLE).tobytes()


# --- served through the API --------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def demo_on_s3(tiny_demo: Path, s3_server: S3Server) -> str:
    """The tiny demo store copied object for object into the bucket (write_store to S3 is tested above)."""
    import s3fs

    fs = s3fs.S3FileSystem(**s3_server.storage_options(), skip_instance_cache=True)
    key = f"{s3_server.bucket}/served/demo.zarr"
    fs.put(str(tiny_demo), key, recursive=True)
    return f"s3://{key}"


def _request(features: dict) -> dict:
    return {
        "dataset": "demo",
        "features": dict(features, features=features["features"][:10]),
        "years": {"start": 1995, "end": 2010},
        "season": {"months": [6, 7, 8]},
        "baseline": {"start": 1980, "end": 1994},
        "indicators": ["prcp_total", "tmean", "wet_days"],
        "lags": [0, 1],
    }


def test_store_on_s3_is_served_with_the_same_answers_as_from_disk(
    tiny_demo: Path,
    demo_on_s3: str,
    s3_server: S3Server,
    tiny_communities: dict,
    tmp_path: Path,
    caplog: pytest.LogCaptureFixture,
) -> None:
    from tests._support_server import thread_server

    on_disk = Settings(stores=[str(tiny_demo)], data_dir=tmp_path / "disk", threads=2)
    on_s3 = Settings(stores=[demo_on_s3], data_dir=tmp_path / "s3", threads=2, **s3_server.settings_env())
    body = _request(tiny_communities)
    answers = []
    with caplog.at_level(logging.INFO):
        for settings in (on_disk, on_s3):
            with thread_server(settings) as server, server.client() as client:
                dataset = client.get("/v1/datasets/demo")
                assert dataset.status_code == 200, dataset.text
                description = dataset.json()
                description.pop("location", None)
                table = client.post("/v1/indicators", params={"format": "csv"}, json=body)
                assert table.status_code == 200, table.text
                problem = client.post("/v1/indicators", json=dict(body, years={"start": 1900, "end": 1910}))
                assert problem.status_code == 422
                answers.append(
                    (description, table.content, table.headers["x-wxshock-fingerprint"], problem.text)
                )
                listing = client.get("/v1/datasets").text
    (
        (disk_description, disk_table, disk_fingerprint, _),
        (s3_description, s3_table, s3_fingerprint, s3_problem),
    ) = answers
    assert s3_description == disk_description
    assert s3_fingerprint == disk_fingerprint
    assert s3_table == disk_table
    for secret in _secrets(s3_server):
        assert secret not in listing + json.dumps(s3_description) + s3_problem
        assert secret not in caplog.text
