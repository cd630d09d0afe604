"""Benchmark: a request on a dataset with two grids against the two single-grid aggregations (issue 11).

    python bench/bench_multigrid.py            # builds the stores in bench/out/multigrid/, writes RESULTS.md
    python bench/bench_multigrid.py --quick    # smaller stores and fewer polygons, nothing written

Three synthetic stores over one invented region (0 to 9.6 E, 0 to 9.6 S: open sea, nothing real), 30 years:
  fine     precipitation only, 192 x 192 cells of 0.05 degrees (as the common 0.05-degree satellite-gauge products)
  coarse   tmax and tmin only, 48 x 48 cells of 0.2 degrees
  both     the two grids in one dataset (the same arrays: write_store({"fine": ..., "coarse": ...}))

For N invented polygons (seeded random convex quadrilaterals of 8 to 30 km across) each phase runs in its own
process, three times (best and median reported), and times the aggregation as the pipeline does it: exact weights
on each grid the request reads (parse once), then the weighted daily means of every feature over all days,
computed on dask threads in one computation (pipeline.features_and_weights, aggregate.aggregate, cluster.compute):
  fine     on the fine store: prcp (one grid)
  coarse   on the coarse store: tmax, tmin (one grid)
  both     on the two-grid store: prcp on the fine grid and tmax, tmin on the coarse grid, one computation
The target: both <= 1.2 x (fine + coarse). CPU time (all threads of the process) is the steadier measure on a
shared machine; wall time is reported beside it.

The same three phases are then timed as whole requests (pipeline.run: weights, aggregation and indicator tables
of every feature batch as one graph each, growing season May-Oct, baseline over all 30 years): prcp_total and
wet_days on the fine store, tmean and gdd on the coarse one, all four on the two-grid store.
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
OUT = ROOT / "bench" / "out" / "multigrid"
START, END = "<!-- bench_multigrid: start -->", "<!-- bench_multigrid: end -->"
REGION = (0.0, -9.6, 9.6, 0.0)  # west, south, east, north (degrees; open sea)


def _dataset(cells: int, variables: tuple[str, ...], years: tuple[int, int], seed: int) -> Any:
    """A lazy Dataset of daily values on a square lon-lat grid over REGION, from a cheap seeded generator."""
    import dask.array as da
    import pandas as pd
    import pyproj
    import xarray as xr

    west, south, east, north = REGION
    step = (east - west) / cells
    x = west + step * (np.arange(cells) + 0.5)
    y = north - step * (np.arange(cells) + 0.5)
    time_axis = pd.date_range(f"{years[0]}-01-01", f"{years[1]}-12-31", freq="D")
    days = len(time_axis)
    season = np.cos(2 * np.pi * (np.arange(days) % 365.25) / 365.25).astype(np.float32)

    def block(kind: str, block_info: dict | None = None) -> np.ndarray:
        (y0, y1), (x0, x1), _ = block_info[None]["array-location"]
        rng = np.random.default_rng([seed, y0, x0, len(kind)])
        shape = (y1 - y0, x1 - x0, days)
        if kind == "prcp":
            wet = rng.random(shape, dtype=np.float32) < 0.35
            return np.where(wet, rng.gamma(0.8, 9.0, shape).astype(np.float32), np.float32(0.0))
        base = 24.0 + 6.0 * season[None, None, :] + rng.normal(0.0, 2.0, shape).astype(np.float32)
        return base if kind == "tmax" else base - 9.0

    data_vars: dict[str, Any] = {}
    chunks = (32, 32, days)
    for v in variables:
        array = da.map_blocks(block, v, chunks=tuple((c,) * (n // c) + ((n % c,) if n % c else ()) for c, n in
                              zip(chunks, (cells, cells, days), strict=True)), dtype=np.float32)  # fmt: skip
        data_vars[v] = (("y", "x", "time"), array, {"grid_mapping": "crs"})
    data_vars["crs"] = ((), np.int32(0), {"crs_wkt": pyproj.CRS.from_epsg(4326).to_wkt()})
    ds = xr.Dataset(data_vars, coords={"time": time_axis, "y": y, "x": x})
    ds.attrs["title"] = f"bench_multigrid synthetic {cells} x {cells} ({', '.join(variables)})"
    return ds


def build(quick: bool) -> dict[str, Path]:
    """The three stores (built once into bench/out/multigrid/)."""
    from service.store import write_store

    years = (1993, 2002) if quick else (1993, 2022)
    fine_cells, coarse_cells = (96, 24) if quick else (192, 48)
    tag = "quick" if quick else "full"
    paths = {name: OUT / tag / f"{name}.zarr" for name in ("fine", "coarse", "both")}
    fine = _dataset(fine_cells, ("prcp",), years, seed=1)
    coarse = _dataset(coarse_cells, ("tmax", "tmin"), years, seed=2)
    if not (paths["fine"] / "zarr.json").is_file():
        print(f"writing {paths['fine']} ...", file=sys.stderr)
        write_store(fine, paths["fine"], grid="fine", progress=True)
    if not (paths["coarse"] / "zarr.json").is_file():
        print(f"writing {paths['coarse']} ...", file=sys.stderr)
        write_store(coarse, paths["coarse"], grid="coarse", progress=True)
    if not (paths["both"] / "zarr.json").is_file():
        print(f"writing {paths['both']} ...", file=sys.stderr)
        write_store({"fine": fine, "coarse": coarse}, paths["both"], progress=True)
    return paths


def polygons(n: int, seed: int = 11) -> dict[str, Any]:
    """N seeded convex quadrilaterals of 8 to 30 km across inside REGION (GeoJSON)."""
    rng = np.random.default_rng(seed)
    west, south, east, north = REGION
    features = []
    for i in range(n):
        cx = rng.uniform(west + 0.3, east - 0.3)
        cy = rng.uniform(south + 0.3, north - 0.3)
        r = rng.uniform(0.036, 0.135)  # degrees: 4 to 15 km from the centre
        angles = np.sort(rng.uniform(0, 2 * np.pi, 4))
        ring = [[float(cx + r * np.cos(a)), float(cy + r * np.sin(a))] for a in angles]
        ring.append(ring[0])
        features.append(
            {
                "type": "Feature",
                "properties": {"id": f"p{i:05d}"},
                "geometry": {"type": "Polygon", "coordinates": [ring]},
            }
        )
    return {"type": "FeatureCollection", "features": features}


INDICATORS = {"fine": ["prcp_total", "wet_days"], "coarse": ["tmean", "gdd"]}
INDICATORS["both"] = INDICATORS["fine"] + INDICATORS["coarse"]


def run_request(which: str, n: int, quick: bool) -> dict[str, Any]:
    """One timed whole request (pipeline.run) in this process."""
    from service import pipeline
    from service.schemas import IndicatorRequest
    from service.settings import Settings
    from service.store import open_store

    store = open_store(build(quick)[which])
    years = (int(store.dates.year[0]), int(store.dates.year[-1]))
    request = IndicatorRequest.model_validate(
        {
            "features": polygons(n),
            "id_property": "id",
            "indicators": INDICATORS[which],
            "season": {"months": [5, 6, 7, 8, 9, 10]},
            "years": {"start": years[0], "end": years[1]},
            "baseline": {"start": years[0], "end": years[1]},
        }
    )
    settings = Settings(stores=[], threads=None, weights_cache_size=0, max_cells_per_feature=10_000_000)
    wall, cpu = time.perf_counter(), time.process_time()
    frame = pipeline.run(request, store, settings).frame
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    check = {c: float(np.nansum(frame[c].to_numpy(dtype=np.float64))) for c in INDICATORS[which]}
    return {
        "which": which,
        "wall": wall,
        "cpu": cpu,
        "weights_wall": float("nan"),
        "weights_cpu": float("nan"),
        "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "check": check,
        "cells": {},
    }


def phase(which: str, n: int, quick: bool) -> dict[str, Any]:
    """One timed aggregation in this process (see the module docstring)."""
    from service import cluster, pipeline
    from service.aggregate import GridWeights, aggregate
    from service.schemas import SeriesRequest
    from service.settings import Settings
    from service.store import open_store

    paths = build(quick)
    store = open_store(paths["both" if which == "both" else which])
    variables = {"fine": ("prcp",), "coarse": ("tmax", "tmin"), "both": ("tmax", "tmin", "prcp")}[which]
    request = SeriesRequest.model_validate(
        {"features": polygons(n), "id_property": "id", "variables": list(variables)}
    )
    settings = Settings(stores=[], threads=None, weights_cache_size=0, max_cells_per_feature=10_000_000)
    span = slice(0, store.n_times)
    wall, cpu = time.perf_counter(), time.process_time()
    _, weights = pipeline.features_and_weights(request, store, settings)
    weights_wall, weights_cpu = time.perf_counter() - wall, time.process_time() - cpu
    lazy = aggregate(store, weights, variables=variables, time=span).drop_vars("tmean", errors="ignore")
    (values,) = cluster.compute(lazy, settings=settings)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    check = {v: float(np.nansum(values[v].values)) for v in variables}
    by_grid = weights.by_grid if isinstance(weights, GridWeights) else {store.main_grid: weights}
    return {
        "which": which,
        "wall": wall,
        "cpu": cpu,
        "weights_wall": weights_wall,
        "weights_cpu": weights_cpu,
        "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "check": check,
        "cells": {g: int(w.matrix.nnz) for g, w in by_grid.items()},
    }


def run_phase(which: str, n: int, quick: bool, mode: str = "aggregate") -> dict[str, Any]:
    """A phase in a fresh process (so that no cache or warm allocator of another phase helps it)."""
    cmd = [sys.executable, __file__, "--phase", which, "--mode", mode, "--features", str(n)]
    cmd += ["--quick"] if quick else []
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    out = subprocess.run(cmd, check=True, capture_output=True, text=True, env=env)
    return json.loads(out.stdout.strip().splitlines()[-1])


def load_average() -> float:
    """The 1-minute load average."""
    return os.getloadavg()[0]


def main() -> int:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--features", type=int, default=None)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--phase", choices=["fine", "coarse", "both"])
    parser.add_argument("--mode", choices=["aggregate", "run"], default="aggregate")
    args = parser.parse_args()
    n = args.features or (200 if args.quick else 1000)
    if args.phase:
        measure = phase if args.mode == "aggregate" else run_request
        print(json.dumps(measure(args.phase, n, args.quick)))
        return 0
    build(args.quick)
    measured: dict[str, dict[str, list[dict[str, Any]]]] = {}
    loads = []
    for mode in ("aggregate", "run"):
        runs: dict[str, list[dict[str, Any]]] = {"fine": [], "coarse": [], "both": []}
        for _ in range(args.repeat):
            for which in (
                "fine",
                "coarse",
                "both",
            ):  # interleaved, so that a load spike hits every phase alike
                loads.append(load_average())
                runs[which].append(run_phase(which, n, args.quick, mode))
                print(
                    mode,
                    which,
                    {k: round(v, 2) for k, v in runs[which][-1].items() if k in ("wall", "cpu")},
                    f"load {loads[-1]:.1f}",
                    file=sys.stderr,
                )
        both_check = runs["both"][0]["check"]
        for which in ("fine", "coarse"):
            for v in runs[which][0]["check"]:  # the two-grid dataset gives the single-grid values exactly
                want = runs[which][0]["check"][v]
                assert abs(want - both_check[v]) <= 1e-6 * max(1.0, abs(both_check[v])), (mode, v)
        measured[mode] = runs
    loads.append(load_average())
    text = report(n, measured, loads, args.quick)
    print(text)
    if not args.quick:
        write_section(START, END, text)
    return 0


def _stat(runs: list[dict[str, Any]], key: str) -> tuple[float, float]:
    values = sorted(r[key] for r in runs)
    return values[0], values[len(values) // 2]


def _table(runs: dict[str, list[dict[str, Any]]], with_weights: bool) -> tuple[list[str], dict]:
    """Rows of one mode's table and its ratios both / (fine + coarse), by (wall|cpu, best|median)."""
    rows = []
    for which in ("fine", "coarse", "both"):
        wall_best, wall_median = _stat(runs[which], "wall")
        cpu_best, cpu_median = _stat(runs[which], "cpu")
        weights = f" {_stat(runs[which], 'weights_cpu')[0]:.2f} |" if with_weights else ""
        rows.append(
            f"| {which} | {wall_best:.2f} / {wall_median:.2f} | {cpu_best:.2f} / {cpu_median:.2f} |{weights} "
            f"{max(r['peak_mb'] for r in runs[which]):,.0f} |"
        )
    sums = {}
    for key in ("wall", "cpu"):
        for pick in (0, 1):
            total = _stat(runs["fine"], key)[pick] + _stat(runs["coarse"], key)[pick]
            sums[(key, pick)] = _stat(runs["both"], key)[pick] / total
    return rows, sums


def _ratios(sums: dict) -> str:
    return (
        f"**{sums[('cpu', 0)]:.2f} x** in CPU time (best runs; medians {sums[('cpu', 1)]:.2f} x), "
        f"{sums[('wall', 0)]:.2f} x in wall time (medians {sums[('wall', 1)]:.2f} x)"
    )


def report(
    n: int, measured: dict[str, dict[str, list[dict[str, Any]]]], loads: list[float], quick: bool
) -> str:
    """The RESULTS.md section."""
    aggregate_rows, aggregate_sums = _table(measured["aggregate"], True)
    run_rows, run_sums = _table(measured["run"], False)
    stamp = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    runs = measured["aggregate"]
    cells = runs["both"][0]["cells"]
    return "\n".join(
        [
            START,
            "## A request on two grids against two single-grid ones (issue 11, `bench/bench_multigrid.py`)",
            "",
            f"Measured {stamp} on {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}; "
            f"1-minute load average {min(loads):.1f} to {max(loads):.1f} while measuring (shared machine: CPU time "
            "is the steadier measure). Stores: 30 years (10,958 days) of synthetic values over an invented square "
            "of sea; fine = prcp on 192 x 192 cells of 0.05 degrees, coarse = tmax and tmin on 48 x 48 cells of "
            "0.2 degrees, both = the two grids in one dataset. "
            f"{n} invented quadrilaterals of 8 to 30 km ({cells.get('fine', 0):,} fine and "
            f"{cells.get('coarse', 0):,} coarse cell weights). Each phase in a fresh process, "
            f"{len(runs['both'])} runs interleaved.",
            "",
            "The aggregation as the pipeline does it (weights on each grid read, then every feature's daily means "
            "over all days on dask threads, one computation):",
            "",
            "| phase | wall s, best / median | CPU s, best / median | of which weights, CPU s | peak MB |",
            "|---|---|---|---|---|",
            *aggregate_rows,
            "",
            f"Two grids against the sum of the two single-grid aggregations: {_ratios(aggregate_sums)}; target "
            "at most 1.2 x. The two-grid series equal the single-grid ones (sums checked).",
            "",
            "Whole requests (pipeline.run; May-Oct, baseline all 30 years; prcp_total and wet_days on fine, tmean "
            "and gdd on coarse, all four on both):",
            "",
            "| phase | wall s, best / median | CPU s, best / median | peak MB |",
            "|---|---|---|---|",
            *run_rows,
            "",
            f"Two grids against the sum of the two single-grid requests: {_ratios(run_sums)}. The two-grid values "
            "equal the single-grid ones (sums checked).",
            END,
        ]
    )


if __name__ == "__main__":
    raise SystemExit(main())
