"""Tests of service.geometry.antimeridian: shapes crossing the 180th meridian on -180..180 and 0..360 grids.

Before this module the three forms below went wrong silently (issue 11): a ring written 177 E -> 178 W came
back 71 times too large with coverage 1.0 (8.4 M km2 here for a 0.12 M km2 box), a 50 km buffer at
179.95 E became a band of 3.8 M km2 around the globe, and a ring written 177 -> 182 lost its part beyond 180
on a -180..180 grid (coverage 0.6). Expected areas come from pyproj.Geod (WGS84) on the outline with its
edges split every 0.01 degrees, so that the geodesic edges follow the lon/lat lines GeoJSON means.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pyproj
import pytest
import shapely

from service.errors import FeatureError
from service.geometry import cell_areas_km2, compute_weights, parse_features
from service.geometry.antimeridian import crossing, split, wrap_parts
from service.store import Grid

WGS84 = pyproj.CRS.from_epsg(4326)
GEOD = pyproj.Geod(ellps="WGS84")


def grid(west: float, nx: int, south: float = -30.0, ny: int = 60, size: float = 0.5) -> Grid:
    """A lat-lon grid of ``size``-degree cells from (west, south), rows north first."""
    x = west + size * (np.arange(nx) + 0.5)
    y = (south + size * (np.arange(ny) + 0.5))[::-1]
    return Grid(crs_wkt=WGS84.to_wkt(), x=x, y=y, is_geographic=True)


GRIDS = {
    "global -180..180": grid(-180.0, 720),
    "global 0..360": grid(0.0, 720),
    "regional 170..190": grid(170.0, 40),
}


def feature(geometry: dict[str, Any], **properties: Any) -> dict[str, Any]:
    return {"type": "Feature", "id": "a", "geometry": geometry, "properties": properties}


def polygon(ring: list[tuple[float, float]]) -> dict[str, Any]:
    return {"type": "Polygon", "coordinates": [[list(p) for p in ring]]}


def weights(fc: dict[str, Any], g: Grid, **kwargs: Any) -> Any:
    return compute_weights(parse_features(fc, **kwargs), g, cache_size=0)


def geodesic_km2(geometry: shapely.Geometry) -> float:
    """pyproj.Geod's area (km2) of a lon/lat outline, edges split every 0.01 degrees."""
    oriented = shapely.geometry.polygon.orient(shapely.segmentize(geometry, 0.01))
    area, _ = GEOD.geometry_area_perimeter(oriented)
    return abs(area) / 1e6


# The box 177 E .. 178 W, 17 S .. 15 S: whole 0.5-degree cells, 10 by 4.
BOX_KM2 = geodesic_km2(shapely.box(177.0, -17.0, 182.0, -15.0))
FORMS = {
    "ring jumping across 180": polygon([(177, -17), (-178, -17), (-178, -15), (177, -15), (177, -17)]),
    "ring written past 180": polygon([(177, -17), (182, -17), (182, -15), (177, -15), (177, -17)]),
    "clockwise jumping ring": polygon([(177, -17), (177, -15), (-178, -15), (-178, -17), (177, -17)]),
    "cut at 180 (RFC 7946)": {
        "type": "MultiPolygon",
        "coordinates": [
            [[[177, -17], [180, -17], [180, -15], [177, -15], [177, -17]]],
            [[[-180, -17], [-178, -17], [-178, -15], [-180, -15], [-180, -17]]],
        ],
    },
}


def box_cells(g: Grid) -> np.ndarray:
    """(ny, nx) bool: the cells of the box 177 E .. 178 W, 17 S .. 15 S on grid ``g``."""
    lon = np.mod(g.x, 360.0)
    in_lon = (lon > 177.0) & (lon < 182.0)
    in_lat = (g.y > -17.0) & (g.y < -15.0)
    return np.outer(in_lat, in_lon)


@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("grid_name", GRIDS)
def test_a_box_across_180_gets_its_cells_and_area(form: str, grid_name: str) -> None:
    g = GRIDS[grid_name]
    w = weights(feature(FORMS[form]), g)
    cells = box_cells(g)
    assert cells.sum() == 40
    expected = np.where(cells, cell_areas_km2(g), 0.0)
    np.testing.assert_allclose(w.matrix.toarray().reshape(g.shape), expected, rtol=1e-9, atol=1e-9)
    assert w.area_km2[0] == pytest.approx(BOX_KM2, rel=1e-6)
    assert w.matrix.sum() == pytest.approx(BOX_KM2, rel=1e-6)
    assert w.n_cells[0] == 40
    assert w.coverage[0] == pytest.approx(1.0)
    # the centroid sits at 179.5 E, not half a world away
    assert w.longitude[0] == pytest.approx(179.5, abs=1e-6)
    assert w.latitude[0] == pytest.approx(-16.0, abs=0.01)


@pytest.mark.parametrize("grid_name", GRIDS)
def test_a_buffer_around_a_point_near_180(grid_name: str) -> None:
    g = GRIDS[grid_name]
    fc = feature({"type": "Point", "coordinates": [179.95, -16.0]}, buffer_m=50_000)
    w = weights(fc, g)
    circle_km2 = math.pi * 50.0**2  # 7,853.98 km2: the buffer's area by construction
    assert w.area_km2[0] == pytest.approx(circle_km2, rel=1e-4)
    assert w.matrix.sum() == pytest.approx(circle_km2, rel=1e-4)
    assert w.coverage[0] == pytest.approx(1.0)
    # a 100 km circle touches at most 3 x 3 or 3 x 4 half-degree cells here, on both sides of 180
    assert 6 <= w.n_cells[0] <= 12
    used = np.flatnonzero(w.matrix.toarray()[0].reshape(g.shape).any(axis=0))
    lon = np.mod(g.x[used], 360.0)
    assert lon.min() < 180.0 < lon.max()
    assert w.longitude[0] == pytest.approx(179.95, abs=1e-3)


def test_the_buffer_itself_has_the_geodesic_area_of_its_circle() -> None:
    parsed = parse_features(feature({"type": "Point", "coordinates": [179.95, -16.0]}, buffer_m=50_000))
    footprint = parsed.features[0].footprint
    assert len(shapely.get_parts(footprint)) == 2  # cut at 180 into parts within -180..180
    assert shapely.bounds(footprint)[0] >= -180.0 and shapely.bounds(footprint)[2] <= 180.0
    assert geodesic_km2(footprint) == pytest.approx(math.pi * 50.0**2, rel=1e-4)


def test_a_ring_across_180_at_high_latitude_on_a_0_360_grid() -> None:
    g = grid(0.0, 720, south=60.0, ny=20)
    ring = [(178.2, 64.1), (-176.3, 64.4), (-175.0, 67.2), (179.1, 68.0), (178.2, 64.1)]
    w = weights(feature(polygon(ring)), g)
    unwrapped = shapely.Polygon([(x % 360, y) for x, y in ring])
    assert w.area_km2[0] == pytest.approx(geodesic_km2(unwrapped), rel=1e-5)
    assert w.matrix.sum() == pytest.approx(w.area_km2[0], rel=1e-9)
    assert w.coverage[0] == pytest.approx(1.0)


def test_a_box_written_in_0_360_longitudes_on_a_minus_180_grid() -> None:
    g = GRIDS["global -180..180"]
    w = weights(feature(polygon([(190, -17), (191, -17), (191, -15), (190, -15), (190, -17)])), g)
    used = np.flatnonzero(w.matrix.toarray()[0].reshape(g.shape).any(axis=0))
    np.testing.assert_allclose(g.x[used], [-169.75, -169.25])
    assert w.coverage[0] == pytest.approx(1.0)
    assert w.longitude[0] == pytest.approx(-169.5, abs=1e-6)


def test_a_polygon_in_a_projected_request_crs_around_180_is_cut_on_a_lonlat_grid() -> None:
    # An equal-area plane centred on the 180th meridian; a 200 km square around (180, 16 S) drawn on it.
    plane = "+proj=laea +lat_0=-16 +lon_0=180 +ellps=WGS84 +units=m"
    square = [(-100_000, -100_000), (100_000, -100_000), (100_000, 100_000), (-100_000, 100_000)]
    fc = feature(polygon([*square, square[0]]))
    g = GRIDS["global -180..180"]
    w = weights(fc, g, crs=plane)
    assert w.area_km2[0] == pytest.approx(40_000.0, rel=1e-5)  # equal-area plane: 200 km x 200 km
    assert w.matrix.sum() == pytest.approx(40_000.0, rel=1e-5)
    assert w.coverage[0] == pytest.approx(1.0)
    assert abs(w.longitude[0]) == pytest.approx(180.0, abs=1e-3)


def test_a_circle_around_the_north_pole_covers_the_cap() -> None:
    # A 50 km buffer at 89.9 N encloses the pole; its ring runs round every longitude. The kept antimeridian
    # package closes such a ring over the pole.
    g = grid(-180.0, 360, south=88.0, ny=2, size=1.0)
    w = weights(feature({"type": "Point", "coordinates": [10.0, 89.9]}, buffer_m=50_000), g)
    # The circle's 64 vertices are placed so that its chords on the equal-area frame enclose pi r^2; its edges
    # are then read as lon/lat lines, which this close to the pole follow the parallels, i.e. the circle itself
    # through the (stretched) vertices: 0.16 % more. Away from the poles the two readings agree to 1e-5.
    assert w.area_km2[0] == pytest.approx(math.pi * 50.0**2, rel=2e-3)
    assert w.matrix.sum() == pytest.approx(w.area_km2[0], rel=1e-9)
    assert w.n_cells[0] == 360  # every cell of the polar row, and none of the row below


# --- the helpers on their own ----------------------------------------------------------------------------------


def test_crossing_finds_jumps_and_longitudes_past_180_only() -> None:
    geoms = np.array(
        [
            shapely.Polygon([(177, 0), (-178, 0), (-178, 1), (177, 1)]),  # jumps
            shapely.Polygon([(177, 0), (182, 0), (182, 1), (177, 1)]),  # past 180
            shapely.box(-180, -90, 180, -60),  # spans the globe along a pole: no crossing
            shapely.MultiPolygon([shapely.box(177, 0, 180, 1), shapely.box(-180, 0, -178, 1)]),  # cut already
            shapely.box(10, 0, 11, 1),
        ],
        dtype=object,
    )
    assert crossing(geoms).tolist() == [True, True, False, False, False]


def test_split_keeps_the_area_of_a_shape_with_a_hole() -> None:
    shell = [(176, -20), (-176, -20), (-176, -12), (176, -12), (176, -20)]
    hole = [(179, -17), (-179, -17), (-179, -15), (179, -15), (179, -17)]
    cut = split(shapely.Polygon(shell, [hole]))
    assert cut.is_valid
    assert shapely.bounds(cut)[0] >= -180 and shapely.bounds(cut)[2] <= 180
    # on the plane: 8 x 8 degrees less 2 x 2
    assert cut.area == pytest.approx(64.0 - 4.0)


def test_wrap_parts_copies_parts_onto_the_grid_by_whole_turns() -> None:
    parts = np.array([shapely.box(-180, 0, -178, 1), shapely.box(177, 0, 180, 1), shapely.box(10, 0, 11, 1)])
    copies, owner = wrap_parts(parts, np.array([0, 0, 1]), 0.0, 360.0, 360.0)
    assert owner.tolist() == [0, 0, 1]
    assert [shapely.bounds(c)[0] for c in copies] == [180.0, 177.0, 10.0]
    # a grid wider than one turn (a repeated wrap-around column) still counts each bit of ground once
    copies, owner = wrap_parts(np.array([shapely.box(-1, 0, 1, 1)]), np.array([0]), -0.5, 360.5, 360.0)
    assert sum(c.area for c in copies) == pytest.approx(2.0)


def test_a_shape_that_cannot_be_cut_is_refused_with_its_name() -> None:
    # a bow tie across 180: its ring crosses itself, so no cut can make sense of it
    ring = [(177, -17), (-178, -15), (-178, -17), (177, -15), (177, -17)]
    with pytest.raises(FeatureError, match="feature 'a'"):
        weights(feature(polygon(ring)), GRIDS["global -180..180"])
