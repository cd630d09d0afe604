"""Time the indicator table for many communities: compute_table on a synthetic daily series.

    python bench/bench_indicators.py [--features 5000] [--years 48] [--dtype float32] [--season year]
                                     [--indicators prcp_total,tmean,...] [--no-write]

Builds an invented (feature, time) daily series (seasonal temperature and gamma-distributed rain with random
gaps), then times resolve_request + compute_table with the default indicator set (or the given list),
with lags [0, 1, 2], a sequence, the default pair and a spell, and appends the figures to bench/RESULTS.md
under "Indicator table".
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

import service.indicators  # noqa: F401  (registers every value module's indicators)
from service.indicators import base
from service.indicators.base import DailySeries
from service.indicators.table import DEFAULT_INDICATORS, compute_table, resolve_request
from service.schemas import IndicatorRequest

RESULTS = Path(__file__).with_name("RESULTS.md")
SECTION = "## Indicator table (issue 4, core)"


def synthetic_daily(n_features: int, n_years: int, dtype: str, seed: int = 7) -> DailySeries:
    """An invented daily series: seasonal tmax/tmin (degC) and rain (mm/day), 0.5 % of days missing."""
    rng = np.random.default_rng(seed)
    days = np.arange("1980-01-01", f"{1980 + n_years}-01-01", dtype="datetime64[D]")
    year = days.astype("datetime64[Y]").astype(np.int64) + 1970
    month = days.astype("datetime64[M]").astype(np.int64) % 12 + 1
    day = (days - days.astype("datetime64[M]")).astype(np.int64) + 1
    doy = (days - days.astype("datetime64[Y]")).astype(np.int64) + 1
    n_time = days.size
    seasonal = 8.0 * np.sin(2 * np.pi * (doy - 100) / 365.25)
    tmax = np.empty((n_features, n_time), dtype=dtype)
    tmin = np.empty((n_features, n_time), dtype=dtype)
    prcp = np.empty((n_features, n_time), dtype=dtype)
    for start in range(0, n_features, 500):  # in blocks, so that building the series needs little memory
        rows = slice(start, min(start + 500, n_features))
        shape = (rows.stop - rows.start, n_time)
        offset = rng.normal(0, 3, (shape[0], 1))
        tmax[rows] = 27.0 + offset + seasonal + rng.normal(0, 3, shape)
        tmin[rows] = tmax[rows] - 9.0 - rng.gamma(4.0, 0.5, shape)
        prcp[rows] = np.where(rng.random(shape) < 0.35, rng.gamma(0.8, 9.0, shape), 0.0)
        gaps = rng.random(shape) < 0.005
        for values in (tmax, tmin, prcp):
            values[rows][gaps] = np.nan
    return DailySeries(
        tmax=tmax,
        tmin=tmin,
        prcp=prcp,
        year=year,
        month=month,
        day=day,
        dayofyear=doy,
        calendar="standard",
        latitude=rng.uniform(-20, 20, n_features),
    )


def time_value_functions() -> dict[str, float]:
    """Wrap every catalog entry's compute so that the CPU seconds spent in value functions are summed."""
    spent = {"values": 0.0}
    for name, indicator in list(base._REGISTRY.items()):

        def timed(cube, baseline, params, _compute=indicator.compute):  # noqa: ANN001, ANN202
            c0 = time.process_time()
            try:
                return _compute(cube, baseline, params)
            finally:
                spent["values"] += time.process_time() - c0

        base._REGISTRY[name] = dataclasses.replace(indicator, compute=timed)
    return spent


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and append its figures to RESULTS.md."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--features", type=int, default=5000)
    parser.add_argument("--years", type=int, default=48)
    parser.add_argument("--dtype", choices=("float32", "float64"), default="float64")
    parser.add_argument("--season", default="year", help='"year", or months as 5,6,7,8,9,10')
    parser.add_argument("--indicators", default=",".join(DEFAULT_INDICATORS))
    parser.add_argument("--no-write", action="store_true")
    args = parser.parse_args(argv)

    season: object = "year" if args.season == "year" else {"months": [int(m) for m in args.season.split(",")]}
    indicators = args.indicators.split(",")
    request = IndicatorRequest(
        features={"type": "Feature", "geometry": None, "properties": {}},
        season=season,
        indicators=indicators,
        lags=[0, 1, 2],
        sequences=[[0, 1]],
        spells=[
            {
                "name": "dry_hot",
                "window": 5,
                "when": [
                    {"indicator": "prcp_total", "class_max": -1},
                    {"indicator": "tmean", "class_min": 1},
                ],
            }
        ]
        if {"prcp_total", "tmean"} <= set(indicators)
        else [],
    )
    t0 = time.perf_counter()
    daily = synthetic_daily(args.features, args.years, args.dtype)
    build = time.perf_counter() - t0
    ids = [f"c-{i:05d}" for i in range(args.features)]
    props = [{} for _ in ids]

    spent = time_value_functions()
    t0, c0 = time.perf_counter(), time.process_time()
    resolved = resolve_request(request, daily)
    table = compute_table(daily, ids, props, resolved)
    elapsed, cpu = time.perf_counter() - t0, time.process_time() - c0
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    frame = table.frame
    line = (
        f"- {args.features} features x {args.years} years ({args.dtype}, season {args.season}, "
        f"{len(indicators)} indicators: {', '.join(indicators)}; lags 0-2, a sequence, "
        f"{len(resolved.pairs)} pair(s), {len(resolved.spells)} spell(s)): compute_table {elapsed:.2f} s wall, "
        f"{cpu:.2f} s CPU, of which {spent['values']:.2f} s in the value functions and {cpu - spent['values']:.2f} s "
        f"in the core (load average {load:.1f} on {os.cpu_count()} cores) "
        f"-> {len(frame)} rows x {frame.shape[1]} columns, {len(table.warnings)} warnings "
        f"(series built in {build:.1f} s; {platform.processor() or platform.machine()}, "
        f"{time.strftime('%Y-%m-%d')})"
    )
    print(line)
    if not args.no_write:
        text = RESULTS.read_text(encoding="utf-8") if RESULTS.exists() else "# Benchmark results\n"
        if SECTION not in text:
            text = (
                text.rstrip("\n")
                + f"\n\n{SECTION}\n\n`python bench/bench_indicators.py` (whole set, one process)\n"
            )
        head, _, tail = text.partition(SECTION)
        # append our line at the end of our own section: before the next heading or another section's marker
        ends = [i for i in (tail.find("\n## "), tail.find("\n<!--")) if i >= 0]
        cut = min(ends) if ends else len(tail)
        body, rest = tail[:cut], tail[cut:]
        body = body.rstrip("\n") + "\n" + line + "\n"
        RESULTS.write_text(
            head + SECTION + body + ("\n" + rest.lstrip("\n") if rest else ""), encoding="utf-8"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
