"""Opening a store and reading it: the Store class, chunk-aware windows of cells over days, describe."""

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
from service.store.grids import Grid, _lonlat_bounds, _tidy
from service.store.layout import (
    _STATIC_NAMES,
    ELEVATION_LAYER,
    FILL_VALUE,
    FINGERPRINT_ATTR,
    GRID_MAPPING,
    MASK_LAYER,
    VARIABLES,
    RawEncoding,
    _check_layout,
    decode,
)
from service.store.location import _normalise_location, _open_group, _store_name, _zarr_store
from service.store.timeaxis import DateTable, _date_table, _iso, _time_index


class Store:
    """An opened dataset: grid, calendar, fingerprint, and chunk-aware reads of windows of cells over days.

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
        group = _open_group(self.location, self.storage_options)
        _check_layout(group, self.location)
        return group

    @cached_property
    def _arrays(self) -> dict[str, zarr.Array]:
        return {name: array for name, array in self._group.arrays()}

    def _array(self, name: str) -> zarr.Array:
        try:
            return self._arrays[name]
        except KeyError:
            raise StoreFormatError(f"store {self.name!r} has no array {name!r}") from None

    @cached_property
    def variables(self) -> tuple[str, ...]:
        """The daily variables present, in the order of VARIABLES."""
        return tuple(v for v in VARIABLES if v in self._arrays)

    @cached_property
    def layers(self) -> tuple[str, ...]:
        """Weight layers (2-D on (y, x)) such as population; elevation and data_mask are not weight layers."""
        names = []
        for name, array in sorted(self._arrays.items()):
            if name in VARIABLES or name in _STATIC_NAMES or name == ELEVATION_LAYER:
                continue
            if tuple(array.metadata.dimension_names or ()) == ("y", "x"):
                names.append(name)
        return tuple(names)

    @cached_property
    def has_elevation(self) -> bool:
        """True when the store carries an elevation layer (m)."""
        return ELEVATION_LAYER in self._arrays

    @cached_property
    def grid(self) -> Grid:
        """The grid: cell centres and CRS."""
        crs_wkt = str(self._array(GRID_MAPPING).attrs["crs_wkt"])
        return Grid(
            crs_wkt=crs_wkt,
            x=np.asarray(self._array("x")[:], dtype=np.float64),
            y=np.asarray(self._array("y")[:], dtype=np.float64),
            is_geographic=bool(pyproj.CRS.from_wkt(crs_wkt).is_geographic),
        )

    @cached_property
    def calendar(self) -> str:
        """The CF calendar of the time axis (standard, noleap, 360_day, ...)."""
        return str(self._array("time").attrs.get("calendar", "standard"))

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
    def _time_numbers(self) -> np.ndarray:
        return np.asarray(self._array("time")[:], dtype=np.int64)

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

    @cached_property
    def chunk_shape(self) -> tuple[int, int, int]:
        """(cy, cx, ct) of one read unit, in (y, x, time) order (the shard when the store is sharded)."""
        array = self._array(self.variables[0])
        unit = array.shards or array.chunks
        return (int(unit[0]), int(unit[1]), int(unit[2]))

    @cached_property
    def inner_chunk_shape(self) -> tuple[int, int, int]:
        """(cy, cx, ct) of one compressed chunk (inside a shard when sharded)."""
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
        """The units string of a variable or layer."""
        return str(self._array(var).attrs.get("units", ""))

    # -- reading --------------------------------------------------------------------------------------------

    def _check_variable(self, var: str) -> str:
        if var not in self.variables:
            raise StoreFormatError(
                f"store {self.name!r} has no daily variable {var!r}; it has {list(self.variables)!r}"
            )
        return var

    def read_raw(self, var: str, y: slice, x: slice, t: slice) -> np.ndarray:
        """(ny, nx, nt) stored integers of a window (index slices); fill_value marks missing."""
        array = self._array(self._check_variable(var))
        return np.asarray(array[y, x, t])

    def read(self, var: str, y: slice, x: slice, t: slice) -> np.ndarray:
        """(ny, nx, nt) float64 values of a window in the variable's units (degC, mm/day); NaN where missing."""
        enc = self.encoding(var)
        return decode(self.read_raw(var, y, x, t), enc)

    def read_layer(self, name: str) -> np.ndarray:
        """(ny, nx) float64 static layer ("elevation" or a weight layer), NaN where missing."""
        if name not in self.layers and name != ELEVATION_LAYER or name not in self._arrays:
            available = list(self.layers) + ([ELEVATION_LAYER] if self.has_elevation else [])
            raise StoreFormatError(f"store {self.name!r} has no layer {name!r}; it has {available!r}")
        values = np.asarray(self._array(name)[:], dtype=np.float64)
        return values

    def data_mask(self) -> np.ndarray:
        """(ny, nx) bool: True where the cell has data on at least one day (computed when the store was written)."""
        return np.asarray(self._array(MASK_LAYER)[:]) > 0

    def to_xarray(self) -> xr.Dataset:
        """The store as a lazy, CF-decoded xarray Dataset (dims y, x, time)."""
        return xr.open_zarr(
            _zarr_store(self.location, self.storage_options, read_only=True),
            consolidated=None,
            zarr_format=3,
            chunks={},
        )

    def describe(self) -> dict[str, Any]:
        """What the store holds, JSON-ready: variables and units, CRS, resolution, bounds, time, layers, chunks."""
        grid = self.grid
        crs = grid.crs()
        dates = self.dates
        xmin, ymin, xmax, ymax = grid.bounds()
        unit = "degree" if grid.is_geographic else (crs.axis_info[0].unit_name if crs.axis_info else "metre")
        variables = {
            v: {
                "units": self.units(v),
                "standard_name": str(self._array(v).attrs.get("standard_name", "")),
                "cell_methods": str(self._array(v).attrs.get("cell_methods", "")),
                "storage_precision": self.encoding(v).scale_factor,
            }
            for v in self.variables
        }
        lonlat = _lonlat_bounds(grid)
        epsg = crs.to_epsg()
        return {
            "name": self.name,
            "location": self.location,
            "title": str(self._group.attrs.get("title", "")),
            "variables": variables,
            "crs": {"name": crs.name, "epsg": epsg, "is_geographic": grid.is_geographic, "wkt": grid.crs_wkt},
            "shape": {"y": grid.shape[0], "x": grid.shape[1], "time": self.n_times},
            "resolution": {"x": _tidy(grid.resolution[0]), "y": _tidy(grid.resolution[1]), "units": unit},
            "bounds": {"xmin": xmin, "ymin": ymin, "xmax": xmax, "ymax": ymax},
            "lonlat_bounds": lonlat,
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
            "cells_with_data": int(self.data_mask().sum()),
            "fingerprint": self.fingerprint,
            "chunks": {"y": self.chunk_shape[0], "x": self.chunk_shape[1], "time": self.chunk_shape[2]},
            "inner_chunks": {
                "y": self.inner_chunk_shape[0],
                "x": self.inner_chunk_shape[1],
                "time": self.inner_chunk_shape[2],
            },
        }


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
    """Open a wxshock store (local directory or s3:// URL) and check its layout; cheap (metadata only)."""
    store = Store(location, name=name, storage_options=storage_options)
    store.grid  # noqa: B018 - open now, so that a missing or foreign store fails here with a clear error
    store.fingerprint  # noqa: B018
    return store
