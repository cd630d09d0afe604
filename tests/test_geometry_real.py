"""Tests of service.geometry on real boundaries: the Natural Earth low-resolution countries (1:110m).

The shapes are real, so they carry what invented ones rarely do: holes (South Africa around Lesotho), many
parts (Indonesia, Canada), and shapes cut at the 180th meridian into parts on both sides (Fiji, Russia), or
running along it to the South Pole (Antarctica). The file is the copy the installed pyogrio package ships
among its test fixtures (real names appear here, in tests only). Areas are checked against pyproj.Geod (WGS84)
on each outline with its edges split every 0.01 degrees, so that the geodesic edges follow the lon/lat lines
GeoJSON means.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import pytest
import shapely

from service.geometry import cell_areas_km2, compute_weights, parse_features
from service.store import Grid

pyogrio = pytest.importorskip("pyogrio", reason="pyogrio (test extra) ships the Natural Earth fixture")
NATURAL_EARTH = (
    Path(pyogrio.__file__).parent / "tests" / "fixtures" / "naturalearth_lowres" / "naturalearth_lowres.shp"
)
WGS84 = pyproj.CRS.from_epsg(4326)
GEOD = pyproj.Geod(ellps="WGS84")


@pytest.fixture(scope="module")
def countries() -> dict[str, Any]:
    """Every country of the fixture as a GeoJSON FeatureCollection, ids the country names."""
    if not NATURAL_EARTH.is_file():
        pytest.skip(f"the Natural Earth fixture is not at {NATURAL_EARTH} in this pyogrio version")
    _, _, geometry, fields = pyogrio.raw.read(NATURAL_EARTH, columns=["name"])
    shapes = shapely.from_wkb(geometry)
    names = [str(n) for n in fields[0]]
    return {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "id": name, "geometry": shapely.geometry.mapping(shape), "properties": {}}
            for name, shape in zip(names, shapes, strict=True)
        ],
    }


def world(west: float, size: float = 1.0) -> Grid:
    """A global lat-lon grid of ``size``-degree cells whose columns start at ``west``, rows north first."""
    nx, ny = int(round(360 / size)), int(round(180 / size))
    x = west + size * (np.arange(nx) + 0.5)
    y = (-90 + size * (np.arange(ny) + 0.5))[::-1]
    return Grid(crs_wkt=WGS84.to_wkt(), x=x, y=y, is_geographic=True)


@pytest.fixture(scope="module")
def weights(countries: dict[str, Any]) -> dict[str, Any]:
    """Weights of every country on global 1-degree grids written in -180..180 and 0..360."""
    parsed = parse_features(countries, max_vertices=1_000_000)
    return {
        name: compute_weights(parsed, world(west), cache_size=0, max_cells=100_000)
        for name, west in (("-180..180", -180.0), ("0..360", 0.0))
    }


def geodesic_km2(geometry: dict[str, Any]) -> float:
    """pyproj.Geod's area (km2) of a GeoJSON polygon or multipolygon, edges split every 0.01 degrees."""
    total = 0.0
    for part in shapely.get_parts(shapely.geometry.shape(geometry)):
        oriented = shapely.geometry.polygon.orient(shapely.segmentize(part, 0.01))
        area, _ = GEOD.geometry_area_perimeter(oriented)
        total += abs(area)
    return total / 1e6


def row(countries: dict[str, Any], name: str) -> int:
    return [f["id"] for f in countries["features"]].index(name)


def test_the_fixture_has_the_shapes_this_file_is_about(countries: dict[str, Any]) -> None:
    by_name = {f["id"]: shapely.geometry.shape(f["geometry"]) for f in countries["features"]}
    assert len(by_name) == 177
    assert len(by_name["South Africa"].interiors) == 1  # Lesotho's hole
    for name in ("Fiji", "Russia", "Antarctica"):
        xmin, _, xmax, _ = by_name[name].bounds
        assert (xmin, xmax) == pytest.approx((-180.0, 180.0))  # cut at the 180th meridian
    assert len(shapely.get_parts(by_name["Indonesia"])) > 10


@pytest.fixture(scope="module")
def geodesic(countries: dict[str, Any]) -> np.ndarray:
    """pyproj.Geod's area (km2) of every country."""
    return np.array([geodesic_km2(f["geometry"]) for f in countries["features"]])


@pytest.mark.parametrize("grid_name", ["-180..180", "0..360"])
def test_every_country_has_its_geodesic_area_and_weights_summing_to_it(
    geodesic: np.ndarray, weights: dict[str, Any], grid_name: str
) -> None:
    w = weights[grid_name]
    np.testing.assert_allclose(w.area_km2, geodesic, rtol=1e-5)
    # every cell has data on these grids, so the weights of each country add up to its whole area
    np.testing.assert_allclose(np.asarray(w.matrix.sum(axis=1)).ravel(), w.area_km2, rtol=1e-9)
    np.testing.assert_array_equal(w.coverage, 1.0)


def test_the_two_ways_of_writing_longitudes_give_the_same_weights(weights: dict[str, Any]) -> None:
    a = weights["-180..180"].matrix
    b = weights["0..360"].matrix
    # cell (j, i) of the -180..180 grid is cell (j, i + 180 mod 360) of the 0..360 one
    j, i = np.divmod(np.arange(180 * 360), 360)
    moved = b[:, j * 360 + (i + 180) % 360]
    assert abs(moved - a).max() <= 1e-9 * a.max()


@pytest.mark.parametrize("name", ["Fiji", "Russia"])
def test_countries_across_180_have_cells_on_both_sides_of_it_on_a_0_360_grid(
    countries: dict[str, Any], weights: dict[str, Any], name: str
) -> None:
    g = world(0.0)
    dense = weights["0..360"].matrix[row(countries, name)].toarray().reshape(g.shape)
    columns = g.x[np.flatnonzero(dense.any(axis=0))]
    assert (columns > 180).any() and ((columns > 170) & (columns < 180)).any()
    lon = weights["0..360"].longitude[row(countries, name)]
    if name == "Fiji":  # its centroid lies near 178 E, not on the far side of the world
        assert 176 < lon < 180 or -180 < lon < -178


def test_lesotho_fills_the_hole_of_south_africa(countries: dict[str, Any], weights: dict[str, Any]) -> None:
    w = weights["-180..180"]
    south_africa, lesotho = row(countries, "South Africa"), row(countries, "Lesotho")
    shell = shapely.Polygon(shapely.geometry.shape(countries["features"][south_africa]["geometry"]).exterior)
    assert w.area_km2[south_africa] + w.area_km2[lesotho] == pytest.approx(
        geodesic_km2(shapely.geometry.mapping(shell)), rel=1e-4
    )
    both = w.matrix[[south_africa, lesotho]].toarray()
    cells = cell_areas_km2(world(-180.0)).ravel()
    shared = np.flatnonzero((both > 0).all(axis=0))
    assert shared.size > 0  # cells with a piece of each: their pieces never overlap
    assert np.all(both[:, shared].sum(axis=0) <= cells[shared] * (1 + 1e-9))


def test_antarctica_reaches_the_pole(countries: dict[str, Any], weights: dict[str, Any]) -> None:
    w = weights["-180..180"]
    k = row(countries, "Antarctica")
    dense = w.matrix[k].toarray().reshape(180, 360)
    # the southernmost row (89-90 S) lies wholly in it: every cell takes its whole area
    np.testing.assert_allclose(dense[-1], cell_areas_km2(world(-180.0))[-1], rtol=1e-9)
    assert w.latitude[k] < -75
