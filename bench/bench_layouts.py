"""Store layouts measured through the real pipeline, peak RSS in store size and years, and object-storage reads
(issue 15, items 2, 3 and 5; bench/RESULTS.md "Store layouts for on-demand reads", bench/SCALE.md).

    python bench/bench_layouts.py                       # every phase below, writes its sections of RESULTS.md
    python bench/bench_layouts.py --only make           # the sharded copies (bench/out/layouts), verified
    python bench/bench_layouts.py --only latency,pass,append --no-write
    python bench/bench_layouts.py --only rss
    python bench/bench_layouts.py --only s3
    python bench/bench_layouts.py --only relayout --sizes large   # migrate or relayout a copy, then append
    python bench/bench_layouts.py --only report         # the RESULTS.md section again from bench/out's JSON

Layouts (each a copy of the demo store with the same values and fingerprint, written by ``make``):

  chunks     today's layout: chunks of 32 x 32 cells x 3,653 days (a decade), blosc lz4
  shard8     shards of 32 x 32 cells x 3,653 days holding 8 x 8-cell inner chunks (16 per shard), same codec
  shard16    the same shards holding 16 x 16-cell inner chunks (4 per shard)

and read units (what ``aggregate`` reads per task: ``Store.chunk_shape_of``): the shard (today's code), or the
inner chunk (``--read-unit inner``: the store reports its inner chunks as its read unit, patched in this bench
process and in the server through a sitecustomize module).

Phases (each in its own process, so that its peak memory is its own):

  make     the sharded copies of the small demo (built with the demo builder, bench/out/layouts/small) and of
           the large demo (bench/out/large/synthetic.zarr, read only), then verified (fingerprint recomputed)
  latency  one ~25-cell community, default indicators, every season-year (48 years): the same request
           repeated (warm) and 20 different ~25-cell communities in turn (what a server answering many users
           sees), in process (pipeline.run + JSON encoding) and over HTTP (`wxshock serve` on 127.0.0.1)
  pass     the full pass: every chunk's bytes read and blosc-decoded on all cores (best of two), and the
           village batch through pipeline.run (5,000 on the large demo, 1,000 on the small), wall, CPU, RSS
  append   one year (2023: the values of 2022 again) appended with service.store.append_store to a
           hard-linked copy of each layout: total, the day writes, and the scan that follows
           (data mask, digests, fingerprint)
  rss      peak RSS of one 1,000-village batch over 12, 24 and 48 years on the small and the large demo
  s3       read + decode throughput of chunks from moto's S3 server on 127.0.0.1 (tests/_support_cluster.py)
           with 1, 2, 4 and 8 concurrent reads, beside the same reads from the local disk

The machine is shared (2 cores): every figure carries its CPU seconds where it has them and the 1-minute
load average when it was taken.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

OUT = ROOT / "bench" / "out"
LAYOUTS_OUT = OUT / "layouts"
RESULTS_JSON = OUT / "bench_layouts.json"
START, END = "<!-- bench_layouts: start -->", "<!-- bench_layouts: end -->"
SOURCES = {"small": LAYOUTS_OUT / "small" / "demo.zarr", "large": OUT / "large" / "synthetic.zarr"}
# layout name -> (inner chunk cells, shard cells); None: the source store as it is
LAYOUTS: dict[str, tuple[int, int] | None] = {"chunks": None, "shard8": (8, 32), "shard16": (16, 32)}
BATCH = {"small": 1000, "large": 5000}
CACHE_MB = 192  # the server's default tile_cache_mb (service/settings.py)

READ_UNIT = """# bench_layouts: the store's read unit is its {unit} (Store.chunk_shape_of patched)
from service.store.read import Store


def _unit(self, var):
    array = self._array(self._check_variable(var))
    unit = array.chunks if "{unit}" == "inner chunk" else (array.shards or array.chunks)
    return (int(unit[0]), int(unit[1]), int(unit[2]))


Store.chunk_shape_of = _unit
"""


def read_unit_code(unit: str) -> str:
    """The patch that makes the read unit the inner chunk ('inner') or the shard ('shard')."""
    return READ_UNIT.replace("{unit}", "inner chunk" if unit == "inner" else "shard")


def load() -> float:
    """The 1-minute load average."""
    return os.getloadavg()[0]


def peak_mb() -> float:
    """This process's peak RSS (MB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def rss_mb() -> float:
    """This process's current RSS (MB)."""
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


def store_path(size: str, layout: str) -> Path:
    """Where a layout's copy of a demo store is (the source itself for 'chunks')."""
    return SOURCES[size] if LAYOUTS[layout] is None else LAYOUTS_OUT / size / f"{layout}.zarr"


def use_read_unit(unit: str) -> None:
    """Make Store.chunk_shape_of report the inner chunk or the shard (this process)."""
    namespace: dict[str, Any] = {}
    exec(compile(read_unit_code(unit), "read_unit", "exec"), namespace)


# --- make: the sharded copies ----------------------------------------------------------------------------------


def sharded_copy(source: Path, target: Path, inner: int, shard: int) -> dict[str, Any]:
    """Copy a store with its daily arrays rewritten as shards of (shard x shard cells x the time chunk) holding
    (inner x inner)-cell chunks; everything else copied as is (same values, same fingerprint)."""
    import zarr

    from service.store import open_store
    from service.store.layout import read_layout

    store = open_store(source)
    group = zarr.open_group(str(source), mode="r")
    layout = read_layout(group, str(source))
    daily = {layout.path(g, v): v for v, g in layout.variables.items()}
    if target.exists():
        shutil.rmtree(target)
    tmp = target.with_name(target.name + ".tmp")
    if tmp.exists():
        shutil.rmtree(tmp)

    def ignore(directory: str, names: list[str]) -> list[str]:
        rel = os.path.relpath(directory, source)
        rel = "" if rel == "." else rel
        return [n for n in names if (f"{rel}/{n}" if rel else n) in daily]

    shutil.copytree(source, tmp, ignore=ignore)
    out = zarr.open_group(str(tmp), mode="r+", use_consolidated=False)
    wall, cpu = time.perf_counter(), time.process_time()
    for path, var in daily.items():
        array = group[path]
        ct = int(array.chunks[2])
        new = out.create_array(
            path,
            shape=array.shape,
            dtype=array.dtype,
            chunks=(inner, inner, ct),
            shards=(shard, shard, ct),
            fill_value=array.metadata.fill_value,
            compressors=array.compressors,
            dimension_names=array.metadata.dimension_names,
            attributes=dict(array.attrs.asdict()),
            overwrite=True,
        )
        ny, nx, nt = array.shape
        regions = [
            (slice(y, min(y + shard, ny)), slice(x, min(x + shard, nx)), slice(t, min(t + ct, nt)))
            for y in range(0, ny, shard)
            for x in range(0, nx, shard)
            for t in range(0, nt, ct)
        ]

        def one(region: tuple[slice, slice, slice], var: str = var, new: Any = new) -> None:
            new[region] = store.read_raw(var, *region)

        with ThreadPoolExecutor(os.cpu_count() or 1) as pool:
            list(pool.map(one, regions))
    written = (time.perf_counter() - wall, time.process_time() - cpu)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=UserWarning)
        zarr.consolidate_metadata(out.store)
    tmp.rename(target)
    return {"write_wall_s": written[0], "write_cpu_s": written[1]}


def phase_make(args: argparse.Namespace) -> dict[str, Any]:
    """The sharded copies of each size's store, each verified (fingerprint recomputed and compared)."""
    from service.demo import ensure_demo
    from service.store import open_store, verify_store

    out: dict[str, Any] = {}
    for size in args.sizes:
        if size == "small":
            ensure_demo(SOURCES["small"].parent, "small")
        source = SOURCES[size]
        for name, spec in LAYOUTS.items():
            if spec is None:
                continue
            target = store_path(size, name)
            info = sharded_copy(source, target, *spec)
            check = verify_store(target)
            info.update(
                ok=bool(check.ok),
                same_fingerprint=open_store(target).fingerprint == open_store(source).fingerprint,
                disk_mb=du_mb(target),
                source_disk_mb=du_mb(source),
                files=sum(1 for _ in target.rglob("*") if _.is_file()),
                source_files=sum(1 for _ in source.rglob("*") if _.is_file()),
                load=load(),
            )
            out[f"{size}/{name}"] = info
            print(size, name, info, file=sys.stderr, flush=True)
    return out


def du_mb(path: Path) -> float:
    """Disk use of a directory tree (MB, file sizes)."""
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file()) / 2**20


# --- latency ----------------------------------------------------------------------------------------------------


def communities(size: str, store: Any) -> list[dict[str, Any]]:
    """About 25-cell polygons on the store: the demo's communities (small) or invented villages (large), the
    20 whose cell counts are closest to 25, the closest first."""
    from service import pipeline
    from service.schemas import IndicatorRequest, validate_request
    from service.settings import Settings

    if size == "small":
        text = (SOURCES["small"].parent / "communities.geojson").read_text(encoding="utf-8")
        features = [f for f in json.loads(text)["features"] if f["geometry"]["type"] != "Point"]
    else:
        from bench_scale import polygons

        features = polygons(store, 2500)["features"]
    collection = {"type": "FeatureCollection", "features": features}
    request = validate_request(IndicatorRequest, {"features": collection})
    cells = pipeline.features_and_weights(request, store, Settings())[1].n_cells
    order = sorted(range(len(features)), key=lambda i: (abs(int(cells[i]) - 25), str(features[i].get("id"))))
    picked = [dict(features[i], id=str(features[i].get("id", i))) for i in order[:20]]
    for i, f in zip(order[:20], picked, strict=True):
        f.setdefault("properties", {})
        f["properties"] = {**(f["properties"] or {}), "bench_cells": int(cells[i])}
    return picked


def timed_requests(send: Any, bodies: list[Any]) -> tuple[list[float], list[float]]:
    """Wall and CPU ms of each call of ``send`` on the bodies, one after another."""
    walls, cpus = [], []
    for body in bodies:
        start, cpu = time.perf_counter(), time.process_time()
        send(body)
        walls.append((time.perf_counter() - start) * 1000)
        cpus.append((time.process_time() - cpu) * 1000)
    return walls, cpus


def summary(walls: list[float], cpus: list[float] | None = None) -> dict[str, float]:
    """p50, p95 (and median CPU) of a list of ms."""
    import numpy as np

    out = {
        "p50_ms": float(np.percentile(walls, 50)),
        "p95_ms": float(np.percentile(walls, 95)),
        "n": len(walls),
    }
    if cpus:
        out["cpu_ms_median"] = statistics.median(cpus)
    return out


def phase_latency(args: argparse.Namespace) -> dict[str, Any]:
    """In process: same community repeated and 20 different ones, for one (size, layout, read unit, cache)."""
    use_read_unit(args.read_unit)
    from service import pipeline
    from service.encode import encode
    from service.schemas import IndicatorRequest, validate_request
    from service.settings import Settings
    from service.store import open_store
    from service.store.chunks import configure_tile_cache, tile_cache

    store = open_store(store_path(args.size, args.layout))
    settings = Settings()
    picked = communities(args.size, store)
    requests = [validate_request(IndicatorRequest, {"features": f}) for f in picked]

    def send(request: Any) -> None:
        encode(pipeline.run(request, store, settings), "json")

    for request in requests:  # weights of every community computed once (the server's weights cache)
        pipeline.run(request, store, settings)
    configure_tile_cache(args.cache_mb << 20)
    tile_cache().clear()
    for _ in range(5):
        send(requests[0])
    same = summary(*timed_requests(send, [requests[0]] * args.requests))
    tile_cache().clear()
    different = summary(*timed_requests(send, requests * 2))
    return {
        "community": picked[0]["id"],
        "cells": picked[0]["properties"]["bench_cells"],
        "cells_range": [
            min(f["properties"]["bench_cells"] for f in picked),
            max(f["properties"]["bench_cells"] for f in picked),
        ],  # fmt: skip
        "same": same,
        "different": different,
        "read_unit": list(store.chunk_shape_of("tmax")),
        "inner": list(store.inner_chunk_shape),
        "cached_mb": tile_cache().nbytes / 2**20,
        "load": load(),
    }


def http_latency(size: str, layout: str, read_unit: str, cache_mb: int, requests: int) -> dict[str, Any]:
    """Over HTTP: `wxshock serve` on 127.0.0.1 with this layout, read unit and tile cache; same and different."""
    from service.store import open_store
    from tests import _support_server as server_support

    path = store_path(size, layout)
    picked = communities(size, open_store(path))
    data_dir = Path(tempfile.mkdtemp(prefix="bench-layouts-server-"))
    env = {"WXSHOCK_TILE_CACHE_MB": str(cache_mb), "PYTHONPATH": str(ROOT)}
    (data_dir / "site").mkdir()
    (data_dir / "site" / "sitecustomize.py").write_text(read_unit_code(read_unit), encoding="utf-8")
    env["PYTHONPATH"] = f"{data_dir / 'site'}{os.pathsep}{ROOT}"
    server = server_support.start_process(stores=[path], data_dir=data_dir / "server", env=env, timeout=300)
    try:
        with server.client(timeout=300) as client:

            def send(feature: dict[str, Any]) -> None:
                client.post("/v1/indicators", json={"features": feature}).raise_for_status()

            for f in picked:  # weights cache
                send(f)
            for _ in range(5):
                send(picked[0])
            same = summary(timed_requests(send, [picked[0]] * requests)[0])
            different = summary(timed_requests(send, picked * 2)[0])
    finally:
        server.stop()
        shutil.rmtree(data_dir, ignore_errors=True)
    return {"same": same, "different": different, "load": load()}


def phase_http(args: argparse.Namespace) -> dict[str, Any]:
    """http_latency in its own process."""
    return http_latency(args.size, args.layout, args.read_unit, args.cache_mb, args.requests)


# --- the full pass ----------------------------------------------------------------------------------------------


def phase_pass(args: argparse.Namespace) -> dict[str, Any]:
    """Raw read + decode of every inner chunk (3 variables, all days; best of two), then the village batch."""
    use_read_unit(args.read_unit)
    from bench_scale import decode_chunks, timed_batch

    from service.store import open_store

    store = open_store(store_path(args.size, args.layout))
    readers = {v: store._chunk_readers[v] for v in store.variables}
    ny, nx = store.grid.shape
    cy, cx, ct = store.inner_chunk_shape
    items = [
        (v, (ty, tx, tb))
        for v in store.variables
        for ty in range(-(-ny // cy))
        for tx in range(-(-nx // cx))
        for tb in range(-(-store.n_times // ct))
    ]

    passes, sizes = decode_chunks(readers, items)
    decode_wall, decode_cpu = min(passes)[:2]
    decode_load = load()
    batch = timed_batch(store, BATCH[args.size])
    return {
        "chunks": len(items),
        "decoded_gib": sum(s[0] for s in sizes) / 2**30,
        "compressed_gib": sum(s[1] for s in sizes) / 2**30,
        "decode_wall_s": decode_wall,
        "decode_cpu_s": decode_cpu,
        "decode_load": decode_load,
        "features": BATCH[args.size],
        "batch_wall_s": batch["wall_s"],
        "batch_cpu_s": batch["cpu_s"],
        "kernel_load_cpu_s": batch["kernel_load_cpu_s"],
        "batch_rows": batch["rows"],
        "read_tasks": batch["chunk_reads"],
        "peak_mb": peak_mb(),
        "load": load(),
    }


# --- append -----------------------------------------------------------------------------------------------------


def next_year(store: Any) -> Any:
    """2023 as a Dataset on the store's grid: the values of 2022 again (degC, mm/day), for appending."""
    import numpy as np
    import pandas as pd
    import xarray as xr

    last = int(store.times[-1].year)
    days = pd.date_range(f"{last + 1}-01-01", f"{last + 1}-12-31", freq="D")
    n = len(days)
    grid = store.grid
    data_vars: dict[str, Any] = {}
    for var in store.variables:
        values = store.read(var, slice(None), slice(None), slice(store.n_times - n, store.n_times))
        data_vars[var] = (("y", "x", "time"), values.astype(np.float32), {"grid_mapping": "crs"})
    data_vars["crs"] = ((), np.int32(0), {"crs_wkt": grid.crs_wkt})
    return xr.Dataset(data_vars, coords={"time": days, "y": grid.y, "x": grid.x})


def phase_append(args: argparse.Namespace) -> dict[str, Any]:
    """Append a year to a hard-linked copy of the layout's store (the copy removed afterwards)."""
    from service.store import append_store, open_store, write

    source = store_path(args.size, args.layout)
    if open_store(source).layout_version == 1:
        # an append migrates a layout-1 store to layout 2 first (a whole rewrite, and its chunking is derived
        # anew): that is not the cost of an append
        return {"skipped": "layout-1 store: append_store would migrate it to layout 2 first", "load": load()}
    ds = next_year(open_store(source))
    work = Path(tempfile.mkdtemp(prefix="bench-layouts-append-", dir=LAYOUTS_OUT))
    copy = work / "store.zarr"
    try:
        subprocess.run(["cp", "-al", str(source), str(copy)], check=True)
        parts = {"write_days": 0.0, "finish": 0.0}
        original_store_all, original_finish = write._store_all, write._finish

        def store_all(*a: Any, **k: Any) -> Any:
            start = time.perf_counter()
            try:
                return original_store_all(*a, **k)
            finally:
                parts["write_days"] += time.perf_counter() - start

        def finish(*a: Any, **k: Any) -> Any:
            start = time.perf_counter()
            try:
                return original_finish(*a, **k)
            finally:
                parts["finish"] += time.perf_counter() - start

        write._store_all, write._finish = store_all, finish
        wall, cpu = time.perf_counter(), time.process_time()
        fingerprint = append_store(ds, copy)
        wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
        grown = open_store(copy)
        return {
            "wall_s": wall,
            "cpu_s": cpu,
            "write_days_wall_s": parts["write_days"],
            "finish_wall_s": parts["finish"],
            "days": int(ds.sizes["time"]),
            "new_end": str(grown.times[-1].date()),
            "fingerprint": fingerprint,
            "peak_mb": peak_mb(),
            "load": load(),
        }
    finally:
        shutil.rmtree(work, ignore_errors=True)


def phase_relayout(args: argparse.Namespace) -> dict[str, Any]:
    """A hard-linked copy of a (layout-1) demo store migrated as it is, or relaid out to the default layout
    (``--layout shard16``) with service.store.relayout_store; then a year appended; the copy removed."""
    from service.store import DEFAULT_LAYOUT, append_store, migrate_store, open_store, relayout_store

    source = SOURCES[args.size]
    ds = next_year(open_store(source))
    work = Path(tempfile.mkdtemp(prefix="bench-layouts-relayout-", dir=LAYOUTS_OUT))
    copy = work / "store.zarr"
    try:
        subprocess.run(["cp", "-al", str(source), str(copy)], check=True)
        wall, cpu = time.perf_counter(), time.process_time()
        if args.layout == "chunks":
            migrate_store(copy)
        else:
            relayout_store(copy, DEFAULT_LAYOUT)
        rewrite = (time.perf_counter() - wall, time.process_time() - cpu)
        store = open_store(copy)
        wall, cpu = time.perf_counter(), time.process_time()
        append_store(ds, copy)
        appended = (time.perf_counter() - wall, time.process_time() - cpu)
        return {
            "rewrite": "migrate_store" if args.layout == "chunks" else "relayout_store (migrates first)",
            "rewrite_wall_s": rewrite[0],
            "rewrite_cpu_s": rewrite[1],
            "chunks": list(store.chunk_shape),
            "storage": list(store.storage_shape_of(store.variables[0])),
            "append_wall_s": appended[0],
            "append_cpu_s": appended[1],
            "peak_mb": peak_mb(),
            "load": load(),
        }
    finally:
        shutil.rmtree(work, ignore_errors=True)


# --- peak RSS in store size and years ------------------------------------------------------------------------


def phase_rss(args: argparse.Namespace) -> dict[str, Any]:
    """Peak RSS of one 1,000-village batch over the last ``--years`` years (baseline: the same years)."""
    from bench_scale import polygons

    from service import pipeline
    from service.settings import Settings
    from service.store import open_store

    store = open_store(SOURCES[args.size])
    features = polygons(store, 1000)
    last = int(store.times[-1].year)
    first = last - args.years + 1
    from service.schemas import IndicatorRequest, validate_request

    request = validate_request(
        IndicatorRequest,
        {
            "features": features,
            "years": {"start": first, "end": last},
            "baseline": {"start": first, "end": last},
        },
    )
    settings = Settings(threads=os.cpu_count())
    before = rss_mb()
    wall, cpu = time.perf_counter(), time.process_time()
    result = pipeline.run(request, store, settings)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    return {
        "years": args.years,
        "rows": len(result.frame),
        "rss_before_mb": before,
        "peak_mb": peak_mb(),
        "wall_s": wall,
        "cpu_s": cpu,
        "grid": list(store.grid.shape),
        "load": load(),
    }


# --- object storage ---------------------------------------------------------------------------------------------


def phase_s3(args: argparse.Namespace) -> dict[str, Any]:
    """Chunks of the small demo's tmax read + decoded from moto's S3 server on 127.0.0.1, 1/2/4/8 threads."""
    import numpy as np
    import s3fs

    from service.store import open_store
    from service.store.chunks import ChunkReader
    from tests._support_cluster import _start_moto

    source = SOURCES["small"]
    root = Path(tempfile.mkdtemp(prefix="bench-layouts-moto-"))
    server, stop = _start_moto(root)
    try:
        options = server.storage_options()
        fs = s3fs.S3FileSystem(**options)
        url = f"s3://{server.bucket}/demo.zarr"
        upload = time.perf_counter()
        # metadata and the tmax chunks (the other variables' chunks are not read here)
        for path in sorted(source.rglob("*")):
            rel = path.relative_to(source).as_posix()
            if path.is_file() and not rel.startswith(("grid/tmin/c/", "grid/prcp/c/")):
                fs.pipe_file(f"{url}/{rel}", path.read_bytes())
        upload = time.perf_counter() - upload
        local = open_store(source)
        remote = open_store(url, storage_options=options)
        readers = {
            "s3": ChunkReader.for_array(remote._var_arrays["tmax"], cache=None),
            "local": ChunkReader.for_array(local._var_arrays["tmax"], cache=None),
        }
        ny, nx = local.grid.shape
        cy, cx, ct = local.inner_chunk_shape
        coords = [(y, x, t) for y in range(-(-ny // cy)) for x in range(-(-nx // cx))
                  for t in range(-(-local.n_times // ct))]  # fmt: skip
        compressed = 0
        for c in coords:
            compressed += len(readers["local"]._get(readers["local"]._metadata.encode_chunk_key(c)) or b"")
        out: dict[str, Any] = {"chunks": len(coords), "compressed_mb": compressed / 2**20,
                               "decoded_mb": len(coords) * int(np.prod(local.inner_chunk_shape)) * 2 / 2**20,
                               "upload_s": upload}  # fmt: skip
        for where, reader in readers.items():
            for threads in (1, 2, 4, 8):
                best = None
                for _ in range(2):
                    wall, cpu, moto = (
                        time.perf_counter(),
                        time.process_time(),
                        process_cpu(server.process.pid),
                    )
                    with ThreadPoolExecutor(threads) as pool:
                        list(pool.map(reader.chunk, coords))
                    run = (time.perf_counter() - wall, time.process_time() - cpu,
                           process_cpu(server.process.pid) - moto)  # fmt: skip
                    best = run if best is None or run[0] < best[0] else best
                assert best is not None
                out[f"{where}-{threads}"] = {
                    "wall_s": best[0],
                    "cpu_s_this_process": best[1],
                    "cpu_s_server": best[2] if where == "s3" else 0.0,
                    "compressed_mb_s": out["compressed_mb"] / best[0],
                    "decoded_mb_s": out["decoded_mb"] / best[0],
                    "load": load(),
                }
                print(where, threads, out[f"{where}-{threads}"], file=sys.stderr, flush=True)
        return out
    finally:
        stop()
        shutil.rmtree(root, ignore_errors=True)


def process_cpu(pid: int) -> float:
    """CPU seconds (user + system) of a process and its waited-for children, from /proc."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return sum(int(v) for v in fields[11:15]) / os.sysconf("SC_CLK_TCK")


PHASES = {
    "make": phase_make,
    "latency": phase_latency,
    "http": phase_http,
    "pass": phase_pass,
    "append": phase_append,
    "rss": phase_rss,
    "relayout": phase_relayout,
    "s3": phase_s3,
}


def run_phase(phase: str, **options: Any) -> dict[str, Any]:
    """Run one phase in a fresh process (its own peak RSS) and return its JSON."""
    argv = [sys.executable, __file__, "--phase", phase]
    for key, value in options.items():
        flag = "--" + key.replace("_", "-")
        argv += [flag, *(value if isinstance(value, list) else [str(value)])]
    done = subprocess.run(argv, check=True, stdout=subprocess.PIPE, text=True, cwd=ROOT,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})  # fmt: skip
    result = json.loads(done.stdout.strip().splitlines()[-1])
    print(phase, options, json.dumps(result), file=sys.stderr, flush=True)
    return result


# --- the report ------------------------------------------------------------------------------------------------

LAYOUT_WORDS = {
    "chunks": "32 x 32-cell chunks (today's)",
    "shard8": "8 x 8-cell chunks in 32 x 32-cell shards",
    "shard16": "16 x 16-cell chunks in 32 x 32-cell shards",
}


def _ms(d: dict[str, Any] | None, key: str = "p50_ms") -> str:
    return "-" if not d else f"{d[key]:.0f}"


def render(results: dict[str, Any]) -> str:
    """The RESULTS.md section (between its markers) from the phases' JSON."""
    stamp = results.get("stamp", {})
    lines = [START, "", f"Measured {stamp.get('date', '?')} on {stamp.get('machine', '?')}, {stamp.get('cores')} "
             "cores shared with other engineers' work; every row carries the 1-minute load average. "
             "Reproduce: `python bench/bench_layouts.py` (about 40 minutes; `--only latency --sizes large` for "
             "one part); the figures of each phase are also in bench/out/bench_layouts.json.", ""]  # fmt: skip
    for size in ("small", "large"):
        rows = [k for k in results if k.startswith(f"latency/{size}/")]
        if not rows:
            continue
        first = results[rows[0]]
        lines += [f"**On-demand latency, {size} demo** (one ~25-cell community, default indicators, every "
                  f"season-year; 'same': community {first['community']!r} ({first['cells']} cells) repeated "
                  f"{first['same']['n']} times after 5 warm-ups; 'different': 20 communities of "
                  f"{first['cells_range'][0]}-{first['cells_range'][1]} cells in turn, twice, none cached before; "
                  "in process: pipeline.run + JSON encoding; HTTP: `wxshock serve` on 127.0.0.1, client wall "
                  "time):", "",
                  "| layout | read unit | tile cache | same p50 / p95 ms (CPU ms) | different p50 / p95 ms (CPU ms) "
                  "| HTTP same p50 / p95 | HTTP different p50 / p95 | load |",
                  "|---|---|---|---|---|---|---|---|"]  # fmt: skip
        for key in rows:
            _, _, layout, unit, cache = key.split("/")
            r, h = results[key], results.get("http/" + key[8:])
            http_load = f" / {h['load']:.1f}" if h else ""
            lines.append(
                f"| {LAYOUT_WORDS[layout]} | {'inner chunk' if unit == 'inner' else 'shard/chunk'} | {cache} MB "
                f"| {_ms(r['same'])} / {_ms(r['same'], 'p95_ms')} ({r['same']['cpu_ms_median']:.0f}) "
                f"| {_ms(r['different'])} / {_ms(r['different'], 'p95_ms')} ({r['different']['cpu_ms_median']:.0f}) "
                f"| {_ms(h and h['same'])} / {_ms(h and h['same'], 'p95_ms')} "
                f"| {_ms(h and h['different'])} / {_ms(h and h['different'], 'p95_ms')} "
                f"| {r['load']:.1f}{http_load} |"
            )
        lines.append("")
    for size in ("small", "large"):
        rows = [k for k in results if k.startswith(f"pass/{size}/")]
        if not rows:
            continue
        first = results[rows[0]]
        lines += [f"**Full pass, {size} demo** (raw: every chunk of the 3 variables and 48 years read and "
                  "blosc-decoded with numcodecs on all cores, the better of two passes; batch: "
                  f"{first['features']:,} invented villages through pipeline.run, indicators included, local "
                  "threads):", "",
                  "| layout | read unit | chunks | compressed GiB | raw wall / CPU s | batch wall / CPU s "
                  "| read tasks | batch CPU / raw CPU | peak RSS MB | load |", "|---|---|---|---|---|---|---|---|---|---|"]  # fmt: skip
        for key in rows:
            _, _, layout, unit = key.split("/")
            r = results[key]
            lines.append(
                f"| {LAYOUT_WORDS[layout]} | {'inner chunk' if unit == 'inner' else 'shard/chunk'} | {r['chunks']} "
                f"| {r['compressed_gib']:.2f} | {r['decode_wall_s']:.2f} / {r['decode_cpu_s']:.2f} "
                f"| {r['batch_wall_s']:.1f} / {r['batch_cpu_s']:.1f} | {r['read_tasks']} "
                f"| {r['batch_cpu_s'] / r['decode_cpu_s']:.1f} | {r['peak_mb']:.0f} "
                f"| {r['decode_load']:.1f} / {r['load']:.1f} |"
            )
        lines.append("")
    appends = [k for k in results if k.startswith("append/")]
    if appends:
        lines += ["**Appending one year** (2023, the values of 2022 again) with service.store.append_store to a "
                  "hard-linked copy: total; the day writes (every chunk or shard of the last decade rewritten); "
                  "the scan that follows (data mask, digests and fingerprint of the whole store):", "",
                  "| store | layout | total wall / CPU s | day writes s | scan s | peak RSS MB | load |",
                  "|---|---|---|---|---|---|---|"]  # fmt: skip
        for key in appends:
            _, size, layout = key.split("/")
            r = results[key]
            if "skipped" in r:
                lines.append(f"| {size} | {LAYOUT_WORDS[layout]} | not measured: {r['skipped']} | | | | |")
                continue
            lines.append(
                f"| {size} | {LAYOUT_WORDS[layout]} | {r['wall_s']:.1f} / {r['cpu_s']:.1f} "
                f"| {r['write_days_wall_s']:.1f} | {r['finish_wall_s']:.1f} | {r['peak_mb']:.0f} | {r['load']:.1f} |"
            )
        lines.append("")
    relaid = [k for k in results if k.startswith("relayout/")]
    if relaid:
        lines += ["**Existing stores** (a hard-linked copy of the layout-1 demo store migrated to layout 2 as it is, "
                  "or rewritten by `wxshock relayout`'s relayout_store in the new default layout, which migrates "
                  "first; then one year appended as above):", "",
                  "| store | rewrite | chunks / stored objects | rewrite wall / CPU s | append wall / CPU s "
                  "| peak RSS MB | load |", "|---|---|---|---|---|---|---|"]  # fmt: skip
        for key in relaid:
            r = results[key]
            lines.append(
                f"| {key.split('/')[1]} | {r['rewrite']} | {' x '.join(map(str, r['chunks']))} / "
                f"{' x '.join(map(str, r['storage']))} | {r['rewrite_wall_s']:.0f} / {r['rewrite_cpu_s']:.0f} "
                f"| {r['append_wall_s']:.0f} / {r['append_cpu_s']:.0f} | {r['peak_mb']:.0f} | {r['load']:.1f} |"
            )
        lines.append("")
    rss = [k for k in results if k.startswith("rss/")]
    if rss:
        lines += ["**Peak RSS in store size and years** (one 1,000-village batch, default indicators, years and "
                  "baseline the last 12, 24 or 48 years, local threads, each in its own process):", "",
                  "| store | grid | years | rows | RSS before MB | peak RSS MB | wall / CPU s | load |",
                  "|---|---|---|---|---|---|---|---|"]  # fmt: skip
        for key in rss:
            r = results[key]
            lines.append(
                f"| {key.split('/')[1]} | {r['grid'][0]} x {r['grid'][1]} | {r['years']} | {r['rows']:,} "
                f"| {r['rss_before_mb']:.0f} | {r['peak_mb']:.0f} | {r['wall_s']:.1f} / {r['cpu_s']:.1f} "
                f"| {r['load']:.1f} |"
            )
        lines.append("")
    s3 = results.get("s3")
    if s3:
        lines += [f"**Object storage** (moto's S3 server on 127.0.0.1, started by the bench as the tests start "
                  f"it; the small demo's tmax: {s3['chunks']} chunks, {s3['compressed_mb']:.0f} MB compressed, "
                  f"{s3['decoded_mb']:.0f} MB decoded; each chunk fetched with one GET and blosc-decoded, "
                  "Store's ChunkReader without cache; the better of two passes):", "",
                  "| source | concurrent reads | wall s | compressed MB/s | decoded MB/s | CPU s here | server CPU s "
                  "| load |", "|---|---|---|---|---|---|---|---|"]  # fmt: skip
        for where in ("s3", "local"):
            for threads in (1, 2, 4, 8):
                r = s3.get(f"{where}-{threads}")
                if r:
                    lines.append(
                        f"| {'moto S3, loopback' if where == 's3' else 'local disk (page cache)'} | {threads} "
                        f"| {r['wall_s']:.2f} | {r['compressed_mb_s']:.0f} | {r['decoded_mb_s']:.0f} "
                        f"| {r['cpu_s_this_process']:.2f} | {r.get('cpu_s_server', 0):.2f} | {r['load']:.1f} |"
                    )
        lines.append("")
    lines.append(END)
    return "\n".join(lines)


CONFIGS = [  # (layout, read unit, tile cache MB)
    ("chunks", "shard", 0),
    ("chunks", "shard", CACHE_MB),
    ("shard8", "shard", 0),
    ("shard8", "inner", 0),
    ("shard16", "inner", 0),
    ("shard8", "inner", CACHE_MB),
]


def main() -> None:
    """Parse options; run the phases asked for (each in its own process), record and print."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--only", default="make,latency,pass,append,rss,s3")
    parser.add_argument("--sizes", nargs="+", default=["small", "large"])
    parser.add_argument("--requests", type=int, default=30)
    parser.add_argument("--no-http", action="store_true", help="in-process latency only")
    parser.add_argument("--no-write", action="store_true", help="print, do not touch RESULTS.md")
    parser.add_argument("--phase", help=argparse.SUPPRESS)
    parser.add_argument("--size", default="small", help=argparse.SUPPRESS)
    parser.add_argument("--layout", default="chunks", help=argparse.SUPPRESS)
    parser.add_argument("--read-unit", default="shard", help=argparse.SUPPRESS)
    parser.add_argument("--cache-mb", type=int, default=0, help=argparse.SUPPRESS)
    parser.add_argument("--years", type=int, default=48, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.phase:
        print(json.dumps(PHASES[args.phase](args)))
        return
    only = set(args.only.split(","))
    results: dict[str, Any] = json.loads(RESULTS_JSON.read_text()) if RESULTS_JSON.exists() else {}
    stamp = {"date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()), "machine": platform.machine(),
             "cores": os.cpu_count()}  # fmt: skip
    if "make" in only:
        results["make"] = {**run_phase("make", sizes=args.sizes), "stamp": stamp}
    for size in args.sizes:
        if "latency" in only:
            for layout, unit, cache in CONFIGS:
                key = f"latency/{size}/{layout}/{unit}/{cache}"
                results[key] = run_phase("latency", size=size, layout=layout, read_unit=unit, cache_mb=cache,
                                         requests=args.requests)  # fmt: skip
                if not args.no_http:
                    results["http/" + key[8:]] = run_phase("http", size=size, layout=layout, read_unit=unit,
                                                           cache_mb=cache, requests=args.requests)  # fmt: skip
        if "pass" in only:
            for layout, unit in (("chunks", "shard"), ("shard8", "shard"), ("shard8", "inner"),
                                 ("shard16", "inner")):  # fmt: skip
                results[f"pass/{size}/{layout}/{unit}"] = run_phase(
                    "pass", size=size, layout=layout, read_unit=unit
                )
        if "append" in only:
            for layout in LAYOUTS:
                results[f"append/{size}/{layout}"] = run_phase("append", size=size, layout=layout)
        if "relayout" in only:
            for layout in ("chunks", "shard16"):
                results[f"relayout/{size}/{layout}"] = run_phase("relayout", size=size, layout=layout)
        if "rss" in only:
            for years in (12, 24, 48):
                results[f"rss/{size}/{years}"] = run_phase("rss", size=size, years=years)
    if "s3" in only:
        results["s3"] = run_phase("s3")
    if only & {"make", "latency", "pass", "append", "rss", "s3"}:
        results["stamp"] = stamp
    RESULTS_JSON.parent.mkdir(parents=True, exist_ok=True)
    RESULTS_JSON.write_text(json.dumps(results, indent=1), encoding="utf-8")
    section = render(results)
    print(section)
    if not args.no_write:
        from _results import write_section

        write_section(START, END, section)


if __name__ == "__main__":
    main()
