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

The package, one module a concern: ``layout`` (names, int16 encoding, chunking and codecs), ``timeaxis`` (day
numbers and calendars), ``grids`` (Grid, CRS, cell edges, longitude-latitude outline), ``location`` (local paths
and URLs, opening the zarr group), ``fingerprint``, ``read`` (Store, open_store), ``chunks`` (whole chunks decoded
with the codec, the decoded-tile cache), ``write`` (create, append, add variables, grids and layers), ``swap``
(write aside, then a journaled swap; recovery) and ``migrate`` (layout 1 -> 2). Every public name is importable
from ``service.store``.
"""

from __future__ import annotations

from service.store.fingerprint import CANONICAL_TILE, VerifyResult, compute_fingerprint, verify_store
from service.store.grids import Grid, is_lonlat_crs
from service.store.layout import (
    ADD_OFFSET,
    CHUNK_CELLS,
    COMPRESSOR_LEVEL,
    COMPRESSOR_NAME,
    DEFAULT_GRID,
    DEFAULT_LAYOUT,
    ELEVATION_LAYER,
    FILL_VALUE,
    FINGERPRINT_ATTR,
    GRID_MAPPING,
    LAYOUT_VERSION,
    MASK_LAYER,
    SCALE_FACTOR,
    TILE_CELLS,
    TIME_CHUNK_DAYS,
    TIME_COORD_CHUNK,
    TIME_UNITS,
    VARIABLE_ATTRS,
    VARIABLES,
    Layout,
    RawEncoding,
    check_grid_name,
    decode,
    default_grid_name,
)
from service.store.location import _normalise_location
from service.store.migrate import migrate_store
from service.store.read import Store, open_store
from service.store.relayout import relayout_store, store_layout
from service.store.swap import recover, store_exists
from service.store.timeaxis import DateTable, _daily_numbers, _date_table, _iso
from service.store.write import (
    add_variables,
    append_store,
    find_grid,
    open_for_check,
    update_store,
    write_layer,
    write_store,
)

_exists = store_exists  # the name ingest imported before store_exists existed

__all__ = [
    "ADD_OFFSET",
    "CHUNK_CELLS",
    "CANONICAL_TILE",
    "DEFAULT_GRID",
    "COMPRESSOR_LEVEL",
    "COMPRESSOR_NAME",
    "DEFAULT_LAYOUT",
    "ELEVATION_LAYER",
    "FILL_VALUE",
    "FINGERPRINT_ATTR",
    "GRID_MAPPING",
    "LAYOUT_VERSION",
    "MASK_LAYER",
    "SCALE_FACTOR",
    "TILE_CELLS",
    "TIME_CHUNK_DAYS",
    "TIME_COORD_CHUNK",
    "TIME_UNITS",
    "VARIABLES",
    "VARIABLE_ATTRS",
    "DateTable",
    "Grid",
    "Layout",
    "RawEncoding",
    "Store",
    "VerifyResult",
    "_daily_numbers",
    "_date_table",
    "_exists",
    "_iso",
    "_normalise_location",
    "add_variables",
    "append_store",
    "check_grid_name",
    "compute_fingerprint",
    "decode",
    "default_grid_name",
    "find_grid",
    "is_lonlat_crs",
    "migrate_store",
    "open_for_check",
    "open_store",
    "recover",
    "relayout_store",
    "store_exists",
    "store_layout",
    "update_store",
    "verify_store",
    "write_layer",
    "write_store",
]
