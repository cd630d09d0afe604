"""service.jobs: the SQLite job record, the worker threads on the real pipeline, and SIGKILL-and-restart."""

from __future__ import annotations

import copy
import json
import threading
import time
from dataclasses import replace
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from service import encode, pipeline
from service.errors import (
    ClusterUnavailableError,
    JobNotFoundError,
    JobStateError,
    RequestError,
    StorageFullError,
)
from service.jobs import (
    ANONYMOUS,
    MAX_ATTEMPTS,
    Job,
    JobDatabase,
    JobRunner,
    Principal,
    feature_count,
    plan_to_file,
    request_digest,
    run_to_file,
    run_with_pipeline,
    write_planned,
)
from service.registry import StoreRegistry
from service.schemas import IndicatorRequest
from service.settings import Settings
from service.store import open_store
from tests import _support_server as server_support

pytestmark = pytest.mark.timeout(180)


def _job(job_id: str = "a", *, key: str | None = None, digest: str = "d", created: float = 1.0) -> Job:
    """A queued job record."""
    return Job(
        id=job_id, state="queued", dataset="demo", format="parquet", request_hash=digest, idempotency_key=key,
        features_total=10, features_done=0, created_at=created, started_at=None, finished_at=None, attempts=0,
        error=None, result_file=None, media_type=None,
    )  # fmt: skip


# Indicators named explicitly, so that these tests do not depend on which indicators the default set holds.
INDICATORS = ["prcp_total", "tmean", {"name": "gdd", "base": 10, "cap": 30}]


def _request(communities: dict[str, Any], n: int | None = None, **fields: Any) -> IndicatorRequest:
    """An indicator request over the first n demo communities (all when None)."""
    features = dict(communities, features=communities["features"][:n] if n else communities["features"])
    return IndicatorRequest.model_validate({"features": features, "indicators": INDICATORS, **fields})


def _many(communities: dict[str, Any], count: int) -> dict[str, Any]:
    """A FeatureCollection of ``count`` features, the demo communities repeated under new ids."""
    base = [f for f in communities["features"] if f["geometry"]["type"] != "Point"]
    features = []
    for i in range(count):
        feature = copy.deepcopy(base[i % len(base)])
        feature["id"] = f"copy-{i:05d}"
        features.append(feature)
    return {"type": "FeatureCollection", "features": features}


def _wait(runner: JobRunner, job_id: str, states: set[str], timeout: float = 90.0) -> Job:
    """Poll until the job reaches one of ``states``."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        job = runner.status(job_id)
        if job.state in states:
            return job
        time.sleep(0.05)
    raise AssertionError(f"job {job_id} still {runner.status(job_id).state} after {timeout} s")


# --- the record -----------------------------------------------------------------------------------------------


def test_database_moves_a_job_through_its_states(tmp_path: Path) -> None:
    db = JobDatabase(tmp_path / "jobs.sqlite")
    db.insert(_job("a"), "{}")
    claimed = db.claim_next(now=10.0)
    assert claimed is not None and claimed.state == "running" and claimed.attempts == 1
    assert db.claim_next(now=11.0) is None  # nothing else queued
    db.progress("a", 4, 10)
    assert db.get("a").features_done == 4  # type: ignore[union-attr]
    assert db.finish("a", "succeeded", 12.0, result_file="a.parquet", media_type="x/y", headers={"H": "1"})
    done = db.get("a")
    assert done is not None and done.state == "succeeded" and done.features_done == 10
    assert done.headers == {"H": "1"} and done.seconds_left() == 0.0
    # a finished job cannot be finished or cancelled again
    assert not db.finish("a", "failed", 13.0)
    assert db.cancel("a", 13.0).state == "succeeded"  # type: ignore[union-attr]


def test_database_claims_the_oldest_job_first(tmp_path: Path) -> None:
    db = JobDatabase(tmp_path / "jobs.sqlite")
    db.insert(_job("late", created=5.0), "{}")
    db.insert(_job("early", created=2.0), "{}")
    assert db.claim_next(10.0).id == "early"  # type: ignore[union-attr]
    assert db.claim_next(10.0).id == "late"  # type: ignore[union-attr]


def test_a_cancelled_running_job_is_not_marked_succeeded(tmp_path: Path) -> None:
    db = JobDatabase(tmp_path / "jobs.sqlite")
    db.insert(_job("a"), "{}")
    db.claim_next(1.0)
    assert db.cancel("a", 2.0).state == "cancelled"  # type: ignore[union-attr]
    assert not db.finish("a", "succeeded", 3.0, result_file="a.parquet")
    assert db.get("a").state == "cancelled"  # type: ignore[union-attr]


def test_interrupted_jobs_are_requeued_until_they_have_been_tried_too_often(tmp_path: Path) -> None:
    db = JobDatabase(tmp_path / "jobs.sqlite")
    db.insert(_job("a"), "{}")
    for attempt in range(1, MAX_ATTEMPTS + 1):
        job = db.claim_next(float(attempt))
        assert job is not None and job.attempts == attempt
        db.progress("a", 3, 10)
        requeued, failed = db.requeue_interrupted(float(attempt) + 0.5)
        if attempt < MAX_ATTEMPTS:
            assert (requeued, failed) == (1, 0)
            again = db.get("a")
            assert again is not None and again.state == "queued" and again.features_done == 0
    final = db.get("a")
    assert final is not None and final.state == "failed"
    assert final.error is not None and f"stopped {MAX_ATTEMPTS} times" in final.error["detail"]


def test_the_same_idempotency_key_gives_back_the_first_job(tmp_path: Path) -> None:
    db = JobDatabase(tmp_path / "jobs.sqlite")
    first = db.insert(_job("a", key="k-1"), "{}")
    second = db.insert(_job("b", key="k-1"), "{}")
    assert first.id == second.id == "a"
    assert db.get("b") is None


def test_seconds_left_follows_the_pace_so_far() -> None:
    running = Job(**{**_job().__dict__, "state": "running", "started_at": 100.0, "features_done": 4})
    # 4 features in 20 s, 6 to go: 30 s
    assert running.seconds_left(now=120.0) == pytest.approx(30.0)
    assert Job(**{**running.__dict__, "features_done": 0}).seconds_left(now=120.0) is None
    assert _job().seconds_left() is None


def test_request_digest_ignores_key_order_but_not_format(tiny_communities: dict[str, Any]) -> None:
    from service.request_text import canonical_text

    def digest(communities: dict[str, Any], fmt: str, **fields: Any) -> str:
        request = _request(communities, 2, **fields)
        return request_digest(canonical_text(request, exclude_unset=True), fmt)

    first = tiny_communities["features"][0]
    reordered = {**first, "properties": dict(reversed(list(first["properties"].items())))}
    shuffled = {**tiny_communities, "features": [reordered, *tiny_communities["features"][1:]]}
    a = digest(tiny_communities, "csv", lags=[0, 1])
    assert a == digest(shuffled, "csv", lags=[0, 1])
    assert a != digest(tiny_communities, "json", lags=[0, 1])
    assert a != digest(tiny_communities, "csv", lags=[0, 2])


def test_expired_jobs_and_their_files_are_removed(tmp_path: Path) -> None:
    runner = JobRunner(Settings(data_dir=tmp_path, job_retention_hours=1.0), StoreRegistry({}))
    runner.db.insert(_job("old"), "{}")
    runner.db.claim_next(0.0)
    result = runner.results / "old.parquet"
    result.write_bytes(b"x")
    runner.db.finish("old", "succeeded", 1000.0, result_file="old.parquet")
    assert runner.clean_up(now=1000.0 + 1800.0) == 0  # half an hour later: kept
    assert runner.clean_up(now=1000.0 + 3700.0) == 1
    assert not result.exists()
    with pytest.raises(JobNotFoundError, match="never submitted, or it finished more than 1 hours ago"):
        runner.status("old")


def test_feature_count_counts_a_single_feature_as_one(tiny_communities: dict[str, Any]) -> None:
    feature = tiny_communities["features"][0]
    assert feature_count(IndicatorRequest.model_validate({"features": feature})) == 1
    assert feature_count(_request(tiny_communities, 3)) == 3


# --- the runner on the real pipeline --------------------------------------------------------------------------


@pytest.fixture
def runner(tiny_demo: Path, tmp_path: Path):
    """A started JobRunner over the tiny demo; stopped afterwards."""
    store = open_store(tiny_demo)
    runner = JobRunner(Settings(data_dir=tmp_path, job_workers=1), StoreRegistry({store.name: store}),
                       poll_seconds=0.05)  # fmt: skip
    runner.start()
    yield runner
    runner.stop()


def test_a_job_gives_the_same_bytes_as_an_on_demand_run(runner: JobRunner, tiny_communities: dict) -> None:
    request = _request(tiny_communities, 6, lags=[0, 1])
    job, created = runner.submit(request, "parquet")
    assert created and job.state == "queued" and job.features_total == 6
    done = _wait(runner, job.id, {"succeeded", "failed"})
    assert done.state == "succeeded", done.error
    assert done.features_done == 6 and done.attempts == 1
    finished, path = runner.result_path(job.id)
    store = runner.registry.get_dataset(None)
    expected, media_type, headers = encode.encode(pipeline.run(request, store, runner.settings), "parquet")
    assert path.read_bytes() == expected
    assert finished.media_type == media_type and finished.headers == headers
    assert not list(runner.results.glob("*.partial"))


def test_a_job_written_batch_by_batch_is_the_whole_table(
    tiny_demo: Path, tmp_path: Path, tiny_communities: dict, monkeypatch: pytest.MonkeyPatch
) -> None:
    # batches of 2 features, pieces of 3: a piece gathers rows of several batches, a batch feeds several pieces
    from service.pipeline import seasons

    monkeypatch.setattr(seasons, "batch_size_for", lambda *args: 2)  # where run_in_pieces looks them up
    monkeypatch.setattr(seasons, "PIECE_FEATURES", 3)
    store = open_store(tiny_demo)
    registry, settings = StoreRegistry({store.name: store}), Settings(data_dir=tmp_path)
    request = _request(tiny_communities, 7)
    weights = pipeline.prepare(request, store, settings).weights
    batches = pipeline.feature_batches(weights, 2)
    assert any(np.any(np.diff(np.sort(rows)) > 1) for rows in batches)  # batches are not request-order runs
    whole = pipeline.run(request, store, settings, batch_size=2, invalid_features="skip")
    done: list[tuple[int, int]] = []
    for fmt in ("csv", "json", "parquet", "dta", "bundle"):
        path = tmp_path / f"table.{fmt}"
        size, media_type, headers = run_to_file(
            request,
            registry,
            settings,
            fmt,
            path,
            progress=lambda d, t: done.append((d, t)),
            cancelled=lambda: False,
        )
        expected, expected_type, expected_headers = encode.encode(whole, fmt)
        assert size == path.stat().st_size and (media_type, headers) == (expected_type, expected_headers)
        assert path.read_bytes() == expected, fmt
        assert not list(tmp_path.glob("*.spill")) and not list(tmp_path.glob("*.partial"))
    assert done[-1] == (7, 7) and len(done) == 5 * (len(batches) + 1)  # progress per batch


def test_a_planned_job_holds_no_feature_of_its_request(
    tiny_demo: Path, tmp_path: Path, tiny_communities: dict
) -> None:
    """Once its batches are planned, a job's run keeps its features' ids and properties alone: the request's
    validated features (about 2 kB each) are let go for the minutes the batches take, as the worker lets go of
    its request; the table written from the plan is the whole table's."""
    import gc
    import pickle

    from service.schemas.features import GeoJSONFeature

    def alive() -> int:
        gc.collect()
        return sum(isinstance(o, GeoJSONFeature) for o in gc.get_objects())

    store = open_store(tiny_demo)
    registry, settings = StoreRegistry({store.name: store}), Settings(data_dir=tmp_path)
    before = alive()
    request = _request(tiny_communities, 7)
    assert alive() - before == 7
    # as the worker has them: the weights kept at submission are read back from their pickle
    kept = pickle.dumps(pipeline.prepare(request, store, settings, invalid_features="skip"))
    planned = plan_to_file(
        request, registry, settings, "csv", progress=lambda d, t: None, cancelled=lambda: False,
        prepared=pickle.loads(kept),
    )  # fmt: skip
    expected, _, _ = encode.encode(pipeline.run(request, store, settings, invalid_features="skip"), "csv")
    del request
    assert alive() - before <= 1  # a batch's request keeps one feature, as the model wants one
    size, _, _ = write_planned(planned, "csv", tmp_path / "table.csv")
    assert (tmp_path / "table.csv").read_bytes() == expected and size == len(expected)


def test_a_job_reads_around_the_tile_cache(tiny_demo: Path, tmp_path: Path, tiny_communities: dict) -> None:
    """A job's one pass over its chunks neither fills the server's decoded-tile cache nor takes from it (the
    cache is for on-demand requests that come back to the same cells); its table is the same."""
    from service.store.chunks import configure_tile_cache, tile_cache

    budget = tile_cache().max_bytes
    configure_tile_cache(0)  # emptied: earlier tests may have left chunks in the shared cache
    configure_tile_cache(1 << 24)
    try:
        store = open_store(tiny_demo)  # its chunk readers share the cache
        registry, settings = StoreRegistry({store.name: store}), Settings(data_dir=tmp_path)
        request = _request(tiny_communities, 4)
        before = (tile_cache().nbytes, tile_cache().hits, tile_cache().misses)
        run_to_file(
            request, registry, settings, "csv", tmp_path / "table.csv", progress=lambda d, t: None,
            cancelled=lambda: False,
        )  # fmt: skip
        assert (tile_cache().nbytes, tile_cache().hits, tile_cache().misses) == before
        whole = pipeline.run(
            request, store, settings, invalid_features="skip"
        )  # on demand: through the cache
        assert tile_cache().nbytes > before[0]
    finally:
        configure_tile_cache(0)
        configure_tile_cache(budget)
    assert (tmp_path / "table.csv").read_bytes() == encode.encode(whole, "csv")[0]


def test_a_repeated_submission_with_the_same_key_is_one_job(
    runner: JobRunner, tiny_communities: dict
) -> None:
    request = _request(tiny_communities, 2)
    first, created_first = runner.submit(request, "csv", idempotency_key="survey-wave-3")
    again, created_again = runner.submit(request, "csv", idempotency_key="survey-wave-3")
    assert created_first and not created_again and again.id == first.id
    with pytest.raises(RequestError, match="already used for a different request"):
        runner.submit(_request(tiny_communities, 3), "csv", idempotency_key="survey-wave-3")
    assert _wait(runner, first.id, {"succeeded", "failed"}).state == "succeeded"


def test_cancelling_a_running_job_discards_its_work(
    tiny_demo: Path, tmp_path: Path, tiny_communities: dict
) -> None:
    started, release = threading.Event(), threading.Event()

    def gated(request, registry, settings, fmt, *, progress, cancelled):  # noqa: ANN001, ANN202
        def progress_then_wait(done: int, total: int) -> None:
            progress(done, total)
            started.set()
            release.wait(30)

        return run_with_pipeline(
            request, registry, settings, fmt, progress=progress_then_wait, cancelled=cancelled
        )

    store = open_store(tiny_demo)
    runner = JobRunner(Settings(data_dir=tmp_path), StoreRegistry({store.name: store}), run_job=gated,
                       poll_seconds=0.05)  # fmt: skip
    runner.start()
    try:
        job, _ = runner.submit(_request(tiny_communities, 4), "json")
        assert started.wait(30)
        assert runner.status(job.id).state == "running"
        assert runner.cancel(job.id).state == "cancelled"
        release.set()
        time.sleep(0.5)
        assert runner.status(job.id).state == "cancelled"
        assert not list(runner.results.iterdir())
        assert runner.cancel(job.id).state == "cancelled"  # cancelling again is harmless
        with pytest.raises(JobStateError, match="is cancelled; its result is served once it has succeeded"):
            runner.result_path(job.id)
    finally:
        release.set()
        runner.stop()


def test_a_job_that_fails_keeps_its_problem_document(runner: JobRunner, tiny_communities: dict) -> None:
    # A baseline before the data: the pipeline refuses it; the job records why.
    request = _request(tiny_communities, 2, baseline={"start": 1800, "end": 1810})
    job, _ = runner.submit(request, "parquet")
    failed = _wait(runner, job.id, {"succeeded", "failed"})
    assert failed.state == "failed"
    assert failed.error is not None and failed.error["status"] == 422 and "1800" in failed.error["detail"]
    with pytest.raises(JobStateError, match="is failed: .*1800"):
        runner.result_path(job.id)
    with pytest.raises(JobStateError, match="already failed"):
        runner.cancel(job.id)


def test_a_job_whose_cluster_was_unavailable_is_tried_again(
    tiny_demo: Path, tmp_path: Path, tiny_communities: dict
) -> None:
    calls = []

    def cluster_down_once(request, registry, settings, fmt, *, progress, cancelled):  # noqa: ANN001, ANN202
        calls.append(time.monotonic())
        if len(calls) == 1:
            raise ClusterUnavailableError("the dask scheduler at tcp://127.0.0.1:1 cannot be reached")
        return run_with_pipeline(request, registry, settings, fmt, progress=progress, cancelled=cancelled)

    store = open_store(tiny_demo)
    runner = JobRunner(Settings(data_dir=tmp_path), StoreRegistry({store.name: store}), run_job=cluster_down_once,
                       poll_seconds=0.05, retry_seconds=0.2)  # fmt: skip
    runner.start()
    try:
        job, _ = runner.submit(_request(tiny_communities, 2), "csv")
        done = _wait(runner, job.id, {"succeeded", "failed"})
    finally:
        runner.stop()
    assert done.state == "succeeded" and done.attempts == 2
    assert len(calls) == 2 and calls[1] - calls[0] >= 0.2


def test_a_job_whose_cluster_stays_unavailable_fails_after_a_few_tries(
    tiny_demo: Path, tmp_path: Path, tiny_communities: dict
) -> None:
    def cluster_down(request, registry, settings, fmt, *, progress, cancelled):  # noqa: ANN001, ANN202
        raise ClusterUnavailableError("the dask scheduler at tcp://127.0.0.1:1 cannot be reached")

    store = open_store(tiny_demo)
    runner = JobRunner(Settings(data_dir=tmp_path), StoreRegistry({store.name: store}), run_job=cluster_down,
                       poll_seconds=0.05, retry_seconds=0.05)  # fmt: skip
    runner.start()
    try:
        job, _ = runner.submit(_request(tiny_communities, 1), "csv")
        failed = _wait(runner, job.id, {"succeeded", "failed"})
    finally:
        runner.stop()
    assert failed.state == "failed" and failed.attempts == MAX_ATTEMPTS
    assert (
        failed.error is not None
        and failed.error["status"] == 503
        and "cannot be reached" in failed.error["detail"]
    )


# --- SIGKILL in the middle of a job, then restart -------------------------------------------------------------


def _submit_and_follow(client: httpx.Client, body: dict[str, Any], *, until: set[str]) -> dict[str, Any]:
    """Submit a job and poll it until its state is in ``until``."""
    response = client.post("/v1/jobs", json=body, params={"format": "parquet"})
    assert response.status_code == 202, response.text
    location = response.headers["Location"]
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        status = client.get(location).json()
        if status["state"] in until:
            return status
        time.sleep(0.02)
    raise AssertionError(f"job {location} never reached {until}")


@pytest.mark.slow
def test_a_job_killed_mid_way_reruns_after_restart_and_gives_identical_bytes(tmp_path: Path) -> None:
    # `wxshock serve` without a store serves the demo, building it in the data directory on first start.
    env = {"WXSHOCK_JOB_WORKERS": "1", "WXSHOCK_DEMO_SIZE": "tiny"}
    data_dir = tmp_path / "data"
    server = server_support.start_process(data_dir=data_dir, env=env, timeout=300)
    demo = data_dir / "demo.zarr"
    built_at = (demo / "zarr.json").stat().st_mtime
    communities = json.loads((data_dir / "communities.geojson").read_text(encoding="utf-8"))
    body = {"features": _many(communities, 120), "lags": [0, 1], "indicators": INDICATORS}

    # Submit, wait until the worker runs the job, and SIGKILL the server: no clean-up of any kind runs.
    try:
        with server.client() as client:
            assert [d["name"] for d in client.get("/v1/datasets").json()["datasets"]] == ["demo"]
            killed = _submit_and_follow(client, body, until={"running", "succeeded", "failed"})
            assert killed["state"] == "running", "the job ended before it could be interrupted"
            server.kill()
    finally:
        server.kill()
    assert not list((data_dir / "jobs" / "results").glob("*.parquet"))  # no finished result was written

    # Start again: the job is re-queued and re-run; then the same request runs once more, uninterrupted.
    server = server_support.start_process(data_dir=data_dir, env=env)
    try:
        with server.client() as client:
            uninterrupted = _submit_and_follow(client, body, until={"succeeded", "failed"})
            rerun = client.get(f"/v1/jobs/{killed['id']}").json()  # queued first, so finished first
            assert rerun["state"] == uninterrupted["state"] == "succeeded", (rerun, uninterrupted)
            assert rerun["attempts"] == 2 and uninterrupted["attempts"] == 1
            assert rerun["features_done"] == rerun["features_total"] == 120
            first = client.get(rerun["links"]["result"])
            second = client.get(uninterrupted["links"]["result"])
            assert first.status_code == second.status_code == 200
            assert first.content == second.content
            assert first.headers["X-Wxshock-Request-Hash"] == second.headers["X-Wxshock-Request-Hash"]
    finally:
        server.stop()
    assert "re-queued 1 interrupted job" in server.log_path.read_text()  # type: ignore[union-attr]
    assert (demo / "zarr.json").stat().st_mtime == built_at  # the demo is built once, not on every start


# --- a full disk (issue 12, finding 6) ------------------------------------------------------------------------


@pytest.fixture
def small_disk(tmp_path: Path):
    """A 16 MB tmpfs mounted as the data directory (skipped, with the reason, where mounting is refused)."""
    import subprocess

    mount = tmp_path / "disk"
    mount.mkdir()
    done = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "size=16m", "tmpfs", str(mount)], capture_output=True, text=True
    )
    if done.returncode != 0:
        pytest.skip(
            f"cannot mount a tmpfs as the data directory here: {done.stderr.strip() or done.returncode}"
        )
    try:
        yield mount
    finally:
        subprocess.run(["umount", "-l", str(mount)], capture_output=True)


def _fill(directory: Path, leave: int = 0) -> Path:
    """Fill the file system of ``directory`` up to ``leave`` bytes free; returns the filler file."""
    import shutil

    filler = directory / "filler.bin"
    with open(filler, "ab") as handle:
        while True:
            free = shutil.disk_usage(directory).free
            if free <= leave:
                break
            try:
                handle.write(b"\0" * min(free - leave, 1 << 20))
                handle.flush()
            except OSError:
                break
    return filler


def test_a_full_disk_fails_the_job_with_507_keeps_the_worker_and_refuses_new_jobs(
    small_disk: Path, tiny_demo: Path, tiny_communities: dict
) -> None:
    # The attack: with the data directory full, a failed ROLLBACK killed the worker thread, the job stayed
    # 'running' forever, every POST /v1/jobs was a 500, and a 1 GB .partial file was left behind.
    started, release = threading.Event(), threading.Event()

    def gated(request, registry, settings, fmt, *, progress, cancelled, **kwargs):  # noqa: ANN001, ANN202
        def progress_then_wait(done: int, total: int) -> None:
            progress(done, total)
            started.set()
            release.wait(60)

        return run_with_pipeline(
            request, registry, settings, fmt, progress=progress_then_wait, cancelled=cancelled, **kwargs
        )

    store = open_store(tiny_demo)
    settings = Settings(data_dir=small_disk, min_free_bytes=1 << 20)
    runner = JobRunner(settings, StoreRegistry({store.name: store}), run_job=gated, poll_seconds=0.05)
    runner.start()
    try:
        job, _ = runner.submit(_request(_many(tiny_communities, 60)), "json")
        assert started.wait(60)
        filler = _fill(small_disk)  # nothing left: neither the result nor the database can grow
        release.set()
        failed = _wait(runner, job.id, {"succeeded", "failed"})
        assert failed.state == "failed" and failed.error is not None
        assert failed.error["status"] == 507 and "full" in failed.error["detail"], failed.error
        assert runner.alive, "the worker must outlive a full disk"
        assert not list(runner.results.glob("*.partial")) and not list(runner.results.iterdir())
        with pytest.raises(StorageFullError, match="min_free_bytes"):
            runner.check_space()
        # Space comes back: the failure is on record, and the next job runs.
        filler.unlink()
        deadline = time.monotonic() + 30
        while runner.db.get(job.id).state != "failed" and time.monotonic() < deadline:  # type: ignore[union-attr]
            time.sleep(0.05)
        assert runner.db.get(job.id).error["status"] == 507  # type: ignore[union-attr,index]
        again, _ = runner.submit(_request(tiny_communities, 2), "json")
        assert _wait(runner, again.id, {"succeeded", "failed"}).state == "succeeded"
    finally:
        release.set()
        runner.stop()


def test_submission_is_refused_with_507_while_the_disk_stays_full(
    small_disk: Path, tiny_demo: Path, tiny_communities: dict
) -> None:
    settings = Settings(stores=[str(tiny_demo)], data_dir=small_disk, min_free_bytes=2 << 20)
    with server_support.thread_server(settings) as server, server.client() as client:
        filler = _fill(small_disk, leave=1 << 20)
        body = {
            "features": dict(tiny_communities, features=tiny_communities["features"][:2]),
            "indicators": INDICATORS,
        }
        refused = client.post("/v1/jobs", json=body)
        assert refused.status_code == 507 and refused.headers["content-type"] == "application/problem+json"
        assert refused.json()["type"].endswith("/storage-full") and "free" in refused.json()["detail"]
        assert client.get("/ready").json()["job_worker"] == "alive"
        filler.unlink()
        assert client.post("/v1/jobs", json=body).status_code == 202


def test_a_failed_write_leaves_no_partial_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import errno

    from service import jobs

    def full(fd: int) -> None:
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(jobs.os, "fsync", full)
    with pytest.raises(OSError, match="No space"):
        jobs.write_atomically(tmp_path / "result.parquet", b"x" * 1000)
    assert list(tmp_path.iterdir()) == []


# --- retention checked when a result is read (issue 12, finding 9) --------------------------------------------


def test_a_result_past_its_retention_is_not_served_even_before_the_clean_up_runs(tmp_path: Path) -> None:
    # The attack: clean-up ran only at start and every 600 s, so an expired result was still served.
    runner = JobRunner(Settings(data_dir=tmp_path, job_retention_hours=1.0), StoreRegistry({}))
    for name, finished in (("old", time.time() - 3700.0), ("young", time.time() - 600.0)):
        runner.db.insert(_job(name), "{}")
        runner.db.claim_next(0.0)
        (runner.results / f"{name}.parquet").write_bytes(b"x")
        runner.db.finish(name, "succeeded", finished, result_file=f"{name}.parquet")
    assert runner.result_path("young")[1].read_bytes() == b"x"
    for read in (runner.result_path, runner.status):
        with pytest.raises(JobNotFoundError, match="finished more than 1 hours ago"):
            read("old")
    assert not (runner.results / "old.parquet").exists() and runner.db.get("old") is None
    assert [j.id for j in runner.list_jobs(ANONYMOUS)] == ["young"]


def test_jobs_are_listed_newest_first_per_owner(tmp_path: Path) -> None:
    runner = JobRunner(Settings(data_dir=tmp_path), StoreRegistry({}))
    for i, owner in enumerate(["alice", "bob", "alice"]):
        runner.db.insert(replace(_job(f"j{i}", created=float(i)), owner=owner), "{}")
    assert [j.id for j in runner.list_jobs(Principal("alice"))] == ["j2", "j0"]
    assert [j.id for j in runner.list_jobs(Principal("bob"))] == ["j1"]
    assert [j.id for j in runner.list_jobs(Principal("lead", admin=True), limit=2)] == ["j2", "j1"]
    with pytest.raises(JobNotFoundError, match="of yours"):
        runner.status("j1", Principal("alice"))


def test_an_old_database_gains_owners_and_keeps_its_jobs(tmp_path: Path) -> None:
    import sqlite3

    from service.jobs import _SCHEMA

    path = tmp_path / "jobs.sqlite"
    with sqlite3.connect(path) as old:
        old.executescript(_SCHEMA)
        old.execute(
            "INSERT INTO jobs (id, state, dataset, format, request, request_hash, features_total, created_at) "
            "VALUES ('before', 'succeeded', 'demo', 'csv', '{}', 'h', 1, 1.0)"
        )
    db = JobDatabase(path)
    job = db.get("before")
    assert job is not None and job.owner == "" and job.skipped == []
    assert not Principal("alice").sees(job) and Principal("lead", admin=True).sees(job)
    db.close()
    assert JobDatabase(path).get("before") is not None  # opening again migrates nothing twice


def test_the_run_reuses_the_weights_computed_at_submission(
    runner: JobRunner, tiny_communities: dict, monkeypatch: pytest.MonkeyPatch
) -> None:
    from service.jobs import check_job_request

    request = _request(tiny_communities, 5)
    prepared = check_job_request(request, runner.registry, runner.settings)
    job, _ = runner.submit(request, "parquet", prepared=prepared)
    assert (runner.prepared / f"{job.id}.pickle").is_file()

    def no_second_time(*args: Any, **kwargs: Any) -> None:  # noqa: ANN401
        raise AssertionError("the weights were computed again")

    for module in (pipeline.checks, pipeline.core):  # where it is defined and where a run would call it
        monkeypatch.setattr(module, "features_and_weights", no_second_time)
    done = _wait(runner, job.id, {"succeeded", "failed"})
    assert done.state == "succeeded", done.error
    # kept only until the job ends: removed just after its end is recorded, so give the worker a moment
    deadline = time.monotonic() + 10.0
    while (runner.prepared / f"{job.id}.pickle").exists() and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not (runner.prepared / f"{job.id}.pickle").exists()
    monkeypatch.undo()
    store = runner.registry.get_dataset(None)
    expected, _, _ = encode.encode(pipeline.run(request, store, runner.settings), "parquet")
    assert runner.result_path(job.id)[1].read_bytes() == expected
