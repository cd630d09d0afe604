"""The daily-grid store: one zarr v3 store per dataset, written, opened, described, read and fingerprinted here.

Layout of a store (plain CF, opened as is by ``xarray.open_zarr``):

- ``tmax``, ``tmin`` (degC) and ``prcp`` (mm/day) on dims ``(y, x, time)``: int16 at 0.1 units
  (``scale_factor`` 0.1, ``add_offset`` 0, ``_FillValue`` -32768 = missing), blosc-compressed;
- 1-D coordinates ``y``, ``x`` (cell centres, degrees or metres) and ``time`` (int32 days since 1970-01-01 in the
  store's calendar: ``standard``, ``noleap``/``365_day``, ``360_day``, ...);
- ``crs``: the CF grid_mapping variable (``crs_wkt`` and pyproj's CF attributes), named by every data variable;
- static 2-D layers on ``(y, x)`` as float32 with NaN missing: ``elevation`` (m), weight layers (``population``,
  ``cropland``, ...) and ``data_mask`` (int8, 1 where a cell has data on at least one day), written at write time so
  that it is cheap to read;
- root attributes: ``wxshock_fingerprint`` (``sha256:<hex>``), a hash over the metadata and the decoded contents of
  every chunk, recorded at write time and checked by :func:`verify_store`.

Nothing else in the project opens zarr: every other module goes through :func:`open_store` and :class:`Store`.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import threading
import uuid
import warnings
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import cached_property
from itertools import product
from pathlib import Path
from typing import Any, Literal

import cftime
import numpy as np
import pandas as pd
import pyproj
import xarray as xr
import zarr
from zarr.codecs import BloscCodec, BloscShuffle

from service.errors import StoreError, StoreFormatError

VARIABLES = ("tmax", "tmin", "prcp")  # degC, degC, mm/day

VARIABLE_ATTRS: dict[str, dict[str, str]] = {
    "tmax": {
        "long_name": "daily maximum near-surface air temperature",
        "standard_name": "air_temperature",
        "units": "degC",
        "cell_methods": "time: maximum",
    },
    "tmin": {
        "long_name": "daily minimum near-surface air temperature",
        "standard_name": "air_temperature",
        "units": "degC",
        "cell_methods": "time: minimum",
    },
    "prcp": {
        "long_name": "daily precipitation (liquid water equivalent)",
        "standard_name": "lwe_precipitation_rate",
        "units": "mm/day",
        "cell_methods": "time: mean",
    },
}

# Storage precision: 0.1 degC and 0.1 mm/day, well below what station networks resolve.
SCALE_FACTOR = 0.1
ADD_OFFSET = 0.0
FILL_VALUE = -32768  # int16 minimum: never a real value at 0.1 units
_INT16_MIN, _INT16_MAX = -32767, 32767

# Store layout, chosen by measurement (bench/bench_store_layout.py; figures in bench/RESULTS.md, "Store layout"):
# one variable of 256 x 256 cells x 41 years on our 2-core machine. Tiles of 32 x 32 cells with time fastest
# (dims y, x, time) serve both workloads; decade-long chunks read 5 cells x 41 years in 18 ms (whole-time tiles
# 56 ms), make a full pass at the bare blosc decode speed (1.81 s CPU against 1.77 s), and append a year in 2.3 s
# (whole-time chunks: 15.3 s, as every chunk is rewritten; decade chunks in 4-decade shards: 3.8 s). blosc lz4
# with byte shuffle decodes 2.3x faster than zstd level 1 for 9 % (tmax) to 35 % (prcp) more disk.
TILE_CELLS = 32
TIME_CHUNK_DAYS = 3653  # ten years (with their leap days) per chunk
COMPRESSOR_NAME = "lz4"
COMPRESSOR_LEVEL = 5

TIME_UNITS = "days since 1970-01-01"
TIME_COORD_CHUNK = 36_525  # a century of day numbers per chunk of the time coordinate, however long the store
LAYOUT_VERSION = 1
FINGERPRINT_ATTR = "wxshock_fingerprint"
MASK_LAYER = "data_mask"
ELEVATION_LAYER = "elevation"
GRID_MAPPING = "crs"
_STATIC_NAMES = {MASK_LAYER, GRID_MAPPING, "x", "y", "time"}
_DEFAULT_CALENDARS = ("standard", "gregorian", "proleptic_gregorian")


# --- small value types ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Grid:
    """The store's grid: cell centres as 1-D arrays in the grid's CRS (degrees or metres)."""

    crs_wkt: str
    x: np.ndarray
    y: np.ndarray
    is_geographic: bool

    @property
    def shape(self) -> tuple[int, int]:
        """(ny, nx) cells."""
        return (len(self.y), len(self.x))

    @property
    def x_edges(self) -> np.ndarray:
        """(nx + 1,) cell edges along x, in the order of ``x``."""
        return _edges(self.x)

    @property
    def y_edges(self) -> np.ndarray:
        """(ny + 1,) cell edges along y, in the order of ``y`` (descending when the grid is north-up)."""
        return _edges(self.y)

    @property
    def resolution(self) -> tuple[float, float]:
        """(dx, dy) mean absolute cell size in CRS units."""
        return (_mean_step(self.x), _mean_step(self.y))

    def crs(self) -> pyproj.CRS:
        """The grid's CRS as a pyproj object."""
        return pyproj.CRS.from_wkt(self.crs_wkt)

    def bounds(self) -> tuple[float, float, float, float]:
        """(xmin, ymin, xmax, ymax) of the outer cell edges, in CRS units."""
        xe, ye = self.x_edges, self.y_edges
        return (float(xe.min()), float(ye.min()), float(xe.max()), float(ye.max()))

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Grid):
            return NotImplemented
        return (
            self.crs() == other.crs()
            and self.x.shape == other.x.shape
            and self.y.shape == other.y.shape
            and bool(np.allclose(self.x, other.x, rtol=0, atol=1e-9 * max(1.0, float(np.abs(self.x).max()))))
            and bool(np.allclose(self.y, other.y, rtol=0, atol=1e-9 * max(1.0, float(np.abs(self.y).max()))))
        )

    def __hash__(self) -> int:
        # equality allows float noise in the centres, so the hash looks only at what equal grids share exactly
        return hash((self.x.size, self.y.size))


@dataclass(frozen=True)
class DateTable:
    """The calendar date of every time step in the store's calendar (all (time,) int arrays; dayofyear 1-based)."""

    year: np.ndarray
    month: np.ndarray
    day: np.ndarray
    dayofyear: np.ndarray

    def __len__(self) -> int:
        return len(self.year)


@dataclass(frozen=True)
class RawEncoding:
    """How stored integers become values: value = raw * scale_factor + add_offset; raw == fill_value is missing."""

    scale_factor: float
    add_offset: float
    fill_value: int


@dataclass(frozen=True)
class VerifyResult:
    """The fingerprint recorded at write time against the one recomputed from the store's contents now."""

    recorded: str | None
    computed: str
    ok: bool


# --- opening ----------------------------------------------------------------------------------------------------


def _is_url(location: str) -> bool:
    """True for fsspec URLs such as s3://bucket/path (anything with a scheme other than file)."""
    return "://" in location and not location.startswith("file://")


def _normalise_location(location: str | Path) -> str:
    """A location as a string: URLs unchanged (trailing slash dropped), local paths absolute."""
    text = str(location)
    if _is_url(text):
        return text.rstrip("/")
    if text.startswith("file://"):
        text = text[len("file://") :]
    return str(Path(text).expanduser().absolute())


def _zarr_store(location: str, storage_options: dict | None, *, read_only: bool) -> Any:
    """The zarr store object behind a location (LocalStore or FsspecStore)."""
    if _is_url(location):
        from zarr.storage import FsspecStore

        return FsspecStore.from_url(
            location, storage_options=dict(storage_options or {}), read_only=read_only
        )
    from zarr.storage import LocalStore

    return LocalStore(location, read_only=read_only)


def _store_name(location: str) -> str:
    """The dataset name of a location: the last path component without its suffix (demo.zarr -> demo)."""
    last = location.rstrip("/").rsplit("/", 1)[-1]
    return Path(last).stem or last


def _open_group(location: str, storage_options: dict | None, *, mode: Literal["r", "r+"] = "r") -> zarr.Group:
    """Open the store's root group, turning "not there" and "not zarr" into a StoreError that says which."""
    if not _is_url(location) and not (Path(location) / "zarr.json").is_file():
        if not Path(location).exists():
            raise StoreError(
                f"store {location!r} does not exist; build one with 'wxshock demo PATH' or "
                "'wxshock ingest FILES... --out PATH'"
            )
        raise StoreFormatError(
            f"store {location!r} has no zarr.json: it is not a zarr v3 store written by wxshock; "
            "convert the data with 'wxshock ingest'"
        )
    try:
        store = _zarr_store(location, storage_options, read_only=(mode == "r"))
        try:
            # consolidated metadata speeds reading; a store opened for writing must see the arrays themselves
            return zarr.open_group(store, mode=mode, zarr_format=3, use_consolidated=(mode == "r"))
        except (ValueError, KeyError):
            return zarr.open_group(store, mode=mode, zarr_format=3, use_consolidated=False)
    except FileNotFoundError as exc:
        raise StoreError(f"store {location!r} does not exist ({exc}); check the location") from exc
    except (OSError, ValueError, KeyError) as exc:
        if isinstance(exc, StoreError):
            raise
        raise StoreError(f"store {location!r} cannot be opened: {type(exc).__name__}: {exc}") from exc


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


def decode(raw: np.ndarray, enc: RawEncoding) -> np.ndarray:
    """Stored integers to float64 values; fill_value becomes NaN."""
    values = raw.astype(np.float64) * enc.scale_factor + enc.add_offset
    values[raw == enc.fill_value] = np.nan
    return values


def _check_layout(group: zarr.Group, location: str) -> None:
    """Fail clearly when a zarr store is not laid out as wxshock writes it."""
    names = set(group.array_keys())
    missing = [n for n in ("x", "y", "time", GRID_MAPPING, MASK_LAYER) if n not in names]
    if missing or not any(v in names for v in VARIABLES):
        raise StoreFormatError(
            f"store {location!r} is not a wxshock store: it lacks {missing or list(VARIABLES)!r}; "
            "write it with 'wxshock ingest'"
        )
    for v in VARIABLES:
        if v in names:
            dims = tuple(group[v].metadata.dimension_names or ())
            if dims != ("y", "x", "time"):
                raise StoreFormatError(
                    f"store {location!r}: variable {v!r} has dims {dims!r}, expected ('y', 'x', 'time')"
                )


def _tidy(value: float) -> float:
    """A float without its last-digit noise (0.009999999999999948 -> 0.01), 12 significant digits."""
    return float(f"{value:.12g}")


def _edges(centres: np.ndarray) -> np.ndarray:
    """Cell edges from centres: midpoints between centres, half a step beyond each end."""
    c = np.asarray(centres, dtype=np.float64)
    if c.size == 1:
        return np.array([c[0] - 0.5, c[0] + 0.5])
    mid = (c[1:] + c[:-1]) / 2.0
    return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])


def _mean_step(centres: np.ndarray) -> float:
    """Mean absolute spacing of centres (1.0 for a single centre)."""
    if centres.size < 2:
        return 1.0
    return float(abs(centres[-1] - centres[0]) / (centres.size - 1))


def _lonlat_bounds(grid: Grid) -> dict[str, float]:
    """Longitude-latitude box around the grid (edges sampled densely, so curved projected edges are covered)."""
    xe, ye = grid.x_edges, grid.y_edges
    xs = np.concatenate([xe, np.full(ye.size, xe[-1]), xe[::-1], np.full(ye.size, xe[0])])
    ys = np.concatenate([np.full(xe.size, ye[0]), ye, np.full(xe.size, ye[-1]), ye[::-1]])
    if not grid.is_geographic:
        to_lonlat = pyproj.Transformer.from_crs(grid.crs(), "EPSG:4326", always_xy=True)
        xs, ys = to_lonlat.transform(xs, ys)
    return {
        "west": float(np.min(xs)),
        "south": float(np.min(ys)),
        "east": float(np.max(xs)),
        "north": float(np.max(ys)),
    }


def _iso(dates: DateTable, i: int) -> str:
    """'YYYY-MM-DD' of time step i."""
    return f"{int(dates.year[i]):04d}-{int(dates.month[i]):02d}-{int(dates.day[i]):02d}"


def _date_table(numbers: np.ndarray, calendar: str) -> DateTable:
    """Dates of day numbers (days since 1970-01-01) in a CF calendar."""
    if numbers.size == 0:
        empty = np.zeros(0, dtype=np.int64)
        return DateTable(empty, empty, empty, empty)
    if calendar in _DEFAULT_CALENDARS:
        stamps = pd.to_datetime(numbers, unit="D", origin="unix")
        return DateTable(
            year=np.asarray(stamps.year, dtype=np.int64),
            month=np.asarray(stamps.month, dtype=np.int64),
            day=np.asarray(stamps.day, dtype=np.int64),
            dayofyear=np.asarray(stamps.day_of_year, dtype=np.int64),
        )
    objects = cftime.num2date(numbers, TIME_UNITS, calendar=calendar)
    return DateTable(
        year=np.fromiter((d.year for d in objects), dtype=np.int64, count=numbers.size),
        month=np.fromiter((d.month for d in objects), dtype=np.int64, count=numbers.size),
        day=np.fromiter((d.day for d in objects), dtype=np.int64, count=numbers.size),
        dayofyear=np.fromiter((d.dayofyr for d in objects), dtype=np.int64, count=numbers.size),
    )


def _time_index(numbers: np.ndarray, calendar: str) -> pd.Index:
    """Decoded time axis for xarray coordinates."""
    if calendar in _DEFAULT_CALENDARS:
        return pd.DatetimeIndex(pd.to_datetime(numbers, unit="D", origin="unix"), name="time")
    objects = cftime.num2date(numbers, TIME_UNITS, calendar=calendar)
    return xr.CFTimeIndex(objects, name="time")


# --- writing --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Layout:
    """Chunking and compression of the daily variables (the defaults are the measured choice)."""

    tile: int = TILE_CELLS
    time_chunk: int | None = TIME_CHUNK_DAYS  # None: the whole time axis in one chunk
    shard_time: int | None = None  # days per shard when sharded (inner chunks then hold time_chunk days)
    compressor: str = COMPRESSOR_NAME
    level: int = COMPRESSOR_LEVEL

    def chunks(self, ny: int, nx: int, nt: int) -> tuple[int, int, int]:
        """(cy, cx, ct) of one compressed chunk for an array of this size.

        The time length is fixed (not cut to the array), so a store that grows by appended years keeps the
        chunking that a store written at once would have.
        """
        ct = nt if self.time_chunk is None else self.time_chunk
        return (min(self.tile, ny), min(self.tile, nx), max(ct, 1))

    def shards(self, ny: int, nx: int, nt: int) -> tuple[int, int, int] | None:
        """(sy, sx, st) of one shard, or None when not sharded."""
        if self.shard_time is None:
            return None
        cy, cx, ct = self.chunks(ny, nx, nt)
        st = max(ct, (self.shard_time // ct) * ct)
        return (cy, cx, st)

    def codec(self) -> BloscCodec:
        """The blosc codec (byte shuffle; int16 values of neighbouring days share their high bytes)."""
        return BloscCodec(cname=self.compressor, clevel=self.level, shuffle=BloscShuffle.shuffle)


DEFAULT_LAYOUT = Layout()


def write_store(
    ds: xr.Dataset,
    location: str | Path,
    *,
    storage_options: dict | None = None,
    progress: bool = False,
    layout: Layout = DEFAULT_LAYOUT,
) -> str:
    """Write a Dataset as a wxshock store, aside then swapped into place; returns the fingerprint.

    ``ds`` holds any of tmax, tmin (degC) and prcp (mm/day) as float arrays on dims time, y, x (any order;
    numpy- or dask-backed; NaN missing), 1-D coordinates time (daily, contiguous, datetime64 or cftime), y, x,
    optional 2-D layers on (y, x) (``elevation`` in m, weight layers), and its CRS as a grid_mapping variable with
    ``crs_wkt`` (or ``ds.attrs['crs_wkt']``). An existing store at ``location`` is replaced only once the new one
    is complete, so a failure leaves it as it was.
    """
    target = _normalise_location(location)
    prepared = _prepare(ds, layout)
    if not _is_url(target):
        Path(target).parent.mkdir(parents=True, exist_ok=True)
    aside = _aside_location(target, "writing")
    try:
        _write_prepared(prepared, aside, storage_options, progress, layout)
        fingerprint = _finish(aside, storage_options, progress)
        _swap_into_place(aside, target, storage_options)
    except BaseException:
        _remove(aside, storage_options)
        raise
    return fingerprint


def append_store(
    ds: xr.Dataset,
    location: str | Path,
    *,
    storage_options: dict | None = None,
    progress: bool = False,
) -> str:
    """Append days that directly follow a store's last day; returns the new fingerprint.

    ``ds`` is laid out as for :func:`write_store` (its static layers are ignored: the store keeps its own) and
    must hold the store's variables on the store's grid and calendar. A local store is copied aside as hard
    links (nothing is copied), the new days are written into the copy (zarr replaces a file rather than
    changing it, so the links the old store still uses are untouched), the data mask and fingerprint are
    recomputed, and the copy is swapped into place: only the chunks that hold new days are written. An object
    store cannot hard-link, so there the whole store is rewritten aside instead.
    """
    target = _normalise_location(location)
    store = open_store(target, storage_options=storage_options)
    variables = store.variables
    daily = ds[[v for v in variables if v in ds.data_vars]]
    missing = [v for v in variables if v not in ds.data_vars]
    if missing:
        raise StoreFormatError(f"appending to store {store.name!r}: the new days lack {missing!r}")
    extra = [v for v in VARIABLES if v in ds.data_vars and v not in variables]
    if extra:
        raise StoreFormatError(
            f"appending to store {store.name!r}: it has no {extra!r}; append its variables only"
        )
    crs = _find_crs(ds)
    if crs != store.grid.crs():
        raise StoreFormatError(
            f"appending to store {store.name!r}: the new days are in another CRS ({crs.name!r})"
        )
    daily = daily.assign_coords(crs=((), np.int32(0), {"crs_wkt": crs.to_wkt()}))
    days, calendar = _daily_numbers(ds["time"])
    last = int(store._time_numbers[-1]) if store.n_times else None
    if calendar != store.calendar or last is None or int(days[0]) != last + 1:
        raise StoreFormatError(
            f"appending to store {store.name!r}: the new days must start the day after its last day "
            f"({_iso(store.dates, store.n_times - 1)}, calendar {store.calendar!r}); they start "
            f"{_iso(_date_table(days[:1], calendar), 0)} (calendar {calendar!r})"
        )
    if _is_url(target):
        old = store.to_xarray()
        combined = xr.concat(
            [old[list(variables)].transpose("time", "y", "x"), daily.transpose("time", "y", "x")],
            dim="time",
            join="override",
            coords="minimal",
            compat="override",
        )
        for name in store.layers + ((ELEVATION_LAYER,) if store.has_elevation else ()):
            combined[name] = old[name].load()
        combined["crs"] = ((), np.int32(0), {"crs_wkt": crs.to_wkt()})
        combined.attrs = {k: v for k, v in store._group.attrs.asdict().items() if k != FINGERPRINT_ATTR}
        return write_store(combined, target, storage_options=storage_options, progress=progress)
    cy, cx, ct = store.inner_chunk_shape
    prepared = _prepare(daily, Layout(tile=max(cy, cx), time_chunk=ct))
    aside = _aside_location(target, "appending")
    try:
        shutil.copytree(target, aside, copy_function=os.link)
        _write_appended(aside, prepared, days, progress)
        fingerprint = _finish(aside, storage_options, progress)
        _swap_into_place(aside, target, storage_options)
    except BaseException:
        _remove(aside, storage_options)
        raise
    return fingerprint


def _write_appended(location: str, prepared: _Prepared, days: np.ndarray, progress: bool) -> None:
    """Grow the time axis of a store copy and write the new days into it."""
    import dask.array as da

    group = zarr.open_group(_zarr_store(location, None, read_only=False), mode="r+", zarr_format=3,
                            use_consolidated=False)  # fmt: skip
    time_array = group["time"]
    old = int(time_array.shape[0])
    time_array.resize((old + days.size,))
    time_array[old:] = days.astype(np.int32)
    sources, targets, regions = [], [], []
    for v in prepared.variables:
        array = group[v]
        ny, nx, _ = array.shape
        array.resize((ny, nx, old + days.size))
        sources.append(prepared.dataset[v].data)
        targets.append(array)
        regions.append((slice(None), slice(None), slice(old, old + days.size)))
    # a lock: new days share the last old chunk of each tile, which zarr reads, changes and writes back
    import dask

    with dask.config.set(scheduler="threads"):
        if progress:
            with _TqdmCallback("appending days"):
                da.store(sources, targets, regions=regions, lock=True)
        else:
            da.store(sources, targets, regions=regions, lock=True)


def _find_crs(ds: xr.Dataset) -> pyproj.CRS:
    """The CRS of a Dataset: its grid_mapping variable, a 'crs' variable, or a crs_wkt attribute."""
    candidates: list[Any] = []
    for v in VARIABLES:
        if v in ds and "grid_mapping" in ds[v].attrs:
            gm = str(ds[v].attrs["grid_mapping"]).split(":")[0].strip()
            if gm in ds.variables:
                candidates.append(ds[gm].attrs)
    if GRID_MAPPING in ds.variables:
        candidates.append(ds[GRID_MAPPING].attrs)
    candidates.append(ds.attrs)
    for attrs in candidates:
        for key in ("crs_wkt", "spatial_ref"):
            if attrs.get(key):
                return pyproj.CRS.from_user_input(str(attrs[key]))
        if attrs.get("grid_mapping_name"):
            return pyproj.CRS.from_cf(dict(attrs))
    raise StoreFormatError(
        "dataset has no CRS: give a grid_mapping variable with a 'crs_wkt' attribute (CF) or ds.attrs['crs_wkt']"
    )


def _daily_numbers(time: xr.DataArray) -> tuple[np.ndarray, str]:
    """Day numbers (days since 1970-01-01, whole days) and calendar of a decoded daily time coordinate."""
    values = time.values
    if np.issubdtype(values.dtype, np.datetime64):
        # standard, gregorian and proleptic_gregorian agree on every date after 1582; one name keeps stores
        # written from differently labelled files comparable (and appendable)
        calendar = "standard"
        days = values.astype("datetime64[D]").astype(np.int64)
        return days, calendar
    if values.size and isinstance(values.flat[0], cftime.datetime):
        calendar = str(values.flat[0].calendar)
        if calendar == "gregorian":
            calendar = "standard"
        midnight = [
            type(d)(d.year, d.month, d.day, calendar=d.calendar, has_year_zero=d.has_year_zero)
            for d in values
        ]
        days = np.asarray(cftime.date2num(midnight, TIME_UNITS, calendar=calendar), dtype=np.float64)
        return np.round(days).astype(np.int64), calendar
    raise StoreFormatError(
        f"time coordinate has dtype {values.dtype!r}; expected decoded dates (datetime64 or cftime)"
    )


@dataclass
class _Prepared:
    """A Dataset checked and laid out for writing (dims y, x, time; int16 encoded lazily)."""

    dataset: xr.Dataset
    encoding: dict[str, dict[str, Any]]
    variables: tuple[str, ...]
    shape: tuple[int, int, int]
    attrs: dict[str, Any] = field(default_factory=dict)


def _prepare(ds: xr.Dataset, layout: Layout) -> _Prepared:
    """Check a Dataset against the store contract and build the Dataset that is written."""
    import dask.array as da

    variables = tuple(v for v in VARIABLES if v in ds.data_vars)
    if not variables:
        raise StoreFormatError(
            f"dataset has none of the variables {list(VARIABLES)!r} (it has {sorted(map(str, ds.data_vars))!r})"
        )
    for v in variables:
        if set(ds[v].dims) != {"time", "y", "x"}:
            raise StoreFormatError(f"variable {v!r} has dims {ds[v].dims!r}; expected time, y and x")
    for name in ("x", "y", "time"):
        if name not in ds.coords or ds[name].ndim != 1:
            raise StoreFormatError(f"dataset needs a 1-D coordinate {name!r}")
    x = np.asarray(ds["x"].values, dtype=np.float64)
    y = np.asarray(ds["y"].values, dtype=np.float64)
    for name, c in (("x", x), ("y", y)):
        if not np.all(np.isfinite(c)):
            raise StoreFormatError(f"coordinate {name!r} has non-finite values")
        steps = np.diff(c)
        if c.size > 1 and not (np.all(steps > 0) or np.all(steps < 0)):
            raise StoreFormatError(f"coordinate {name!r} is not strictly monotonic")
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
    ny, nx, nt = y.size, x.size, days.size
    chunks = layout.chunks(ny, nx, nt)
    shards = layout.shards(ny, nx, nt)
    dask_chunks = shards or chunks

    data_vars: dict[str, Any] = {}
    encoding: dict[str, dict[str, Any]] = {}
    for v in variables:
        source = ds[v].transpose("y", "x", "time").data
        if not isinstance(source, da.Array):
            source = da.from_array(np.asarray(source), chunks=dask_chunks)
        else:
            source = source.rechunk(dask_chunks)
        encoded = source.map_blocks(_encode_block, v, dtype=np.int16)
        attrs = dict(VARIABLE_ATTRS[v])
        attrs.update({"scale_factor": SCALE_FACTOR, "add_offset": ADD_OFFSET, "grid_mapping": GRID_MAPPING})
        data_vars[v] = (("y", "x", "time"), encoded, attrs)
        enc: dict[str, Any] = {
            "dtype": "int16",
            "_FillValue": np.int16(FILL_VALUE),
            "fill_value": np.int16(FILL_VALUE),
            "chunks": chunks,
            "compressors": [layout.codec()],
        }
        if shards is not None:
            enc["shards"] = shards
        encoding[v] = enc

    for name, var in ds.data_vars.items():
        name = str(name)
        if name in VARIABLES or name in _STATIC_NAMES:
            continue
        if set(var.dims) != {"y", "x"}:
            continue  # only static 2-D layers travel with the grid; other variables are not part of a store
        attrs = {
            k: val
            for k, val in var.attrs.items()
            if _json_scalar(val) and k not in ("_FillValue", "grid_mapping")
        }
        if name == ELEVATION_LAYER:
            attrs.setdefault("units", "m")
            attrs.setdefault("standard_name", "surface_altitude")
        attrs["grid_mapping"] = GRID_MAPPING
        layer = np.asarray(var.transpose("y", "x").values, dtype=np.float32)
        data_vars[name] = (("y", "x"), layer, attrs)
        encoding[name] = {"dtype": "float32", "_FillValue": np.float32(np.nan), "chunks": (ny, nx)}

    crs_attrs = {k: val for k, val in crs.to_cf().items() if _json_scalar(val)}
    crs_attrs["crs_wkt"] = crs.to_wkt()
    crs_attrs["spatial_ref"] = crs.to_wkt()
    data_vars[GRID_MAPPING] = ((), np.int32(0), crs_attrs)

    geographic = bool(crs.is_geographic)
    coords = {
        "y": (
            ("y",),
            y,
            {"standard_name": "latitude", "units": "degrees_north", "axis": "Y"}
            if geographic
            else {"standard_name": "projection_y_coordinate", "units": "m", "axis": "Y"},
        ),
        "x": (
            ("x",),
            x,
            {"standard_name": "longitude", "units": "degrees_east", "axis": "X"}
            if geographic
            else {"standard_name": "projection_x_coordinate", "units": "m", "axis": "X"},
        ),
        "time": (
            ("time",),
            days.astype(np.int32),
            {"standard_name": "time", "axis": "T", "units": TIME_UNITS, "calendar": calendar},
        ),
    }
    encoding["time"] = {"chunks": (TIME_COORD_CHUNK,)}
    encoding["x"] = {"chunks": (nx,)}
    encoding["y"] = {"chunks": (ny,)}
    attrs = {
        k: val for k, val in ds.attrs.items() if _json_scalar(val) and k not in ("crs_wkt", FINGERPRINT_ATTR)
    }
    attrs.update({"Conventions": "CF-1.10", "wxshock_layout_version": LAYOUT_VERSION})
    out = xr.Dataset(data_vars, coords=coords, attrs=attrs)
    return _Prepared(dataset=out, encoding=encoding, variables=variables, shape=(ny, nx, nt), attrs=attrs)


def _json_scalar(value: Any) -> bool:
    """True for attribute values that survive JSON (str, finite numbers, bools)."""
    if isinstance(value, (str, bool)):
        return True
    if isinstance(value, (int, np.integer)):
        return True
    if isinstance(value, (float, np.floating)):
        return bool(np.isfinite(value))
    return False


def _encode_block(block: np.ndarray, var: str) -> np.ndarray:
    """Float values to int16 at 0.1 units, NaN to the fill value; values beyond int16 are an error, not wrapped."""
    values = np.asarray(block, dtype=np.float64)
    scaled = np.round((values - ADD_OFFSET) / SCALE_FACTOR)
    missing = np.isnan(values)
    out_of_range = ~missing & ~((scaled >= _INT16_MIN) & (scaled <= _INT16_MAX))
    if out_of_range.any():
        bad = values[out_of_range].flat[0]
        raise StoreFormatError(
            f"variable {var!r}: value {float(bad)!r} cannot be stored at {SCALE_FACTOR} units in int16 "
            f"(allowed {_INT16_MIN * SCALE_FACTOR:.1f} to {_INT16_MAX * SCALE_FACTOR:.1f}, finite); "
            "check the units of the input"
        )
    scaled[missing] = FILL_VALUE
    return scaled.astype(np.int16)


def _write_prepared(
    prepared: _Prepared, location: str, storage_options: dict | None, progress: bool, layout: Layout
) -> None:
    """Write the prepared Dataset (daily variables chunk by chunk, with a progress bar when asked)."""
    store = _zarr_store(location, storage_options, read_only=False)
    delayed = prepared.dataset.to_zarr(
        store, mode="w", encoding=prepared.encoding, zarr_format=3, consolidated=False, compute=False
    )
    if progress:
        with _TqdmCallback("writing store"):
            delayed.compute(scheduler="threads")
    else:
        delayed.compute(scheduler="threads")


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


# --- fingerprint and data mask -------------------------------------------------------------------------------


def _read_units(array: zarr.Array) -> Iterator[tuple[slice, ...]]:
    """Slices of every read unit (shard when sharded, else chunk) of an array, in C order."""
    unit = array.shards or array.chunks
    if not array.shape:
        yield ()
        return
    ranges = [range(0, n, c) for n, c in zip(array.shape, unit, strict=True)]
    for starts in product(*ranges):
        yield tuple(slice(s, min(s + c, n)) for s, c, n in zip(starts, unit, array.shape, strict=True))


def _hash_array(array: zarr.Array, on_unit: Any = None) -> str:
    """sha256 over the sha256 of each read unit's decoded bytes (C order, little-endian), units in C order."""

    def one(slices: tuple[slice, ...]) -> tuple[tuple[slice, ...], bytes, np.ndarray]:
        values = np.ascontiguousarray(np.asarray(array[slices]))
        values = values.astype(values.dtype.newbyteorder("<"), copy=False)
        if values.dtype.kind == "f":
            values = np.where(np.isnan(values), np.nan, values)  # one NaN bit pattern
        return slices, hashlib.sha256(values.tobytes()).digest(), values

    outer = hashlib.sha256()
    with ThreadPoolExecutor(max_workers=max(1, min(4, os.cpu_count() or 1))) as pool:
        for slices, digest, values in pool.map(one, _read_units(array)):
            outer.update(digest)
            if on_unit is not None:
                on_unit(slices, values)
    return outer.hexdigest()


def _metadata_text(group: zarr.Group) -> str:
    """Canonical JSON of what the store says about itself (root attrs without the fingerprint, every array's
    shape, dtype, dims, chunking and attributes); codec settings are left out so that the fingerprint names the
    data, not how it was compressed."""
    root = {k: v for k, v in group.attrs.asdict().items() if k != FINGERPRINT_ATTR}
    arrays = {}
    for name, array in sorted(group.arrays()):
        arrays[name] = {
            "shape": list(array.shape),
            "dtype": str(array.dtype),
            "dims": list(array.metadata.dimension_names or ()),
            "chunks": list(array.chunks),
            "shards": list(array.shards) if array.shards else None,
            "fill_value": _jsonable(array.fill_value),
            "attrs": {k: _jsonable(v) for k, v in array.attrs.asdict().items()},
        }
    return json.dumps({"root": root, "arrays": arrays}, sort_keys=True, separators=(",", ":"), allow_nan=True)


def _jsonable(value: Any) -> Any:
    """numpy scalars to plain Python values for canonical JSON."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return repr(value)
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    return value


def compute_fingerprint(
    group: zarr.Group, progress: bool = False, digests: dict[str, str] | None = None
) -> str:
    """'sha256:<hex>' over the canonical metadata and the decoded contents of every array of a store.

    ``digests`` may hold array digests already computed (by :func:`_hash_array`) in the same write.
    """
    known = dict(digests or {})
    total = hashlib.sha256()
    total.update(_metadata_text(group).encode())
    names = sorted(name for name, _ in group.arrays())
    bar = _bar(progress, sum(_count_units(group[n]) for n in names if n not in known), "fingerprint")
    for name in names:
        digest = known.get(name)
        if digest is None:
            digest = _hash_array(
                group[name], on_unit=(lambda s, v: bar.update(1)) if bar is not None else None
            )
        total.update(f"{name}:{digest};".encode())
    if bar is not None:
        bar.close()
    return "sha256:" + total.hexdigest()


def _count_units(array: zarr.Array) -> int:
    """Number of read units of an array."""
    return sum(1 for _ in _read_units(array))


def _bar(progress: bool, total: int, desc: str) -> Any:
    """A tqdm bar, or None when progress is off."""
    if not progress:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit="chunk")


def _data_mask_and_digests(
    group: zarr.Group, variables: tuple[str, ...], progress: bool
) -> tuple[np.ndarray, dict[str, str]]:
    """(ny, nx) int8 mask (1 where any daily variable has a value on any day) and each variable's digest, from
    one pass over the chunks."""
    first = group[variables[0]]
    mask = np.zeros(first.shape[:2], dtype=bool)
    bar = _bar(progress, sum(_count_units(group[v]) for v in variables), "checking chunks")

    def on_unit(slices: tuple[slice, ...], values: np.ndarray) -> None:
        mask[slices[0], slices[1]] |= (values != FILL_VALUE).any(axis=2)
        if bar is not None:
            bar.update(1)

    digests = {v: _hash_array(group[v], on_unit=on_unit) for v in variables}
    if bar is not None:
        bar.close()
    return mask.astype(np.int8), digests


def _finish(location: str, storage_options: dict | None, progress: bool) -> str:
    """Write the data mask, then the fingerprint, then consolidate the metadata; returns the fingerprint."""
    group = _open_group(location, storage_options, mode="r+")
    variables = tuple(v for v in VARIABLES if v in group.array_keys())
    mask, digests = _data_mask_and_digests(group, variables, progress)
    array = group.create_array(
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
    fingerprint = compute_fingerprint(group, progress=progress, digests=digests)
    group.attrs[FINGERPRINT_ATTR] = fingerprint
    with warnings.catch_warnings():
        # zarr notes that consolidated metadata is not yet in the v3 spec; xarray and zarr-python read it.
        warnings.simplefilter("ignore", category=UserWarning)
        zarr.consolidate_metadata(group.store)
    return fingerprint


def verify_store(
    location: str | Path, storage_options: dict | None = None, progress: bool = False
) -> VerifyResult:
    """Recompute a store's fingerprint from its contents and compare it with the one recorded at write time."""
    target = _normalise_location(location)
    group = _open_group(target, storage_options, mode="r")
    _check_layout(group, target)
    recorded = group.attrs.get(FINGERPRINT_ATTR)
    computed = compute_fingerprint(group, progress=progress)
    return VerifyResult(
        recorded=str(recorded) if recorded else None, computed=computed, ok=recorded == computed
    )


# --- write aside, then swap ----------------------------------------------------------------------------------


def _aside_location(target: str, purpose: str) -> str:
    """A sibling location for writing aside: <parent>/.<name>.<purpose>-<random>."""
    token = uuid.uuid4().hex[:12]
    if _is_url(target):
        head, _, last = target.rpartition("/")
        return f"{head}/.{last}.{purpose}-{token}"
    path = Path(target)
    return str(path.parent / f".{path.name}.{purpose}-{token}")


def _filesystem(location: str, storage_options: dict | None) -> tuple[Any, str]:
    """(fsspec filesystem, path in it) of a URL."""
    import fsspec

    fs, path = fsspec.core.url_to_fs(location, **dict(storage_options or {}))
    return fs, path


def _exists(location: str, storage_options: dict | None) -> bool:
    """True when something is stored at a location."""
    if _is_url(location):
        fs, path = _filesystem(location, storage_options)
        return bool(fs.exists(path))
    return Path(location).exists()


def _remove(location: str, storage_options: dict | None) -> None:
    """Delete a store (quietly, best effort: used to clean up a failed write)."""
    try:
        if _is_url(location):
            fs, path = _filesystem(location, storage_options)
            if fs.exists(path):
                fs.rm(path, recursive=True)
        elif Path(location).exists():
            shutil.rmtree(location)
    except OSError:
        pass


def _swap_into_place(aside: str, target: str, storage_options: dict | None) -> None:
    """Move a completely written store to its target, replacing what was there.

    Local directories: two renames on the same file system, so the target is either the old or the new store
    (a reader that opens it between the renames finds nothing for that instant). Object stores cannot rename a
    prefix: the old objects are deleted and the new ones copied in; a failure before this step leaves the old
    store untouched.
    """
    if _is_url(target):
        fs, target_key = _filesystem(target, storage_options)
        _, aside_key = _filesystem(aside, storage_options)
        if fs.exists(target_key):
            fs.rm(target_key, recursive=True)
        fs.copy(aside_key, target_key, recursive=True)
        fs.rm(aside_key, recursive=True)
        return
    target_path = Path(target)
    target_path.parent.mkdir(parents=True, exist_ok=True)
    if target_path.exists():
        old = Path(_aside_location(target, "old"))
        os.replace(target_path, old)
        try:
            os.replace(aside, target_path)
        except OSError:
            os.replace(old, target_path)
            raise
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(aside, target_path)
