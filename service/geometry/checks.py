"""GeoJSON in: every feature, ring, coordinate and id checked, with errors that name the feature.

:func:`parse_features` reads a GeoJSON Feature or FeatureCollection (a plain dict) and turns survey-cluster
Points into buffered circles drawn in a local equal-area frame (:func:`service.geometry.planes.buffer_circles`).
Coordinates must be JSON numbers: text such as "12.5" or true/false is refused rather than read, because a
spreadsheet that wrote numbers as text usually wrote something else wrong too.

Faults come in two kinds. A fault of the request's structure (not a Feature, a missing, unusable or repeated
id) always fails the request. A fault of one feature's geometry (``invalid_geometry``, ``swapped_coordinates``,
``too_many_vertices``; and, from :func:`service.geometry.compute_weights`, ``outside_grid``, ``no_data``,
``too_many_cells``) follows ``invalid``: "fail" raises one error listing every bad feature; "skip" keeps
the feature (without a footprint, so its weight row stays empty) and lists it in ``skipped``.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np
import pyproj
import shapely

from service.errors import FeatureError, LimitExceededError, RequestError, WxshockError
from service.geometry.antimeridian import crossing, split
from service.geometry.planes import WGS84 as _WGS84
from service.geometry.planes import buffer_circles, transform_in_blocks

# Survey programmes displace published cluster points by a few km (common practice: up to 2 km urban,
# 5-10 km rural); a radius beyond 100 km describes a region, not a cluster, and is almost surely a unit error.
MAX_BUFFER_M = 100_000.0
# What to do with a feature whose geometry cannot be used: fail the request, or skip the feature.
INVALID_MODES = ("fail", "skip")
# The per-feature fault codes, each with its one-line meaning (the codes of skipped features).
FAULT_CODES = {
    "invalid_geometry": "the feature's geometry is malformed or invalid (rings, coordinates, buffer radius)",
    "swapped_coordinates": "the feature's coordinates look like [latitude, longitude] instead of [lon, lat]",
    "too_many_vertices": "the feature has more vertices than the server's max_vertices_per_feature",
    "outside_grid": "the feature lies outside the dataset's grid",
    "no_data": "every grid cell the feature overlaps is without data (water, outside the data domain)",
    "too_many_cells": "the feature touches more grid cells than the server's max_cells_per_feature",
}
# Coordinates beyond these magnitudes on a lon/lat request are almost surely projected (metres or feet).
_PROJECTED_LOOKING = 1000.0
_NUMBERS = (int, float)


class SkippedFeature(NamedTuple):
    """A feature left out under ``invalid="skip"``: its position in the request, id, fault code and reason."""

    index: int
    feature_id: str | None
    code: str
    reason: str
    pointer: str


# --- parsed features ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Feature:
    """One community: its id, geometry as sent (request CRS), properties, and buffer radius (m) for Points.

    ``footprint`` is the area that weights are computed on, in the request CRS: the polygon itself (on lon/lat,
    cut at the 180th meridian into parts within -180..180 when it crosses it), or a Point's buffer circle;
    None for a feature skipped under ``invalid="skip"``. ``pointer`` is the JSON pointer of the feature in the
    request, ``index`` its position in the request's feature list.
    """

    id: str
    geometry: Any  # shapely Polygon, MultiPolygon or Point, request CRS; None when skipped
    properties: dict[str, Any]
    buffer_m: float | None
    footprint: Any = None  # shapely Polygon or MultiPolygon, request CRS
    pointer: str = ""
    index: int = 0

    @property
    def skipped(self) -> bool:
        """Whether this feature was skipped (it has no footprint)."""
        return self.footprint is None


@dataclass(frozen=True)
class ParsedFeatures:
    """The checked features of a request, their CRS (pyproj-readable string), ids repaired and skipped."""

    features: list[Feature]
    crs: str
    repaired: list[str] = field(default_factory=list)
    skipped: list[SkippedFeature] = field(default_factory=list)
    invalid: str = "fail"

    @property
    def ids(self) -> list[str]:
        """Feature ids in request order (skipped features included)."""
        return [f.id for f in self.features]


def _fail(feature_id: str | None, pointer: str, message: str, code: str = "invalid_geometry") -> FeatureError:
    """A FeatureError whose detail starts with the feature it is about; ``code`` names the fault."""
    who = f"feature {feature_id!r}" if feature_id is not None else f"feature at {pointer}"
    return FeatureError(f"{who}: {message}", pointer=pointer, feature_id=feature_id, code=code)


def fault_code(error: WxshockError) -> str:
    """The per-feature fault code an error carries (invalid_geometry when it names none)."""
    return str(error.extra.get("code") or "invalid_geometry")


def skipped_from(error: WxshockError, index: int) -> SkippedFeature:
    """The SkippedFeature standing for a per-feature error of the feature at ``index``."""
    return SkippedFeature(index, error.feature_id, fault_code(error), error.detail, error.pointer or "")


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
            {
                "pointer": e.pointer,
                "feature_id": e.feature_id,
                "code": e.extra.get("code"),
                "detail": e.detail,
            }
            for e in errors
        ]
    raise first


def invalid_mode(invalid: str) -> str:
    """``invalid`` checked: 'fail' or 'skip'."""
    if invalid not in INVALID_MODES:
        raise RequestError(
            f"invalid_features {invalid!r} is not one of {list(INVALID_MODES)!r}; use 'fail' to refuse the "
            "request when a feature is unusable, or 'skip' to leave such features out and list them",
            field="invalid_features",
            pointer="/invalid_features",
        )
    return invalid


def _crs_error(crs: str, why: str) -> RequestError:
    """The RequestError for an unusable ``crs``, naming the field and the fix."""
    return RequestError(
        f"crs {crs!r} {why}; give the horizontal CRS of the coordinates, e.g. 'EPSG:4326' (longitude/latitude) "
        "or a projected one such as 'EPSG:32633', or leave crs out for WGS84 longitude/latitude",
        field="crs",
        pointer="/crs",
    )


def request_crs(crs: str | None) -> pyproj.CRS:
    """The request's CRS (default WGS84 longitude/latitude), or RequestError naming the field.

    Only a horizontal geographic or projected CRS (also one bound to a datum shift) of the Earth places
    [x, y] positions; an engineering (local), vertical, geocentric or compound CRS, or one of another body,
    is refused with the reason.
    """
    if crs is None:
        return _WGS84
    if not isinstance(crs, str):
        raise _crs_error(repr(crs), "is not text")
    try:
        parsed = pyproj.CRS.from_user_input(crs)
    except (pyproj.exceptions.CRSError, TypeError, ValueError) as exc:
        raise _crs_error(crs, f"is not a coordinate reference system pyproj can read ({exc})") from None
    horizontal = parsed.source_crs if parsed.is_bound and parsed.source_crs is not None else parsed
    kind = horizontal.type_name
    if horizontal.is_compound:
        raise _crs_error(
            crs, f"is a compound CRS ({kind}: positions and heights); send its horizontal part alone"
        )
    if horizontal.is_vertical:
        raise _crs_error(crs, f"is a vertical CRS ({kind}: heights or depths), not one of positions")
    if horizontal.is_geocentric:
        raise _crs_error(crs, f"is a geocentric CRS ({kind}: x, y, z from the Earth's centre)")
    if getattr(horizontal, "is_engineering", False) or not (
        horizontal.is_geographic or horizontal.is_projected
    ):
        raise _crs_error(crs, f"is an engineering or local CRS ({kind}), not tied to the Earth's surface")
    try:
        to_wgs84 = pyproj.Transformer.from_crs(parsed, _WGS84, always_xy=True)
        to_wgs84.transform(0.0, 0.0, errcheck=False)
    except pyproj.exceptions.ProjError as exc:
        raise _crs_error(crs, f"cannot be carried to longitude/latitude on the Earth ({exc})") from None
    return parsed


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


def _not_number(value: Any) -> str:
    """Why a coordinate value is not a JSON number, for messages."""
    if isinstance(value, bool):
        return f"{value!r} is a boolean"
    if isinstance(value, str):
        return f"{value!r} is text (a JSON string)"
    return f"{value!r} is a {type(value).__name__}"


def _is_number(value: Any) -> bool:
    """A JSON number (bool excluded, numpy scalars included)."""
    return type(value) in _NUMBERS or (
        isinstance(value, int | float | np.integer | np.floating) and not isinstance(value, bool | np.bool_)
    )


class _Checker:
    """Checks the raw GeoJSON coordinates of one feature, counting vertices against the limit."""

    def __init__(
        self, feature_id: str, pointer: str, geographic: bool, max_vertices: int, default_crs: bool
    ) -> None:
        self.feature_id = feature_id
        self.pointer = pointer
        self.geographic = geographic
        self.max_vertices = max_vertices
        self.default_crs = default_crs
        self.vertices = 0

    def fail(self, message: str, code: str = "invalid_geometry") -> FeatureError:
        """A FeatureError about this feature's geometry."""
        return _fail(self.feature_id, self.pointer + "/geometry", message, code)

    def count(self, n: int) -> None:
        """Count ``n`` more vertices; LimitExceededError past max_vertices."""
        self.vertices += n
        if self.vertices > self.max_vertices:
            raise LimitExceededError(
                f"feature {self.feature_id!r}: more than {self.max_vertices} vertices (setting "
                "max_vertices_per_feature); simplify the geometry or split the community",
                limit="max_vertices_per_feature",
                allowed=self.max_vertices,
                got=self.vertices,
                pointer=self.pointer + "/geometry",
                feature_id=self.feature_id,
                code="too_many_vertices",
            )

    def point(self, value: Any) -> tuple[float, float]:
        """One Point's [x, y] (or [x, y, z]) position, strictly numbers, checked (pure Python: Points come in 100,000s)."""
        if not isinstance(value, list | tuple) or len(value) < 2:
            if isinstance(value, list | tuple) and not value:
                raise self.fail("point is empty (no coordinates)")
            raise self.fail(f"point is {value!r}, not a position [x, y]")
        x, y = value[0], value[1]
        for v in (x, y):
            if not _is_number(v):
                raise self.fail(f"point {value!r}: {_not_number(v)}; coordinates must be JSON numbers")
        x, y = float(x), float(y)
        self.count(1)
        if not (math.isfinite(x) and math.isfinite(y)):
            raise self.fail(f"point: coordinate {_pair((x, y))} is NaN or infinite")
        if self.geographic and (abs(y) > 90 or abs(x) > 360):
            self._range_error(np.array([[x, y]]), "point")
        return x, y

    def ring(self, value: Any, where: str) -> np.ndarray:
        """One linear ring as an (n, 2) float array: strictly numbers, closed, at least 4 positions, in range."""
        if not isinstance(value, list | tuple):
            raise self.fail(f"{where} is {value!r}, not a list of positions")
        self.count(len(value))
        xy = _ring_array(value)
        if xy is None:
            raise self.fail(_ring_problem(value, where))
        finite = np.isfinite(xy).all(axis=1)
        if not finite.all():
            k = int(np.argmin(finite))
            raise self.fail(f"{where}, position {k}: coordinate {_pair(xy[k])} is NaN or infinite")
        if self.geographic and (
            np.abs(xy[:, 1]).max(initial=0) > 90 or np.abs(xy[:, 0]).max(initial=0) > 360
        ):
            self._range_error(xy, where)
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

    def _range_error(self, xy: np.ndarray, where: str) -> None:
        """Raise the error for lon/lat positions out of range, with a hint when they look swapped or projected."""
        lat_bad = np.abs(xy[:, 1]) > 90
        lon_bad = np.abs(xy[:, 0]) > 360
        k = int(np.argmax(lat_bad)) if lat_bad.any() else int(np.argmax(lon_bad))
        at = f"{where}, position {k}" if len(xy) > 1 else where
        if np.abs(xy).max() > _PROJECTED_LOOKING:
            told = (
                "no crs was given, so they are read as"
                if self.default_crs
                else "the request's crs says they are"
            )
            raise self.fail(
                f"{at}: coordinate {_pair(xy[k])} is far beyond longitude/latitude range, but {told} "
                "longitude/latitude degrees; the coordinates look projected (metres or feet): give the request's "
                "crs, e.g. 'EPSG:32633' for UTM zone 33 N"
            )
        if lat_bad.any():
            swapped = bool(np.all(np.abs(xy[:, 0]) <= 90))
            hint = (
                "; the coordinates look swapped: GeoJSON positions are [longitude, latitude]"
                if swapped
                else ""
            )
            raise self.fail(
                f"{at}: latitude {float(xy[k, 1])!r} is beyond +-90 degrees{hint}",
                "swapped_coordinates" if swapped else "invalid_geometry",
            )
        raise self.fail(f"{at}: longitude {float(xy[k, 0])!r} is beyond +-360 degrees")


def _ring_array(value: list[Any] | tuple[Any, ...]) -> np.ndarray | None:
    """A ring's positions as an (n, 2) float64 array, or None when one is not a position of two JSON numbers."""
    try:
        pairs = [p[:2] for p in value]
        xy = np.array(pairs)
    except (TypeError, ValueError, IndexError, KeyError, OverflowError):
        return None
    if xy.ndim != 2 or xy.shape[1] != 2 or xy.dtype.kind not in "if":
        return None  # text ('U'), booleans ('b'), None or objects ('O'), ragged positions
    if xy.dtype.kind == "i" or ((xy == 0) | (xy == 1)).any():
        # numpy reads true/false among numbers as 1/0: look at the values that could have been booleans
        for p in pairs:
            if not (isinstance(p, list | tuple) and len(p) == 2 and _is_number(p[0]) and _is_number(p[1])):
                return None
    return xy.astype(np.float64, copy=False)


def _ring_problem(value: list[Any] | tuple[Any, ...], where: str) -> str:
    """The message for the first position of a ring that is not [x, y] of two JSON numbers."""
    for k, p in enumerate(value):
        if not isinstance(p, list | tuple) or len(p) < 2:
            return f"{where}, position {k} is {p!r}, not a position [x, y]"
        for v in p[:2]:
            if not _is_number(v):
                return (
                    f"{where}, position {k} {list(p)!r}: {_not_number(v)}; coordinates must be JSON numbers"
                )
    return f"{where} holds positions that are not [x, y] pairs of numbers"


def _pair(xy: Any) -> str:
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


def _polygonal(geometry: Any, check: _Checker) -> shapely.Geometry:
    """The shapely (Multi)Polygon of a GeoJSON geometry object that is not a Point, each coordinate checked."""
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
    raise check.fail(
        f"geometry type {kind!r} is not supported; send a Polygon, MultiPolygon, or a Point with a buffer "
        "radius in properties.buffer_m"
    )


def _buffer_radius(properties: dict[str, Any], feature_id: str, pointer: str) -> float:
    """A Point's buffer radius (m) from properties.buffer_m: present, positive, not absurd."""
    value = properties.get("buffer_m")
    pointer = pointer + "/properties/buffer_m"
    if value is None:
        raise _fail(
            feature_id,
            pointer,
            "is a Point without a buffer radius; give properties.buffer_m, the radius in metres (e.g. 2000)",
        )
    if not _is_number(value) or not math.isfinite(value):
        raise _fail(feature_id, pointer, f"buffer_m {value!r} is not a number of metres")
    if value <= 0:
        raise _fail(feature_id, pointer, f"buffer_m {value!r} must be a positive radius in metres")
    if value > MAX_BUFFER_M:
        raise _fail(
            feature_id,
            pointer,
            f"buffer_m {value!r} is more than {MAX_BUFFER_M:.0f} m; the radius is in metres (a cluster "
            "buffer is a few km); send a polygon for larger areas",
        )
    return float(value)


def _is_lonlat(crs: pyproj.CRS) -> bool:
    """Whether a CRS is WGS84 longitude/latitude (in either axis order)."""
    return crs.is_geographic and crs.equals(_WGS84, ignore_axis_order=True)


def _circles(xy: np.ndarray, radius: np.ndarray, crs: pyproj.CRS) -> np.ndarray:
    """Buffer circles (request CRS) of points (n, 2) in the request CRS with radii (m)."""
    if len(xy) == 0:
        return np.zeros(0, dtype=object)
    same = _is_lonlat(crs)
    if same:
        lon, lat = xy[:, 0], xy[:, 1]
    else:
        lon, lat = pyproj.Transformer.from_crs(crs, _WGS84, always_xy=True).transform(xy[:, 0], xy[:, 1])
    circles = buffer_circles(np.asarray(lon), np.asarray(lat), radius)
    if not same:
        back = pyproj.Transformer.from_crs(_WGS84, crs, always_xy=True)
        circles = transform_in_blocks(circles, lambda c: np.column_stack(back.transform(c[:, 0], c[:, 1])))
    return circles


def _cut_at_180(geometry: shapely.Geometry, feature_id: str, pointer: str) -> shapely.Geometry:
    """A lon/lat polygon cut into parts within -180..180 (it crosses the 180th meridian as written)."""
    try:
        return split(geometry)
    except ValueError as exc:
        raise _fail(
            feature_id,
            pointer + "/geometry",
            f"crosses the 180th meridian and {exc}; send it cut at 180 degrees as a MultiPolygon "
            "(RFC 7946, section 3.1.9)",
        ) from None


def _cut_crossings(
    shapes: np.ndarray, rows: list[int], drafts: list[_Draft], faults: dict[int, RequestError]
) -> None:
    """Cut in place the lon/lat shapes (of features ``rows``) that cross the 180th meridian; a shape that cannot be
    cut becomes its feature's fault."""
    for k in np.flatnonzero(crossing(shapes)):
        d = drafts[rows[k]]
        try:
            shapes[k] = _cut_at_180(shapes[k], d.id, d.pointer)
        except FeatureError as exc:
            faults[rows[k]] = exc


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


@dataclass
class _Draft:
    """One feature while it is being read: what Feature will hold, and what is still to be decided."""

    id: str
    pointer: str
    index: int
    properties: dict[str, Any]
    geometry: Any = None
    buffer_m: float | None = None
    footprint: Any = None


def parse_features(
    features: dict[str, Any],
    *,
    id_property: str | None = None,
    crs: str | None = None,
    repair: bool = False,
    max_vertices: int = 100_000,
    invalid: str = "fail",
) -> ParsedFeatures:
    """Check and read a GeoJSON Feature or FeatureCollection (plain dict) into features with footprints.

    Polygon and MultiPolygon (holes allowed) are taken as they are; a Point needs ``properties.buffer_m``
    (metres) and becomes a circle of that radius. Coordinates are in ``crs`` (default WGS84 lon/lat,
    [longitude, latitude] order) and must be JSON numbers. With ``repair`` invalid polygons are made valid
    and listed in ``repaired``.

    Faults of the request's structure (a non-Feature, a missing or repeated id) raise FeatureError. A fault
    of one feature's geometry raises too under ``invalid="fail"`` (the first error, its ``errors`` listing
    every bad feature; LimitExceededError for too many vertices); under ``invalid="skip"`` the feature is
    kept without a footprint and listed in ``skipped`` (index, feature_id, code, reason, pointer). When every
    feature is skipped there is nothing to compute: the errors are raised as under "fail".
    """
    mode = invalid_mode(invalid)
    crs_obj = request_crs(crs)
    geographic = crs_obj.is_geographic
    items, pointer_of = _feature_list(features)
    hard: list[RequestError] = []
    faults: dict[int, RequestError] = {}  # position in drafts -> the feature's geometry fault
    drafts: list[_Draft] = []
    point_rows: list[int] = []
    point_xy: list[tuple[float, float]] = []
    point_radius: list[float] = []
    polygon_rows: list[int] = []
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
        except FeatureError as exc:
            hard.append(exc)
            continue
        draft = _Draft(id=feature_id, pointer=pointer, index=i, properties=properties)
        row = len(drafts)
        drafts.append(draft)
        check = _Checker(feature_id, pointer, geographic, max_vertices, crs is None)
        raw = item.get("geometry")
        try:
            if isinstance(raw, dict) and raw.get("type") == "Point":
                x, y = check.point(raw.get("coordinates"))
                draft.buffer_m = _buffer_radius(properties, feature_id, pointer)
                point_rows.append(row)
                point_xy.append((x, y))
                point_radius.append(draft.buffer_m)
            else:
                draft.geometry = _polygonal(raw, check)
                polygon_rows.append(row)
        except (FeatureError, LimitExceededError) as exc:
            faults[row] = exc
    if hard:
        _raise_collected(hard)
    repaired = _finish_polygons(drafts, polygon_rows, geographic, repair, faults)
    _finish_points(drafts, point_rows, point_xy, point_radius, crs_obj, faults)
    if faults and (mode == "fail" or len(faults) == len(drafts)):
        _raise_collected([faults[row] for row in sorted(faults)])
    skipped = [skipped_from(faults[row], drafts[row].index) for row in sorted(faults)]
    parsed = [
        Feature(
            id=d.id,
            geometry=None if row in faults else d.geometry,
            properties=d.properties,
            buffer_m=d.buffer_m,
            footprint=None if row in faults else d.footprint,
            pointer=d.pointer,
            index=d.index,
        )
        for row, d in enumerate(drafts)
    ]
    crs_text = crs if crs is not None else "EPSG:4326"
    return ParsedFeatures(parsed, crs=crs_text, repaired=repaired, skipped=skipped, invalid=mode)


def _finish_polygons(
    drafts: list[_Draft], rows: list[int], geographic: bool, repair: bool, faults: dict[int, RequestError]
) -> list[str]:
    """Footprints of the polygon features: cut at 180 on lon/lat, valid (or repaired); returns the ids repaired."""
    rows = [r for r in rows if r not in faults]
    if not rows:
        return []
    geoms = np.array([drafts[r].geometry for r in rows], dtype=object)
    footprints = geoms.copy()
    if geographic:
        _cut_crossings(footprints, rows, drafts, faults)
    good = np.array([r not in faults for r in rows])
    ok = np.zeros(len(rows), dtype=bool)
    ok[good] = shapely.is_valid(footprints[good]) & (shapely.area(footprints[good]) > 0)
    repaired: list[str] = []
    for k, row in enumerate(rows):
        d = drafts[row]
        if ok[k]:
            d.footprint = footprints[k]
        elif good[k]:
            try:
                d.footprint, was_repaired = _checked_valid(footprints[k], d.id, d.pointer, repair)
                if was_repaired:
                    repaired.append(d.id)
            except FeatureError as exc:
                faults[row] = exc
    return repaired


def _finish_points(
    drafts: list[_Draft],
    rows: list[int],
    xy: list[tuple[float, float]],
    radius: list[float],
    crs: pyproj.CRS,
    faults: dict[int, RequestError],
) -> None:
    """Footprints of the Point features: buffer circles, cut at 180 on lon/lat."""
    if not rows:
        return
    points = np.array(xy, dtype=np.float64).reshape(-1, 2)
    shapely_points = shapely.points(points)
    circles = _circles(points, np.array(radius, dtype=np.float64), crs)
    if crs.is_geographic:
        _cut_crossings(circles, rows, drafts, faults)
    for k, row in enumerate(rows):
        drafts[row].geometry = shapely_points[k]
        drafts[row].footprint = circles[k]
