"""A store's grid: CRS, cell centres and edges, resolution, and its outline in longitude-latitude."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pyproj
import xarray as xr

from service.errors import StoreFormatError
from service.store.layout import GRID_MAPPING, VARIABLES


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
