"""Aggregation 'cells': each indicator per grid cell, then the weighted mean of the cell values."""

from typing import Any

import dask
import numpy as np
import pyproj

from service import cluster
from service.aggregate import GridWeights, aggregate, weights_on
from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.geometry import Weights
from service.indicators.base import VARIABLES, DailySeries, snap_daily, snap_decimals
from service.indicators.table import (
    IndicatorTable,
    RawValues,
    cell_groups,
    compute_cell_values,
    compute_table,
    compute_table_from_grid_cells,
    concat_raw,
    plan_indicators,
)
from service.pipeline.core import _daily_series, _first_feature, check_cells_grids, store_daily_series
from service.schemas import IndicatorRequest
from service.settings import Settings
from service.store import Store


def _aggregated_daily(
    store: Store, weights: Weights, span: slice, variables: tuple[str, ...], settings: Settings
) -> DailySeries:
    """The weighted daily means of the rows of ``weights`` over ``span``, computed, snapped, as a DailySeries."""
    # The indicators take tmean from tmax and tmin themselves; not computing the Dataset's tmean saves a
    # quarter of the series moved back from a dask cluster (and the work of making it).
    daily_lazy = aggregate(store, weights, variables=variables, time=span).drop_vars("tmean", errors="ignore")
    (daily_ds,) = cluster.compute(daily_lazy, settings=settings)
    return _daily_series(daily_ds, store, span, np.asarray(weights.latitude))


def cell_centres_lonlat(
    store: Store, cells: np.ndarray, grid_name: str | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Longitude and latitude (degrees, WGS84) of the centres of cells ``cells`` (iy * nx + ix) of a grid
    (the store's first grid when not named)."""
    grid = store.grids[grid_name or store.main_grid]
    iy, ix = np.divmod(np.asarray(cells, dtype=np.int64), grid.shape[1])
    x, y = np.asarray(grid.x)[ix], np.asarray(grid.y)[iy]
    # through PROJ even for a geographic grid: a rotated-pole grid is geographic in its own coordinates
    to_lonlat = pyproj.Transformer.from_crs(grid.crs(), pyproj.CRS.from_epsg(4326), always_xy=True)
    lon, lat = to_lonlat.transform(x, y)
    return np.asarray(lon, dtype=np.float64), np.asarray(lat, dtype=np.float64)


def cell_daily_series(
    store: Store, cells: np.ndarray, span: slice, variables: tuple[str, ...], grid: str | None = None
) -> DailySeries:
    """The stored daily values of grid cells ``cells`` (iy * nx + ix, best all in one read unit) over ``span``.

    Decoded and snapped like every daily mean (daily_values), so a stored 25.0 is exactly 25.0; one window
    read per variable over the cells' bounding box. Latitude is each cell centre's (for SPEI's radiation).
    The cells are those of ``grid`` (the store's first grid when not named), where ``variables`` all lie.
    """
    ny, nx = store.grids[grid or store.main_grid].shape
    iy, ix = np.divmod(np.asarray(cells, dtype=np.int64), nx)
    y, x = slice(int(iy.min()), int(iy.max()) + 1), slice(int(ix.min()), int(ix.max()) + 1)
    arrays: dict[str, np.ndarray | None] = dict.fromkeys(VARIABLES)
    for var in variables:
        # pick the cells from the stored integers, then decode once into one fresh array: fresh memory is
        # the costly part here (page faults), so no full-size temporaries
        raw = store.read_raw(var, y, x, span)[iy - y.start, ix - x.start]  # (cells, days) integers
        enc = store.encoding(var)
        values = raw.astype(np.float64)
        steps = 1.0 / enc.scale_factor
        if enc.add_offset == 0.0 and abs(steps - round(steps)) < 1e-9:
            # raw / 10 is correctly rounded: the double nearest the decimal value, as snapping gives
            values /= round(steps)
        else:
            values *= enc.scale_factor
            values += enc.add_offset
            snap_daily(values, snap_decimals(enc.scale_factor, enc.add_offset))
        values[raw == enc.fill_value] = np.nan
        arrays[var] = values
    _, lat = cell_centres_lonlat(store, cells, grid)
    return store_daily_series(store, span, arrays, lat)


def cell_chunk_values(
    store: Store,
    cells: np.ndarray,
    span: slice,
    variables: tuple[str, ...],
    resolved: IndicatorRequest,
    groups: list[Any],
    grid: str | None = None,
) -> list[RawValues]:
    """One task of aggregation "cells": the raw indicator values of some cells of one read unit, per group."""
    return compute_cell_values(cell_daily_series(store, cells, span, variables, grid), resolved, groups)


def cells_table(
    store: Store,
    batch: Weights | GridWeights,
    properties: list[dict | None],
    resolved: IndicatorRequest,
    span: slice,
    variables: tuple[str, ...],
    settings: Settings,
) -> IndicatorTable:
    """Aggregation "cells": each cell the features touch gets its own stored daily series and indicator
    values, then each feature's values are the weighted means of its cells' values.

    One task per read unit (the store's chunk or shard) that the features touch: it reads the unit's
    touched cells and returns their raw indicator values (small), so the daily series of the cells never
    travel and the tasks run on the cluster like the aggregation's. A cell's series is its stored value
    (snapped as every daily mean); SPEI's radiation uses the cell centre's latitude. The features' weights
    (area, or area times a layer) weigh the cell values: see service.indicators.table.combine_cells for
    cells without a value. In a dataset with several grids each indicator is computed on the cells of the
    grid of its variables (check_cells_grids refuses one across grids), all grids' tasks in one computation.
    """
    check_cells_grids(resolved, store)
    groups = cell_groups(batch.feature_ids, properties, resolved)
    parts = []  # per grid: (its indicators' request, its weights, cells, one task per read unit)
    for grid, request, grid_vars in _cells_requests(store, resolved, variables):
        matrix = weights_on(batch, grid).matrix.tocsr()
        cells = np.unique(matrix.indices[matrix.data > 0]).astype(np.int64)
        if not cells.size:  # no feature of the batch has a cell on this grid (skipped features)
            continue
        ny, nx = store.grids[grid].shape
        cy, cx, _ = store.chunk_shape_of(grid_vars[0])
        iy, ix = np.divmod(cells, nx)
        unit = (iy // cy) * (-(-nx // cx)) + ix // cx
        order = np.argsort(unit, kind="stable")
        cells, unit = cells[order], unit[order]
        starts = np.flatnonzero(np.r_[True, np.diff(unit) != 0])
        light = dask.delayed(request.model_copy(update={"features": _first_feature(resolved)}))
        tasks = [
            dask.delayed(cell_chunk_values, pure=False)(store, piece, span, grid_vars, light, groups, grid)
            for piece in np.split(cells, starts[1:])
        ]
        parts.append((matrix[:, cells], tasks))
    if len(parts) < len(_cells_requests(store, resolved, variables)):
        # some grid has no cell for the batch (only skipped features): their rows stay null
        daily = _aggregated_daily(store, batch, span, variables, settings)
        return compute_table(daily, list(batch.feature_ids), [p or {} for p in properties], resolved)
    results = cluster.compute(*(t for _, tasks in parts for t in tasks), settings=settings)
    joined, at = [], 0
    for matrix, tasks in parts:
        mine = results[at : at + len(tasks)]
        at += len(tasks)
        joined.append(([concat_raw([r[g] for r in mine]) for g in range(len(groups))], matrix))
    return compute_table_from_grid_cells(
        joined, list(batch.feature_ids), [p or {} for p in properties], resolved
    )


def _cells_requests(
    store: Store, resolved: IndicatorRequest, variables: tuple[str, ...]
) -> list[tuple[str, IndicatorRequest, tuple[str, ...]]]:
    """Per grid read under aggregation "cells": the grid, the request of the indicators on it, their variables
    (one entry with the whole request in a single-grid dataset or when every variable lies on one grid)."""
    grids = list(dict.fromkeys(store.grid_of(v) for v in variables))
    if len(grids) <= 1:
        return [(grids[0] if grids else store.main_grid, resolved, variables)]
    specs = list(resolved.indicators or [])
    out = []
    for grid in grids:
        mine = [
            spec
            for spec, planned in zip(specs, plan_indicators(specs), strict=True)
            if any(store.grid_of(v) == grid for v in planned.indicator.variables if v in store.variables)
        ]
        used = {v for p in plan_indicators(mine) for v in p.indicator.variables}
        grid_vars = tuple(v for v in variables if v in used)
        out.append((grid, resolved.model_copy(update={"indicators": mine}), grid_vars))
    return out
