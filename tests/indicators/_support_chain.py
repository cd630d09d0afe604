"""Small stores written in a test, and requests run through the whole chain (request -> pipeline.run -> table).

The stores hold exactly the values a test gives (rounded to the storage step, 0.1), on an invented
0.5-degree grid over open ocean; communities are rectangles in lon/lat.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyproj
import xarray as xr

from service.encode import RunResult
from service.pipeline import run
from service.schemas import IndicatorRequest, validate_request
from service.settings import Settings
from service.store import Store, open_store, write_store

CELL = 0.5
ORIGIN = (-150.0, -40.0)  # lon, lat of the grid's south-west corner (open South Pacific)


def days(first_year: int, last_year: int) -> pd.DatetimeIndex:
    """Every day of the standard calendar from 1 January of the first year to 31 December of the last."""
    return pd.date_range(f"{first_year}-01-01", f"{last_year}-12-31", freq="D")


def write_grid(
    path: Path,
    time: pd.DatetimeIndex,
    values: Mapping[str, np.ndarray],
    layers: Mapping[str, np.ndarray] = {},
) -> Store:
    """A store of daily ``values`` (name -> (time, y, x) array in degC or mm/day; NaN missing), opened.

    Row 0 of y is the northernmost row. Values are stored as 0.1-unit integers, so give values on that step.
    """
    first = next(iter(values.values()))
    _, ny, nx = first.shape
    x = ORIGIN[0] + CELL * (np.arange(nx) + 0.5)
    y = (ORIGIN[1] + CELL * (np.arange(ny) + 0.5))[::-1]
    data_vars: dict[str, Any] = {
        name: (("time", "y", "x"), np.asarray(v, dtype=np.float64), {"grid_mapping": "crs"})
        for name, v in values.items()
    }
    for name, layer in layers.items():
        data_vars[name] = (("y", "x"), np.asarray(layer, dtype=np.float64), {"units": "1"})
    data_vars["crs"] = ((), np.int32(0), {"crs_wkt": pyproj.CRS.from_epsg(4326).to_wkt()})
    ds = xr.Dataset(data_vars, coords={"time": time.values, "y": y, "x": x})
    write_store(ds, path)
    return open_store(path)


def cell_box(row: int, col: int, ny: int, inset: float = 0.1) -> tuple[float, float, float, float]:
    """(west, south, east, north) of a box inside grid cell (row, col), row 0 northernmost of ``ny`` rows."""
    west = ORIGIN[0] + CELL * col
    south = ORIGIN[1] + CELL * (ny - 1 - row)
    return (west + inset, south + inset, west + CELL - inset, south + CELL - inset)


def feature(fid: str, box: tuple[float, float, float, float]) -> dict[str, Any]:
    """A rectangular community (GeoJSON Feature) from (west, south, east, north)."""
    w, s, e, n = box
    ring = [[w, s], [e, s], [e, n], [w, n], [w, s]]
    return {
        "type": "Feature",
        "id": fid,
        "geometry": {"type": "Polygon", "coordinates": [ring]},
        "properties": {},
    }


def run_chain(store: Store, features: list[dict[str, Any]], tmp_path: Path, **fields: Any) -> RunResult:
    """The request (validated by the one request model) run by pipeline.run on local threads."""
    body = {"features": {"type": "FeatureCollection", "features": features}, **fields}
    request = validate_request(IndicatorRequest, body)
    return run(request, store, Settings(data_dir=tmp_path, threads=1))
