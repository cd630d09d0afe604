"""How a store lays out its arrays: names, int16 encoding at 0.1 units, chunking and codecs."""

from __future__ import annotations

import re
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
import zarr
from zarr.codecs import BloscCodec, BloscShuffle

from service.errors import StoreFormatError

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
# Since issue 15 (bench/bench_layouts.py; bench/RESULTS.md, "Store layouts for on-demand reads"), new stores keep
# those 32 x 32-cell decade shards as their stored objects, each holding four 16 x 16-cell chunks that are read
# and decoded apart: a ~25-cell community decodes about half the bytes (on-demand CPU about halved, 54 against
# 108 ms per request on the large demo), while the 5,000-village batch, the raw decode and an append cost what
# they did. 8 x 8-cell chunks decode less still but cost the batch about a quarter more CPU (16 times the tasks).
TILE_CELLS = 32  # cells per side of a stored object (a chunk, or the shard of newer stores)
CHUNK_CELLS = 16  # cells per side of a compressed chunk inside a shard (new stores)
TIME_CHUNK_DAYS = 3653  # ten years (with their leap days) per chunk
COMPRESSOR_NAME = "lz4"
COMPRESSOR_LEVEL = 5

TIME_UNITS = "days since 1970-01-01"
TIME_COORD_CHUNK = 36_525  # a century of day numbers per chunk of the time coordinate, however long the store
LAYOUT_VERSION = 2  # 1: one grid, every array at the root; 2: one group per grid, the time axis at the root
VERSION_ATTR = "wxshock_layout_version"
FINGERPRINT_ATTR = "wxshock_fingerprint"
GRIDS_ATTR = "wxshock_grids"  # root attribute: the grid names in their order (the first is the main grid)
MIGRATED_ATTR = (
    "wxshock_migrated_from"  # root attribute: {"layout_version": 1, "fingerprint": ...} after migration
)
DIGESTS_ATTR = "wxshock_array_digests"  # root attribute: each array's digest at the last write (not hashed)
DAYS_ATTR = "wxshock_days"  # daily variable attribute: [first, last] day numbers it was given (inclusive)
MASK_LAYER = "data_mask"
ELEVATION_LAYER = "elevation"
GRID_MAPPING = "crs"
LATITUDE, LONGITUDE = "lat", "lon"  # optional 2-D (y, x) cell-centre latitudes and longitudes of a grid
_STATIC_NAMES = {MASK_LAYER, GRID_MAPPING, "x", "y", "time", LATITUDE, LONGITUDE}
DEFAULT_GRID = "grid"
GRID_NAME = re.compile(r"[a-z][a-z0-9_]{0,15}")
_RESERVED_GRID_NAMES = {"time", *VARIABLES, *_STATIC_NAMES, ELEVATION_LAYER}
_DEFAULT_CALENDARS = ("standard", "gregorian", "proleptic_gregorian")


@dataclass(frozen=True)
class RawEncoding:
    """How stored integers become values: value = raw * scale_factor + add_offset; raw == fill_value is missing."""

    scale_factor: float
    add_offset: float
    fill_value: int


def decode(raw: np.ndarray, enc: RawEncoding) -> np.ndarray:
    """Stored integers to float64 values; fill_value becomes NaN."""
    values = raw.astype(np.float64) * enc.scale_factor + enc.add_offset
    values[raw == enc.fill_value] = np.nan
    return values


def check_grid_name(name: object) -> str:
    """A grid name as given, or StoreFormatError saying what a grid name may be."""
    if not isinstance(name, str) or not GRID_NAME.fullmatch(name) or name in _RESERVED_GRID_NAMES:
        raise StoreFormatError(
            f"grid name {name!r} is not allowed: a grid name is 1 to 16 characters of a-z, 0-9 and _, starting "
            f"with a letter, and not one of {sorted(_RESERVED_GRID_NAMES)!r}; give another name"
        )
    return name


def default_grid_name(taken: Iterable[str]) -> str:
    """The first free default grid name: 'grid', then 'grid2', 'grid3', ..."""
    used = set(taken)
    if DEFAULT_GRID not in used:
        return DEFAULT_GRID
    k = 2
    while f"{DEFAULT_GRID}{k}" in used:
        k += 1
    return f"{DEFAULT_GRID}{k}"


@dataclass(frozen=True)
class StoreLayout:
    """Where a store's arrays are: layout version, each grid's group path ("" for a v1 store's root), and the
    grid of each daily variable (in the order of VARIABLES)."""

    version: int
    grids: dict[str, str]
    variables: dict[str, str]

    def path(self, grid: str, name: str) -> str:
        """The array path of ``name`` in grid ``grid``'s group."""
        prefix = self.grids[grid]
        return f"{prefix}/{name}" if prefix else name


def read_layout(group: zarr.Group, location: str) -> StoreLayout:
    """The layout of an opened store; StoreFormatError naming what is missing when it is not a wxshock store."""
    version = group.attrs.get(VERSION_ATTR, 1)
    if version not in (1, 2):
        raise StoreFormatError(
            f"store {location!r} has layout version {version!r}; this wxshock reads versions 1 and 2, "
            "upgrade wxshock"
        )
    if version == 1:
        grids = {DEFAULT_GRID: ""}
        members = {DEFAULT_GRID: group}
    else:
        names = group.attrs.get(GRIDS_ATTR)
        if not isinstance(names, list) or not names:
            raise StoreFormatError(
                f"store {location!r} (layout 2) has no {GRIDS_ATTR!r} list of grids; rewrite it with wxshock"
            )
        grids = {str(n): str(n) for n in names}
        members = {}
        subgroups = dict(group.groups())
        for name in grids:
            if name not in subgroups:
                raise StoreFormatError(
                    f"store {location!r} lists grid {name!r} but has no group {name!r}; rewrite it with wxshock"
                )
            members[name] = subgroups[name]
        if "time" not in set(group.array_keys()):
            raise StoreFormatError(
                f"store {location!r} is not a wxshock store: it lacks the time axis 'time'"
            )
    variables: dict[str, str] = {}
    for grid, member in members.items():
        names_here = set(member.array_keys())
        required = ("x", "y", GRID_MAPPING, MASK_LAYER) + (("time",) if version == 1 else ())
        missing = [n for n in required if n not in names_here]
        here = [v for v in VARIABLES if v in names_here]
        if missing or not here:
            where = f"store {location!r}" if version == 1 else f"grid {grid!r} of store {location!r}"
            raise StoreFormatError(
                f"{where} is not a wxshock store: it lacks {missing or list(VARIABLES)!r}; "
                "write it with 'wxshock ingest'"
            )
        for v in here:
            if v in variables:
                raise StoreFormatError(
                    f"store {location!r} holds variable {v!r} on two grids ({variables[v]!r} and {grid!r}); "
                    "a variable lies on one grid; rewrite the store"
                )
            dims = tuple(member[v].metadata.dimension_names or ())
            if dims != ("y", "x", "time"):
                raise StoreFormatError(
                    f"store {location!r}: variable {v!r} has dims {dims!r}, expected ('y', 'x', 'time')"
                )
            variables[v] = grid
    ordered = {v: variables[v] for v in VARIABLES if v in variables}
    return StoreLayout(version=int(version), grids=grids, variables=ordered)


@dataclass(frozen=True)
class Layout:
    """Chunking and compression of the daily variables (the defaults are the measured choice).

    ``tile`` cells per side of a compressed chunk; ``shard_tile`` cells per side of a shard holding several
    such chunks (a multiple of ``tile``; None: no spatial sharding); ``shard_time`` days per shard (None: the
    chunk's days). A store is sharded when either is given.
    """

    tile: int = TILE_CELLS
    time_chunk: int | None = TIME_CHUNK_DAYS  # None: the whole time axis in one chunk
    shard_time: int | None = None  # days per shard when sharded (inner chunks then hold time_chunk days)
    compressor: str = COMPRESSOR_NAME
    level: int = COMPRESSOR_LEVEL
    shard_tile: int | None = None  # cells per side of a shard of tile x tile chunks

    def __post_init__(self) -> None:
        if self.tile < 1 or (self.time_chunk is not None and self.time_chunk < 1):
            raise StoreFormatError(
                f"layout: tile {self.tile!r} and time_chunk {self.time_chunk!r} must be at least 1"
            )
        if self.shard_tile is not None and (self.shard_tile < self.tile or self.shard_tile % self.tile):
            raise StoreFormatError(
                f"layout: shard_tile {self.shard_tile!r} must be a multiple of tile {self.tile!r} (a shard holds "
                "whole chunks); give e.g. shard_tile = 4 x tile"
            )

    def chunks(self, ny: int, nx: int, nt: int) -> tuple[int, int, int]:
        """(cy, cx, ct) of one compressed chunk for an array of this size.

        The time length is fixed (not cut to the array), so a store that grows by appended years keeps the
        chunking that a store written at once would have.
        """
        ct = nt if self.time_chunk is None else self.time_chunk
        return (min(self.tile, ny), min(self.tile, nx), max(ct, 1))

    def shards(self, ny: int, nx: int, nt: int) -> tuple[int, int, int] | None:
        """(sy, sx, st) of one shard, or None when not sharded (a shard never spans more chunks than the grid)."""
        if self.shard_time is None and self.shard_tile is None:
            return None
        cy, cx, ct = self.chunks(ny, nx, nt)
        st = ct if self.shard_time is None else max(ct, (self.shard_time // ct) * ct)
        per_side = (self.shard_tile or self.tile) // self.tile
        return (cy * min(per_side, -(-ny // cy)), cx * min(per_side, -(-nx // cx)), st)

    def codec(self) -> BloscCodec:
        """The blosc codec (byte shuffle; int16 values of neighbouring days share their high bytes)."""
        return BloscCodec(cname=self.compressor, clevel=self.level, shuffle=BloscShuffle.shuffle)

    def describe(self) -> str:
        """The layout in words, e.g. '8 x 8 cells x 3653 days chunks in 32 x 32-cell shards'."""
        days = "the whole time axis" if self.time_chunk is None else f"{self.time_chunk} days"
        text = f"{self.tile} x {self.tile} cells x {days} chunks"
        if self.shard_tile is not None or self.shard_time is not None:
            side = self.shard_tile or self.tile
            text += f" in {side} x {side}-cell shards" + (
                f" of {self.shard_time} days" if self.shard_time is not None else ""
            )
        return text + f" ({self.compressor} level {self.level})"


def layout_of_array(array: zarr.Array) -> Layout:
    """The layout (chunking, sharding; the default codec) a daily array was written with, for arrays added to
    its store or for rewriting it (a grid smaller than a chunk does not show the tile: the default is taken)."""
    cy, cx, ct = (int(c) for c in array.chunks)
    ny, nx = (int(n) for n in array.shape[:2])
    tile = cy if cy < ny else (cx if cx < nx else TILE_CELLS)
    if not array.shards:
        return Layout(tile=tile, time_chunk=ct)
    sy, sx, st = (int(s) for s in array.shards)
    shard_tile = sy if sy > cy else (sx if sx > cx else None)
    if shard_tile is not None and (tile >= shard_tile or shard_tile % tile):
        shard_tile = None  # an edge case of tiny grids: keep the chunks, shards along time only
    return Layout(tile=tile, time_chunk=ct, shard_time=st, shard_tile=shard_tile)


# New stores: 16 x 16-cell decade chunks in 32 x 32-cell shards (``Layout()`` alone is the older unsharded one).
DEFAULT_LAYOUT = Layout(tile=CHUNK_CELLS, shard_tile=TILE_CELLS)


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
