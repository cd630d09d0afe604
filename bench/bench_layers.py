"""Measure the remapping of a weight layer: a fine population raster onto a store's grid, both ways of overlap.

Run: python bench/bench_layers.py [--cells 2000] [--no-write]

A GeoTIFF of N x N cells of 0.005 degree (about 500 m; invented counts) is remapped conservatively
(service.ingest.layers.remap_layer) onto (a) a 0.25-degree latitude-longitude grid over the same region (one CRS:
separable 1-D overlaps) and (b) a 10-km Lambert conformal grid over it (another CRS: each grid cell intersected
with the raster cells under it). It reports wall and CPU time, raster cells per CPU-second, the peak memory of
the process (ru_maxrss), and how well the total count is kept on cells wholly under the raster. It puts its
section in bench/RESULTS.md between its markers.
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyproj
import rasterio
from rasterio.transform import from_origin

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.ingest.layers import ground_areas, remap_layer  # noqa: E402
from service.ingest.readers import open_raster  # noqa: E402
from service.store.grids import Grid  # noqa: E402

RESULTS = ROOT / "bench" / "RESULTS.md"
START = "<!-- bench_layers: start -->"
END = "<!-- bench_layers: end -->"
SIZE = 0.005
WEST, NORTH = -150.0, -30.0  # invented, over open ocean


def measure(raster_path: Path, grid: Grid) -> dict:
    """Remap counts onto a grid; wall, CPU, totals."""
    raster = open_raster(raster_path)
    t0, c0 = time.perf_counter(), time.process_time()
    result = remap_layer(raster, grid, "count")
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    counts = result.values * ground_areas(grid)
    return {"wall": wall, "cpu": cpu, "landed": float(np.nansum(counts)), "partly": result.cells_partly_outside,
            "cells": int(np.isfinite(result.values).sum())}  # fmt: skip


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--cells", type=int, default=2000, help="raster cells along each side (default 2000)")
    parser.add_argument("--no-write", action="store_true")
    args = parser.parse_args()
    n = args.cells
    work = Path(tempfile.mkdtemp(prefix="bench-layers-"))
    rng = np.random.default_rng(0)
    values = rng.gamma(0.5, 40.0, (n, n)).astype(np.float32)
    path = work / "people.tif"
    with rasterio.open(path, "w", driver="GTiff", height=n, width=n, count=1, dtype="float32", crs="EPSG:4326",
                       transform=from_origin(WEST, NORTH, SIZE, SIZE), nodata=-1.0, tiled=True) as dst:  # fmt: skip
        dst.write(values, 1)
    span = n * SIZE
    k = int(span / 0.25)
    lat_lon = Grid(crs_wkt=pyproj.CRS.from_epsg(4326).to_wkt(), x=WEST + 0.25 * (np.arange(k) + 0.5),
                   y=(NORTH - span + 0.25 * (np.arange(k) + 0.5))[::-1], is_geographic=True)  # fmt: skip
    lcc = pyproj.CRS.from_proj4(f"+proj=lcc +lat_1={NORTH - span * 0.8} +lat_2={NORTH - span * 0.2} "
                                f"+lat_0={NORTH - span / 2} +lon_0={WEST + span / 2} +datum=WGS84 +units=m")  # fmt: skip
    half = span * 111_000 * 0.4  # a square well inside the raster
    m = int(2 * half / 10_000)
    projected = Grid(crs_wkt=lcc.to_wkt(), x=-half + 10_000 * (np.arange(m) + 0.5),
                     y=(-half + 10_000 * (np.arange(m) + 0.5))[::-1], is_geographic=False)  # fmt: skip
    same = measure(path, lat_lon)
    other = measure(path, projected)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    total = float(values.astype(np.float64).sum())
    lines = [
        START,
        "## Weight layers: remapping a raster onto a grid (issue 11, `bench/bench_layers.py`)",
        "",
        f"Measured {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())} on {platform.machine()}, {os.cpu_count()} "
        f"cores, Python {platform.python_version()}; remapping on one thread, raster reads through dask; 1-minute load average {os.getloadavg()[0]:.1f} (a "
        f"shared machine: CPU time is the steadier measure). Raster: {n} x {n} cells of {SIZE} degree "
        f"({n * n / 1e6:.1f} M cells, invented counts, tiled GeoTIFF), read window by window.",
        "",
        "| onto | overlap | wall | CPU | raster cells per CPU-second | grid cells with a value |",
        "|---|---|---|---|---|---|",
        f"| {k} x {k} cells of 0.25 degree (same CRS) | separable 1-D | {same['wall']:.1f} s | {same['cpu']:.1f} s | "
        f"{n * n / same['cpu'] / 1e6:.1f} M | {same['cells']} |",
        f"| {m} x {m} cells of 10 km, Lambert conformal | polygons | {other['wall']:.1f} s | {other['cpu']:.1f} s | "
        f"{(2 * half / 10_000 * 10_000 / 111_000 / SIZE) ** 2 / other['cpu'] / 1e6:.2f} M (under the grid) | "
        f"{other['cells']} |",
        "",
        f"On the latitude-longitude grid, which covers the raster exactly, {same['landed']:,.0f} of {total:,.0f} "
        f"counted landed (relative difference {abs(same['landed'] - total) / total:.1e}). Peak memory of the "
        f"process: {peak:,.0f} MB.",
        "",
        END,
    ]
    text = "\n".join(lines) + "\n"
    print(text)
    if not args.no_write:
        old = RESULTS.read_text(encoding="utf-8")
        if START in old and END in old:
            head, rest = old.split(START, 1)
            _, tail = rest.split(END, 1)
            new = head + text.rstrip("\n") + tail
        else:
            new = old.rstrip("\n") + "\n\n" + text
        RESULTS.write_text(new, encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
