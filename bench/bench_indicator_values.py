"""Time each indicator value function on many communities: one compute() per indicator on a SeasonCube.

    python bench/bench_indicator_values.py [--features 5000] [--years 48] [--dtype float64]
                                           [--season year|5-10] [--trailing 0] [--no-write]

Builds an invented daily series (seasonal temperature, gamma rain, 0.5 % of days missing), cuts it into
season-years with the core cutter (seasons.cut_season), builds a fixed baseline of the first ten seasons
(or a trailing one of N seasons with --trailing N), then times each registered value indicator alone and
the table's default set together. Appends the figures to bench/RESULTS.md under "Indicator values".
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

from service.indicators import basic, degree_days, drought, extremes  # noqa: F401  (register the values)
from service.indicators.base import DailySeries, get_indicator
from service.indicators.baselines import make_baseline
from service.indicators.seasons import cut_season, season_definition
from service.schemas import FixedBaseline, MonthsSeason, TrailingBaseline

RESULTS = Path(__file__).with_name("RESULTS.md")
SECTION = "## Indicator values (issue 4, values)"
DEFAULT_SET = ("prcp_total", "wet_days", "tmean", "tmax_mean", "tmin_mean", "cdd", "gdd", "edd", "spi")
VALUES = (
    "prcp_total wet_days tmean tmax_mean tmin_mean dtr gdd edd cdd cwd r10mm r20mm rx1day rx5day sdii r95ptot "
    "su tr fd id txx tnn tx90p tn10p hotdry_days hotdry_spell spi spei"
).split()


def synthetic_daily(n_features: int, n_years: int, dtype: str, seed: int = 3) -> DailySeries:
    """Invented daily series for timing: tmax/tmin (degC), prcp (mm/day), latitudes -30..30."""
    rng = np.random.default_rng(seed)
    days = np.arange("1971-01-01", f"{1971 + n_years}-01-01", dtype="datetime64[D]")
    year = days.astype("datetime64[Y]").astype(np.int64) + 1970
    month = days.astype("datetime64[M]").astype(np.int64) % 12 + 1
    day = (days - days.astype("datetime64[M]")).astype(np.int64) + 1
    doy = (days - days.astype("datetime64[Y]")).astype(np.int64) + 1
    n = days.size
    seasonal = 7.0 * np.sin(2 * np.pi * (doy - 100) / 365.25)
    tmax = (28.0 + rng.normal(0, 3, (n_features, 1)) + seasonal + rng.normal(0, 3, (n_features, n))).astype(
        dtype
    )
    tmin = (tmax - 8.0 - rng.gamma(4.0, 0.6, (n_features, n))).astype(dtype)
    prcp = np.where(rng.random((n_features, n)) < 0.35, rng.gamma(0.8, 9.0, (n_features, n)), 0.0).astype(
        dtype
    )
    gaps = rng.random((n_features, n)) < 0.005
    for values in (tmax, tmin, prcp):
        values[gaps] = np.nan
    return DailySeries(
        tmax=tmax, tmin=tmin, prcp=prcp, year=year, month=month, day=day, dayofyear=doy,
        calendar="standard", latitude=rng.uniform(-30, 30, n_features),
    )  # fmt: skip


def main(argv: list[str] | None = None) -> int:
    """Run the timing and print (and append) one line per indicator."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--features", type=int, default=5000)
    parser.add_argument("--years", type=int, default=48)
    parser.add_argument("--dtype", default="float64")
    parser.add_argument("--season", default="year", help='"year" or a month range such as 5-10')
    parser.add_argument("--trailing", type=int, default=0, help="trailing baseline of N seasons (0: fixed)")
    parser.add_argument("--no-write", action="store_true")
    args = parser.parse_args(argv)

    daily = synthetic_daily(args.features, args.years, args.dtype)
    if args.season == "year":
        season = season_definition("year")
    else:
        first, last = (int(m) for m in args.season.split("-"))
        season = season_definition(MonthsSeason(months=list(range(first, last + 1))))
    started = time.perf_counter()
    cube = cut_season(daily, season).cube
    cut_seconds = time.perf_counter() - started
    spec = (
        TrailingBaseline(trailing=args.trailing)
        if args.trailing
        else FixedBaseline(start=int(cube.years[0]), end=int(cube.years[9]))
    )
    baseline = make_baseline(cube.years, spec)

    lines = []
    timings: dict[str, float] = {}
    cpu: dict[str, float] = {}  # CPU seconds of this process: the honest figure on a shared, busy machine
    for name in VALUES:
        entry = get_indicator(name)
        started, cpu_started = time.perf_counter(), time.process_time()
        value = entry.compute(cube, baseline, entry.resolve({}))
        timings[name] = time.perf_counter() - started
        cpu[name] = time.process_time() - cpu_started
        lines.append(f"| {name} | {timings[name]:.2f} | {cpu[name]:.2f} | {np.isnan(value).mean():.3f} |")
        print(lines[-1], flush=True)
    extremes._THRESHOLD_CACHE.clear()  # time the default set from cold
    started, cpu_started = time.perf_counter(), time.process_time()
    for name in DEFAULT_SET:
        entry = get_indicator(name)
        entry.compute(cube, baseline, entry.resolve({}))
    default_seconds = time.perf_counter() - started
    default_cpu = time.process_time() - cpu_started
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    total = sum(timings.values())
    summary = (
        f"{args.features} communities x {args.years} years, season {args.season}, {args.dtype}, baseline "
        f"{baseline.label}: default set ({', '.join(DEFAULT_SET)}) {default_seconds:.1f} s wall, "
        f"{default_cpu:.1f} s CPU; all {len(VALUES)} value indicators one by one {total:.1f} s wall, "
        f"{sum(cpu.values()):.1f} s CPU; cutting the cube {cut_seconds:.1f} s ({platform.machine()}, "
        f"{os.cpu_count()} cores, load average {load:.1f} at the end, Python {platform.python_version()}, "
        f"numpy {np.__version__})"
    )
    print(summary)
    if not args.no_write:
        text = RESULTS.read_text() if RESULTS.exists() else "# Benchmark results\n"
        if SECTION not in text:
            text = text.rstrip("\n") + f"\n\n{SECTION}\n"
        block = "\n".join(
            [
                summary,
                "",
                "| indicator | seconds (wall) | seconds (CPU) | NaN share |",
                "|---|---|---|---|",
                *lines,
                "",
                "",
            ]
        )
        # insert at the end of our own section, before the next section (or section marker) of someone else
        start = text.index(SECTION) + len(SECTION)
        following = [i for i in (text.find("\n## ", start), text.find("\n<!--", start)) if i >= 0]
        end = min(following) + 1 if following else len(text)
        head = text[:end].rstrip("\n") + "\n\n"
        RESULTS.write_text(head + block + text[end:].lstrip("\n"))
    return 0


if __name__ == "__main__":
    sys.exit(main())
