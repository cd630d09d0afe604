"""service.cluster: local threads and a real two-worker cluster, on plain dask arrays and through the service."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import dask
import dask.array as da
import numpy as np
import pytest

from service import cluster
from service.errors import ClusterUnavailableError, StoreError
from service.settings import Settings
from tests import _support_cluster as support
from tests._support_cluster import (
    DaskProcesses,
    exit_worker_block,
    free_port,
    process_id_block,
    slow_block,
    thread_id_block,
)

dask_cluster = support.dask_cluster  # the session fixture, used by name below

pytestmark = pytest.mark.timeout(120)


def _weighted_means(seed: int = 7) -> da.Array:
    """A float reduction shaped like the aggregation: weights (feature, cell) x values (cell, day)."""
    rng = np.random.default_rng(seed)
    values = da.from_array(rng.normal(15.0, 8.0, size=(600, 365)), chunks=(100, 73))
    weights = da.from_array(rng.random((40, 600)), chunks=(40, 100))
    return (weights @ values) / weights.sum(axis=1, keepdims=True)


def _settings(**kwargs: object) -> Settings:
    """Settings for a test, never read from the environment of the machine."""
    kwargs.setdefault("scheduler", None)
    return Settings(**kwargs)


# --- local threads ----------------------------------------------------------------------------------------------


def test_local_compute_matches_numpy() -> None:
    rng = np.random.default_rng(7)
    values = rng.normal(15.0, 8.0, size=(600, 365))
    weights = rng.random((40, 600))
    (got,) = cluster.compute(_weighted_means(), settings=_settings())
    # numpy's own matmul as the reference; dask sums chunk products in another order, so not bit-equal.
    np.testing.assert_allclose(got, (weights @ values) / weights.sum(axis=1, keepdims=True), rtol=1e-12)


def test_local_compute_returns_one_value_per_argument_in_order() -> None:
    a = da.arange(10, chunks=3)
    got = cluster.compute(a.sum(), "not dask", a * 2, settings=_settings(threads=2))
    assert isinstance(got, tuple) and len(got) == 3
    assert got[0] == 45 and got[1] == "not dask"
    np.testing.assert_array_equal(got[2], np.arange(10) * 2)


def test_local_compute_uses_the_configured_number_of_threads() -> None:
    blocks = da.zeros((16, 1), chunks=(1, 1)).map_blocks(thread_id_block, dtype=np.int64)
    (one,) = cluster.compute(blocks, settings=_settings(threads=1))
    assert len(np.unique(one)) == 1
    assert one[0, 0] != threading.get_ident()  # a pool thread, not the caller's


def test_compute_each_gives_every_value_once_with_its_key() -> None:
    arrays = {k: _weighted_means(seed=k) for k in range(5)}
    got = dict(cluster.compute_each(iter(arrays.items()), settings=_settings(threads=2)))
    assert sorted(got) == list(arrays)
    for k, array in arrays.items():
        assert np.array_equal(got[k], array.compute(scheduler="sync"))


def test_compute_each_starts_nothing_once_cancelled() -> None:
    started: list[int] = []

    def items():
        for k in range(10):
            started.append(k)
            yield k, _weighted_means(seed=k)

    seen = []
    for key, _ in cluster.compute_each(
        items(), settings=_settings(threads=2), cancelled=lambda: len(seen) >= 2
    ):
        seen.append(key)
    assert len(started) < 10 and len(seen) == len(started)


def _two_step(first: Any, tail: Any) -> Any:
    """A delayed value of two tasks: ``first()`` and then the one output task ``tail(its result)``."""
    return dask.delayed(tail, pure=False)(dask.delayed(first, pure=False)())


@pytest.mark.parametrize("overlap", [True, False])
def test_overlap_tails_starts_the_next_collection_once_the_output_task_starts(overlap: bool) -> None:
    """With one collection in flight, the next one's tasks run beside the first one's output task only when
    tails overlap: the first's output task waits for the second's first task (and gives up after a while)."""
    second_started = threading.Event()

    def wait_for_second(_: Any) -> bool:
        return second_started.wait(10.0 if overlap else 0.5)

    def mark() -> int:
        second_started.set()
        return 1

    items = iter([("a", _two_step(lambda: 0, wait_for_second)), ("b", _two_step(mark, lambda x: x + 1))])
    got = dict(cluster.compute_each(items, settings=_settings(threads=2), in_flight=1, overlap_tails=overlap))
    # without overlap the second collection starts only after the first has finished (its wait timed out)
    assert got == {"a": overlap, "b": 2}


def test_overlap_tails_keeps_in_flight_collections_before_their_tails_and_twice_that_in_all() -> None:
    """in_flight 1 with overlapping tails: never two collections in their first task at once, never more than
    two collections running, every value once; a collection of several output keys counts until it ends."""
    lock = threading.Lock()
    now = {"first": 0, "running": 0}
    most = {"first": 0, "running": 0}

    def enter(*names: str) -> None:
        with lock:
            for name in names:
                now[name] += 1
                most[name] = max(most[name], now[name])

    def leave(*names: str) -> None:
        with lock:
            for name in names:
                now[name] -= 1

    def first() -> int:
        enter("first", "running")
        time.sleep(0.05)
        leave("first")
        return 1

    def tail(x: int) -> int:
        time.sleep(0.2)  # longer than the next collection's first task: tails pile up unless bounded
        leave("running")
        return x + 1

    items: list[tuple[Any, Any]] = [(k, _two_step(first, tail)) for k in range(5)]
    items.append(("array", da.arange(10, chunks=3) * 2))
    got = dict(
        cluster.compute_each(iter(items), settings=_settings(threads=4), in_flight=1, overlap_tails=True)
    )
    assert got.pop("array").tolist() == list(range(0, 20, 2))
    assert got == dict.fromkeys(range(5), 2)
    # never more than the bounds (that two do run at once is the test above's, which does not hang on timing)
    assert most["first"] == 1 and most["running"] <= 2


@pytest.mark.parametrize("ahead", [True, False])
def test_read_ahead_takes_the_next_item_while_the_one_before_computes(ahead: bool) -> None:
    """With read_ahead, the next item is taken from the iterator (its graph made) while the collection before it
    is still computing, not once it may start; without it, only then. Every value comes once either way."""
    first_done = threading.Event()
    taken_while_running: list[bool] = []

    def slow() -> int:
        time.sleep(0.2)
        first_done.set()
        return 1

    def items() -> Any:
        for k in range(3):
            taken_while_running.append(k > 0 and not first_done.is_set())
            yield k, (dask.delayed(slow, pure=False)() if k == 0 else dask.delayed(k))

    got = dict(cluster.compute_each(items(), settings=_settings(threads=2), in_flight=1, read_ahead=ahead))
    assert got == {0: 1, 1: 1, 2: 2}
    assert taken_while_running[1] is ahead


def test_read_ahead_raises_an_items_error_after_the_collections_before_it() -> None:
    """An error making the next item, taken ahead, is raised when that item would have started: the collection
    before it still gives its value first."""

    def items() -> Any:
        yield "a", dask.delayed(lambda: time.sleep(0.1) or 1, pure=False)()
        raise ValueError("no graph for b")

    seen = []
    with pytest.raises(ValueError, match="no graph for b"):
        for key, value in cluster.compute_each(
            items(), settings=_settings(threads=2), in_flight=1, read_ahead=True
        ):
            seen.append((key, value))
    assert seen == [("a", 1)]


@pytest.mark.parametrize("depth", [1, 3])
def test_dask_keeps_as_many_tasks_queued_as_the_pool_says_it_has_workers(depth: int) -> None:
    """_Queued gives dask's threaded scheduler ``depth`` workers on a pool of one thread: dask hands it that many
    tasks at once, so a thread that finishes one finds the next waiting. Each of three tasks waits until all
    three are in the pool (giving up after a while): only with three queued does none give up."""
    pool = ThreadPoolExecutor(1)
    lock, submitted = threading.Condition(), [0]

    class Counting(cluster._Queued):
        def submit(self, fn: Any, /, *args: Any, **kwargs: Any) -> Any:
            with lock:
                submitted[0] += 1
                lock.notify_all()
            return super().submit(fn, *args, **kwargs)

    def task(_: int) -> bool:
        with lock:
            return lock.wait_for(lambda: submitted[0] >= 3, timeout=5.0 if depth > 1 else 0.3)

    tasks = [dask.delayed(task, pure=False)(k) for k in range(3)]
    try:
        (got,) = dask.compute(tasks, scheduler="threads", pool=Counting(pool, depth))
    finally:
        pool.shutdown()
    assert all(got) is (depth > 1)


def test_compute_each_on_threads_queues_tasks_ahead_of_its_threads(monkeypatch: pytest.MonkeyPatch) -> None:
    """compute_each hands dask QUEUED_PER_THREAD tasks per pool thread (what the test above relies on)."""
    depths = []
    original = cluster._Queued.__init__

    def seen(self: Any, pool: Any, depth: int) -> None:
        depths.append(depth)
        original(self, pool, depth)

    monkeypatch.setattr(cluster._Queued, "__init__", seen)
    got = dict(cluster.compute_each(iter([("a", dask.delayed(1))]), settings=_settings(threads=2)))
    assert got == {"a": 1} and depths == [cluster.QUEUED_PER_THREAD * 2]


def test_no_scheduler_means_no_client() -> None:
    assert cluster.client_for(_settings()) is None
    assert cluster.client_for(_settings(scheduler="  ")) is None


def test_local_threads_leave_dask_distributed_unimported() -> None:
    # dask imports dask.distributed (0.7 s of CPU) when its scheduler is named "threads" rather than given as a
    # function: a fresh process (a server's first request) that computes on local threads must not pay for it
    code = (
        "import sys, dask\n"
        "from service import cluster\n"
        "from service.settings import Settings\n"
        "s = Settings(threads=2)\n"
        "assert cluster.compute(dask.delayed(1), settings=s) == (1,)\n"
        "assert dict(cluster.compute_each(iter([('a', dask.delayed(2))]), settings=s, read_ahead=True)) == {'a': 2}\n"
        "print('distributed' in sys.modules)\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=False
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "False", "a computation on local threads imported dask.distributed"


# --- on the cluster ---------------------------------------------------------------------------------------------


@pytest.mark.cluster
def test_cluster_result_is_bit_identical_to_threads(dask_cluster: DaskProcesses) -> None:
    local, local_sum = cluster.compute(
        _weighted_means(), _weighted_means().sum(), settings=_settings(threads=2)
    )
    remote, remote_sum = cluster.compute(
        _weighted_means(), _weighted_means().sum(), settings=_settings(scheduler=dask_cluster.address)
    )
    assert remote.dtype == local.dtype and remote.shape == local.shape
    assert remote.tobytes() == local.tobytes()
    assert np.float64(remote_sum).tobytes() == np.float64(local_sum).tobytes()


@pytest.mark.cluster
def test_cluster_work_runs_in_the_worker_processes(dask_cluster: DaskProcesses) -> None:
    blocks = da.zeros((8, 1), chunks=(1, 1)).map_blocks(process_id_block, dtype=np.int64)
    (pids,) = cluster.compute(blocks, settings=_settings(scheduler=dask_cluster.address))
    assert os.getpid() not in set(pids.ravel())
    client = cluster.client_for(_settings(scheduler=dask_cluster.address))
    worker_pids = set(client.run(os.getpid).values())
    assert set(pids.ravel()) <= worker_pids and len(worker_pids) == 2


@pytest.mark.cluster
def test_workers_run_with_the_images_dask_settings(dask_cluster: DaskProcesses) -> None:
    client = cluster.client_for(_settings(scheduler=dask_cluster.address))
    environments = client.run(
        lambda: {k: os.environ.get(k) for k in ("MALLOC_TRIM_THRESHOLD_", "OMP_NUM_THREADS")}
    )
    # docker/dask.yaml leaves glibc's allocator alone in the workers (2.5 x faster chunk tasks, see there).
    assert [e["MALLOC_TRIM_THRESHOLD_"] for e in environments.values()] == [None, None]
    assert (
        client.run_on_scheduler(
            lambda: __import__("dask").config.get("distributed.scheduler.allowed-failures")
        )
        == 3
    )


@pytest.mark.cluster
def test_client_is_cached_per_address_and_not_dask_default(dask_cluster: DaskProcesses) -> None:
    settings = _settings(scheduler=dask_cluster.address)
    first = cluster.client_for(settings)
    assert first is not None and cluster.client_for(settings) is first
    # A plain dask.compute elsewhere in the process stays local: the cached client is not the default.
    blocks = da.zeros((2, 1), chunks=(1, 1)).map_blocks(process_id_block, dtype=np.int64)
    assert set(dask.compute(blocks)[0].ravel()) == {os.getpid()}


@pytest.mark.cluster
def test_error_raised_in_a_task_keeps_its_type(dask_cluster: DaskProcesses) -> None:
    def unreadable(block: np.ndarray) -> np.ndarray:
        raise StoreError("store 'demo': chunk tmax/0.0.0 cannot be read (test)")

    broken = da.zeros((2, 2), chunks=(1, 2)).map_blocks(unreadable, dtype=float)
    with pytest.raises(StoreError, match="chunk tmax/0.0.0 cannot be read"):
        cluster.compute(broken, settings=_settings(scheduler=dask_cluster.address))


@pytest.mark.cluster
def test_worker_lost_mid_computation_is_retried_with_the_same_result(dask_cluster: DaskProcesses) -> None:
    source = np.linspace(-50.0, 50.0, 32 * 500).reshape(32, 500)

    def work() -> da.Array:
        blocks = da.from_array(source, chunks=(1, 500)).map_blocks(slow_block, 0.1, dtype=float)
        return blocks.sum(axis=0)  # a reduction over results spread over both workers

    (expected,) = cluster.compute(work(), settings=_settings(threads=8))
    settings = _settings(scheduler=dask_cluster.address)
    client = cluster.client_for(settings)
    victim = "worker-a"
    victim_address = next(
        address
        for address, info in client.scheduler_info(n_workers=-1)["workers"].items()
        if info["name"] == victim
    )
    try:
        with ThreadPoolExecutor(1) as pool:
            running = pool.submit(cluster.compute, work(), settings=settings)
            # Stop the worker once it holds finished results and is running a task: both must be redone.
            deadline = time.monotonic() + 30
            while time.monotonic() < deadline:
                held = sum(victim_address in holders for holders in client.who_has().values())
                if held >= 3 and client.processing().get(victim_address):
                    break
                time.sleep(0.05)
            else:
                pytest.fail("the victim worker never held results and a running task")
            assert not running.done()
            dask_cluster.stop_worker(victim)
            (got,) = running.result(timeout=60)
        assert victim_address not in client.scheduler_info(n_workers=-1)["workers"]
        assert got.tobytes() == expected.tobytes()
    finally:
        dask_cluster.ensure_workers()


@pytest.mark.cluster
@pytest.mark.slow
def test_task_that_keeps_killing_workers_is_a_cluster_error(dask_cluster: DaskProcesses) -> None:
    poison = da.zeros((1, 1), chunks=(1, 1)).map_blocks(exit_worker_block, dtype=float)
    try:
        with pytest.raises(ClusterUnavailableError, match="each died while running it") as caught:
            cluster.compute(poison, settings=_settings(scheduler=dask_cluster.address))
        assert caught.value.status == 503
    finally:
        dask_cluster.ensure_workers()


# --- a scheduler that is not there ------------------------------------------------------------------------------


def test_unreachable_scheduler_is_a_clear_503(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(cluster, "CONNECT_TIMEOUT_S", 1.0)
    address = f"tcp://127.0.0.1:{free_port()}"
    with pytest.raises(ClusterUnavailableError, match="did not answer within 1 s.*unset it") as caught:
        cluster.compute(da.ones(3).sum(), settings=_settings(scheduler=address))
    assert caught.value.status == 503 and caught.value.field == "scheduler"
    assert address in caught.value.detail


def test_scheduler_without_workers_is_a_clear_503(monkeypatch: pytest.MonkeyPatch) -> None:
    from distributed import LocalCluster

    monkeypatch.setattr(cluster, "WORKER_WAIT_S", 0.5)
    with LocalCluster(
        n_workers=0, processes=False, protocol="tcp", host="127.0.0.1", dashboard_address="127.0.0.1:0"
    ) as empty:
        with pytest.raises(ClusterUnavailableError, match="has no worker"):
            cluster.compute(da.ones(3).sum(), settings=_settings(scheduler=empty.scheduler_address))
    cluster.close_clients()


@pytest.mark.cluster
def test_scheduler_lost_mid_computation_is_a_clear_503(tmp_path: Path) -> None:
    own = DaskProcesses(root=tmp_path)  # a scheduler of this test's own: the shared one must stay up
    try:
        own.start_scheduler()
        own.ensure_workers(("worker-solo",))
        settings = _settings(scheduler=own.address)
        slow = da.from_array(np.ones((60, 10)), chunks=(1, 10)).map_blocks(slow_block, 0.1, dtype=float).sum()
        with ThreadPoolExecutor(1) as pool:
            running = pool.submit(cluster.compute, slow, settings=settings)
            client = cluster.client_for(settings)
            deadline = time.monotonic() + 30
            while time.monotonic() < deadline and not any(client.processing().values()):
                time.sleep(0.02)
            own.scheduler.kill()  # SIGKILL, no goodbye to anyone
            with pytest.raises(ClusterUnavailableError, match="lost the connection to dask scheduler"):
                running.result(timeout=60)
    finally:
        own.stop_all()


# --- through the service: a real uvicorn server on threads and one on the cluster -------------------------------


def _demo_request(features: dict) -> dict:
    """A request on the tiny demo: growing-season totals, means and degree days with z, classes and one lag."""
    return {
        "dataset": "demo",
        "features": features,
        "years": {"start": 1991, "end": 2018},
        "season": {"months": [5, 6, 7, 8, 9, 10]},
        "baseline": {"start": 1980, "end": 1990},
        "indicators": [
            "prcp_total",
            "tmean",
            {"name": "gdd", "base": 10, "cap": 30},
            {"name": "edd", "threshold": 29},
        ],
        "classes": {"edges": [-2, -1, 1, 2]},
        "lags": [0, 1],
    }


@pytest.fixture(scope="module")
def servers(tiny_demo: Path, dask_cluster: DaskProcesses, tmp_path_factory: pytest.TempPathFactory):
    """(threads server, cluster server) over the same tiny demo store."""
    from tests._support_server import thread_server

    on_threads = Settings(
        stores=[str(tiny_demo)], data_dir=tmp_path_factory.mktemp("threads-data"), threads=2
    )
    on_cluster = Settings(
        stores=[str(tiny_demo)],
        data_dir=tmp_path_factory.mktemp("cluster-data"),
        scheduler=dask_cluster.address,
    )
    with thread_server(on_threads) as local, thread_server(on_cluster) as remote:
        yield local, remote


def _job_result(server, body: dict, *, while_running=None) -> tuple[dict, bytes]:
    """Submit a batch job, wait for it to end (calling ``while_running(client, status)`` meanwhile)."""
    with server.client() as client:
        submitted = client.post("/v1/jobs", params={"format": "parquet"}, json=body)
        assert submitted.status_code == 202, submitted.text
        location = submitted.headers["Location"]
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            status = client.get(location).json()
            if status["state"] in ("succeeded", "failed", "cancelled"):
                break
            if while_running is not None and status["state"] == "running":
                while_running(status)
                while_running = None
            time.sleep(0.02)
        assert status["state"] == "succeeded", status
        result = client.get(location + "/result")
        assert result.status_code == 200
        return status, result.content


@pytest.mark.cluster
@pytest.mark.slow
@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
def test_on_demand_request_on_the_cluster_gives_the_same_bytes(
    servers, tiny_communities: dict, fmt: str
) -> None:
    local, remote = servers
    some = dict(tiny_communities, features=tiny_communities["features"][::4])
    body = _demo_request(some)
    with local.client() as a, remote.client() as b:
        expected = a.post("/v1/indicators", params={"format": fmt}, json=body)
        got = b.post("/v1/indicators", params={"format": fmt}, json=body)
    assert expected.status_code == got.status_code == 200, got.text
    assert got.headers["content-type"] == expected.headers["content-type"]
    assert got.content == expected.content
    for header in ("x-wxshock-fingerprint", "x-wxshock-request-hash"):
        assert got.headers.get(header) == expected.headers.get(header)


@pytest.mark.cluster
@pytest.mark.slow
def test_batch_job_on_the_cluster_gives_the_same_bytes(servers, tiny_communities: dict) -> None:
    local, remote = servers
    body = _demo_request(tiny_communities)
    local_status, expected = _job_result(local, body)
    remote_status, got = _job_result(remote, body)
    assert got == expected
    assert (
        remote_status["features_done"] == remote_status["features_total"] == len(tiny_communities["features"])
    )


@pytest.mark.cluster
@pytest.mark.slow
def test_batch_job_survives_a_worker_stopped_mid_way(servers, tiny_communities: dict, dask_cluster) -> None:
    local, remote = servers
    body = _demo_request(tiny_communities)
    body["indicators"] = body["indicators"][:2]  # another request than the test above, so no reuse
    _, expected = _job_result(local, body)
    client = cluster.client_for(Settings(scheduler=dask_cluster.address))
    victim = "worker-b"
    victim_address = next(
        a for a, info in client.scheduler_info(n_workers=-1)["workers"].items() if info["name"] == victim
    )
    stopped: list[int] = []

    def stop_victim_while_it_works(status: dict) -> None:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and not client.processing().get(victim_address):
            time.sleep(0.005)
        stopped.append(len(client.processing().get(victim_address, ())))
        dask_cluster.stop_worker(victim)

    try:
        status, got = _job_result(remote, body, while_running=stop_victim_while_it_works)
        assert stopped and stopped[0] > 0, "the worker was stopped while it had no task"
        assert victim_address not in client.scheduler_info(n_workers=-1)["workers"]
        assert status["attempts"] == 1  # the scheduler redid the lost work; the job itself did not rerun
        assert got == expected
    finally:
        dask_cluster.ensure_workers()


@pytest.mark.cluster
def test_cli_compute_with_scheduler_writes_the_same_file(
    tiny_demo: Path, tiny_communities: dict, dask_cluster: DaskProcesses, tmp_path: Path
) -> None:
    from service.cli import main

    some = dict(tiny_communities, features=tiny_communities["features"][:6])
    request = tmp_path / "request.json"
    request.write_text(json.dumps(_demo_request(some)), encoding="utf-8")
    base = ["compute", "--store", str(tiny_demo), "--request", str(request), "--quiet"]
    assert main([*base, "--out", str(tmp_path / "threads.parquet")]) == 0
    assert main([*base, "--out", str(tmp_path / "cluster.parquet"), "--scheduler", dask_cluster.address]) == 0
    assert (tmp_path / "cluster.parquet").read_bytes() == (tmp_path / "threads.parquet").read_bytes()


# --- where the indicator table is computed ----------------------------------------------------------------------


def _sent_to_non_workers(client, workers: set[str]) -> dict[str, list[dict]]:
    """Each worker's logged transfers to something other than a worker (the server's client)."""
    logs = client.run(lambda dask_worker: list(dask_worker.transfer_outgoing_log))
    return {name: [e for e in log if e.get("who") not in workers] for name, log in logs.items()}


@pytest.mark.cluster
@pytest.mark.slow
def test_workers_send_tables_not_daily_series(tiny_demo: Path, tiny_communities: dict, dask_cluster) -> None:
    """A run on the cluster gets back one table per feature batch and no aggregation result: the daily
    series stay on the workers (and the rows are those of the threaded run, byte for byte)."""
    from distributed import Client

    from service import pipeline
    from service.schemas import IndicatorRequest, validate_request
    from service.store import open_store

    dask_cluster.ensure_workers()
    store = open_store(tiny_demo)
    request = validate_request(IndicatorRequest, {**_demo_request(tiny_communities), "dataset": None})
    remote = _settings(scheduler=dask_cluster.address)
    with Client(dask_cluster.address, set_as_default=False) as observer:
        workers = set(observer.scheduler_info(n_workers=-1)["workers"])
        before = {name: len(log) for name, log in _sent_to_non_workers(observer, workers).items()}
        on_cluster = pipeline.run(request, store, remote, batch_size=10)
        after = _sent_to_non_workers(observer, workers)
        sent = [entry for name, log in after.items() for entry in log[before.get(name, 0) :]]
    on_threads = pipeline.run(request, store, _settings(threads=2), batch_size=10)
    assert on_cluster.frame.equals(on_threads.frame)
    keys = [key for entry in sent for key in entry["keys"]]
    batches = -(-len(tiny_communities["features"]) // 10)
    assert len(keys) == batches, keys  # one table per batch, nothing else
    assert all(str(key).startswith("wxshock-table-") for key in keys), keys
    days = store.n_times
    series_bytes = 10 * days * 3 * 8  # what one batch's daily series would have been
    assert max(entry["total"] for entry in sent) < series_bytes / 10
