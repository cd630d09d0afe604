"""The 180th meridian: shapes that cross it, and their pieces on grids written in -180..180 or 0..360.

Two steps. On lon/lat coordinates, :func:`split_crossing` cuts every shape that crosses the 180th meridian
as written (a ring edge spanning more than 180 degrees of longitude, as in 177 -> -178, or a longitude
beyond +-180, as in 177 -> 182) into parts within -180..180 that meet at the meridian, as RFC 7946
section 3.1.9 asks of GeoJSON. The cutting is the kept ``antimeridian`` package's (PyPI), with crossings
found along straight lon/lat edges (``great_circle=False``), which is how GeoJSON edges are read here, and
clockwise rings read like counter-clockwise ones. An edge spanning more than 180 degrees of longitude is
read as the short way across the 180th meridian, never as the long way round (no community spans half the
globe).

On a lat-lon grid's equal-area plane, :func:`wrap_parts` copies each part by whole turns of longitude to
wherever it overlaps the grid, so that a part at -180..-178 lands on the 180..182 cells of a 0..360 grid,
and a part written past 180 lands on the -180.. cells of a -180..180 grid. Parts of one feature never
overlap, and neither do copies a turn apart, so summing each feature's pieces per cell counts every bit of
ground once.
"""

from __future__ import annotations

import warnings

import antimeridian
import numpy as np
import shapely

# Longitudes within this of +-180 count as on the meridian (float noise from reprojection).
_ON_MERIDIAN = 1e-9


def crossing(geometries: np.ndarray) -> np.ndarray:
    """Which lon/lat geometries cross the 180th meridian as written (bool per geometry).

    A geometry crosses when one of its ring edges spans more than 180 degrees of longitude (but not exactly
    360: an edge from +180 to -180 runs along a pole or the meridian itself, as split shapes write it) or
    when a longitude lies beyond +-180.
    """
    geometries = np.asarray(geometries, dtype=object)
    out = np.zeros(len(geometries), dtype=bool)
    if len(geometries) == 0:
        return out
    bounds = shapely.bounds(geometries)
    beyond = (bounds[:, 0] < -180 - _ON_MERIDIAN) | (bounds[:, 2] > 180 + _ON_MERIDIAN)
    out |= beyond
    # Only a geometry wider than 180 degrees can hold an edge that spans more than 180 degrees.
    wide = np.flatnonzero(~beyond & (bounds[:, 2] - bounds[:, 0] > 180))
    if wide.size:
        parts, part_owner = shapely.get_parts(geometries[wide], return_index=True)
        rings, ring_part = shapely.get_rings(parts, return_index=True)
        coords, coord_ring = shapely.get_coordinates(rings, return_index=True)
        step = np.abs(np.diff(coords[:, 0]))
        same_ring = coord_ring[1:] == coord_ring[:-1]
        jump = same_ring & (step > 180) & (np.abs(step - 360) > _ON_MERIDIAN)
        owners = part_owner[ring_part[coord_ring[1:][jump]]]
        out[wide[np.unique(owners)]] = True
    return out


def split(geometry: shapely.Geometry) -> shapely.Geometry:
    """A lon/lat Polygon or MultiPolygon that crosses the 180th meridian, cut into parts within -180..180.

    Raises ValueError when the shape cannot be cut (a self-intersecting ring, say).
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the package warns when it rewinds a clockwise ring; we accept both
        try:
            if isinstance(geometry, shapely.MultiPolygon):
                fixed = antimeridian.fix_multi_polygon(geometry, fix_winding=True, great_circle=False)
            elif isinstance(geometry, shapely.Polygon):
                fixed = antimeridian.fix_polygon(geometry, fix_winding=True, great_circle=False)
            else:
                raise ValueError(f"cannot cut a {geometry.geom_type} at the 180th meridian")
        except (AssertionError, IndexError, TypeError) as exc:  # the package's own checks
            raise ValueError(
                f"the shape could not be cut at the 180th meridian ({exc or type(exc).__name__})"
            ) from None
    parts = [p for p in shapely.get_parts(fixed) if not p.is_empty and p.area > 0]
    if not parts:
        raise ValueError("the shape has no area once cut at the 180th meridian")
    return parts[0] if len(parts) == 1 else shapely.MultiPolygon(parts)


def split_crossing(geometries: np.ndarray) -> np.ndarray:
    """Lon/lat geometries with those that cross the 180th meridian cut there (see :func:`split`)."""
    geometries = np.asarray(geometries, dtype=object)
    pick = np.flatnonzero(crossing(geometries))
    if pick.size == 0:
        return geometries
    out = geometries.copy()
    for i in pick:
        out[i] = split(geometries[i])
    return out


def wrap_parts(
    parts: np.ndarray, owner: np.ndarray, west: float, east: float, period: float
) -> tuple[np.ndarray, np.ndarray]:
    """Parts on a lat-lon grid's plane, each copied by whole turns (``period``) to where it meets [west, east].

    ``owner`` gives each part's feature; returns the copies and their owners. A part that meets the grid at
    no turn is left out (its feature is outside the grid there). When the grid spans more than one turn
    (a repeated wrap-around column), copies are clipped to one turn from ``west`` so no ground counts twice.
    """
    if len(parts) == 0:
        return parts, owner
    bounds = shapely.bounds(parts)
    # Copy k overlaps the grid when xmin + k P < east and xmax + k P > west.
    k_low = np.floor((west - bounds[:, 2]) / period) + 1
    k_high = np.ceil((east - bounds[:, 0]) / period) - 1
    k_low = np.where(np.isnan(k_low), 0, k_low).astype(np.int64)
    k_high = np.where(np.isnan(k_high), -1, k_high).astype(np.int64)
    count = np.maximum(k_high - k_low + 1, 0)
    if np.all(count == 1) and np.all(k_low == 0) and east - west <= period * (1 + 1e-12):
        return parts, owner  # the common case: every part lies on the grid as written
    index = np.repeat(np.arange(len(parts)), count)
    turn = np.repeat(k_low, count) + (np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count))
    copies = parts[index].copy()
    for k in np.unique(turn):
        if k == 0:
            continue
        sel = np.flatnonzero(turn == k)
        copies[sel] = shapely.transform(
            parts[index[sel]], lambda xy, s=float(k) * period: xy + np.array([s, 0.0])
        )
    if east - west > period * (1 + 1e-12):
        copies = shapely.clip_by_rect(copies, west, -1e300, west + period, 1e300)
        keep = ~shapely.is_empty(copies)
        return copies[keep], owner[index][keep]
    return copies, owner[index]
