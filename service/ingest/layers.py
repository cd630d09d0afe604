"""Weight layers: a raster in any CRS and resolution remapped conservatively onto a store's grid.

Two kinds of layer, said by the user:

- ``count`` (people, households): each raster cell's count is shared among the grid cells by the part of its
  area that falls in each. The store keeps the result as a density per km2 of ground, so that a feature's weight
  on a cell (its overlap area in km2 times the layer) is the count in that overlap, whatever the cell's size.
- ``share`` (cropland fraction): each grid cell gets the mean of the raster values under it, weighted by ground
  area. Its weight on a cell (overlap km2 times the share) is then the cropland area in that overlap.

The share of a raster cell inside a grid cell is computed exactly on the raster's own plane: as products of 1-D
interval overlaps when the raster and the grid share a CRS (along latitude in an equal-area coordinate, so that
bands of latitude weigh what they cover), else by intersecting each grid cell, carried into the raster's CRS with
densified edges, with the raster's cells (shapely). Ground areas come from equal-area projections (cylindrical
equal-area for latitude-longitude, Lambert azimuthal equal-area around the grid otherwise). The raster is read
window by window, one block of grid rows at a time, so that its size does not bound memory.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import pyproj
import scipy.sparse as sparse
import shapely

from service.errors import IngestError
from service.ingest.readers import Raster

Kind = Literal["count", "share"]
KINDS: tuple[str, ...] = ("count", "share")
DENSIFY = 8  # points per cell edge when a cell is carried into another CRS
TILE = 64  # grid cells along each side of a tile remapped at once
WINDOW_LIMIT = {"separable": 4_000_000, "polygons": 250_000}  # raster cells read for one tile, at most
# Share of a cell's area outside the raster that still counts as inside: the shares of raster cells are taken on
# the raster's plane, which differs from the ground by second-order terms (about 1e-4 for 0.05-degree cells).
_EXTENT_TOLERANCE = 1e-3


@dataclass(frozen=True)
class Remapped:
    """A layer on a grid: (ny, nx) values (count: per km2 of ground; share: the area-weighted mean), NaN where
    unknown, and what was done."""

    values: np.ndarray
    kind: Kind
    cells_partly_outside: int  # grid cells that the raster covers only in part (NaN for counts)
    cells_without_data: int  # grid cells with no raster data under them at all (NaN)
    total: float  # count layers: the sum of the counts that landed on the grid (for the user to check)


def remap_layer(raster: Raster, grid: Any, kind: str) -> Remapped:
    """Remap a raster conservatively onto a grid; see the module's docstring for the two kinds."""
    if kind not in KINDS:
        raise IngestError(f"layer kind {kind!r} is not one of {list(KINDS)!r}: say count (people) or share (fraction)",
                          field="kind")  # fmt: skip
    grid_crs = grid.crs()
    same = _same_crs(raster.crs, grid_crs)
    ny, nx = len(grid.y), len(grid.x)
    target_area = ground_areas(grid)  # (ny, nx) km2
    weighted = np.zeros((ny, nx))  # count: sum of counts; share: sum of area x value
    valid_area = np.zeros((ny, nx))  # km2 of the cell under raster cells with data
    extent_area = np.zeros((ny, nx))  # km2 of the cell under the raster at all
    tiles = [(slice(r, min(ny, r + TILE)), slice(c, min(nx, c + TILE))) for r in range(0, ny, TILE)
             for c in range(0, nx, TILE)]  # fmt: skip
    while tiles:
        rows, cols = tiles.pop()
        window = _tile_window(raster, grid, grid_crs, rows, cols, same)
        if window is None:
            continue
        size = (window[0].stop - window[0].start) * (window[1].stop - window[1].start)
        if size > WINDOW_LIMIT["separable" if same else "polygons"] and (
            _length(rows) > 1 or _length(cols) > 1
        ):
            tiles.extend(_quarters(rows, cols))  # a finer raster under this tile: remap it in smaller pieces
            continue
        block = (_separable_block if same else _polygon_block)(
            raster, grid, grid_crs, rows, cols, window, kind
        )
        weighted[rows, cols], valid_area[rows, cols], extent_area[rows, cols] = block
    with np.errstate(invalid="ignore", divide="ignore"):
        partly = (extent_area < target_area * (1.0 - _EXTENT_TOLERANCE)) & (extent_area > 0)
        empty = valid_area <= 0
        if kind == "count":
            values = weighted / target_area
            values[partly | empty] = np.nan  # a count over part of a cell would read as a low density
        else:
            values = weighted / valid_area
            values[empty] = np.nan
    total = float(np.nansum(values * target_area)) if kind == "count" else float("nan")
    return Remapped(
        values=values,
        kind=kind,  # type: ignore[arg-type]
        cells_partly_outside=int(partly.sum()),
        cells_without_data=int((empty & ~partly).sum()),
        total=total,
    )


# --- CRS helpers -------------------------------------------------------------------------------------------------


def _same_crs(a: pyproj.CRS, b: pyproj.CRS) -> bool:
    """True when the raster and the grid are in one CRS (then their cells overlap as products of 1-D intervals)."""
    return bool(a.equals(b, ignore_axis_order=True))


def _plain_geographic(crs: pyproj.CRS) -> bool:
    """True for longitude/latitude (not a rotated pole)."""
    return bool(crs.is_geographic and not crs.is_derived)


def _cea(crs: pyproj.CRS) -> pyproj.Transformer:
    """Longitude/latitude of ``crs``'s datum -> cylindrical equal-area metres on its ellipsoid (area-true)."""
    ellipsoid = crs.ellipsoid
    a = ellipsoid.semi_major_metre if ellipsoid else 6378137.0
    rf = ellipsoid.inverse_flattening if ellipsoid and ellipsoid.inverse_flattening else 0.0
    spec = (
        f"+proj=cea +lat_ts=0 +lon_0=0 +a={a!r}"
        + (f" +rf={rf!r}" if rf else f" +b={a!r}")
        + " +units=m +no_defs"
    )
    return pyproj.Transformer.from_crs(crs.geodetic_crs or crs, pyproj.CRS.from_proj4(spec), always_xy=True)


def _laea_for(grid: Any, crs: pyproj.CRS) -> pyproj.CRS:
    """A Lambert azimuthal equal-area CRS on ``crs``'s ellipsoid, centred on the grid (area-true near it)."""
    to_lonlat = pyproj.Transformer.from_crs(crs, crs.geodetic_crs or "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform(float(np.mean(grid.x)), float(np.mean(grid.y)))
    ellipsoid = crs.ellipsoid
    a = ellipsoid.semi_major_metre if ellipsoid else 6378137.0
    rf = ellipsoid.inverse_flattening if ellipsoid and ellipsoid.inverse_flattening else 0.0
    shape = f"+a={a!r}" + (f" +rf={rf!r}" if rf else f" +b={a!r}")
    return pyproj.CRS.from_proj4(f"+proj=laea +lat_0={lat!r} +lon_0={lon!r} {shape} +units=m +no_defs")


def _rings(xe: np.ndarray, ye: np.ndarray, n: int = DENSIFY) -> tuple[np.ndarray, np.ndarray]:
    """(cells, 4n + 1) x and y of each cell's boundary (counter-clockwise in x-east, y-north), densified."""
    x0, x1 = np.minimum(xe[:-1], xe[1:]), np.maximum(xe[:-1], xe[1:])
    y0, y1 = np.minimum(ye[:-1], ye[1:]), np.maximum(ye[:-1], ye[1:])
    X0, Y0 = np.meshgrid(x0, y0)
    X1, Y1 = np.meshgrid(x1, y1)
    t = np.arange(n) / n
    X0, X1, Y0, Y1 = (v.reshape(-1, 1) for v in (X0, X1, Y0, Y1))
    xs = np.concatenate(
        [X0 + (X1 - X0) * t, np.repeat(X1, n, 1), X1 - (X1 - X0) * t, np.repeat(X0, n, 1), X0], 1
    )
    ys = np.concatenate(
        [np.repeat(Y0, n, 1), Y0 + (Y1 - Y0) * t, np.repeat(Y1, n, 1), Y1 - (Y1 - Y0) * t, Y0], 1
    )
    return xs, ys


def _shoelace(xs: np.ndarray, ys: np.ndarray) -> np.ndarray:
    """Areas of closed rings (cells, points), in the square of the coordinates' unit."""
    return 0.5 * np.abs(np.sum(xs[:, :-1] * ys[:, 1:] - xs[:, 1:] * ys[:, :-1], axis=1))


def ground_areas(grid: Any) -> np.ndarray:
    """(ny, nx) ground area of each grid cell in km2: exact on the ellipsoid for latitude-longitude grids (the
    zone formula through cylindrical equal-area coordinates), through an equal-area projection around the grid
    with densified edges otherwise."""
    crs = grid.crs()
    xe, ye = np.asarray(grid.x_edges, dtype=np.float64), np.asarray(grid.y_edges, dtype=np.float64)
    if _plain_geographic(crs):
        cea = _cea(crs)
        _, y_cea = cea.transform(np.zeros_like(ye), np.clip(ye, -90.0, 90.0))
        a = crs.ellipsoid.semi_major_metre if crs.ellipsoid else 6378137.0
        width = np.abs(np.diff(xe)) * np.pi / 180.0 * a
        height = np.abs(np.diff(y_cea))
        return np.outer(height, width) / 1e6
    xs, ys = _rings(xe, ye)
    to_laea = pyproj.Transformer.from_crs(crs, _laea_for(grid, crs), always_xy=True)
    lx, ly = to_laea.transform(xs, ys)
    return (_shoelace(lx, ly) / 1e6).reshape(len(ye) - 1, len(xe) - 1)


def _raster_cell_areas(raster: Raster, rows: slice, cols: slice, laea: pyproj.CRS | None) -> np.ndarray:
    """(rows, cols) ground areas in km2 of a window of raster cells."""
    xe = raster.x_edges()[cols.start : cols.stop + 1]
    ye = raster.y_edges()[rows.start : rows.stop + 1]
    if _plain_geographic(raster.crs):
        cea = _cea(raster.crs)
        _, y_cea = cea.transform(np.zeros_like(ye), np.clip(ye, -90.0, 90.0))
        a = raster.crs.ellipsoid.semi_major_metre if raster.crs.ellipsoid else 6378137.0
        return np.outer(np.abs(np.diff(y_cea)), np.abs(np.diff(xe)) * np.pi / 180.0 * a) / 1e6
    xs, ys = _rings(xe, ye, n=1)
    if laea is None:
        raise IngestError(
            "internal: an equal-area frame is needed for a projected raster"
        )  # never for callers
    lx, ly = pyproj.Transformer.from_crs(raster.crs, laea, always_xy=True).transform(xs, ys)
    return (_shoelace(lx, ly) / 1e6).reshape(len(ye) - 1, len(xe) - 1)


# --- one CRS: separable overlaps ----------------------------------------------------------------------------------


def _interval_fractions(target: np.ndarray, source: np.ndarray) -> sparse.csr_matrix:
    """(n_target, n_source) share of each source interval inside each target interval (edges in any order)."""
    t0, t1 = np.minimum(target[:-1], target[1:]), np.maximum(target[:-1], target[1:])
    s0, s1 = np.minimum(source[:-1], source[1:]), np.maximum(source[:-1], source[1:])
    order = np.argsort(s0)
    s0o, s1o = s0[order], s1[order]
    rows, cols, vals = [], [], []
    for i in range(t0.size):
        first = int(np.searchsorted(s1o, t0[i], side="right"))
        last = int(np.searchsorted(s0o, t1[i], side="left"))
        if last <= first:
            continue
        j = np.arange(first, last)
        overlap = np.minimum(t1[i], s1o[j]) - np.maximum(t0[i], s0o[j])
        keep = overlap > 0
        rows.append(np.full(int(keep.sum()), i))
        cols.append(order[j[keep]])
        vals.append(overlap[keep] / (s1o[j[keep]] - s0o[j[keep]]))
    if not rows:
        return sparse.csr_matrix((t0.size, s0.size))
    return sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                             shape=(t0.size, s0.size))  # fmt: skip


def _window(edges: np.ndarray, lo: float, hi: float) -> slice:
    """The slice of cells (between ``edges``, monotonic) that overlap [lo, hi]."""
    increasing = edges[-1] >= edges[0]
    e = edges if increasing else edges[::-1]
    first = max(0, int(np.searchsorted(e, lo, side="right")) - 1)
    last = min(e.size - 1, int(np.searchsorted(e, hi, side="left")))
    if not increasing:
        first, last = e.size - 1 - last, e.size - 1 - first
    return slice(first, max(first, last))


def _length(part: slice) -> int:
    return int(part.stop - part.start)


def _quarters(rows: slice, cols: slice) -> list[tuple[slice, slice]]:
    """A tile cut in two along each side that has more than one cell."""

    def halves(part: slice) -> list[slice]:
        if _length(part) <= 1:
            return [part]
        middle = part.start + _length(part) // 2
        return [slice(part.start, middle), slice(middle, part.stop)]

    return [(r, c) for r in halves(rows) for c in halves(cols)]


def _tile_edges(grid: Any, rows: slice, cols: slice) -> tuple[np.ndarray, np.ndarray]:
    """(x edges, y edges) of a tile of grid cells."""
    xe = np.asarray(grid.x_edges, dtype=np.float64)[cols.start : cols.stop + 1]
    ye = np.asarray(grid.y_edges, dtype=np.float64)[rows.start : rows.stop + 1]
    return xe, ye


def _tile_window(
    raster: Raster, grid: Any, grid_crs: pyproj.CRS, rows: slice, cols: slice, same: bool
) -> tuple[slice, slice, Any] | None:
    """(raster rows, raster columns, extra) under a tile of grid cells, or None when the raster misses it.

    ``extra`` is the longitude shift of the raster's columns (same CRS) or the tile's rings carried into the
    raster's CRS (other CRS).
    """
    xe_t, ye_t = _tile_edges(grid, rows, cols)
    ye_s, xe_s = raster.y_edges(), raster.x_edges()
    if same:
        row_window = _window(ye_s, float(ye_t.min()), float(ye_t.max()))
        parts = []
        for shift in (0.0, -360.0, 360.0) if _plain_geographic(raster.crs) else (0.0,):
            col_window = _window(xe_s + shift, float(xe_t.min()), float(xe_t.max()))
            if _length(col_window) > 0 and _overlaps(xe_s + shift, xe_t):
                parts.append((col_window, shift))
        if _length(row_window) <= 0 or not parts:
            return None
        # the columns of the first part stand for the window's size; the others are the same columns a turn away
        return row_window, slice(0, sum(_length(c) for c, _ in parts)), parts
    xs, ys = _rings(xe_t, ye_t)
    rx, ry = pyproj.Transformer.from_crs(grid_crs, raster.crs, always_xy=True).transform(xs, ys)
    finite = np.all(np.isfinite(rx) & np.isfinite(ry), axis=1)
    if not finite.any():
        return None
    if _plain_geographic(raster.crs):
        rx = _unwrap_rings(rx, raster)
    row_window = _window(ye_s, float(ry[finite].min()), float(ry[finite].max()))
    col_window = _window(xe_s, float(rx[finite].min()), float(rx[finite].max()))
    if _length(row_window) <= 0 or _length(col_window) <= 0:
        return None
    return row_window, col_window, (rx, ry, finite)


def _overlaps(a: np.ndarray, b: np.ndarray) -> bool:
    """True when two ranges of edges overlap."""
    return bool(min(a.max(), b.max()) > max(a.min(), b.min()))


def _separable_block(
    raster: Raster, grid: Any, grid_crs: pyproj.CRS, rows: slice, cols: slice, window: tuple, kind: str
) -> tuple[np.ndarray, ...]:
    """A tile of grid cells when raster and grid share a CRS: sums from products of 1-D overlaps."""
    xe_t, ye_t = _tile_edges(grid, rows, cols)
    row_window, _, parts = window
    ye_sw = raster.y_edges()[row_window.start : row_window.stop + 1]
    geographic = _plain_geographic(raster.crs)
    if geographic:
        # along latitude the share of a band is the share of its equal-area (authalic) height
        cea = _cea(raster.crs)
        fy = _interval_fractions(
            cea.transform(np.zeros_like(ye_t), ye_t)[1], cea.transform(np.zeros_like(ye_sw), ye_sw)[1]
        )
    else:
        fy = _interval_fractions(ye_t, ye_sw)
    out = [np.zeros((_length(rows), _length(cols))) for _ in range(3)]
    for col_window, shift in parts:
        fx = _interval_fractions(xe_t, raster.x_edges()[col_window.start : col_window.stop + 1] + shift)
        values = raster.read(row_window, col_window)
        area = _raster_cell_areas(
            raster, row_window, col_window, None if geographic else _laea_for(grid, raster.crs)
        )
        for k, field in enumerate(_fields(values, area, kind)):
            out[k] += np.asarray((fy @ field) @ fx.T)
    return tuple(out)


def _fields(values: np.ndarray, area: np.ndarray, kind: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(what is summed, area with data, area) of a raster window, per raster cell."""
    valid = np.isfinite(values)
    if kind == "count":
        summed = np.where(valid, values, 0.0)  # a count is shared by area, not weighted by it
    else:
        summed = np.where(valid, values * area, 0.0)
    return summed, np.where(valid, area, 0.0), area


# --- other CRS: polygons ------------------------------------------------------------------------------------------


def _polygon_block(
    raster: Raster, grid: Any, grid_crs: pyproj.CRS, rows: slice, cols: slice, window: tuple, kind: str
) -> tuple[np.ndarray, ...]:
    """A tile of grid cells in another CRS than the raster's: each grid cell, carried into the raster's CRS with
    densified edges, intersected with the raster cells under it (cells wholly inside count whole)."""
    nyb, nxb = _length(rows), _length(cols)
    rows_s, cols_s, (rx, ry, finite) = window
    values = raster.read(rows_s, cols_s)
    laea = None if _plain_geographic(raster.crs) else _laea_for(grid, raster.crs)
    area = _raster_cell_areas(raster, rows_s, cols_s, laea)
    fields = _fields(values, area, kind)
    xw = raster.x_edges()[cols_s.start : cols_s.stop + 1]
    yw = raster.y_edges()[rows_s.start : rows_s.stop + 1]
    bx0, bx1 = np.minimum(xw[:-1], xw[1:]), np.maximum(xw[:-1], xw[1:])
    by0, by1 = np.minimum(yw[:-1], yw[1:]), np.maximum(yw[:-1], yw[1:])
    BX0, BY0 = np.meshgrid(bx0, by0)
    BX1, BY1 = np.meshgrid(bx1, by1)
    boxes = shapely.box(BX0.ravel(), BY0.ravel(), BX1.ravel(), BY1.ravel())
    box_area = ((BX1 - BX0) * (BY1 - BY0)).ravel()
    cells = np.flatnonzero(finite)
    polygons = shapely.make_valid(shapely.polygons(np.stack([rx[cells], ry[cells]], axis=-1)))
    tree = shapely.STRtree(boxes)
    touching = tree.query(polygons, predicate="intersects")
    inside = tree.query(polygons, predicate="contains")
    key_touching = touching[0].astype(np.int64) * boxes.size + touching[1]
    key_inside = inside[0].astype(np.int64) * boxes.size + inside[1]
    edge = ~np.isin(key_touching, key_inside)
    t_edge, s_edge = touching[0][edge], touching[1][edge]
    overlap = shapely.area(shapely.intersection(polygons[t_edge], boxes[s_edge]))
    target = np.concatenate([cells[inside[0]], cells[t_edge]])
    source = np.concatenate([inside[1], s_edge])
    fraction = np.concatenate([np.ones(inside[0].size), overlap / box_area[s_edge]])
    matrix = sparse.csr_matrix((fraction, (target, source)), shape=(nyb * nxb, boxes.size))
    return tuple(np.asarray(matrix @ f.ravel()).reshape(nyb, nxb) for f in fields)


def _unwrap_rings(rx: np.ndarray, raster: Raster) -> np.ndarray:
    """Longitudes of each ring made continuous and moved by whole turns next to the raster's columns."""
    unwrapped = np.degrees(np.unwrap(np.radians(rx), axis=1))
    xe = raster.x_edges()
    west = float(min(xe[0], xe[-1]))
    centre = unwrapped.mean(axis=1, keepdims=True)
    turns = np.floor((centre - west) / 360.0)
    return unwrapped - 360.0 * turns


# --- into a store -------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LayerReport:
    """What ``wxshock layer`` did on each grid of a store."""

    fingerprint: str
    grids: dict[str, Remapped]

    def lines(self, name: str) -> list[str]:
        """One line per grid, for the command's output."""
        out = []
        for grid, result in self.grids.items():
            text = f"layer {name!r} on grid {grid!r}: {result.kind}"
            if result.kind == "count":
                text += f", {result.total:,.6g} in all on the grid (kept as a density per km2)"
            if result.cells_partly_outside:
                text += f"; {result.cells_partly_outside} cell(s) only partly under the raster left unknown"
            if result.cells_without_data:
                text += f"; {result.cells_without_data} cell(s) without raster data"
            out.append(text)
        return out


def add_layer(
    location: str,
    name: str,
    raster_path: Any,
    kind: str,
    *,
    variable: str | None = None,
    storage_options: dict | None = None,
    progress: bool = False,
) -> LayerReport:
    """Remap a raster onto every grid of a store and write it there as the weight layer ``name``."""
    import hashlib
    from pathlib import Path

    from service.errors import StoreError
    from service.ingest.readers import open_raster
    from service.store import open_store, write_layer

    if kind not in KINDS:
        raise IngestError(f"--kind {kind!r} is not one of {list(KINDS)!r}: say count (people) or share (fraction)",
                          field="kind")  # fmt: skip
    path = Path(raster_path)
    raster = open_raster(path, variable)
    try:
        store = open_store(location, storage_options=storage_options)
        grids = dict(store.grids)
    except StoreError as exc:
        raise IngestError(f"store {str(location)!r} cannot take a layer: {exc.detail}") from exc
    results = {grid_name: remap_layer(raster, grid, kind) for grid_name, grid in grids.items()}
    empty = [g for g, r in results.items() if np.isnan(r.values).all()]
    if len(empty) == len(results):
        raise IngestError(
            f"raster {str(path)!r} does not cover any cell of store {str(location)!r} with data (raster CRS "
            f"{raster.crs.name!r}); check that it is the right raster and that its CRS is right"
        )
    hasher = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            hasher.update(block)
    digest = hasher.hexdigest()
    units = raster.units.strip()
    attrs = {
        "long_name": f"weight layer {name} ({kind})",
        "units": (f"{units} km-2" if units else "km-2") if kind == "count" else (units or "1"),
        "wxshock_layer_kind": kind,
        "wxshock_layer_source": f"{path.name} (sha256 {digest[:16]})",
        "wxshock_layer_method": "count shared by overlap area, per km2 of ground"
        if kind == "count"
        else "mean weighted by ground area of overlap",
    }
    try:
        fingerprint = write_layer(
            location,
            name,
            {g: r.values for g, r in results.items()},
            attrs=attrs,
            storage_options=storage_options,
            progress=progress,
        )
    except StoreError as exc:
        raise IngestError(
            f"layer {name!r} could not be written, the store is unchanged: {exc.detail}"
        ) from exc
    return LayerReport(fingerprint=fingerprint, grids=results)
