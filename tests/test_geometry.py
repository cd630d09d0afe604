"""Tests of service.geometry: GeoJSON checks, buffers, exact cell areas and overlap weights on hand-built grids."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pyproj
import pytest
import shapely

from service import geometry
from service.errors import FeatureError, FeatureWithoutDataError, LimitExceededError, RequestError
from service.geometry import (
    WEIGHTS_CACHE,
    authalic_y,
    buffer_circle,
    cell_areas_km2,
    compute_weights,
    parse_features,
)
from service.store import Grid
from tests._support_store import LAMBERT_CRS

WGS84 = pyproj.CRS.from_epsg(4326)


def lonlat_grid(west: float, south: float, size: float, nx: int, ny: int, *, north_up: bool = True) -> Grid:
    """A regular lat-lon grid of ``size``-degree cells from (west, south); rows north first when north_up."""
    x = west + size * (np.arange(nx) + 0.5)
    y = south + size * (np.arange(ny) + 0.5)
    return Grid(crs_wkt=WGS84.to_wkt(), x=x, y=y[::-1] if north_up else y, is_geographic=True)


def lambert_grid(nx: int = 4, ny: int = 3, size: float = 10_000.0) -> Grid:
    """A projected grid of the test Lambert CRS, ``size``-metre cells from (0, 0), rows north first."""
    x = size * (np.arange(nx) + 0.5)
    y = size * (np.arange(ny) + 0.5)[::-1]
    return Grid(crs_wkt=LAMBERT_CRS.to_wkt(), x=x, y=y, is_geographic=False)


def box(x0: float, y0: float, x1: float, y1: float) -> list[list[list[float]]]:
    """GeoJSON polygon coordinates of an axis-aligned rectangle."""
    return [[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]]


def collection(*geometries: dict[str, Any], properties: list[dict] | None = None) -> dict[str, Any]:
    """A FeatureCollection of the geometries, ids 'c0', 'c1', ..."""
    props = properties or [{} for _ in geometries]
    return {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "id": f"c{i}", "geometry": g, "properties": p}
            for i, (g, p) in enumerate(zip(geometries, props, strict=True))
        ],
    }


def polygon(coords: Any) -> dict[str, Any]:
    return {"type": "Polygon", "coordinates": coords}


def weights_of(fc: dict, grid: Grid, **kwargs: Any) -> geometry.Weights:
    """Weights without the cache, so every test computes afresh."""
    return compute_weights(parse_features(fc), grid, cache_size=0, **kwargs)


def dense(w: geometry.Weights, grid: Grid) -> np.ndarray:
    """(feature, ny, nx) dense weights."""
    return w.matrix.toarray().reshape(len(w.feature_ids), *grid.shape)


# --- cell areas ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("south", "expected_km2"),
    # CHECK-VALUES.md "Cell areas": 1 x 1 degree cells on the WGS84 ellipsoid [recomputed from the exact
    # zone-area formula]: equator to 1 N 12,308.46; 44-45 N 8,837.37; 59-60 N 6,309.81 km2.
    [(0.0, 12_308.46), (44.0, 8_837.37), (59.0, 6_309.81)],
)
def test_one_degree_cell_area_on_the_ellipsoid(south: float, expected_km2: float) -> None:
    area = cell_areas_km2(lonlat_grid(10.0, south, 1.0, 1, 1))
    assert area[0, 0] == pytest.approx(expected_km2, abs=0.006)


def test_one_degree_cell_on_the_authalic_sphere() -> None:
    # CHECK-VALUES.md: A = R^2 dlon (sin lat2 - sin lat1), authalic radius 6,371,007.2 m -> 12,363.71 km2.
    sphere = pyproj.CRS.from_proj4("+proj=longlat +R=6371007.2 +no_defs")
    grid = Grid(crs_wkt=sphere.to_wkt(), x=np.array([0.5]), y=np.array([0.5]), is_geographic=True)
    assert cell_areas_km2(grid)[0, 0] == pytest.approx(12_363.71, abs=0.006)


def test_global_grid_sums_to_the_whole_ellipsoid() -> None:
    # CHECK-VALUES.md: whole WGS84 ellipsoid 510,065,621.72 km2 [published].
    grid = lonlat_grid(-180.0, -90.0, 2.0, 180, 90)
    assert cell_areas_km2(grid).sum() == pytest.approx(510_065_621.72, abs=0.05)


def test_small_cell_areas_agree_with_pyproj_geodesic_areas() -> None:
    # pyproj.Geod(ellps="WGS84").polygon_area_perimeter: geodesic edges; CHECK-VALUES.md says it agrees
    # with the zone formula to about 1e-5 for small cells.
    grid = lonlat_grid(30.0, 47.0, 0.01, 3, 2)
    geod = pyproj.Geod(ellps="WGS84")
    areas = cell_areas_km2(grid)
    xe, ye = grid.x_edges, grid.y_edges
    for j in range(2):
        for i in range(3):
            lons = [xe[i], xe[i + 1], xe[i + 1], xe[i]]
            lats = [ye[j + 1], ye[j + 1], ye[j], ye[j]]
            geodesic, _ = geod.polygon_area_perimeter(lons, lats)
            assert areas[j, i] == pytest.approx(abs(geodesic) / 1e6, rel=1e-5)


def test_authalic_northing_matches_pyproj_cylindrical_equal_area() -> None:
    # pyproj's +proj=cea (lat_ts=0) on WGS84 as the reference implementation of Snyder's formula.
    cea = pyproj.Transformer.from_crs(WGS84, "+proj=cea +lat_ts=0 +ellps=WGS84", always_xy=True)
    lat = np.array([-89.5, -45.0, -1.0, 0.0, 12.3, 60.0, 89.9])
    _, expected = cea.transform(np.zeros_like(lat), lat)
    np.testing.assert_allclose(authalic_y(lat, 6_378_137.0, math.sqrt(0.00669437999014)), expected, atol=1e-3)


def lambert_ground_km2(outline: shapely.Geometry) -> float:
    """pyproj.Geod's area (km2, WGS84) of an outline drawn on the test Lambert plane, edges densified to 100 m."""
    to_lonlat = pyproj.Transformer.from_crs(LAMBERT_CRS, WGS84, always_xy=True)
    # Geod subtracts holes only when they wind the other way from the shell
    dense_outline = shapely.geometry.polygon.orient(shapely.segmentize(outline, 100.0))
    lonlat = shapely.transform(
        dense_outline, lambda xy: np.column_stack(to_lonlat.transform(xy[:, 0], xy[:, 1]))
    )
    area, _ = pyproj.Geod(ellps="WGS84").geometry_area_perimeter(lonlat)
    return abs(area) / 1e6


def test_projected_cell_areas_are_ground_areas() -> None:
    # The 10-km cells of the test Lambert plane (standard parallels 20 S and 30 S, cells near 25 S, where the
    # scale factor is about 0.9962) are about 100.76 km2 on the ground; pyproj.Geod on each outline.
    grid = lambert_grid()
    areas = cell_areas_km2(grid)
    xe, ye = grid.x_edges, grid.y_edges
    for j in range(grid.shape[0]):
        for i in range(grid.shape[1]):
            cell = shapely.box(xe[i], ye[j + 1], xe[i + 1], ye[j])
            assert areas[j, i] == pytest.approx(lambert_ground_km2(cell), rel=1e-6)
    assert areas.mean() == pytest.approx(100.76, abs=0.01)


# --- weights on hand-built grids -----------------------------------------------------------------------------


def test_half_of_one_cell_and_all_of_another() -> None:
    grid = lonlat_grid(0.0, 0.0, 1.0, 3, 2)  # rows: 1-2 N (row 0), 0-1 N (row 1)
    area = cell_areas_km2(grid)
    w = weights_of(collection(polygon(box(0.5, 0.0, 2.0, 1.0))), grid)
    expected = np.zeros((2, 3))
    expected[1, 0] = area[1, 0] / 2
    expected[1, 1] = area[1, 1]
    np.testing.assert_allclose(dense(w, grid)[0], expected, rtol=1e-12, atol=1e-9)
    assert w.n_cells[0] == 2
    assert w.coverage[0] == pytest.approx(1.0)
    assert w.area_km2[0] == pytest.approx(1.5 * area[1, 0], rel=1e-12)


def test_hole_takes_out_its_cell() -> None:
    grid = lambert_grid(nx=3, ny=3)
    shell = box(0, 0, 30_000, 30_000)[0]
    hole = box(10_000, 10_000, 20_000, 20_000)[0]
    fc_crs = parse_features(collection(polygon([shell, hole])), crs=LAMBERT_CRS.to_wkt())
    w = compute_weights(fc_crs, grid, cache_size=0)
    expected = cell_areas_km2(grid)
    expected[1, 1] = 0.0
    np.testing.assert_allclose(dense(w, grid)[0], expected, rtol=1e-12)
    assert w.n_cells[0] == 8
    assert w.area_km2[0] == pytest.approx(lambert_ground_km2(shapely.Polygon(shell, [hole])), rel=1e-6)


def test_multipolygon_across_two_cells() -> None:
    grid = lonlat_grid(0.0, 0.0, 1.0, 2, 1)
    area = cell_areas_km2(grid)[0, 0]
    multi = {"type": "MultiPolygon", "coordinates": [box(0.0, 0.0, 0.5, 1.0), box(1.0, 0.0, 1.25, 1.0)]}
    w = weights_of(collection(multi), grid)
    np.testing.assert_allclose(dense(w, grid)[0], [[area / 2, area / 4]], rtol=1e-12)


def test_point_buffer_has_area_pi_r_squared_inside_one_cell() -> None:
    grid = lonlat_grid(10.0, 45.0, 1.0, 1, 1)
    radius = 3_000.0
    point = {"type": "Point", "coordinates": [10.5, 45.5]}
    w = weights_of(collection(point, properties=[{"buffer_m": radius}]), grid)
    expected = math.pi * radius**2 / 1e6
    assert w.matrix.nnz == 1
    assert w.matrix[0, 0] == pytest.approx(expected, rel=1e-6)
    assert w.area_km2[0] == pytest.approx(expected, rel=1e-6)
    assert (w.longitude[0], w.latitude[0]) == pytest.approx((10.5, 45.5), abs=1e-4)


def test_buffer_is_drawn_in_metres_not_degrees() -> None:
    # pyproj.Geod.inv gives the geodesic distance centre -> vertex: the radius in metres at any latitude.
    geod = pyproj.Geod(ellps="WGS84")
    for lat in (0.0, 60.0):
        circle = buffer_circle(20.0, lat, 5_000.0)
        ring = np.asarray(circle.exterior.coords)[:-1]
        _, _, distance = geod.inv(np.full(len(ring), 20.0), np.full(len(ring), lat), ring[:, 0], ring[:, 1])
        # radius stretched by sqrt(2 pi / (n sin(2 pi / n))) so the polygon holds pi r^2
        n = geometry.BUFFER_VERTICES
        stretched = 5_000.0 * math.sqrt(2 * math.pi / (n * math.sin(2 * math.pi / n)))
        np.testing.assert_allclose(distance, stretched, rtol=2e-4)


def test_buffer_circles_in_blocks_are_those_of_one_pass(monkeypatch: pytest.MonkeyPatch) -> None:
    """Circles made BUFFER_BLOCK points at a time (bounded memory for 50,000 points) have the vertices of all
    points at once, bit for bit, poles (through PROJ) included."""
    from service.geometry import planes

    rng = np.random.default_rng(8)
    lon, lat, radius = (
        rng.uniform(-180, 180, 1001),
        rng.uniform(-89.9, 89.9, 1001),
        rng.uniform(10, 5e4, 1001),
    )
    lat[[3, 700]] = (90.0, -90.0)
    monkeypatch.setattr(planes, "BUFFER_BLOCK", 64)
    blocked = shapely.get_coordinates(planes.buffer_circles(lon, lat, radius))
    monkeypatch.setattr(planes, "BUFFER_BLOCK", 10**6)
    whole = shapely.get_coordinates(planes.buffer_circles(lon, lat, radius))
    assert blocked.shape == (1001 * (geometry.BUFFER_VERTICES + 1), 2)
    assert np.array_equal(blocked.view(np.int64), whole.view(np.int64))


def test_community_smaller_than_one_cell_gets_its_area() -> None:
    grid = lambert_grid(nx=2, ny=2)
    fc = collection(polygon(box(1_000, 1_000, 2_000, 3_000)))
    w = compute_weights(parse_features(fc, crs=LAMBERT_CRS.to_wkt()), grid, cache_size=0)
    assert w.matrix.nnz == 1
    ground = lambert_ground_km2(shapely.box(1_000, 1_000, 2_000, 3_000))  # 2 km2 on the plane
    assert dense(w, grid)[0, 1, 0] == pytest.approx(ground, rel=1e-6)  # row 1 is the southern row (y 0-10 km)
    assert w.area_km2[0] == pytest.approx(ground, rel=1e-6)


def test_missing_cells_drop_out_and_coverage_is_the_share_with_data() -> None:
    grid = lonlat_grid(0.0, 0.0, 1.0, 2, 1)
    area = cell_areas_km2(grid)[0, 0]
    mask = np.array([[True, False]])
    w = weights_of(collection(polygon(box(0.5, 0.0, 2.0, 1.0))), grid, data_mask=mask)
    np.testing.assert_allclose(dense(w, grid)[0], [[area / 2, 0.0]], rtol=1e-12)
    assert w.coverage[0] == pytest.approx(1 / 3)
    assert w.n_cells[0] == 1


def test_feature_half_outside_the_grid() -> None:
    grid = lonlat_grid(0.0, 0.0, 1.0, 2, 1)
    area = cell_areas_km2(grid)[0, 0]
    w = weights_of(collection(polygon(box(-1.0, 0.0, 1.0, 1.0))), grid)
    np.testing.assert_allclose(dense(w, grid)[0], [[area, 0.0]], rtol=1e-12)
    assert w.coverage[0] == pytest.approx(0.5, rel=1e-9)
    assert w.area_km2[0] == pytest.approx(2 * area, rel=1e-9)


def test_centers_weighting_counts_whole_cells_whose_centre_is_inside() -> None:
    grid = lambert_grid(nx=3, ny=2)
    fc = parse_features(collection(polygon(box(4_000, 0, 16_000, 10_000))), crs=LAMBERT_CRS.to_wkt())
    w = compute_weights(fc, grid, weighting="centers", cache_size=0)
    cells = cell_areas_km2(grid)
    np.testing.assert_allclose(dense(w, grid)[0], [[0.0, 0.0, 0.0], [cells[1, 0], cells[1, 1], 0.0]])
    area = compute_weights(fc, grid, weighting="area", cache_size=0)
    # 60 % of each cell's plane area; the pieces' ground areas at their own centroids (within 1e-6)
    np.testing.assert_allclose(
        dense(area, grid)[0], [[0.0, 0.0, 0.0], [0.6 * cells[1, 0], 0.6 * cells[1, 1], 0.0]], rtol=1e-6
    )
    assert w.coverage[0] == pytest.approx(1.0)


def test_centers_weighting_refuses_a_feature_with_no_centre_inside() -> None:
    grid = lambert_grid(nx=2, ny=2)
    fc = parse_features(collection(polygon(box(1_000, 1_000, 2_000, 2_000))), crs=LAMBERT_CRS.to_wkt())
    with pytest.raises(FeatureWithoutDataError, match="no cell centre .* use weighting 'area'"):
        compute_weights(fc, grid, weighting="centers", cache_size=0)


def test_layer_weighting_multiplies_area_by_the_layer_and_nan_counts_zero() -> None:
    grid = lambert_grid(nx=3, ny=2)
    layer = np.array([[1.0, 1.0, 1.0], [2.0, np.nan, 5.0]])
    fc = parse_features(collection(polygon(box(5_000, 0, 30_000, 10_000))), crs=LAMBERT_CRS.to_wkt())
    w = compute_weights(fc, grid, layer=layer, cache_size=0)
    cells = cell_areas_km2(grid)
    np.testing.assert_allclose(
        dense(w, grid)[0], [[0.0, 0.0, 0.0], [0.5 * cells[1, 0] * 2, 0.0, cells[1, 2] * 5]], rtol=1e-6
    )
    assert w.n_cells[0] == 2


def test_layer_of_zeros_is_a_feature_without_data() -> None:
    grid = lambert_grid(nx=2, ny=2)
    fc = parse_features(collection(polygon(box(0, 0, 10_000, 10_000))), crs=LAMBERT_CRS.to_wkt())
    with pytest.raises(FeatureWithoutDataError, match="weight layer is zero or missing"):
        compute_weights(fc, grid, layer=np.array([[3.0, 3.0], [0.0, 3.0]]), cache_size=0)


def test_negative_layer_is_refused() -> None:
    grid = lambert_grid(nx=2, ny=2)
    fc = parse_features(collection(polygon(box(0, 0, 10_000, 10_000))), crs=LAMBERT_CRS.to_wkt())
    with pytest.raises(RequestError, match="negative"):
        compute_weights(fc, grid, layer=np.array([[3.0, 3.0], [-1.0, 3.0]]), cache_size=0)


@pytest.mark.parametrize(("north_up", "flip_x"), [(True, False), (False, False), (True, True)])
def test_grid_orientation_does_not_change_which_cells_are_weighted(north_up: bool, flip_x: bool) -> None:
    grid = lonlat_grid(0.0, 0.0, 1.0, 3, 2, north_up=north_up)
    if flip_x:
        grid = Grid(crs_wkt=grid.crs_wkt, x=grid.x[::-1].copy(), y=grid.y, is_geographic=True)
    w = weights_of(collection(polygon(box(0.25, 1.0, 1.0, 2.0))), grid)  # 3/4 of the cell at lon 0-1, lat 1-2
    (cell,) = w.matrix.indices
    iy, ix = divmod(int(cell), 3)
    assert (grid.x[ix], grid.y[iy]) == (0.5, 1.5)
    assert w.matrix.data[0] == pytest.approx(0.75 * cell_areas_km2(lonlat_grid(0, 1, 1, 1, 1))[0, 0])


def test_intersection_areas_match_shapely_in_an_equal_area_projection() -> None:
    # The reference: each cell piece cut by shapely in lon/lat, densified, projected to a Lambert azimuthal
    # equal-area frame centred on the community, and measured there with shapely.area.
    grid = lonlat_grid(23.8, 51.0, 0.1, 12, 8)
    rng = np.random.default_rng(3)
    angle = np.sort(rng.uniform(0, 2 * np.pi, 25))
    radius = 0.25 + rng.uniform(-0.08, 0.08, 25)
    ring = np.column_stack([24.4 + radius * np.cos(angle) * 1.5, 51.4 + radius * np.sin(angle)])
    coords = [np.vstack([ring, ring[:1]]).tolist()]
    w = weights_of(collection(polygon(coords)), grid)
    poly = shapely.Polygon(coords[0])
    laea = pyproj.Transformer.from_crs(
        WGS84, "+proj=laea +lat_0=51.4 +lon_0=24.4 +ellps=WGS84", always_xy=True
    )
    xe, ye = grid.x_edges, grid.y_edges
    weights = dense(w, grid)[0]
    for j in range(8):
        for i in range(12):
            piece = shapely.intersection(poly, shapely.box(xe[i], ye[j + 1], xe[i + 1], ye[j]))
            piece = shapely.segmentize(piece, 0.001)
            projected = shapely.transform(
                piece, lambda xy: np.column_stack(laea.transform(xy[:, 0], xy[:, 1]))
            )
            assert weights[j, i] == pytest.approx(projected.area / 1e6, rel=1e-4, abs=1e-6)
    # the whole community against pyproj's geodesic area of the densified polygon
    geodesic, _ = pyproj.Geod(ellps="WGS84").geometry_area_perimeter(shapely.segmentize(poly, 0.001))
    assert w.area_km2[0] == pytest.approx(abs(geodesic) / 1e6, rel=1e-6)
    assert weights.sum() == pytest.approx(w.area_km2[0], rel=1e-12)


def test_features_in_a_projected_request_crs_land_on_a_lonlat_grid() -> None:
    grid = lonlat_grid(-121.0, -26.0, 0.25, 8, 8)
    to_lambert = pyproj.Transformer.from_crs(WGS84, LAMBERT_CRS, always_xy=True)
    lonlat = np.array([[-120.6, -25.6], [-119.5, -25.6], [-119.5, -24.4], [-120.6, -24.4], [-120.6, -25.6]])
    xy = np.column_stack(to_lambert.transform(lonlat[:, 0], lonlat[:, 1]))
    in_lambert = compute_weights(
        parse_features(collection(polygon([xy.tolist()])), crs=LAMBERT_CRS.to_wkt()), grid, cache_size=0
    )
    # The Lambert edges are straight on the Lambert plane, where parallels are arcs: a 110 km edge along
    # 25.6 S bows about 0.1 km off the parallel. The same outline drawn in lon/lat with its edges split every
    # 100 m on the Lambert plane is (to millimetres) the same polygon, so the weights must agree closely.
    to_lonlat = pyproj.Transformer.from_crs(LAMBERT_CRS, WGS84, always_xy=True)
    dense_xy = shapely.get_coordinates(shapely.segmentize(shapely.Polygon(xy), 100.0))
    traced = np.column_stack(to_lonlat.transform(dense_xy[:, 0], dense_xy[:, 1]))
    in_lonlat = weights_of(collection(polygon([traced.tolist()])), grid)
    np.testing.assert_allclose(in_lambert.matrix.toarray(), in_lonlat.matrix.toarray(), rtol=1e-5, atol=1e-4)
    assert in_lambert.area_km2[0] == pytest.approx(in_lonlat.area_km2[0], rel=1e-6)
    # Left whole (four corners only), the Lambert edges would be drawn straight in lon/lat: a different
    # polygon by about 1 % in the edge cells, which is what densifying before reprojection prevents.
    corners_only = weights_of(collection(polygon([lonlat.tolist()])), grid)
    assert np.abs(corners_only.matrix.toarray() - in_lambert.matrix.toarray()).max() > 1.0


def test_ids_from_feature_id_or_a_named_property_are_strings() -> None:
    fc = {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "id": 7, "geometry": polygon(box(0, 0, 1, 1)), "properties": {"code": "v-1"}},
            {"type": "Feature", "id": "b", "geometry": polygon(box(1, 0, 2, 1)), "properties": {"code": 12}},
        ],
    }
    assert parse_features(fc).ids == ["7", "b"]
    assert parse_features(fc, id_property="code").ids == ["v-1", "12"]


def test_a_single_feature_is_accepted() -> None:
    feature = {"type": "Feature", "id": "one", "geometry": polygon(box(0, 0, 1, 1)), "properties": None}
    parsed = parse_features(feature)
    assert parsed.ids == ["one"]
    assert parsed.features[0].pointer == "/features"


def test_weights_are_cached_by_geometry_grid_and_weighting() -> None:
    WEIGHTS_CACHE.clear()
    grid = lambert_grid(nx=2, ny=2)
    fc = parse_features(collection(polygon(box(0, 0, 15_000, 10_000))), crs=LAMBERT_CRS.to_wkt())
    first = compute_weights(fc, grid, cache_size=4)
    assert compute_weights(fc, grid, cache_size=4) is first
    centers = compute_weights(fc, grid, weighting="centers", cache_size=4)
    assert centers.key != first.key
    other = parse_features(collection(polygon(box(0, 0, 16_000, 10_000))), crs=LAMBERT_CRS.to_wkt())
    assert compute_weights(other, grid, cache_size=4).key != first.key
    assert len(WEIGHTS_CACHE) == 3
    compute_weights(fc, grid, cache_size=1)
    assert len(WEIGHTS_CACHE) == 1


def test_repair_makes_a_bow_tie_valid_and_reports_it() -> None:
    bow_tie = polygon([[[0, 0], [1, 1], [1, 0], [0, 1], [0, 0]]])
    parsed = parse_features(collection(bow_tie), repair=True)
    assert parsed.repaired == ["c0"]
    assert parsed.features[0].footprint.is_valid
    assert parsed.features[0].footprint.area == pytest.approx(0.5)


# --- bad geometry ---------------------------------------------------------------------------------------------


def feature(geometry: Any, properties: dict | None = None, fid: Any = "v-17") -> dict[str, Any]:
    return {"type": "Feature", "id": fid, "geometry": geometry, "properties": properties or {}}


@pytest.mark.parametrize(
    ("geom", "properties", "message"),
    [
        (
            polygon([[[0, 0], [1, 1], [1, 0], [0, 1], [0, 0]]]),
            None,
            r"'v-17': polygon is invalid: Self-intersection",
        ),
        (
            polygon([[[0, 0], [1, 0], [0, 0]]]),
            None,
            r"'v-17': polygon outer ring has 3 positions; .*at least 4",
        ),
        (
            polygon([[[12.1, 4.3], [13, 4.3], [13, 5], [12.2, 4.3]]]),
            None,
            r"'v-17': polygon outer ring is not closed \(first point \(12.1, 4.3\), last \(12.2, 4.3\)\); close",
        ),
        (polygon([]), None, r"'v-17': polygon is empty"),
        ({"type": "MultiPolygon", "coordinates": []}, None, r"'v-17': multipolygon is empty"),
        (polygon([[[0, 0], [1, 0], [1, float("nan")], [0, 0]]]), None, r"NaN or infinite"),
        (polygon([[[0, 0], [1, 0], [1, float("inf")], [0, 0]]]), None, r"NaN or infinite"),
        (
            polygon([[[100, 95], [101, 95], [101, 96], [100, 95]]]),
            None,
            r"latitude 95.0 is beyond \+-90 degrees$",
        ),
        (
            polygon([[[10, 95], [11, 95], [11, 96], [10, 95]]]),
            None,
            r"beyond \+-90 degrees; the coordinates look swapped",
        ),
        (polygon([[[0, 0], ["a", 0], [1, 1], [0, 0]]]), None, r"position 1 \[.a., 0\]: .a. is text"),
        (
            polygon([[[0, 0], [1, 0], [1, 1], [0, 1], [0, 0]], [[5, 5], [6, 5], [5, 5]]]),
            None,
            r"ring 1 has 3",
        ),
        (
            {"type": "Point", "coordinates": [0.5, 0.5]},
            None,
            r"Point without a buffer radius; give properties.buffer_m",
        ),
        (
            {"type": "Point", "coordinates": [0.5, 0.5]},
            {"buffer_m": -5},
            r"buffer_m -5 must be a positive radius",
        ),
        (
            {"type": "Point", "coordinates": [0.5, 0.5]},
            {"buffer_m": 0},
            r"buffer_m 0 must be a positive radius",
        ),
        ({"type": "Point", "coordinates": [0.5, 0.5]}, {"buffer_m": 5e6}, r"more than 100000 m"),
        (
            {"type": "Point", "coordinates": [0.5, 0.5]},
            {"buffer_m": "2 km"},
            r"'2 km' is not a number of metres",
        ),
        (
            {"type": "LineString", "coordinates": [[0, 0], [1, 1]]},
            None,
            r"type 'LineString' is not supported",
        ),
        (None, None, r"'v-17': has no geometry"),
    ],
)
def test_bad_geometry_names_the_feature_and_the_reason(geom: Any, properties: Any, message: str) -> None:
    with pytest.raises(FeatureError, match=message) as caught:
        parse_features({"type": "FeatureCollection", "features": [feature(geom, properties)]})
    assert caught.value.feature_id == "v-17"
    assert caught.value.pointer.startswith("/features/features/0")


def test_duplicate_ids_are_refused() -> None:
    fc = {
        "type": "FeatureCollection",
        "features": [feature(polygon(box(0, 0, 1, 1))), feature(polygon(box(1, 0, 2, 1)))],
    }
    with pytest.raises(
        FeatureError, match=r"id 'v-17' is also the id of the feature at /features/features/0"
    ) as e:
        parse_features(fc)
    assert e.value.pointer == "/features/features/1"


@pytest.mark.parametrize(
    ("item", "id_property", "message"),
    [
        (feature(polygon(box(0, 0, 1, 1)), fid=None), None, r"has no id; give every Feature an 'id'"),
        (feature(polygon(box(0, 0, 1, 1)), fid=True), None, r"id True is not a string or number"),
        (feature(polygon(box(0, 0, 1, 1))), "code", r"has no property 'code' \(named by id_property\)"),
        ({"type": "Polygon", "coordinates": box(0, 0, 1, 1)}, None, r"is 'Polygon', not a GeoJSON Feature"),
    ],
)
def test_missing_or_unusable_ids(item: dict, id_property: str | None, message: str) -> None:
    with pytest.raises(FeatureError, match=message):
        parse_features({"type": "FeatureCollection", "features": [item]}, id_property=id_property)


def test_every_invalid_feature_is_listed() -> None:
    fc = {
        "type": "FeatureCollection",
        "features": [
            feature(polygon([[[0, 0], [1, 0], [0, 0]]]), fid="a"),
            feature(polygon(box(0, 0, 1, 1)), fid="ok"),
            feature({"type": "Point", "coordinates": [0, 0]}, fid="b"),
        ],
    }
    with pytest.raises(FeatureError, match=r"'a'.*and 1 more invalid feature") as caught:
        parse_features(fc)
    listed = caught.value.problem()["errors"]
    assert [e["feature_id"] for e in listed] == ["a", "b"]
    assert listed[1]["pointer"] == "/features/features/2/properties/buffer_m"


def test_too_many_vertices_names_the_limit() -> None:
    ring = [[math.cos(a), math.sin(a)] for a in np.linspace(0, 2 * math.pi, 50)[:-1]]
    ring.append(ring[0])
    with pytest.raises(LimitExceededError, match="'v-17': more than 20 vertices") as caught:
        parse_features({"type": "FeatureCollection", "features": [feature(polygon([ring]))]}, max_vertices=20)
    assert caught.value.limit == "max_vertices_per_feature"


def test_too_many_cells_names_the_limit() -> None:
    grid = lonlat_grid(0.0, 0.0, 0.1, 20, 20)
    with pytest.raises(
        LimitExceededError, match=r"'c0': it touches 100 grid cells, more than the 50"
    ) as caught:
        weights_of(collection(polygon(box(0, 0, 1, 1))), grid, max_cells=50)
    assert caught.value.limit == "max_cells_per_feature"
    assert caught.value.problem()["allowed"] == 50


def test_feature_outside_the_grid_is_a_feature_without_data() -> None:
    grid = lonlat_grid(0.0, 0.0, 1.0, 2, 2)
    with pytest.raises(
        FeatureWithoutDataError, match=r"'c0' lies outside the grid \(grid spans x 0 to 2"
    ) as e:
        weights_of(collection(polygon(box(50, 50, 51, 51))), grid)
    assert e.value.feature_id == "c0"


def test_swapped_coordinates_are_named() -> None:
    grid = lonlat_grid(30.0, 5.0, 0.5, 4, 4)  # lon 30-32, lat 5-7
    with pytest.raises(FeatureError, match="coordinates look swapped") as caught:
        weights_of(collection(polygon(box(5.2, 30.2, 5.8, 30.8))), grid)
    assert not isinstance(caught.value, FeatureWithoutDataError)


def test_feature_only_on_cells_without_data() -> None:
    grid = lonlat_grid(0.0, 0.0, 1.0, 2, 1)
    with pytest.raises(FeatureWithoutDataError, match=r"none of the 1 cells it overlaps has data"):
        weights_of(collection(polygon(box(0.2, 0.2, 0.8, 0.8))), grid, data_mask=np.array([[False, True]]))


def test_unknown_crs_and_weighting_are_request_errors() -> None:
    with pytest.raises(RequestError, match="crs 'EPSG:99999999' is not"):
        parse_features(collection(polygon(box(0, 0, 1, 1))), crs="EPSG:99999999")
    with pytest.raises(RequestError, match="weighting 'volume' is not known"):
        weights_of(collection(polygon(box(0, 0, 1, 1))), lonlat_grid(0, 0, 1, 1, 1), weighting="volume")


def test_longitudes_wrap_onto_a_0_to_360_grid() -> None:
    grid = lonlat_grid(180.0, 0.0, 1.0, 4, 1)  # longitudes 180-184 east, i.e. -180 to -176
    area = cell_areas_km2(grid)[0, 0]
    w = weights_of(collection(polygon(box(-179.5, 0.0, -178.0, 1.0))), grid)
    np.testing.assert_allclose(dense(w, grid)[0], [[area / 2, area, 0.0, 0.0]], rtol=1e-12)


# --- against a brute-force overlay ----------------------------------------------------------------------------


def _star(rng: np.random.Generator, cx: float, cy: float, radius: float, n: int) -> shapely.Polygon:
    """A random star-shaped (often concave) polygon around (cx, cy)."""
    angle = np.sort(rng.uniform(0, 2 * np.pi, n))
    r = radius * rng.uniform(0.2, 1.0, n)
    return shapely.Polygon(np.column_stack([cx + r * np.cos(angle), cy + r * np.sin(angle)]))


def test_weights_match_a_brute_force_overlay_with_every_cell() -> None:
    # Concave stars, a star with a hole, a box on cell edges, a long thin diagonal and a notch one cell
    # wide and a sliver thin: every cell's weight equals GEOS's intersection area with that cell's box
    # (on the grid's plane, scaled to the ground), whether the boundary touches the cell or not.
    rng = np.random.default_rng(11)
    grid = lambert_grid(nx=12, ny=9, size=1_000.0)
    shapes = [_star(rng, 6_000, 4_500, 4_000, 40) for _ in range(3)]
    wavy = np.linspace(0, 2 * np.pi, 90, endpoint=False)
    ring = np.column_stack(
        [
            6_000 + (3_500 + 600 * np.sin(5 * wavy)) * np.cos(wavy),
            4_500 + (3_500 + 600 * np.sin(5 * wavy)) * np.sin(wavy),
        ]
    )
    shapes.append(shapely.Polygon(ring, [shapely.box(5_000, 4_000, 6_500, 5_000).exterior.coords]))  # a hole
    shapes.append(shapely.box(2_000, 1_000, 9_000, 7_000))  # every vertex on a cell corner
    shapes.append(shapely.Polygon([(100, 100), (11_900, 8_700), (11_800, 8_850), (0, 300)]))
    notch = shapely.box(500, 500, 11_500, 8_500).difference(shapely.box(5_999.9, 0, 6_000.1, 8_000))
    shapes.append(notch)
    fc = collection(*(shapely.geometry.mapping(s) for s in shapes))
    w = compute_weights(parse_features(fc, crs=LAMBERT_CRS.to_wkt()), grid, cache_size=0)
    got = dense(w, grid)
    xe, ye = grid.x_edges, grid.y_edges
    cells = cell_areas_km2(grid)
    for f, shape in enumerate(shapes):
        for j in range(grid.shape[0]):
            for i in range(grid.shape[1]):
                box_ = shapely.box(xe[i], ye[j + 1], xe[i + 1], ye[j])
                share = shape.intersection(box_).area / box_.area
                assert got[f, j, i] == pytest.approx(share * cells[j, i], rel=1e-6, abs=1e-9), (f, j, i)


@pytest.mark.parametrize("weighting", ["area", "centers"])
def test_passes_of_candidates_do_not_change_the_weights(
    monkeypatch: pytest.MonkeyPatch, weighting: str
) -> None:
    """Weights computed in many small passes (a few candidate cells each, as a large job's are) equal those
    of one pass, bit for bit: each candidate is computed alone and the passes keep the features' order."""
    from service.geometry import weights as weights_module

    grid = lonlat_grid(0.0, 0.0, 0.1, 12, 10)
    rng = np.random.default_rng(3)
    shapes = []
    for _ in range(40):
        x, y = rng.uniform(0.05, 1.1), rng.uniform(0.05, 0.9)
        w, h = rng.uniform(0.02, 0.35), rng.uniform(0.02, 0.3)
        shapes.append(polygon(box(x, y, min(x + w, 1.19), min(y + h, 0.99))))
    fc = collection(*shapes, {"type": "Point", "coordinates": [0.63, 0.41]})
    fc["features"][-1]["properties"] = {"buffer_m": 4_000.0}
    # 'skip': under 'centers' the smallest boxes hold no cell centre; they must be skipped alike in both
    one_pass = weights_of(fc, grid, weighting=weighting, invalid="skip")
    monkeypatch.setattr(weights_module, "CANDIDATES_PER_PASS", 7)
    many = weights_of(fc, grid, weighting=weighting, invalid="skip")
    assert [e[1] if isinstance(e, tuple) else e for e in one_pass.skipped] == [
        e[1] if isinstance(e, tuple) else e for e in many.skipped
    ]
    assert (one_pass.matrix != many.matrix).nnz == 0 and one_pass.matrix.nnz > 30
    for name in ("coverage", "n_cells", "area_km2", "latitude", "longitude"):
        assert np.array_equal(getattr(one_pass, name), getattr(many, name)), name


@pytest.mark.parametrize("projected", [False, True])
@pytest.mark.parametrize("multipart", [False, True])
def test_blocks_and_unshared_parts_do_not_change_the_weights(
    monkeypatch: pytest.MonkeyPatch, projected: bool, multipart: bool
) -> None:
    """Buffer circles and reprojections made a few geometries at a time (as a large job's are), and single
    polygons taken as their own parts, give the weights of whole-array steps and shapely.get_parts' copies,
    bit for bit."""
    from service.geometry import planes
    from service.geometry import weights as weights_module

    rng = np.random.default_rng(5)
    if (
        projected
    ):  # metres of the test Lambert CRS: its plane's areas and the circles' way back both reproject
        grid, crs, scale, radius = (
            lambert_grid(nx=12, ny=9, size=1_000.0),
            LAMBERT_CRS.to_wkt(),
            10_000.0,
            900.0,
        )
    else:
        grid, crs, scale, radius = lonlat_grid(0.0, 0.0, 0.1, 12, 10), None, 1.0, 4_000.0
    shapes: list[dict[str, Any]] = []
    for _ in range(12):
        x, y = rng.uniform(0.05, 0.9) * scale, rng.uniform(0.05, 0.7) * scale
        shapes.append(
            polygon(box(x, y, x + rng.uniform(0.02, 0.2) * scale, y + rng.uniform(0.02, 0.2) * scale))
        )
    for _ in range(9):
        shapes.append(
            {"type": "Point", "coordinates": [rng.uniform(0.1, 1.0) * scale, rng.uniform(0.1, 0.8) * scale]}
        )
    if multipart:
        a, b = box(0.1 * scale, 0.1 * scale, 0.2 * scale, 0.2 * scale), box(0.6, 0.5, 0.7, 0.65)
        shapes.append({"type": "MultiPolygon", "coordinates": [a, [[[v * scale for v in p] for p in b[0]]]]})
    props = [{"buffer_m": radius} if s["type"] == "Point" else {} for s in shapes]
    fc = collection(*shapes, properties=props)

    def weights() -> geometry.Weights:
        parsed = parse_features(fc, **({"crs": crs} if crs else {}))
        return compute_weights(parsed, grid, cache_size=0)

    monkeypatch.setattr(planes, "BUFFER_BLOCK", 4)
    blocked = weights()
    monkeypatch.setattr(planes, "BUFFER_BLOCK", 10**9)
    monkeypatch.setattr(weights_module, "_parts", lambda g: shapely.get_parts(g, return_index=True))
    whole = weights()
    assert (blocked.matrix != whole.matrix).nnz == 0 and blocked.matrix.nnz > 30
    for name in ("coverage", "n_cells", "area_km2", "latitude", "longitude"):
        assert np.array_equal(getattr(blocked, name), getattr(whole, name)), name
