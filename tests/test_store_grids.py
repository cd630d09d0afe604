"""Layout 2: several grids in one store, variables over parts of one time axis, the write API ingest calls,
weight layers per grid, and every grid described (never projected or rotated coordinates as lon/lat)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyproj
import pytest
import xarray as xr

from service.errors import StoreError, StoreFormatError
from service.store import (
    Grid,
    add_variables,
    append_store,
    check_grid_name,
    find_grid,
    open_store,
    update_store,
    verify_store,
    write_layer,
    write_store,
)
from service.store.grids import _lonlat_bounds, lonlat_box
from tests._support_store import LAMBERT_CRS, make_dataset

HALF_STEP = 0.05 + 1e-9


def _fine_and_coarse(years=(2000, 2001)):
    """Precipitation on a 0.5-degree grid, temperatures on a 1.5-degree grid over the same corner."""
    fine = make_dataset(ny=6, nx=6, years=years, variables=("prcp",), layers=("population",), seed=1)
    coarse = make_dataset(ny=2, nx=2, years=years, variables=("tmax", "tmin"), layers=("elevation",),
                          cell_size=1.5, seed=2)  # fmt: skip
    return fine, coarse


def _values(ds: xr.Dataset, var: str) -> np.ndarray:
    return ds[var].transpose("y", "x", "time").values


def test_a_store_with_two_grids_reads_each_variable_on_its_own_grid(tmp_path: Path) -> None:
    fine, coarse = _fine_and_coarse()
    path = tmp_path / "two.zarr"
    fingerprint = write_store({"fine": fine, "coarse": coarse}, path)
    store = open_store(path)
    assert list(store.grids) == ["fine", "coarse"] and store.main_grid == "fine"
    assert store.variables == ("tmax", "tmin", "prcp")
    assert store.variable_grids == {"tmax": "coarse", "tmin": "coarse", "prcp": "fine"}
    assert store.grids["fine"].shape == (6, 6) and store.grids["coarse"].shape == (2, 2)
    for var, ds in (("prcp", fine), ("tmax", coarse), ("tmin", coarse)):
        got = store.read(var, slice(None), slice(None), slice(None))
        assert np.nanmax(np.abs(got - _values(ds, var))) <= HALF_STEP
    assert store.data_mask("fine").shape == (6, 6) and store.data_mask("coarse").all()
    assert store.layers_on("fine") == ("population",) and store.layers == ()  # not on every grid
    assert store.read_layer("elevation", "coarse").shape == (2, 2)
    with pytest.raises(StoreFormatError, match=r"has 2 grids \(fine, coarse\); name the grid"):
        store.grid  # noqa: B018 - a multi-grid store has no single grid
    with pytest.raises(StoreFormatError, match=r"grid 'coarse' of store 'two' has no layer 'population'"):
        store.read_layer("population", "coarse")
    assert verify_store(path).ok and store.fingerprint == fingerprint
    tree = xr.open_datatree(path, engine="zarr")  # plain xarray reads every grid, the time axis inherited
    assert set(tree.children) == {"fine", "coarse"} and tree["coarse"]["tmax"].dims == ("y", "x", "time")
    assert tree["fine"].to_dataset()["prcp"].sizes["time"] == store.n_times


def test_ingest_adds_a_variable_on_a_new_grid_then_appends_one_variable_alone(tmp_path: Path) -> None:
    """The issue's example: precipitation first, temperature from another product on a coarser grid later."""
    fine, coarse = _fine_and_coarse(years=(2000, 2002))
    path = tmp_path / "s.zarr"
    write_store(fine.sel(time=slice(None, "2001-12-31")), path)
    assert open_store(path).variables == ("prcp",)
    add_variables(
        coarse.sel(time=slice(None, "2000-12-31")), path
    )  # the grid differs: a new one, named by default
    store = open_store(path)
    assert list(store.grids) == ["grid", "grid2"] and store.grid_of("tmax") == "grid2"
    assert store.coverage("tmax") == slice(0, 366) and store.coverage("prcp") == slice(0, 731)
    assert np.isnan(store.read("tmax", slice(None), slice(None), slice(366, 731))).all()  # not given: missing
    # one variable appended alone; the time axis grows past its end, the others keep their days
    append_store(fine[["prcp", "crs"]].sel(time=slice("2002-01-01", None)), path)
    append_store(coarse[["tmax", "tmin", "crs"]].sel(time=slice("2001-01-01", "2001-12-31")), path)
    store = open_store(path)
    assert store.n_times == 1096 and store.coverage("prcp") == slice(0, 1096)
    assert store.coverage("tmax") == slice(0, 731) == store.coverage("tmin")
    got = store.read("prcp", slice(None), slice(None), slice(None))
    assert np.nanmax(np.abs(got - _values(fine, "prcp"))) <= HALF_STEP
    tmax = store.read("tmax", slice(None), slice(None), slice(None))
    assert np.nanmax(np.abs(tmax[:, :, :731] - _values(coarse, "tmax")[:, :, :731])) <= HALF_STEP
    assert np.isnan(tmax[:, :, 731:]).all()
    info = store.describe()
    assert (info["variables"]["tmax"]["grid"], info["variables"]["tmax"]["end"]) == ("grid2", "2001-12-31")
    assert info["variables"]["prcp"]["end"] == "2002-12-31" and info["time"]["end"] == "2002-12-31"
    assert verify_store(path).ok
    # the same data written at once give the same store
    once = write_store(
        {"grid": fine, "grid2": coarse.sel(time=slice(None, "2001-12-31"))}, tmp_path / "once.zarr"
    )
    assert once == store.fingerprint


def test_variables_given_before_the_first_day_rewrite_the_store_with_every_variable_kept(
    tmp_path: Path,
) -> None:
    fine, coarse = _fine_and_coarse(years=(2000, 2002))
    path = tmp_path / "s.zarr"
    write_store(fine.sel(time=slice("2001-01-01", None)), path)
    add_variables(coarse, path, grid="coarse")  # from 2000: the axis now starts a year earlier
    store = open_store(path)
    assert store.dates.year[0] == 2000 and store.coverage("prcp") == slice(366, 1096)
    assert store.coverage("tmax") == slice(0, 1096) and verify_store(path).ok
    got = store.read("prcp", slice(None), slice(None), slice(None))
    assert np.isnan(got[:, :, :366]).all()
    assert np.nanmax(np.abs(got[:, :, 366:] - _values(fine, "prcp")[:, :, 366:])) <= HALF_STEP
    assert store.layers_on("grid") == ("population",)  # the static layers came along


def test_the_write_api_refuses_what_cannot_make_one_store(tmp_path: Path) -> None:
    fine, coarse = _fine_and_coarse()
    path = tmp_path / "s.zarr"
    write_store(fine, path, grid="fine")
    with pytest.raises(StoreFormatError, match=r"already has \['prcp'\] \(on grid 'fine'\); append days"):
        add_variables(fine, path)
    with pytest.raises(StoreFormatError, match=r"has a grid 'fine' that differs from the data's grid"):
        add_variables(coarse, path, grid="fine")
    with pytest.raises(StoreFormatError, match=r"the data lie on the store's grid 'fine'; name that grid"):
        add_variables(make_dataset(ny=6, nx=6, variables=("tmax",), layers=()), path, grid="other")
    with pytest.raises(
        StoreFormatError, match=r"one store holds one calendar: the store's calendar is 'standard'"
    ):
        add_variables(make_dataset(ny=2, nx=2, calendar="noleap", variables=("tmax",), layers=()), path)
    with pytest.raises(StoreFormatError, match=r"holds 'prcp' on grid 'fine'; the new days are on grid"):
        append_store(make_dataset(ny=2, nx=2, years=(2002, 2002), variables=("prcp",), layers=()), path)
    with pytest.raises(StoreFormatError, match=r"grid name 'Fine Grid' is not allowed"):
        write_store(fine, tmp_path / "bad.zarr", grid="Fine Grid")
    with pytest.raises(StoreFormatError, match=r"grid name 'time' is not allowed"):
        check_grid_name("time")
    with pytest.raises(StoreFormatError, match=r"variable 'prcp' is given on two grids"):
        write_store(
            {"a": fine, "b": make_dataset(ny=2, nx=2, variables=("prcp",), cell_size=2.0)}, tmp_path / "c"
        )
    with pytest.raises(StoreError, match=r"does not exist; create it with write_store"):
        update_store(fine, tmp_path / "nowhere.zarr")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.zarr"]


def test_weight_layers_go_on_each_grid_and_requests_see_those_on_every_grid(tmp_path: Path) -> None:
    fine, coarse = _fine_and_coarse()
    path = tmp_path / "s.zarr"
    write_store({"fine": fine, "coarse": coarse}, path)
    before = open_store(path).fingerprint
    write_layer(path, "cropland", {"fine": np.full((6, 6), 0.25), "coarse": np.full((2, 2), 0.5)},
                attrs={"units": "1", "wxshock_layer_kind": "share"})  # fmt: skip
    store = open_store(path)
    assert store.layers == ("cropland",) and store.fingerprint != before and verify_store(path).ok
    assert store.read_layer("cropland", "coarse").tolist() == [[0.5, 0.5], [0.5, 0.5]]
    assert store.describe()["grids"]["fine"]["layers"] == ["cropland", "population"]
    with pytest.raises(StoreFormatError, match=r"layer 'cropland' for grid 'coarse' has shape \(3, 3\)"):
        write_layer(path, "cropland", {"coarse": np.ones((3, 3))})
    with pytest.raises(StoreFormatError, match=r"has negative values on grid 'fine'"):
        write_layer(path, "people", {"fine": -np.ones((6, 6))})
    with pytest.raises(StoreFormatError, match=r"layer name 'data_mask' is not allowed"):
        write_layer(path, "data_mask", {"fine": np.ones((6, 6))})


def test_find_grid_matches_equal_grids_only(tmp_path: Path) -> None:
    fine, coarse = _fine_and_coarse()
    write_store({"fine": fine, "coarse": coarse}, tmp_path / "s.zarr")
    store = open_store(tmp_path / "s.zarr")
    same = Grid.from_crs(pyproj.CRS.from_epsg(4326), fine.x.values, fine.y.values)
    assert find_grid(store, same) == "fine"
    assert (
        find_grid(store, Grid.from_crs(pyproj.CRS.from_epsg(4326), fine.x.values + 0.5, fine.y.values))
        is None
    )


def test_describe_shows_every_grid_and_its_outline_in_longitude_latitude(tmp_path: Path) -> None:
    fine, _ = _fine_and_coarse()
    lambert = make_dataset(ny=3, nx=4, projected=True, variables=("tmax",), layers=())
    write_store({"fine": fine, "lcc": lambert}, tmp_path / "s.zarr")
    info = open_store(tmp_path / "s.zarr").describe()
    json.dumps(info)
    assert list(info["grids"]) == ["fine", "lcc"] and info["layout_version"] == 2
    lcc = info["grids"]["lcc"]
    assert lcc["coordinates"] == "projected" and lcc["resolution"]["units"] == "metre"
    assert lcc["bounds"] == {"xmin": -200_000.0, "ymin": -150_000.0, "xmax": -160_000.0, "ymax": -120_000.0}
    # the box holds pyproj's own transform of each corner, and is not the metres read as degrees
    to_lonlat = pyproj.Transformer.from_crs(LAMBERT_CRS, "EPSG:4326", always_xy=True)
    for x, y in ((-200_000, -150_000), (-160_000, -150_000), (-200_000, -120_000), (-160_000, -120_000)):
        lon, lat = to_lonlat.transform(x, y)
        box = lcc["lonlat_bounds"]
        assert (
            box["west"] - 1e-9 <= lon <= box["east"] + 1e-9
            and box["south"] - 1e-9 <= lat <= box["north"] + 1e-9
        )
    assert info["grids"]["fine"]["coordinates"] == "longitude-latitude"
    assert info["grids"]["fine"]["lonlat_bounds"] == {
        "west": -150.0,
        "south": -40.0,
        "east": -147.0,
        "north": -37.0,
    }
    assert info["crs"] == info["grids"]["fine"]["crs"] and info["variables"]["tmax"]["grid"] == "lcc"


# An invented rotated-pole grid (the CF rotated_latitude_longitude mapping; pole as in common regional model
# domains, from memory): its x and y are rotated degrees, not longitude and latitude.
ROTATED = pyproj.CRS.from_cf(
    {
        "grid_mapping_name": "rotated_latitude_longitude",
        "grid_north_pole_latitude": 39.25,
        "grid_north_pole_longitude": -162.0,
    }  # fmt: skip
)


def test_a_rotated_pole_grid_is_never_described_in_its_rotated_degrees(tmp_path: Path) -> None:
    x = np.arange(-10.0, 10.0, 0.5) + 0.25
    y = np.arange(-8.0, 8.0, 0.5) + 0.25
    ds = make_dataset(ny=y.size, nx=x.size, years=(2000, 2000), variables=("prcp",), layers=())
    ds = ds.assign_coords(x=x, y=y)
    ds["crs"].attrs["crs_wkt"] = ROTATED.to_wkt()
    write_store(ds, tmp_path / "rot.zarr")
    store = open_store(tmp_path / "rot.zarr")
    info = store.describe()
    assert info["crs"]["is_geographic"] is False  # degrees, but not longitude and latitude
    assert info["grids"]["grid"]["coordinates"] == "rotated"
    box = info["lonlat_bounds"]
    assert box != {"west": -10.0, "south": -8.0, "east": 10.0, "north": 8.0}
    # the rotated grid's centre (0, 0) lies at the pole's antipode meridian: pyproj's transform of it is inside
    lon0, lat0 = pyproj.Transformer.from_crs(ROTATED, "EPSG:4326", always_xy=True).transform(0.0, 0.0)
    assert abs(lat0 - 50.75) < 1e-9 and abs(lon0 - 18.0) < 1e-9  # 90 - 39.25 and -162 + 180
    assert box["south"] < lat0 < box["north"] and box["west"] < lon0 < box["east"]
    xr_ds = xr.open_datatree(tmp_path / "rot.zarr", engine="zarr")["grid"].to_dataset()
    assert xr_ds["x"].attrs["standard_name"] == "grid_longitude" and xr_ds["x"].attrs["units"] == "degrees"


def test_two_dimensional_latitudes_and_longitudes_give_the_outline_when_a_grid_carries_them(
    tmp_path: Path,
) -> None:
    x = np.arange(-10.0, 10.0, 0.5) + 0.25
    y = np.arange(-8.0, 8.0, 0.5) + 0.25
    xx, yy = np.meshgrid(x, y)
    lon, lat = pyproj.Transformer.from_crs(ROTATED, "EPSG:4326", always_xy=True).transform(xx, yy)
    ds = make_dataset(ny=y.size, nx=x.size, years=(2000, 2000), variables=("prcp",), layers=())
    ds = ds.assign_coords(x=x, y=y, lat=(("y", "x"), lat), lon=(("y", "x"), lon))
    ds["crs"].attrs["crs_wkt"] = ROTATED.to_wkt()
    write_store(ds, tmp_path / "rot.zarr")
    store = open_store(tmp_path / "rot.zarr")
    got_lat, got_lon = store.grid_lonlat()
    np.testing.assert_allclose(got_lat, lat) and np.testing.assert_allclose(got_lon, lon)
    from_2d = store.describe()["lonlat_bounds"]
    from_crs = _lonlat_bounds(store.grid)
    for side in ("west", "south", "east", "north"):  # the two agree to a fraction of a cell
        assert abs(from_2d[side] - from_crs[side]) < 0.05


def test_lonlat_boxes_across_the_antimeridian_and_around_a_pole() -> None:
    pacific = Grid.from_crs(
        pyproj.CRS.from_epsg(4326), np.arange(170.25, 190, 0.5), np.arange(-10.25, -20, -0.5)
    )
    assert _lonlat_bounds(pacific) == {
        "west": 170.0,
        "south": -20.0,
        "east": -170.0,
        "north": -10.0,
    }  # west > east
    globe = Grid.from_crs(pyproj.CRS.from_epsg(4326), np.arange(0.25, 360, 0.5), np.arange(89.75, -90, -0.5))
    assert _lonlat_bounds(globe) == {"west": -180.0, "south": -90.0, "east": 180.0, "north": 90.0}
    # a polar stereographic grid around the North Pole (EPSG:3413): every longitude, up to 90 N
    polar = Grid.from_crs(pyproj.CRS.from_epsg(3413), np.arange(-1e6, 1e6, 5e4), np.arange(1e6, -1e6, -5e4))
    box = _lonlat_bounds(polar)
    assert box["north"] == 90.0 and (box["west"], box["east"]) == (-180.0, 180.0) and 70 < box["south"] < 80
    assert lonlat_box(np.array([10.0, 20.0, 20.0, 10.0]), np.array([1.0, 1.0, 2.0, 2.0])) == {
        "west": 10.0, "south": 1.0, "east": 20.0, "north": 2.0}  # fmt: skip


@pytest.mark.s3
def test_several_grids_on_an_object_store(tmp_path: Path, s3_server) -> None:  # noqa: F811 - session fixture
    fine, coarse = _fine_and_coarse()
    url = f"s3://{s3_server.bucket}/grids/s.zarr"
    options = s3_server.storage_options()
    write_store(fine, url, storage_options=options, grid="fine")
    add_variables(coarse, url, storage_options=options, grid="coarse")  # rewritten aside, swapped in
    write_layer(
        url, "cropland", {"fine": np.full((6, 6), 0.5), "coarse": np.ones((2, 2))}, storage_options=options
    )
    store = open_store(url, storage_options=options)
    assert list(store.grids) == ["fine", "coarse"] and store.layers == ("cropland",)
    local = tmp_path / "s.zarr"
    write_store(fine, local, grid="fine")
    add_variables(coarse, local, grid="coarse")
    assert (
        write_layer(local, "cropland", {"fine": np.full((6, 6), 0.5), "coarse": np.ones((2, 2))})
        == store.fingerprint
    )
    assert verify_store(url, storage_options=options).ok


from tests._support_cluster import s3_server  # noqa: E402,F401 - the session's moto S3 fixture
