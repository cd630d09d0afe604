"""Measure chunk shape and codec of the store: one variable of 256 x 256 cells x 41 years (int16 at 0.1 units).

Run: python bench/bench_store_layout.py [--workdir DIR] [--quick]

For each layout the script writes the same int16 array with zarr (the codecs and dims of service/store.py),
then times, with the files in the page cache (warm reads; a cold disk adds its own latency on top):
- a 5 x 5-cell read of all 41 years (median of 15 windows at random places, some across tile edges),
- a full pass (every read unit read and decoded, on 2 threads; fastest of 3), and, for plain chunks, the bare
  numcodecs blosc decode of the same chunk bytes already in memory (the floor a full pass can approach),
- appending one year to a 40-year copy (hard-linked, as an ingest that writes aside would): for whole-time
  chunks this means rewriting every chunk to keep the layout.
It prints a Markdown table and appends it, with the machine's description, to bench/RESULTS.md.
"""

from __future__ import annotations

import argparse
import os
import platform
import shutil
import statistics
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from itertools import product
from pathlib import Path

import numcodecs
import numpy as np
import zarr
from scipy.signal import lfilter
from zarr.codecs import BloscCodec, BloscShuffle

NY = NX = 256
YEARS = 41
NT = 14975  # days from 1982-01-01 to 2022-12-31
DAYS_40_YEARS = 14610  # 1982-01-01 .. 2021-12-31
FILL = -32768


@dataclass(frozen=True)
class Layout:
    """One way to lay out the array: (cy, cx, ct) chunks, optional shards, codec."""

    label: str
    chunks: tuple[int, int, int]
    shards: tuple[int, int, int] | None = None
    codec: str = "lz4"
    level: int = 5


LAYOUTS = [
    Layout("32x32 tiles, whole time (14975 d), lz4", (32, 32, NT)),
    Layout("32x32 tiles, decade chunks (3653 d), lz4", (32, 32, 3653)),
    Layout(
        "32x32 tiles, decade inner chunks in 4-decade shards, lz4", (32, 32, 3653), shards=(32, 32, 4 * 3653)
    ),
    Layout("32x32 tiles, one-year chunks (365 d), lz4", (32, 32, 365)),
    Layout("map-sized one-year chunks (256x256x365), lz4", (256, 256, 365)),
    Layout("32x32 tiles, decade chunks, zstd level 1", (32, 32, 3653), codec="zstd", level=1),
    Layout("32x32 tiles, decade chunks, zstd level 5", (32, 32, 3653), codec="zstd", level=5),
    Layout("32x32 tiles, whole time, zstd level 1", (32, 32, NT), codec="zstd", level=1),
]


def synthetic_tmax(seed: int = 0) -> np.ndarray:
    """(256, 256, 14975) int16 tmax-like values at 0.1 degC: seasonal cycle, gradients, AR(1) weather."""
    rng = np.random.default_rng(seed)
    day = np.arange(NT)
    season = 6.0 * np.cos(2 * np.pi * (day - 200) / 365.25)
    regional = lfilter([0.6], [1.0, -0.8], rng.standard_normal(NT) * 2.0)
    out = np.empty((NY, NX, NT), dtype=np.int16)
    yy, xx = np.meshgrid(np.arange(NY), np.arange(NX), indexing="ij")
    base = 24.0 - 0.02 * yy + 0.01 * xx + 3.0 * np.sin(xx / 17.0) * np.cos(yy / 23.0)
    for j0 in range(0, NY, 32):
        cells = rng.standard_normal((32, NX, NT)).astype(np.float32)
        local = lfilter([0.5], [1.0, -0.7], cells, axis=-1).astype(np.float32)
        block = base[j0 : j0 + 32, :, None] + season[None, None] + regional[None, None] + local * 1.5
        out[j0 : j0 + 32] = np.round(block * 10).astype(np.int16)
    return out


def synthetic_prcp(seed: int = 1) -> np.ndarray:
    """(256, 256, 14975) int16 prcp-like values at 0.1 mm: a rainy season, spatially shared wet days, gamma amounts."""
    rng = np.random.default_rng(seed)
    day = np.arange(NT)
    wet_share = 0.05 + 0.5 * ((1 + np.cos(2 * np.pi * (day - 228) / 365.25)) / 2) ** 2
    regional = rng.standard_normal(NT)
    out = np.empty((NY, NX, NT), dtype=np.int16)
    from scipy.special import ndtri

    threshold = ndtri(wet_share)
    for j0 in range(0, NY, 32):
        z = 0.8 * regional[None, None] + 0.6 * rng.standard_normal((32, NX, NT)).astype(np.float32)
        amount = rng.gamma(0.8, 12.0, (32, NX, NT)).astype(np.float32) + 0.1
        out[j0 : j0 + 32] = np.where(z < threshold, np.round(amount * 10), 0).astype(np.int16)
    return out


def codec(layout: Layout) -> BloscCodec:
    """The blosc codec of a layout (byte shuffle, as service/store.py uses)."""
    return BloscCodec(cname=layout.codec, clevel=layout.level, shuffle=BloscShuffle.shuffle)


def write(path: Path, values: np.ndarray, layout: Layout) -> zarr.Array:
    """Write values (y, x, time) with a layout; returns the array."""
    if path.exists():
        shutil.rmtree(path)
    array = zarr.create_array(
        store=str(path),
        shape=values.shape,
        dtype="int16",
        chunks=layout.chunks,
        shards=layout.shards,
        compressors=[codec(layout)],
        fill_value=FILL,
        dimension_names=("y", "x", "time"),
        zarr_format=3,
    )
    array[...] = values
    return array


def disk_bytes(path: Path) -> int:
    """Bytes of all files under a directory."""
    return sum(f.stat().st_size for f in path.rglob("*") if f.is_file())


def read_units(array: zarr.Array) -> list[tuple[slice, slice, slice]]:
    """Every read unit (shard or chunk) of an array."""
    unit = array.shards or array.chunks
    starts = product(*(range(0, n, c) for n, c in zip(array.shape, unit, strict=True)))
    return [
        tuple(slice(s, min(s + c, n)) for s, c, n in zip(st, unit, array.shape, strict=True)) for st in starts
    ]


def time_small_reads(array: zarr.Array, rng: np.random.Generator, repeats: int = 15) -> tuple[float, float]:
    """Median (wall, CPU) seconds of a 5 x 5-cell read of the whole time axis."""
    walls, cpus = [], []
    for k in range(repeats):
        j, i = (int(v) for v in rng.integers(0, NY - 5, size=2))
        if k % 3 == 0:  # every third window across a tile corner
            j, i = 30, 62
        start, cpu = time.perf_counter(), time.process_time()
        block = array[j : j + 5, i : i + 5, :]
        walls.append(time.perf_counter() - start)
        cpus.append(time.process_time() - cpu)
        assert block.shape == (5, 5, array.shape[2])
    return statistics.median(walls), statistics.median(cpus)


def time_full_pass(array: zarr.Array) -> tuple[float, float]:
    """(wall, CPU) seconds to read and decode every read unit on 2 threads."""
    units = read_units(array)
    start, cpu = time.perf_counter(), time.process_time()
    with ThreadPoolExecutor(max_workers=2) as pool:
        total = sum(pool.map(lambda s: int(np.asarray(array[s])[0, 0, 0]), units))
    del total
    return time.perf_counter() - start, time.process_time() - cpu


def time_bare_decode(path: Path, layout: Layout) -> tuple[float, float] | None:
    """(wall, CPU) seconds for numcodecs' blosc to decode every chunk file (plain chunks only), on 2 threads."""
    if layout.shards is not None:
        return None
    files = [f for f in (path / "c").rglob("*") if f.is_file()]
    blobs = [f.read_bytes() for f in files]
    blosc = numcodecs.Blosc()
    start, cpu = time.perf_counter(), time.process_time()
    with ThreadPoolExecutor(max_workers=2) as pool:
        list(pool.map(blosc.decode, blobs))
    return time.perf_counter() - start, time.process_time() - cpu


def time_append_year(workdir: Path, values: np.ndarray, layout: Layout) -> float:
    """Seconds to add the 41st year to a 40-year store (on a hard-linked copy, as ingest writes aside)."""
    base = workdir / "append-base"
    write(base, values[:, :, :DAYS_40_YEARS], layout)
    copy = workdir / "append-copy"
    if copy.exists():
        shutil.rmtree(copy)
    start = time.perf_counter()
    if layout.chunks[2] >= NT:
        # whole-time chunks: keeping the layout means rewriting every chunk with the longer time axis
        source = zarr.open_array(str(base), mode="r")
        grown = zarr.create_array(
            store=str(copy), shape=values.shape, dtype="int16", chunks=(32, 32, NT), compressors=[codec(layout)],
            fill_value=FILL, dimension_names=("y", "x", "time"), zarr_format=3,
        )  # fmt: skip
        for j, i in product(range(0, NY, 32), range(0, NX, 32)):
            tile = np.concatenate(
                [source[j : j + 32, i : i + 32, :], values[j : j + 32, i : i + 32, DAYS_40_YEARS:]], axis=2
            )
            grown[j : j + 32, i : i + 32, :] = tile
    else:
        shutil.copytree(base, copy, copy_function=os.link)
        array = zarr.open_array(str(copy), mode="r+")
        array.resize(values.shape)
        array[:, :, DAYS_40_YEARS:] = values[:, :, DAYS_40_YEARS:]
    elapsed = time.perf_counter() - start
    check = zarr.open_array(str(copy), mode="r")
    assert np.array_equal(check[3:5, 7:9, :], values[3:5, 7:9, :])
    shutil.rmtree(copy)
    shutil.rmtree(base)
    return elapsed


def run(workdir: Path, quick: bool) -> str:
    """Measure every layout; returns the Markdown section."""
    rows = []
    variables = {"tmax": synthetic_tmax()}
    if not quick:
        variables["prcp"] = synthetic_prcp()
    raw_mb = variables["tmax"].nbytes / 1e6
    for name, values in variables.items():
        layouts = LAYOUTS if name == "tmax" else [lay for lay in LAYOUTS if "map-sized" not in lay.label]
        if quick:
            layouts = [lay for lay in layouts if "level 5" not in lay.label and "(365 d)" not in lay.label]
        for layout in layouts:
            path = workdir / "layout.zarr"
            start = time.perf_counter()
            array = write(path, values, layout)
            write_s = time.perf_counter() - start
            size_mb = disk_bytes(path) / 1e6
            array = zarr.open_array(str(path), mode="r")
            small = time_small_reads(
                array, np.random.default_rng(5), repeats=3 if "map-sized" in layout.label else 15
            )
            # the machine may be shared: the fastest of three passes is the least disturbed one
            full = min(time_full_pass(array) for _ in range(3))
            bares = [time_bare_decode(path, layout) for _ in range(3)]
            bare = None if bares[0] is None else min(b for b in bares if b is not None)
            with_append = name == "tmax" and "map-sized" not in layout.label
            append = time_append_year(workdir, values, layout) if with_append else None
            files = sum(1 for f in path.rglob("*") if f.is_file())
            rows.append((name, layout.label, size_mb, files, write_s, small, full, bare, append))
            print(rows[-1], flush=True)
            shutil.rmtree(path)
    header = (
        "| variable | layout | disk MB | files | write s | 5x5 cells x 41 y read ms, wall (CPU) | "
        "full pass s, wall (CPU) | bare blosc decode s, wall (CPU) | append a year s |\n"
        "|---|---|---|---|---|---|---|---|---|\n"
    )

    def pair(value: tuple[float, float] | None, scale: float = 1.0, digits: int = 2) -> str:
        return "-" if value is None else f"{value[0] * scale:.{digits}f} ({value[1] * scale:.{digits}f})"

    lines = [
        f"| {v} | {label} | {mb:.0f} | {files} | {w:.1f} | {pair(small, 1000, 0)} | {pair(full)} | "
        f"{pair(bare)} | {'-' if app is None else f'{app:.2f}'} |"
        for v, label, mb, files, w, small, full, bare, app in rows
    ]
    machine = f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, zarr {zarr.__version__}"
    load = os.getloadavg()
    return (
        f"One variable, {NY} x {NX} cells x {YEARS} years ({NT} days), int16 at 0.1 units = {raw_mb:.0f} MB raw; "
        f"{machine}; load average at the end {load[0]:.1f} (the machine was shared, so absolute times are "
        "upper bounds; compare rows). Reads are warm (page cache).\n\n" + header + "\n".join(lines) + "\n"
    )


def main() -> None:
    """Run the bench and append its section to bench/RESULTS.md."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--workdir", help="scratch directory (default: a temporary one)")
    parser.add_argument(
        "--quick", action="store_true", help="tmax only, without the zstd level 5 and one-year rows"
    )
    parser.add_argument("--no-write", action="store_true", help="print only, do not touch bench/RESULTS.md")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(dir=args.workdir) as scratch:
        section = run(Path(scratch), args.quick)
    print(section)
    if not args.no_write:
        results = Path(__file__).resolve().parent / "RESULTS.md"
        with results.open("a", encoding="utf-8") as handle:
            handle.write("\n### Store layout: raw measurements (bench/bench_store_layout.py)\n\n" + section)


if __name__ == "__main__":
    main()
