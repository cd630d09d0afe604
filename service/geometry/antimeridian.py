"""The 180th meridian: features moved by 360 degrees of longitude onto grids written in 0..360."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import shapely

if TYPE_CHECKING:
    from service.store import Grid


def _wrap_longitudes(geometries: np.ndarray, grid: Grid) -> np.ndarray:
    """Features shifted by 360 degrees of longitude where that puts them on the grid (0-360 grids)."""
    xmin, _, xmax, _ = grid.bounds()
    bounds = shapely.bounds(geometries)
    out = geometries.copy()
    for shift in (360.0, -360.0):
        moved = (bounds[:, 2] + shift > xmin) & (bounds[:, 0] + shift < xmax)
        off = (bounds[:, 2] <= xmin) | (bounds[:, 0] >= xmax)
        pick = np.flatnonzero(moved & off)
        if pick.size:
            out[pick] = shapely.transform(geometries[pick], lambda xy, s=shift: xy + np.array([s, 0.0]))
            bounds[pick] = shapely.bounds(out[pick])
    return out
