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
    """A grid of a store: cell centres as 1-D arrays in the grid's CRS (degrees or metres).

    ``is_geographic`` is the CRS's own (True for a rotated pole too, whose degrees are not longitude and
    latitude: :func:`is_lonlat_crs` tells those apart). ``lat``/``lon`` are the
    optional (ny, nx) cell-centre latitudes and longitudes a file carried (curvilinear or rotated grids);
    equality ignores them.
    """

    crs_wkt: str
    x: np.ndarray
    y: np.ndarray
    is_geographic: bool
    lat: np.ndarray | None = None
    lon: np.ndarray | None = None

    @classmethod
    def from_crs(
        cls,
        crs: pyproj.CRS,
        x: np.ndarray,
        y: np.ndarray,
        lat: np.ndarray | None = None,
        lon: np.ndarray | None = None,
    ) -> Grid:
        """A grid from a pyproj CRS and its cell centres."""
        return cls(
            crs_wkt=crs.to_wkt(),
            x=np.asarray(x, dtype=np.float64),
            y=np.asarray(y, dtype=np.float64),
            is_geographic=bool(crs.is_geographic),
            lat=None if lat is None else np.asarray(lat, dtype=np.float64),
            lon=None if lon is None else np.asarray(lon, dtype=np.float64),
        )

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


def is_lonlat_crs(crs: pyproj.CRS) -> bool:
    """True when a CRS's coordinates are longitude and latitude: geographic and not derived (a rotated pole
    is a derived geographic CRS whose degrees are not longitudes and latitudes)."""
    return bool(crs.is_geographic and not crs.is_derived)


# Points along each side of a grid's outline at least: curved sides of a projected grid are followed closely.
OUTLINE_POINTS_PER_SIDE = 256


def _densify(edges: np.ndarray) -> np.ndarray:
    """The edges with points added between them, so that a side has at least OUTLINE_POINTS_PER_SIDE points."""
    per_step = max(1, -(-OUTLINE_POINTS_PER_SIDE // max(1, edges.size - 1)))
    if per_step == 1:
        return edges
    steps = np.linspace(0.0, 1.0, per_step, endpoint=False)
    inner = edges[:-1, None] + (edges[1:] - edges[:-1])[:, None] * steps[None, :]
    return np.concatenate([inner.ravel(), edges[-1:]])


def _ring(xe: np.ndarray, ye: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A closed ring of points along the outer cell edges (bottom, right, top, left), in CRS units."""
    xd, yd = _densify(xe), _densify(ye)
    xs = np.concatenate([xd, np.full(yd.size, xd[-1]), xd[::-1], np.full(yd.size, xd[0])])
    ys = np.concatenate([np.full(xd.size, yd[0]), yd, np.full(xd.size, yd[-1]), yd[::-1]])
    return xs, ys


def _corners(centres: np.ndarray, *, period: float | None = None) -> np.ndarray:
    """(ny + 1, nx + 1) cell corners from (ny, nx) centres: linear extrapolation by half a cell at the borders,
    then the mean of the four surrounding centres. ``period`` (360 for longitudes) unwraps jumps first."""
    c = np.asarray(centres, dtype=np.float64)
    if period is not None:
        c = np.unwrap(np.unwrap(c, period=period, axis=1), period=period, axis=0)
    for axis in (0, 1):
        if c.shape[axis] == 1:
            c = np.concatenate([c, c], axis=axis)
        first = np.take(c, [0], axis=axis) * 2 - np.take(c, [1], axis=axis)
        last = np.take(c, [-1], axis=axis) * 2 - np.take(c, [-2], axis=axis)
        c = np.concatenate([first, c, last], axis=axis)
    return (c[:-1, :-1] + c[1:, :-1] + c[:-1, 1:] + c[1:, 1:]) / 4.0


def _outline_of_corners(corners: np.ndarray) -> np.ndarray:
    """The boundary of a (ny + 1, nx + 1) array of corners as one closed ring (bottom, right, top, left)."""
    return np.concatenate([corners[0, :], corners[1:, -1], corners[-1, -2::-1], corners[-2:0:-1, 0]])


def lonlat_box(lon: np.ndarray, lat: np.ndarray) -> dict[str, float]:
    """The longitude-latitude box of a closed ring of points around a region (degrees).

    The ring is unwrapped along its path: when it winds once around a pole, the region holds that pole (north 90
    or south -90, every longitude); a box crossing the antimeridian has west > east (RFC 7946, section 5.2).
    """
    lon = np.asarray(lon, dtype=np.float64)
    lat = np.asarray(lat, dtype=np.float64)
    keep = np.isfinite(lon) & np.isfinite(lat)
    lon, lat = lon[keep], lat[keep]
    if lon.size == 0:
        raise StoreFormatError("the grid's outline has no finite longitude-latitude point")
    path = np.unwrap(np.append(lon, lon[:1]), period=360.0)
    winding = path[-1] - path[0]
    south, north = float(np.min(lat)), float(np.max(lat))
    if abs(winding) > 180.0:  # once around a pole
        if float(np.mean(lat)) >= 0:
            north = 90.0
        else:
            south = -90.0
        return {"west": -180.0, "south": south, "east": 180.0, "north": north}
    west, east = float(np.min(path)), float(np.max(path))
    if east - west >= 360.0 - 1e-9:
        return {"west": -180.0, "south": south, "east": 180.0, "north": north}
    west_n = (west + 180.0) % 360.0 - 180.0
    east_n = west_n + (east - west)
    if east_n > 180.0:
        east_n -= 360.0
    return {"west": _tidy(west_n), "south": _tidy(south), "east": _tidy(east_n), "north": _tidy(north)}


def _lonlat_bounds(grid: Grid) -> dict[str, float]:
    """Longitude-latitude box around the grid: its outline transformed from the grid's CRS to longitude and
    latitude (WGS 84), or, where the grid carries 2-D latitudes and longitudes, their cells' outer corners.
    Never the grid's own coordinates read as degrees: projected and rotated coordinates are transformed."""
    if grid.lat is not None and grid.lon is not None:
        lon = _outline_of_corners(_corners(grid.lon, period=360.0))
        lat = np.clip(_outline_of_corners(_corners(grid.lat)), -90.0, 90.0)
        return lonlat_box(lon, lat)
    xs, ys = _ring(grid.x_edges, grid.y_edges)
    to_lonlat = pyproj.Transformer.from_crs(grid.crs(), "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform(xs, ys)
    return lonlat_box(np.asarray(lon), np.asarray(lat))


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
