"""``wxshock ingest``: input files -> daily variables -> a new store, or days and variables added to one.

The daily variables (daily.py) are gathered into one xarray Dataset per grid, in wxshock units, with the record
of what was done in their attributes, and handed to the store's write API (service.store.write), which writes
aside and swaps into place, so that a failure leaves the previous store and its fingerprint as they were. A store
may hold each variable on its own grid: ingesting files of variables a store lacks adds them, on the store's grid
when theirs is the same, else on a new grid.
"""

from __future__ import annotations

import tempfile
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from service.errors import IngestError, StoreError
from service.ingest import timeaxis
from service.ingest.blocks import stage_dataset
from service.ingest.daily import DailyVariable, DayOptions, daily_variables, open_sources
from service.ingest.readers import FileGrid
from service.ingest.variables import VARIABLES, Choice, choices_from
from service.store import (
    ELEVATION_LAYER,
    Grid,
    Store,
    _exists,
    _normalise_location,
    check_grid_name,
    default_grid_name,
    find_grid,
    open_store,
    update_store,
    write_store,
)
from service.store.location import _is_url

# Root attribute: the product's time convention (timeaxis.LEAP_DROPS_DEC31), listed by describe among the notes
TIME_CONVENTION_ATTR = "wxshock_note_time_convention"
# Daily values (as float64) above which ingest streams by time blocks unless told (ingest_files' ``stream``)
STREAM_BYTES = 1 << 30
RECORD_ATTR = "wxshock_ingest"  # on each daily variable: what ingest did, in words
ORIGIN_ATTR = "wxshock_origin"  # on each daily variable: "daily" or "sub-daily"


@dataclass
class _GridGroup:
    """The variables of one run that lie on one grid, and the name that grid gets in the store."""

    grid: FileGrid
    variables: dict[str, DailyVariable]
    name: str | None = None


def ingest_files(
    files: Sequence[Path | str],
    out: str | Path,
    *,
    variables: Any = None,
    grids: Sequence[str] | None = None,
    utc_offset: str | None = None,
    period_stamp: timeaxis.Placement = "end",
    storage_options: dict | None = None,
    progress: bool = True,
    notes: list[str] | None = None,
    stream: bool | None = None,
) -> str:
    """Ingest CF NetCDF files into the store at ``out`` (created, or added to); returns its new fingerprint.

    ``variables`` says which file variable is which of ours where recognition cannot: {"tmax": "NAME"} or
    ["tmax=NAME", "tmin=NAME@tn_*.nc", ...]. ``grids`` names the grids: ["NAME"] when the files lie on one grid,
    or ["prcp=NAME", "tmax=NAME"] per variable; unnamed grids get the store's grid they equal, else a default name
    (grid, grid2, ...). Sub-daily data become days from midnight to midnight at ``utc_offset`` ("+05:30"; UTC
    when None); ``period_stamp`` says where the stamp of a sub-daily sum, mean or extreme without time bounds sits
    in its time step ("end", as hourly reanalysis accumulations are stamped, "start" or "middle"). ``notes``
    collects what the user should be told (days left out, conventions found).

    ``stream`` reads the input by time blocks of whole days and stages them on disk before the store is written
    (service/ingest/blocks.py), so that input larger than memory ingests in bounded memory; None (the default)
    streams when the daily values would pass STREAM_BYTES as float64. Both give the same store.
    """
    if not files:
        raise IngestError("no input files given; name one or more CF NetCDF files", field="files")
    if period_stamp not in ("end", "start", "middle"):
        raise IngestError(
            f"period stamp {period_stamp!r} is not one of 'end', 'start', 'middle'", field="period_stamp"
        )
    choices: list[Choice] = choices_from(variables)
    naming = _parse_grid_names(grids)
    options = DayOptions(utc_offset=timeaxis.parse_utc_offset(utc_offset), placement=period_stamp)
    target = _normalise_location(out)
    told: list[str] = [] if notes is None else notes
    paths = [Path(f) for f in files]
    sources = open_sources(paths, choices, progress)
    daily = daily_variables(sources, choices, options)
    for item in daily.values():
        told.extend(item.notes)
    calendar = _one_calendar(daily)
    groups = _by_grid(daily)
    existing = _existing_store(target, storage_options)
    _name_grids(groups, naming, existing)
    for group in groups:
        _common_days(group.variables, calendar, told)
        if existing is not None:
            _after_store(existing, group.variables, calendar, told)
    datasets = {group.name: _dataset(group, calendar, paths, new_grid=_is_new(group, existing)) for group in groups
                if group.variables}  # fmt: skip
    if not datasets:
        raise IngestError(f"store {str(out)!r} already holds every day of these files; nothing to add")
    if stream is None:
        stream = _daily_bytes(datasets) > STREAM_BYTES
    try:
        with _staging(target, stream) as staging:
            if staging is not None:
                datasets = {name: stage_dataset(ds, staging / str(name), _daily_names(ds), progress=progress)
                            for name, ds in datasets.items()}  # fmt: skip
            if existing is None:
                return write_store(datasets, target, storage_options=storage_options, progress=progress)
            return update_store(datasets, target, storage_options=storage_options, progress=progress)
    except StoreError as exc:
        raise IngestError(
            f"ingest into {str(out)!r} failed, the previous store is unchanged: {exc.detail}"
        ) from exc


def _daily_names(ds: xr.Dataset) -> list[str]:
    """The daily variables of a Dataset for the store, in its order."""
    return [v for v in VARIABLES if v in ds.data_vars]


def _daily_bytes(datasets: dict[Any, xr.Dataset]) -> int:
    """Bytes of the daily values of the Datasets as float64 (what reading them at once would take)."""
    return sum(8 * ds[v].size for ds in datasets.values() for v in _daily_names(ds))


@contextmanager
def _staging(target: str, stream: bool) -> Iterator[Path | None]:
    """A staging directory for streamed ingest (beside a local store, on the same disk; else the system's
    temporary directory), removed afterwards; None when not streaming."""
    if not stream:
        yield None
        return
    local = not _is_url(target)
    parent = Path(target).parent if local else None
    if parent is not None:
        parent.mkdir(parents=True, exist_ok=True)
    prefix = f".{Path(target).name}.staging-" if local else "wxshock-staging-"
    with tempfile.TemporaryDirectory(prefix=prefix, dir=parent) as directory:
        yield Path(directory)


def store_grid(grid: FileGrid) -> Grid:
    """The store's Grid of a file grid (with the file's 2-D latitude/longitude, when it has them)."""
    return Grid.from_crs(grid.crs, grid.x, grid.y, lat=grid.lat, lon=grid.lon)


# --- grids and their names ---------------------------------------------------------------------------------------


def _parse_grid_names(grids: Sequence[str] | None) -> dict[str | None, str]:
    """{variable or None (the one grid): name} from ["NAME"] or ["tmax=NAME", ...]."""
    naming: dict[str | None, str] = {}
    for text in grids or ():
        variable, sep, name = str(text).partition("=")
        key = variable.strip() if sep else None
        name = (name if sep else variable).strip()
        if key is not None and key not in VARIABLES:
            raise IngestError(f"--grid {text!r}: {key!r} is not one of {list(VARIABLES)!r}", field="grids")
        if key in naming:
            raise IngestError(
                f"--grid {text!r}: {'that variable' if key else 'the grid'} is named twice", field="grids"
            )
        try:
            naming[key] = check_grid_name(name)
        except StoreError as exc:
            raise IngestError(f"--grid {text!r}: {exc.detail}", field="grids") from exc
    return naming


def _by_grid(daily: dict[str, DailyVariable]) -> list[_GridGroup]:
    """The variables grouped by the grid they lie on, in the order of VARIABLES."""
    groups: list[_GridGroup] = []
    for item in daily.values():
        group = next((g for g in groups if g.grid.same_as(item.grid)), None)
        if group is None:
            groups.append(_GridGroup(grid=item.grid, variables={item.variable: item}))
        else:
            group.variables[item.variable] = item
    return groups


def _name_grids(groups: list[_GridGroup], naming: dict[str | None, str], existing: Store | None) -> None:
    """Give each group its grid's name: the user's, the store's grid it equals, or the first free default."""
    if None in naming and len(groups) > 1:
        listed = "; ".join(f"{', '.join(g.variables)} on {g.grid.described} ({g.grid.shape[0]} x {g.grid.shape[1]})"
                           for g in groups)  # fmt: skip
        raise IngestError(
            f"--grid {naming[None]}: the files lie on {len(groups)} grids ({listed}); name each by a variable on it, "
            "e.g. --grid prcp=fine --grid tmax=coarse",
            field="grids",
        )
    for variable in (k for k in naming if k is not None):
        if not any(variable in g.variables for g in groups):
            raise IngestError(
                f"--grid {variable}={naming[variable]}: the files hold no {variable}", field="grids"
            )
    taken = set(existing.grids) if existing is not None else set()
    for group in groups:
        asked = {naming[v] for v in group.variables if v in naming} | (
            {naming[None]} if None in naming else set()
        )
        if len(asked) > 1:
            raise IngestError(
                f"--grid: {', '.join(group.variables)} lie on one grid, named {sorted(asked)!r}; give it one name",
                field="grids",
            )
        found = find_grid(existing, store_grid(group.grid)) if existing is not None else None
        if asked:
            group.name = asked.pop()
            if found is not None and found != group.name:
                raise IngestError(
                    f"--grid {group.name}: the files of {', '.join(group.variables)} lie on the store's grid "
                    f"{found!r}; name it {found!r} or leave --grid out",
                    field="grids",
                )
        else:
            group.name = found or default_grid_name(taken)
        taken.add(group.name)
    names = [g.name for g in groups]
    if len(set(names)) < len(names):
        raise IngestError(f"--grid: two different grids would both be named {names!r}; give each its own name",
                          field="grids")  # fmt: skip


def _is_new(group: _GridGroup, existing: Store | None) -> bool:
    """True when the group's grid is not yet in the store."""
    return existing is None or group.name not in existing.grids


# --- days ----------------------------------------------------------------------------------------------------------


def _one_calendar(daily: dict[str, DailyVariable]) -> str:
    """The one calendar of every variable."""
    calendars = {v.calendar for v in daily.values()}
    if len(calendars) > 1:
        detail = ", ".join(f"{v.variable}: {v.calendar}" for v in daily.values())
        raise IngestError(
            f"the variables use different calendars ({detail}); convert them to one calendar first"
        )
    return next(iter(calendars))


def _cut(item: DailyVariable, keep: np.ndarray) -> list[int]:
    """Keep a contiguous run of an item's days; returns the day numbers left out."""
    kept = np.flatnonzero(keep)
    left = [int(d) for d in item.days[~keep]]
    if kept.size:
        item.data = item.data.isel(time=slice(int(kept[0]), int(kept[-1]) + 1))
    else:
        item.data = item.data.isel(time=slice(0, 0))
    item.days = item.days[keep]
    return left


def _common_days(daily: dict[str, DailyVariable], calendar: str, notes: list[str]) -> None:
    """Make the variables of one grid cover the same days (one Dataset has one time axis).

    Variables made from sub-daily data are cut to the days all have (accumulations and instants split days
    differently at the ends); daily variables of one grid covering different days are an error.
    """
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
                f"but {other.variable} covers {other.days.size} from {timeaxis.day_text(int(other.days[0]), calendar)} "
                "on the same grid; give the variables of one grid the same days"
            )
        cut = _cut(item, (item.days >= first_day) & (item.days <= last_day))
        notes.append(f"{item.variable}: left out {_days_text(cut, calendar)}, which the other variables lack")


def _days_text(days: list[int], calendar: str) -> str:
    """'2001-01-04' or '2001-01-01 to 2001-01-30 (30 days)'."""
    if len(days) == 1:
        return timeaxis.day_text(days[0], calendar)
    return f"{timeaxis.day_text(days[0], calendar)} to {timeaxis.day_text(days[-1], calendar)} ({len(days)} days)"


def _after_store(store: Store, daily: dict[str, DailyVariable], calendar: str, notes: list[str]) -> None:
    """Check new days against the store: the same calendar, the same making of each variable, no overlap.

    Days that a variable made from sub-daily data already has in the store are left out (noted): a batch of
    sub-daily files may begin with the previous batch's last file, so that the day split between them is whole.
    """
    if store.calendar != calendar:
        raise IngestError(
            f"store {store.location!r} uses calendar {store.calendar!r}, the files {calendar!r}"
        )
    for variable, item in list(daily.items()):
        if variable not in store.variables:
            continue
        on = store.grid_of(variable)
        if not (store.grids[on] == store_grid(item.grid)):
            held = store.grids[on]
            raise IngestError(
                f"store {store.location!r} holds {variable} on its grid {on!r} ({held.shape[0]} x {held.shape[1]} cells, "
                f"{held.crs().name!r}); these files give it on another grid ({item.grid.shape[0]} x "
                f"{item.grid.shape[1]}, {item.grid.described}: {_grid_difference(held, item.grid)}); a variable lies on one grid: regrid the files or ingest them "
                "into another store"
            )
        attrs = store._array(variable).attrs.asdict()  # noqa: SLF001 - the store's record of this variable
        origin = attrs.get(ORIGIN_ATTR)
        new = "sub-daily" if item.sub_daily else "daily"
        if origin is not None and origin != new:
            raise IngestError(
                f"store {store.location!r} made {variable} from {origin} data ({attrs.get(RECORD_ATTR)}); these files "
                f"give it from {new} data; one variable's days must all be made the same way"
            )
        span = store.coverage(variable)
        last = int(store.day_numbers[span.stop - 1])
        if item.days[0] > last + 1:
            raise IngestError(
                f"the files start {variable} on {timeaxis.day_text(int(item.days[0]), calendar)} but store "
                f"{store.location!r} ends it on {timeaxis.day_text(last, calendar)}: {int(item.days[0]) - last - 1} "
                "day(s) missing in between"
            )
        if item.days[0] == last + 1:
            continue
        if not item.sub_daily:
            raise IngestError(
                f"store {store.location!r} already holds {variable} up to {timeaxis.day_text(last, calendar)}; the "
                f"files start {timeaxis.day_text(int(item.days[0]), calendar)}; give only the days after its end"
            )
        cut = _cut(item, item.days > last)
        notes.append(f"{variable}: left out {_days_text(cut, calendar)}, which the store already holds")
        if item.days.size == 0:
            del daily[variable]


def _grid_difference(held: Grid, grid: FileGrid) -> str:
    """How a file grid differs from a store's grid, for messages."""
    if held.shape != grid.shape:
        return "another shape"
    if not held.crs().equals(grid.crs, ignore_axis_order=True):
        return "another CRS"
    dx = float(np.max(np.abs(held.x - grid.x)))
    dy = float(np.max(np.abs(held.y - grid.y)))
    return f"cell centres differ by up to {max(dx, dy)!r}"


# --- the Dataset the store writes --------------------------------------------------------------------------------


def _dataset(group: _GridGroup, calendar: str, paths: list[Path], *, new_grid: bool) -> xr.Dataset:
    """One grid's daily variables as the Dataset the store writes, with the record of what was done.

    The records name no input files: the same days on the same grid give the same store whether ingested at once
    or year by year.
    """
    items = list(group.variables.values())
    days = items[0].days
    data_vars: dict[str, Any] = {}
    for variable, item in group.variables.items():
        data_vars[variable] = item.data.assign_attrs(
            {
                "grid_mapping": "crs",
                RECORD_ATTR: item.record,
                ORIGIN_ATTR: "sub-daily" if item.sub_daily else "daily",
            }
        )
    dataset = xr.Dataset(data_vars)
    dataset = dataset.assign_coords(
        time=timeaxis.decoded_days(days, calendar), y=group.grid.y, x=group.grid.x
    )
    dataset["crs"] = ((), np.int32(0), {"crs_wkt": group.grid.crs.to_wkt()})
    if group.grid.lat is not None and group.grid.lon is not None:
        dataset["lat"] = (("y", "x"), group.grid.lat, {"units": "degrees_north", "standard_name": "latitude"})
        dataset["lon"] = (("y", "x"), group.grid.lon, {"units": "degrees_east", "standard_name": "longitude"})
    if new_grid:
        for name, layer in _static_layers(paths, group.grid).items():
            dataset[name] = (("y", "x"), np.asarray(layer.values, dtype=np.float32), _layer_attrs(layer))
    attrs: dict[str, Any] = {"title": "daily grid ingested from CF NetCDF files", "source": "wxshock ingest"}
    conventions = {item.convention for item in items if item.convention}
    if conventions:
        attrs[TIME_CONVENTION_ATTR] = sorted(conventions)[0]
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


def _static_layers(files: list[Path], grid: FileGrid) -> dict[str, xr.DataArray]:
    """An elevation layer from any input file that carries surface_altitude on the grid."""
    layers: dict[str, xr.DataArray] = {}
    for path in files:
        with xr.open_dataset(path, decode_times=False) as ds:
            if (
                grid.y_dim not in ds.dims
                or grid.x_dim not in ds.dims
                or ds.sizes[grid.y_dim] != grid.shape[0]
            ):
                continue
            for name, var in ds.data_vars.items():
                if var.attrs.get("standard_name") == "surface_altitude" and set(var.dims) == {
                    grid.y_dim,
                    grid.x_dim,
                }:
                    layer = ds[name].transpose(grid.y_dim, grid.x_dim).load()
                    if grid.x_order is not None:
                        layer = layer.isel({grid.x_dim: grid.x_order})
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
