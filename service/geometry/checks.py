"""GeoJSON in: every feature, ring, coordinate and id checked, with errors that name the feature.

:func:`parse_features` reads a GeoJSON Feature or FeatureCollection (a plain dict) and turns survey-cluster
Points into buffered circles drawn in a local equal-area frame (:func:`service.geometry.planes.buffer_circle`).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyproj
import shapely

from service.errors import FeatureError, LimitExceededError, RequestError
from service.geometry.antimeridian import crossing, split, split_crossing
from service.geometry.planes import WGS84 as _WGS84
from service.geometry.planes import buffer_circle

# Survey programmes displace published cluster points by a few km (common practice: up to 2 km urban,
# 5-10 km rural); a radius beyond 100 km describes a region, not a cluster, and is almost surely a unit error.
MAX_BUFFER_M = 100_000.0


# --- parsed features ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Feature:
    """One community: its id, geometry as sent (request CRS), properties, and buffer radius (m) for Points.

    ``footprint`` is the area that weights are computed on, in the request CRS: the polygon itself (on lon/lat,
    cut at the 180th meridian into parts within -180..180 when it crosses it), or a Point's buffer circle.
    ``pointer`` is the JSON pointer of the feature in the request.
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


def _cut_at_180(geometry: shapely.Geometry, feature_id: str, pointer: str) -> shapely.Geometry:
    """A lon/lat polygon cut into parts within -180..180 if it crosses the 180th meridian as written."""
    xmin, _, xmax, _ = geometry.bounds
    if xmax - xmin <= 180 and -180 <= xmin and xmax <= 180:
        return geometry  # the common case, decided without looking at every edge
    if not crossing(np.array([geometry], dtype=object))[0]:
        return geometry
    try:
        return split(geometry)
    except ValueError as exc:
        raise _fail(
            feature_id,
            pointer + "/geometry",
            f"crosses the 180th meridian and {exc}; send it cut at 180 degrees as a MultiPolygon "
            "(RFC 7946, section 3.1.9)",
        ) from None


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
                if geographic:
                    geometry_cut = _cut_at_180(geometry, feature_id, pointer)
                else:
                    geometry_cut = geometry
                footprint, was_repaired = _checked_valid(geometry_cut, feature_id, pointer, repair)
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
    circles = _point_footprints(points, crs_obj)
    if geographic and circles:
        keys = list(circles)
        cut = split_crossing(np.array([circles[k] for k in keys], dtype=object))
        circles = dict(zip(keys, cut, strict=True))
    for k, circle in circles.items():
        parsed[k]["footprint"] = circle
    crs_text = crs if crs is not None else "EPSG:4326"
    return ParsedFeatures([Feature(**p) for p in parsed], crs=crs_text, repaired=repaired)
