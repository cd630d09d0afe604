"""Opening a store and reading it: the Store class, chunk-aware windows of cells over days, describe.

A store holds one or more grids (layout 2: one zarr group per grid; layout 1: one grid at the root, read as the
grid named ``grid``) and one time axis. Each daily variable lies on one grid and spans the whole time axis; the
days it was given are recorded (``Store.coverage``), and its other days read as missing.
"""

from __future__ import annotations

import json
import threading
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyproj
import xarray as xr
import zarr

from service.errors import StoreFormatError
from service.store.chunks import ChunkReader, tile_cache
from service.store.grids import Grid, _lonlat_bounds, _tidy, is_lonlat_crs
from service.store.layout import (
    _STATIC_NAMES,
    DAYS_ATTR,
    DIGESTS_ATTR,
    ELEVATION_LAYER,
    FILL_VALUE,
    FINGERPRINT_ATTR,
    GRID_MAPPING,
    GRIDS_ATTR,
    LATITUDE,
    LONGITUDE,
    MASK_LAYER,
    MIGRATED_ATTR,
    VARIABLES,
    VERSION_ATTR,
    RawEncoding,
    StoreLayout,
    decode,
    read_layout,
)
from service.store.location import _normalise_location, _open_group, _store_name, _zarr_store
from service.store.timeaxis import DateTable, _date_table, _iso, _time_index


class Store:
    """An opened dataset: grids, calendar, fingerprint, and chunk-aware reads of windows of cells over days.

    Picklable: it pickles as (location, name, storage_options) and reopens lazily where it is unpickled, so that
    dask tasks on other processes or machines can read chunks themselves.
    """

    def __init__(
        self, location: str | Path, name: str | None = None, storage_options: dict | None = None
    ) -> None:
        self.location: str = _normalise_location(location)
        self.name: str = name or _store_name(self.location)
        self.storage_options: dict | None = dict(storage_options) if storage_options else None

    def __reduce__(self) -> tuple[Any, tuple[str, str, dict | None, str | None]]:
        # Unpickled once per dask task on a worker: _reopened keeps one opened Store per process instead of
        # reopening the zarr group (about 40 ms) in every task. The fingerprint, when already read, is part
        # of the key, so a store rewritten in place is not served from a stale handle.
        return (_reopened, (self.location, self.name, self.storage_options, self.__dict__.get("fingerprint")))

    def __repr__(self) -> str:
        return f"Store(name={self.name!r}, location={self.location!r})"

    # -- metadata -------------------------------------------------------------------------------------------

    @cached_property
    def _group(self) -> zarr.Group:
        return _open_group(self.location, self.storage_options)

    @cached_property
    def _layout(self) -> StoreLayout:
        return read_layout(self._group, self.location)

    @cached_property
    def _grid_arrays(self) -> dict[str, dict[str, zarr.Array]]:
        """Every grid's arrays by name (layout 1: the root's arrays, less the time axis)."""
        out: dict[str, dict[str, zarr.Array]] = {}
        for grid, prefix in self._layout.grids.items():
            member = self._group[prefix] if prefix else self._group
            out[grid] = {name: array for name, array in member.arrays() if name != "time" or prefix}
        return out

    @cached_property
    def _var_arrays(self) -> dict[str, zarr.Array]:
        """The array of each daily variable (the read path looks here once per chunk)."""
        return {v: self._grid_arrays[g][v] for v, g in self._layout.variables.items()}

    @cached_property
    def _time_array(self) -> zarr.Array:
        return self._group["time"]

    def _array(self, name: str, grid: str | None = None) -> zarr.Array:
        """A daily variable's array, or a static array of a grid (the only grid when ``grid`` is None)."""
        if name in self._var_arrays and grid is None:
            return self._var_arrays[name]
        arrays = self._grid_arrays[self._grid_name(grid)]
        try:
            return arrays[name]
        except KeyError:
            raise StoreFormatError(f"store {self.name!r} has no array {name!r}") from None

    @property
    def layout_version(self) -> int:
        """1 (one grid at the root, written before several grids were possible) or 2 (one group per grid)."""
        return self._layout.version

    @cached_property
    def variables(self) -> tuple[str, ...]:
        """The daily variables present, in the order of VARIABLES."""
        return tuple(self._layout.variables)

    @cached_property
    def variable_grids(self) -> dict[str, str]:
        """The grid of each daily variable."""
        return dict(self._layout.variables)

    def grid_of(self, var: str) -> str:
        """The name of the grid that daily variable ``var`` lies on."""
        return self._layout.variables[self._check_variable(var)]

    @cached_property
    def grids(self) -> dict[str, Grid]:
        """Every grid by name, the main grid first: cell centres and CRS (2-D lat/lon: :meth:`grid_lonlat`)."""
        out = {}
        for name, arrays in self._grid_arrays.items():
            crs_wkt = str(arrays[GRID_MAPPING].attrs["crs_wkt"])
            out[name] = Grid(
                crs_wkt=crs_wkt,
                x=np.asarray(arrays["x"][:], dtype=np.float64),
                y=np.asarray(arrays["y"][:], dtype=np.float64),
                is_geographic=bool(pyproj.CRS.from_wkt(crs_wkt).is_geographic),
            )
        return out

    def _grid_name(self, grid: str | None) -> str:
        """A grid name checked against the store; None names the only grid (an error when there are several)."""
        names = list(self._layout.grids)
        if grid is None:
            if len(names) > 1:
                raise StoreFormatError(
                    f"store {self.name!r} has {len(names)} grids ({', '.join(names)}); name the grid "
                    "(Store.grids, Store.grid_of(variable))"
                )
            return names[0]
        if grid not in self._layout.grids:
            raise StoreFormatError(f"store {self.name!r} has no grid {grid!r}; it has {names!r}")
        return grid

    @property
    def grid(self) -> Grid:
        """The grid of a single-grid store (StoreFormatError naming the grids when there are several)."""
        return self.grids[self._grid_name(None)]

    @property
    def main_grid(self) -> str:
        """The name of the first grid (the only one in a single-grid store)."""
        return next(iter(self._layout.grids))

    def grid_lonlat(self, grid: str | None = None) -> tuple[np.ndarray, np.ndarray] | None:
        """(lat, lon) (ny, nx) cell-centre degrees a grid carries from its source files, or None."""
        arrays = self._grid_arrays[self._grid_name(grid)]
        if LATITUDE not in arrays or LONGITUDE not in arrays:
            return None
        return (
            np.asarray(arrays[LATITUDE][:], dtype=np.float64),
            np.asarray(arrays[LONGITUDE][:], dtype=np.float64),
        )

    def layers_on(self, grid: str | None = None) -> tuple[str, ...]:
        """Weight layers (2-D on (y, x)) of one grid, such as population; not elevation, data_mask, lat, lon."""
        names = []
        for name, array in sorted(self._grid_arrays[self._grid_name(grid)].items()):
            if name in VARIABLES or name in _STATIC_NAMES or name == ELEVATION_LAYER:
                continue
            if tuple(array.metadata.dimension_names or ()) == ("y", "x"):
                names.append(name)
        return tuple(names)

    @cached_property
    def layers(self) -> tuple[str, ...]:
        """Weight layers present on every grid (usable in a request whichever grids it reads)."""
        common: set[str] | None = None
        for grid in self._layout.grids:
            here = set(self.layers_on(grid))
            common = here if common is None else common & here
        return tuple(sorted(common or ()))

    @cached_property
    def has_elevation(self) -> bool:
        """True when every grid of the store carries an elevation layer (m)."""
        return all(ELEVATION_LAYER in arrays for arrays in self._grid_arrays.values())

    @cached_property
    def calendar(self) -> str:
        """The CF calendar of the time axis (standard, noleap, 360_day, ...)."""
        return str(self._time_array.attrs.get("calendar", "standard"))

    @cached_property
    def fingerprint(self) -> str:
        """The fingerprint recorded when the store was written ('sha256:<hex>')."""
        value = self._group.attrs.get(FINGERPRINT_ATTR)
        if not value:
            raise StoreFormatError(
                f"store {self.name!r} carries no {FINGERPRINT_ATTR}; rewrite it with wxshock"
            )
        return str(value)

    @cached_property
    def migrated_from(self) -> dict[str, Any] | None:
        """{"layout_version", "fingerprint"} of the store this one was migrated from, or None."""
        value = self._group.attrs.get(MIGRATED_ATTR)
        return dict(value) if isinstance(value, dict) else None

    @cached_property
    def _time_numbers(self) -> np.ndarray:
        return np.asarray(self._time_array[:], dtype=np.int64)

    @property
    def day_numbers(self) -> np.ndarray:
        """(time,) int64 day numbers (days since 1970-01-01 in the store's calendar) of the time axis."""
        return self._time_numbers

    @property
    def n_times(self) -> int:
        """Number of daily time steps."""
        return int(self._time_numbers.size)

    @cached_property
    def dates(self) -> DateTable:
        """Year, month, day and day of year of every time step, in the store's calendar."""
        return _date_table(self._time_numbers, self.calendar)

    @cached_property
    def times(self) -> pd.Index:
        """The decoded time axis: a DatetimeIndex for the standard calendar, else an xarray CFTimeIndex."""
        return _time_index(self._time_numbers, self.calendar)

    def coverage(self, var: str) -> slice:
        """The time steps [start, stop) that daily variable ``var`` was given (its other days read as missing)."""
        array = self._array(self._check_variable(var))
        days = array.attrs.get(DAYS_ATTR)
        if not days:
            return slice(0, self.n_times)
        first, last = int(days[0]), int(days[1])
        start = int(np.searchsorted(self._time_numbers, first, side="left"))
        stop = int(np.searchsorted(self._time_numbers, last, side="right"))
        return slice(start, stop)

    def chunk_shape_of(self, var: str) -> tuple[int, int, int]:
        """(cy, cx, ct) of one read unit of a daily variable: its compressed chunk, the piece decoded whole
        (inside its shard when sharded, so that a small community decodes only the chunks it touches; the
        measurement is in bench/RESULTS.md, "Store layouts for on-demand reads")."""
        chunks = self._array(self._check_variable(var)).chunks
        return (int(chunks[0]), int(chunks[1]), int(chunks[2]))

    def storage_shape_of(self, var: str) -> tuple[int, int, int]:
        """(sy, sx, st) of one stored object of a daily variable (the shard when sharded, else the chunk)."""
        array = self._array(self._check_variable(var))
        unit = array.shards or array.chunks
        return (int(unit[0]), int(unit[1]), int(unit[2]))

    @cached_property
    def chunk_shape(self) -> tuple[int, int, int]:
        """(cy, cx, ct) of one read unit (compressed chunk) of the first variable, in (y, x, time) order."""
        return self.chunk_shape_of(self.variables[0])

    @cached_property
    def inner_chunk_shape(self) -> tuple[int, int, int]:
        """(cy, cx, ct) of one compressed chunk of the first variable (inside a shard when sharded)."""
        chunks = self._array(self.variables[0]).chunks
        return (int(chunks[0]), int(chunks[1]), int(chunks[2]))

    def encoding(self, var: str) -> RawEncoding:
        """The integer encoding of a daily variable."""
        attrs = self._array(self._check_variable(var)).attrs
        return RawEncoding(
            scale_factor=float(attrs.get("scale_factor", 1.0)),
            add_offset=float(attrs.get("add_offset", 0.0)),
            fill_value=int(attrs.get("_FillValue", FILL_VALUE)),
        )

    def units(self, var: str) -> str:
        """The units string of a daily variable (or, in a single-grid store, of a layer)."""
        return str(self._array(var).attrs.get("units", ""))

    # -- reading --------------------------------------------------------------------------------------------

    def _check_variable(self, var: str) -> str:
        if var not in self._var_arrays:
            raise StoreFormatError(
                f"store {self.name!r} has no daily variable {var!r}; it has {list(self.variables)!r}"
            )
        return var

    @cached_property
    def _chunk_readers(self) -> dict[str, ChunkReader | None]:
        """Each daily variable's direct chunk reader (service.store.chunks), None where zarr must read it."""
        return {v: ChunkReader.for_array(a, cache=tile_cache()) for v, a in self._var_arrays.items()}

    def read_raw(
        self, var: str, y: slice, x: slice, t: slice, *, cached: bool = True, scratch: bool = False
    ) -> np.ndarray:
        """(ny, nx, nt) stored integers of a window (index slices on the variable's grid); fill_value marks
        missing (so do the days outside the variable's coverage). ``cached`` False reads around the process's
        decoded-tile cache (a job's one pass over many chunks, which would only push out the chunks that
        on-demand requests reuse).

        May be a read-only view of a decoded chunk: copy before writing into it. With ``scratch`` True it may be a
        view of this thread's scratch memory, valid only until the thread's next scratch read: for a caller that
        uses the values at once and keeps nothing of them (the aggregation's chunk tasks).
        """
        reader = self._chunk_readers.get(var)
        if reader is not None:
            return reader.read(y, x, t, cached=cached, scratch=scratch)
        try:
            array = self._var_arrays[var]
        except KeyError:
            self._check_variable(var)
            raise
        return np.asarray(array[y, x, t])

    def read(self, var: str, y: slice, x: slice, t: slice) -> np.ndarray:
        """(ny, nx, nt) float64 values of a window in the variable's units (degC, mm/day); NaN where missing."""
        enc = self.encoding(var)
        return decode(self.read_raw(var, y, x, t), enc)

    def read_layer(self, name: str, grid: str | None = None) -> np.ndarray:
        """(ny, nx) float64 static layer ("elevation" or a weight layer) of a grid, NaN where missing."""
        grid = self._grid_name(grid)
        arrays = self._grid_arrays[grid]
        if name not in self.layers_on(grid) and name != ELEVATION_LAYER or name not in arrays:
            available = list(self.layers_on(grid)) + ([ELEVATION_LAYER] if ELEVATION_LAYER in arrays else [])
            where = (
                f"store {self.name!r}"
                if len(self._layout.grids) == 1
                else f"grid {grid!r} of store {self.name!r}"
            )
            raise StoreFormatError(f"{where} has no layer {name!r}; it has {available!r}")
        return np.asarray(arrays[name][:], dtype=np.float64)

    def data_mask(self, grid: str | None = None) -> np.ndarray:
        """(ny, nx) bool of a grid: True where some variable of the grid has data on some day (computed when the
        store was written)."""
        return np.asarray(self._grid_arrays[self._grid_name(grid)][MASK_LAYER][:]) > 0

    def to_xarray(self, grid: str | None = None) -> xr.Dataset:
        """One grid of the store as a lazy, CF-decoded xarray Dataset (dims y, x, time; time from the root)."""
        grid = self._grid_name(grid)
        prefix = self._layout.grids[grid]
        ds = xr.open_zarr(
            _zarr_store(self.location, self.storage_options, read_only=True),
            group=prefix or None,
            consolidated=None,
            zarr_format=3,
            chunks={},
        )
        if prefix:
            ds = ds.assign_coords(time=("time", np.asarray(self.times)))
            ds.attrs = {
                k: v
                for k, v in self._group.attrs.asdict().items()
                if k not in (FINGERPRINT_ATTR, MIGRATED_ATTR, DIGESTS_ATTR, GRIDS_ATTR, VERSION_ATTR)
            }
        return ds

    # -- description ----------------------------------------------------------------------------------------

    def describe_grid(self, grid: str) -> dict[str, Any]:
        """One grid, JSON-ready: CRS, kind of coordinates, shape, resolution, bounds in CRS units, its outline's
        longitude-latitude box, layers, cells with data, chunks, and the variables on it."""
        g = self.grids[self._grid_name(grid)]
        crs = g.crs()
        arrays = self._grid_arrays[grid]
        xmin, ymin, xmax, ymax = g.bounds()
        if is_lonlat_crs(crs):
            kind, unit = "longitude-latitude", "degree"
        elif crs.is_geographic:  # a derived geographic CRS: CF's rotated pole is the one in use
            kind, unit = "rotated", "degree"
        else:
            kind = "projected"
            unit = crs.axis_info[0].unit_name if crs.axis_info else "metre"
        lonlat = self.grid_lonlat(grid)
        outline = Grid(g.crs_wkt, g.x, g.y, g.is_geographic, lat=lonlat[0], lon=lonlat[1]) if lonlat else g
        variables = [v for v, on in self._layout.variables.items() if on == grid]
        first = variables[0]
        unit_shape = self.storage_shape_of(first)
        inner = self._var_arrays[first].chunks
        return {
            "crs": {
                "name": crs.name,
                "epsg": crs.to_epsg(),
                "is_geographic": is_lonlat_crs(crs),  # x and y are longitude and latitude
                "wkt": g.crs_wkt,
            },
            "coordinates": kind,
            "shape": {"y": g.shape[0], "x": g.shape[1]},
            "resolution": {"x": _tidy(g.resolution[0]), "y": _tidy(g.resolution[1]), "units": unit},
            "bounds": {"xmin": xmin, "ymin": ymin, "xmax": xmax, "ymax": ymax},
            "lonlat_bounds": _lonlat_bounds(outline),
            "has_2d_latlon": lonlat is not None,
            "variables": variables,
            "layers": list(self.layers_on(grid)),
            "elevation": ELEVATION_LAYER in arrays,
            "cells_with_data": int(self.data_mask(grid).sum()),
            "chunks": {"y": unit_shape[0], "x": unit_shape[1], "time": unit_shape[2]},
            "inner_chunks": {"y": int(inner[0]), "x": int(inner[1]), "time": int(inner[2])},
        }

    def describe(self) -> dict[str, Any]:
        """What the store holds, JSON-ready: every grid (``grids``), the variables with their grid and days, the
        time axis, layers and fingerprint. The top-level crs, shape, resolution, bounds, lonlat_bounds,
        cells_with_data and chunks are those of the main (first) grid; ``layers`` are those on every grid."""
        dates = self.dates
        grids = {name: self.describe_grid(name) for name in self._layout.grids}
        main = grids[self.main_grid]
        variables = {}
        for v in self.variables:
            attrs = self._var_arrays[v].attrs
            span = self.coverage(v)
            variables[v] = {
                "units": self.units(v),
                "standard_name": str(attrs.get("standard_name", "")),
                "cell_methods": str(attrs.get("cell_methods", "")),
                "storage_precision": self.encoding(v).scale_factor,
                "grid": self.grid_of(v),
                "start": _iso(dates, span.start) if span.stop > span.start else None,
                "end": _iso(dates, span.stop - 1) if span.stop > span.start else None,
            }
        out = {
            "name": self.name,
            "location": self.location,
            "title": str(self._group.attrs.get("title", "")),
            "layout_version": self.layout_version,
            "variables": variables,
            "grids": grids,
            "crs": main["crs"],
            "shape": {**main["shape"], "time": self.n_times},
            "resolution": main["resolution"],
            "bounds": main["bounds"],
            "lonlat_bounds": main["lonlat_bounds"],
            "time": {
                "start": _iso(dates, 0),
                "end": _iso(dates, len(dates) - 1),
                "days": len(dates),
                "calendar": self.calendar,
            },
            "years": [int(dates.year[0]), int(dates.year[-1])],
            "calendar": self.calendar,
            "layers": list(self.layers),
            "elevation": self.has_elevation,
            "cells_with_data": main["cells_with_data"],
            "fingerprint": self.fingerprint,
            "chunks": {**main["chunks"]},
            "inner_chunks": {**main["inner_chunks"]},
        }
        if self.migrated_from is not None:
            out["migrated_from"] = self.migrated_from
        notes = {k: v for k, v in self._group.attrs.asdict().items() if k.startswith("wxshock_note")}
        if notes:
            out["notes"] = notes
        return out


_REOPENED: dict[tuple[str, str, str, str | None], Store] = {}
_REOPENED_LOCK = threading.Lock()
_REOPENED_MAX = 16


def _reopened(location: str, name: str, storage_options: dict | None, fingerprint: str | None) -> Store:
    """The Store an unpickled task reads from: one per process and (location, name, options, fingerprint)."""
    key = (location, name, json.dumps(storage_options, sort_keys=True, default=str), fingerprint)
    with _REOPENED_LOCK:
        store = _REOPENED.get(key)
        if store is None:
            if len(_REOPENED) >= _REOPENED_MAX:
                _REOPENED.pop(next(iter(_REOPENED)))
            store = _REOPENED[key] = Store(location, name=name, storage_options=storage_options)
        return store


def open_store(location: str | Path, name: str | None = None, storage_options: dict | None = None) -> Store:
    """Open a wxshock store (local directory or s3:// URL) and check its layout; cheap (metadata only).

    A swap that a crash interrupted is finished first, and stale aside directories of failed writes are removed
    (see service.store.swap), when the store's directory is writable.
    """
    from service.store.swap import recover

    store = Store(location, name=name, storage_options=storage_options)
    recover(store.location, store.storage_options)
    store._layout  # noqa: B018 - open now, so that a missing or foreign store fails here with a clear error
    store.grids  # noqa: B018
    store.fingerprint  # noqa: B018
    return store
