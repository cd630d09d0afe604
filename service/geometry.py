"""GeoJSON communities in, checked and reprojected; exact cell-overlap weights as one sparse matrix.

Two steps. :func:`parse_features` reads a GeoJSON Feature or FeatureCollection (a plain dict), checks every
ring, coordinate and id, and turns survey-cluster Points into buffered circles drawn in a local equal-area
frame. :func:`compute_weights` puts the features on a store's grid: the weight of a cell is the area
(km2) of feature intersected with cell, times a weight layer when one is given, on cells with data only.

Areas on a latitude-longitude grid are true areas on the grid's ellipsoid: geometries are intersected in
the cylindrical equal-area projection of that ellipsoid (Lambert, standard parallel at the equator), where
every lat-lon cell is a rectangle whose plane area is exactly the ellipsoidal area of its zone segment
(Snyder 1987, "Map projections: a working manual", USGS PP 1395, eqs 3-12 and 10-15). On a projected
grid the grid's own plane is used.
"""

from __future__ import annotations

import hashlib
import math
import threading
from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj
import shapely
from scipy import sparse

from service.errors import FeatureError, FeatureWithoutDataError, LimitExceededError, RequestError

if TYPE_CHECKING:
    from service.store import Grid

WEIGHTINGS = ("area", "centers")

# Survey programmes displace published cluster points by a few km (common practice: up to 2 km urban,
# 5-10 km rural); a radius beyond 100 km describes a region, not a cluster, and is almost surely a unit error.
MAX_BUFFER_M = 100_000.0
# A buffer circle is a regular polygon of this many vertices, its radius stretched so that its area equals
# pi r^2 exactly (the inscribed 64-gon alone would lose 0.16 % of the area).
BUFFER_VERTICES = 64
# Long edges of geographic coordinates are split before projecting, so that an edge stays (nearly) the
# straight lon-lat line GeoJSON means; over 0.01 degrees (about 1 km) the projected chord strays by
# millimetres (area error below 1e-4 of a small piece, 1e-6 of a community).
MAX_SEGMENT_DEGREES = 0.01
# Candidate cells handled in one vectorised pass (bounds memory: about 100 bytes per candidate).
CANDIDATES_PER_PASS = 2_000_000
# A feature's bounding box may hold this many times max_cells candidate cells before it is refused
# outright (a ring-shaped or diagonal community touches far fewer cells than its bounding box holds).
BBOX_CELLS_FACTOR = 16

_WGS84 = pyproj.CRS.from_epsg(4326)


# --- parsed features ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Feature:
    """One community: its id, geometry as sent (request CRS), properties, and buffer radius (m) for Points.

    ``footprint`` is the area that weights are computed on, in the request CRS: the polygon itself, or a
    Point's buffer circle. ``pointer`` is the JSON pointer of the feature in the request.
    """

    id: str
    geometry: Any  # shapely Polygon, MultiPolygon or Point, request CRS
    properties: dict[str, Any]
    buffer_m: float | None
    footprint: Any = None  # shapely Polygon or MultiPolygon, request CRS
    pointer: str = ""
    index: int = 0


@dataclass(frozen=True)
class ParsedFeatures:
    """The checked features of a request, their CRS (pyproj-readable string) and the ids repaired."""

    features: list[Feature]
    crs: str
    repaired: list[str] = field(default_factory=list)

    @property
    def ids(self) -> list[str]:
        """Feature ids in request order."""
        return [f.id for f in self.features]


def _fail(feature_id: str | None, pointer: str, message: str) -> FeatureError:
    """A FeatureError whose detail starts with the feature it is about."""
    who = f"feature {feature_id!r}" if feature_id is not None else f"feature at {pointer}"
    return FeatureError(f"{who}: {message}", pointer=pointer, feature_id=feature_id)


def _raise_collected(errors: Sequence[RequestError]) -> None:
    """Raise the first of several per-feature errors, listing all of them in ``errors``."""
    if not errors:
        return
    first = errors[0]
    if len(errors) > 1:
        more = len(errors) - 1
        first.detail = (
            f"{first.detail} (and {more} more invalid feature{'s' if more > 1 else ''}; see 'errors')"
        )
        first.args = (first.detail,)
        first.extra["errors"] = [
            {"pointer": e.pointer, "feature_id": e.feature_id, "detail": e.detail} for e in errors
        ]
    raise first


def request_crs(crs: str | None) -> pyproj.CRS:
    """The request's CRS (default WGS84 longitude/latitude), or RequestError naming the field."""
    if crs is None:
        return _WGS84
    try:
        return pyproj.CRS.from_user_input(crs)
    except (pyproj.exceptions.CRSError, TypeError) as exc:
        raise RequestError(
            f"crs {crs!r} is not a coordinate reference system pyproj can read ({exc}); "
            "give e.g. 'EPSG:4326' or 'EPSG:32633', or leave it out for WGS84 longitude/latitude",
            field="crs",
            pointer="/crs",
        ) from None


def _feature_list(features: Any) -> tuple[list[Any], Callable[[int], str]]:
    """The list of Feature dicts and a function giving each one's JSON pointer."""
    if hasattr(features, "model_dump"):
        features = features.model_dump(mode="json")
    if not isinstance(features, dict):
        raise RequestError(
            f"features must be a GeoJSON Feature or FeatureCollection object, got {type(features).__name__}",
            field="features",
            pointer="/features",
        )
    kind = features.get("type")
    if kind == "FeatureCollection":
        items = features.get("features")
        if not isinstance(items, list) or not items:
            raise RequestError(
                "the FeatureCollection has no features; send at least one Feature",
                field="features",
                pointer="/features/features",
            )
        return items, lambda i: f"/features/features/{i}"
    if kind == "Feature":
        return [features], lambda i: "/features"
    raise RequestError(
        f"features has type {kind!r}; send a GeoJSON 'Feature' or 'FeatureCollection'",
        field="features",
        pointer="/features/type",
    )


def _feature_id(
    item: dict[str, Any], properties: dict[str, Any], id_property: str | None, pointer: str
) -> str:
    """The feature's id as a string, from the Feature id or the named property."""
    if id_property is not None:
        if id_property not in properties or properties[id_property] is None:
            raise _fail(
                None,
                f"{pointer}/properties/{id_property}",
                f"has no property {id_property!r} (named by id_property); give every feature that property",
            )
        value, where = properties[id_property], f"property {id_property!r}"
    else:
        value, where = item.get("id"), "id"
        if value is None:
            raise _fail(
                None,
                pointer,
                "has no id; give every Feature an 'id', or name the property that holds it with id_property",
            )
    if isinstance(value, bool) or not isinstance(value, str | int | float):
        raise _fail(None, pointer, f"{where} {value!r} is not a string or number")
    if isinstance(value, float):
        if not math.isfinite(value):
            raise _fail(None, pointer, f"{where} {value!r} is not a usable id")
        text = str(int(value)) if value.is_integer() else repr(value)
    else:
        text = str(value)
    if not text.strip():
        raise _fail(None, pointer, f"{where} is an empty string; give every feature a non-empty id")
    return text


class _Checker:
    """Checks the raw GeoJSON coordinates of one feature, counting vertices against the limit."""

    def __init__(self, feature_id: str, pointer: str, geographic: bool, max_vertices: int) -> None:
        self.feature_id = feature_id
        self.pointer = pointer
        self.geographic = geographic
        self.max_vertices = max_vertices
        self.vertices = 0

    def fail(self, message: str) -> FeatureError:
        """A FeatureError about this feature's geometry."""
        return _fail(self.feature_id, self.pointer + "/geometry", message)

    def position(self, value: Any, where: str) -> np.ndarray:
        """One [x, y] (or [x, y, z]) position as a float array of two."""
        if not isinstance(value, list | tuple) or len(value) < 2:
            raise self.fail(f"{where} is {value!r}, not a position [x, y]")
        try:
            xy = np.array(value[:2], dtype=np.float64)
        except (TypeError, ValueError):
            raise self.fail(f"{where} is {value!r}; coordinates must be numbers") from None
        if isinstance(value[0], bool) or isinstance(value[1], bool):
            raise self.fail(f"{where} is {value!r}; coordinates must be numbers")
        self._check_values(xy[None, :], where)
        return xy

    def ring(self, value: Any, where: str) -> np.ndarray:
        """One linear ring as an (n, 2) float array: closed, at least 4 positions, finite, in range."""
        if not isinstance(value, list | tuple):
            raise self.fail(f"{where} is {value!r}, not a list of positions")
        self.vertices += len(value)
        if self.vertices > self.max_vertices:
            raise LimitExceededError(
                f"feature {self.feature_id!r}: more than {self.max_vertices} vertices (setting "
                "max_vertices_per_feature); simplify the geometry or split the community",
                limit="max_vertices_per_feature",
                allowed=self.max_vertices,
                got=self.vertices,
                pointer=self.pointer + "/geometry",
                feature_id=self.feature_id,
            )
        if any(not isinstance(p, list | tuple) or len(p) < 2 for p in value):
            bad = next(p for p in value if not isinstance(p, list | tuple) or len(p) < 2)
            raise self.fail(f"{where} holds {bad!r}, not a position [x, y]")
        try:
            xy = np.array([p[:2] for p in value], dtype=np.float64).reshape(-1, 2)
        except (TypeError, ValueError):
            raise self.fail(f"{where} holds coordinates that are not numbers") from None
        self._check_values(xy, where)
        if len(xy) < 4:
            raise self.fail(
                f"{where} has {len(xy)} position{'s' if len(xy) != 1 else ''}; a ring needs at least 4 "
                "(three corners and the first one repeated at the end)"
            )
        if not np.array_equal(xy[0], xy[-1]):
            raise self.fail(
                f"{where} is not closed (first point {_pair(xy[0])}, last {_pair(xy[-1])}); close the ring "
                "by repeating its first position at the end"
            )
        return xy

    def _check_values(self, xy: np.ndarray, where: str) -> None:
        """No NaN or infinite coordinates; latitudes within +-90 and longitudes within +-360 on lon/lat."""
        finite = np.isfinite(xy).all(axis=1)
        if not finite.all():
            k = int(np.argmin(finite))
            raise self.fail(f"{where}, position {k}: coordinate {_pair(xy[k])} is NaN or infinite")
        if self.geographic:
            lat_bad = np.abs(xy[:, 1]) > 90
            if lat_bad.any():
                k = int(np.argmax(lat_bad))
                hint = (
                    "; the coordinates look swapped: GeoJSON positions are [longitude, latitude]"
                    if np.all(np.abs(xy[:, 0]) <= 90)
                    else ""
                )
                raise self.fail(
                    f"{where}, position {k}: latitude {float(xy[k, 1])!r} is beyond +-90 degrees{hint}"
                )
            lon_bad = np.abs(xy[:, 0]) > 360
            if lon_bad.any():
                k = int(np.argmax(lon_bad))
                raise self.fail(
                    f"{where}, position {k}: longitude {float(xy[k, 0])!r} is beyond +-360 degrees"
                )


def _pair(xy: np.ndarray) -> str:
    """A coordinate pair as '(x, y)' for messages."""
    return f"({xy[0]:.10g}, {xy[1]:.10g})"


def _polygon(coords: Any, check: _Checker, where: str) -> shapely.Polygon:
    """A shapely Polygon from GeoJSON polygon coordinates (shell, then holes)."""
    if not isinstance(coords, list | tuple):
        raise check.fail(f"{where} coordinates are {coords!r}, not a list of rings")
    if not coords:
        raise check.fail(f"{where} is empty (no rings); send at least an outer ring")
    rings = [
        check.ring(ring, f"{where} ring {k}" if k else f"{where} outer ring") for k, ring in enumerate(coords)
    ]
    return shapely.Polygon(rings[0], rings[1:])


def _geometry(geometry: Any, check: _Checker) -> shapely.Geometry:
    """The shapely geometry of a GeoJSON geometry object, each coordinate checked."""
    if geometry is None:
        raise check.fail("has no geometry (null); send a Polygon, MultiPolygon or Point")
    if not isinstance(geometry, dict):
        raise check.fail(f"geometry is {type(geometry).__name__}, not a GeoJSON geometry object")
    kind = geometry.get("type")
    coords = geometry.get("coordinates")
    if kind == "Polygon":
        return _polygon(coords, check, "polygon")
    if kind == "MultiPolygon":
        if not isinstance(coords, list | tuple) or not coords:
            raise check.fail("multipolygon is empty (no polygons); send at least one polygon")
        return shapely.MultiPolygon([_polygon(c, check, f"polygon {k}") for k, c in enumerate(coords)])
    if kind == "Point":
        if isinstance(coords, list | tuple) and not coords:
            raise check.fail("point is empty (no coordinates)")
        xy = check.position(coords, "point")
        check.vertices += 1
        return shapely.Point(xy)
    raise check.fail(
        f"geometry type {kind!r} is not supported; send a Polygon, MultiPolygon, or a Point with a buffer "
        "radius in properties.buffer_m"
    )


def _buffer_radius(properties: dict[str, Any], check: _Checker) -> float:
    """A Point's buffer radius (m) from properties.buffer_m: present, positive, not absurd."""
    value = properties.get("buffer_m")
    pointer = check.pointer + "/properties/buffer_m"
    if value is None:
        raise _fail(
            check.feature_id,
            pointer,
            "is a Point without a buffer radius; give properties.buffer_m, the radius in metres (e.g. 2000)",
        )
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise _fail(check.feature_id, pointer, f"buffer_m {value!r} is not a number of metres")
    if value <= 0:
        raise _fail(check.feature_id, pointer, f"buffer_m {value!r} must be a positive radius in metres")
    if value > MAX_BUFFER_M:
        raise _fail(
            check.feature_id,
            pointer,
            f"buffer_m {value!r} is more than {MAX_BUFFER_M:.0f} m; the radius is in metres (a cluster "
            "buffer is a few km); send a polygon for larger areas",
        )
    return float(value)


def buffer_circle(longitude: float, latitude: float, radius_m: float) -> shapely.Polygon:
    """A circle of ``radius_m`` metres around a lon/lat point, drawn in a local azimuthal equal-area frame.

    The frame is the Lambert azimuthal equal-area projection of WGS84 centred on the point; the polygon has
    BUFFER_VERTICES vertices and exactly the area pi r^2 in that frame; returned in WGS84 lon/lat degrees.
    """
    n = BUFFER_VERTICES
    # Stretch the radius so the regular n-gon's area, (n/2) R^2 sin(2 pi / n), equals pi r^2.
    stretched = radius_m * math.sqrt(2 * math.pi / (n * math.sin(2 * math.pi / n)))
    angle = np.linspace(0.0, 2 * math.pi, n, endpoint=False)
    x, y = stretched * np.cos(angle), stretched * np.sin(angle)
    # A pipeline transformer builds in ~50 us, against ~15 ms for from_crs with a new CRS per point.
    to_lonlat = pyproj.Transformer.from_pipeline(
        f"+proj=pipeline +step +inv +proj=laea +lat_0={latitude!r} +lon_0={longitude!r} +ellps=WGS84 "
        "+step +proj=unitconvert +xy_in=rad +xy_out=deg"
    )
    lon, lat = to_lonlat.transform(x, y)
    ring = np.column_stack([lon, lat])
    return shapely.Polygon(np.vstack([ring, ring[:1]]))


def _is_lonlat(crs: pyproj.CRS) -> bool:
    """Whether a CRS is WGS84 longitude/latitude (in either axis order)."""
    return crs.is_geographic and crs.equals(_WGS84, ignore_axis_order=True)


def _point_footprints(
    points: list[tuple[int, shapely.Point, float]], crs: pyproj.CRS
) -> dict[int, shapely.Geometry]:
    """Buffer circles (request CRS) of the Points, keyed by their position in the feature list."""
    if not points:
        return {}
    xy = np.array([[p.x, p.y] for _, p, _ in points])
    same = _is_lonlat(crs)
    if not same:
        lon, lat = pyproj.Transformer.from_crs(crs, _WGS84, always_xy=True).transform(xy[:, 0], xy[:, 1])
    else:
        lon, lat = xy[:, 0], xy[:, 1]
    circles = [buffer_circle(float(a), float(b), r) for (_, _, r), a, b in zip(points, lon, lat, strict=True)]
    if not same:
        back = pyproj.Transformer.from_crs(_WGS84, crs, always_xy=True)
        circles = list(
            shapely.transform(
                np.array(circles, dtype=object), lambda c: np.column_stack(back.transform(c[:, 0], c[:, 1]))
            )
        )
    return {i: c for (i, _, _), c in zip(points, circles, strict=True)}


def _checked_valid(
    geometry: shapely.Geometry, feature_id: str, pointer: str, repair: bool
) -> tuple[shapely.Geometry, bool]:
    """The polygonal geometry if valid, or repaired with make_valid when ``repair``; else FeatureError."""
    reason = shapely.is_valid_reason(geometry)
    if reason == "Valid Geometry":
        if shapely.area(geometry) <= 0:
            raise _fail(feature_id, pointer + "/geometry", "polygon has zero area")
        return geometry, False
    if not repair:
        raise _fail(
            feature_id,
            pointer + "/geometry",
            f"polygon is invalid: {reason}; fix the geometry, or send repair=true to have it made valid",
        )
    fixed = shapely.make_valid(geometry)
    parts = [p for p in shapely.get_parts(fixed) if shapely.get_type_id(p) in (3, 6)]
    polygonal = shapely.union_all(parts) if parts else shapely.Polygon()
    if polygonal.is_empty or shapely.area(polygonal) <= 0:
        raise _fail(
            feature_id,
            pointer + "/geometry",
            f"polygon is invalid ({reason}) and repairing it leaves no area; fix the geometry",
        )
    return polygonal, True


def parse_features(
    features: dict[str, Any],
    *,
    id_property: str | None = None,
    crs: str | None = None,
    repair: bool = False,
    max_vertices: int = 100_000,
) -> ParsedFeatures:
    """Check and read a GeoJSON Feature or FeatureCollection (plain dict) into features with footprints.

    Polygon and MultiPolygon (holes allowed) are taken as they are; a Point needs ``properties.buffer_m``
    (metres) and becomes a circle of that radius. Coordinates are in ``crs`` (default WGS84 lon/lat,
    [longitude, latitude] order). Every unusable feature raises FeatureError (LimitExceededError for too
    many vertices) naming the feature and its pointer; when several fail, the first is raised and the
    error's ``errors`` lists all of them. With ``repair`` invalid polygons are made valid and listed in
    ``repaired``.
    """
    crs_obj = request_crs(crs)
    geographic = crs_obj.is_geographic
    items, pointer_of = _feature_list(features)
    errors: list[RequestError] = []
    parsed: list[dict[str, Any]] = []
    points: list[tuple[int, shapely.Point, float]] = []
    repaired: list[str] = []
    first_index: dict[str, int] = {}
    for i, item in enumerate(items):
        pointer = pointer_of(i)
        try:
            if not isinstance(item, dict) or item.get("type") != "Feature":
                kind = item.get("type") if isinstance(item, dict) else type(item).__name__
                raise _fail(None, pointer, f"is {kind!r}, not a GeoJSON Feature")
            properties = item.get("properties") or {}
            if not isinstance(properties, dict):
                raise _fail(None, pointer + "/properties", f"properties is {properties!r}, not an object")
            feature_id = _feature_id(item, properties, id_property, pointer)
            if feature_id in first_index:
                raise _fail(
                    feature_id,
                    pointer,
                    f"id {feature_id!r} is also the id of the feature at {pointer_of(first_index[feature_id])};"
                    " ids must be unique within a request",
                )
            first_index[feature_id] = i
            check = _Checker(feature_id, pointer, geographic, max_vertices)
            geometry = _geometry(item.get("geometry"), check)
            buffer_m = None
            footprint = geometry
            if isinstance(geometry, shapely.Point):
                buffer_m = _buffer_radius(properties, check)
                points.append((len(parsed), geometry, buffer_m))
            else:
                footprint, was_repaired = _checked_valid(geometry, feature_id, pointer, repair)
                if was_repaired:
                    repaired.append(feature_id)
            parsed.append(
                dict(
                    id=feature_id,
                    geometry=geometry,
                    properties=properties,
                    buffer_m=buffer_m,
                    footprint=footprint,
                    pointer=pointer,
                    index=i,
                )
            )
        except (FeatureError, LimitExceededError) as exc:
            errors.append(exc)
    _raise_collected(errors)
    for k, circle in _point_footprints(points, crs_obj).items():
        parsed[k]["footprint"] = circle
    crs_text = crs if crs is not None else "EPSG:4326"
    return ParsedFeatures([Feature(**p) for p in parsed], crs=crs_text, repaired=repaired)


# --- the grid as an intersection plane ------------------------------------------------------------------------


@dataclass(frozen=True)
class _Plane:
    """The plane that cells and features are intersected in, cells as rectangles, axes ascending.

    ``x_edges``/``y_edges`` ascending plane coordinates of the cell edges; ``x_flipped``/``y_flipped`` say
    whether the grid's own index runs the other way; ``to_plane`` maps (n, 2) grid-CRS coordinates to the
    plane; ``km2_per_unit2`` converts plane areas to km2.
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
    grid_crs = grid.crs()
    x_edges = np.asarray(grid.x_edges, dtype=np.float64)
    y_edges = np.asarray(grid.y_edges, dtype=np.float64)
    x_centres = np.asarray(grid.x, dtype=np.float64)
    y_centres = np.asarray(grid.y, dtype=np.float64)
    x_flipped = bool(x_edges[-1] < x_edges[0])
    y_flipped = bool(y_edges[-1] < y_edges[0])
    if x_flipped:
        x_edges, x_centres = x_edges[::-1], x_centres[::-1]
    if y_flipped:
        y_edges, y_centres = y_edges[::-1], y_centres[::-1]
    if grid.is_geographic:
        ellipsoid = grid_crs.ellipsoid
        a = float(ellipsoid.semi_major_metre) if ellipsoid is not None else 6_378_137.0
        b = float(ellipsoid.semi_minor_metre) if ellipsoid is not None else 6_356_752.314245
        e = math.sqrt(max(0.0, 1 - (b / a) ** 2))
        lon0 = float((x_edges[0] + x_edges[-1]) / 2)

        def to_plane(xy: np.ndarray) -> np.ndarray:
            # Easting is linear in longitude (no wrap-around at lon0 +- 180, on purpose).
            return np.column_stack([a * np.radians(xy[:, 0] - lon0), authalic_y(xy[:, 1], a, e)])

        inverse = pyproj.Transformer.from_pipeline(
            f"+proj=pipeline +step +inv +proj=cea +lat_ts=0 +lon_0={lon0!r} +a={a!r} +b={b!r} "
            "+step +proj=unitconvert +xy_in=rad +xy_out=deg"
        )

        def to_lonlat(xy: np.ndarray) -> np.ndarray:
            return np.column_stack(inverse.transform(xy[:, 0], xy[:, 1]))

        return _Plane(
            x_edges=a * np.radians(x_edges - lon0),
            y_edges=authalic_y(y_edges, a, e),
            x_centres=a * np.radians(x_centres - lon0),
            y_centres=authalic_y(y_centres, a, e),
            x_flipped=x_flipped,
            y_flipped=y_flipped,
            to_plane=to_plane,
            to_lonlat=to_lonlat,
            km2_per_unit2=1e-6,
        )
    unit = grid_crs.axis_info[0].unit_conversion_factor if grid_crs.axis_info else 1.0
    to_wgs84 = pyproj.Transformer.from_crs(grid_crs, _WGS84, always_xy=True)

    def to_lonlat_projected(xy: np.ndarray) -> np.ndarray:
        return np.column_stack(to_wgs84.transform(xy[:, 0], xy[:, 1]))

    return _Plane(
        x_edges=x_edges,
        y_edges=y_edges,
        x_centres=x_centres,
        y_centres=y_centres,
        x_flipped=x_flipped,
        y_flipped=y_flipped,
        to_plane=lambda xy: xy,
        to_lonlat=to_lonlat_projected,
        km2_per_unit2=float(unit) ** 2 * 1e-6,
    )


def _to_grid(geometries: np.ndarray, source: pyproj.CRS, grid_crs: pyproj.CRS) -> np.ndarray:
    """Geometries reprojected from the request CRS to the grid CRS (long lon/lat edges split first)."""
    if source.is_geographic:
        geometries = shapely.segmentize(geometries, MAX_SEGMENT_DEGREES)
    if source.equals(grid_crs, ignore_axis_order=True):
        return geometries
    transformer = pyproj.Transformer.from_crs(source, grid_crs, always_xy=True)

    def move(xy: np.ndarray) -> np.ndarray:
        return np.column_stack(transformer.transform(xy[:, 0], xy[:, 1]))

    return shapely.transform(geometries, move)


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


def cell_areas_km2(grid: Grid) -> np.ndarray:
    """Area (km2) of every cell, (ny, nx) in the grid's own order: ellipsoidal on lat-lon grids."""
    plane = _plane(grid)
    areas = np.outer(np.diff(plane.y_edges), np.diff(plane.x_edges)) * plane.km2_per_unit2
    if plane.y_flipped:
        areas = areas[::-1]
    if plane.x_flipped:
        areas = areas[:, ::-1]
    return np.ascontiguousarray(areas)


# --- weights -----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Weights:
    """The weights of features on a grid: one sparse (feature, cell) matrix, cell = iy * nx + ix.

    ``matrix[f, c]`` is the area (km2) of feature f within cell c (times the weight layer's value under
    layer weighting; the full cell area under ``centers``), zero on cells without data. Per feature:
    ``area_km2`` its whole area, ``n_cells`` the cells with weight, ``coverage`` the share of its area on
    cells with data, ``latitude``/``longitude`` its centroid (degrees, WGS84).
    """

    matrix: sparse.csr_matrix
    feature_ids: list[str]
    area_km2: np.ndarray
    n_cells: np.ndarray
    coverage: np.ndarray
    latitude: np.ndarray
    longitude: np.ndarray
    key: str
    weighting: str = "area"


class _LRU:
    """A small thread-safe least-recently-used cache of weights by key."""

    def __init__(self) -> None:
        self._items: OrderedDict[str, Weights] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: str) -> Weights | None:
        """The cached weights of ``key``, or None."""
        with self._lock:
            value = self._items.get(key)
            if value is not None:
                self._items.move_to_end(key)
            return value

    def put(self, key: str, value: Weights, size: int) -> None:
        """Keep ``value``, dropping the least recently used beyond ``size`` entries."""
        with self._lock:
            if size <= 0:
                self._items.clear()
                return
            self._items[key] = value
            self._items.move_to_end(key)
            while len(self._items) > size:
                self._items.popitem(last=False)

    def clear(self) -> None:
        """Forget everything."""
        with self._lock:
            self._items.clear()

    def __len__(self) -> int:
        return len(self._items)


WEIGHTS_CACHE = _LRU()


def weights_key(
    parsed: ParsedFeatures,
    grid: Grid,
    weighting: str,
    layer: np.ndarray | None,
    data_mask: np.ndarray | None,
    max_cells: int,
) -> str:
    """SHA-256 over the feature ids and footprints, their CRS, the grid, the weighting, layer and mask."""
    h = hashlib.sha256()
    h.update(f"wxshock-weights-1|{parsed.crs}|{weighting}|{max_cells}|".encode())
    for f in parsed.features:
        h.update(f.id.encode("utf-8") + b"\0")
        h.update(shapely.to_wkb(f.footprint, output_dimension=2))
    h.update(grid.crs_wkt.encode("utf-8"))
    h.update(np.ascontiguousarray(grid.x, dtype=np.float64).tobytes())
    h.update(np.ascontiguousarray(grid.y, dtype=np.float64).tobytes())
    h.update(b"geographic" if grid.is_geographic else b"projected")
    for array in (layer, data_mask):
        if array is None:
            h.update(b"none")
        else:
            h.update(str(array.dtype).encode() + np.ascontiguousarray(array).tobytes())
    return "sha256:" + h.hexdigest()


def compute_weights(
    parsed: ParsedFeatures,
    grid: Grid,
    *,
    weighting: str = "area",
    layer: np.ndarray | None = None,
    data_mask: np.ndarray | None = None,
    max_cells: int = 250_000,
    cache_size: int = 64,
) -> Weights:
    """The weights of every feature on ``grid`` (see :class:`Weights`), cached by :func:`weights_key`.

    ``weighting`` 'area': exact intersection areas (km2); 'centers': the full area of each cell whose
    centre lies inside the feature (boundary included). ``layer`` (ny, nx) multiplies the weights (NaN
    counts as 0). Cells where ``data_mask`` (ny, nx) is False get no weight. Raises FeatureWithoutDataError
    for a feature with no weight left (outside the grid, only cells without data), FeatureError for one that
    looks like swapped coordinates, LimitExceededError for one touching more than ``max_cells`` cells.
    ``cache_size`` is the number of weight sets kept (settings.weights_cache_size; 0 turns caching off).
    """
    if weighting not in WEIGHTINGS:
        raise RequestError(
            f"weighting {weighting!r} is not known; use 'area', 'centers' or a weight layer",
            field="weighting",
            pointer="/weighting",
        )
    ny, nx = grid.shape
    for name, array in (("layer", layer), ("data_mask", data_mask)):
        if array is not None and tuple(np.shape(array)) != (ny, nx):
            raise ValueError(f"{name} has shape {np.shape(array)}, the grid has {(ny, nx)}")
    if layer is not None:
        layer = np.asarray(layer, dtype=np.float64)
        if np.any(layer < 0):
            raise RequestError(
                f"the weight layer has negative values (lowest {float(np.nanmin(layer))!r}); a weight layer "
                "must be zero or positive",
                field="weighting.layer",
                pointer="/weighting/layer",
            )
    if data_mask is not None:
        data_mask = np.asarray(data_mask, dtype=bool)
    key = weights_key(parsed, grid, weighting, layer, data_mask, max_cells)
    cached = WEIGHTS_CACHE.get(key)
    if cached is not None:
        WEIGHTS_CACHE.put(key, cached, cache_size)  # a smaller size asked for now still applies
        return cached
    weights = _compute_weights(parsed, grid, weighting, layer, data_mask, max_cells, key)
    WEIGHTS_CACHE.put(key, weights, cache_size)
    return weights


@dataclass
class _Pieces:
    """Per (feature, cell) overlaps found so far, cells in the grid's own index."""

    feature: list[np.ndarray] = field(default_factory=list)
    cell: list[np.ndarray] = field(default_factory=list)
    area: list[np.ndarray] = field(default_factory=list)  # plane units^2, feature within cell
    weight: list[np.ndarray] = field(default_factory=list)  # km2 (x layer)


def _index_ranges(bounds: np.ndarray, plane: _Plane) -> tuple[np.ndarray, ...]:
    """Per feature the ascending-index ranges [x0, x1) and [y0, y1) of cells its bounding box overlaps."""
    nx, ny = len(plane.x_edges) - 1, len(plane.y_edges) - 1
    x0 = np.clip(np.searchsorted(plane.x_edges, bounds[:, 0], side="right") - 1, 0, nx)
    x1 = np.clip(np.searchsorted(plane.x_edges, bounds[:, 2], side="left"), 0, nx)
    y0 = np.clip(np.searchsorted(plane.y_edges, bounds[:, 1], side="right") - 1, 0, ny)
    y1 = np.clip(np.searchsorted(plane.y_edges, bounds[:, 3], side="left"), 0, ny)
    empty = np.isnan(bounds).any(axis=1)
    x1 = np.where((x1 < x0) | empty, x0, x1)
    y1 = np.where((y1 < y0) | empty, y0, y1)
    return x0, x1, y0, y1


def _overlaps(
    geoms: np.ndarray,
    rows: np.ndarray,
    ranges: tuple[np.ndarray, ...],
    plane: _Plane,
    weighting: str,
) -> tuple[np.ndarray, ...]:
    """For the features ``rows``: (feature, ix, iy, area, counted) of every cell they overlap.

    Cells wholly inside a feature take the cell's area without an intersection; the others are clipped
    with GEOS's rectangle clipping. ``counted`` is the weighting's choice of cells (all overlapping cells,
    or those whose centre lies in the feature); indices are ascending-plane indices.
    """
    x0, x1, y0, y1 = (r[rows] for r in ranges)
    width = x1 - x0
    counts = width * (y1 - y0)
    total = int(counts.sum())
    feature = np.repeat(rows, counts)
    offset = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)
    width_each = np.repeat(width, counts)
    ix = np.repeat(x0, counts) + offset % np.maximum(width_each, 1)
    iy = np.repeat(y0, counts) + offset // np.maximum(width_each, 1)
    xmin, xmax = plane.x_edges[ix], plane.x_edges[ix + 1]
    ymin, ymax = plane.y_edges[iy], plane.y_edges[iy + 1]
    g = geoms[feature]
    boxes = shapely.box(xmin, ymin, xmax, ymax)
    inside = shapely.contains_properly(g, boxes)
    area = np.where(inside, (xmax - xmin) * (ymax - ymin), 0.0)
    edge = np.flatnonzero(~inside)
    edge = edge[shapely.intersects(g[edge], boxes[edge])]
    area[edge] = shapely.area(_clip(g[edge], xmin[edge], ymin[edge], xmax[edge], ymax[edge], boxes[edge]))
    keep = area > 0
    if weighting == "centers":
        counted = shapely.intersects_xy(g, plane.x_centres[ix], plane.y_centres[iy])
        keep |= counted
    else:
        counted = keep
    return feature[keep], ix[keep], iy[keep], area[keep], counted[keep]


def _clip(
    g: np.ndarray, xmin: np.ndarray, ymin: np.ndarray, xmax: np.ndarray, ymax: np.ndarray, boxes: np.ndarray
) -> np.ndarray:
    """Each geometry clipped to its rectangle (GEOS rectangle clipping, ~13x faster than an overlay)."""
    ufunc = getattr(shapely.lib, "clip_by_rect", None)
    if ufunc is None:  # older shapely: the general overlay gives the same areas
        return shapely.intersection(g, boxes)
    return ufunc(g, xmin, ymin, xmax, ymax)


def _outside_reason(
    feature: Feature, grid_geometry: shapely.Geometry, parsed_crs: pyproj.CRS, grid: Grid, plane: _Plane
) -> FeatureError:
    """The error for a feature that overlaps no cell: swapped coordinates if swapping fits, else outside."""
    bounds = (
        float(plane.x_edges[0]),
        float(plane.y_edges[0]),
        float(plane.x_edges[-1]),
        float(plane.y_edges[-1]),
    )
    grid_box = shapely.box(*bounds)
    if parsed_crs.is_geographic:
        swapped = shapely.transform(feature.footprint, lambda xy: xy[:, ::-1])
        if np.all(np.abs(shapely.get_coordinates(swapped)[:, 1]) <= 90):
            moved = _to_grid(np.array([swapped], dtype=object), parsed_crs, grid.crs())
            on_plane = shapely.transform(moved, plane.to_plane)[0]
            if shapely.intersects(on_plane, grid_box):
                return _fail(
                    feature.id,
                    feature.pointer + "/geometry",
                    "lies outside the grid, but would lie inside it with each position's two coordinates "
                    "swapped; the coordinates look swapped: GeoJSON positions are [longitude, latitude]",
                )
    gx, gy = np.asarray(grid.x_edges), np.asarray(grid.y_edges)
    fb = shapely.bounds(grid_geometry)
    return FeatureWithoutDataError(
        f"feature {feature.id!r} lies outside the grid (grid spans x {min(gx[0], gx[-1]):.6g} to "
        f"{max(gx[0], gx[-1]):.6g}, y {min(gy[0], gy[-1]):.6g} to {max(gy[0], gy[-1]):.6g} in its CRS; the "
        f"feature spans x {fb[0]:.6g} to {fb[2]:.6g}, y {fb[1]:.6g} to {fb[3]:.6g}); check its coordinates "
        "and the request's crs",
        pointer=feature.pointer,
        feature_id=feature.id,
    )


def _compute_weights(
    parsed: ParsedFeatures,
    grid: Grid,
    weighting: str,
    layer: np.ndarray | None,
    data_mask: np.ndarray | None,
    max_cells: int,
    key: str,
) -> Weights:
    """The work of :func:`compute_weights`, uncached."""
    ny, nx = grid.shape
    n = len(parsed.features)
    plane = _plane(grid)
    source = request_crs(parsed.crs)
    footprints = np.array([f.footprint for f in parsed.features], dtype=object)
    on_grid = _to_grid(footprints, source, grid.crs())
    if grid.is_geographic:
        on_grid = _wrap_longitudes(on_grid, grid)
    geoms = shapely.transform(on_grid, plane.to_plane)
    shapely.prepare(geoms)
    feature_area = shapely.area(geoms)
    ranges = _index_ranges(shapely.bounds(geoms), plane)
    candidates = (ranges[1] - ranges[0]) * (ranges[3] - ranges[2])
    errors: list[RequestError] = []
    too_big = candidates > BBOX_CELLS_FACTOR * max_cells
    for r in np.flatnonzero(too_big):
        errors.append(
            _too_many_cells(parsed.features[r], int(candidates[r]), max_cells, "its bounding box spans")
        )
    mask_flat = None if data_mask is None else data_mask.ravel()
    layer_flat = None if layer is None else np.nan_to_num(layer.ravel(), nan=0.0)
    cell_area = np.outer(np.diff(plane.y_edges), np.diff(plane.x_edges))  # ascending plane order
    pieces = _Pieces()
    for rows in _passes(np.flatnonzero(~too_big & (candidates > 0)), candidates):
        feature, ix, iy, area, counted = _overlaps(geoms, rows, ranges, plane, weighting)
        gx = nx - 1 - ix if plane.x_flipped else ix
        gy = ny - 1 - iy if plane.y_flipped else iy
        cell = gy * nx + gx
        base = cell_area[iy, ix] if weighting == "centers" else area
        weight = np.where(counted, base, 0.0) * plane.km2_per_unit2
        if mask_flat is not None:
            weight = np.where(mask_flat[cell], weight, 0.0)
        if layer_flat is not None:
            weight = weight * layer_flat[cell]
        pieces.feature.append(feature)
        pieces.cell.append(cell)
        pieces.area.append(area)
        pieces.weight.append(weight)
    feature = np.concatenate(pieces.feature) if pieces.feature else np.zeros(0, np.int64)
    cell = np.concatenate(pieces.cell) if pieces.cell else np.zeros(0, np.int64)
    area = np.concatenate(pieces.area) if pieces.area else np.zeros(0)
    weight = np.concatenate(pieces.weight) if pieces.weight else np.zeros(0)
    touched = np.bincount(feature[area > 0], minlength=n)
    has_data = mask_flat[cell] if mask_flat is not None else np.ones(len(cell), bool)
    data_area = np.bincount(feature, weights=np.where(has_data, area, 0.0), minlength=n)
    n_cells = np.bincount(feature[weight > 0], minlength=n)
    for r in np.flatnonzero(~too_big):
        f = parsed.features[r]
        if touched[r] > max_cells:
            errors.append(_too_many_cells(f, int(touched[r]), max_cells, "it touches"))
        elif touched[r] == 0 and not (weighting == "centers" and n_cells[r] > 0):
            errors.append(_outside_reason(f, on_grid[r], source, grid, plane))
        elif n_cells[r] == 0:
            errors.append(_without_data(f, int(touched[r]), weighting, layer is not None, data_area[r] > 0))
    _raise_collected(errors)
    keep = weight > 0
    matrix = sparse.csr_matrix((weight[keep], (feature[keep], cell[keep])), shape=(n, ny * nx))
    matrix.sum_duplicates()
    matrix.sort_indices()
    coverage = np.clip(data_area / np.where(feature_area > 0, feature_area, 1.0), 0.0, 1.0)
    centroid = plane.to_lonlat(shapely.get_coordinates(shapely.centroid(geoms)))
    return Weights(
        matrix=matrix,
        feature_ids=parsed.ids,
        area_km2=feature_area * plane.km2_per_unit2,
        n_cells=n_cells.astype(np.int64),
        coverage=coverage,
        latitude=centroid[:, 1].copy(),
        longitude=centroid[:, 0].copy(),
        key=key,
        weighting=weighting,
    )


def _passes(rows: np.ndarray, candidates: np.ndarray) -> list[np.ndarray]:
    """Feature rows split into passes of at most about CANDIDATES_PER_PASS candidate cells each."""
    if len(rows) == 0:
        return []
    cumulative = np.cumsum(candidates[rows])
    group = cumulative // CANDIDATES_PER_PASS
    splits = np.flatnonzero(np.diff(group)) + 1
    return np.split(rows, splits)


def _too_many_cells(feature: Feature, got: int, allowed: int, what: str) -> LimitExceededError:
    """The error for a feature over the cell limit."""
    return LimitExceededError(
        f"feature {feature.id!r}: {what} {got} grid cells, more than the {allowed} allowed (setting "
        "max_cells_per_feature); split the community or raise the limit",
        limit="max_cells_per_feature",
        allowed=allowed,
        got=got,
        pointer=feature.pointer,
        feature_id=feature.id,
    )


def _without_data(
    feature: Feature, touched: int, weighting: str, layered: bool, some_data: bool
) -> FeatureWithoutDataError:
    """The error for a feature that overlaps cells but keeps no weight."""
    if weighting == "centers" and some_data:
        reason = (
            f"no cell centre with data lies inside it (it overlaps {touched} cells); it is smaller than a cell "
            "or lies between cell centres: use weighting 'area'"
        )
    elif layered and some_data:
        reason = f"the weight layer is zero or missing on all {touched} cells it overlaps"
    else:
        reason = f"none of the {touched} cells it overlaps has data (water, or outside the data domain)"
    return FeatureWithoutDataError(
        f"feature {feature.id!r} has no data: {reason}", pointer=feature.pointer, feature_id=feature.id
    )
