"""``wxshock ingest``: input files -> daily variables -> a new store, or days appended to an existing one.

The daily variables (daily.py) are gathered into one xarray Dataset per grid, in wxshock units, with the
record of what was done in their attributes, and handed to the store's write API, which writes aside and swaps
into place, so that a failure leaves the previous store and its fingerprint as they were.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from service.errors import IngestError, StoreError
from service.ingest import timeaxis
from service.ingest.daily import DailyVariable, DayOptions, daily_variables, open_sources
from service.ingest.readers import FileGrid
from service.ingest.variables import Choice, choices_from
from service.store import (
    ELEVATION_LAYER,
    Grid,
    Store,
    _exists,
    _normalise_location,
    append_store,
    open_store,
    write_store,
)

TIME_CONVENTION_ATTR = "wxshock_time_convention"
RECORD_ATTR = "wxshock_ingest_{}"  # per variable: what ingest did, in words
ORIGIN_ATTR = "wxshock_origin_{}"  # per variable: "daily" or "sub-daily"


def ingest_files(
    files: Sequence[Path | str],
    out: str | Path,
    *,
    variables: Any = None,
    utc_offset: str | None = None,
    period_stamp: timeaxis.Placement = "end",
    storage_options: dict | None = None,
    progress: bool = True,
    notes: list[str] | None = None,
) -> str:
    """Ingest CF NetCDF files into the store at ``out`` (created, or appended to); returns its new fingerprint.

    ``variables`` says which file variable is which of ours where recognition cannot: {"tmax": "NAME"} or
    ["tmax=NAME", "tmin=NAME@tn_*.nc", ...]. Sub-daily data become days from midnight to midnight at
    ``utc_offset`` ("+05:30"; UTC when None); ``period_stamp`` says where the stamp of a sub-daily sum, mean or
    extreme without time bounds sits in its time step ("end", as hourly reanalysis accumulations are stamped,
    "start" or "middle"). ``notes`` collects what the user should be told (days left out, conventions found).
    """
    if not files:
        raise IngestError("no input files given; name one or more CF NetCDF files", field="files")
    if period_stamp not in ("end", "start", "middle"):
        raise IngestError(
            f"period stamp {period_stamp!r} is not one of 'end', 'start', 'middle'", field="period_stamp"
        )
    choices: list[Choice] = choices_from(variables)
    options = DayOptions(utc_offset=timeaxis.parse_utc_offset(utc_offset), placement=period_stamp)
    target = _normalise_location(out)
    paths = [Path(f) for f in files]
    sources = open_sources(paths, choices, progress)
    daily = daily_variables(sources, choices, options)
    if notes is not None:
        for item in daily.values():
            notes.extend(item.notes)
    grid = _one_grid(daily)
    calendar = _one_calendar(daily)
    days = _common_days(daily, calendar, notes)
    dataset = _dataset(daily, grid, days, calendar)
    existing = _existing_store(target, storage_options)
    if existing is not None:
        _check_append(existing, grid, calendar, days, daily)
        try:
            return append_store(dataset, target, storage_options=storage_options, progress=progress)
        except StoreError as exc:
            raise IngestError(
                f"ingest into {str(out)!r} failed, the previous store is unchanged: {exc.detail}"
            ) from exc
    for name, layer in _static_layers(paths, grid).items():
        dataset[name] = (("y", "x"), np.asarray(layer.values, dtype=np.float32), _layer_attrs(layer))
    try:
        return write_store(dataset, target, storage_options=storage_options, progress=progress)
    except StoreError as exc:
        raise IngestError(
            f"ingest into {str(out)!r} failed, the previous store is unchanged: {exc.detail}"
        ) from exc


def store_grid(grid: FileGrid) -> Grid:
    """The store's Grid of a file grid."""
    return Grid(crs_wkt=grid.crs.to_wkt(), x=grid.x, y=grid.y, is_geographic=bool(grid.crs.is_geographic))


def _one_grid(daily: dict[str, DailyVariable]) -> FileGrid:
    """The grid every variable lies on (one grid per store until stores hold several)."""
    items = list(daily.values())
    first = items[0]
    for item in items[1:]:
        if not first.grid.same_as(item.grid):
            raise IngestError(
                f"{item.variable} ({str(item.paths[0])!r}) is not on the grid of {first.variable} "
                f"({str(first.paths[0])!r}): {first.grid.difference(item.grid)}; ingest them into one store in two "
                "runs, one per grid"
            )
    return first.grid


def _one_calendar(daily: dict[str, DailyVariable]) -> str:
    """The one calendar of every variable."""
    calendars = {v.calendar for v in daily.values()}
    if len(calendars) > 1:
        detail = ", ".join(f"{v.variable}: {v.calendar}" for v in daily.values())
        raise IngestError(
            f"the variables use different calendars ({detail}); convert them to one calendar first"
        )
    return next(iter(calendars))


def _common_days(daily: dict[str, DailyVariable], calendar: str, notes: list[str] | None) -> np.ndarray:
    """The days every variable covers. Variables made from sub-daily data are cut to the days all have (their
    first and last days differ when accumulations and instants split days differently); daily variables covering
    different days are an error."""
    items = list(daily.values())
    first_day = max(int(item.days[0]) for item in items)
    last_day = min(int(item.days[-1]) for item in items)
    for item in items:
        if item.days[0] == first_day and item.days[-1] == last_day:
            continue
        other = next(o for o in items if o.days[0] != item.days[0] or o.days[-1] != item.days[-1])
        if not item.sub_daily or last_day < first_day:
            raise IngestError(
                f"{item.variable} covers {item.days.size} days from {timeaxis.day_text(int(item.days[0]), calendar)} "
                f"but {other.variable} covers {other.days.size} from {timeaxis.day_text(int(other.days[0]), calendar)}; "
                "give every variable the same days"
            )
        keep = (item.days >= first_day) & (item.days <= last_day)
        cut = [timeaxis.day_text(int(d), calendar) for d in item.days[~keep]]
        kept = np.flatnonzero(keep)
        item.data = item.data.isel(time=slice(int(kept[0]), int(kept[-1]) + 1))
        item.days = item.days[keep]
        if notes is not None:
            notes.append(f"{item.variable}: left out {', '.join(cut)}, which the other variables lack")
    return items[0].days


def _dataset(daily: dict[str, DailyVariable], grid: FileGrid, days: np.ndarray, calendar: str) -> xr.Dataset:
    """One grid's daily variables as the Dataset the store writes, with the record of what was done."""
    data_vars: dict[str, Any] = {}
    attrs: dict[str, Any] = {"title": "daily grid ingested from CF NetCDF files", "source": "wxshock ingest"}
    for variable, item in daily.items():
        data_vars[variable] = item.data.assign_attrs(grid_mapping="crs")
        attrs[RECORD_ATTR.format(variable)] = item.record
        attrs[ORIGIN_ATTR.format(variable)] = "sub-daily" if item.sub_daily else "daily"
    conventions = {item.convention for item in daily.values() if item.convention}
    if conventions:
        attrs[TIME_CONVENTION_ATTR] = sorted(conventions)[0]
    dataset = xr.Dataset(data_vars)
    dataset = dataset.assign_coords(time=timeaxis.decoded_days(days, calendar), y=grid.y, x=grid.x)
    dataset["crs"] = ((), np.int32(0), {"crs_wkt": grid.crs.to_wkt()})
    # The same days on the same grid give the same store whether ingested at once or year by year, so the
    # attributes name no input files (their names are not part of what the data is).
    dataset.attrs.update(attrs)
    return dataset


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


def _check_append(
    store: Store, grid: FileGrid, calendar: str, days: np.ndarray, daily: dict[str, DailyVariable]
) -> None:
    """The new days continue the existing store directly, on its grid, calendar and variables, made the same way."""
    if store.grid != store_grid(grid):
        raise IngestError(
            f"store {store.location!r} has a different grid ({store.grid.shape[0]} x {store.grid.shape[1]} cells, "
            f"{store.grid.crs().name!r}) than the files ({grid.shape[0]} x {grid.shape[1]}, {grid.crs.name!r})"
        )
    if store.calendar != calendar:
        raise IngestError(
            f"store {store.location!r} uses calendar {store.calendar!r}, the files {calendar!r}"
        )
    if sorted(store.variables) != sorted(daily):
        raise IngestError(
            f"store {store.location!r} holds {list(store.variables)!r} but the files hold {sorted(daily)!r}; "
            "append the same variables"
        )
    attrs = store._group.attrs.asdict()  # noqa: SLF001 - the store's record, read by its only writer
    for variable, item in daily.items():
        origin = attrs.get(ORIGIN_ATTR.format(variable))
        new = "sub-daily" if item.sub_daily else "daily"
        if origin is not None and origin != new:
            raise IngestError(
                f"store {store.location!r} made {variable} from {origin} data ({attrs.get(RECORD_ATTR.format(variable))}); "
                f"these files give it from {new} data; one variable's years must be made the same way"
            )
    last = int(store._time_numbers[-1])  # noqa: SLF001 - same owner as the store
    start = int(days[0])
    if start <= last:
        raise IngestError(
            f"store {store.location!r} already holds days up to {timeaxis.day_text(last, calendar)}; the files start "
            f"{timeaxis.day_text(start, calendar)}; append only the days after its end"
        )
    if start > last + 1:
        raise IngestError(
            f"the files start {timeaxis.day_text(start, calendar)} but store {store.location!r} ends "
            f"{timeaxis.day_text(last, calendar)}: {start - last - 1} day(s) missing in between"
        )


def _static_layers(files: list[Path], grid: FileGrid) -> dict[str, xr.DataArray]:
    """An elevation layer from any input file that carries surface_altitude on the grid."""
    layers: dict[str, xr.DataArray] = {}
    for path in files:
        with xr.open_dataset(path, decode_times=False) as ds:
            for name, var in ds.data_vars.items():
                if var.attrs.get("standard_name") == "surface_altitude" and set(var.dims) == {
                    grid.y_dim,
                    grid.x_dim,
                }:
                    layer = ds[name].transpose(grid.y_dim, grid.x_dim).load()
                    if grid.x_order is not None:
                        layer = layer.isel({layer.dims[1]: grid.x_order})
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
