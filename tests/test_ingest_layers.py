"""Weight layers from rasters: conservative remapping onto a store's grid, held against a brute-force reference.

The reference intersects every grid cell with every raster cell, both carried with densely sampled edges into one
Lambert azimuthal equal-area plane around the grid (area-true on the ellipsoid), with no index and no separable
shortcut: its overlaps are ground areas up to the sampling of the edges.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyproj
import pytest
import rasterio
import shapely
from rasterio.transform import from_origin

from service.errors import IngestError
from service.ingest.layers import ground_areas, remap_layer
from service.ingest.readers import open_raster
from service.store.grids import Grid

WGS84 = pyproj.CRS.from_epsg(4326)
# An equal-area world projection for rasters (Mollweide): a raster cell's plane area is its ground area
MOLLWEIDE = pyproj.CRS.from_proj4("+proj=moll +lon_0=-140 +datum=WGS84 +units=m +no_defs")
LAMBERT = pyproj.CRS.from_proj4(
    "+proj=lcc +lat_1=-20 +lat_2=-30 +lat_0=-25 +lon_0=-120 +datum=WGS84 +units=m"
)


def write_geotiff(path: Path, values: np.ndarray, crs: pyproj.CRS, west: float, north: float, size: float,
                  nodata: float | None = -1.0) -> Path:  # fmt: skip
    """A one-band float32 GeoTIFF, north-up, cells of ``size`` CRS units from the (west, north) corner."""
    data = np.where(np.isnan(values), nodata if nodata is not None else np.nan, values).astype(np.float32)
    with rasterio.open(path, "w", driver="GTiff", height=data.shape[0], width=data.shape[1], count=1,
                       dtype="float32", crs=crs.to_wkt(), transform=from_origin(west, north, size, size),
                       nodata=nodata) as dst:  # fmt: skip
        dst.write(data, 1)
    return path


def geographic_grid(west: float, south: float, size: float, ny: int, nx: int) -> Grid:
    x = west + size * (np.arange(nx) + 0.5)
    y = (south + size * (np.arange(ny) + 0.5))[::-1]  # north-up
    return Grid(crs_wkt=WGS84.to_wkt(), x=x, y=y, is_geographic=True)


@dataclass
class Reference:
    count: np.ndarray  # (ny, nx) counts landed in each grid cell
    area: np.ndarray  # km2 of data under each grid cell
    share_area: np.ndarray  # sum of area x share


def _cell_polygons(xe: np.ndarray, ye: np.ndarray, source: pyproj.CRS, plane: pyproj.CRS) -> np.ndarray:
    """Every cell between edges as a shapely polygon in ``plane``, edges densified (32 points a side)."""
    t = np.linspace(0.0, 1.0, 33)[:-1]
    polygons = []
    to_plane = pyproj.Transformer.from_crs(source, plane, always_xy=True)
    for j in range(ye.size - 1):
        for i in range(xe.size - 1):
            x0, x1, y0, y1 = xe[i], xe[i + 1], ye[j], ye[j + 1]
            xs = np.concatenate([x0 + (x1 - x0) * t, np.full(32, x1), x1 - (x1 - x0) * t, np.full(32, x0)])
            ys = np.concatenate([np.full(32, y0), y0 + (y1 - y0) * t, np.full(32, y1), y1 - (y1 - y0) * t])
            px, py = to_plane.transform(xs, ys)
            polygons.append(shapely.Polygon(np.c_[px, py]).normalize())
    return np.array(polygons)


def brute_force(values: np.ndarray, raster_crs: pyproj.CRS, west: float, north: float, size: float,
                grid: Grid) -> Reference:  # fmt: skip
    """Every pair of grid cell and raster cell intersected in one equal-area plane (a Lambert azimuthal
    equal-area frame around the grid), without any index or shortcut: the overlap areas are ground areas."""
    centre = pyproj.Transformer.from_crs(grid.crs(), WGS84, always_xy=True).transform(
        grid.x.mean(), grid.y.mean()
    )
    plane = pyproj.CRS.from_proj4(f"+proj=laea +lat_0={centre[1]} +lon_0={centre[0]} +datum=WGS84 +units=m")
    ny_s, nx_s = values.shape
    raster_cells = _cell_polygons(west + size * np.arange(nx_s + 1), north - size * np.arange(ny_s + 1),
                                  raster_crs, plane)  # fmt: skip
    grid_cells = _cell_polygons(grid.x_edges, grid.y_edges, grid.crs(), plane)
    overlap = shapely.area(shapely.intersection(grid_cells[:, None], raster_cells[None, :])) / 1e6  # km2
    raster_area = shapely.area(raster_cells) / 1e6
    flat = values.ravel()
    valid = np.isfinite(flat)
    count = overlap[:, valid] @ (flat[valid] / raster_area[valid])
    area = overlap[:, valid].sum(axis=1)
    share_area = overlap[:, valid] @ flat[valid]
    return Reference(*(v.reshape(grid.shape) for v in (count, area, share_area)))


def test_ground_areas_of_latitude_longitude_cells() -> None:
    # CHECK-VALUES.md, "Cell areas" [recomputed from the ellipsoid's zone formula]: a 1 x 1 degree cell from the
    # equator to 1 N is 12,308.46 km2 on WGS84; 44-45 N 8,837.37 km2; 59-60 N 6,309.81 km2
    for south, want in ((0.0, 12_308.46), (44.0, 8_837.37), (59.0, 6_309.81)):
        assert ground_areas(geographic_grid(10.0, south, 1.0, 1, 1))[0, 0] == pytest.approx(want, abs=0.01)


def test_ground_areas_of_projected_cells_against_geodesic_polygons() -> None:
    x = -200_000.0 + 50_000.0 * (np.arange(4) + 0.5)
    y = (100_000.0 + 50_000.0 * (np.arange(3) + 0.5))[::-1]
    grid = Grid(crs_wkt=LAMBERT.to_wkt(), x=x, y=y, is_geographic=False)
    got = ground_areas(grid)
    geod = pyproj.Geod(ellps="WGS84")
    to_lonlat = pyproj.Transformer.from_crs(LAMBERT, WGS84, always_xy=True)
    for j in range(3):
        for i in range(4):
            x0, x1 = grid.x_edges[i], grid.x_edges[i + 1]
            y0, y1 = grid.y_edges[j + 1], grid.y_edges[j]
            t = np.linspace(0, 1, 65)[:-1]
            xs = np.concatenate([x0 + (x1 - x0) * t, np.full(64, x1), x1 - (x1 - x0) * t, np.full(64, x0)])
            ys = np.concatenate([np.full(64, y0), y0 + (y1 - y0) * t, np.full(64, y1), y1 - (y1 - y0) * t])
            lon, lat = to_lonlat.transform(xs, ys)
            area, _ = geod.polygon_area_perimeter(lon, lat)  # geodesic edges, densely sampled
            assert got[j, i] == pytest.approx(abs(area) / 1e6, rel=1e-5)


def test_aligned_counts_add_up_exactly(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    values = rng.gamma(2.0, 50.0, (20, 30)).round(1)  # 0.1-degree counts over 2 x 3 degrees
    path = write_geotiff(tmp_path / "people.tif", values, WGS84, -150.0, -38.0, 0.1)
    grid = geographic_grid(-150.0, -40.0, 0.5, 4, 6)
    result = remap_layer(open_raster(path), grid, "count")
    counts = result.values * ground_areas(grid)
    stored = values.astype(np.float32).astype(np.float64)  # as the GeoTIFF holds them
    want = stored.reshape(4, 5, 6, 5).sum(axis=(1, 3))
    np.testing.assert_allclose(counts, want, rtol=1e-9)
    assert result.total == pytest.approx(stored.sum(), rel=1e-9)
    assert (result.cells_partly_outside, result.cells_without_data) == (0, 0)


def test_unaligned_counts_and_shares_match_the_brute_force_reference(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    values = rng.gamma(2.0, 50.0, (30, 40))
    west, north, size = -150.23, -37.87, 0.07
    path = write_geotiff(tmp_path / "people.tif", values, WGS84, west, north, size)
    grid = geographic_grid(-150.0, -39.5, 0.4, 4, 6)  # inside the raster, edges not on raster edges
    reference = brute_force(values, WGS84, west, north, size, grid)
    counts = remap_layer(open_raster(path), grid, "count").values * ground_areas(grid)
    np.testing.assert_allclose(counts, reference.count, rtol=1e-4)
    shares = remap_layer(open_raster(path), grid, "share").values
    np.testing.assert_allclose(shares, reference.share_area / reference.area, rtol=1e-4)


def test_a_raster_in_another_crs(tmp_path: Path) -> None:
    rng = np.random.default_rng(2)
    values = rng.gamma(2.0, 30.0, (40, 40))
    west, north, size = -14_500_000.0, -4_100_000.0, 5_000.0  # 5-km Mollweide cells over the test region
    to_moll = pyproj.Transformer.from_crs(WGS84, MOLLWEIDE, always_xy=True)
    gx, gy = to_moll.transform(-142.0, -38.0)
    west, north = gx - 100_000.0, gy + 100_000.0
    path = write_geotiff(tmp_path / "moll.tif", values, MOLLWEIDE, west, north, size)
    lon0, lat0 = pyproj.Transformer.from_crs(MOLLWEIDE, WGS84, always_xy=True).transform(
        west + 30_000, north - 170_000
    )
    grid = geographic_grid(round(lon0, 1), round(lat0, 1), 0.25, 4, 5)
    reference = brute_force(values, MOLLWEIDE, west, north, size, grid)
    result = remap_layer(open_raster(path), grid, "count")
    assert result.cells_partly_outside == 0
    np.testing.assert_allclose(result.values * ground_areas(grid), reference.count, rtol=1e-3)
    shares = remap_layer(open_raster(path), grid, "share").values
    np.testing.assert_allclose(shares, reference.share_area / reference.area, rtol=1e-3)


def test_a_projected_grid_over_a_latitude_longitude_raster(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    values = rng.gamma(2.0, 30.0, (40, 50))
    west, north, size = -121.0, -25.3, 0.05
    path = write_geotiff(tmp_path / "ll.tif", values, WGS84, west, north, size)
    x = -60_000.0 + 25_000.0 * (np.arange(4) + 0.5)
    y = (-150_000.0 + 25_000.0 * (np.arange(3) + 0.5))[::-1]
    grid = Grid(crs_wkt=LAMBERT.to_wkt(), x=x, y=y, is_geographic=False)
    reference = brute_force(values, WGS84, west, north, size, grid)
    result = remap_layer(open_raster(path), grid, "count")
    np.testing.assert_allclose(result.values * ground_areas(grid), reference.count, rtol=1e-3)
    shares = remap_layer(open_raster(path), grid, "share").values
    np.testing.assert_allclose(shares, reference.share_area / reference.area, rtol=1e-3)


def test_cells_the_raster_covers_in_part_and_no_data(tmp_path: Path) -> None:
    values = np.full((10, 10), 4.0)
    values[:, :3] = np.nan  # -150 .. -149.7 has no data (e.g. water)
    path = write_geotiff(tmp_path / "half.tif", values, WGS84, -150.0, -39.0, 0.1)  # -150 .. -149, -40 .. -39
    grid = geographic_grid(-150.0, -40.0, 0.4, 2, 4)  # columns from -150, -149.6, -149.2, -148.8
    counts = remap_layer(open_raster(path), grid, "count")
    shares = remap_layer(open_raster(path), grid, "share")
    area = ground_areas(grid)
    # column 0: a quarter of it has data; the rest is no-data, which holds no people
    np.testing.assert_allclose(counts.values[:, 0] * area[:, 0], 4.0 * 4.0)
    np.testing.assert_allclose(shares.values[:, 0], 4.0)  # the mean where there are data
    np.testing.assert_allclose(counts.values[:, 1] * area[:, 1], 4.0 * 16.0)
    # column 2 lies half outside the raster: a count there would be too low, so it is unknown; a share is not
    assert np.isnan(counts.values[:, 2]).all() and counts.cells_partly_outside == 2
    np.testing.assert_allclose(shares.values[:, 2], 4.0)
    assert np.isnan(counts.values[:, 3]).all() and np.isnan(shares.values[:, 3]).all()  # wholly outside
    assert counts.total == pytest.approx(2 * (16.0 + 64.0), rel=1e-9)


def test_a_grid_written_in_0_to_360_over_a_raster_in_minus_180_to_180(tmp_path: Path) -> None:
    values = np.arange(1.0, 41.0).reshape(4, 10)  # 1-degree counts from 175 E to 175 W
    east = write_geotiff(tmp_path / "e.tif", values[:, :5], WGS84, 175.0, 2.0, 1.0)
    west = write_geotiff(tmp_path / "w.tif", values[:, 5:], WGS84, -180.0, 2.0, 1.0)
    grid = Grid(crs_wkt=WGS84.to_wkt(), x=np.array([176.0, 178.0, 180.0, 182.0, 184.0]) + 0.0,
                y=np.array([1.0, -1.0]), is_geographic=True)  # fmt: skip
    got = remap_layer(open_raster(east), grid, "count").values * ground_areas(grid)
    got_w = remap_layer(open_raster(west), grid, "count").values * ground_areas(grid)
    # cells 175-177 and 177-179 from the eastern raster; 181-183, 183-185 (= -179 .. -175) from the western
    np.testing.assert_allclose(
        got[:, :2], values.reshape(2, 2, 10).sum(axis=1)[:, 0:4].reshape(2, 2, 2).sum(-1)
    )
    np.testing.assert_allclose(
        got_w[:, 3:], values.reshape(2, 2, 10).sum(axis=1)[:, 6:10].reshape(2, 2, 2).sum(-1)
    )


def test_layer_kind_must_be_said() -> None:
    with pytest.raises(IngestError, match=r"layer kind 'people' is not one of \['count', 'share'\]"):
        remap_layer(None, geographic_grid(0, 0, 1, 1, 1), "people")  # type: ignore[arg-type]


def test_raster_reading_refusals(tmp_path: Path) -> None:
    with pytest.raises(IngestError, match=r"raster '.*nothere.tif' does not exist"):
        open_raster(tmp_path / "nothere.tif")
    (tmp_path / "junk.tif").write_text("no raster")
    with pytest.raises(IngestError, match=r"raster '.*junk.tif' cannot be read"):
        open_raster(tmp_path / "junk.tif")
    with rasterio.open(tmp_path / "two.tif", "w", driver="GTiff", height=2, width=2, count=2, dtype="float32",
                       crs="EPSG:4326", transform=from_origin(0, 2, 1, 1)) as dst:  # fmt: skip
        dst.write(np.ones((2, 2, 2), dtype=np.float32))
    with pytest.raises(IngestError, match=r"has 2 bands; a weight layer is one band"):
        open_raster(tmp_path / "two.tif")
    with rasterio.open(tmp_path / "nocrs.tif", "w", driver="GTiff", height=2, width=2, count=1, dtype="float32",
                       transform=from_origin(0, 2, 1, 1)) as dst:  # fmt: skip
        dst.write(np.ones((1, 2, 2), dtype=np.float32))
    with pytest.raises(IngestError, match=r"has no CRS"):
        open_raster(tmp_path / "nocrs.tif")


# --- into a store ---------------------------------------------------------------------------------------------------


def test_a_layer_on_every_grid_of_a_store(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from service.cli import main as wxshock
    from service.ingest import ingest_files
    from service.store import open_store, verify_store
    from tests._support_products import precipitation_only_product, temperature_product

    rain = precipitation_only_product(tmp_path / "rain", (2001,), origin=(-150.0, -40.0), ny=8)  # 0.05 degree
    heat = temperature_product(tmp_path / "heat", (2001,), origin=(-150.0, -40.0))  # 0.2 degree
    store_path = tmp_path / "S.zarr"
    ingest_files(rain.files + heat.files, store_path, progress=False)
    # people on a 0.01-degree raster over the whole region, all of them in its western half
    people = np.zeros((40, 40))
    people[:, :20] = 5.0
    raster = write_geotiff(tmp_path / "people.tif", people, WGS84, -150.0, -39.6, 0.01)
    before = open_store(store_path).fingerprint
    assert wxshock(["layer", str(store_path), "population", str(raster), "--kind", "count", "--quiet"]) == 0
    captured = capsys.readouterr()
    assert "layer 'population' on grid 'grid': count, 4,000 in all" in captured.err
    assert "fingerprint sha256:" in captured.out
    store = open_store(store_path)
    assert store.fingerprint != before and verify_store(store_path).ok  # the layer is part of the fingerprint
    for grid in store.grids:
        counts = store.read_layer("population", grid) * ground_areas(store.grids[grid])
        assert np.nansum(counts) == pytest.approx(4000.0, rel=1e-6)
        assert np.all(counts[:, counts.shape[1] // 2 :] == 0)  # nobody in the eastern half
    with pytest.raises(SystemExit):  # argparse refuses the kind and exits 2
        wxshock(["layer", str(store_path), "population", str(raster), "--kind", "people", "--quiet"])
    assert "invalid choice: 'people'" in capsys.readouterr().err
    far = write_geotiff(tmp_path / "far.tif", people, WGS84, 10.0, 50.0, 0.01)
    assert wxshock(["layer", str(store_path), "farms", str(far), "--kind", "share", "--quiet"]) == 2
    assert "does not cover any cell of store" in capsys.readouterr().err


def test_a_layer_weights_a_request(tmp_path: Path) -> None:
    # The layer as the request's weighting: a community over a whole region whose people all live in its western
    # column takes the western cells' values only.
    from service.ingest import ingest_files
    from service.ingest.layers import add_layer
    from service.pipeline import run_series
    from service.schemas import SeriesRequest
    from service.settings import Settings
    from service.store import open_store
    from tests._support_products import temperature_product

    heat = temperature_product(tmp_path / "heat", (2001,), origin=(-150.0, -40.0), with_precipitation=True)
    store_path = tmp_path / "T.zarr"
    ingest_files(heat.files, store_path, progress=False)
    people = np.zeros((40, 40))
    people[:, :20] = 5.0
    report = add_layer(str(store_path), "population", write_geotiff(tmp_path / "p.tif", people, WGS84, -150.0, -39.6,
                                                                    0.01), "count")  # fmt: skip
    assert report.grids["grid"].total == pytest.approx(4000.0, rel=1e-6)
    ring = [[-150.0, -40.0], [-149.6, -40.0], [-149.6, -39.6], [-150.0, -39.6], [-150.0, -40.0]]
    feature = {
        "type": "Feature",
        "id": "all",
        "properties": {},
        "geometry": {"type": "Polygon", "coordinates": [ring]},
    }
    request = SeriesRequest(features=feature, variables=["tmax"], weighting={"layer": "population"})
    frame = run_series(request, open_store(store_path), Settings(data_dir=str(tmp_path))).frame
    # the western column's two cells, weighted by their people (their areas differ by cos(latitude))
    area = ground_areas(open_store(store_path).grids["grid"])[::-1, 0]  # the file's rows run south to north
    west = (heat.values["tmax"][:, :, 0] * area).sum(axis=1) / area.sum()
    assert np.max(np.abs(frame["tmax"].to_numpy() - west)) < 0.06
