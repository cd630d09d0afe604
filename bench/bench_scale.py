"""Scale figures of issue 15, measured side by side in one run (bench/RESULTS.md, "Scale"; model in bench/SCALE.md).

    python bench/bench_scale.py                          # everything; writes its section of bench/RESULTS.md
    python bench/bench_scale.py --only decode,batch --no-write
    python bench/bench_scale.py --store bench/out/large/synthetic.zarr --features 500 --no-write

Phases (each in its own process, so that its peak memory is its own; ``--only`` picks some):

  decode   the physical limit: every chunk file the batch touches (the variables its indicators need, the
           days they read) read and blosc-decoded with numcodecs on all cores, no zarr; the better of two
           passes, so that the disk is not timed (the files are in the page cache after the first)
  batch    the 5,000-village batch, indicators included: ``pipeline.run`` over every feature (default
           indicator set, every season-year), on local threads; wall and CPU seconds, peak RSS, chunk reads
  turns    the decode and batch phases in turns (decode, batch, decode, ..., decode; each in a fresh process,
           the batch run twice): each batch over the mean of the two decodes around it, so that the machine's
           drift over minutes (bench/RESULTS.md, sessions 6-8) cancels
  costs    the per-chunk and per-feature costs bench/SCALE.md builds its model on: read + decode of one
           chunk through Store.read_raw, the weighted sums of one chunk, the table of one feature
  latency  one 25-cell community, default indicators, 48 years, in-process on a warm store (p50, p95 of
           ``pipeline.run``), for each layout given with --latency-store
  cluster  bytes the server receives per feature from a local two-worker cluster: the table now, and the
           daily series the server used to gather (the aggregation computed alone, as before), measured from
           the workers' transfer logs

The machine is shared (2 cores, other engineers' work): every time is given with its CPU seconds and the load
average when it was taken; wall-clock ratios under load are upper bounds.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
# The code measured: this checkout, or (--old-code) another one, e.g. a worktree of the commit before issue 15.
CODE = Path(os.environ.get("WXSHOCK_BENCH_CODE") or ROOT)
sys.path.insert(0, str(CODE))
sys.path.insert(0, str(CODE / "bench"))

OUT = ROOT / "bench" / "out"
RESULTS = ROOT / "bench" / "RESULTS.md"
START, END = "<!-- bench_scale: start -->", "<!-- bench_scale: end -->"
DEFAULT_STORE = OUT / "large" / "synthetic.zarr"
DEFAULT_SMALL = OUT / "latency-small" / "demo.zarr"


def load() -> float:
    """The 1-minute load average."""
    return os.getloadavg()[0]


def cpu_ticks() -> tuple[int, int]:
    """(stolen, all) CPU ticks of the machine since boot (/proc/stat; stolen: time the hypervisor ran others on
    this machine's virtual CPUs while they had work); (0, 0) where there is no /proc/stat."""
    try:
        with open("/proc/stat", encoding="ascii") as f:
            fields = [int(v) for v in f.readline().split()[1:9]]
    except (OSError, ValueError):
        return 0, 0
    return fields[7], sum(fields)


def stolen_pct(since: tuple[int, int]) -> float | None:
    """The share of the machine's CPU time stolen since ``since`` (cpu_ticks()), percent; None if unknown."""
    stolen, total = cpu_ticks()
    return 100.0 * (stolen - since[0]) / (total - since[1]) if total > since[1] else None


def peak_mb() -> float:
    """This process's peak RSS (MB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def polygons(store: Any, n: int) -> dict[str, Any]:
    """bench_aggregate's n invented villages on the store (cached in bench/out)."""
    path = (
        OUT / f"polygons-{Path(store.location).stem}-{store.grid.shape[0]}x{store.grid.shape[1]}-{n}.geojson"
    )
    if not path.exists():
        from bench_aggregate import invented_polygons

        path.write_text(json.dumps(invented_polygons(store, n)), encoding="utf-8")
    return json.loads(path.read_text(encoding="utf-8"))


def batch_request(features: dict[str, Any]) -> Any:
    """The batch: every default (indicator set, baseline, every season-year the data allow)."""
    from service.schemas import IndicatorRequest, validate_request

    return validate_request(IndicatorRequest, {"features": features})


def touched_chunks(
    store: Any, weights: Any, variables: tuple[str, ...], span: slice
) -> list[tuple[str, tuple]]:
    """(variable, inner chunk coordinates) of every chunk the features' cells and the days touch."""
    import numpy as np

    matrix = weights.matrix.tocsr()
    cells = np.unique(matrix.indices[matrix.data != 0])
    ny, nx = store.grid.shape
    cy, cx, ct = store.inner_chunk_shape if hasattr(store, "inner_chunk_shape") else store.chunk_shape
    iy, ix = np.divmod(cells, nx)
    tiles = sorted(set(zip((iy // cy).tolist(), (ix // cx).tolist(), strict=True)))
    blocks = range(span.start // ct, (span.stop - 1) // ct + 1)
    return [(v, (ty, tx, b)) for v in variables for ty, tx in tiles for b in blocks]


def decode_inputs(store: Any, features: int) -> tuple[dict[str, Any], list[tuple[str, tuple]]]:
    """(chunk reader of each variable, [(variable, inner chunk coordinates)]) of the chunks the batch of
    ``features`` villages touches: what the raw decode reads."""
    from service import pipeline
    from service.indicators import table
    from service.settings import Settings

    request = batch_request(polygons(store, features))
    resolved = table.resolve_request(request, store.dates, store.calendar, store.variables)
    _, weights = pipeline.features_and_weights(resolved, store, Settings())
    variables = pipeline.needed_variables(resolved)
    span = pipeline.time_span(store, resolved.years.end)
    chunks = touched_chunks(store, weights, variables, span)
    readers = {v: store._chunk_readers[v] for v in variables}
    if any(r is None for r in readers.values()):
        raise SystemExit("the store's codecs are not bytes + blosc: no direct decode to compare with")
    return readers, chunks


def phase_decode(args: argparse.Namespace) -> dict[str, Any]:
    """Read every touched chunk's bytes and blosc-decode them with numcodecs on all cores; best of two passes."""
    from service.store import open_store

    store = open_store(args.store)
    readers, chunks = decode_inputs(store, args.features)
    passes, sizes = decode_chunks(readers, chunks)
    best = min(passes)
    # the same reads decoded into memory reused chunk after chunk (each thread's own), as the service now reads:
    # the decoding alone, without the first-touch cost of fresh memory
    reused = min(decode_chunks(readers, chunks, reuse=True)[0])
    return {
        "chunks": len(chunks),
        "decoded_gib": sum(s[0] for s in sizes) / 2**30,
        "wall_s": best[0],
        "cpu_s": best[1],
        "steal_pct": best[2],
        "passes": passes,
        "reused_wall_s": reused[0],
        "reused_cpu_s": reused[1],
        "load": load(),
    }


def decode_chunks(
    readers: dict[str, Any], items: list[tuple[str, tuple]], reuse: bool = False
) -> tuple[list[tuple[float, float, float | None]], list[tuple[int, int]]]:
    """Read each (variable, inner chunk coordinates) item's bytes and blosc-decode them with numcodecs on all
    cores, twice: ([(wall s, CPU s, % of CPU stolen)] of each pass, [(decoded bytes, compressed bytes)] of each item).

    Each chunk is decoded into a fresh array (the issue's measure), or with ``reuse`` into one array per thread
    and shape, reused."""
    import numpy as np
    from numcodecs import Blosc

    from service.store.chunks import scratch_array

    def output(reader: Any) -> np.ndarray:
        if reuse:
            return scratch_array(reader.inner_shape, reader.dtype)
        return np.empty(reader.inner_shape, dtype=reader.dtype)

    def one(item: tuple[str, tuple]) -> tuple[int, int]:
        var, coords = item
        reader = readers[var]
        if reader.shard_shape is None:
            data = reader._get(reader._metadata.encode_chunk_key(coords))
        else:  # the inner chunk's bytes from its shard, the index read as part of the work
            shard = tuple(c // p for c, p in zip(coords, reader._per_shard, strict=True))
            index = reader._shard_index(shard)
            local = tuple(c % p for c, p in zip(coords, reader._per_shard, strict=True))
            offset, length = (int(v) for v in index[np.ravel_multi_index(local, reader._per_shard)])
            data = reader._get(reader._metadata.encode_chunk_key(shard), start=offset, length=length)
        out = output(reader)
        Blosc().decode(data, out=out)
        return out.nbytes, len(data)

    passes, sizes = [], []
    for _ in range(2):
        for reader in readers.values():
            if reader.shard_shape is not None:
                reader._indexes.clear()
        wall, cpu, ticks = time.perf_counter(), time.process_time(), cpu_ticks()
        with ThreadPoolExecutor(os.cpu_count() or 1) as pool:
            sizes = list(pool.map(one, items))
        passes.append((time.perf_counter() - wall, time.process_time() - cpu, stolen_pct(ticks)))
    return passes, sizes


def phase_batch(args: argparse.Namespace) -> dict[str, Any]:
    """pipeline.run over every village, indicators included, on local threads: the first run in a fresh process,
    then ``--batch-again`` more runs of the same batch in that process (a server that has run one before)."""
    from service.store import open_store

    store = open_store(args.store)
    first = timed_batch(store, args.features)
    peak_first = peak_mb()
    again = [timed_batch(store, args.features) for _ in range(args.batch_again)]
    result = {**first, "peak_mb": peak_first, "load": load()}
    if again:
        result.update(
            again=[(r["wall_s"], r["cpu_s"]) for r in again],
            again_wall_median=statistics.median(r["wall_s"] for r in again),
            again_cpu_median=statistics.median(r["cpu_s"] for r in again),
            again_wall_best=min(r["wall_s"] for r in again),
            again_steal=[r["steal_pct"] for r in again],
            again_steal_median=(
                statistics.median(stolen)
                if (stolen := [r["steal_pct"] for r in again if r["steal_pct"] is not None])
                else None
            ),
            again_peak_mb=peak_mb(),
            again_load=load(),
        )
    return result


def timed_batch(store: Any, features: int) -> dict[str, Any]:
    """``features`` invented villages through pipeline.run (default indicators, every season-year) on local
    threads, the weights prepared and the compiled kernels loaded before the clock: wall and CPU seconds, rows,
    columns, chunk reads."""
    import importlib

    from service import aggregate, pipeline
    from service.settings import Settings

    request = batch_request(polygons(store, features))
    settings = Settings(threads=os.cpu_count())
    prepared = pipeline.prepare(request, store, settings)
    reads = [0]
    # every task that reads a chunk (older code has no chunk_sums_for_two: one read for two batches)
    originals = {
        n: getattr(aggregate, n) for n in ("chunk_sums", "chunk_sums_for_two") if hasattr(aggregate, n)
    }

    def counting(original: Any) -> Any:
        def counted(*a: Any, **k: Any) -> Any:
            reads[0] += 1
            return original(*a, **k)

        return counted

    for name, original in originals.items():
        setattr(aggregate, name, counting(original))
    # the compiled kernels' one-time load (numba imported, machine code from its cache), as a running server has
    # done before its first request; timed apart (older code has no kernels: about 0)
    kernel_cpu = time.process_time()
    for module in ("service.weighted_sums", "service.indicators.compiled"):
        try:
            warm_up = importlib.import_module(module).warm_up
        except (ImportError, AttributeError):
            continue
        warm_up()
    kernel_cpu = time.process_time() - kernel_cpu
    try:
        wall, cpu, ticks = time.perf_counter(), time.process_time(), cpu_ticks()
        result = pipeline.run(request, store, settings, prepared=prepared)
        wall, cpu, steal = time.perf_counter() - wall, time.process_time() - cpu, stolen_pct(ticks)
    finally:
        for name, original in originals.items():
            setattr(aggregate, name, original)
    return {
        "wall_s": wall,
        "cpu_s": cpu,
        "steal_pct": steal,
        "kernel_load_cpu_s": kernel_cpu,
        "rows": len(result.frame),
        "columns": len(result.frame.columns),
        "chunk_reads": reads[0],
    }


def phase_costs(args: argparse.Namespace) -> dict[str, Any]:
    """Per-chunk read + decode (Store.read_raw), per-chunk weighted sums, per-feature table: CPU ms, medians."""
    import numpy as np
    from numcodecs import blosc

    from service import aggregate, pipeline
    from service.indicators import table
    from service.settings import Settings
    from service.store import open_store

    blosc.use_threads = (
        False  # decoded in this thread, as the pipeline's task threads do: thread_time sees it all
    )
    store = open_store(args.store)
    request = batch_request(polygons(store, args.features))
    resolved = table.resolve_request(request, store.dates, store.calendar, store.variables)
    _, weights = pipeline.features_and_weights(resolved, store, Settings())
    rows = pipeline.feature_batches(weights, 1000)[0]
    batch = pipeline.take_weights(weights, rows)
    plan = aggregate.chunk_weights(batch, store.grid.shape, store.chunk_shape[:2])
    ct = store.chunk_shape[2]
    enc = store.encoding("tmax")

    def cpu_ms(f: Any, repeat: int = 5) -> float:
        times = []
        for _ in range(repeat):
            start = time.thread_time()
            f()
            times.append((time.thread_time() - start) * 1000)
        return statistics.median(times)

    picks = plan[:: max(1, len(plan) // 6)][:6]
    read_ms = statistics.median(
        cpu_ms(lambda c=c: store.read_raw("tmax", c.y, c.x, slice(ct, 2 * ct))) for c in picks
    )
    sums_ms = (
        statistics.median(
            cpu_ms(
                lambda c=c: aggregate.block_sums(
                    np.asarray(store.read_raw("tmax", c.y, c.x, slice(ct, 2 * ct))).reshape(-1, ct),
                    c,
                    enc.scale_factor,
                    enc.fill_value,
                )
            )
            for c in picks
        )
        - read_ms
    )
    nnz = statistics.median(c.matrix.nnz for c in picks)
    span = pipeline.time_span(store, resolved.years.end)
    variables = pipeline.needed_variables(resolved)
    import dask

    few = rows[:200]
    lazy = pipeline.lazy_batch_table(
        store, weights, few, [None] * len(few), pipeline._without_features(resolved), span, variables
    )
    start = time.process_time()
    dask.compute(lazy, scheduler="sync")
    whole_ms = (time.process_time() - start) * 1000
    # the table alone (snap, seasons, indicators, feature columns) from computed daily means, per feature
    part = pipeline.take_weights(weights, few)
    series = dask.compute(
        aggregate.lazy_series(store, part, variables=variables, time=span), scheduler="sync"
    )[0]
    by_id = pipeline._feature_frame(part, np.arange(len(few)))
    tables = []
    for _ in range(3):
        arrays = {v: a.copy() for v, a in series.items()}
        start = time.process_time()
        pipeline.batch_table(arrays, store, span, np.asarray(part.latitude), list(part.feature_ids),
                             [None] * len(few), pipeline._without_features(resolved), by_id)  # fmt: skip
        tables.append((time.process_time() - start) * 1000 / len(few))
    return {
        "table_ms_per_feature": min(tables),
        "years": len(range(store.dates.year[span.start], store.dates.year[span.stop - 1] + 1)),
        "chunk_cells": int(np.prod(store.chunk_shape[:2])),
        "chunk_days": ct,
        "read_decode_ms": read_ms,
        "weighted_sums_ms": sums_ms,
        "nnz_per_chunk": nnz,
        "batch_200_ms": whole_ms,
        "load": load(),
    }


def phase_latency(args: argparse.Namespace) -> dict[str, Any]:
    """p50/p95 of pipeline.run for one ~25-cell community, default indicators, every season-year (warm)."""
    from service import pipeline
    from service.encode import encode
    from service.schemas import IndicatorRequest, validate_request
    from service.settings import Settings
    from service.store import open_store

    out = {}
    for location in args.latency_store:
        store = open_store(location)
        communities = json.loads((Path(location).parent / "communities.geojson").read_text(encoding="utf-8"))
        settings = Settings(threads=os.cpu_count())
        best = None
        for feature in communities["features"]:
            request = validate_request(IndicatorRequest, {"features": feature})
            cells = int(pipeline.features_and_weights(request, store, settings)[1].n_cells[0])
            if best is None or abs(cells - 25) < abs(best[1] - 25):
                best = (feature, cells)
        feature, cells = best
        request = validate_request(IndicatorRequest, {"features": feature})
        import numpy as np

        from service.store.chunks import configure_tile_cache, tile_cache

        # without the decoded-tile cache (every request decodes its chunks), then with the server's default
        for cache_mb in (0, Settings().tile_cache_mb):
            configure_tile_cache(cache_mb << 20)
            for _ in range(5):
                pipeline.run(request, store, settings)
            times, cpus = [], []
            for _ in range(args.requests):
                start, cpu = time.perf_counter(), time.process_time()
                result = pipeline.run(request, store, settings)
                encode(result, "json")
                times.append((time.perf_counter() - start) * 1000)
                cpus.append((time.process_time() - cpu) * 1000)
            out[f"{location} (tile cache {cache_mb} MB)"] = {
                "community": feature.get("id"),
                "cells": cells,
                "rows": len(result.frame),
                "p50_ms": float(np.percentile(times, 50)),
                "p95_ms": float(np.percentile(times, 95)),
                "cpu_ms_median": statistics.median(cpus),
                "chunks": describe_chunks(store),
                "cache_mb": cache_mb,
                "cached_mb": tile_cache().nbytes / 2**20,
                "load": load(),
            }
    return out


def describe_chunks(store: Any) -> str:
    """The store's read unit and compressed chunk, in words."""
    unit = store.chunk_shape
    inner = getattr(store, "inner_chunk_shape", unit)
    text = f"{unit[0]} x {unit[1]} cells x {unit[2]} days"
    return (
        text
        if tuple(inner) == tuple(unit)
        else f"{text} shards of {inner[0]} x {inner[1]} x {inner[2]} chunks"
    )


def phase_cluster(args: argparse.Namespace) -> dict[str, Any]:
    """Bytes the workers send to the server per feature: the table now, the daily series before."""
    import tempfile

    from distributed import Client

    from service import aggregate, cluster, pipeline
    from service.indicators import table
    from service.settings import Settings
    from service.store import open_store
    from tests._support_cluster import DaskProcesses

    store = open_store(args.store)
    features = polygons(store, args.features)
    features = dict(features, features=features["features"][: args.cluster_features])
    request = batch_request(features)
    n = len(features["features"])
    with tempfile.TemporaryDirectory() as root:
        processes = DaskProcesses(Path(root))
        processes.start_scheduler()
        try:
            processes.ensure_workers()
            settings = Settings(scheduler=processes.address)
            with Client(processes.address, set_as_default=False) as observer:
                workers = set(observer.scheduler_info(n_workers=-1)["workers"])

                def to_server(among: bool = False) -> int:
                    """Bytes the workers sent so far to others than workers (the server), or among themselves."""
                    logs = observer.run(lambda dask_worker: list(dask_worker.transfer_outgoing_log))
                    return sum(
                        e["total"] for log in logs.values() for e in log if (e.get("who") in workers) == among
                    )

                before, among_before = to_server(), to_server(among=True)
                wall = time.perf_counter()
                pipeline.run(request, store, settings)
                after_wall = time.perf_counter() - wall
                now, among_now = to_server(), to_server(among=True)
                # before: the aggregation alone, its daily series gathered by the server (the old path)
                resolved = table.resolve_request(request, store.dates, store.calendar, store.variables)
                prepared = pipeline.prepare(request, store, settings)
                span = pipeline.time_span(store, resolved.years.end)
                variables = pipeline.needed_variables(resolved)
                wall = time.perf_counter()
                for rows in pipeline.feature_batches(prepared.weights, 1000):
                    batch = pipeline.take_weights(prepared.weights, rows)
                    daily = aggregate.aggregate(store, batch, variables=variables, time=span)
                    cluster.compute(daily.drop_vars("tmean", errors="ignore"), settings=settings)
                old_wall = time.perf_counter() - wall
                old = to_server()
        finally:
            cluster.close_clients()
            for name in list(processes.workers):
                processes.stop_worker(name)
            if processes.scheduler is not None:
                processes.scheduler.kill()
    return {
        "features": n,
        "days": int(span.stop - span.start),
        "variables": list(variables),
        "table_bytes_per_feature": (now - before) / n,
        "series_bytes_per_feature": (old - now) / n,
        "between_workers_bytes_per_feature": (among_now - among_before) / n,
        "run_wall_s": after_wall,
        "aggregation_only_wall_s": old_wall,
        "load": load(),
    }


NO_TRIM = """# bench_scale: the server without malloc_trim (service.memory.release_memory made a no-op before app imports it)
import service.memory

service.memory.release_memory = lambda: False
"""


def _cpu_seconds(pid: int) -> float | None:
    """User + system CPU seconds of a running process (its threads included), from /proc."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return None
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def phase_job(args: argparse.Namespace) -> dict[str, Any]:
    """Server peak RSS for a job of --job-features buffered points (default: over the small demo), in each
    format of --job-formats; RSS after the job with and without malloc_trim. Each case in its own server
    (`wxshock serve`, 127.0.0.1), with the settings of --job-env; --job-cluster runs the jobs on a local
    dask cluster (a scheduler and two workers) instead of the server's threads."""
    import contextlib
    import tempfile

    import httpx
    from bench_hardening import points

    from tests import _support_memory as memory

    store = Path(args.job_store) if args.job_store else DEFAULT_SMALL
    body = json.dumps({"features": points(store, args.job_features)})
    out: dict[str, Any] = {"features": args.job_features, "store": str(store), "env": args.job_env or [],
                           "cluster": bool(args.job_cluster)}  # fmt: skip
    formats = args.job_formats.split(",")
    cases = [(fmt, True) for fmt in formats] + ([(formats[0], False)] if args.job_no_trim else [])
    extra = dict(item.split("=", 1) for item in args.job_env or [])
    with tempfile.TemporaryDirectory() as root, contextlib.ExitStack() as stack:
        if args.job_cluster:
            from tests._support_cluster import DaskProcesses

            (Path(root) / "cluster").mkdir()
            processes = DaskProcesses(Path(root) / "cluster")
            stack.callback(processes.stop_all)
            processes.start_scheduler()
            processes.ensure_workers()
            extra["WXSHOCK_SCHEDULER"] = processes.address
        no_trim = Path(root) / "no-trim"
        no_trim.mkdir()
        (no_trim / "sitecustomize.py").write_text(NO_TRIM, encoding="utf-8")
        for fmt, trim in cases:
            path = f"{CODE}:{no_trim}" if not trim else str(CODE)
            server = memory.start_capped(
                stores=[store], data_dir=Path(root) / f"{fmt}-{trim}", cap_bytes=4 << 30,
                env={"PYTHONPATH": path, "WXSHOCK_JOB_WORKERS": "1", **extra}, cwd=CODE,
            )  # fmt: skip
            try:
                server.sample()
                idle = server.samples[-1]
                cpu_before = _cpu_seconds(server.pid) or 0.0
                load_start = load()
                with httpx.Client(base_url=server.server.base_url, timeout=600) as client:
                    start = time.perf_counter()
                    submitted = client.post(f"/v1/jobs?format={fmt}", content=body,
                                            headers={"Content-Type": "application/json"})  # fmt: skip
                    if submitted.status_code != 202:
                        raise SystemExit(f"job refused: {submitted.status_code} {submitted.text[:500]}")
                    server.sample()
                    after_submit = server.peak_rss
                    # The run's own peak: the kernel's high-water mark reset to the RSS now (Linux >= 4.0),
                    # a second after the 202, so that the submission's malloc_trim (after its response) is done
                    time.sleep(1.0)
                    with contextlib.suppress(OSError):
                        Path(f"/proc/{server.pid}/clear_refs").write_text("5")
                    run_peak = 0
                    location = submitted.headers["Location"]
                    state: dict[str, Any] = {}
                    deadline = time.monotonic() + args.job_limit_s
                    while time.monotonic() < deadline:
                        server.sample()
                        run_peak = max(run_peak, memory.peak_rss_bytes(server.pid) or 0)
                        state = client.get(location).json()
                        if state.get("state") not in ("queued", "running"):
                            break
                        time.sleep(0.5)
                    wall = time.perf_counter() - start
                    cpu = (_cpu_seconds(server.pid) or 0.0) - cpu_before
                    time.sleep(2.0)  # the trim runs after the job's end is recorded
                    server.sample()
                    run_peak = max(run_peak, memory.peak_rss_bytes(server.pid) or 0)
                    after = server.samples[-1]
                    size = None
                    if state.get("state") == "succeeded":
                        with client.stream("GET", location + "/result") as result:
                            size = sum(len(chunk) for chunk in result.iter_bytes())
            finally:
                server.stop()
            out[f"{fmt}{'' if trim else '_no_trim'}"] = {
                "state": state.get("state"),
                "error": state.get("error"),
                "wall_s": wall,
                "server_cpu_s": cpu,
                "peak_rss_mb": server.peak_rss / 2**20,
                "peak_after_submission_mb": after_submit / 2**20,
                "run_peak_rss_mb": run_peak / 2**20,
                "idle_rss_mb": idle / 2**20,
                "rss_after_mb": after / 2**20,
                "result_mb": None if size is None else size / 2**20,
                "cap": server.report()["cap"],
                "load_start": load_start,
                "load": load(),
            }
            print(json.dumps({fmt: out[f"{fmt}{'' if trim else '_no_trim'}"]}), file=sys.stderr, flush=True)
    return out


def phase_trim(args: argparse.Namespace) -> dict[str, Any]:
    """RSS after a large request (--trim-features villages, threads), before and after malloc_trim(0)."""
    import gc

    from service import pipeline
    from service.memory import release_memory, rss_bytes
    from service.settings import Settings
    from service.store import open_store

    store = open_store(args.store)
    features = polygons(store, args.features)
    request = batch_request(dict(features, features=features["features"][: args.trim_features]))
    settings = Settings(threads=os.cpu_count())
    before = rss_bytes()
    result = pipeline.run(request, store, settings)
    rows = len(result.frame)
    del result
    gc.collect()
    time.sleep(1.0)
    after = rss_bytes()
    start = time.perf_counter()
    trimmed = release_memory()
    trim_ms = (time.perf_counter() - start) * 1000
    return {
        "features": args.trim_features,
        "rows": rows,
        "rss_before_mb": before / 2**20,
        "rss_after_request_mb": after / 2**20,
        "rss_after_trim_mb": rss_bytes() / 2**20,
        "peak_mb": peak_mb(),
        "returned": trimmed,
        "trim_ms": trim_ms,
        "load": load(),
    }


PHASES = {
    "trim": phase_trim,
    "job": phase_job,
    "decode": phase_decode,
    "batch": phase_batch,
    "costs": phase_costs,
    "latency": phase_latency,
    "cluster": phase_cluster,
}


def turns_summary(decodes: list[dict[str, Any]], batches: list[dict[str, Any]]) -> dict[str, Any]:
    """Each batch's first run and its run after, over the mean of the raw decodes just before and after it (wall
    and CPU time); their medians."""

    def first(b: dict[str, Any]) -> tuple[float, float]:
        return b["wall_s"], b["cpu_s"]

    def ratios(run: Any, key: int) -> list[float]:
        return [
            run(b)[key] / ((first(d0)[key] + first(d1)[key]) / 2)
            for b, d0, d1 in zip(batches, decodes, decodes[1:], strict=False)
        ]

    def after(b: dict[str, Any]) -> tuple[float, float]:
        return b["again_wall_median"], b["again_cpu_median"]

    stolen = [f["steal_pct"] for f in (*decodes, *batches) if f.get("steal_pct") is not None]
    out: dict[str, Any] = {
        "decodes": [first(d) for d in decodes],
        "batches": [(*first(b), *after(b)) for b in batches],
        "steal_max_pct": max(stolen) if stolen else None,
        "load_max": max(f["load"] for f in (*decodes, *batches)),
    }
    for name, run in (("first", first), ("after", after)):
        for key, unit in enumerate(("wall", "cpu")):
            values = ratios(run, key)
            out[f"{name}_{unit}_ratios"] = values
            out[f"{name}_{unit}_median"] = statistics.median(values)
    return out


def run_phase(name: str, argv: list[str], code: Path = ROOT) -> dict[str, Any]:
    """One phase in a fresh process, on the code of checkout ``code``; its JSON result."""
    env = dict(os.environ, PYTHONPATH=str(code), WXSHOCK_BENCH_CODE=str(code))
    done = subprocess.run(
        [sys.executable, __file__, "--phase", name, *argv],
        capture_output=True,
        text=True,
        env=env,
        check=False,
    )
    if done.returncode != 0:
        raise SystemExit(f"phase {name} failed:\n{done.stderr[-4000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def _phase_logged(name: str, argv: list[str], code: Path = ROOT) -> dict[str, Any]:
    """run_phase, its start and its result logged to stderr."""
    print(f"[{time.strftime('%H:%M:%S')}] {name} (load {load():.1f}) ...", file=sys.stderr, flush=True)
    result = run_phase(name, argv, code)
    print(json.dumps(result, default=str), file=sys.stderr, flush=True)
    return result


def main() -> int:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--store", default=str(DEFAULT_STORE))
    parser.add_argument(
        "--old-store", help="the same data on the previous layout (its batch time is shown beside)"
    )
    parser.add_argument(
        "--old-code",
        help="a checkout of the code before (e.g. `git worktree add /tmp/wx-c6fa956 c6fa956`): its batch time "
        "and its cluster bytes are measured in the same run, beside this code's",
    )
    parser.add_argument("--features", type=int, default=5000)
    parser.add_argument("--cluster-features", type=int, default=500)
    parser.add_argument("--job-features", type=int, default=50_000)
    parser.add_argument(
        "--job-store", help="store of the job phase (default: the small demo of bench_hardening)"
    )
    parser.add_argument("--job-limit-s", type=float, default=1800.0)
    parser.add_argument("--job-no-trim", action="store_true", help="also a server without malloc_trim")
    parser.add_argument("--job-formats", default="csv,parquet", help="formats of the job phase, in order")
    parser.add_argument(
        "--job-env",
        action="append",
        help="a server setting for the job phase, e.g. WXSHOCK_JOB_BATCH_SERIES_MB=64",
    )
    parser.add_argument("--job-cluster", action="store_true", help="the job phase on a local dask cluster")
    parser.add_argument("--trim-features", type=int, default=2000)
    parser.add_argument(
        "--batch-again", type=int, default=4, help="runs of the batch after the first, in the same process"
    )
    parser.add_argument(
        "--turns", type=int, default=4, help="batch phases of the turns, each between two decode phases"
    )
    parser.add_argument("--requests", type=int, default=60)
    parser.add_argument("--latency-store", action="append", default=None)
    parser.add_argument("--only", default="decode,batch,turns,costs,latency,cluster")
    parser.add_argument("--phase", help=argparse.SUPPRESS)
    parser.add_argument("--no-write", action="store_true")
    args = parser.parse_args()
    if args.latency_store is None:
        args.latency_store = [str(DEFAULT_SMALL)]
    if args.phase:
        print(json.dumps(PHASES[args.phase](args), default=str))
        return 0
    argv = [
        "--store", args.store, "--features", str(args.features), "--requests", str(args.requests),
        "--cluster-features", str(args.cluster_features), "--job-features", str(args.job_features),
        "--job-limit-s", str(args.job_limit_s), "--trim-features", str(args.trim_features),
        "--batch-again", str(args.batch_again), "--turns", str(args.turns),
        *(["--job-store", args.job_store] if args.job_store else []),
        "--job-formats", args.job_formats, *(["--job-cluster"] if args.job_cluster else []),
        *(["--job-no-trim"] if args.job_no_trim else []),
    ]  # fmt: skip
    for item in args.job_env or []:
        argv += ["--job-env", item]
    for location in args.latency_store:
        argv += ["--latency-store", location]
    results: dict[str, Any] = {"started": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()), "load": load()}
    names = args.only.split(",")
    last_decode = None  # the result of the last phase run, when that phase was a decode
    for name in names:
        if name == "turns":
            continue
        results[name] = _phase_logged(name, argv)
        last_decode = results[name] if name == "decode" else None
        if name == "batch" and "decode" in results:
            # the decode again right after the batch: the machine's speed drifts within minutes (RESULTS.md,
            # sessions 6-8), and a ratio against both decodes shows how much of it is drift
            results["decode_after"] = last_decode = _phase_logged("decode", argv)
    if "turns" in names:
        # decode, batch, decode, batch, ..., decode, each in a fresh process as when measured alone (a decode in
        # the batch's process after its runs took 2.4-2.6 s against 2.7 before them in one check, 2.9-3.1 against
        # 2.3 in another: no effect of the process beyond the drift); each batch over the decodes around it. The
        # first decode is the phase that ran just before, when that was a decode, else one of its own.
        turn_argv = [*argv]
        turn_argv[turn_argv.index("--batch-again") + 1] = "1"
        decodes = [last_decode or _phase_logged("decode", argv)]
        batches = []
        for _ in range(args.turns):
            batches.append(_phase_logged("batch", turn_argv))
            decodes.append(_phase_logged("decode", argv))
        results["turns"] = turns_summary(decodes, batches)
    if args.old_code:
        for name in ("batch", "cluster"):
            if name in args.only:
                print(f"[{time.strftime('%H:%M:%S')}] {name} on {args.old_code} (load {load():.1f}) ...",
                      file=sys.stderr, flush=True)  # fmt: skip
                results[f"{name}_old_code"] = run_phase(name, argv, Path(args.old_code))
                print(json.dumps(results[f"{name}_old_code"], default=str), file=sys.stderr, flush=True)
    if args.old_store and "batch" in args.only:
        old_argv = [*argv]
        old_argv[old_argv.index("--store") + 1] = args.old_store
        results["batch_old_layout"] = run_phase("batch", old_argv)
    OUT.mkdir(parents=True, exist_ok=True)
    (OUT / "bench_scale.json").write_text(json.dumps(results, indent=1, default=str), encoding="utf-8")
    text = report(results, args)
    print(text)
    if not args.no_write:
        write_section(text)
    return 0


def report(results: dict[str, Any], args: argparse.Namespace) -> str:
    """The RESULTS.md section."""
    lines = [
        START,
        "## Scale: decode limit, batch, latency, cluster bytes (issue 15, `bench/bench_scale.py`)",
        "",
        f"Measured {results['started']} on {platform.machine()}, {os.cpu_count()} cores, Python "
        f"{platform.python_version()}, in one run (`python bench/bench_scale.py`); each phase in its own process. "
        "The 1-minute load average is beside each figure (2 cores): where it is above 2, others' work shared the "
        "machine and wall times are upper bounds; CPU seconds are the steadier measure. Beside it, where known, the "
        "share of the machine's CPU time the hypervisor gave to other guests while the figure was taken (steal, "
        "from /proc/stat): a virtual CPU waiting for its real one is wall time without CPU time, so a wall-time "
        "figure taken with much stolen is an upper bound too. Store: "
        f"`{Path(args.store).relative_to(ROOT) if Path(args.store).is_relative_to(ROOT) else args.store}`.",
        "",
        "| what | wall s | CPU s | load (stolen) | notes |",
        "|---|---:|---:|---:|---|",
    ]
    decode = results.get("decode")
    batch = results.get("batch")
    if decode:
        lines.append(
            f"| raw read + blosc decode of the chunks the batch touches (numcodecs, {os.cpu_count()} threads, best "
            f"of 2) | {decode['wall_s']:.2f} | {decode['cpu_s']:.2f} | {_load(decode)} | {decode['chunks']} "
            f"chunks, {decode['decoded_gib']:.2f} GiB of int16 |"
        )
        if decode.get("reused_cpu_s"):
            lines.append(
                f"| the same, decoded into memory reused chunk after chunk (one array per thread) | "
                f"{decode['reused_wall_s']:.2f} | {decode['reused_cpu_s']:.2f} | {decode['load']:.1f} | the decoding "
                "without fresh memory's first-touch cost |"
            )
    if batch:
        lines.append(
            f"| the {args.features:,}-village batch, indicators included (`pipeline.run`, threads), first run in a "
            "fresh process | "
            f"{batch['wall_s']:.2f} | {batch['cpu_s']:.2f} | {_load(batch)} | {batch['rows']:,} rows x "
            f"{batch['columns']} columns, {batch['chunk_reads']} chunk reads, peak RSS {batch['peak_mb']:,.0f} MB"
            + (
                f"; the weighted-sum kernel loaded before the clock started ({batch['kernel_load_cpu_s']:.2f} CPU s "
                "once per process, as a running server has)"
                if batch.get("kernel_load_cpu_s")
                else ""
            )
            + " |"
        )
    after = results.get("decode_after")
    if after:
        lines.append(
            f"| the raw decode again, right after the batch's runs | {after['wall_s']:.2f} | {after['cpu_s']:.2f} | "
            f"{_load(after)} | the same chunks |"
        )
    if batch and batch.get("again"):
        lines.append(
            _again_row(
                f"the same batch run {len(batch['again'])} more times in that process (a server that has run one: "
                "its memory pool, heap and page cache warm), median",
                batch,
            )
        )
    before = results.get("batch_old_code")
    if before:
        lines.append(
            f"| the same batch on the older code in `{args.old_code}`, first run in a fresh process | "
            f"{before['wall_s']:.2f} | {before['cpu_s']:.2f} | {_load(before)} | {before['chunk_reads']} chunk "
            f"reads, peak RSS {before['peak_mb']:,.0f} MB |"
        )
        if before.get("again"):
            lines.append(_again_row("the older code's runs after its first, median", before))
    old = results.get("batch_old_layout")
    if old:
        lines.append(
            f"| the same batch on the previous layout (`{args.old_store}`) | {old['wall_s']:.2f} | {old['cpu_s']:.2f} "
            f"| {_load(old)} | peak RSS {old['peak_mb']:,.0f} MB |"
        )
    if decode and batch:
        lines += [
            "",
            f"**batch / raw decode: {batch['wall_s'] / decode['wall_s']:.1f} in wall time, "
            f"{batch['cpu_s'] / decode['cpu_s']:.1f} in CPU time** for the first run (target <= 4)"
            + (
                f"; **{batch['again_wall_median'] / decode['wall_s']:.1f} in wall time, "
                f"{batch['again_cpu_median'] / decode['cpu_s']:.1f} in CPU time** for the median run after it "
                f"(best {batch['again_wall_best'] / decode['wall_s']:.1f})"
                if batch.get("again")
                else ""
            )
            + (
                f"; the first run against the decode into reused memory {batch['wall_s'] / decode['reused_wall_s']:.1f} and "
                f"{batch['cpu_s'] / decode['reused_cpu_s']:.1f}"
                if decode.get("reused_cpu_s")
                else ""
            )
            + (
                f"; the older code: {before['wall_s'] / decode['wall_s']:.1f} in wall time, "
                f"{before['cpu_s'] / decode['cpu_s']:.1f} in CPU time for its first run"
                + (
                    f", {before['again_wall_median'] / decode['wall_s']:.1f} and "
                    f"{before['again_cpu_median'] / decode['cpu_s']:.1f} for the runs after it."
                    if before.get("again")
                    else "."
                )
                if before
                else "."
            ),
        ]
    turns = results.get("turns")
    if turns:
        stolen = turns["steal_max_pct"]
        lines += [
            "",
            f"**In turns** (decode, batch, decode, ..., {len(turns['batches'])} batch phases, each phase in a fresh "
            "process; each batch over the mean of the two decodes around it, so that the machine's drift over "
            f"minutes cancels): **batch / raw decode {turns['first_wall_median']:.1f} in wall time, "
            f"{turns['first_cpu_median']:.1f} in CPU time** for the first run in a process (medians; each "
            + ", ".join(f"{w:.1f}" for w in turns["first_wall_ratios"])
            + f"), **{turns['after_wall_median']:.1f} and {turns['after_cpu_median']:.1f}** for the run after it ("
            + ", ".join(f"{w:.1f}" for w in turns["after_wall_ratios"])
            + "). Decodes "
            + ", ".join(f"{w:.2f}" for w, _ in turns["decodes"])
            + " s; batches (first, after) "
            + ", ".join(f"{w:.2f}/{a:.2f}" for w, _, a, _ in turns["batches"])
            + f" s; load at most {turns['load_max']:.1f}"
            + (f", at most {stolen:.0f} % of the CPU stolen" if stolen is not None else "")
            + ".",
        ]
    costs = results.get("costs")
    if costs:
        lines += [
            "",
            f"Per-unit costs (CPU ms, medians; load {costs['load']:.1f}): read + decode of one chunk "
            f"({costs['chunk_cells']} cells x {costs['chunk_days']} days) through `Store.read_raw` "
            f"{costs['read_decode_ms']:.1f}; its weighted sums ({costs['nnz_per_chunk']:.0f} weights) "
            f"{costs['weighted_sums_ms']:.1f}; the indicator table alone (default indicators, "
            f"{costs['years']} years) {costs['table_ms_per_feature']:.2f} per feature; a 200-feature batch, "
            f"aggregation and table, one thread {costs['batch_200_ms']:.0f} ({costs['batch_200_ms'] / 200:.1f} "
            "per feature).",
        ]
    latency = results.get("latency")
    if latency:
        lines += ["", "| on-demand, in-process (`pipeline.run` + JSON), layout | decoded-tile cache | community | "
                  "p50 ms | p95 ms | CPU ms | load |", "|---|---|---|---:|---:|---:|---:|"]  # fmt: skip
        for location, r in latency.items():
            lines.append(
                f"| {r['chunks']} (`{Path(location.split(' (')[0]).name}`) | {r['cache_mb']} MB (holding "
                f"{r['cached_mb']:.0f} MB) | {r['community']} ({r['cells']} cells, {r['rows']} rows) | "
                f"{r['p50_ms']:.0f} | {r['p95_ms']:.0f} | {r['cpu_ms_median']:.0f} | {r['load']:.1f} |"
            )
    cl = results.get("cluster")
    if cl:
        lines += [
            "",
            f"Cluster (one scheduler, two single-thread workers on 127.0.0.1; {cl['features']} villages x "
            f"{cl['days']} days x {len(cl['variables'])} variables; load {cl['load']:.1f}): the server now receives "
            f"**{cl['table_bytes_per_feature'] / 1024:.1f} kB per feature** (its table rows); before, it gathered "
            f"each batch's daily series, **{cl['series_bytes_per_feature'] / 1024:.0f} kB per feature** (measured "
            f"in the same run from the workers' transfer logs); between the workers "
            f"{cl.get('between_workers_bytes_per_feature', 0) / 1024:.0f} kB per feature (partial sums and series "
            "on their way to the task that needs them). Run with tables on the workers "
            f"{cl['run_wall_s']:.1f} s; the aggregation alone, series gathered, {cl['aggregation_only_wall_s']:.1f} s.",
        ]
    job = results.get("job")
    if job:
        lines += [
            "",
            f"A job of {job['features']:,} buffered points (one cell each) over `{Path(job['store']).name}`, every "
            "default indicator, every season-year, one job worker; each case in its own `wxshock serve` "
            "(127.0.0.1), RSS sampled every 0.5 s and the kernel's peak (VmHWM):",
            "",
            "| case | state | wall s | server peak RSS MB | RSS idle before MB | RSS 2 s after MB | result MB | load |",
            "|---|---|---:|---:|---:|---:|---:|---:|",
        ]
        names = {"csv": "CSV", "parquet": "Parquet", "csv_no_trim": "CSV, malloc_trim disabled"}
        for key, name in names.items():
            r = job.get(key)
            if r:
                lines.append(
                    f"| {name} | {r['state']} | {r['wall_s']:.0f} | {r['peak_rss_mb']:,.0f} | {r['idle_rss_mb']:,.0f} "
                    f"| {r['rss_after_mb']:,.0f} | {r['result_mb'] or 0:,.0f} | {r['load']:.1f} |"
                )
    trim = results.get("trim")
    if trim:
        lines += [
            "",
            f"malloc_trim(0) (service/memory.py), measured in one process (load {trim['load']:.1f}): RSS "
            f"{trim['rss_before_mb']:,.0f} MB before a {trim['features']:,}-village request on local threads "
            f"({trim['rows']:,} rows; peak {trim['peak_mb']:,.0f} MB), {trim['rss_after_request_mb']:,.0f} MB after it "
            f"with its result freed, **{trim['rss_after_trim_mb']:,.0f} MB after malloc_trim(0)**, which took "
            f"{trim['trim_ms']:.0f} ms.",
        ]
    cl_old = results.get("cluster_old_code")
    if cl_old:
        lines += [
            "",
            f"The older code (`{args.old_code}`), same cluster, same villages (load {cl_old['load']:.1f}): "
            f"the server received **{cl_old['table_bytes_per_feature'] / 1024:.0f} kB per feature** during "
            f"`pipeline.run` (before issue 15 these were the daily series: the server computed the tables); run "
            f"{cl_old['run_wall_s']:.1f} s.",
        ]
    if decode and batch and after:
        lines += [
            "",
            f"Against the raw decode taken right after the batch's runs: {batch['wall_s'] / after['wall_s']:.1f} in "
            f"wall time and {batch['cpu_s'] / after['cpu_s']:.1f} in CPU time for the first run"
            + (
                f", {batch['again_wall_median'] / after['wall_s']:.1f} and "
                f"{batch['again_cpu_median'] / after['cpu_s']:.1f} for the median run after it."
                if batch.get("again")
                else "."
            ),
        ]
    lines += ["", END]
    return "\n".join(lines)


def _load(figure: dict[str, Any], load: str = "load", steal: str = "steal_pct") -> str:
    """A figure's load average, with the share of CPU time stolen while it was taken where known."""
    stolen = figure.get(steal)
    return f"{figure[load]:.1f}" + (f" ({stolen:.0f} %)" if stolen is not None else "")


def _again_row(label: str, batch: dict[str, Any]) -> str:
    """The table row of a batch phase's runs after its first: their median wall and CPU s, each run, peak RSS."""
    runs = ", ".join(f"{w:.2f}" for w, _ in batch["again"])
    load = _load(batch, "again_load", "again_steal_median")
    return (
        f"| {label} | {batch['again_wall_median']:.2f} | {batch['again_cpu_median']:.2f} | {load} "
        f"| runs {runs} s; peak RSS over all runs {batch['again_peak_mb']:,.0f} MB |"
    )


def write_section(text: str) -> None:
    """Replace (or append) this bench's section of bench/RESULTS.md."""
    current = RESULTS.read_text(encoding="utf-8")
    if START in current and END in current:
        before, rest = current.split(START, 1)
        _, after = rest.split(END, 1)
        current = before + text + after
    else:
        current = current.rstrip("\n") + "\n\n" + text + "\n"
    RESULTS.write_text(current, encoding="utf-8")


if __name__ == "__main__":
    raise SystemExit(main())
