"""Issue 10's numbered cases before (commit 7cc4705, the code the issue was filed against) and after (this tree).

    python bench/bench_issue10_cases.py              # both runs, the table, and its section of bench/RESULTS.md
    python bench/bench_issue10_cases.py --no-write   # print only
    python bench/bench_issue10_cases.py --worker OUT.json   # (internal) the cases, with the service on PYTHONPATH

Each case's reproducer (the ones the issue text describes) runs through the whole chain (the request model,
pipeline.run, the table) on invented data: small stores written here from seeded numpy arrays, and the tiny
demo. The parent process makes the worktree of the code before (``git worktree add --detach /tmp/wx-before
7cc4705`` when it is missing) and runs this same file as a worker twice, in a subprocess whose PYTHONPATH is
that tree, then this one. Each worker writes and reads its own stores with its own code. Where the code before
has no such request field, option or warning, the worker says so ("n/a (no such option)").
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from fractions import Fraction
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
BEFORE_COMMIT = "7cc4705"
BEFORE_TREE = Path("/tmp/wx-before")
RESULTS = ROOT / "bench" / "RESULTS.md"
START, END = "<!-- bench_issue10_cases: start -->", "<!-- bench_issue10_cases: end -->"
NA = "n/a (no such option)"

CELL = 0.5
ORIGIN = (-150.0, -40.0)  # lon, lat of the invented grids' south-west corner (open South Pacific)


# --- the worker: runs with the service of one tree on its import path ------------------------------------------


def days(first_year: int, last_year: int) -> Any:
    """Every day of the standard calendar from 1 January of the first year to 31 December of the last."""
    import pandas as pd

    return pd.date_range(f"{first_year}-01-01", f"{last_year}-12-31", freq="D")


def write_grid(path: Path, time_index: Any, values: dict[str, np.ndarray]) -> Any:
    """A store of daily ``values`` (name -> (time, y, x) degC or mm/day, NaN missing), written and opened."""
    import pyproj
    import xarray as xr

    from service.store import open_store, write_store

    _, ny, nx = next(iter(values.values())).shape
    x = ORIGIN[0] + CELL * (np.arange(nx) + 0.5)
    y = (ORIGIN[1] + CELL * (np.arange(ny) + 0.5))[::-1]
    data_vars: dict[str, Any] = {
        name: (("time", "y", "x"), np.asarray(v, dtype=np.float64), {"grid_mapping": "crs"})
        for name, v in values.items()
    }
    data_vars["crs"] = ((), np.int32(0), {"crs_wkt": pyproj.CRS.from_epsg(4326).to_wkt()})
    write_store(xr.Dataset(data_vars, coords={"time": time_index.values, "y": y, "x": x}), path)
    return open_store(path)


def cell_box(row: int, col: int, ny: int, inset: float = 0.1) -> tuple[float, float, float, float]:
    """(west, south, east, north) of a box inside grid cell (row, col), row 0 northernmost of ``ny`` rows."""
    west = ORIGIN[0] + CELL * col
    south = ORIGIN[1] + CELL * (ny - 1 - row)
    return (west + inset, south + inset, west + CELL - inset, south + CELL - inset)


def feature(fid: str, box: tuple[float, float, float, float]) -> dict[str, Any]:
    """A rectangular community (GeoJSON Feature) from (west, south, east, north)."""
    w, s, e, n = box
    ring = [[w, s], [e, s], [e, n], [w, n], [w, s]]
    return {
        "type": "Feature",
        "id": fid,
        "geometry": {"type": "Polygon", "coordinates": [ring]},
        "properties": {},
    }


def has_field(name: str) -> bool:
    """Whether this tree's request model has the field ``name``."""
    from service.schemas import IndicatorRequest

    return name in IndicatorRequest.model_fields


def run_chain(store: Any, features: list[dict[str, Any]], work: Path, **fields: Any) -> Any:
    """The request, validated by the tree's one request model, run by its pipeline.run on one local thread."""
    from service.pipeline import run
    from service.schemas import IndicatorRequest, validate_request
    from service.settings import Settings

    body = {"features": {"type": "FeatureCollection", "features": features}, **fields}
    request = validate_request(IndicatorRequest, body)
    return run(request, store, Settings(data_dir=work, threads=1))


def notes(frame: Any) -> Any:
    """The frame's notes column (codes of each row's warnings) or None where the tree has none."""
    return frame["notes"] if "notes" in frame.columns else None


def flagged(frame: Any, code: str) -> Any:
    """Boolean per row: the row's notes carry ``code``; None where the tree has no notes column."""
    column = notes(frame)
    return None if column is None else column.fillna("").str.split().apply(lambda c: code in c).to_numpy()


def value_column(frame: Any, name: str) -> str:
    """The value column of the one indicator ``name`` a frame holds (its name carries non-default parameters)."""
    suffixes = ("_z", "_class", "_label", "_category", "_pct_normal", "_percent_of_normal")
    return next(
        c
        for c in frame.columns
        if (c == name or c.startswith(name + "_")) and not c.endswith(suffixes) and "_lag" not in c
    )


def fmt(value: Any, digits: int = 2) -> str:
    """A number for the table: null for NaN/None, scientific notation for very large values."""
    if value is None:
        return "null"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "null" if str(value) in ("<NA>", "nan", "None") else str(value)
    if np.isnan(v):
        return "null"
    if abs(v) >= 1e5:
        return f"{v:.1e}"
    if v == int(v) and abs(v) < 1e5:
        return str(int(v))
    return f"{v:.{digits}f}"


def pct(share: float) -> str:
    """A share as a percentage with two decimals."""
    return f"{100 * share:.2f} %"


Rows = list[tuple[str, str]]  # (row key, value)


def case_ties(work: Path) -> Rows:
    """1. Ties: villages over cells whose stored values sit exactly on the thresholds; counts by hand."""
    time_index = days(2000, 2002)
    k = np.arange(time_index.size)
    ny, nx = 3, 5
    shape = (time_index.size, ny, nx)
    rain = np.where(k % 7 == 0, 10.0, np.where(k % 3 == 0, 1.0, 0.0))
    tmax, tmin, prcp = np.empty(shape), np.empty(shape), np.empty(shape)
    # columns 0-2: every cell exactly on the thresholds on most days
    tmax[:, :, :3] = np.where(k % 10 == 0, 25.1, 25.0)[:, None, None]
    tmin[:, :, :3] = np.where(k % 10 == 5, -0.1, 0.0)[:, None, None]
    prcp[:, :, :3] = rain[:, None, None]
    # columns 3 | 4 straddle them: an equal-weight mean of the two is exactly on the threshold every day
    tmax[:, :, 3], tmax[:, :, 4] = 24.9, 25.1
    tmin[:, :, 3], tmin[:, :, 4] = -0.1, 0.1
    prcp[:, :, 3] = np.where(k % 7 == 0, 9.9, np.where(k % 3 == 0, 0.9, 0.0))[:, None]
    prcp[:, :, 4] = np.where(k % 7 == 0, 10.1, np.where(k % 3 == 0, 1.1, 0.0))[:, None]
    store = write_grid(work / "ties.zarr", time_index, {"tmax": tmax, "tmin": tmin, "prcp": prcp})
    rng = np.random.default_rng(101)
    villages = []
    west0, south0 = ORIGIN
    for i in range(70):
        if i < 30:  # inside one cell of columns 0-2 (sub-cell)
            row, col = rng.integers(0, ny), rng.integers(0, 3)
            w, s, _, _ = cell_box(int(row), int(col), ny, inset=0.0)
            a, b = np.sort(rng.uniform(0.01, 0.49, 2))
            c, d = np.sort(rng.uniform(0.01, 0.49, 2))
            box = (w + a, s + c, w + b, s + d)
        elif i < 60:  # over two to four cells of columns 0-2
            w0 = west0 + rng.uniform(0.05, 0.9)
            s0 = south0 + rng.uniform(0.05, 0.9)
            box = (w0, s0, w0 + rng.uniform(0.1, 0.55), s0 + rng.uniform(0.1, 0.55))
        else:  # equal shares of a column-3 and a column-4 cell: symmetric about their common edge
            half = rng.uniform(0.05, 0.45)
            s0 = south0 + rng.uniform(0.05, 0.9)
            box = (west0 + 2.0 - half, s0, west0 + 2.0 + half, s0 + rng.uniform(0.1, 0.5))
        villages.append(feature(f"v{i:02d}", tuple(round(v, 6) for v in box)))
    indicators = ["su", "fd", "wet_days", "r10mm", "cdd"]
    result = run_chain(store, villages, work, indicators=indicators, baseline={"start": 2000, "end": 2002})
    frame = result.frame
    year = time_index.year.to_numpy()
    # by hand from the stored values (ETCCDI, Zhang et al. 2011): SU TX > 25, FD TN < 0, wet RR >= 1,
    # R10mm RR >= 10; CDD the longest run of RR < 1: 2 days (days k % 3 == 0 are wet)
    exact = {
        "su": {y: np.count_nonzero((year == y) & (k % 10 == 0)) for y in (2000, 2001, 2002)},
        "fd": {y: np.count_nonzero((year == y) & (k % 10 == 5)) for y in (2000, 2001, 2002)},
        "wet_days": {y: np.count_nonzero((year == y) & (rain >= 1.0)) for y in (2000, 2001, 2002)},
        "r10mm": {y: np.count_nonzero((year == y) & (rain >= 10.0)) for y in (2000, 2001, 2002)},
        "cdd": {y: 2 for y in (2000, 2001, 2002)},
    }
    rows: Rows = []
    number = frame["feature_id"].str[1:].astype(int).to_numpy()
    kinds = (number < 30, (number >= 30) & (number < 60), number >= 60)
    for name in indicators:
        truth = frame["year"].map(exact[name]).to_numpy(dtype=float)
        if name in ("su", "fd"):  # the straddling pairs' mean is 25.0 or 0.0 every day: none counts
            truth = np.where(kinds[2], 0.0, truth)
        got = frame[name].to_numpy(dtype=float)
        wrong = got != truth
        worst = int(np.argmax(np.abs(got - truth)))
        text = " / ".join(str(np.count_nonzero(wrong & kind)) for kind in kinds) + " wrong"
        if wrong.any():
            text += f" (worst {fmt(got[worst])} for {fmt(truth[worst])})"
        rows.append((f"1 ties: {name}", text))
    return rows


def _count_store(path: Path, counts: list[list[int]], first_year: int = 2000) -> Any:
    """One row of cells, one per list: cell i has counts[i][y] days of 12 mm (R10mm days) in year y, else dry."""
    n_years = len(counts[0])
    time_index = days(first_year, first_year + n_years - 1)
    year = time_index.year.to_numpy()
    prcp = np.zeros((time_index.size, 1, len(counts)))
    for i, per_year in enumerate(counts):
        for y, c in enumerate(per_year):
            prcp[np.flatnonzero(year == first_year + y)[:c], 0, i] = 12.0
    temperature = np.full((time_index.size, 1, len(counts)), 20.0)
    return write_grid(path, time_index, {"tmax": temperature + 5.0, "tmin": temperature, "prcp": prcp})


def _class_by_the_rule(value: int, window: list[int]) -> int:
    """The class of z = (value - mean) / sd (ddof 1) in exact rational arithmetic; an edge belongs to the
    class farther from zero (edges -2, -1, 1, 2; the WMO SPI table puts -1.0 in "moderately dry")."""
    mean = Fraction(sum(window), len(window))
    variance = sum((Fraction(v) - mean) ** 2 for v in window) / (len(window) - 1)
    d = Fraction(value) - mean
    step = 0
    for edge in (1, 2):
        if d * d >= edge * edge * variance:
            step = edge
    return step if d > 0 else -step


def case_trailing(work: Path) -> Rows:
    """2. Trailing baselines: no spread (trailing 5), and z exactly on a class edge (trailing 3)."""
    rows: Rows = []
    store = _count_store(work / "flat.zarr", [[0, 0, 0, 0, 0, 1, 0, 2, 0, 1, 3, 0]])
    village = [feature("v", cell_box(0, 0, 1))]
    for years in ({"start": 2005, "end": 2005}, {"start": 2005, "end": 2011}):
        result = run_chain(store, village, work, indicators=["r10mm"], baseline={"trailing": 5}, years=years)
        row = result.frame.set_index("year").loc[2005]
        column = notes(result.frame)
        note = "" if column is None else f", notes '{row['notes']}'"
        rows.append(
            (
                f"2 no spread: r10mm 2005, trailing 5, years {years['start']}-{years['end']}",
                f"z {fmt(row['r10mm_z'])}, class {fmt(row['r10mm_class'])}{note}",
            )
        )
    # many trailing windows of three small counts: how many z exactly on an edge are classed by the rule
    rng = np.random.default_rng(2003)
    n_cells, n_years = 300, 15
    counts = rng.integers(0, 7, (n_cells, n_years)).tolist()
    store = _count_store(work / "edges.zarr", counts)
    villages = [feature(f"v{i:03d}", cell_box(0, i, 1)) for i in range(n_cells)]
    result = run_chain(store, villages, work, indicators=["r10mm"], baseline={"trailing": 3})
    frame = result.frame.set_index(["feature_id", "year"])
    on_edge = right = 0
    for i, per_year in enumerate(counts):
        for t in range(3, n_years):
            window = per_year[t - 3 : t]
            if len(set(window)) == 1:
                continue
            mean = Fraction(sum(window), 3)
            variance = sum((Fraction(v) - mean) ** 2 for v in window) / 2
            d2 = (Fraction(per_year[t]) - mean) ** 2
            if d2 not in (variance, 4 * variance):  # z exactly -2, -1, 1 or 2
                continue
            on_edge += 1
            got = frame.loc[(f"v{i:03d}", 2000 + t), "r10mm_class"]
            right += int(got == _class_by_the_rule(per_year[t], window))
    rows.append(("2 z on a class edge, trailing 3: classed by the rule", f"{right} of {on_edge}"))
    return rows


def _seasonal_temperature(time_index: Any, rng: np.random.Generator) -> np.ndarray:
    """Daily TX (degC): a seasonal cycle around 24 degC, a small anomaly per year, and day-to-day noise."""
    doy = time_index.day_of_year.to_numpy()
    year = time_index.year.to_numpy()
    yearly = rng.normal(0.0, 0.4, year.max() - year.min() + 1)[year - year.min()]
    return np.round(
        24.0 + 7.0 * np.sin(2 * np.pi * (doy - 110) / 365.25) + yearly + rng.normal(0, 2.0, doy.size), 1
    )


def case_partial(work: Path) -> Rows:
    """3. A season missing 18 days (within 10 %), under the default partial-season policy."""
    time_index = days(2000, 2011)
    rng = np.random.default_rng(33)
    tmax = _seasonal_temperature(time_index, rng)
    values = {"tmax": tmax, "tmin": tmax - 10.0, "prcp": np.full(tmax.size, 2.0)}
    full = write_grid(work / "full.zarr", time_index, {k: v[:, None, None] for k, v in values.items()})
    fields = {
        "indicators": ["gdd", "su"],
        "baseline": {"start": 2000, "end": 2009},
        "years": {"start": 2011, "end": 2011},
    }
    village = [feature("v", cell_box(0, 0, 1))]
    truth = run_chain(full, village, work, **fields).frame.iloc[0]
    in_2011 = np.flatnonzero(time_index.year.to_numpy() == 2011)
    gaps = {
        "18 days at random": np.isin(np.arange(tmax.size), rng.choice(in_2011, 18, replace=False)),
        "1-18 July": (time_index.year == 2011) & (time_index.month == 7) & (time_index.day <= 18),
    }
    rows: Rows = []
    for label, gap in gaps.items():
        gapped = write_grid(
            work / f"gapped-{len(rows)}.zarr",
            time_index,
            {k: np.where(np.asarray(gap), np.nan, v)[:, None, None] for k, v in values.items()},
        )
        result = run_chain(gapped, village, work, **fields)
        row = result.frame.iloc[0]
        for name in ("gdd", "su"):
            rows.append(
                (
                    f"3 partial season: {name}_z of 2011 missing {label} (whole season: {fmt(truth[name + '_z'])})",
                    f"{fmt(row[name + '_z'])}",
                )
            )
    column = notes(result.frame)
    rows.append(
        ("3 partial season: the row's notes", "no notes column" if column is None else f"'{row['notes']}'")
    )
    return rows


def case_spells(work: Path) -> Rows:
    """4. Spells with a trailing baseline: the same weather recorded from 1990 (A) and from 1994 (B)."""
    time_index = days(1990, 2008)
    rng = np.random.default_rng(10)
    wetness = rng.uniform(0.2, 0.6, 19)[time_index.year.to_numpy() - 1990]
    prcp = np.round(
        np.where(rng.random(time_index.size) < wetness, rng.gamma(0.8, 8.0, time_index.size), 0.0), 1
    )
    tmax = np.full(time_index.size, 30.0)
    late = time_index.year.to_numpy() >= 1994
    stores = {}
    for name, keep in (("A", np.ones(time_index.size, dtype=bool)), ("B", late)):
        grids = {
            "tmax": tmax[keep, None, None],
            "tmin": tmax[keep, None, None] - 9,
            "prcp": prcp[keep, None, None],
        }
        stores[name] = write_grid(work / f"spell-{name}.zarr", time_index[keep], grids)
    request = {
        "indicators": ["prcp_total"],
        "baseline": {"trailing": 5},
        "years": {"start": 1999, "end": 2008},
        "spells": [{"name": "dry", "window": 4, "when": [{"indicator": "prcp_total", "z_max": -0.3}]}],
    }
    village = [feature("v", cell_box(0, 0, 1))]
    counts = {
        name: run_chain(store, village, work, **request).frame.set_index("year")["dry_count"].astype(float)
        for name, store in stores.items()
    }
    both = counts["A"].notna() & counts["B"].notna()
    differ = int((counts["A"][both] != counts["B"][both]).sum())
    a = ", ".join(fmt(v) for v in counts["A"].loc[1999:2001])
    b = ", ".join(fmt(v) for v in counts["B"].loc[1999:2001])
    return [
        ("4 spells: dry_count 1999-2001, record from 1990 | from 1994", f"{a} | {b}"),
        ("4 spells: years 1999-2008 where both records give a count and they differ", str(differ)),
    ]


def case_aggregation(work: Path) -> Rows:
    """5. Aggregation order on the tiny demo: its 16 blocks of 10 x 10 cells, series against cells."""
    from service.demo import build_demo

    path = work / "demo.zarr"
    build_demo(path, size="tiny", progress=False)
    from service.store import open_store

    store = open_store(path)
    # the tiny demo: 1 x 1 degree (40 x 40 cells of 0.025 degree) from 40 W, 14 N (service/demo_store/world.json)
    blocks = [
        feature(
            f"b{r}{c}", (-40.0 + 0.25 * c, 14.0 + 0.25 * r, -40.0 + 0.25 * (c + 1), 14.0 + 0.25 * (r + 1))
        )
        for r in range(4)
        for c in range(4)
    ]
    fields = {"indicators": ["wet_days", "cdd", "edd"], "years": {"start": 1991, "end": 2022}}
    series = run_chain(store, blocks, work, **fields).frame
    rows: Rows = []
    if has_field("aggregation"):
        cells = run_chain(store, blocks, work, aggregation="cells", **fields).frame
    else:
        cells = None
    for name in ("wet_days", "cdd", "edd"):
        text = fmt(series[name].mean())
        if cells is not None:
            ratio = series[name].mean() / cells[name].mean() if cells[name].mean() else float("nan")
            text = f"{text} | {fmt(cells[name].mean())} (series / cells {fmt(ratio)} x)"
        else:
            text = f"{text} | {NA}"
        rows.append((f"5 aggregation: {name}, mean over 16 demo blocks x 1991-2022, series | cells", text))
    return rows


def _monte_carlo_store(path: Path, n_side: int = 25) -> Any:
    """n_side^2 cells, 1981-2020, stationary: annual totals gamma (shape 4, mean 800 mm) spread over every 5th
    day; TX 25 and TN 15 degC each day."""
    time_index = days(1981, 2020)
    year = time_index.year.to_numpy() - 1981
    rng = np.random.default_rng(6)
    totals = rng.gamma(4.0, 200.0, (40, n_side, n_side))
    rain_day = (np.arange(time_index.size) % 5 == 0).astype(float)
    per_year = np.array([rain_day[year == y].sum() for y in range(40)])
    prcp = np.round(totals[year] / per_year[year][:, None, None] * rain_day[:, None, None], 1)
    tmax = np.full(prcp.shape, 25.0)
    return write_grid(path, time_index, {"tmax": tmax, "tmin": tmax - 10.0, "prcp": prcp}), n_side


def _squares(n_side: int) -> list[dict[str, Any]]:
    """One village inside each cell of an n_side x n_side grid."""
    return [feature(f"c{r:02d}{c:02d}", cell_box(r, c, n_side)) for r in range(n_side) for c in range(n_side)]


def case_short_baseline(work: Path) -> Rows:
    """6. SPI on a short baseline: stationary Monte Carlo, and the default baseline."""
    store, n_side = _monte_carlo_store(work / "mc.zarr")
    villages = _squares(n_side)
    rows: Rows = []
    runs = {
        "baseline 1981-1990 (10 seasons), years 1991-2010": {
            "baseline": {"start": 1981, "end": 1990},
            "years": {"start": 1991, "end": 2010},
        },
        "baseline 1981-2010 (30 seasons), years 2011-2020": {
            "baseline": {"start": 1981, "end": 2010},
            "years": {"start": 2011, "end": 2020},
        },
        "default baseline, years 2011-2020": {"years": {"start": 2011, "end": 2020}},
    }
    for label, fields in runs.items():
        result = run_chain(store, villages, work, indicators=["spi"], **fields)
        frame = result.frame
        spi = frame["spi"].to_numpy(dtype=float)
        text = f"SPI <= -2 {pct(np.mean(spi <= -2))}, |SPI| > 3 {pct(np.mean(np.abs(spi) > 3))}"
        short, clip = flagged(frame, "short_baseline_fit"), flagged(frame, "at_clip")
        if short is None:
            text += "; short_baseline_fit, at_clip: " + NA
        else:
            text += f"; rows noted short_baseline_fit {pct(short.mean())}, at_clip {int(clip.sum())}"
        text += f"; range {fmt(np.nanmin(spi))} to {fmt(np.nanmax(spi))}"
        if "default" in label:
            text += f" (baseline {result.provenance['request']['baseline']})"
        rows.append((f"6 short baseline: {label}, {spi.size:,} rows", text))
    rows.append(("6 short baseline: nominal (standard normal)", "SPI <= -2 2.28 %, |SPI| > 3 0.27 %"))
    return rows


def case_spei(work: Path) -> Rows:
    """7. SPEI: how often the fit is bounded above, and what the catalog says it fits."""
    from service.indicators.base import get_indicator

    store, n_side = _monte_carlo_store(work / "spei.zarr", n_side=20)
    villages = _squares(n_side)
    rows: Rows = []
    result = run_chain(
        store,
        villages,
        work,
        indicators=["spei"],
        baseline={"trailing": 10},
        years={"start": 1991, "end": 2020},
    )
    bounded = flagged(result.frame, "spei_upper_bound")
    rows.append(
        (
            f"7 SPEI, stationary synthetic, trailing 10: rows noted spei_upper_bound (of {len(result.frame):,})",
            NA if bounded is None else pct(bounded.mean()),
        )
    )
    if "distribution" in get_indicator("spei").parameters:
        strict = run_chain(
            store,
            villages,
            work,
            indicators=[{"name": "spei", "distribution": "log_logistic"}],
            baseline={"trailing": 10},
            years={"start": 1991, "end": 2020},
        )
        column = value_column(strict.frame, "spei")
        rows.append(
            ("7 SPEI distribution log_logistic: rows null (no fit)", pct(strict.frame[column].isna().mean()))
        )
    else:
        rows.append(("7 SPEI distribution log_logistic: rows null (no fit)", NA))
    definition = get_indicator("spei").definition
    words = [w for w in ("generalized logistic", "log-logistic") if w in definition]
    rows.append(("7 SPEI catalog definition names", " and ".join(f"'{w}'" for w in words)))
    return rows


def case_r95ptot(work: Path) -> Rows:
    """7. r95ptot in a dry season: the threshold from the season's wet days or from the base period's years."""
    time_index = days(2000, 2010)
    month = time_index.month.to_numpy()
    rng = np.random.default_rng(95)
    n = 30
    dry = np.isin(month, (12, 1, 2))
    chance = np.where(dry, 0.12, np.where(np.isin(month, (6, 7, 8, 9)), 0.6, 0.3))[:, None, None]
    scale = np.where(dry, 5.0, 14.0)[:, None, None]
    prcp = np.round(
        np.where(
            rng.random((time_index.size, 1, n)) < chance,
            rng.gamma(0.8, 1.0, (time_index.size, 1, n)) * scale,
            0.0,
        ),
        1,
    )
    tmax = np.full(prcp.shape, 25.0)
    store = write_grid(work / "r95.zarr", time_index, {"tmax": tmax, "tmin": tmax - 10, "prcp": prcp})
    villages = [feature(f"v{i:02d}", cell_box(0, i, 1)) for i in range(n)]
    fields = {
        "season": {"months": [12, 1, 2]},
        "baseline": {"start": 2001, "end": 2008},
        "years": {"start": 2009, "end": 2010},
    }
    default = run_chain(store, villages, work, indicators=["r95ptot"], **fields).frame
    rows: Rows = [
        ("7 r95ptot, Dec-Feb, 2009-2010: mean over 30 cells, default", fmt(default["r95ptot"].mean()) + " mm")
    ]
    from service.indicators.base import get_indicator

    if "threshold_pool" in get_indicator("r95ptot").parameters:
        for pool in ("year", "season"):
            frame = run_chain(
                store, villages, work, indicators=[{"name": "r95ptot", "threshold_pool": pool}], **fields
            ).frame
            column = value_column(frame, "r95ptot")
            rows.append((f"7 r95ptot threshold_pool '{pool}'", fmt(frame[column].mean()) + " mm"))
    else:
        rows += [(f"7 r95ptot threshold_pool '{pool}'", NA) for pool in ("year", "season")]
    # the two thresholds by numpy (type 8 quantile, Hyndman & Fan 1996: numpy's median_unbiased), median over cells
    year = time_index.year.to_numpy()
    season_year = np.where(month == 12, year + 1, year)
    in_base_season = dry & (season_year >= 2001) & (season_year <= 2008)
    in_base_years = (year >= 2001) & (year <= 2008)
    thresholds = {}
    for label, days_in in (("season", in_base_season), ("year", in_base_years)):
        per_cell = []
        for i in range(n):
            wet = prcp[days_in, 0, i]
            per_cell.append(np.quantile(wet[wet >= 1.0], 0.95, method="median_unbiased"))
        thresholds[label] = float(np.median(per_cell))
    rows.append(
        (
            "7 r95ptot thresholds by numpy (median over cells): season pool | year pool",
            f"{thresholds['season']:.1f} | {thresholds['year']:.1f} mm",
        )
    )
    return rows


def case_tx90p(work: Path) -> Rows:
    """7. tx90p in the baseline's own years against later years, in stationary data."""
    time_index = days(1971, 2010)
    doy = time_index.day_of_year.to_numpy()
    rng = np.random.default_rng(90)
    n_side = 12
    rows: Rows = []
    setups = {
        "30 baseline seasons, independent days": (0.0, 1971, 2000),
        "10 baseline seasons, day-to-day correlation 0.7": (0.7, 1991, 2000),
    }
    from service.indicators.base import get_indicator

    bootstrap = "in_base" in get_indicator("tx90p").parameters
    for label, (rho, first, last) in setups.items():
        noise = np.empty((time_index.size, n_side, n_side))
        noise[0] = rng.normal(size=(n_side, n_side))
        innovations = rng.normal(size=noise.shape) * np.sqrt(1 - rho**2)
        for t in range(1, time_index.size):
            noise[t] = rho * noise[t - 1] + innovations[t]
        tmax = np.round(20.0 + 6.0 * np.sin(2 * np.pi * (doy - 110) / 365.25)[:, None, None] + 3.0 * noise, 1)
        store = write_grid(
            work / f"tx90p-{rho}.zarr",
            time_index,
            {"tmax": tmax, "tmin": tmax - 10, "prcp": np.zeros_like(tmax)},
        )
        villages = _squares(n_side)
        fields = {"baseline": {"start": first, "end": last}, "years": {"start": first, "end": 2010}}
        variants = [("plain threshold", "tx90p")]
        if bootstrap:
            variants.append(("bootstrap", {"name": "tx90p", "in_base": "bootstrap"}))
        seconds = {}
        for variant, indicator in variants:
            started = time.process_time()  # CPU of the process (all threads): steadier on a shared machine
            frame = run_chain(store, villages, work, indicators=[indicator], **fields).frame
            seconds[variant] = time.process_time() - started
            column = value_column(frame, "tx90p")
            in_base = frame["year"].between(first, last)
            rows.append(
                (
                    f"7 tx90p, stationary, {label}: in base | out of base ({variant})",
                    f"{frame.loc[in_base, column].mean():.2f} | {frame.loc[~in_base, column].mean():.2f} %",
                )
            )
        if not bootstrap:
            rows.append((f"7 tx90p, stationary, {label}: in base | out of base (bootstrap)", NA))
        else:
            rows.append(
                (
                    f"7 tx90p, {label}: CPU time of the run, {n_side**2} communities x 40 years, plain | bootstrap",
                    f"{seconds['plain threshold']:.1f} | {seconds['bootstrap']:.1f} s "
                    f"(load {os.getloadavg()[0]:.1f})",
                )
            )
    return rows


def case_zero_rain(work: Path) -> Rows:
    """7. SPI of a season without rain, against a baseline with five dry seasons of ten, and against none."""
    totals = {
        "zeros": [0, 400, 0, 350, 0, 420, 0, 380, 0, 410, 0],
        "never": [300, 400, 350, 380, 420, 390, 360, 410, 370, 405, 0],
    }
    time_index = days(2000, 2010)
    year = time_index.year.to_numpy()
    prcp = np.zeros((time_index.size, 1, 2))
    for i, per_year in enumerate(totals.values()):
        for y, total in enumerate(per_year):
            this = year == 2000 + y
            prcp[this, 0, i] = np.round(total / this.sum(), 1)
    tmax = np.full(prcp.shape, 30.0)
    store = write_grid(work / "zero.zarr", time_index, {"tmax": tmax, "tmin": tmax - 12, "prcp": prcp})
    villages = [feature(name, cell_box(0, i, 1)) for i, name in enumerate(totals)]
    result = run_chain(
        store,
        villages,
        work,
        indicators=["spi"],
        baseline={"start": 2000, "end": 2009},
        years={"start": 2010, "end": 2010},
    )
    frame = result.frame.set_index("feature_id")
    rows: Rows = []
    for name, label in (("zeros", "5 of 10 baseline seasons dry"), ("never", "no dry baseline season")):
        row = frame.loc[name]
        text = f"SPI {fmt(row['spi'])} ({row.get('spi_category', row.get('spi_label'))})"
        text += "" if notes(frame) is None else f", notes '{row['notes']}'"
        text += f"; spi_z == spi: {row['spi_z'] == row['spi']}"
        rows.append((f"7 SPI of a season without rain, {label}", text))
    return rows


CASES: list[Callable[[Path], Rows]] = [
    case_ties,
    case_trailing,
    case_partial,
    case_spells,
    case_aggregation,
    case_short_baseline,
    case_spei,
    case_r95ptot,
    case_tx90p,
    case_zero_rain,
]


def worker(out: Path) -> None:
    """Run every case with the service on this process's import path; write {key: value} to ``out``."""
    import service

    record: dict[str, Any] = {"tree": str(Path(service.__file__).parent.parent), "rows": [], "seconds": {}}
    only = os.environ.get("BENCH_CASES", "").split(",")
    for case in CASES:
        if only != [""] and case.__name__ not in only:
            continue
        start = time.perf_counter()
        with tempfile.TemporaryDirectory(prefix=f"wx-{case.__name__}-") as tmp:
            try:
                record["rows"].extend(case(Path(tmp)))
            except Exception as error:  # a case the tree cannot run at all: say why, keep the others
                record["rows"].append(
                    (f"{case.__name__}: failed", f"{type(error).__name__}: {str(error)[:120]}")
                )
        record["seconds"][case.__name__] = round(time.perf_counter() - start, 1)
        print(f"{case.__name__}: {record['seconds'][case.__name__]} s", file=sys.stderr, flush=True)
    out.write_text(json.dumps(record, indent=1), encoding="utf-8")


# --- the parent: both runs and the table -----------------------------------------------------------------------


def ensure_before_tree() -> Path:
    """The worktree of the code before the issue, made if missing."""
    if not (BEFORE_TREE / "service" / "pipeline.py").is_file():
        subprocess.run(
            ["git", "-C", str(ROOT), "worktree", "add", "--detach", str(BEFORE_TREE), BEFORE_COMMIT],
            check=True,
        )
    return BEFORE_TREE


def run_worker(tree: Path, out: Path) -> dict[str, Any]:
    """This file as a worker in a subprocess whose imports come from ``tree`` only."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("WXSHOCK_")}
    env["PYTHONPATH"] = str(tree)
    subprocess.run(
        [sys.executable, str(Path(__file__).resolve()), "--worker", str(out)],
        check=True,
        env=env,
        cwd=tempfile.gettempdir(),
    )
    return json.loads(out.read_text(encoding="utf-8"))


def render(before: dict[str, Any], after: dict[str, Any], load: tuple[float, float]) -> str:
    """The RESULTS.md section: one row per measured value, before and after."""
    old = dict(map(tuple, before["rows"]))
    lines = [
        START,
        "## Issue 10's cases before and after (`bench/bench_issue10_cases.py`)",
        "",
        f"Each reproducer of the issue run through the whole chain (request model, pipeline.run, table) by the code "
        f"before the issue (commit {BEFORE_COMMIT}) and by this tree, each on stores it wrote itself from the same "
        "seeded invented data (and on its own tiny demo). Measured "
        f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}; 1-minute load average {load[0]:.1f} at the start, "
        f"{load[1]:.1f} at the end (these are values; the one timing, of the in-base bootstrap, is CPU time of "
        "the whole run on one local thread). Worker time: before "
        f"{sum(before['seconds'].values()):.0f} s, after {sum(after['seconds'].values()):.0f} s.",
        "",
        "| case | before | after |",
        "|---|---|---|",
    ]

    def escape(text: str) -> str:
        return text.replace("|", "\\|")

    for key, value in after["rows"]:
        lines.append(f"| {escape(key)} | {escape(old.pop(key, NA))} | {escape(value)} |")
    for key, value in old.items():  # rows only the code before gave (none expected)
        lines.append(f"| {escape(key)} | {escape(value)} | (no such row) |")
    lines += ["", NOTES, END]
    return "\n".join(lines)


NOTES = """How to read the rows:
- 1: 30 villages inside one cell and 30 over two to four cells of a 3 x 3 block whose every cell stores
  TX 25.0 (25.1 every 10th day), TN 0.0 (-0.1 every 10th day), RR 1.0 every 3rd day and 10.0 every 7th; and
  10 villages over equal shares of two cells storing 24.9 | 25.1, -0.1 | 0.1, 0.9 | 1.1 and 9.9 | 10.1 on the
  same days (their mean is exactly on the threshold); three years each. "a / b / c wrong": village-years (of
  90 / 90 / 30) whose count differs from the count by hand from the stored values (ETCCDI: SU TX > 25,
  FD TN < 0, wet RR >= 1, R10mm RR >= 10, CDD the longest run of RR < 1), sub-cell / multi-cell / straddling.
- 2: r10mm 0 in 2000-2004 and 1 in 2005 (the issue's example); then 300 cells of random counts 0-6 over 15
  years, trailing 3: the (cell, year)s whose z is exactly -2, -1, 1 or 2 in rational arithmetic, and how many
  of them get the class of the documented rule (an edge belongs to the class farther from zero).
- 3: one cell, TX a seasonal cycle with daily noise, baseline 2000-2009; 2011 missing 18 days (4.9 %), drawn
  at random or 1-18 July; "whole season" is the same request on the store without the gap. Scaling is
  unbiased when the missing days are a random subset; a gap in the hottest weeks still lowers a heat count.
- 4: the same weather recorded from 1990 and from 1994, trailing 5, a dry spell (prcp_total z <= -0.3) over
  windows of 4 seasons.
- 5: the tiny demo tiled by 16 blocks of 10 x 10 cells, calendar years 1991-2022, default baseline; means over
  block-years. Each tree builds its own tiny demo.
- 6: 625 cells, annual totals gamma (shape 4) spread over every 5th day, stationary, 1981-2020.
- 7: SPEI on 400 cells of the same kind (constant temperature, so D is P minus a constant), trailing 10;
  r95ptot on 30 cells with a dry Dec-Feb and a wet Jun-Sep; tx90p on 144 cells of stationary TX (a seasonal
  cycle plus noise), all years in and after the baseline; SPI of a dry season as in tests/indicators/test_chain.py."""


def main() -> int:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument(
        "--worker", type=Path, help="(internal) run the cases here, write the record to this file"
    )
    parser.add_argument("--no-write", action="store_true", help="print only; leave bench/RESULTS.md alone")
    parser.add_argument("--only-after", action="store_true", help="run only this tree (a quicker look)")
    args = parser.parse_args()
    if args.worker:
        worker(args.worker)
        return 0
    load_start = os.getloadavg()[0]
    with tempfile.TemporaryDirectory(prefix="wx-issue10-") as tmp:
        after = run_worker(ROOT, Path(tmp) / "after.json")
        if args.only_after:
            before = {"rows": [], "seconds": {}}
        else:
            before = run_worker(ensure_before_tree(), Path(tmp) / "before.json")
    section = render(before, after, (load_start, os.getloadavg()[0]))
    print(section)
    out = ROOT / "bench" / "out"
    out.mkdir(parents=True, exist_ok=True)
    (out / "bench_issue10_cases.json").write_text(json.dumps({"before": before, "after": after}, indent=1))
    if not args.no_write and not args.only_after:
        sys.path.insert(0, str(ROOT / "bench"))
        from _results import write_section

        write_section(START, END, section, RESULTS)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
