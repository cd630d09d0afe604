"""Tiny synthetic stores for any test: build a Dataset in memory and write it with service.store.write_store.

Usage::

    from tests._support_store import make_store          # or import by path with --import-mode=importlib
    path, ds = make_store(tmp_path, ny=6, nx=5, years=(2000, 2003), calendar="noleap", projected=True)
    store = open_store(path)

Values are smooth invented fields plus seeded noise, already rounded to the storage precision (0.1), so a test
can compare ``store.read(...)`` with ``ds`` exactly. Cells listed in ``missing_cells`` are NaN on every day
(like water), and ``missing_days`` puts NaN on a few (cell, day) pairs.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import cftime
import numpy as np
import pandas as pd
import pyproj
import xarray as xr

from service.store import write_store

# An invented Lambert conformal conic grid over open ocean (no real place implied).
LAMBERT_CRS = pyproj.CRS.from_proj4(
    "+proj=lcc +lat_1=-20 +lat_2=-30 +lat_0=-25 +lon_0=-120 +x_0=0 +y_0=0 +ellps=WGS84 +units=m +no_defs"
)


def daily_times(years: tuple[int, int], calendar: str = "standard") -> np.ndarray:
    """Every day from 1 January of the first year to the last day of December of the last, in a CF calendar."""
    first, last = years
    if calendar in ("standard", "gregorian", "proleptic_gregorian"):
        return pd.date_range(f"{first}-01-01", f"{last}-12-31", freq="D").values
    last_day = 30 if calendar == "360_day" else 31
    return xr.date_range(
        f"{first:04d}-01-01", f"{last:04d}-12-{last_day}", freq="D", calendar=calendar, use_cftime=True
    ).values


def make_dataset(
    *,
    ny: int = 6,
    nx: int = 5,
    years: tuple[int, int] = (2000, 2002),
    calendar: str = "standard",
    projected: bool = False,
    cell_size: float | None = None,
    origin: tuple[float, float] | None = None,
    north_up: bool = True,
    layers: Sequence[str] = ("elevation", "population"),
    missing_cells: Sequence[tuple[int, int]] = (),
    missing_days: Sequence[tuple[int, int, int]] = (),
    variables: Sequence[str] = ("tmax", "tmin", "prcp"),
    seed: int = 0,
) -> xr.Dataset:
    """A small daily Dataset (time, y, x) in degC and mm/day with a CRS, ready for write_store.

    Geographic grids default to 0.5-degree cells from (-150, -40) (open South Pacific); projected grids to
    10-km cells of LAMBERT_CRS. ``north_up`` makes y descending (first row northernmost).
    """
    rng = np.random.default_rng(seed)
    if projected:
        size = cell_size or 10_000.0
        x0, y0 = origin or (-200_000.0, -150_000.0)
        crs = LAMBERT_CRS
    else:
        size = cell_size or 0.5
        x0, y0 = origin or (-150.0, -40.0)
        crs = pyproj.CRS.from_epsg(4326)
    x = x0 + size * (np.arange(nx) + 0.5)
    y = y0 + size * (np.arange(ny) + 0.5)
    if north_up:
        y = y[::-1]
    time = daily_times(years, calendar)
    nt = len(time)
    day = np.arange(nt)
    season = np.cos(2 * np.pi * (day % 365) / 365.0)
    yy, xx = np.meshgrid(np.arange(ny), np.arange(nx), indexing="ij")
    base = 20.0 + 0.3 * yy - 0.2 * xx
    tmax = base[None] + 8.0 * season[:, None, None] + rng.normal(0, 2.0, (nt, ny, nx))
    tmin = tmax - 8.0 - rng.gamma(2.0, 1.0, (nt, ny, nx))
    wet = rng.random((nt, ny, nx)) < 0.35
    prcp = np.where(wet, rng.gamma(0.8, 9.0, (nt, ny, nx)), 0.0)
    fields = {"tmax": tmax, "tmin": tmin, "prcp": prcp}
    data_vars: dict[str, tuple] = {}
    for name in variables:
        values = np.round(fields[name], 1)
        for j, i in missing_cells:
            values[:, j, i] = np.nan
        for t, j, i in missing_days:
            values[t, j, i] = np.nan
        data_vars[name] = (("time", "y", "x"), values, {"grid_mapping": "crs"})
    if "elevation" in layers:
        data_vars["elevation"] = (("y", "x"), 500.0 + 25.0 * yy + 10.0 * xx, {"units": "m"})
    for name in layers:
        if name != "elevation":
            data_vars[name] = (("y", "x"), rng.gamma(1.5, 100.0, (ny, nx)).round(1), {"units": "1"})
    data_vars["crs"] = ((), np.int32(0), {"crs_wkt": crs.to_wkt()})
    ds = xr.Dataset(data_vars, coords={"time": time, "y": y, "x": x})
    ds.attrs["title"] = "synthetic test grid"
    return ds


def make_store(tmp_path: Path, name: str = "test", **kwargs: object) -> tuple[Path, xr.Dataset]:
    """Write make_dataset(**kwargs) to tmp_path / f"{name}.zarr"; returns (path, dataset)."""
    ds = make_dataset(**kwargs)  # type: ignore[arg-type]
    path = Path(tmp_path) / f"{name}.zarr"
    write_store(ds, path)
    return path, ds


def cftime_or_datetime(year: int, month: int, day: int, calendar: str) -> object:
    """A date in a calendar, as datetime64 (standard) or cftime (others)."""
    if calendar in ("standard", "gregorian", "proleptic_gregorian"):
        return np.datetime64(f"{year:04d}-{month:02d}-{day:02d}")
    return cftime.datetime(year, month, day, calendar=calendar)
