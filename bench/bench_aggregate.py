"""Benchmark of the weights and the aggregation engine on the large demo store (issue 3).

    python bench/bench_aggregate.py                 # everything, appends/replaces its section in bench/RESULTS.md
    python bench/bench_aggregate.py --features 500  # a quicker look, nothing written

Measures, each phase in its own process so that its peak memory (ru_maxrss) is its own:
  weights  parse_features + compute_weights for N invented polygons (one core: geometry is single-threaded)
  decode   read and decode (int16 -> float64, fill -> NaN) every chunk the polygons touch, once, on dask threads
  raw      the same chunks read to int16 only (zarr decompression, no float conversion)
  engine   aggregate() of the N polygons x all days x tmax, tmin, prcp, computed on dask threads (the
           daily series held in memory, as the pipeline's batches do)
  stream   the engine over 12 and over all years, each day's series reduced to a per-feature sum at once,
           to show that the engine's own memory does not grow with the years
  naive    the obvious per-polygon script: cell-centre mask, where(...).mean() over the whole store, one
           polygon and one variable after another; a few polygons timed and extrapolated to N x 3

The polygons are a Voronoi tessellation of N seeded points on cells with data (invented communities that
tile the region, like the villages of a district), edges split every ~100 m.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
from _results import write_section

ROOT = Path(__file__).resolve().parent.parent
OUT = ROOT / "bench" / "out"
RESULTS = ROOT / "bench" / "RESULTS.md"
START, END = "<!-- bench_aggregate: start -->", "<!-- bench_aggregate: end -->"
VARIABLES = ("tmax", "tmin", "prcp")


STORE_OVERRIDE: list[Path] = []


def store_path() -> Path:
    """The large demo store, built into bench/out/ on first use (or the store given with --store)."""
    if STORE_OVERRIDE:
        return STORE_OVERRIDE[0]
    path = OUT / "large" / "demo.zarr"
    if not (path / "zarr.json").is_file():
        from service.demo import build_demo

        print(f"building the large demo store at {path} ...", file=sys.stderr)
        build_demo(path, size="large", progress=True)
    return path


def synthetic_store(path: Path, n: int = 256, years: tuple[int, int] = (1975, 2022)) -> Path:
    """A stand-in with the large demo's grid, days and layout, from a cheap generator (seasonal cycle plus
    seeded noise, 35 % wet days), built block by block with dask so that it needs little memory; for
    machines where the demo generator (about 10 GB in memory for the large size) cannot run."""
    import dask.array as da
    import pandas as pd
    import pyproj
    import xarray as xr

    from service.store import write_store

    lon = -40.0 + (np.arange(n) + 0.5) / n
    lat = 15.0 - (np.arange(n) + 0.5) / n
    time_axis = pd.date_range(f"{years[0]}-01-01", f"{years[1]}-12-31", freq="D")
    days = len(time_axis)
    season = np.cos(2 * np.pi * (np.arange(days) % 365.25) / 365.25)

    def block(kind: str, block_info: dict | None = None) -> np.ndarray:
        (y0, y1), (x0, x1), _ = block_info[None]["array-location"]
        rng = np.random.default_rng([y0, x0, len(kind)])
        shape = (y1 - y0, x1 - x0, days)
        u = rng.random(shape, dtype=np.float32)
        if kind == "prcp":
            # 35 % wet days with exponential amounts of mean 7 mm (cheap stand-ins for the demo's gamma)
            values = np.where(u < 0.35, -7.0 * np.log1p(-u / 0.35 * 0.999), 0.0).astype(np.float32)
        else:
            base = 24.0 if kind == "tmax" else 14.0
            values = (base + 6.0 * season + 6.0 * (u - 0.5)).astype(np.float32)
        return np.round(values, 1).astype(np.float32)

    template = da.zeros((n, n, days), chunks=(32, 32, -1), dtype=np.float32)
    data_vars: dict[str, Any] = {
        name: (
            ("y", "x", "time"),
            template.map_blocks(
                lambda _, name=name, block_info=None: block(name, block_info), dtype=np.float32
            ),
            {"grid_mapping": "crs"},
        )
        for name in VARIABLES
    }
    data_vars["crs"] = ((), np.int32(0), {"crs_wkt": pyproj.CRS.from_epsg(4326).to_wkt()})
    ds = xr.Dataset(data_vars, coords={"time": time_axis, "y": lat, "x": lon})
    ds.attrs["title"] = "synthetic stand-in for the large demo (bench only)"
    write_store(ds, path, progress=True)
    return path


def invented_polygons(store: Any, n: int, seed: int = 2026) -> dict[str, Any]:
    """n invented communities: Voronoi cells of seeded points on cells with data, clipped to the grid."""
    import shapely

    grid = store.grid
    mask = store.data_mask()
    rng = np.random.default_rng(seed)
    iy, ix = np.nonzero(mask)
    pick = rng.choice(len(iy), size=n, replace=False)
    dx, dy = abs(grid.x[1] - grid.x[0]), abs(grid.y[1] - grid.y[0])
    # jitter within the chosen cell so the seeds are not on the lattice
    px = grid.x[ix[pick]] + rng.uniform(-0.45, 0.45, n) * dx
    py = grid.y[iy[pick]] + rng.uniform(-0.45, 0.45, n) * dy
    xmin, ymin, xmax, ymax = grid.bounds()
    frame = shapely.box(xmin, ymin, xmax, ymax)
    cells = shapely.get_parts(
        shapely.voronoi_polygons(shapely.multipoints(np.column_stack([px, py])), extend_to=frame)
    )
    seeds = shapely.points(px, py)
    tree = shapely.STRtree(cells)
    owner = tree.query(seeds, predicate="within")
    order = np.empty(n, dtype=np.int64)
    order[owner[0]] = owner[1]
    polygons = shapely.segmentize(shapely.intersection(cells[order], frame), 0.001)  # ~100 m edges
    features = []
    for k, polygon in enumerate(polygons):
        ring = np.round(np.asarray(polygon.exterior.coords), 7).tolist()
        features.append(
            {
                "type": "Feature",
                "id": f"bench-{k:05d}",
                "geometry": {"type": "Polygon", "coordinates": [ring]},
                "properties": {},
            }
        )
    return {"type": "FeatureCollection", "features": features}


def peak_mb() -> float:
    """Peak resident memory of this process so far, MB (Linux ru_maxrss is in KB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def load(n: int) -> tuple[Any, dict[str, Any]]:
    """The store and the polygons (cached as GeoJSON in bench/out/)."""
    from service.store import open_store

    store = open_store(store_path())
    cache = OUT / f"polygons-{store.name}-{store.grid.shape[0]}x{store.grid.shape[1]}-{n}.geojson"
    if cache.is_file():
        features = json.loads(cache.read_text())
    else:
        features = invented_polygons(store, n)
        cache.write_text(json.dumps(features))
    return store, features


def weights_for(store: Any, features: dict[str, Any]) -> Any:
    from service.geometry import compute_weights, parse_features

    parsed = parse_features(features)
    return compute_weights(parsed, store.grid, data_mask=store.data_mask(), cache_size=0)


def phase_weights(n: int) -> dict[str, Any]:
    """Seconds for parse + weights of n polygons (best of three), and what they touch."""
    from service.geometry import compute_weights, parse_features

    store, features = load(n)
    mask = store.data_mask()
    parse_s, weight_s, parse_cpu, weight_cpu = [], [], [], []
    for _ in range(3):
        t0, c0 = time.perf_counter(), time.process_time()
        parsed = parse_features(features)
        t1, c1 = time.perf_counter(), time.process_time()
        weights = compute_weights(parsed, store.grid, data_mask=mask, cache_size=0)
        t2, c2 = time.perf_counter(), time.process_time()
        parse_s.append(t1 - t0)
        weight_s.append(t2 - t1)
        parse_cpu.append(c1 - c0)
        weight_cpu.append(c2 - c1)
    return {
        "parse_s": min(parse_s),
        "weights_s": min(weight_s),
        "parse_cpu_s": min(parse_cpu),
        "weights_cpu_s": min(weight_cpu),
        "polygons_per_cpu_s": n / (min(parse_cpu) + min(weight_cpu)),
        "weights_only_polygons_per_cpu_s": n / min(weight_cpu),
        "load_average": os.getloadavg()[0],
        "nnz": int(weights.matrix.nnz),
        "cells_per_polygon": float(weights.n_cells.mean()),
        "area_km2_mean": float(weights.area_km2.mean()),
        "vertices_mean": float(np.mean([len(f["geometry"]["coordinates"][0]) for f in features["features"]])),
        "peak_mb": peak_mb(),
    }


def _chunk_tasks(store: Any, weights: Any, reader: str) -> list[Any]:
    """One delayed read (read_raw or read) per touched chunk, time block and variable."""
    import dask

    from service.aggregate import chunk_weights

    cy, cx, ct = store.chunk_shape
    plan = chunk_weights(weights, store.grid.shape, (cy, cx))

    def touch(var: str, y: slice, x: slice, t: slice) -> int:
        values = getattr(store, reader)(var, y, x, t)
        return int(values.shape[-1])

    tasks = []
    for var in VARIABLES:
        for t0 in range(0, store.n_times, ct):
            t = slice(t0, min(store.n_times, t0 + ct))
            tasks.extend(dask.delayed(touch, pure=False)(var, c.y, c.x, t) for c in plan)
    return tasks


def phase_read(n: int, reader: str) -> dict[str, Any]:
    """Seconds to read (and decode, for reader 'read') every touched chunk once."""
    import dask

    store, features = load(n)
    weights = weights_for(store, features)
    tasks = _chunk_tasks(store, weights, reader)
    t0, c0 = time.perf_counter(), time.process_time()
    dask.compute(*tasks, scheduler="threads")
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    return {
        "seconds": seconds,
        "cpu_s": cpu,
        "tasks": len(tasks),
        "peak_mb": peak_mb(),
        "load_average": os.getloadavg()[0],
    }


def phase_engine(n: int) -> dict[str, Any]:
    """Seconds for the full daily aggregation of n polygons x all days x 3 variables."""
    import dask

    from service.aggregate import aggregate

    store, features = load(n)
    weights = weights_for(store, features)
    before = peak_mb()
    lazy = aggregate(store, weights, variables=VARIABLES)
    t0, c0 = time.perf_counter(), time.process_time()
    (computed,) = dask.compute(lazy[list(VARIABLES)], scheduler="threads")
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    output_mb = sum(computed[v].nbytes for v in VARIABLES) / 2**20
    days = computed.sizes["time"]
    return {
        "seconds": seconds,
        "cpu_s": cpu,
        "load_average": os.getloadavg()[0],
        "days": days,
        "cell_days_per_s": weights.matrix.nnz * days * len(VARIABLES) / seconds,
        "output_mb": output_mb,
        "peak_mb_before": before,
        "peak_mb": peak_mb(),
        "finite_share": float(np.isfinite(computed["tmax"].values).mean()),
    }


def phase_stream(n: int, years: int) -> dict[str, Any]:
    """Engine over the first ``years`` years, each time block reduced at once (no daily output kept)."""
    import dask

    from service.aggregate import aggregate

    store, features = load(n)
    weights = weights_for(store, features)
    stop = int(np.searchsorted(store.dates.year, int(store.dates.year[0]) + years, side="left"))
    lazy = aggregate(store, weights, variables=VARIABLES, time=slice(0, stop))
    before = peak_mb()
    t0, c0 = time.perf_counter(), time.process_time()
    dask.compute(*[lazy[v].data.sum(axis=1) for v in VARIABLES], scheduler="threads")
    return {
        "years": years,
        "seconds": time.perf_counter() - t0,
        "cpu_s": time.process_time() - c0,
        "load_average": os.getloadavg()[0],
        "peak_mb_before": before,
        "peak_mb": peak_mb(),
    }


def phase_naive(n: int, polygons: int) -> dict[str, Any]:
    """The per-polygon script on the first few polygons and one variable; seconds per polygon and variable."""
    import shapely

    store, features = load(n)
    ds = store.to_xarray()
    grid = store.grid
    lon, lat = np.meshgrid(grid.x, grid.y)
    seconds, cpu = [], []
    for feature in features["features"][:polygons]:
        t0, c0 = time.perf_counter(), time.process_time()
        polygon = shapely.geometry.shape(feature["geometry"])
        inside = shapely.contains_xy(polygon, lon, lat)
        mask = ds["tmax"].isel(time=0).copy(data=inside)
        series = ds["tmax"].where(mask).mean(("y", "x")).compute()
        seconds.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
        if series.sizes["time"] != store.n_times:
            raise RuntimeError("the per-polygon script lost days")
    per, per_cpu = float(np.mean(seconds)), float(np.mean(cpu))
    return {
        "seconds_per_polygon_variable": per,
        "cpu_s_per_polygon_variable": per_cpu,
        "polygons_timed": polygons,
        "extrapolated_s": per * n * len(VARIABLES),
        "extrapolated_cpu_s": per_cpu * n * len(VARIABLES),
        "peak_mb": peak_mb(),
        "load_average": os.getloadavg()[0],
    }


def run_phase(args: list[str]) -> dict[str, Any]:
    """Run one phase in a fresh Python process and return its JSON result."""
    done = subprocess.run(
        [sys.executable, __file__, "--phase", *args], check=True, capture_output=True, text=True, cwd=ROOT
    )
    return json.loads(done.stdout.strip().splitlines()[-1])


def machine() -> str:
    """CPU model and count, for the record."""
    model = "unknown CPU"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return f"{model}, {os.cpu_count()} cores, Python {platform.python_version()}"


def report(n: int, results: dict[str, Any], store: Any) -> str:
    """The RESULTS.md section."""
    w, dec, raw, eng = results["weights"], results["decode"], results["raw"], results["engine"]
    s12, sall, naive = results["stream12"], results["streamall"], results["naive"]
    ny, nx = store.grid.shape
    cy, cx, ct = store.chunk_shape
    loads = [r["load_average"] for r in (w, dec, raw, eng, s12, sall, naive)]

    def both(r: dict[str, Any]) -> str:
        return f"{r['seconds']:.1f} s wall, {r['cpu_s']:.1f} s CPU"

    lines = [
        START,
        "## Weights and aggregation (issue 3, `bench/bench_aggregate.py`)",
        "",
        f"Measured {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())} on {machine()}; dask threads (one per "
        f"core). The machine was shared with other work (1-minute load average {min(loads):.1f} to "
        f"{max(loads):.1f} on 2 cores), so wall times are inflated; CPU time (all threads of the process) is the "
        "steadier measure, and the ratios compare phases run under the same conditions.",
        f"Store: {store.describe()['title']!r}, {ny} x {nx} cells x {eng['days']} days, read unit {cy} x {cx} x {ct} (y, x, time), "
        "int16 at 0.1 units, blosc lz4.",
        f"Polygons: {n} invented communities (a seeded Voronoi tessellation of the region, edges split every "
        f"~100 m), mean {w['vertices_mean']:.0f} vertices, {w['area_km2_mean']:.2f} km2, "
        f"{w['cells_per_polygon']:.1f} cells; {w['nnz']:,} weights in the matrix.",
        "",
        "| what | time | rate / ratio | peak memory |",
        "|---|---|---|---|",
        f"| exact weights: parse + weights (single-threaded) | {w['parse_s'] + w['weights_s']:.2f} s wall, "
        f"{w['parse_cpu_s'] + w['weights_cpu_s']:.2f} s CPU (parse {w['parse_cpu_s']:.2f}, weights "
        f"{w['weights_cpu_s']:.2f}) | {w['polygons_per_cpu_s']:,.0f} polygons per CPU-second "
        f"({w['weights_only_polygons_per_cpu_s']:,.0f} for the weights alone) | {w['peak_mb']:,.0f} MB |",
        f"| read + decode (int16 -> float64, fill -> NaN) every touched chunk once, 3 variables | {both(dec)} | "
        f"{dec['tasks']} chunk reads | {dec['peak_mb']:,.0f} MB |",
        f"| read only (zarr decompression to int16), same chunks | {both(raw)} | | {raw['peak_mb']:,.0f} MB |",
        f"| engine: {n} polygons x {eng['days']} days x 3 variables, daily series kept | {both(eng)} | "
        f"{eng['seconds'] / dec['seconds']:.2f} x decode wall, {eng['cpu_s'] / dec['cpu_s']:.2f} x decode CPU; "
        f"{eng['cell_days_per_s'] / 1e9:.2f} G weight-days/s | {eng['peak_mb']:,.0f} MB (output "
        f"{eng['output_mb']:,.0f} MB) |",
        f"| engine, each block's series summed at once, first 12 years | {both(s12)} | | {s12['peak_mb']:,.0f} MB |",
        f"| engine, each block's series summed at once, all years | {both(sall)} | "
        f"{sall['seconds'] / dec['seconds']:.2f} x decode wall, {sall['cpu_s'] / dec['cpu_s']:.2f} x decode CPU | "
        f"{sall['peak_mb']:,.0f} MB |",
        f"| per-polygon script (centre mask, `where(...).mean()`), {naive['polygons_timed']} polygons x tmax | "
        f"{naive['seconds_per_polygon_variable']:.1f} s wall, {naive['cpu_s_per_polygon_variable']:.1f} s CPU per "
        f"polygon and variable | {n} x 3 extrapolated: {naive['extrapolated_cpu_s'] / 3600:,.0f} CPU-hours, "
        f"{naive['extrapolated_cpu_s'] / eng['cpu_s']:,.0f} x the engine | {naive['peak_mb']:,.0f} MB |",
        "",
        *(
            []
            if "synthetic" not in store.describe()["title"]
            else [
                "The large demo could not be built during this session: its generator holds the whole store in "
                "memory (about 10 GB) and was killed twice by the kernel's out-of-memory killer on the shared "
                "machine. The stand-in (`--build-synthetic`) has the same grid, days, chunks and encoding, with "
                "cheap seeded random values that compress worse than the demo's weather, so both the decode pass "
                "and the engine decompress more bytes than they would on the demo.",
                "",
            ]
        ),
        closing_note(n, w, dec, eng, s12, sall, naive),
        "",
        "Peak memory is each phase's own process (ru_maxrss), with about "
        f"{results['base']['peak_mb']:,.0f} MB for the imports and an opened store.",
        "",
        END,
    ]
    return "\n".join(lines) + "\n"


def closing_note(
    n: int,
    w: dict[str, Any],
    dec: dict[str, Any],
    eng: dict[str, Any],
    s12: dict[str, Any],
    sall: dict[str, Any],
    naive: dict[str, Any],
) -> str:
    """The three numbers and the peak memory, set against the issue's targets."""

    def verdict(ok: bool) -> str:
        return "met" if ok else "not met"

    stream, kept = sall["cpu_s"] / dec["cpu_s"], eng["cpu_s"] / dec["cpu_s"]
    return (
        f"Closing note, against the issue's targets: exact weights run at {w['polygons_per_cpu_s']:,.0f} polygons "
        f"per CPU-second including parsing (target 3,000 per core: {verdict(w['polygons_per_cpu_s'] >= 3000)} in "
        f"CPU time; wall time on this loaded machine gave {n / (w['parse_s'] + w['weights_s']):,.0f}/s). The "
        f"aggregation of {n} polygons x {eng['days']} days x 3 variables costs {stream:.2f} x one decode pass over "
        f"the touched chunks in CPU time when each block's series is consumed as it comes (target 1.3 x: "
        f"{verdict(stream <= 1.3)}), and {kept:.2f} x when the whole daily output is kept "
        f"({verdict(kept <= 1.3)}); in wall time, under the load, {sall['seconds'] / dec['seconds']:.2f} x and "
        f"{eng['seconds'] / dec['seconds']:.2f} x. The per-polygon script needs "
        f"{naive['cpu_s_per_polygon_variable']:.1f} CPU-seconds per polygon and variable, "
        f"{naive['extrapolated_cpu_s'] / eng['cpu_s']:,.0f} x the engine on the batch. Peak memory of the engine "
        f"is {s12['peak_mb']:,.0f} MB for 12 years and {sall['peak_mb']:,.0f} MB for all {eng['days'] // 365} years "
        "(it hardly grows with the years); keeping every daily series in memory adds the series themselves (the "
        "pipeline computes feature batches of 1,000 for that reason)."
    )


def base_memory() -> dict[str, Any]:
    """Peak memory of the imports and an opened store, the floor under every phase."""
    from service.store import open_store

    store = open_store(store_path())
    store.data_mask()
    return {"peak_mb": peak_mb()}


def main() -> int:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--features", type=int, default=5000)
    parser.add_argument("--naive-polygons", type=int, default=2)
    parser.add_argument("--phase", nargs="+", help=argparse.SUPPRESS)
    parser.add_argument("--no-write", action="store_true", help="print the section, do not touch RESULTS.md")
    parser.add_argument("--store", type=Path, help="another store instead of the large demo")
    parser.add_argument("--report-only", action="store_true", help="rewrite the section from the last JSON")
    parser.add_argument(
        "--build-synthetic", type=Path, help="build the synthetic stand-in store there and exit"
    )
    args = parser.parse_args()
    if args.build_synthetic:
        synthetic_store(args.build_synthetic)
        return 0
    if args.store:
        STORE_OVERRIDE.append(args.store.resolve())
    if args.phase:
        name, *rest = args.phase
        n = args.features
        phases = {
            "weights": lambda: phase_weights(n),
            "decode": lambda: phase_read(n, "read"),
            "raw": lambda: phase_read(n, "read_raw"),
            "engine": lambda: phase_engine(n),
            "stream": lambda: phase_stream(n, int(rest[0])),
            "naive": lambda: phase_naive(n, int(rest[0])),
            "base": base_memory,
        }
        print(json.dumps(phases[name]()))
        return 0
    OUT.mkdir(parents=True, exist_ok=True)
    from service.store import open_store

    store = open_store(store_path())
    if args.report_only:
        saved = json.loads((OUT / f"bench_aggregate-{args.features}.json").read_text())
        text = report(args.features, saved, store)
        print(text)
        if not args.no_write:
            write_section(START, END, text)
        return 0
    load(args.features)  # polygons built once, outside the timings
    n = ["--features", str(args.features)] + (["--store", str(args.store)] if args.store else [])
    results: dict[str, Any] = {}
    for key, phase in [
        ("base", ["base"]),
        ("weights", ["weights"]),
        ("decode", ["decode"]),
        ("raw", ["raw"]),
        ("engine", ["engine"]),
        ("stream12", ["stream", "12"]),
        ("streamall", ["stream", "100"]),
        ("naive", ["naive", str(args.naive_polygons)]),
    ]:
        print(f"{key} ...", file=sys.stderr, flush=True)
        results[key] = run_phase([*phase, *n])
        print(f"  {results[key]}", file=sys.stderr, flush=True)
    text = report(args.features, results, store)
    print(text)
    (OUT / f"bench_aggregate-{args.features}.json").write_text(json.dumps(results, indent=2))
    if not args.no_write and args.features == 5000:
        write_section(START, END, text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
