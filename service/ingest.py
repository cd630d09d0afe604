"""Ingest of CF NetCDF files (one per year and variable, or any split) into a wxshock store.

The variables are found by CF ``standard_name`` and ``cell_methods`` (or named explicitly), converted to degC and
mm/day, checked for one common grid and one complete, monotonic daily time axis, appended to an existing store
when there is one, rechunked to the store layout with dask, and written aside then swapped into place by
:func:`service.store.write_store`, so a failure leaves the previous store and its fingerprint as they were.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import xarray as xr

from service.errors import IngestError, StoreError
from service.store import (
    ELEVATION_LAYER,
    VARIABLES,
    Grid,
    Store,
    _daily_numbers,
    _date_table,
    _exists,
    _iso,
    _normalise_location,
    append_store,
    open_store,
    write_store,
)

# CF standard names (cfconventions.org standard name table) that can hold each variable.
TEMPERATURE_NAMES = ("air_temperature",)
PRECIPITATION_NAMES = (
    "precipitation_flux",
    "lwe_precipitation_rate",
    "precipitation_amount",
    "lwe_thickness_of_precipitation_amount",
    "thickness_of_rainfall_amount",
)
# Variable names recognised when a file carries no standard_name: ours, and those of the CMIP data request.
FALLBACK_NAMES = {"tmax": ("tmax", "tasmax"), "tmin": ("tmin", "tasmin"), "prcp": ("prcp", "pr")}


def _offset(delta: float) -> Callable[[Any], Any]:
    return lambda values: values + delta


def _factor(factor: float) -> Callable[[Any], Any]:
    return lambda values: values * factor


# Unit spellings (normalised: lower case, no spaces, '**' and '^' dropped) -> conversion to degC or mm/day.
# K -> degC: minus 273.15; precipitation_flux kg m-2 s-1 -> mm/day: x 86400 (1 kg m-2 of water is 1 mm);
# lwe thickness in m -> mm: x 1000 (CF conventions; see /work/shared/CHECK-VALUES.md).
TEMPERATURE_UNITS: dict[str, Callable[[Any], Any]] = {
    **{u: _offset(-273.15) for u in ("k", "kelvin", "degk", "deg_k", "degreesk")},
    **{
        u: _offset(0.0)
        for u in ("degc", "deg_c", "celsius", "degreec", "degreesc", "degrees_c", "degree_c", "°c", "c")
    },
    **{
        u: (lambda values: (values - 32.0) * (5.0 / 9.0))
        for u in ("degf", "deg_f", "fahrenheit", "degreesf", "°f")
    },
}
PRECIPITATION_UNITS: dict[str, Callable[[Any], Any]] = {
    **{
        u: _factor(86400.0) for u in ("kgm-2s-1", "kg/m2/s", "kgm-2/s", "kg/(m2s)", "kg/m2s", "mms-1", "mm/s")
    },
    **{
        u: _factor(1.0)
        for u in ("mm/day", "mmday-1", "mmd-1", "mm/d", "mm", "kgm-2", "kg/m2", "kgm-2day-1", "kgm-2d-1")
    },
    **{u: _factor(1000.0) for u in ("m", "m/day", "mday-1", "md-1", "m/d")},
    **{u: _factor(10.0) for u in ("cm", "cm/day", "cmday-1", "cmd-1")},
    **{u: _factor(86_400_000.0) for u in ("ms-1", "m/s")},
}


def _normalise_units(units: str) -> str:
    """A units string in a canonical spelling for lookup: 'kg m-2 s-1', 'kg m**-2 s**-1' -> 'kgm-2s-1'."""
    text = units.strip().lower().replace("**", "").replace("^", "")
    text = re.sub(r"\s+", "", text)
    text = text.replace("degrees", "degrees").replace("per", "/")
    return text


@dataclass(frozen=True)
class _Source:
    """One variable of one file, identified and with its conversion."""

    path: Path
    variable: str  # tmax, tmin or prcp
    name: str  # the variable's name in the file
    data: xr.DataArray  # lazily converted to degC or mm/day, dims (time, y, x)
    days: np.ndarray  # (time,) day numbers since 1970-01-01 in the calendar
    calendar: str
    grid: Grid


def ingest_files(
    files: list[Path],
    out: str | Path,
    *,
    variables: dict[str, str] | None = None,
    storage_options: dict | None = None,
    progress: bool = True,
) -> str:
    """Ingest CF NetCDF files into the store at ``out`` (created, or appended to); returns its new fingerprint.

    Each file may hold any of tmax, tmin (converted to degC) and prcp (converted to mm/day), found by
    standard_name and cell_methods or by ``variables`` ({"tmax": "name in the file", ...}). Every file must be on
    the same grid; each variable's days, over all files, must run without gap or overlap, and all variables must
    cover the same days. An existing store is extended by days that follow its last day directly.
    """
    if not files:
        raise IngestError("no input files given; name one or more CF NetCDF files", field="files")
    explicit = dict(variables or {})
    for key in explicit:
        if key not in VARIABLES:
            raise IngestError(
                f"--var {key}=...: {key!r} is not one of {list(VARIABLES)!r}", field="variables"
            )
    target = _normalise_location(out)
    sources = _scan(files, explicit, progress)
    by_variable = _group_by_variable(sources, explicit)
    grid = _common_grid(sources)
    calendar = _common_calendar(sources)
    series = {v: _concatenate(v, items) for v, items in by_variable.items()}
    days = _common_days(series)

    new = xr.Dataset({v: data.drop_vars("time", errors="ignore") for v, (data, _) in series.items()})
    new = new.assign_coords(time=_decoded_times(days, calendar), y=grid.y, x=grid.x)
    existing = _existing_store(target, storage_options)
    new["crs"] = ((), np.int32(0), {"crs_wkt": grid.crs_wkt})
    for v in series:
        new[v].attrs["grid_mapping"] = "crs"
    if existing is not None:
        _check_append(existing, grid, calendar, days, list(series))
        try:
            return append_store(new, target, storage_options=storage_options, progress=progress)
        except StoreError as exc:
            raise IngestError(
                f"ingest into {str(out)!r} failed, the previous store is unchanged: {exc.detail}"
            ) from exc
    dataset = new
    for name, layer in _static_layers(files, grid).items():
        dataset[name] = (("y", "x"), np.asarray(layer.values, dtype=np.float32), _layer_attrs(layer))
    # The same days on the same grid give the same store whether ingested at once or year by year, so the
    # attributes name no input files (their names are not part of what the data is).
    dataset.attrs.update({"title": "daily grid ingested from CF NetCDF files", "source": "wxshock ingest"})
    try:
        return write_store(dataset, target, storage_options=storage_options, progress=progress)
    except StoreError as exc:
        raise IngestError(
            f"ingest into {str(out)!r} failed, the previous store is unchanged: {exc.detail}"
        ) from exc


# --- reading and identifying ----------------------------------------------------------------------------------


def _scan(files: list[Path], explicit: dict[str, str], progress: bool) -> list[_Source]:
    """Open every file lazily and identify its variables."""
    iterator: Any = files
    if progress:
        from tqdm.auto import tqdm

        iterator = tqdm(files, desc="reading file headers", unit="file")
    sources: list[_Source] = []
    for path in iterator:
        path = Path(path)
        if not path.is_file():
            raise IngestError(f"file {str(path)!r} does not exist", field="files")
        try:
            ds = xr.open_dataset(path, chunks={}, decode_times=True, use_cftime=None)
        except Exception as exc:  # netCDF4 and h5netcdf raise many kinds; each is "not a readable file"
            raise IngestError(
                f"file {str(path)!r} cannot be read as NetCDF: {type(exc).__name__}: {exc}"
            ) from exc
        found = _identify(path, ds, explicit)
        if not found:
            raise IngestError(
                f"file {str(path)!r} holds none of tmax, tmin, prcp: no variable has standard_name "
                "air_temperature with cell_methods 'time: maximum' or 'time: minimum', or a precipitation "
                f"standard_name; its variables are {sorted(map(str, ds.data_vars))!r}; "
                "name them with --var tmax=NAME (or tmin=, prcp=)"
            )
        grid = _file_grid(path, ds)
        for variable, name in found.items():
            sources.append(_source(path, ds, variable, name, grid))
    return sources


def _identify(path: Path, ds: xr.Dataset, explicit: dict[str, str]) -> dict[str, str]:
    """{our variable: name in the file} for one file."""
    found: dict[str, str] = {}
    for wanted, name in explicit.items():
        if name in ds.data_vars:
            found[wanted] = name
    taken = set(found.values())
    for key, var in ds.data_vars.items():
        name = str(key)
        if name in taken or var.ndim != 3:
            continue
        standard = str(var.attrs.get("standard_name", "")).strip()
        methods = str(var.attrs.get("cell_methods", ""))
        variable: str | None = None
        if standard in TEMPERATURE_NAMES:
            named = next((v for v in ("tmax", "tmin") if name in FALLBACK_NAMES[v]), None)
            if re.search(r"time\s*:\s*max", methods):
                variable = "tmax"
            elif re.search(r"time\s*:\s*min", methods):
                variable = "tmin"
            elif named is not None and methods.strip():
                raise IngestError(
                    f"file {str(path)!r}: variable {name!r} is air_temperature but its cell_methods "
                    f"({methods!r}) say neither 'time: maximum' nor 'time: minimum'; "
                    f"name it with --var tmax={name} or --var tmin={name}"
                )
            else:
                # without cell_methods the CMIP names tasmax/tasmin still say which; any other air temperature
                # (a daily mean, say) is not one of ours
                variable = named
        elif standard in PRECIPITATION_NAMES:
            variable = "prcp"
        elif not standard:
            variable = next((v for v, names in FALLBACK_NAMES.items() if name in names), None)
        if variable is None or variable in explicit:
            continue
        if variable in found:
            raise IngestError(
                f"file {str(path)!r}: both {found[variable]!r} and {name!r} look like {variable}; "
                f"choose one with --var {variable}=NAME"
            )
        found[variable] = name
    return found


def _source(path: Path, ds: xr.Dataset, variable: str, name: str, grid: Grid) -> _Source:
    """One identified variable: dims checked, units converted, days numbered."""
    var = ds[name]
    y_dim, x_dim = _spatial_dims(path, ds)
    time_dim = _time_dim(path, ds, var)
    if set(var.dims) != {time_dim, y_dim, x_dim}:
        raise IngestError(
            f"file {str(path)!r}: variable {name!r} has dims {var.dims!r}; expected time, {y_dim!r} and {x_dim!r}"
        )
    units = str(var.attrs.get("units", ""))
    table = TEMPERATURE_UNITS if variable in ("tmax", "tmin") else PRECIPITATION_UNITS
    convert = table.get(_normalise_units(units))
    if convert is None:
        allowed = "K, degC, degF" if variable != "prcp" else "kg m-2 s-1, mm/day, mm, m, m/day, cm, m s-1"
        raise IngestError(
            f"file {str(path)!r}: variable {name!r} ({variable}) has units {units!r}, which wxshock cannot convert "
            f"to {'degC' if variable != 'prcp' else 'mm/day'}; allowed: {allowed}"
        )
    data = var.transpose(time_dim, y_dim, x_dim).rename({time_dim: "time", y_dim: "y", x_dim: "x"})
    data = data.drop_vars([c for c in data.coords if c not in ("time",)], errors="ignore")
    data = data.reset_coords(drop=True)
    order = _x_order(grid)
    if order is not None:
        data = data.isel(x=order)
    time = ds[time_dim]
    try:
        days, calendar = _daily_numbers(time)
    except StoreError as exc:
        raise IngestError(f"file {str(path)!r}: {exc.detail}") from exc
    converted = convert(data.astype(np.float64))
    converted.attrs = {}
    return _Source(
        path=path, variable=variable, name=name, data=converted, days=days, calendar=calendar, grid=grid
    )


def _group_by_variable(sources: list[_Source], explicit: dict[str, str]) -> dict[str, list[_Source]]:
    """Sources per variable, each list in time order; names an explicit variable that no file holds."""
    grouped: dict[str, list[_Source]] = {}
    for source in sources:
        grouped.setdefault(source.variable, []).append(source)
    for variable, name in explicit.items():
        if variable not in grouped:
            raise IngestError(
                f"--var {variable}={name}: no input file has a variable named {name!r}", field="variables"
            )
    return {
        v: sorted(grouped[v], key=lambda s: int(s.days[0]) if s.days.size else 0)
        for v in VARIABLES
        if v in grouped
    }


# --- grid -----------------------------------------------------------------------------------------------------


def _spatial_dims(path: Path, ds: xr.Dataset) -> tuple[str, str]:
    """(y dim, x dim) of a file, from CF attributes (standard_name, axis) or the usual names."""
    y_dim = x_dim = None
    for name in ds.dims:
        if name not in ds.coords:
            continue
        attrs = ds[name].attrs
        standard = str(attrs.get("standard_name", ""))
        axis = str(attrs.get("axis", "")).upper()
        if standard in ("latitude", "projection_y_coordinate", "grid_latitude") or axis == "Y":
            y_dim = str(name)
        elif standard in ("longitude", "projection_x_coordinate", "grid_longitude") or axis == "X":
            x_dim = str(name)
    for name in ds.dims:
        lower = str(name).lower()
        if y_dim is None and lower in ("lat", "latitude", "y", "rlat"):
            y_dim = str(name)
        if x_dim is None and lower in ("lon", "longitude", "x", "rlon"):
            x_dim = str(name)
    if y_dim is None or x_dim is None:
        raise IngestError(
            f"file {str(path)!r}: cannot tell its y and x coordinates (dims {list(map(str, ds.dims))!r}); give 1-D "
            "coordinates with standard_name latitude/longitude or projection_y_coordinate/projection_x_coordinate"
        )
    return y_dim, x_dim


def _time_dim(path: Path, ds: xr.Dataset, var: xr.DataArray) -> str:
    """The time dim of a variable."""
    for name in var.dims:
        if name in ds.coords and (
            np.issubdtype(ds[name].dtype, np.datetime64)
            or ds[name].dtype == object
            or str(ds[name].attrs.get("axis", "")).upper() == "T"
        ):
            return str(name)
    raise IngestError(
        f"file {str(path)!r}: variable {var.name!r} has no decodable time coordinate (dims {var.dims!r})"
    )


def _file_crs(path: Path, ds: xr.Dataset, geographic_names: bool) -> pyproj.CRS:
    """The CRS named by a file's grid_mapping variable; EPSG:4326 for plain latitude-longitude files."""
    for var in ds.data_vars.values():
        mapping = str(var.attrs.get("grid_mapping", "")).split(":")[0].strip()
        if mapping and mapping in ds.variables:
            attrs = dict(ds[mapping].attrs)
            try:
                for key in ("crs_wkt", "spatial_ref"):
                    if attrs.get(key):
                        return pyproj.CRS.from_user_input(str(attrs[key]))
                return pyproj.CRS.from_cf(attrs)
            except pyproj.exceptions.CRSError as exc:
                raise IngestError(
                    f"file {str(path)!r}: grid_mapping {mapping!r} is not a CRS pyproj reads: {exc}"
                ) from exc
    if geographic_names:
        return pyproj.CRS.from_epsg(4326)
    raise IngestError(
        f"file {str(path)!r} has projected coordinates but no grid_mapping variable; add the CF grid_mapping "
        "(with crs_wkt) so the grid's CRS is known"
    )


def _file_grid(path: Path, ds: xr.Dataset) -> Grid:
    """The grid of one file (x in -180..180 on latitude-longitude grids; projected coordinates in metres)."""
    y_dim, x_dim = _spatial_dims(path, ds)
    y = np.array(ds[y_dim].values, dtype=np.float64)
    x = np.array(ds[x_dim].values, dtype=np.float64)
    geographic_names = str(ds[y_dim].attrs.get("standard_name", y_dim)).lower() in ("latitude", "lat") or str(
        y_dim
    ).lower() in ("lat", "latitude")
    crs = _file_crs(path, ds, geographic_names)
    if not crs.is_geographic:
        for name, values in (("y", y), ("x", x)):
            units = str(ds[y_dim if name == "y" else x_dim].attrs.get("units", "m")).strip().lower()
            if units in ("km", "kilometre", "kilometer", "kilometres", "kilometers"):
                values *= 1000.0
            elif units not in ("m", "metre", "meter", "metres", "meters", ""):
                raise IngestError(
                    f"file {str(path)!r}: coordinate {name!r} has units {units!r}; expected m or km"
                )
    elif np.any(x > 180.0):
        x = ((x + 180.0) % 360.0) - 180.0
    return Grid(crs_wkt=crs.to_wkt(), x=x, y=y, is_geographic=bool(crs.is_geographic))


def _x_order(grid: Grid) -> np.ndarray | None:
    """The permutation that makes x increasing again after wrapping 0..360 longitudes, or None."""
    steps = np.diff(grid.x)
    if grid.x.size < 2 or np.all(steps > 0) or np.all(steps < 0):
        return None
    return np.argsort(grid.x)


def _common_grid(sources: list[_Source]) -> Grid:
    """The one grid that every file shares; names the first file that differs and how."""
    first = sources[0]
    for source in sources[1:]:
        if source.grid == first.grid:
            continue
        a, b = first.grid, source.grid
        if a.shape != b.shape:
            reason = f"{b.shape[0]} x {b.shape[1]} cells instead of {a.shape[0]} x {a.shape[1]}"
        elif a.crs() != b.crs():
            reason = f"CRS {b.crs().name!r} instead of {a.crs().name!r}"
        else:
            dx = float(np.max(np.abs(a.x - b.x)))
            dy = float(np.max(np.abs(a.y - b.y)))
            reason = f"cell centres differ by up to {max(dx, dy)!r} (x {dx!r}, y {dy!r})"
        raise IngestError(
            f"file {str(source.path)!r} is not on the grid of {str(first.path)!r}: {reason}; "
            "regrid it first, every file must share one grid"
        )
    order = _x_order(first.grid)
    if order is None:
        return first.grid
    return Grid(crs_wkt=first.grid.crs_wkt, x=first.grid.x[order], y=first.grid.y, is_geographic=True)


def _common_calendar(sources: list[_Source]) -> str:
    """The one calendar of all files."""
    calendars = {s.calendar for s in sources}
    if len(calendars) > 1:
        detail = ", ".join(f"{str(s.path)!r}: {s.calendar}" for s in sources)
        raise IngestError(f"files use different calendars ({detail}); convert them to one calendar first")
    return sources[0].calendar


# --- time -----------------------------------------------------------------------------------------------------


def _date(days: np.ndarray | int, calendar: str) -> str:
    """'YYYY-MM-DD' of one day number."""
    return _iso(_date_table(np.asarray(days, dtype=np.int64).reshape(1), calendar), 0)


def _concatenate(variable: str, sources: list[_Source]) -> tuple[xr.DataArray, np.ndarray]:
    """One variable's files joined along time; a gap or an overlap is an error naming both files and the dates."""
    calendar = sources[0].calendar
    for source in sources:
        steps = np.diff(source.days)
        bad = np.flatnonzero(steps != 1)
        if bad.size:
            i = int(bad[0])
            what = "goes back or repeats" if steps[i] < 1 else f"skips {int(steps[i]) - 1} day(s)"
            raise IngestError(
                f"file {str(source.path)!r}: {variable} time {what} after {_date(source.days[i], calendar)} "
                f"(next {_date(source.days[i + 1], calendar)}); time must run day by day without gaps or repeats"
            )
    for before, after in zip(sources, sources[1:], strict=False):
        end, start = int(before.days[-1]), int(after.days[0])
        if start <= end:
            raise IngestError(
                f"files {str(before.path)!r} and {str(after.path)!r} overlap in {variable}: the first ends "
                f"{_date(end, calendar)}, the second starts {_date(start, calendar)}; remove the repeated days"
            )
        if start > end + 1:
            raise IngestError(
                f"{variable} has a gap between {str(before.path)!r} (ends {_date(end, calendar)}) and "
                f"{str(after.path)!r} (starts {_date(start, calendar)}): {start - end - 1} day(s) missing from "
                f"{_date(end + 1, calendar)} to {_date(start - 1, calendar)}"
            )
    data = xr.concat(
        [s.data for s in sources], dim="time", join="override", coords="minimal", compat="override"
    )
    return data, np.concatenate([s.days for s in sources])


def _common_days(series: dict[str, tuple[xr.DataArray, np.ndarray]]) -> np.ndarray:
    """The days that every variable covers; variables covering different days are an error."""
    first_name, (_, first_days) = next(iter(series.items()))
    for name, (_, days) in series.items():
        if days.size != first_days.size or days[0] != first_days[0]:
            raise IngestError(
                f"{name} covers {days.size} days from day number {int(days[0])} but {first_name} covers "
                f"{first_days.size} from {int(first_days[0])}; give every variable the same days"
            )
    return first_days


def _decoded_times(days: np.ndarray, calendar: str) -> Any:
    """Decoded dates of day numbers (datetime64 for the standard calendar, cftime otherwise)."""
    import cftime

    if calendar in ("standard", "gregorian", "proleptic_gregorian"):
        return days.astype("datetime64[D]").astype("datetime64[ns]")
    return cftime.num2date(days, "days since 1970-01-01", calendar=calendar)


# --- appending ------------------------------------------------------------------------------------------------


def _existing_store(target: str, storage_options: dict | None) -> Store | None:
    """The store already at the target, or None when there is none."""
    if not _exists(target, storage_options):
        return None
    try:
        return open_store(target, storage_options=storage_options)
    except StoreError as exc:
        raise IngestError(
            f"{target!r} exists but is not a wxshock store ({exc.detail}); choose another --out or remove it"
        ) from exc


def _check_append(store: Store, grid: Grid, calendar: str, days: np.ndarray, variables: list[str]) -> None:
    """The new days must continue the existing store directly, on its grid, calendar and variables."""
    if store.grid != grid:
        raise IngestError(
            f"store {store.location!r} has a different grid ({store.grid.shape[0]} x {store.grid.shape[1]} cells, "
            f"{store.grid.crs().name!r}) than the files ({grid.shape[0]} x {grid.shape[1]}, {grid.crs().name!r})"
        )
    if store.calendar != calendar:
        raise IngestError(
            f"store {store.location!r} uses calendar {store.calendar!r}, the files {calendar!r}"
        )
    if sorted(store.variables) != sorted(variables):
        raise IngestError(
            f"store {store.location!r} holds {list(store.variables)!r} but the files hold {variables!r}; "
            "append the same variables"
        )
    last = int(store._time_numbers[-1])  # noqa: SLF001 - same owner as the store
    start = int(days[0])
    if start <= last:
        raise IngestError(
            f"store {store.location!r} already holds days up to {_date(last, calendar)}; the files start "
            f"{_date(start, calendar)}; append only the days after its end"
        )
    if start > last + 1:
        raise IngestError(
            f"the files start {_date(start, calendar)} but store {store.location!r} ends {_date(last, calendar)}: "
            f"{start - last - 1} day(s) missing in between"
        )


# --- static layers --------------------------------------------------------------------------------------------


def _static_layers(files: list[Path], grid: Grid) -> dict[str, xr.DataArray]:
    """An elevation layer from any input file that carries surface_altitude on the grid."""
    layers: dict[str, xr.DataArray] = {}
    for path in files:
        with xr.open_dataset(path, decode_times=False) as ds:
            for name, var in ds.data_vars.items():
                if (
                    var.ndim == 2
                    and var.attrs.get("standard_name") == "surface_altitude"
                    and var.shape == grid.shape
                ):
                    layer = ds[name].load()
                    layer.attrs.setdefault("source_variable", str(name))
                    layers[ELEVATION_LAYER] = layer
    return layers


def _layer_attrs(layer: xr.DataArray) -> dict[str, Any]:
    """The attributes a layer keeps in the store."""
    return {
        k: v
        for k, v in layer.attrs.items()
        if k in ("units", "long_name", "standard_name", "source_variable")
    }
