"""The planes that features and cells meet in: equal-area frames, areas on the ground, reprojection.

Every area this package reports is an area on the ground (the grid's ellipsoid), in km2.

On a latitude-longitude grid, geometries are intersected in the cylindrical equal-area projection of the
grid's ellipsoid (Lambert, standard parallel at the equator), where every lat-lon cell is a rectangle whose
plane area is exactly the ellipsoidal area of its zone segment (Snyder 1987, "Map projections: a working
manual", USGS PP 1395, eqs 3-12 and 10-15).

On a projected grid, geometries are intersected in the grid's own plane (cells stay rectangles, so clipping
stays fast), and each piece's plane area is turned into ground area with the projection's areal scale factor
at the piece's centroid (pyproj ``Proj.get_factors``, PROJ's ``proj_factors``). Over a piece no larger than
a cell the factor is nearly constant: this midpoint rule was measured against pyproj.Geod at 1.4e-6 for
25 km cells, 5e-6 for 50 km and 2e-5 for 100 km cells (Lambert conformal, 36 N; the error grows with the
square of the cell size), far inside the 0.1 % asked. So the weights follow the ground area of each cell
fraction even where the scale factor varies across a large polygon. A whole feature's ground area (which may reach beyond the grid) is measured in a
Lambert azimuthal equal-area frame on the grid's datum, centred on the grid.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pyproj
import shapely

from service.errors import RequestError

if TYPE_CHECKING:
    from service.store import Grid

# A buffer circle is a regular polygon of this many vertices, its radius stretched so that its area equals
# pi r^2 exactly (the inscribed 64-gon alone would lose 0.16 % of the area).
BUFFER_VERTICES = 64
# Long edges of geographic coordinates are split before projecting, so that an edge stays (nearly) the
# straight lon-lat line GeoJSON means; over 0.01 degrees (about 1 km) the projected chord strays by
# millimetres (area error below 1e-4 of a small piece, 1e-6 of a community).
MAX_SEGMENT_DEGREES = 0.01
# Edges of polygons sent in a projected CRS are split to this length (metres) before reprojection, so an edge
# stays the straight line of the request's plane: a 100 km edge of a transverse Mercator polygon drawn as one
# chord on another plane can stray by tens of metres; split at 1 km the stray is 1e4 times smaller.
MAX_SEGMENT_METRES = 1000.0

WGS84 = pyproj.CRS.from_epsg(4326)
_WGS84 = WGS84


def buffer_circle(longitude: float, latitude: float, radius_m: float) -> shapely.Polygon:
    """A circle of ``radius_m`` metres around a lon/lat point, drawn in a local azimuthal equal-area frame.

    The frame is the Lambert azimuthal equal-area projection of WGS84 centred on the point; the polygon has
    BUFFER_VERTICES vertices and exactly the area pi r^2 in that frame; returned in WGS84 lon/lat degrees
    (longitudes within -180..180, so a circle around a point near 180 degrees jumps across the meridian).
    """
    return buffer_circles(np.array([longitude]), np.array([latitude]), np.array([radius_m]))[0]


def buffer_circles(longitude: np.ndarray, latitude: np.ndarray, radius_m: np.ndarray) -> np.ndarray:
    """Buffer circles (see :func:`buffer_circle`) of many points at once, as an array of shapely Polygons.

    Each circle's vertices are carried to lon/lat by the inverse of the ellipsoidal Lambert azimuthal
    equal-area projection centred on its own point, in numpy for all points together (Snyder 1987, "Map
    projections: a working manual", eqs 24-2 to 24-3 and 24-26 to 24-30 with the authalic-latitude series 3-18);
    PROJ's laea gives the same to 1e-9 degrees (tested), but needs one transformer per centre. Points within
    1e-6 degrees of a pole, where the oblique formulas divide by zero, go through PROJ one by one.
    BUFFER_BLOCK points at a time: every vertex is computed on its own, so blocks give the same bits (tested).
    """
    lon0 = np.asarray(longitude, dtype=np.float64).reshape(-1)
    lat0 = np.asarray(latitude, dtype=np.float64).reshape(-1)
    radius = np.asarray(radius_m, dtype=np.float64).reshape(-1)
    if lon0.size <= BUFFER_BLOCK:
        return _buffer_block(lon0, lat0, radius)
    blocks = range(0, lon0.size, BUFFER_BLOCK)
    return np.concatenate(
        [_buffer_block(*(a[i : i + BUFFER_BLOCK] for a in (lon0, lat0, radius))) for i in blocks]
    )


# Points per block of buffer_circles (and geometries per block of transform_in_blocks): the projection's
# temporaries of 50,000 circles at once (20-odd arrays of 3.2 M vertices) took a submission's RSS 300 MB up; a
# block of 4,096 circles holds about 2 MB per array.
BUFFER_BLOCK = 4096


def transform_in_blocks(geometries: np.ndarray, move: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
    """shapely.transform of an array of geometries, BUFFER_BLOCK geometries at a time, so that the coordinates
    of all of them and ``move``'s temporaries are never held at once; each vertex moves on its own, so the
    result is the same."""
    geometries = np.asarray(geometries, dtype=object)
    if geometries.ndim != 1 or geometries.size <= BUFFER_BLOCK:
        return shapely.transform(geometries, move)
    blocks = range(0, geometries.size, BUFFER_BLOCK)
    return np.concatenate([shapely.transform(geometries[i : i + BUFFER_BLOCK], move) for i in blocks])


def _buffer_block(lon0: np.ndarray, lat0: np.ndarray, radius: np.ndarray) -> np.ndarray:
    """buffer_circles of one block of points (1-D float64 arrays of equal length)."""
    n = BUFFER_VERTICES
    # Stretch the radius so the regular n-gon's area, (n/2) R^2 sin(2 pi / n), equals pi r^2.
    stretched = radius * math.sqrt(2 * math.pi / (n * math.sin(2 * math.pi / n)))
    angle = np.linspace(0.0, 2 * math.pi, n, endpoint=False)
    x = stretched[:, None] * np.cos(angle)[None, :]
    y = stretched[:, None] * np.sin(angle)[None, :]
    lon, lat = _laea_inverse(x, y, lon0[:, None], lat0[:, None])
    polar = np.flatnonzero(np.abs(lat0) > 90 - 1e-6)
    for k in polar:
        to_lonlat = pyproj.Transformer.from_pipeline(
            f"+proj=pipeline +step +inv +proj=laea +lat_0={float(lat0[k])!r} +lon_0={float(lon0[k])!r} +ellps=WGS84 "
            "+step +proj=unitconvert +xy_in=rad +xy_out=deg"
        )
        lon[k], lat[k] = to_lonlat.transform(x[k], y[k])
    rings = np.stack([lon, lat], axis=-1)
    rings = np.concatenate([rings, rings[:, :1]], axis=1)  # closed
    return shapely.polygons(shapely.linearrings(rings))


# WGS84 (Snyder 1987, table 1; EPSG 7030).
_A = 6_378_137.0
_E2 = 0.0066943799901413165  # e^2 = f (2 - f), f = 1 / 298.257223563


def _q(sin_phi: np.ndarray, e: float) -> np.ndarray:
    """Snyder's q (eq 3-12) of sin(latitude) on an ellipsoid of eccentricity e."""
    e2 = e * e
    return (1 - e2) * (
        sin_phi / (1 - e2 * sin_phi**2) - np.log((1 - e * sin_phi) / (1 + e * sin_phi)) / (2 * e)
    )


def _laea_inverse(
    x: np.ndarray, y: np.ndarray, lon0: np.ndarray, lat0: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Longitude, latitude (degrees) of points (x, y) metres of the WGS84 oblique LAEA centred on (lon0, lat0)."""
    a, e2 = _A, _E2
    e = math.sqrt(e2)
    phi1 = np.radians(lat0)
    qp = _q(np.array(1.0), e)
    q1 = _q(np.sin(phi1), e)
    beta1 = np.arcsin(np.clip(q1 / qp, -1.0, 1.0))
    rq = a * math.sqrt(qp / 2)  # eq 3-13
    m1 = np.cos(phi1) / np.sqrt(1 - e2 * np.sin(phi1) ** 2)  # eq 14-15
    d = a * m1 / (rq * np.cos(beta1))  # eq 24-20
    rho = np.sqrt((x / d) ** 2 + (d * y) ** 2)  # eq 24-28
    ce = 2 * np.arcsin(np.clip(rho / (2 * rq), -1.0, 1.0))  # eq 24-29
    safe = np.where(rho > 0, rho, 1.0)
    q = qp * (np.cos(ce) * np.sin(beta1) + d * y * np.sin(ce) * np.cos(beta1) / safe)  # eq 24-30
    q = np.where(rho > 0, q, q1)
    beta = np.arcsin(np.clip(q / qp, -1.0, 1.0))
    # authalic to geodetic latitude (eq 3-18)
    e4, e6 = e2 * e2, e2 * e2 * e2
    phi = (
        beta
        + (e2 / 3 + 31 * e4 / 180 + 517 * e6 / 5040) * np.sin(2 * beta)
        + (23 * e4 / 360 + 251 * e6 / 3780) * np.sin(4 * beta)
        + (761 * e6 / 45360) * np.sin(6 * beta)
    )
    lam = np.arctan2(
        x * np.sin(ce), d * rho * np.cos(beta1) * np.cos(ce) - d * d * y * np.sin(beta1) * np.sin(ce)
    )  # eq 24-26
    lon = lon0 + np.degrees(np.where(rho > 0, lam, 0.0))
    lon = (lon + 180.0) % 360.0 - 180.0
    return lon, np.degrees(phi)


# --- the grid as an intersection plane ------------------------------------------------------------------------


@dataclass(frozen=True)
class _Plane:
    """The plane that cells and features are intersected in, cells as rectangles, axes ascending.

    ``x_edges``/``y_edges`` ascending plane coordinates of the cell edges; ``x_flipped``/``y_flipped`` say
    whether the grid's own index runs the other way; ``to_plane`` maps (n, 2) grid-CRS coordinates to the
    plane; ``to_lonlat`` maps plane coordinates to WGS84 degrees. ``km2_per_unit2`` converts plane areas to
    km2 where that is one number (lat-lon grids); on projected grids ``ground_km2(x, y)`` gives the km2 of
    one plane unit^2 at plane points. ``period`` is the plane width of 360 degrees of longitude on lat-lon
    grids (None on projected grids).
    """

    x_edges: np.ndarray
    y_edges: np.ndarray
    x_centres: np.ndarray
    y_centres: np.ndarray
    x_flipped: bool
    y_flipped: bool
    to_plane: Callable[[np.ndarray], np.ndarray]
    to_lonlat: Callable[[np.ndarray], np.ndarray]
    km2_per_unit2: float
    period: float | None = None
    ground_km2: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None
    areas_km2: Callable[[np.ndarray], np.ndarray] | None = None

    @property
    def geographic(self) -> bool:
        """Whether this is the equal-area image of a lat-lon grid (plane areas are ground areas)."""
        return self.period is not None

    def feature_areas_km2(self, geometries: np.ndarray) -> np.ndarray:
        """Ground area (km2) of plane geometries, whole (also where they reach beyond the grid)."""
        if self.areas_km2 is None:
            return shapely.area(geometries) * self.km2_per_unit2
        return self.areas_km2(geometries)

    def piece_areas_km2(self, area: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Ground area (km2) of pieces of plane area ``area`` whose centroids are at plane (x, y)."""
        if self.ground_km2 is None:
            return area * self.km2_per_unit2
        return area * self.ground_km2(x, y)


def authalic_y(latitude_deg: np.ndarray, semi_major: float, eccentricity: float) -> np.ndarray:
    """Northing (m) of the cylindrical equal-area projection (standard parallel 0) of an ellipsoid.

    y = a q / 2 with q = (1 - e^2) [sin p / (1 - e^2 sin^2 p) - ln((1 - e sin p) / (1 + e sin p)) / (2 e)]
    (Snyder 1987, eqs 3-12 and 10-15, with k0 = 1); on a sphere (e = 0) y = a sin p.
    """
    s = np.sin(np.radians(np.asarray(latitude_deg, dtype=np.float64)))
    e = eccentricity
    if e < 1e-12:
        return semi_major * s
    q = (1 - e * e) * (s / (1 - e * e * s * s) - np.log((1 - e * s) / (1 + e * s)) / (2 * e))
    return semi_major * q / 2


def _plane(grid: Grid) -> _Plane:
    """The intersection plane of a grid: its cylindrical equal-area image if lat-lon, else its own plane."""
    arrays = (grid.x, grid.y, grid.x_edges, grid.y_edges)
    keys = tuple(np.ascontiguousarray(a, dtype=np.float64).tobytes() for a in arrays)
    return _plane_of(grid.crs_wkt, *keys, bool(grid.is_geographic))


@functools.lru_cache(maxsize=32)
def _plane_of(
    crs_wkt: str, x_bytes: bytes, y_bytes: bytes, x_edge_bytes: bytes, y_edge_bytes: bytes, geographic: bool
) -> _Plane:
    """The plane of a grid given by its CRS, centres and edges (cached: transformers take ms to build)."""
    x_centres, y_centres, x_edges, y_edges = (
        np.frombuffer(b, dtype=np.float64) for b in (x_bytes, y_bytes, x_edge_bytes, y_edge_bytes)
    )
    grid_crs = pyproj.CRS.from_wkt(crs_wkt)
    x_flipped = bool(x_edges[-1] < x_edges[0])
    y_flipped = bool(y_edges[-1] < y_edges[0])
    if x_flipped:
        x_edges, x_centres = x_edges[::-1], x_centres[::-1]
    if y_flipped:
        y_edges, y_centres = y_edges[::-1], y_centres[::-1]
    if geographic:
        return _lonlat_plane(grid_crs, x_edges, y_edges, x_centres, y_centres, x_flipped, y_flipped)
    return _projected_plane(grid_crs, x_edges, y_edges, x_centres, y_centres, x_flipped, y_flipped)


def _semi_axes(crs: pyproj.CRS) -> tuple[float, float]:
    """(a, b) in metres of a CRS's ellipsoid (WGS84's when it names none)."""
    ellipsoid = crs.ellipsoid
    a = float(ellipsoid.semi_major_metre) if ellipsoid is not None else 6_378_137.0
    b = float(ellipsoid.semi_minor_metre) if ellipsoid is not None else 6_356_752.314245
    return a, b


def _base_geographic(crs: pyproj.CRS) -> pyproj.CRS:
    """The geographic CRS a derived geographic CRS (a rotated pole) turns; WGS84 if it names none."""
    base = crs.to_json_dict().get("base_crs")
    if base is None:
        return crs.geodetic_crs if crs.geodetic_crs is not None else _WGS84
    return pyproj.CRS.from_json_dict(base)


def _lonlat_plane(
    grid_crs: pyproj.CRS,
    x_edges: np.ndarray,
    y_edges: np.ndarray,
    x_centres: np.ndarray,
    y_centres: np.ndarray,
    x_flipped: bool,
    y_flipped: bool,
) -> _Plane:
    """The cylindrical equal-area image of a lat-lon grid, centred on the grid's middle longitude.

    A rotated-pole grid (a derived geographic CRS, CF's rotated_latitude_longitude) is a lat-lon grid on a
    sphere turned under the Earth: PROJ's ob_tran turns geodetic coordinates with the sphere's rotation, which
    keeps cos(lat) dlat dlon. Its plane is the spherical equal-area image of the rotated coordinates (x = a
    lambda', y = a sin phi'), exact on a spherical datum; on an ellipsoid a plane area there times
    M N / a^2 at the geodetic latitude (M, N the radii of curvature; Snyder 1987, eqs 4-18, 4-20) is the
    ground area, applied at each piece as on projected grids.
    """
    a, b = _semi_axes(grid_crs)
    e = math.sqrt(max(0.0, 1 - (b / a) ** 2))
    lon0 = float((x_edges[0] + x_edges[-1]) / 2)
    rotated = bool(getattr(grid_crs, "is_derived", False))
    e_plane, b_plane = (0.0, a) if rotated else (e, b)

    def to_plane(xy: np.ndarray) -> np.ndarray:
        # Easting is linear in longitude (no wrap-around at lon0 +- 180, on purpose: antimeridian.py copies
        # pieces by whole turns of longitude onto the grid instead).
        return np.column_stack([a * np.radians(xy[:, 0] - lon0), authalic_y(xy[:, 1], a, e_plane)])

    inverse = pyproj.Transformer.from_pipeline(
        f"+proj=pipeline +step +inv +proj=cea +lat_ts=0 +lon_0={lon0!r} +a={a!r} +b={b_plane!r} "
        "+step +proj=unitconvert +xy_in=rad +xy_out=deg"
    )
    to_wgs84 = None
    if rotated or not grid_crs.equals(_WGS84, ignore_axis_order=True):
        to_wgs84 = pyproj.Transformer.from_crs(grid_crs, _WGS84, always_xy=True)

    def to_lonlat(xy: np.ndarray) -> np.ndarray:
        x, y = inverse.transform(xy[:, 0], xy[:, 1])
        if to_wgs84 is not None:  # rotated coordinates (or another datum's) are not WGS84 longitude/latitude
            x, y = to_wgs84.transform(x, y)
        return np.column_stack([x, y])

    ground_km2 = areas_km2 = None
    if rotated and e > 1e-12:
        geodetic = _base_geographic(grid_crs)
        to_geodetic = pyproj.Transformer.from_crs(grid_crs, geodetic, always_xy=True)

        def ground_km2(x: np.ndarray, y: np.ndarray) -> np.ndarray:
            lam = np.degrees(np.asarray(x, np.float64) / a) + lon0
            phi = np.degrees(np.arcsin(np.clip(np.asarray(y, np.float64) / a, -1.0, 1.0)))
            _, lat = to_geodetic.transform(lam, phi)
            s2 = np.sin(np.radians(lat)) ** 2
            return 1e-6 * (1 - e * e) / (1 - e * e * s2) ** 2  # M N / a^2, km2 per m2 of the plane

        def plane_to_grid(xy: np.ndarray) -> np.ndarray:
            return np.column_stack(inverse.transform(xy[:, 0], xy[:, 1]))

        centre = (lon0, float((y_edges[0] + y_edges[-1]) / 2))
        areas_km2 = _equal_area_areas(grid_crs, geodetic, centre, MAX_SEGMENT_METRES, plane_to_grid)

    return _Plane(
        x_edges=a * np.radians(x_edges - lon0),
        y_edges=authalic_y(y_edges, a, e_plane),
        x_centres=a * np.radians(x_centres - lon0),
        y_centres=authalic_y(y_centres, a, e_plane),
        x_flipped=x_flipped,
        y_flipped=y_flipped,
        to_plane=to_plane,
        to_lonlat=to_lonlat,
        km2_per_unit2=1e-6,
        period=2 * math.pi * a,
        ground_km2=ground_km2,
        areas_km2=areas_km2,
    )


def _projected_plane(
    grid_crs: pyproj.CRS,
    x_edges: np.ndarray,
    y_edges: np.ndarray,
    x_centres: np.ndarray,
    y_centres: np.ndarray,
    x_flipped: bool,
    y_flipped: bool,
) -> _Plane:
    """A projected grid's own plane, with the areal scale factor that turns plane areas into ground areas."""
    unit = float(grid_crs.axis_info[0].unit_conversion_factor) if grid_crs.axis_info else 1.0
    to_wgs84 = pyproj.Transformer.from_crs(grid_crs, _WGS84, always_xy=True)
    geodetic = grid_crs.geodetic_crs if grid_crs.geodetic_crs is not None else _WGS84
    to_geodetic = pyproj.Transformer.from_crs(grid_crs, geodetic, always_xy=True)
    projection = pyproj.Proj(grid_crs)
    km2_per_unit2 = unit**2 * 1e-6

    def to_lonlat(xy: np.ndarray) -> np.ndarray:
        return np.column_stack(to_wgs84.transform(xy[:, 0], xy[:, 1]))

    def ground_km2(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        # areal_scale is plane area over ground area at a point (PROJ proj_factors); it is the same whatever
        # the axis unit, which km2_per_unit2 accounts for.
        lon, lat = to_geodetic.transform(np.asarray(x, np.float64), np.asarray(y, np.float64))
        scale = np.asarray(projection.get_factors(lon, lat, errcheck=False).areal_scale, dtype=np.float64)
        return km2_per_unit2 / scale

    centre = (float((x_edges[0] + x_edges[-1]) / 2), float((y_edges[0] + y_edges[-1]) / 2))
    areas_km2 = _equal_area_areas(grid_crs, geodetic, centre, MAX_SEGMENT_METRES / unit, None)

    return _Plane(
        x_edges=x_edges,
        y_edges=y_edges,
        x_centres=x_centres,
        y_centres=y_centres,
        x_flipped=x_flipped,
        y_flipped=y_flipped,
        to_plane=lambda xy: xy,
        to_lonlat=to_lonlat,
        km2_per_unit2=km2_per_unit2,
        ground_km2=ground_km2,
        areas_km2=areas_km2,
    )


def _equal_area_areas(
    grid_crs: pyproj.CRS,
    geodetic: pyproj.CRS,
    centre: tuple[float, float],
    segment: float,
    plane_to_grid: Callable[[np.ndarray], np.ndarray] | None,
) -> Callable[[np.ndarray], np.ndarray]:
    """A function giving the ground area (km2) of whole plane geometries, also where they leave the grid.

    They are measured in a Lambert azimuthal equal-area frame on the grid's own datum, centred on the grid
    (``centre`` in grid-CRS coordinates), after their edges are split every ``segment`` plane units so that
    they keep the shape they have on the plane; ``plane_to_grid`` maps plane to grid-CRS coordinates
    (None: the plane is the grid's own).
    """
    to_geodetic = pyproj.Transformer.from_crs(grid_crs, geodetic, always_xy=True)
    centre_lon, centre_lat = to_geodetic.transform(*centre)
    equal_area = pyproj.crs.ProjectedCRS(
        conversion=pyproj.crs.coordinate_operation.LambertAzimuthalEqualAreaConversion(
            latitude_natural_origin=float(centre_lat), longitude_natural_origin=float(centre_lon)
        ),
        geodetic_crs=geodetic,
    )
    to_equal_area = pyproj.Transformer.from_crs(grid_crs, equal_area, always_xy=True)

    def move(xy: np.ndarray) -> np.ndarray:
        if plane_to_grid is not None:
            xy = plane_to_grid(xy)
        return np.column_stack(to_equal_area.transform(xy[:, 0], xy[:, 1]))

    def areas_km2(geometries: np.ndarray) -> np.ndarray:
        return shapely.area(transform_in_blocks(shapely.segmentize(geometries, segment), move)) * 1e-6

    return areas_km2


def _to_grid(geometries: np.ndarray, source: pyproj.CRS, grid_crs: pyproj.CRS) -> np.ndarray:
    """Geometries reprojected from the request CRS to the grid CRS, long edges split first.

    Edges are straight lines in the request's CRS (lon/lat lines for geographic coordinates, as GeoJSON
    means them); they are split to MAX_SEGMENT_DEGREES or MAX_SEGMENT_METRES before the vertices move, so
    they stay (nearly) those lines on the grid's plane.
    """
    if source.is_geographic:
        geometries = shapely.segmentize(geometries, MAX_SEGMENT_DEGREES)
    if source.equals(grid_crs, ignore_axis_order=True):
        return geometries
    if not source.is_geographic:
        unit = float(source.axis_info[0].unit_conversion_factor) if source.axis_info else 1.0
        geometries = shapely.segmentize(geometries, MAX_SEGMENT_METRES / unit)
    try:
        transformer = pyproj.Transformer.from_crs(source, grid_crs, always_xy=True)
    except pyproj.exceptions.ProjError as exc:
        raise RequestError(
            f"the request's crs ({source.name!r}) cannot be carried to the grid's ({grid_crs.name!r}): {exc}; "
            "give the coordinates in another CRS, e.g. 'EPSG:4326' (longitude/latitude)",
            field="crs",
            pointer="/crs",
        ) from None

    def move(xy: np.ndarray) -> np.ndarray:
        return np.column_stack(transformer.transform(xy[:, 0], xy[:, 1]))

    return transform_in_blocks(geometries, move)


def cell_areas_km2(grid: Grid) -> np.ndarray:
    """Ground area (km2) of every cell, (ny, nx) in the grid's own order, on the grid's ellipsoid.

    Exact on lat-lon grids; on projected grids the plane area times the areal scale factor at the cell
    centre (midpoint rule, see the module's docstring).
    """
    plane = _plane(grid)
    areas = np.outer(np.diff(plane.y_edges), np.diff(plane.x_edges))
    if plane.ground_km2 is None:
        areas = areas * plane.km2_per_unit2
    else:
        cx, cy = np.meshgrid(plane.x_centres, plane.y_centres)
        areas = areas * plane.ground_km2(cx.ravel(), cy.ravel()).reshape(areas.shape)
    if plane.y_flipped:
        areas = areas[::-1]
    if plane.x_flipped:
        areas = areas[:, ::-1]
    return np.ascontiguousarray(areas)
