"""How a store lays out its arrays: names, int16 encoding at 0.1 units, chunking and codecs."""

from __future__ import annotations

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
