"""Tests of service.geometry.planes: areas on the ground on projected grids, checked against pyproj.Geod.

Before ground areas (issue 11), a county-sized box at 36 N on a Lambert conformal grid got its area on the
map plane: about 7.6 % too small where the plane's scale factor is 0.96. Every expected area here is
pyproj.Geod's (WGS84) on the outline, with its edges first split every 100 m on the plane they are straight
in, so that the geodesic edges follow them.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyproj
import pytest
import shapely

from service.geometry import cell_areas_km2, compute_weights, parse_features
from service.store import Grid

WGS84 = pyproj.CRS.from_epsg(4326)
GEOD = pyproj.Geod(ellps="WGS84")
# A continental Lambert conformal conic with standard parallels 25 N and 60 N, as a widely used 1-km daily
# product for North America defines it, x/y in km (from memory: parameters as commonly published for that
# product). Its scale factor is about 0.96 near 36-42 N, far from both standard parallels.
LCC_KM = pyproj.CRS.from_proj4(
    "+proj=lcc +lat_1=25 +lat_2=60 +lat_0=42.5 +lon_0=-100 +x_0=0 +y_0=0 +ellps=WGS84 +units=km +no_defs"
)
TO_LCC = pyproj.Transformer.from_crs(WGS84, LCC_KM, always_xy=True)
FROM_LCC = pyproj.Transformer.from_crs(LCC_KM, WGS84, always_xy=True)


def lcc_grid(x0: float, y0: float, nx: int, ny: int, size: float = 1.0) -> Grid:
    """A grid of ``size``-km cells of LCC_KM from (x0, y0) km, rows north first."""
    x = x0 + size * (np.arange(nx) + 0.5)
    y = (y0 + size * (np.arange(ny) + 0.5))[::-1]
    return Grid(crs_wkt=LCC_KM.to_wkt(), x=x, y=y, is_geographic=False)


def geodesic_km2(outline: shapely.Geometry, transformer: pyproj.Transformer | None, step: float) -> float:
    """pyproj.Geod's area (km2) of an outline, its edges split every ``step`` units first, then to lon/lat."""
    dense = shapely.segmentize(outline, step)
    if transformer is not None:
        dense = shapely.transform(
            dense, lambda xy: np.column_stack(transformer.transform(xy[:, 0], xy[:, 1]))
        )
    area, _ = GEOD.geometry_area_perimeter(shapely.geometry.polygon.orient(dense))
    return abs(area) / 1e6


def feature(geometry: dict[str, Any]) -> dict[str, Any]:
    return {"type": "Feature", "id": "a", "geometry": geometry, "properties": {}}


def lonlat_box(west: float, south: float, east: float, north: float) -> dict[str, Any]:
    return {
        "type": "Polygon",
        "coordinates": [[[west, south], [east, south], [east, north], [west, north], [west, south]]],
    }


def grid_around(lonlat: shapely.Geometry, size: float) -> Grid:
    """An LCC_KM grid of ``size``-km cells covering a lon/lat outline with a cell to spare."""
    on_plane = shapely.transform(lonlat, lambda xy: np.column_stack(TO_LCC.transform(xy[:, 0], xy[:, 1])))
    xmin, ymin, xmax, ymax = on_plane.bounds
    x0, y0 = np.floor(xmin / size) * size - size, np.floor(ymin / size) * size - size
    nx, ny = int(np.ceil((xmax - x0) / size)) + 1, int(np.ceil((ymax - y0) / size)) + 1
    return lcc_grid(x0, y0, nx, ny, size)


def test_a_county_sized_box_at_36_north_has_its_ground_area() -> None:
    box = lonlat_box(-98.4, 35.9, -98.1, 36.1)
    g = grid_around(shapely.box(-98.4, 35.9, -98.1, 36.1), 1.0)
    w = compute_weights(parse_features(feature(box)), g, cache_size=0)
    geodesic = geodesic_km2(shapely.box(-98.4, 35.9, -98.1, 36.1), None, 0.001)
    assert geodesic == pytest.approx(601.0, abs=1.0)
    assert w.area_km2[0] == pytest.approx(geodesic, rel=1e-4)  # the issue asks for 0.1 %
    assert w.matrix.sum() == pytest.approx(geodesic, rel=1e-4)
    assert w.coverage[0] == pytest.approx(1.0, abs=1e-6)
    # the map plane alone would say about 555 km2 here: the test exercises a real scale factor
    on_plane = shapely.transform(
        shapely.segmentize(shapely.box(-98.4, 35.9, -98.1, 36.1), 0.001),
        lambda xy: np.column_stack(TO_LCC.transform(xy[:, 0], xy[:, 1])),
    )
    assert on_plane.area == pytest.approx(555.0, abs=3.0)


def test_cell_areas_of_a_km_grid_are_ground_areas() -> None:
    g = lcc_grid(100.0, -700.0, 3, 2, size=25.0)
    areas = cell_areas_km2(g)
    xe, ye = g.x_edges, g.y_edges
    for j in range(2):
        for i in range(3):
            cell = shapely.box(xe[i], ye[j + 1], xe[i + 1], ye[j])
            # midpoint rule on 25 km cells: about 1.4e-6 (see planes.py)
            assert areas[j, i] == pytest.approx(geodesic_km2(cell, FROM_LCC, 0.1), rel=3e-6)
    assert areas.mean() / 625.0 == pytest.approx(1 / 0.96**2, rel=0.02)  # k about 0.96 there


def test_weights_follow_the_ground_area_of_each_cell_fraction_across_a_large_polygon() -> None:
    # 10 degrees of latitude: the scale factor runs from about 0.99 (30 N) to 0.96 (40 N), so plane areas
    # would tilt the weights by 6 % from south to north.
    outline = shapely.Polygon([(-104, 30), (-96, 30.5), (-95, 40), (-103, 39.5), (-104, 30)])
    g = grid_around(outline, 50.0)
    fc = feature({"type": "Polygon", "coordinates": [list(map(list, outline.exterior.coords))]})
    w = compute_weights(parse_features(fc), g, cache_size=0)
    expected_total = geodesic_km2(outline, None, 0.01)
    assert w.area_km2[0] == pytest.approx(expected_total, rel=1e-5)
    assert w.matrix.sum() == pytest.approx(expected_total, rel=1e-5)
    dense = w.matrix.toarray()[0].reshape(g.shape)
    on_plane = shapely.transform(
        shapely.segmentize(outline, 0.01), lambda xy: np.column_stack(TO_LCC.transform(xy[:, 0], xy[:, 1]))
    )
    xe, ye = g.x_edges, g.y_edges
    checked = 0
    for j, i in zip(*np.nonzero(dense), strict=True):
        piece = on_plane.intersection(shapely.box(xe[i], ye[j + 1], xe[i + 1], ye[j]))
        if piece.area < 1.0:
            continue  # slivers of under 1 km2: their geodesic area is itself only good to a few %
        assert dense[j, i] == pytest.approx(geodesic_km2(piece, FROM_LCC, 0.1), rel=1e-5)
        checked += 1
    assert checked > 50


def test_polygons_sent_in_the_grid_crs_have_ground_areas_too() -> None:
    # long edges straight on the Lambert plane: the ground area follows them, not the lon/lat chords
    g = lcc_grid(-300.0, -600.0, 30, 20, size=20.0)
    ring = [[-280.0, -580.0], [250.0, -560.0], [260.0, -220.0], [-270.0, -230.0], [-280.0, -580.0]]
    parsed = parse_features(feature({"type": "Polygon", "coordinates": [ring]}), crs=LCC_KM.to_wkt())
    w = compute_weights(parsed, g, cache_size=0)
    expected = geodesic_km2(shapely.Polygon(ring), FROM_LCC, 0.1)
    assert w.area_km2[0] == pytest.approx(expected, rel=1e-5)
    assert w.matrix.sum() == pytest.approx(expected, rel=1e-5)


def test_a_polar_stereographic_grid_has_ground_areas() -> None:
    # NSIDC's north polar stereographic (EPSG:3413, true scale at 70 N, metres): 25 km cells near 75 N.
    polar = pyproj.CRS.from_epsg(3413)
    to_polar = pyproj.Transformer.from_crs(WGS84, polar, always_xy=True)
    from_polar = pyproj.Transformer.from_crs(polar, WGS84, always_xy=True)
    cx, cy = to_polar.transform(-40.0, 75.0)
    size = 25_000.0
    x = cx - 5 * size + size * (np.arange(10) + 0.5)
    y = (cy - 5 * size + size * (np.arange(10) + 0.5))[::-1]
    g = Grid(crs_wkt=polar.to_wkt(), x=x, y=y, is_geographic=False)
    box = shapely.box(-42.0, 74.5, -38.0, 75.5)
    w = compute_weights(parse_features(feature(lonlat_box(-42.0, 74.5, -38.0, 75.5))), g, cache_size=0)
    expected = geodesic_km2(box, None, 0.001)
    assert w.area_km2[0] == pytest.approx(expected, rel=1e-5)
    assert w.matrix.sum() == pytest.approx(expected, rel=1e-5)
    cells = cell_areas_km2(g)
    outline = shapely.box(g.x_edges[0], g.y_edges[1], g.x_edges[1], g.y_edges[0])
    assert cells[0, 0] == pytest.approx(geodesic_km2(outline, from_polar, 100.0), rel=3e-6)


def test_centers_weighting_on_a_projected_grid_takes_whole_ground_cells() -> None:
    g = lcc_grid(0.0, -600.0, 4, 4, size=10.0)
    ring = [[6.0, -596.0], [36.0, -596.0], [36.0, -566.0], [6.0, -566.0], [6.0, -596.0]]
    parsed = parse_features(feature({"type": "Polygon", "coordinates": [ring]}), crs=LCC_KM.to_wkt())
    w = compute_weights(parsed, g, weighting="centers", cache_size=0)
    cells = cell_areas_km2(g)
    dense = w.matrix.toarray()[0].reshape(g.shape)
    np.testing.assert_allclose(dense[1:4, 1:4], cells[1:4, 1:4], rtol=1e-12)
    assert dense[0].sum() == 0 and dense[:, 0].sum() == 0


# --- rotated-pole grids ---------------------------------------------------------------------------------------

# A CF rotated_latitude_longitude grid with the pole of a widely used regional-climate domain over Europe
# (grid north pole 39.25 N, 162 W; 0.44-degree cells; from memory), on the WGS84 datum pyproj gives it when
# the file names no earth radius, and on the 6,371,229 m sphere such model output often declares.
ROTATED = {"grid_mapping_name": "rotated_latitude_longitude", "grid_north_pole_latitude": 39.25,
           "grid_north_pole_longitude": -162.0}  # fmt: skip


def rotated_grid(earth_radius: float | None = None) -> tuple[Grid, pyproj.CRS]:
    """The rotated-pole grid (106 x 103 cells of 0.44 degrees, rows north first) and its CRS."""
    attrs = dict(ROTATED)
    if earth_radius is not None:
        attrs["earth_radius"] = earth_radius
    crs = pyproj.CRS.from_cf(attrs)
    x = -28.375 + 0.44 * np.arange(106)
    y = (-23.375 + 0.44 * np.arange(103))[::-1]
    return Grid(crs_wkt=crs.to_wkt(), x=x, y=y, is_geographic=bool(crs.is_geographic)), crs


@pytest.mark.parametrize("earth_radius", [None, 6_371_229.0])
def test_a_rotated_pole_grid_serves_a_box_with_its_ground_area(earth_radius: float | None) -> None:
    g, crs = rotated_grid(earth_radius)
    geod = crs.get_geod()  # the datum's own ellipsoid or sphere
    box = shapely.box(8.0, 49.0, 12.0, 52.0)
    w = compute_weights(parse_features(feature(lonlat_box(8.0, 49.0, 12.0, 52.0))), g, cache_size=0)
    # pyproj.Geod on the lon/lat box (edges split every 0.001 degrees), on the grid datum's ellipsoid
    expected = (
        abs(geod.geometry_area_perimeter(shapely.geometry.polygon.orient(shapely.segmentize(box, 0.001)))[0])
        / 1e6
    )
    assert w.area_km2[0] == pytest.approx(expected, rel=1e-5)
    assert w.matrix.sum() == pytest.approx(expected, rel=1e-5)
    assert w.coverage[0] == 1.0
    # its centroid in longitude/latitude, never in the grid's rotated coordinates
    assert w.longitude[0] == pytest.approx(10.0, abs=0.01)
    assert w.latitude[0] == pytest.approx(50.5, abs=0.05)


def test_rotated_pole_cells_have_their_ground_areas() -> None:
    g, crs = rotated_grid()
    to_lonlat = pyproj.Transformer.from_crs(crs, WGS84, always_xy=True)
    areas = cell_areas_km2(g)
    xe, ye = g.x_edges, g.y_edges
    for j, i in [(0, 0), (51, 53), (102, 105), (10, 90)]:
        cell = shapely.segmentize(shapely.box(xe[i], ye[j + 1], xe[i + 1], ye[j]), 0.001)
        lonlat = shapely.transform(cell, lambda xy: np.column_stack(to_lonlat.transform(xy[:, 0], xy[:, 1])))
        geodesic = abs(GEOD.geometry_area_perimeter(shapely.geometry.polygon.orient(lonlat))[0]) / 1e6
        assert areas[j, i] == pytest.approx(geodesic, rel=1e-5)
