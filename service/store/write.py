"""Writing a store: create one, append days, add variables on the same or a new grid, add weight layers.

This is the write API that ingest (and the demo) call. Every function takes its daily data as one xarray Dataset
per grid, already in wxshock units, laid out as follows (``ds`` below):

- daily variables, any of ``tmax``, ``tmin`` (degC) and ``prcp`` (mm/day), float arrays on dims ``time``, ``y``,
  ``x`` in any order, numpy- or dask-backed, NaN where missing;
- 1-D coordinates ``time`` (daily and contiguous, decoded: datetime64 or cftime; every Dataset of one store in one
  calendar), ``y`` and ``x`` (cell centres in the grid's CRS, strictly monotonic);
- the CRS as a CF grid_mapping variable with ``crs_wkt`` (named by the variables' ``grid_mapping``, or called
  ``crs``), or ``ds.attrs['crs_wkt']``;
- optionally 2-D (y, x) static layers: ``elevation`` (m) and weight layers (population, cropland, ...), and ``lat``
  / ``lon`` (or ``latitude`` / ``longitude``) cell-centre degrees where the source files carry them;
- ``ds.attrs``: JSON scalars go to the store's root attributes (title, and notes on what ingest did: use names
  that start with ``wxshock_note``, which ``describe`` lists); a daily variable's own attributes that start with
  ``wxshock_`` (or are ``source``, ``comment``, ``history``) are kept on it, all others are replaced by ours.

Grids are named (1 to 16 characters of a-z, 0-9, _; :func:`service.store.layout.check_grid_name`); ``grid=None``
picks the store's grid equal to the data's grid, or a default name (``grid``, ``grid2``, ...) for a new one. One
calendar and one time axis per store: it spans every variable's days, and each variable records the days it was
given (days outside them read as missing). A variable lies on one grid.

Every write happens aside and is swapped into place recoverably (service.store.swap): a failure or a crash leaves
the previous store, or the complete new one, never a mixture. Local stores are updated through a hard-linked copy
(only new chunks are written); an object store, or days added before the store's first day, rewrite the store.
Each function returns the new fingerprint.
"""

from __future__ import annotations

import os
import shutil
import warnings
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import xarray as xr
import zarr

from service.errors import StoreError, StoreFormatError
from service.store.fingerprint import array_digest, compute_fingerprint, scan_daily
from service.store.grids import Grid, _find_crs, is_lonlat_crs
from service.store.layout import (
    _STATIC_NAMES,
    ADD_OFFSET,
    DAYS_ATTR,
    DEFAULT_LAYOUT,
    DIGESTS_ATTR,
    ELEVATION_LAYER,
    FILL_VALUE,
    FINGERPRINT_ATTR,
    GRID_MAPPING,
    GRIDS_ATTR,
    LATITUDE,
    LAYOUT_VERSION,
    LONGITUDE,
    MASK_LAYER,
    MIGRATED_ATTR,
    SCALE_FACTOR,
    TIME_COORD_CHUNK,
    TIME_UNITS,
    VARIABLE_ATTRS,
    VARIABLES,
    VERSION_ATTR,
    Layout,
    StoreLayout,
    _encode_block,
    _json_scalar,
    check_grid_name,
    default_grid_name,
    layout_of_array,
    read_layout,
)
from service.store.location import _is_url, _normalise_location, _open_group, _zarr_store
from service.store.read import Store
from service.store.swap import write_aside, writing
from service.store.timeaxis import _daily_numbers, _date_table, _iso

GridData = xr.Dataset | Mapping[str, xr.Dataset]
_KEPT_VARIABLE_ATTRS = ("source", "comment", "history")
_LATLON_NAMES = {LATITUDE: (LATITUDE, "latitude"), LONGITUDE: (LONGITUDE, "longitude")}


# --- the public write API -------------------------------------------------------------------------------------


def write_store(
    data: GridData,
    location: str | Path,
    *,
    grid: str | None = None,
    storage_options: dict | None = None,
    progress: bool = False,
    layout: Layout = DEFAULT_LAYOUT,
) -> str:
    """Create (or replace) a store from one Dataset (one grid, named ``grid``, default ``grid``) or a mapping
    {grid name: Dataset}; returns the fingerprint.

    The store's time axis runs from the earliest to the latest day of the Datasets. An existing store at
    ``location`` is replaced only once the new one is complete.
    """
    target = _normalise_location(location)
    named = _named(data, grid)
    plans = [_plan_grid(ds, name) for name, ds in named.items()]
    _check_plans(plans)
    with writing(target, storage_options):
        return _write_new(target, storage_options, plans, _root_attrs({}, plans), layout, progress, "writing")


def update_store(
    data: GridData,
    location: str | Path,
    *,
    grid: str | None = None,
    storage_options: dict | None = None,
    progress: bool = False,
) -> str:
    """Append days and add variables in one write; returns the new fingerprint.

    ``data`` is one Dataset (on the grid named ``grid``, or found by equality, or new) or {grid name: Dataset}.
    For each variable of the data: one the store has gets the new days appended (they must start the day after
    the last day it was given, on its grid; it may be appended alone, and the store's time axis grows when they
    pass its end); one the store lacks is added with its days (on the data's grid: an existing one when equal,
    else a new grid). Static layers of the data are written on a new grid only (use :func:`write_layer` for an
    existing one). A layout-1 store is migrated first (:func:`service.store.migrate.migrate_store`).
    """
    target = _normalise_location(location)
    named = _named(data, grid, allow_unnamed=True)
    with writing(target, storage_options):
        store = _open_for_update(target, storage_options, progress)
        plans = [_plan_grid(ds, name) for name, ds in named.items()]
        _check_plans(plans, store)
        changes = _changes(store, plans)
        return _apply(store, target, storage_options, plans, changes, progress)


def append_store(
    ds: xr.Dataset,
    location: str | Path,
    *,
    grid: str | None = None,
    storage_options: dict | None = None,
    progress: bool = False,
) -> str:
    """Append days to variables the store has (all of them or some, each starting the day after the last day it
    was given); returns the new fingerprint. Variables the store lacks are refused: see :func:`add_variables`."""
    store = open_for_check(location, storage_options)
    extra = [v for v in VARIABLES if v in ds.data_vars and v not in store.variables]
    if extra:
        raise StoreFormatError(
            f"appending to store {store.name!r}: it has no {extra!r}; add new variables with add_variables "
            f"(or update_store), append only its variables {list(store.variables)!r}"
        )
    return update_store(ds, location, grid=grid, storage_options=storage_options, progress=progress)


def add_variables(
    ds: xr.Dataset,
    location: str | Path,
    *,
    grid: str | None = None,
    storage_options: dict | None = None,
    progress: bool = False,
) -> str:
    """Add daily variables the store lacks, on the store's grid equal to the data's or on a new grid (named
    ``grid``, or a default name); their days may cover any part of (or extend) the store's time axis. Returns
    the new fingerprint. Variables the store already has are refused: see :func:`append_store`."""
    store = open_for_check(location, storage_options)
    present = [v for v in VARIABLES if v in ds.data_vars and v in store.variables]
    if present:
        raise StoreFormatError(
            f"adding variables to store {store.name!r}: it already has {present!r} (on grid "
            f"{store.grid_of(present[0])!r}); append days to them with append_store instead"
        )
    return update_store(ds, location, grid=grid, storage_options=storage_options, progress=progress)


def write_layer(
    location: str | Path,
    name: str,
    values: Mapping[str, np.ndarray],
    *,
    attrs: Mapping[str, Any] | None = None,
    storage_options: dict | None = None,
    progress: bool = False,
) -> str:
    """Add (or replace) a static 2-D layer on grids of the store: ``values`` maps grid name to a (ny, nx) float
    array on that grid (NaN where missing; a weight layer must be >= 0). ``attrs`` (JSON scalars: units,
    long_name, and e.g. ``wxshock_layer_kind`` 'count' or 'share') go on every copy. Returns the new fingerprint.
    """
    target = _normalise_location(location)
    if not isinstance(name, str) or not name.isidentifier() or name in _STATIC_NAMES or name in VARIABLES:
        raise StoreFormatError(
            f"layer name {name!r} is not allowed: use letters, digits and _ (not starting with a digit), and not "
            f"one of {sorted(_STATIC_NAMES | set(VARIABLES))!r}"
        )
    with writing(target, storage_options):
        store = _open_for_update(target, storage_options, progress)
        layers: dict[str, np.ndarray] = {}
        for grid, array in values.items():
            g = store.grids.get(grid)
            if g is None:
                raise StoreFormatError(
                    f"store {store.name!r} has no grid {grid!r}; it has {list(store.grids)!r}"
                )
            array = np.asarray(array, dtype=np.float32)
            if array.shape != g.shape:
                raise StoreFormatError(
                    f"layer {name!r} for grid {grid!r} has shape {array.shape}; the grid has {g.shape} (y, x)"
                )
            if np.any(array[np.isfinite(array)] < 0) and name != ELEVATION_LAYER:
                raise StoreFormatError(
                    f"layer {name!r} has negative values on grid {grid!r}; weights must be >= 0"
                )
            layers[grid] = array
        layer_attrs = {k: v for k, v in dict(attrs or {}).items() if _json_scalar(v)}
        changes = _Changes(
            axis=(int(store.day_numbers[0]), int(store.day_numbers[-1])), layers={name: (layers, layer_attrs)}
        )
        return _apply(store, target, storage_options, [], changes, progress)


def open_for_check(location: str | Path, storage_options: dict | None = None) -> Store:
    """The store at a location, opened to check new data against it (grids, variables, days)."""
    from service.store.read import open_store

    return open_store(location, storage_options=storage_options)


def find_grid(store: Store, grid: Grid) -> str | None:
    """The name of the store's grid equal to ``grid`` (same CRS and cell centres), or None."""
    for name, existing in store.grids.items():
        if existing == grid:
            return name
    return None


# --- plans: what each Dataset brings --------------------------------------------------------------------------


@dataclass
class _VariablePlan:
    """One daily variable of new data: (y, x, days) float values (dask) starting on day number ``first``."""

    name: str
    data: Any
    first: int
    last: int
    attrs: dict[str, Any]


@dataclass
class _GridPlan:
    """One Dataset, checked: its grid (name decided), days, calendar, variables and static layers."""

    name: str | None
    grid: Grid
    crs: pyproj.CRS
    calendar: str
    first: int
    last: int
    variables: dict[str, _VariablePlan]
    layers: dict[str, tuple[np.ndarray, dict[str, Any]]]
    lat: np.ndarray | None
    lon: np.ndarray | None
    attrs: dict[str, Any]
    dataset: xr.Dataset = field(repr=False)


def _named(data: GridData, grid: str | None, *, allow_unnamed: bool = False) -> dict[str | None, xr.Dataset]:
    """{grid name or None: Dataset} from one Dataset or a mapping."""
    if isinstance(data, xr.Dataset):
        if grid is None and not allow_unnamed:
            return {None: data}
        return {grid if grid is None else check_grid_name(grid): data}
    if grid is not None:
        raise StoreFormatError("give the grid names as the keys of the mapping, not also as grid=")
    if not data:
        raise StoreFormatError("no Dataset given: give one Dataset or {grid name: Dataset}")
    return {check_grid_name(name): ds for name, ds in data.items()}


def _plan_grid(ds: xr.Dataset, name: str | None) -> _GridPlan:
    """Check one Dataset against the store contract (module docstring) and say what it brings."""
    import dask.array as da

    variables = tuple(v for v in VARIABLES if v in ds.data_vars)
    if not variables:
        raise StoreFormatError(
            f"dataset has none of the variables {list(VARIABLES)!r} (it has {sorted(map(str, ds.data_vars))!r})"
        )
    for v in variables:
        if set(ds[v].dims) != {"time", "y", "x"}:
            raise StoreFormatError(f"variable {v!r} has dims {ds[v].dims!r}; expected time, y and x")
    for coord in ("x", "y", "time"):
        if coord not in ds.coords or ds[coord].ndim != 1:
            raise StoreFormatError(f"dataset needs a 1-D coordinate {coord!r}")
    x = np.asarray(ds["x"].values, dtype=np.float64)
    y = np.asarray(ds["y"].values, dtype=np.float64)
    for coord, c in (("x", x), ("y", y)):
        if not np.all(np.isfinite(c)):
            raise StoreFormatError(f"coordinate {coord!r} has non-finite values")
        steps = np.diff(c)
        if c.size > 1 and not (np.all(steps > 0) or np.all(steps < 0)):
            raise StoreFormatError(f"coordinate {coord!r} is not strictly monotonic")
    crs = _find_crs(ds)
    days, calendar = _daily_numbers(ds["time"])
    if days.size == 0:
        raise StoreFormatError("dataset has no time steps")
    steps = np.diff(days)
    bad = np.flatnonzero(steps != 1)
    if bad.size:
        i = int(bad[0])
        dates = _date_table(days[i : i + 2], calendar)
        raise StoreFormatError(
            f"time is not daily and contiguous: {_iso(dates, 0)} is followed by {_iso(dates, 1)} "
            f"(step {int(steps[i])} days, calendar {calendar!r}); give one step per day without gaps or repeats"
        )
    first, last = int(days[0]), int(days[-1])
    plans = {}
    for v in variables:
        source = ds[v].transpose("y", "x", "time").data
        if not isinstance(source, da.Array):
            source = da.from_array(np.asarray(source), chunks=(-1, -1, min(days.size, 3653)))
        extra = {
            k: val
            for k, val in ds[v].attrs.items()
            if _json_scalar(val)
            and (k.startswith("wxshock_") or k in _KEPT_VARIABLE_ATTRS)
            and k != DAYS_ATTR
        }
        plans[v] = _VariablePlan(name=v, data=source, first=first, last=last, attrs=extra)
    latlon: dict[str, np.ndarray | None] = {LATITUDE: None, LONGITUDE: None}
    layers: dict[str, tuple[np.ndarray, dict[str, Any]]] = {}
    for key in (*ds.data_vars, *ds.coords):
        key = str(key)
        var = ds[key]
        if key in VARIABLES or key in ("x", "y", "time", GRID_MAPPING) or set(var.dims) != {"y", "x"}:
            continue
        values = np.asarray(var.transpose("y", "x").values)
        for role, names in _LATLON_NAMES.items():
            if key in names:
                latlon[role] = values.astype(np.float64)
                break
        else:
            if key in _STATIC_NAMES or key in ds.coords:
                continue
            attrs = {
                k: val
                for k, val in var.attrs.items()
                if _json_scalar(val) and k not in ("_FillValue", "grid_mapping")
            }
            if key == ELEVATION_LAYER:
                attrs.setdefault("units", "m")
                attrs.setdefault("standard_name", "surface_altitude")
            layers[key] = (values.astype(np.float32), attrs)
    grid = Grid.from_crs(crs, x, y)
    attrs = {
        k: val for k, val in ds.attrs.items() if _json_scalar(val) and k not in ("crs_wkt", FINGERPRINT_ATTR)
    }
    return _GridPlan(
        name=name,
        grid=grid,
        crs=crs,
        calendar=calendar,
        first=first,
        last=last,
        variables=plans,
        layers=layers,
        lat=latlon[LATITUDE],
        lon=latlon[LONGITUDE],
        attrs=attrs,
        dataset=ds,
    )


def _check_plans(plans: list[_GridPlan], store: Store | None = None) -> None:
    """Refuse data that cannot make one store: two calendars, a variable twice, one grid under two names;
    against an existing store, name each new grid."""
    calendars = {p.calendar for p in plans} | ({store.calendar} if store is not None else set())
    if len(calendars) > 1:
        have = f"the store's calendar is {store.calendar!r}, " if store is not None else ""
        raise StoreFormatError(
            f"one store holds one calendar: {have}the data come in {sorted(calendars)!r}; convert them to one"
        )
    seen: dict[str, str | None] = {}
    for p in plans:
        for v in p.variables:
            if v in seen:
                raise StoreFormatError(
                    f"variable {v!r} is given on two grids ({seen[v]!r} and {p.name!r}); give it once"
                )
            seen[v] = p.name
    taken = list(store.grids) if store is not None else []
    for i, p in enumerate(plans):
        for q in plans[:i]:
            if q.grid == p.grid:
                raise StoreFormatError(
                    f"grids {q.name!r} and {p.name!r} are the same grid; give their variables in one Dataset"
                )
        if store is not None:
            same = find_grid(store, p.grid)
            if p.name is None:
                p.name = same or default_grid_name(taken)
            elif p.name in store.grids and store.grids[p.name] != p.grid:
                raise StoreFormatError(
                    f"store {store.name!r} has a grid {p.name!r} that differs from the data's grid "
                    f"({_grid_text(store.grids[p.name])} against {_grid_text(p.grid)}); give the new grid another name"
                )
            elif p.name not in store.grids and same is not None:
                raise StoreFormatError(
                    f"the data lie on the store's grid {same!r}; name that grid (or none) instead of {p.name!r}"
                )
        elif p.name is None:
            p.name = default_grid_name(taken)
        taken.append(p.name)
    for p in plans:
        check_grid_name(p.name)


def _grid_text(grid: Grid) -> str:
    """A short description of a grid for messages."""
    return f"{grid.crs().name}, {grid.shape[0]} x {grid.shape[1]} cells from ({grid.x[0]:g}, {grid.y[0]:g})"


def _root_attrs(existing: Mapping[str, Any], plans: list[_GridPlan]) -> dict[str, Any]:
    """Root attributes: the store's own, updated by the data's (first Dataset wins among the new)."""
    attrs = {
        k: v
        for k, v in existing.items()
        if k not in (FINGERPRINT_ATTR, VERSION_ATTR, GRIDS_ATTR, "Conventions")
    }
    new: dict[str, Any] = {}
    for p in plans:
        for k, v in p.attrs.items():
            new.setdefault(k, v)
    attrs.update(new)
    return attrs


# --- writing a new store --------------------------------------------------------------------------------------


def _write_new(
    target: str,
    storage_options: dict | None,
    plans: list[_GridPlan],
    attrs: dict[str, Any],
    layout: Layout,
    progress: bool,
    purpose: str,
    *,
    extra_root: Mapping[str, Any] | None = None,
    before_swap: Callable[[str], None] | None = None,
) -> str:
    """Write a complete store aside from grid plans, finish it and swap it into place (lock held).

    ``before_swap(fingerprint)`` may refuse the new store by raising: the aside copy is then discarded."""
    if not _is_url(target):
        Path(target).parent.mkdir(parents=True, exist_ok=True)
    first = min(v.first for p in plans for v in p.variables.values())
    last = max(v.last for p in plans for v in p.variables.values())
    calendar = plans[0].calendar
    with write_aside(target, storage_options, purpose) as aside:
        group = zarr.open_group(_zarr_store(aside, storage_options, read_only=False), mode="w", zarr_format=3)
        group.attrs.update(
            {
                **attrs,
                **dict(extra_root or {}),
                "Conventions": "CF-1.10",
                VERSION_ATTR: LAYOUT_VERSION,
                GRIDS_ATTR: [p.name for p in plans],
            }
        )
        _write_time(group, np.arange(first, last + 1, dtype=np.int64), calendar)
        sources, targets, regions = [], [], []
        for p in plans:
            member = _create_grid(group, p, storage_options, aside)
            for v in p.variables.values():
                array = _create_daily(member, v, p, (len(p.grid.y), len(p.grid.x), last - first + 1), layout)
                src, region = _encoded_region(v, array, first)
                sources.append(src)
                targets.append(array)
                regions.append(region)
        _store_all(sources, targets, regions, "writing store" if progress else None)
        fingerprint = _finish(aside, storage_options, progress, touched=None)
        if before_swap is not None:
            before_swap(fingerprint)
    return fingerprint


def _write_time(group: zarr.Group, days: np.ndarray, calendar: str) -> zarr.Array:
    """The store's time axis at the root: int32 day numbers since 1970-01-01 in its calendar."""
    array = group.create_array(
        "time",
        shape=days.shape,
        dtype="int32",
        chunks=(TIME_COORD_CHUNK,),
        fill_value=0,
        dimension_names=("time",),
        attributes={"standard_name": "time", "axis": "T", "units": TIME_UNITS, "calendar": calendar},
        overwrite=True,
    )
    array[...] = days.astype(np.int32)
    return array


def _coordinate_attrs(crs: pyproj.CRS, axis: str) -> dict[str, Any]:
    """CF attributes of the x or y coordinate: longitude/latitude, rotated grid degrees, or projected units."""
    if is_lonlat_crs(crs):
        return (
            {"standard_name": "longitude", "units": "degrees_east", "axis": "X"}
            if axis == "x"
            else {"standard_name": "latitude", "units": "degrees_north", "axis": "Y"}
        )
    if crs.is_geographic:  # rotated pole (CF: grid_longitude, grid_latitude in degrees)
        return {
            "standard_name": f"grid_{'longitude' if axis == 'x' else 'latitude'}",
            "units": "degrees",
            "axis": axis.upper(),
        }
    unit = crs.axis_info[0].unit_name if crs.axis_info else "metre"
    units = {"metre": "m", "meter": "m", "kilometre": "km", "kilometer": "km"}.get(unit, unit)
    return {"standard_name": f"projection_{axis}_coordinate", "units": units, "axis": axis.upper()}


def _create_grid(
    group: zarr.Group, plan: _GridPlan, storage_options: dict | None, location: str
) -> zarr.Group:
    """A grid's group with its static arrays (x, y, crs, lat/lon, layers, an empty data mask), written by xarray
    so that they carry the CF encoding xarray reads back."""
    crs = plan.crs
    crs_attrs = {k: val for k, val in crs.to_cf().items() if _json_scalar(val)}
    crs_attrs["crs_wkt"] = crs.to_wkt()
    crs_attrs["spatial_ref"] = crs.to_wkt()
    ny, nx = plan.grid.shape
    data_vars: dict[str, Any] = {GRID_MAPPING: ((), np.int32(0), crs_attrs)}
    encoding: dict[str, dict[str, Any]] = {}
    for name, (values, attrs) in plan.layers.items():
        data_vars[name] = (("y", "x"), values, {**attrs, "grid_mapping": GRID_MAPPING})
        encoding[name] = {"dtype": "float32", "_FillValue": np.float32(np.nan), "chunks": (ny, nx)}
    if plan.lat is not None and plan.lon is not None:
        data_vars[LATITUDE] = (("y", "x"), plan.lat, {"standard_name": "latitude", "units": "degrees_north"})
        data_vars[LONGITUDE] = (("y", "x"), plan.lon, {"standard_name": "longitude", "units": "degrees_east"})
        for name in (LATITUDE, LONGITUDE):
            encoding[name] = {"chunks": (ny, nx)}
    coords = {
        "y": (("y",), plan.grid.y, _coordinate_attrs(crs, "y")),
        "x": (("x",), plan.grid.x, _coordinate_attrs(crs, "x")),
    }
    encoding["x"] = {"chunks": (nx,)}
    encoding["y"] = {"chunks": (ny,)}
    static = xr.Dataset(data_vars, coords=coords)
    static.to_zarr(
        _zarr_store(location, storage_options, read_only=False),
        group=plan.name,
        mode="w",
        encoding=encoding,
        zarr_format=3,
        consolidated=False,
    )
    member = group[plan.name]
    _write_mask(member, np.zeros((ny, nx), dtype=np.int8))
    return member


def _write_mask(member: zarr.Group, mask: np.ndarray) -> None:
    """A grid's data mask (int8, 1 where some variable of the grid has data on some day)."""
    array = member.create_array(
        MASK_LAYER,
        shape=mask.shape,
        dtype="int8",
        chunks=mask.shape,
        fill_value=0,
        dimension_names=("y", "x"),
        attributes={
            "long_name": "cell has data on at least one day",
            "flag_values": [0, 1],
            "flag_meanings": "no_data has_data",
            "grid_mapping": GRID_MAPPING,
        },
        overwrite=True,
    )
    array[...] = mask


def _daily_attrs(plan: _VariablePlan) -> dict[str, Any]:
    """A daily variable's attributes: ours (CF, encoding, the days it was given) and the kept extras."""
    attrs = dict(plan.attrs)
    attrs.update(VARIABLE_ATTRS[plan.name])
    attrs.update(
        {
            "scale_factor": SCALE_FACTOR,
            "add_offset": ADD_OFFSET,
            "grid_mapping": GRID_MAPPING,
            "_FillValue": FILL_VALUE,
            DAYS_ATTR: [int(plan.first), int(plan.last)],
        }
    )
    return attrs


def _create_daily(
    member: zarr.Group, plan: _VariablePlan, grid: _GridPlan, shape: tuple[int, int, int], layout: Layout
) -> zarr.Array:
    """An empty int16 daily array (every day missing) on a grid's group, chunked by the layout."""
    ny, nx, nt = shape
    chunks = layout.chunks(ny, nx, nt)
    shards = layout.shards(ny, nx, nt)
    return member.create_array(
        plan.name,
        shape=shape,
        dtype="int16",
        chunks=chunks,
        shards=shards,
        fill_value=np.int16(FILL_VALUE),
        compressors=[layout.codec()],
        dimension_names=("y", "x", "time"),
        attributes=_daily_attrs(plan),
        overwrite=True,
    )


def _encoded_region(plan: _VariablePlan, array: zarr.Array, axis_first: int) -> tuple[Any, tuple[slice, ...]]:
    """(int16 dask source, region) that writes a variable's days into its array, the source's blocks cut at the
    array's write units (shards or chunks) so that no two tasks write one unit."""
    start = plan.first - axis_first
    n = plan.last - plan.first + 1
    unit = array.shards or array.chunks
    cuts = _cuts(start, start + n, int(unit[2]))
    ny, nx = array.shape[:2]
    y_chunks = _cuts(0, ny, int(unit[0]))
    x_chunks = _cuts(0, nx, int(unit[1]))
    source = plan.data.rechunk((y_chunks, x_chunks, cuts))
    encoded = source.map_blocks(_encode_block, plan.name, dtype=np.int16)
    return encoded, (slice(None), slice(None), slice(start, start + n))


def _cuts(start: int, stop: int, unit: int) -> tuple[int, ...]:
    """Block lengths covering [start, stop) with boundaries at multiples of ``unit``."""
    sizes = []
    at = start
    while at < stop:
        nxt = min(stop, (at // unit + 1) * unit)
        sizes.append(nxt - at)
        at = nxt
    return tuple(sizes) or (0,)


def _store_all(sources: list[Any], targets: list[zarr.Array], regions: list[Any], desc: str | None) -> None:
    """Write dask sources into zarr regions, every write task finished before returning (see _compute_settled)."""
    if not sources:
        return
    import dask.array as da

    stored = da.store(sources, targets, regions=regions, lock=False, compute=False)
    _compute_settled(stored, desc)


def _compute_settled(collection: Any, desc: str | None) -> None:
    """Compute a dask write on threads of our own pool, and wait for every task to stop before returning.

    dask's threaded scheduler raises as soon as one task fails, while other tasks may still be writing
    chunks: the caller's clean-up could then remove the aside directory before those writes land (and
    they recreate it). Joining the pool first makes the clean-up final. ``desc`` shows a progress bar.
    """
    import dask
    import dask.threaded  # the scheduler given as a function, not "threads": see service.cluster.LOCAL_THREADS

    pool = ThreadPoolExecutor(max_workers=max(1, os.cpu_count() or 1))
    try:
        if desc is not None:
            with _TqdmCallback(desc):
                dask.compute(collection, scheduler=dask.threaded.get, pool=pool)
        else:
            dask.compute(collection, scheduler=dask.threaded.get, pool=pool)
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


class _TqdmCallback:
    """A dask callback that shows a tqdm bar over the tasks of one compute."""

    def __init__(self, desc: str) -> None:
        from dask.callbacks import Callback
        from tqdm.auto import tqdm

        bar: dict[str, Any] = {}

        def start_state(dsk: Any, state: dict) -> None:
            total = sum(len(state[k]) for k in ("ready", "waiting", "running", "finished") if k in state)
            bar["bar"] = tqdm(total=total, desc=desc, unit="task")

        def posttask(key: Any, result: Any, dsk: Any, state: Any, worker_id: Any) -> None:
            bar["bar"].update(1)

        def finish(dsk: Any, state: Any, errored: bool) -> None:
            bar["bar"].close()

        self._callback = Callback(start_state=start_state, posttask=posttask, finish=finish)

    def __enter__(self) -> _TqdmCallback:
        self._callback.__enter__()
        return self

    def __exit__(self, *exc: object) -> None:
        self._callback.__exit__(*exc)


# --- finishing: data masks, fingerprint, consolidated metadata ---------------------------------------------


def _finish(location: str, storage_options: dict | None, progress: bool, touched: set[str] | None) -> str:
    """Data masks of the grids ``touched`` (None: every grid), then the fingerprint, then consolidated
    metadata; returns the fingerprint. Daily arrays of untouched grids keep the digests recorded at the last
    write (their chunks were not written), so adding a grid or a layer does not re-read the whole store."""
    group = _open_group(location, storage_options, mode="r+")
    layout = read_layout(group, location)
    known = dict(group.attrs.get(DIGESTS_ATTR) or {})
    daily_known = {}
    if touched is not None:
        for v, g in layout.variables.items():
            path = layout.path(g, v)
            if g not in touched and path in known:
                daily_known[path] = known[path]
    rescan = StoreLayout(
        version=layout.version,
        grids=layout.grids,
        variables={v: g for v, g in layout.variables.items() if layout.path(g, v) not in daily_known},
    )
    masks, digests = scan_daily(group, rescan, progress)
    for grid, mask in masks.items():
        _write_mask(group[layout.grids[grid]], mask)
    digests.update(daily_known)
    from service.store.fingerprint import array_paths

    all_digests = {}
    for path in array_paths(group, layout):
        all_digests[path] = digests.get(path) or array_digest(group[path])
    group.attrs[DIGESTS_ATTR] = all_digests
    fingerprint = compute_fingerprint(group, progress=progress, digests=all_digests, location=location)
    group.attrs[FINGERPRINT_ATTR] = fingerprint
    with warnings.catch_warnings():
        # zarr notes that consolidated metadata is not yet in the v3 spec; xarray and zarr-python read it.
        warnings.simplefilter("ignore", category=UserWarning)
        zarr.consolidate_metadata(group.store)
    return fingerprint


# --- updating an existing store ------------------------------------------------------------------------------


@dataclass
class _Changes:
    """What an update does: the new time axis [first, last] day numbers, days appended to existing variables
    (name -> (grid plan, variable plan)), variables added (same), new grids, and layers to write."""

    axis: tuple[int, int]
    appended: dict[str, tuple[_GridPlan, _VariablePlan]] = field(default_factory=dict)
    added: dict[str, tuple[_GridPlan, _VariablePlan]] = field(default_factory=dict)
    new_grids: list[_GridPlan] = field(default_factory=list)
    layers: dict[str, tuple[dict[str, np.ndarray], dict[str, Any]]] = field(default_factory=dict)


def _open_for_update(target: str, storage_options: dict | None, progress: bool) -> Store:
    """The store to update (lock held), migrated to layout 2 first when it is a layout-1 store."""
    from service.store.location import _exists

    if not _exists(target, storage_options):
        raise StoreError(
            f"store {target!r} does not exist; create it with write_store (or 'wxshock ingest ... --out PATH')"
        )
    store = Store(target, storage_options=storage_options)
    if store.layout_version == 1:
        from service.store.migrate import _migrate_locked

        _migrate_locked(target, storage_options, progress)
        store = Store(target, storage_options=storage_options)
    return store


def _changes(store: Store, plans: list[_GridPlan]) -> _Changes:
    """Sort the plans' variables into appends and additions, checking the days of each."""
    numbers = store.day_numbers
    axis_first, axis_last = int(numbers[0]), int(numbers[-1])
    changes = _Changes(axis=(axis_first, axis_last))
    for p in plans:
        if p.name not in store.grids:
            changes.new_grids.append(p)
        for v, vp in p.variables.items():
            if v in store.variables:
                on = store.grid_of(v)
                if on != p.name:
                    raise StoreFormatError(
                        f"store {store.name!r} holds {v!r} on grid {on!r}; the new days are on grid {p.name!r} "
                        f"({_grid_text(p.grid)}); append them on the variable's own grid"
                    )
                span = store.coverage(v)
                last = int(numbers[span.stop - 1])
                if vp.first != last + 1:
                    raise StoreFormatError(
                        f"appending to store {store.name!r}: the new days of {v!r} must start the day after its "
                        f"last day ({_iso(store.dates, span.stop - 1)}, calendar {store.calendar!r}); they start "
                        f"{_iso(_date_table(np.array([vp.first]), p.calendar), 0)} (calendar {p.calendar!r})"
                    )
                changes.appended[v] = (p, vp)
            else:
                changes.added[v] = (p, vp)
            changes.axis = (min(changes.axis[0], vp.first), max(changes.axis[1], vp.last))
    return changes


def _apply(
    store: Store,
    target: str,
    storage_options: dict | None,
    plans: list[_GridPlan],
    changes: _Changes,
    progress: bool,
) -> str:
    """Carry out an update (lock held): in a hard-linked copy when the store is local and keeps its first day,
    else by rewriting the whole store with the changes."""
    if _is_url(target) or changes.axis[0] < int(store.day_numbers[0]):
        return _rewrite(store, target, storage_options, plans, changes, progress)
    with write_aside(target, storage_options, "updating") as aside:
        shutil.copytree(target, aside, copy_function=os.link)
        touched = _update_in_place(aside, store, plans, changes, progress)
        fingerprint = _finish(aside, storage_options, progress, touched=touched)
    return fingerprint


def _update_in_place(
    aside: str, store: Store, plans: list[_GridPlan], changes: _Changes, progress: bool
) -> set[str]:
    """Apply the changes to a hard-linked copy of a local store (zarr replaces files, never changes them, so the
    old store's chunks are untouched); returns the grids whose daily data changed."""
    group = zarr.open_group(_zarr_store(aside, None, read_only=False), mode="r+", zarr_format=3,
                            use_consolidated=False)  # fmt: skip
    layout = read_layout(group, aside)
    first, last = changes.axis
    n_old = store.n_times
    n_new = last - first + 1
    touched: set[str] = set()
    if n_new != n_old:
        time_array = group["time"]
        time_array.resize((n_new,))
        time_array[n_old:] = np.arange(first + n_old, last + 1, dtype=np.int32)
        for v, g in layout.variables.items():
            array = group[layout.path(g, v)]
            array.resize((*array.shape[:2], n_new))
            touched.add(g)
    sources, targets, regions = [], [], []
    for v, (p, vp) in changes.appended.items():
        array = group[layout.path(p.name, v)]
        attrs = dict(array.attrs.asdict())
        days = attrs.get(DAYS_ATTR) or [first, int(store.day_numbers[-1])]
        attrs.update({k: val for k, val in vp.attrs.items()})
        attrs[DAYS_ATTR] = [int(days[0]), int(vp.last)]
        array.attrs.put(attrs)
        src, region = _encoded_region(vp, array, first)
        sources.append(src)
        targets.append(array)
        regions.append(region)
        touched.add(p.name)
    layout_info = _layout_of(group)
    for p in changes.new_grids:
        _create_grid(group, p, None, aside)
        touched.add(p.name)
    for p, vp in changes.added.values():
        member = group[p.name]
        array = _create_daily(member, vp, p, (*p.grid.shape, n_new), layout_info)
        src, region = _encoded_region(vp, array, first)
        sources.append(src)
        targets.append(array)
        regions.append(region)
        touched.add(p.name)
    for name, (values, attrs) in changes.layers.items():
        for grid, array in values.items():
            _write_static(group[layout.grids[grid]] if layout.grids[grid] else group, name, array, attrs)
    if changes.new_grids:
        group.attrs[GRIDS_ATTR] = [*layout.grids, *(p.name for p in changes.new_grids)]
    root = _root_attrs(group.attrs.asdict(), plans)
    for k, val in root.items():
        if group.attrs.get(k) != val:
            group.attrs[k] = val
    _store_all(sources, targets, regions, "writing days" if progress else None)
    return touched


def _layout_of(group: zarr.Group) -> Layout:
    """The layout (chunking, sharding) of a store's first daily variable, for arrays added to it."""
    layout = read_layout(group, "store")
    v, g = next(iter(layout.variables.items()))
    return _array_layout(group[layout.path(g, v)])


def _array_layout(array: zarr.Array) -> Layout:
    """The layout (chunks, spatial and time shards) a daily (y, x, time) array was written with, to write more like
    it (service.store.layout.layout_of_array)."""
    return layout_of_array(array)


def _write_static(member: zarr.Group, name: str, values: np.ndarray, attrs: Mapping[str, Any]) -> None:
    """A 2-D float32 layer on a grid's group (NaN missing), as xarray would write it."""
    ny, nx = values.shape
    array = member.create_array(
        name,
        shape=(ny, nx),
        dtype="float32",
        chunks=(ny, nx),
        fill_value=np.float32(np.nan),
        dimension_names=("y", "x"),
        attributes={**dict(attrs), "grid_mapping": GRID_MAPPING, "_FillValue": "AAAAAAAA+H8="},
        overwrite=True,
    )
    array[...] = values.astype(np.float32)


def _rewrite(
    store: Store,
    target: str,
    storage_options: dict | None,
    plans: list[_GridPlan],
    changes: _Changes,
    progress: bool,
) -> str:
    """Rewrite a whole store with the changes (object stores; days before the store's first day)."""
    import dask.array as da

    grid_plans: dict[str, _GridPlan] = {}
    for name in store.grids:
        grid_plans[name] = _existing_grid_plan(store, name)
    for p in changes.new_grids:
        grid_plans[p.name] = _GridPlan(
            name=p.name, grid=p.grid, crs=p.crs, calendar=p.calendar, first=p.first, last=p.last,
            variables={}, layers=dict(p.layers), lat=p.lat, lon=p.lon, attrs={}, dataset=p.dataset,
        )  # fmt: skip
    for v, (p, vp) in changes.appended.items():
        old = grid_plans[p.name].variables[v]
        data = da.concatenate([old.data, vp.data], axis=2)
        grid_plans[p.name].variables[v] = _VariablePlan(
            name=v, data=data, first=old.first, last=vp.last, attrs={**old.attrs, **vp.attrs}
        )
    for v, (p, vp) in changes.added.items():
        grid_plans[p.name].variables[v] = vp
    for name, (values, attrs) in changes.layers.items():
        for grid, array in values.items():
            grid_plans[grid].layers[name] = (array, dict(attrs))
    root = _root_attrs(store._group.attrs.asdict(), plans)
    extra = {MIGRATED_ATTR: store.migrated_from} if store.migrated_from else None
    root.pop(MIGRATED_ATTR, None)
    root.pop(DIGESTS_ATTR, None)
    ordered = [grid_plans[name] for name in [*store.grids, *(p.name for p in changes.new_grids)]]
    layout = _layout_of(store._group)
    return _write_new(target, storage_options, ordered, root, layout, progress, "updating", extra_root=extra)


def _existing_grid_plan(store: Store, grid: str) -> _GridPlan:
    """A grid of an open store as a plan: its variables' given days as lazy decoded arrays, its static layers."""
    import dask.array as da

    g = store.grids[grid]
    crs = g.crs()
    variables = {}
    numbers = store.day_numbers
    for v in store.variables:
        if store.grid_of(v) != grid:
            continue
        array = store._var_arrays[v]
        span = store.coverage(v)
        raw = da.from_zarr(array)[:, :, span.start : span.stop]
        enc = store.encoding(v)
        values = raw.map_blocks(
            _decode_block, enc.scale_factor, enc.add_offset, enc.fill_value, dtype=np.float64
        )
        attrs = {
            k: val
            for k, val in array.attrs.asdict().items()
            if (k.startswith("wxshock_") or k in _KEPT_VARIABLE_ATTRS) and k != DAYS_ATTR
        }
        variables[v] = _VariablePlan(
            name=v, data=values, first=int(numbers[span.start]), last=int(numbers[span.stop - 1]), attrs=attrs
        )
    layers = {}
    for name in (
        *store.layers_on(grid),
        *([ELEVATION_LAYER] if ELEVATION_LAYER in store._grid_arrays[grid] else []),
    ):
        array = store._grid_arrays[grid][name]
        attrs = {
            k: val
            for k, val in array.attrs.asdict().items()
            if _json_scalar(val) and k not in ("_FillValue", "grid_mapping")
        }
        layers[name] = (np.asarray(array[:], dtype=np.float32), attrs)
    latlon = store.grid_lonlat(grid)
    return _GridPlan(
        name=grid, grid=g, crs=crs, calendar=store.calendar, first=int(numbers[0]), last=int(numbers[-1]),
        variables=variables, layers=layers, lat=latlon[0] if latlon else None, lon=latlon[1] if latlon else None,
        attrs={}, dataset=xr.Dataset(),
    )  # fmt: skip


def _decode_block(raw: np.ndarray, scale: float, offset: float, fill: int) -> np.ndarray:
    """Stored integers to float64 values, NaN where missing (for rewriting a store)."""
    values = raw.astype(np.float64) * scale + offset
    values[raw == fill] = np.nan
    return values
