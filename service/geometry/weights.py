"""Exact cell-overlap weights: features on a grid as one sparse (feature x cell) matrix, cached.

:func:`compute_weights` puts checked features on a store's grid: the weight of a cell is the ground area
(km2) of feature intersected with cell, times a weight layer when one is given, on cells with data only.
Features are taken apart into their polygons (parts), each part is intersected with the cells under its
own bounding box (an archipelago's sea between islands costs nothing), and on lat-lon grids each part is
copied by whole turns of longitude onto the grid (antimeridian.py); pieces of one feature in one cell add up.
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pyproj
import shapely
from scipy import sparse

from service.errors import FeatureError, FeatureWithoutDataError, LimitExceededError, RequestError
from service.geometry.antimeridian import crossing, split, wrap_parts
from service.geometry.checks import (
    Feature,
    ParsedFeatures,
    SkippedFeature,
    _fail,
    _raise_collected,
    invalid_mode,
    request_crs,
    skipped_from,
)
from service.geometry.planes import _Plane, _plane, _to_grid, transform_in_blocks

if TYPE_CHECKING:
    from service.store import Grid

WEIGHTINGS = ("area", "centers")

# Candidate cells handled in one vectorised pass. It bounds memory: a candidate on a feature's edge holds its
# clipped piece (a GEOS polygon) until the pass ends, about 2-3 kB each. 50,000 buffered points in one pass of
# 2,000,000 took the weights' peak from 690 MB to 2,200 MB; in passes of 50,000 candidates to 930 MB, in the
# same time (bench/RESULTS.md, "Scale"). Passes do not change the weights (each candidate is computed alone,
# and passes follow the features' order).
CANDIDATES_PER_PASS = 50_000
# A feature's bounding box may hold this many times max_cells candidate cells before it is refused
# outright (a ring-shaped or diagonal community touches far fewer cells than its bounding box holds).
BBOX_CELLS_FACTOR = 16


# --- weights -----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Weights:
    """The weights of features on a grid: one sparse (feature, cell) matrix, cell = iy * nx + ix.

    ``matrix[f, c]`` is the area (km2) of feature f within cell c (times the weight layer's value under
    layer weighting; the full cell area under ``centers``), zero on cells without data. Per feature:
    ``area_km2`` its whole area, ``n_cells`` the cells with weight, ``coverage`` the share of its area on
    cells with data, ``latitude``/``longitude`` its centroid (degrees, WGS84). ``skipped`` lists the features
    left out under ``invalid="skip"`` (at parsing and here), in request order; their rows are empty, their
    ``n_cells`` and ``coverage`` 0, and their area and centroid NaN when their geometry was unusable.
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
    skipped: list[SkippedFeature] = field(default_factory=list)


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
    invalid: str = "fail",
) -> str:
    """SHA-256 over the feature ids and footprints, their CRS, the grid, the weighting, layer, mask and mode."""
    h = hashlib.sha256()
    h.update(f"wxshock-weights-2|{parsed.crs}|{weighting}|{max_cells}|{invalid}|".encode())
    footprints = np.array([f.footprint for f in parsed.features], dtype=object)
    wkb = shapely.to_wkb(footprints, output_dimension=2)  # None (a skipped feature) stays None
    for f, blob in zip(parsed.features, wkb, strict=True):
        h.update(f.id.encode("utf-8") + b"\0")
        h.update(blob if blob is not None else b"skipped\0")
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
    invalid: str | None = None,
) -> Weights:
    """The weights of every feature on ``grid`` (see :class:`Weights`), cached by :func:`weights_key`.

    ``weighting`` 'area': exact intersection areas (km2); 'centers': the full area of each cell whose
    centre lies inside the feature (boundary included). ``layer`` (ny, nx) multiplies the weights (NaN
    counts as 0). Cells where ``data_mask`` (ny, nx) is False get no weight. Per-feature faults:
    FeatureWithoutDataError for a feature with no weight left (code outside_grid, or no_data for only cells
    without data), FeatureError for one that looks like swapped coordinates (swapped_coordinates),
    LimitExceededError for one touching more than ``max_cells`` cells (too_many_cells). Under ``invalid``
    "fail" they are raised (the first, listing all); under "skip" each such feature keeps an empty row and is
    listed in ``skipped``, unless no feature is left, when they are raised. ``invalid`` defaults to the mode
    the features were parsed with. ``cache_size`` is the number of weight sets kept (settings.
    weights_cache_size; 0 turns caching off).
    """
    mode = invalid_mode(invalid if invalid is not None else parsed.invalid)
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
    key = weights_key(parsed, grid, weighting, layer, data_mask, max_cells, mode)
    cached = WEIGHTS_CACHE.get(key)
    if cached is not None:
        WEIGHTS_CACHE.put(key, cached, cache_size)  # a smaller size asked for now still applies
        return cached
    weights = _compute_weights(parsed, grid, weighting, layer, data_mask, max_cells, key, mode)
    WEIGHTS_CACHE.put(key, weights, cache_size)
    return weights


@dataclass
class _Pieces:
    """Per (part, cell) overlaps found so far, cells in the grid's own index."""

    part: list[np.ndarray] = field(default_factory=list)
    cell: list[np.ndarray] = field(default_factory=list)
    plane: list[np.ndarray] = field(default_factory=list)  # plane units^2, part within cell
    ground: list[np.ndarray] = field(default_factory=list)  # km2 on the ground, part within cell
    counted: list[np.ndarray] = field(default_factory=list)  # the weighting's choice of cells

    def joined(self) -> tuple[np.ndarray, ...]:
        """(part, cell, plane, ground, counted) as flat arrays."""
        if not self.part:
            return (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0), np.zeros(0), np.zeros(0, bool))
        return tuple(np.concatenate(x) for x in (self.part, self.cell, self.plane, self.ground, self.counted))


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
    """For the parts ``rows``: (part, ix, iy, plane area, ground km2, counted) of every cell they overlap.

    The candidates are the cells under each part's bounding box. Those its boundary may touch (edge cells,
    :func:`_edge_cells`) are clipped with GEOS's rectangle clipping; every other candidate lies wholly inside
    or wholly outside the part, which its centre decides (a point-in-polygon test, no geometry built). Plane
    areas become ground areas at each piece's centroid (the cell centre for whole cells). ``counted`` is the
    weighting's choice of cells (all overlapping cells, or those whose centre lies in the part); indices are
    ascending-plane indices.
    """
    x0, x1, y0, y1 = (r[rows] for r in ranges)
    width = x1 - x0
    counts = width * (y1 - y0)
    total = int(counts.sum())
    start = np.cumsum(counts) - counts
    part = np.repeat(rows, counts)
    offset = np.arange(total) - np.repeat(start, counts)
    width_each = np.repeat(width, counts)
    ix = np.repeat(x0, counts) + offset % np.maximum(width_each, 1)
    iy = np.repeat(y0, counts) + offset // np.maximum(width_each, 1)
    g = geoms[part]
    edge_mask = _edge_cells(geoms[rows], x0, x1, y0, y1, start, total, plane)
    cx, cy = plane.x_centres[ix], plane.y_centres[iy]
    cell_area = (plane.x_edges[ix + 1] - plane.x_edges[ix]) * (plane.y_edges[iy + 1] - plane.y_edges[iy])
    whole = np.flatnonzero(~edge_mask)
    inside = np.zeros(total, dtype=bool)
    inside[whole] = shapely.contains_xy(g[whole], cx[whole], cy[whole])
    area = np.where(inside, cell_area, 0.0)
    edge = np.flatnonzero(edge_mask)
    clipped = _clip(
        g[edge],
        plane.x_edges[ix[edge]],
        plane.y_edges[iy[edge]],
        plane.x_edges[ix[edge] + 1],
        plane.y_edges[iy[edge] + 1],
    )
    area[edge] = shapely.area(clipped)
    keep = area > 0
    if weighting == "centers":
        counted = inside.copy()
        counted[edge] = shapely.intersects_xy(g[edge], cx[edge], cy[edge])
        keep |= counted
    else:
        counted = keep
    if plane.ground_km2 is None:
        ground = area * plane.km2_per_unit2
    else:
        # The areal scale at each piece's centroid; whole cells (and empty pieces) use the cell centre.
        px, py = cx.copy(), cy.copy()
        if edge.size:
            ok = area[edge] > 0
            centre = shapely.centroid(clipped[ok])
            px[edge[ok]], py[edge[ok]] = shapely.get_x(centre), shapely.get_y(centre)
        ground = np.zeros_like(area)
        ground[keep] = plane.piece_areas_km2(area[keep], px[keep], py[keep])
    return part[keep], ix[keep], iy[keep], area[keep], ground[keep], counted[keep]


def _edge_cells(
    parts: np.ndarray,
    x0: np.ndarray,
    x1: np.ndarray,
    y0: np.ndarray,
    y1: np.ndarray,
    start: np.ndarray,
    total: int,
    plane: _Plane,
) -> np.ndarray:
    """(total,) bool over the parts' candidate cells: True where the part's boundary may touch the cell.

    Every boundary segment marks each cell of its bounding box's index range (a superset of the cells it
    passes through; a vertex on a cell edge counts for the cells on both sides), so a cell left unmarked
    meets no boundary and lies wholly inside or wholly outside. A segment spanning several cells is first
    cut into as many pieces, which keeps the marked boxes small: a part costs about its boundary's cell
    count, not its bounding box's.
    """
    mark = np.zeros(total, dtype=bool)
    if total == 0:
        return mark
    rings, owner = shapely.get_rings(parts, return_index=True)
    xy, ring_of = shapely.get_coordinates(rings, return_index=True)
    same = ring_of[1:] == ring_of[:-1]  # segments join consecutive vertices of one ring
    if not same.any():
        return mark
    p0, p1 = xy[:-1][same], xy[1:][same]
    k = owner[ring_of[:-1][same]]  # the part (position in ``parts``) of each segment
    left0, left1 = _cell_index(p0, plane, "left"), _cell_index(p1, plane, "left")
    pieces = np.maximum(np.abs(left1[0] - left0[0]), np.abs(left1[1] - left0[1])) + 1
    if (pieces > 1).any():
        step = np.arange(int(pieces.sum())) - np.repeat(np.cumsum(pieces) - pieces, pieces)
        n_each = np.repeat(pieces, pieces)
        d = np.repeat(p1 - p0, pieces, axis=0)
        base = np.repeat(p0, pieces, axis=0)
        q0 = base + d * (step / n_each)[:, None]
        q1 = base + d * ((step + 1) / n_each)[:, None]
        last = step + 1 == n_each
        q1[last] = p1  # the exact end of each segment (one piece per segment is its last)
        p0, p1, k = q0, q1, np.repeat(k, pieces)
        left0, left1 = _cell_index(p0, plane, "left"), _cell_index(p1, plane, "left")
    right0, right1 = _cell_index(p0, plane, "right"), _cell_index(p1, plane, "right")
    lo_x, lo_y = np.minimum(left0[0], left1[0]), np.minimum(left0[1], left1[1])
    hi_x, hi_y = np.maximum(right0[0], right1[0]), np.maximum(right0[1], right1[1])
    a = np.clip(lo_x, x0[k], x1[k] - 1)
    b = np.clip(hi_x, a, x1[k] - 1)
    c = np.clip(lo_y, y0[k], y1[k] - 1)
    e = np.clip(hi_y, c, y1[k] - 1)
    w = b - a + 1
    n = w * (e - c + 1)
    off = np.arange(int(n.sum())) - np.repeat(np.cumsum(n) - n, n)
    w_each = np.repeat(w, n)
    mx = np.repeat(a, n) + off % w_each
    my = np.repeat(c, n) + off // w_each
    p = np.repeat(k, n)
    mark[start[p] + (my - y0[p]) * (x1[p] - x0[p]) + (mx - x0[p])] = True
    return mark


def _cell_index(xy: np.ndarray, plane: _Plane, side: str) -> tuple[np.ndarray, np.ndarray]:
    """Ascending-plane (ix, iy) of the cells holding points; on a cell edge, the lower (left) or upper (right)."""
    ix = np.searchsorted(plane.x_edges, xy[:, 0], side=side) - 1
    iy = np.searchsorted(plane.y_edges, xy[:, 1], side=side) - 1
    return ix, iy


def _clip(
    g: np.ndarray, xmin: np.ndarray, ymin: np.ndarray, xmax: np.ndarray, ymax: np.ndarray
) -> np.ndarray:
    """Each geometry clipped to its rectangle (GEOS rectangle clipping, ~13x faster than an overlay)."""
    ufunc = getattr(shapely.lib, "clip_by_rect", None)
    if ufunc is None:  # older shapely: the general overlay gives the same areas
        return shapely.intersection(g, shapely.box(xmin, ymin, xmax, ymax))
    return ufunc(g, xmin, ymin, xmax, ymax)


def _outside_reason(
    feature: Feature, grid_bounds: np.ndarray, parsed_crs: pyproj.CRS, grid: Grid, plane: _Plane
) -> FeatureError:
    """The error for a feature that overlaps no cell: swapped coordinates if swapping fits, else outside
    (``grid_bounds``: the feature's bounds on the grid's CRS, (xmin, ymin, xmax, ymax))."""
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
                    "swapped_coordinates",
                )
    gx, gy = np.asarray(grid.x_edges), np.asarray(grid.y_edges)
    fb = grid_bounds
    return FeatureWithoutDataError(
        f"feature {feature.id!r} lies outside the grid (grid spans x {min(gx[0], gx[-1]):.6g} to "
        f"{max(gx[0], gx[-1]):.6g}, y {min(gy[0], gy[-1]):.6g} to {max(gy[0], gy[-1]):.6g} in its CRS; the "
        f"feature spans x {fb[0]:.6g} to {fb[2]:.6g}, y {fb[1]:.6g} to {fb[3]:.6g}); check its coordinates "
        "and the request's crs",
        pointer=feature.pointer,
        feature_id=feature.id,
        code="outside_grid",
    )


def _compute_weights(
    parsed: ParsedFeatures,
    grid: Grid,
    weighting: str,
    layer: np.ndarray | None,
    data_mask: np.ndarray | None,
    max_cells: int,
    key: str,
    mode: str,
) -> Weights:
    """The work of :func:`compute_weights`, uncached."""
    ny, nx = grid.shape
    n = len(parsed.features)
    active = np.array([i for i, f in enumerate(parsed.features) if f.footprint is not None], dtype=np.int64)
    features = [parsed.features[i] for i in active]
    m = len(features)
    plane = _plane(grid)
    source = request_crs(parsed.crs)
    faults: dict[int, RequestError] = {}  # row among the active features -> its fault
    footprints = np.array([f.footprint for f in features], dtype=object)
    on_grid = _to_grid(footprints, source, grid.crs())
    if plane.geographic:
        # Shapes that the reprojection carried across the grid's 180th meridian (lon/lat requests were cut
        # at parse time; this catches projected requests and datum shifts at the meridian).
        on_grid = _split_on_grid(on_grid, features, faults)
    # What an outside feature's error reports; then the shapes on the grid's CRS are let go (a copy of every
    # footprint: each copy of 50,000 buffered points holds about 75 MB).
    grid_bounds = shapely.bounds(on_grid)
    geoms = transform_in_blocks(on_grid, plane.to_plane)
    del on_grid
    feature_area = plane.feature_areas_km2(geoms)
    plane_area = shapely.area(geoms)
    parts, owner = _parts(geoms)
    del geoms
    latitude, longitude = _centroids(parts, owner, m, plane)
    if plane.period is not None:
        parts, owner = wrap_parts(parts, owner, plane.x_edges[0], plane.x_edges[-1], plane.period)
    ranges = _index_ranges(shapely.bounds(parts), plane)
    part_candidates = (ranges[1] - ranges[0]) * (ranges[3] - ranges[2])
    candidates = np.bincount(owner, weights=part_candidates, minlength=m).astype(np.int64)
    too_big = candidates > BBOX_CELLS_FACTOR * max_cells
    for r in np.flatnonzero(too_big):
        faults.setdefault(
            int(r), _too_many_cells(features[r], int(candidates[r]), max_cells, "its bounding box spans")
        )
    mask_flat = None if data_mask is None else data_mask.ravel()
    layer_flat = None if layer is None else np.nan_to_num(layer.ravel(), nan=0.0)
    pieces = _Pieces()
    for rows in _passes(np.flatnonzero(~too_big[owner] & (part_candidates > 0)), part_candidates):
        # Prepared for this pass alone: a prepared part keeps the index its first point-in-polygon test builds
        # (a few kB), so parts prepared all at once held 200 MB more by the last pass for 50,000 buffered points.
        shapely.prepare(parts[rows])
        part, ix, iy, area, ground, counted = _overlaps(parts, rows, ranges, plane, weighting)
        shapely.destroy_prepared(parts[rows])
        gx = nx - 1 - ix if plane.x_flipped else ix
        gy = ny - 1 - iy if plane.y_flipped else iy
        pieces.part.append(part)
        pieces.cell.append(gy * nx + gx)
        pieces.plane.append(area)
        pieces.ground.append(ground)
        pieces.counted.append(counted)
    part, cell, area, ground, counted = pieces.joined()
    feature = owner[part]
    if len(parts) != m:
        # Several parts (or copies a turn apart) of one feature may share a cell: one entry per pair.
        feature, cell, area, ground, counted = _per_feature_cell(
            feature, cell, area, ground, counted, ny * nx
        )
    if weighting == "centers":
        base = _cell_ground_km2(cell, grid, plane)
    else:
        base = ground
    weight = np.where(counted, base, 0.0)
    if mask_flat is not None:
        weight = np.where(mask_flat[cell], weight, 0.0)
    if layer_flat is not None:
        weight = weight * layer_flat[cell]
    touched = np.bincount(feature[ground > 0], minlength=m)
    has_data = mask_flat[cell] if mask_flat is not None else np.ones(len(cell), bool)
    data_area = np.bincount(feature, weights=np.where(has_data, ground, 0.0), minlength=m)
    data_plane = np.bincount(feature, weights=np.where(has_data, area, 0.0), minlength=m)
    n_cells = np.bincount(feature[weight > 0], minlength=m)
    for r in np.flatnonzero(~too_big):
        if int(r) in faults:
            continue
        f = features[r]
        if touched[r] > max_cells:
            faults[int(r)] = _too_many_cells(f, int(touched[r]), max_cells, "it touches")
        elif touched[r] == 0 and not (weighting == "centers" and n_cells[r] > 0):
            faults[int(r)] = _outside_reason(f, grid_bounds[r], source, grid, plane)
        elif n_cells[r] == 0:
            faults[int(r)] = _without_data(f, int(touched[r]), weighting, layer is not None, data_area[r] > 0)
    skipped = _settle(faults, features, parsed, mode)
    coverage = np.clip(data_area / np.where(feature_area > 0, feature_area, 1.0), 0.0, 1.0)
    # A feature wholly on cells with data has coverage 1 exactly, not 1 less the midpoint rule's 1e-6 on
    # projected grids (plane areas of the pieces add up to the feature's to rounding).
    coverage[data_plane >= plane_area * (1 - 1e-9)] = 1.0
    faulted = np.zeros(m, dtype=bool)
    faulted[list(faults)] = True
    coverage[faulted] = 0.0
    n_cells[faulted] = 0
    keep = (weight > 0) & ~faulted[feature]
    matrix = sparse.csr_matrix((weight[keep], (active[feature[keep]], cell[keep])), shape=(n, ny * nx))
    matrix.sum_duplicates()
    matrix.sort_indices()
    return Weights(
        matrix=matrix,
        feature_ids=parsed.ids,
        area_km2=_spread(feature_area, active, n, np.nan),
        n_cells=_spread(n_cells.astype(np.int64), active, n, 0),
        coverage=_spread(coverage, active, n, 0.0),
        latitude=_spread(latitude, active, n, np.nan),
        longitude=_spread(longitude, active, n, np.nan),
        key=key,
        weighting=weighting,
        skipped=skipped,
    )


def _parts(geoms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Every polygon of the geometries and the index of the geometry it belongs to (shapely.get_parts), without
    the copy get_parts makes of each geometry when every one is a single non-empty polygon."""
    if len(geoms) and bool(np.all((shapely.get_type_id(geoms) == 3) & ~shapely.is_empty(geoms))):
        return geoms, np.arange(len(geoms), dtype=np.int64)
    return shapely.get_parts(geoms, return_index=True)


def _spread(values: np.ndarray, active: np.ndarray, n: int, fill: float) -> np.ndarray:
    """Per-feature values of the active features placed at their rows among all ``n``, ``fill`` elsewhere."""
    if len(active) == n:
        return values
    out = np.full(n, fill, dtype=values.dtype)
    out[active] = values
    return out


def _settle(
    faults: dict[int, RequestError], features: list[Feature], parsed: ParsedFeatures, mode: str
) -> list[SkippedFeature]:
    """Raise the per-feature faults under 'fail' (or when no feature is left); else every skipped feature."""
    here = [skipped_from(error, features[r].index) for r, error in faults.items()]
    if faults and (mode == "fail" or len(faults) == len(features)):
        errors: list[tuple[int, RequestError]] = [(features[r].index, e) for r, e in faults.items()]
        # under 'skip' with nothing left, the features skipped at parsing belong in the list too
        errors += [
            (s.index, FeatureError(s.reason, pointer=s.pointer, feature_id=s.feature_id, code=s.code))
            for s in (parsed.skipped if mode == "skip" else [])
        ]
        _raise_collected([e for _, e in sorted(errors, key=lambda pair: pair[0])])
    return sorted([*parsed.skipped, *here], key=lambda s: s.index)


def _split_on_grid(
    on_grid: np.ndarray, features: list[Feature], faults: dict[int, RequestError]
) -> np.ndarray:
    """Features on a lat-lon grid's CRS with those crossing its 180th meridian cut there; faults noted."""
    pick = np.flatnonzero(crossing(on_grid))
    if pick.size == 0:
        return on_grid
    out = on_grid.copy()
    for i in pick:
        try:
            out[i] = split(on_grid[i])
        except ValueError as exc:
            f = features[i]
            faults[int(i)] = _fail(
                f.id,
                f.pointer + "/geometry",
                f"crosses the grid's 180th meridian and {exc}; send it cut at 180 degrees as a "
                "MultiPolygon (RFC 7946, section 3.1.9)",
            )
            out[i] = shapely.Polygon()
    return out


def _centroids(parts: np.ndarray, owner: np.ndarray, n: int, plane: _Plane) -> tuple[np.ndarray, np.ndarray]:
    """(latitude, longitude) in WGS84 degrees of each feature's area centroid on the plane.

    On a lat-lon plane each part's centroid first moves by whole turns next to the feature's largest part,
    so that a feature cut at the 180th meridian has its centroid at the meridian, not half a world away.
    """
    area = shapely.area(parts)
    centre = shapely.centroid(parts)
    cx, cy = shapely.get_x(centre), shapely.get_y(centre)
    if plane.period is not None and len(parts) > n:
        order = np.lexsort((area, owner))  # by feature, then by area: each feature's largest part last
        last = order[np.r_[owner[order][1:] != owner[order][:-1], True]]
        ref = np.zeros(n)
        ref[owner[last]] = np.nan_to_num(cx[last])
        cx = cx - plane.period * np.round((cx - ref[owner]) / plane.period)
    weight = np.where(np.isfinite(cx) & np.isfinite(cy), area, 0.0)
    total = np.bincount(owner, weights=weight, minlength=n)
    safe = np.where(total > 0, total, 1.0)
    mx = np.bincount(owner, weights=np.nan_to_num(cx) * weight, minlength=n) / safe
    my = np.bincount(owner, weights=np.nan_to_num(cy) * weight, minlength=n) / safe
    lonlat = plane.to_lonlat(np.column_stack([mx, my]))
    lon = np.where(total > 0, lonlat[:, 0], np.nan)
    lat = np.where(total > 0, lonlat[:, 1], np.nan)
    return lat.copy(), lon.copy()


def _per_feature_cell(
    feature: np.ndarray,
    cell: np.ndarray,
    area: np.ndarray,
    ground: np.ndarray,
    counted: np.ndarray,
    n_cells: int,
) -> tuple[np.ndarray, ...]:
    """Pieces summed per (feature, cell): areas added, a cell counted when any piece counts it."""
    key = feature.astype(np.int64) * n_cells + cell
    unique, inverse = np.unique(key, return_inverse=True)
    area = np.bincount(inverse, weights=area, minlength=len(unique))
    ground = np.bincount(inverse, weights=ground, minlength=len(unique))
    counted = np.bincount(inverse, weights=counted.astype(np.float64), minlength=len(unique)) > 0
    return unique // n_cells, unique % n_cells, area, ground, counted


def _cell_ground_km2(cell: np.ndarray, grid: Grid, plane: _Plane) -> np.ndarray:
    """Ground area (km2) of the given cells (grid-order flat index), as :func:`cell_areas_km2` has it."""
    ny, nx = grid.shape
    gy, gx = np.divmod(cell, nx)
    ix = nx - 1 - gx if plane.x_flipped else gx
    iy = ny - 1 - gy if plane.y_flipped else gy
    area = np.diff(plane.x_edges)[ix] * np.diff(plane.y_edges)[iy]
    return plane.piece_areas_km2(area, plane.x_centres[ix], plane.y_centres[iy])


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
        code="too_many_cells",
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
        f"feature {feature.id!r} has no data: {reason}",
        pointer=feature.pointer,
        feature_id=feature.id,
        code="no_data",
    )
