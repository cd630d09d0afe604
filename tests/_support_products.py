"""Small NetCDF files shaped like the gridded products researchers bring, written by the tests themselves.

Each writer follows one product convention (listed in /work/shared/CHECK-VALUES.md, "Conventions of gridded daily
products users bring"); the details come from memory of such files, as each writer says. The values are
invented: smooth fields plus seeded noise. Every writer returns the files and the values it wrote in wxshock
units (degC, mm/day) on (time, y, x), so that a test can compare a store with them.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import xarray as xr

# The Lambert conformal conic parameters of a widely used 1-km North American daily product (from memory:
# standard parallels 25 and 60 N, central meridian 100 W, origin latitude 42.5 N, sphere-free WGS84 datum).
PRODUCT_LCC = {
    "grid_mapping_name": "lambert_conformal_conic",
    "standard_parallel": [25.0, 60.0],
    "longitude_of_central_meridian": -100.0,
    "latitude_of_projection_origin": 42.5,
    "false_easting": 0.0,
    "false_northing": 0.0,
    "semi_major_axis": 6378137.0,
    "inverse_flattening": 298.257223563,
}
# A rotated pole as regional climate model domains use (from memory: grid north pole 39.25 N, 162 W).
ROTATED_POLE = {
    "grid_mapping_name": "rotated_latitude_longitude",
    "grid_north_pole_latitude": 39.25,
    "grid_north_pole_longitude": -162.0,
}


@dataclass
class Written:
    """Files a writer made, and the values they hold in wxshock units (time, y, x) on the given days."""

    files: list[Path]
    values: dict[str, np.ndarray]
    times: np.ndarray  # the days of ``values`` (datetime64 or cftime)


def _fields(nt: int, ny: int, nx: int, seed: int) -> dict[str, np.ndarray]:
    """Invented daily tmax, tmin (degC) and prcp (mm/day), rounded to 0.01."""
    rng = np.random.default_rng(seed)
    day = np.arange(nt)[:, None, None]
    yy, xx = np.meshgrid(np.arange(ny), np.arange(nx), indexing="ij")
    tmax = (
        18.0 + 0.4 * yy - 0.3 * xx + 9.0 * np.cos(2 * np.pi * day / 365.0) + rng.normal(0, 2.0, (nt, ny, nx))
    )
    tmin = tmax - 7.0 - rng.gamma(2.0, 1.0, (nt, ny, nx))
    prcp = np.where(rng.random((nt, ny, nx)) < 0.4, rng.gamma(0.8, 8.0, (nt, ny, nx)), 0.0)
    return {k: np.round(v, 2) for k, v in {"tmax": tmax, "tmin": tmin, "prcp": prcp}.items()}


def lambert_1km_product(
    directory: Path, years: tuple[int, ...], *, ny: int = 4, nx: int = 5, seed: int = 1
) -> Written:
    """The 1-km Lambert conformal daily product: one file per variable per year, 365-day years in which leap years
    drop 31 December, time at noon with time_bnds, x/y in km, tmax/tmin in "degrees C", prcp in "mm/day", 2-D
    lat/lon beside the projection (all from memory of that product's files)."""
    directory.mkdir(parents=True, exist_ok=True)
    crs = pyproj.CRS.from_cf(PRODUCT_LCC)
    x_km = 1200.0 + 1.0 * np.arange(nx)  # invented cells, 1 km apart
    y_km = -800.0 - 1.0 * np.arange(ny)  # north-up: descending
    xx, yy = np.meshgrid(x_km * 1000.0, y_km * 1000.0)
    lon, lat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(xx, yy)
    all_days: list[np.ndarray] = []
    for year in years:
        days = pd.date_range(f"{year}-01-01", f"{year}-12-30" if year % 4 == 0 else f"{year}-12-31", freq="D")
        all_days.append(days.values)
    times = np.concatenate(all_days)
    values = _fields(times.size, ny, nx, seed)
    files: list[Path] = []
    start = 0
    for year, days in zip(years, all_days, strict=True):
        n = days.size
        noon = days + np.timedelta64(12, "h")
        bounds = np.stack([days, days + np.timedelta64(1, "D")], axis=1)
        for variable, units, methods in (
            ("tmax", "degrees C", "area: mean time: maximum"),
            ("tmin", "degrees C", "area: mean time: minimum"),
            ("prcp", "mm/day", "area: mean time: sum"),
        ):
            ds = xr.Dataset(
                {
                    variable: (("time", "y", "x"), values[variable][start : start + n].astype(np.float32),
                               {"units": units, "cell_methods": methods, "grid_mapping": "lambert_conformal_conic",
                                "coordinates": "lat lon", "_FillValue": np.float32(-9999.0)}),
                    "time_bnds": (("time", "nv"), bounds),
                    "lambert_conformal_conic": ((), np.int16(0), dict(PRODUCT_LCC)),
                    "lat": (("y", "x"), lat, {"units": "degrees_north", "standard_name": "latitude"}),
                    "lon": (("y", "x"), lon, {"units": "degrees_east", "standard_name": "longitude"}),
                },
                coords={
                    "time": ("time", noon, {"standard_name": "time", "bounds": "time_bnds"}),
                    "y": ("y", y_km, {"units": "km", "standard_name": "projection_y_coordinate"}),
                    "x": ("x", x_km, {"units": "km", "standard_name": "projection_x_coordinate"}),
                },
            )  # fmt: skip
            path = directory / f"product_{variable}_{year}.nc"
            ds.to_netcdf(path, encoding={"time": {"units": "days since 1950-01-01 00:00:00", "calendar": "standard",
                                                  "dtype": "float64"},
                                         "time_bnds": {"units": "days since 1950-01-01 00:00:00", "dtype": "float64"}})  # fmt: skip
            files.append(path)
        start += n
    return Written(files=files, values=values, times=times)


def precipitation_only_product(
    directory: Path,
    years: tuple[int, ...],
    *,
    origin: tuple[float, float] = (30.0, -10.0),
    ny: int = 6,
    nx: int = 8,
    seed: int = 2,
) -> Written:
    """A quasi-global satellite-gauge precipitation product: precipitation only, 0.05 degree, variable "precip" in
    "mm/day" without standard_name, latitude ascending, one file per year (from memory of such products)."""
    directory.mkdir(parents=True, exist_ok=True)
    lon = origin[0] + 0.05 * (np.arange(nx) + 0.5)
    lat = origin[1] + 0.05 * (np.arange(ny) + 0.5)
    times = pd.date_range(f"{years[0]}-01-01", f"{years[-1]}-12-31", freq="D").values
    values = {"prcp": _fields(times.size, ny, nx, seed)["prcp"]}
    files = []
    for year in years:
        mask = pd.DatetimeIndex(times).year == year
        ds = xr.Dataset(
            {"precip": (("time", "latitude", "longitude"), values["prcp"][mask].astype(np.float32),
                        {"units": "mm/day", "long_name": "daily precipitation"})},
            coords={"time": times[mask], "latitude": ("latitude", lat, {"units": "degrees_north"}),
                    "longitude": ("longitude", lon, {"units": "degrees_east"})},
        )  # fmt: skip
        path = directory / f"rain_{year}.nc"
        ds.to_netcdf(path, encoding={"precip": {"_FillValue": np.float32(-9999.0)}})
        files.append(path)
    return Written(files=files, values=values, times=times)


def hourly_reanalysis(
    directory: Path,
    start: str,
    days_per_file: int,
    n_files: int,
    *,
    ny: int = 4,
    nx: int = 6,
    seed: int = 3,
    packed: bool = False,
) -> tuple[list[Path], np.ndarray, np.ndarray, np.ndarray]:
    """An hourly reanalysis: 2 m temperature "t2m" in K and total precipitation "tp" in m accumulated over the hour
    ending at each stamp, both with standard_name "unknown", longitudes 0..360 (a global ring of 60-degree cells),
    latitude descending, time axis "valid_time" in seconds since 1970 (from memory of such exports).

    Returns (files, hourly t2m in K, hourly tp in m, stamps as datetime64) over all files.
    """
    directory.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    hours = days_per_file * 24 * n_files
    stamps = np.datetime64(start, "h") + np.arange(hours).astype("timedelta64[h]")
    hour_of_day = (np.arange(hours) % 24)[:, None, None]
    t2m = 285.0 + 6.0 * np.sin(2 * np.pi * (hour_of_day - 9) / 24) + rng.normal(0, 1.0, (hours, ny, nx))
    tp = np.where(rng.random((hours, ny, nx)) < 0.2, rng.gamma(0.7, 0.0008, (hours, ny, nx)), 0.0)
    lon = 60.0 * np.arange(nx)  # 0, 60, ..., 300: a global ring written in 0..360
    lat = 60.0 - 30.0 * np.arange(ny)  # descending
    files = []
    per = days_per_file * 24
    for k in range(n_files):
        part = slice(k * per, (k + 1) * per)
        seconds = stamps[part].astype("datetime64[s]").astype(np.int64)
        ds = xr.Dataset(
            {"t2m": (("valid_time", "latitude", "longitude"), t2m[part], {"units": "K", "standard_name": "unknown",
                                                                          "long_name": "2 metre temperature"}),
             "tp": (("valid_time", "latitude", "longitude"), tp[part], {"units": "m", "standard_name": "unknown",
                                                                        "long_name": "Total precipitation"})},
            coords={"valid_time": ("valid_time", seconds, {"units": "seconds since 1970-01-01", "calendar": "proleptic_gregorian",
                                                           "standard_name": "time"}),
                    "latitude": ("latitude", lat, {"units": "degrees_north", "standard_name": "latitude"}),
                    "longitude": ("longitude", lon, {"units": "degrees_east", "standard_name": "longitude"})},
        )  # fmt: skip
        encoding = {}
        if packed:
            # int16 packing as such archives write it: value = packed * scale_factor + add_offset
            encoding = {
                "t2m": {
                    "dtype": "int16",
                    "scale_factor": 0.002,
                    "add_offset": 285.0,
                    "_FillValue": np.int16(-32767),
                },
                "tp": {
                    "dtype": "int16",
                    "scale_factor": 1e-7,
                    "add_offset": 0.0032,
                    "_FillValue": np.int16(-32767),
                },
            }
        path = directory / f"hourly_{k}.nc"
        ds.to_netcdf(path, encoding=encoding)
        files.append(path)
    return files, t2m, tp, stamps


def model_output(
    directory: Path, calendar: str, years: tuple[int, int], *, ny: int = 3, nx: int = 4, seed: int = 4
) -> Written:
    """Climate-model daily output: tasmax/tasmin in K, pr in kg m-2 s-1, calendar 360_day or noleap, longitudes
    0..360 (a global ring of 90-degree cells), time at noon with time_bnds, one file per variable (CMIP style,
    from memory)."""
    directory.mkdir(parents=True, exist_ok=True)
    last = 30 if calendar == "360_day" else 31
    days = xr.date_range(f"{years[0]:04d}-01-01", f"{years[1]:04d}-12-{last}", freq="D", calendar=calendar,
                         use_cftime=True)  # fmt: skip
    import cftime

    noon = np.array([cftime.datetime(d.year, d.month, d.day, 12, calendar=calendar) for d in days])
    bounds = np.stack([np.array([cftime.datetime(d.year, d.month, d.day, calendar=calendar) for d in days]),
                       np.array([cftime.datetime(d.year, d.month, d.day, calendar=calendar) for d in days]) +
                       pd.Timedelta(days=1)], axis=1)  # fmt: skip
    values = _fields(len(days), ny, nx, seed)
    lon = 45.0 + 90.0 * np.arange(nx)  # 45 .. 315
    lat = -30.0 + 20.0 * np.arange(ny)
    files = []
    for variable, name, units, methods, convert in (
        ("tmax", "tasmax", "K", "time: maximum", lambda v: v + 273.15),
        ("tmin", "tasmin", "K", "time: minimum", lambda v: v + 273.15),
        ("prcp", "pr", "kg m-2 s-1", "time: mean", lambda v: v / 86400.0),
    ):
        ds = xr.Dataset(
            {name: (("time", "lat", "lon"), convert(values[variable]).astype(np.float32),
                    {"units": units, "standard_name": "air_temperature" if variable != "prcp" else "precipitation_flux",
                     "cell_methods": methods}),
             "time_bnds": (("time", "bnds"), bounds)},
            coords={"time": ("time", noon, {"bounds": "time_bnds"}),
                    "lat": ("lat", lat, {"units": "degrees_north", "standard_name": "latitude"}),
                    "lon": ("lon", lon, {"units": "degrees_east", "standard_name": "longitude"})},
        )  # fmt: skip
        path = directory / f"{name}_day_model_{calendar}.nc"
        ds.to_netcdf(path, encoding={"time": {"units": "days since 1850-01-01", "calendar": calendar, "dtype": "float64"},
                                     "time_bnds": {"units": "days since 1850-01-01", "calendar": calendar,
                                                   "dtype": "float64"}})  # fmt: skip
        files.append(path)
    return Written(files=files, values=values, times=np.asarray(days))


def rotate_to_geographic(
    rlon: np.ndarray, rlat: np.ndarray, pole_lon: float, pole_lat: float
) -> tuple[np.ndarray, np.ndarray]:
    """Geographic lon/lat of rotated-pole coordinates by rotating unit vectors (north_pole_grid_longitude 0).

    Written from the geometry of the rotation, independently of pyproj: the rotated frame is turned about the y
    axis by -(90 - pole_lat), which puts its pole at latitude pole_lat (longitude 180) and its origin at latitude
    90 - pole_lat (longitude 0), then about the z axis by pole_lon - 180.
    """
    lam, phi = np.radians(rlon), np.radians(rlat)
    v = np.stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)])
    beta = -np.radians(90.0 - pole_lat)
    ry = np.array([[np.cos(beta), 0, np.sin(beta)], [0, 1, 0], [-np.sin(beta), 0, np.cos(beta)]])
    gamma = np.radians(pole_lon - 180.0)
    rz = np.array([[np.cos(gamma), -np.sin(gamma), 0], [np.sin(gamma), np.cos(gamma), 0], [0, 0, 1]])
    g = np.tensordot(rz @ ry, v, axes=1)
    lon = np.degrees(np.arctan2(g[1], g[0]))
    lat = np.degrees(np.arcsin(np.clip(g[2], -1, 1)))
    return lon, lat


def rotated_pole_file(directory: Path, *, pole: dict | None = None, lonlat_pole: dict | None = None, ny: int = 5,
                      nx: int = 6, seed: int = 5) -> Written:  # fmt: skip
    """A regional-model file on a rotated-pole grid (rlat/rlon in degrees, 0.11-degree cells near the rotated
    origin), with 2-D lat/lon; ``lonlat_pole`` computes the 2-D lat/lon with another pole (a file that contradicts
    itself). One year of daily tasmax, tasmin and pr (CORDEX style, from memory)."""
    directory.mkdir(parents=True, exist_ok=True)
    pole = pole or ROTATED_POLE
    source_pole = lonlat_pole or pole
    rlon = -0.33 + 0.11 * np.arange(nx)
    rlat = -0.22 + 0.11 * np.arange(ny)
    rr_lon, rr_lat = np.meshgrid(rlon, rlat)
    lon, lat = rotate_to_geographic(rr_lon, rr_lat, source_pole["grid_north_pole_longitude"],
                                    source_pole["grid_north_pole_latitude"])  # fmt: skip
    times = pd.date_range("2001-01-01", "2001-12-31", freq="D").values
    values = _fields(times.size, ny, nx, seed)
    ds = xr.Dataset(
        {"tasmax": (("time", "rlat", "rlon"), values["tmax"] + 273.15,
                    {"units": "K", "standard_name": "air_temperature", "cell_methods": "time: maximum",
                     "grid_mapping": "rotated_pole", "coordinates": "lat lon"}),
         "tasmin": (("time", "rlat", "rlon"), values["tmin"] + 273.15,
                    {"units": "K", "standard_name": "air_temperature", "cell_methods": "time: minimum",
                     "grid_mapping": "rotated_pole", "coordinates": "lat lon"}),
         "pr": (("time", "rlat", "rlon"), values["prcp"] / 86400.0,
                {"units": "kg m-2 s-1", "standard_name": "precipitation_flux", "cell_methods": "time: mean",
                 "grid_mapping": "rotated_pole", "coordinates": "lat lon"}),
         "rotated_pole": ((), np.int8(0), dict(pole)),
         "lat": (("rlat", "rlon"), lat, {"units": "degrees_north", "standard_name": "latitude"}),
         "lon": (("rlat", "rlon"), lon, {"units": "degrees_east", "standard_name": "longitude"})},
        coords={"time": times,
                "rlat": ("rlat", rlat, {"units": "degrees", "standard_name": "grid_latitude", "axis": "Y"}),
                "rlon": ("rlon", rlon, {"units": "degrees", "standard_name": "grid_longitude", "axis": "X"})},
    )  # fmt: skip
    path = directory / "rotated.nc"
    ds.to_netcdf(path)
    return Written(files=[path], values=values, times=times)


def temperature_product(
    directory: Path, years: tuple[int, ...], *, origin: tuple[float, float] = (30.0, -10.0), cell: float = 0.2,
    ny: int = 2, nx: int = 2, seed: int = 6, with_precipitation: bool = False,
) -> Written:  # fmt: skip
    """Daily tmax and tmin from another product on a coarser latitude-longitude grid: files tmax_YEAR.nc and
    tmin_YEAR.nc with tasmax/tasmin in K and CF cell_methods (CMIP-style names, from memory); with
    ``with_precipitation`` also prcp_YEAR.nc (pr in kg m-2 s-1)."""
    directory.mkdir(parents=True, exist_ok=True)
    lon = origin[0] + cell * (np.arange(nx) + 0.5)
    lat = origin[1] + cell * (np.arange(ny) + 0.5)
    times = pd.date_range(f"{years[0]}-01-01", f"{years[-1]}-12-31", freq="D").values
    fields = _fields(times.size, ny, nx, seed)
    values = {"tmax": fields["tmax"], "tmin": fields["tmin"]}
    kinds = [("tmax", "tasmax", "time: maximum"), ("tmin", "tasmin", "time: minimum")]
    if with_precipitation:
        values["prcp"] = fields["prcp"]
        kinds.append(("prcp", "pr", "time: mean"))
    files = []
    for year in years:
        mask = pd.DatetimeIndex(times).year == year
        for variable, name, methods in kinds:
            precipitation = variable == "prcp"
            ds = xr.Dataset(
                {name: (("time", "lat", "lon"),
                        values[variable][mask] / 86400.0 if precipitation else values[variable][mask] + 273.15,
                        {"units": "kg m-2 s-1" if precipitation else "K",
                         "standard_name": "precipitation_flux" if precipitation else "air_temperature",
                         "cell_methods": methods})},
                coords={"time": times[mask], "lat": ("lat", lat, {"units": "degrees_north", "standard_name": "latitude"}),
                        "lon": ("lon", lon, {"units": "degrees_east", "standard_name": "longitude"})},
            )  # fmt: skip
            path = directory / f"{variable}_{year}.nc"
            ds.to_netcdf(path)
            files.append(path)
    return Written(files=files, values=values, times=times)
