"""The store: write, open with our reader and with plain xarray, calendars, fingerprint, aside-then-swap."""

from __future__ import annotations

import json
import pickle
from pathlib import Path

import numpy as np
import pyproj
import pytest
import xarray as xr
import zarr

from service.errors import StoreError, StoreFormatError
from service.store import (
    FILL_VALUE,
    VARIABLES,
    Layout,
    append_store,
    open_store,
    verify_store,
    write_store,
)
from tests._support_store import LAMBERT_CRS, make_dataset, make_store

# Storage precision is 0.1 units: a value comes back within half of that (plus float rounding).
HALF_STEP = 0.05 + 1e-9


@pytest.mark.parametrize(
    ("calendar", "projected", "days_per_year"),
    [("standard", False, (366, 365, 365)), ("noleap", True, (365,) * 3), ("360_day", False, (360,) * 3)],
)
def test_round_trip_every_calendar_and_grid(
    tmp_path: Path, calendar: str, projected: bool, days_per_year
) -> None:
    path, ds = make_store(tmp_path, calendar=calendar, projected=projected, missing_cells=[(0, 0)],
                          missing_days=[(3, 2, 2)])  # fmt: skip
    store = open_store(path)
    assert store.name == "test" and store.calendar == calendar
    assert store.variables == VARIABLES and store.layers == ("population",) and store.has_elevation
    for var in VARIABLES:
        got = store.read(var, slice(None), slice(None), slice(None))
        want = ds[var].transpose("y", "x", "time").values
        assert got.shape == want.shape
        np.testing.assert_array_equal(np.isnan(got), np.isnan(want))
        assert np.nanmax(np.abs(got - want)) <= HALF_STEP
    # index correctly: the dates are the calendar's own, one per stored day
    dates = store.dates
    years, counts = np.unique(dates.year, return_counts=True)
    assert years.tolist() == [2000, 2001, 2002] and tuple(counts) == days_per_year
    assert dates.dayofyear[:3].tolist() == [1, 2, 3] and dates.month[0] == 1 and dates.day[0] == 1
    last_of_feb = np.flatnonzero((dates.year == 2000) & (dates.month == 2)).max()
    assert dates.day[last_of_feb] == {"standard": 29, "noleap": 28, "360_day": 30}[calendar]
    assert dates.dayofyear[dates.year == 2001].max() == days_per_year[1]
    mask = store.data_mask()
    assert mask.dtype == bool and not mask[0, 0] and mask.sum() == mask.size - 1
    assert store.grid.is_geographic is (not projected)


def test_window_reads_match_the_whole_and_raw_integers_decode(tmp_path: Path) -> None:
    path, ds = make_store(tmp_path, ny=9, nx=7, missing_cells=[(4, 3)])
    store = open_store(path)
    whole = store.read("tmin", slice(None), slice(None), slice(None))
    window = store.read("tmin", slice(2, 6), slice(1, 4), slice(100, 500))
    np.testing.assert_array_equal(window, whole[2:6, 1:4, 100:500])
    raw = store.read_raw("tmin", slice(4, 5), slice(3, 4), slice(0, 10))
    enc = store.encoding("tmin")
    assert raw.dtype == np.int16 and (raw == FILL_VALUE).all() and enc.fill_value == FILL_VALUE
    raw = store.read_raw("tmin", slice(0, 1), slice(0, 1), slice(0, 10))
    np.testing.assert_allclose((raw * enc.scale_factor + enc.add_offset)[0, 0], whole[0, 0, :10], atol=1e-12)


def test_plain_xarray_reads_the_store_with_cf_attributes(tmp_path: Path) -> None:
    path, ds = make_store(tmp_path, calendar="noleap", projected=True)
    tree = xr.open_datatree(path, engine="zarr")  # one group per grid, the time axis at the root (inherited)
    assert list(tree.children) == ["grid"]
    opened = tree["grid"].to_dataset()
    assert opened["tmax"].dims == ("y", "x", "time")
    for var, units in (("tmax", "degC"), ("tmin", "degC"), ("prcp", "mm/day")):
        attrs = opened[var].attrs
        assert attrs["units"] == units and attrs["grid_mapping"] == "crs" and attrs["standard_name"]
        assert attrs["cell_methods"].startswith("time: ")
        assert opened[var].encoding["dtype"] == np.int16 and opened[var].encoding["scale_factor"] == 0.1
    assert opened["tmax"].attrs["cell_methods"] == "time: maximum"  # CF: daily maximum (cfconventions.org)
    assert opened["tmin"].attrs["cell_methods"] == "time: minimum"
    crs = pyproj.CRS.from_wkt(opened["crs"].attrs["crs_wkt"])
    assert crs == LAMBERT_CRS and opened["crs"].attrs["grid_mapping_name"] == "lambert_conformal_conic"
    assert opened["x"].attrs["standard_name"] == "projection_x_coordinate"
    assert str(opened.time.values[0]) == "2000-01-01 00:00:00" and opened.time.values[0].calendar == "noleap"
    want = ds["prcp"].transpose("y", "x", "time").values
    assert np.nanmax(np.abs(opened["prcp"].values - want)) <= HALF_STEP
    assert opened["elevation"].attrs["units"] == "m"


def test_open_store_reads_the_store_zarr_writes(tmp_path: Path) -> None:
    path, _ = make_store(tmp_path)
    group = zarr.open_group(path, mode="r")
    assert group["grid/tmax"].metadata.dimension_names == ("y", "x", "time")
    assert (
        group["grid/tmax"].fill_value == FILL_VALUE
    )  # chunks never written read back as missing, not as 0 degC


def test_grid_edges_bounds_and_north_up_order(tmp_path: Path) -> None:
    path, _ = make_store(tmp_path, ny=4, nx=3, north_up=True)
    grid = open_store(path).grid
    assert grid.shape == (4, 3)
    np.testing.assert_allclose(grid.x_edges, [-150.0, -149.5, -149.0, -148.5])
    np.testing.assert_allclose(grid.y_edges, [-38.0, -38.5, -39.0, -39.5, -40.0])  # descending like y
    assert grid.bounds() == (-150.0, -40.0, -148.5, -38.0)
    assert grid.crs() == pyproj.CRS.from_epsg(4326)
    assert grid.resolution == (0.5, 0.5)


def test_describe_is_json_ready_and_complete(tmp_path: Path) -> None:
    path, _ = make_store(tmp_path, projected=True, calendar="360_day")
    info = open_store(path).describe()
    text = json.dumps(info)  # plain JSON, nothing numpy
    assert "NaN" not in text
    assert info["variables"]["prcp"]["units"] == "mm/day"
    assert info["calendar"] == "360_day" and info["years"] == [2000, 2002]
    assert info["time"]["start"] == "2000-01-01" and info["time"]["end"] == "2002-12-30"
    assert info["resolution"] == {"x": 10_000.0, "y": 10_000.0, "units": "metre"}
    assert info["bounds"] == {"xmin": -200_000.0, "ymin": -150_000.0, "xmax": -150_000.0, "ymax": -90_000.0}
    # the box around the projected grid, against pyproj's own transform of the lower-left corner
    lon, lat = pyproj.Transformer.from_crs(LAMBERT_CRS, "EPSG:4326", always_xy=True).transform(
        -200_000.0, -150_000.0
    )
    assert info["lonlat_bounds"]["west"] <= lon and info["lonlat_bounds"]["south"] <= lat
    assert lon - info["lonlat_bounds"]["west"] < 0.05 and -122.1 < lon < -121.9
    assert info["fingerprint"].startswith("sha256:") and info["layers"] == ["population"]
    assert info["chunks"] == {"y": 6, "x": 5, "time": 3653} and info["cells_with_data"] == 30


def test_store_pickles_as_its_location_and_reopens(tmp_path: Path) -> None:
    path, _ = make_store(tmp_path)
    store = open_store(path, name="renamed")
    data = pickle.dumps(store)
    assert len(data) < 500  # location, name and options only, no arrays
    again = pickle.loads(data)
    assert again.name == "renamed" and again.fingerprint == store.fingerprint
    np.testing.assert_array_equal(
        again.read("prcp", slice(0, 2), slice(0, 2), slice(0, 30)),
        store.read("prcp", slice(0, 2), slice(0, 2), slice(0, 30)),
    )


def test_fingerprint_is_stable_and_names_the_data(tmp_path: Path) -> None:
    ds = make_dataset(seed=3)
    first = write_store(ds, tmp_path / "a.zarr")
    assert write_store(ds, tmp_path / "b.zarr") == first  # same data, same fingerprint, wherever it lies
    assert write_store(ds.copy(deep=True), tmp_path / "a.zarr") == first  # rewriting does not change it
    changed = ds.copy(deep=True)
    changed["tmax"][10, 2, 3] = changed["tmax"][10, 2, 3] + 0.1  # one value, one storage step
    assert write_store(changed, tmp_path / "c.zarr") != first
    relabelled = ds.copy(deep=True)
    relabelled["population"].attrs["units"] = "persons"
    assert write_store(relabelled, tmp_path / "d.zarr") != first  # metadata counts too
    coarser = write_store(ds, tmp_path / "e.zarr", layout=Layout(compressor="zstd"))
    assert coarser == first  # the codec is not part of what the data is
    assert verify_store(tmp_path / "a.zarr").ok


def test_verify_finds_a_changed_chunk(tmp_path: Path) -> None:
    path, _ = make_store(tmp_path)
    assert verify_store(path).ok
    group = zarr.open_group(path, mode="r+")
    group["grid/prcp"][1, 1, 5] = group["grid/prcp"][1, 1, 5] + 1
    result = verify_store(path)
    assert (
        not result.ok
        and result.recorded == open_store(path).fingerprint
        and result.computed != result.recorded
    )


def test_failed_write_leaves_the_old_store_and_no_litter(tmp_path: Path) -> None:
    path, ds = make_store(tmp_path)
    before = open_store(path).fingerprint
    broken = ds.copy(deep=True)
    broken["prcp"][5, 1, 1] = 1.0e6  # not storable at 0.1 mm in int16
    with pytest.raises(StoreFormatError, match=r"variable 'prcp': value 1000000\.0 cannot be stored"):
        write_store(broken, path)
    assert open_store(path).fingerprint == before and verify_store(path).ok
    assert sorted(p.name for p in tmp_path.iterdir()) == ["test.zarr"]


def test_sharded_layout_reads_the_same(tmp_path: Path) -> None:
    ds = make_dataset(ny=5, nx=4, years=(2000, 2003))
    plain = write_store(ds, tmp_path / "plain.zarr", layout=Layout(time_chunk=365))
    sharded = write_store(ds, tmp_path / "sharded.zarr", layout=Layout(time_chunk=365, shard_time=730))
    assert plain == sharded  # the fingerprint names the values, not their chunking
    a, b = open_store(tmp_path / "plain.zarr"), open_store(tmp_path / "sharded.zarr")
    assert b.chunk_shape == (5, 4, 365) and b.inner_chunk_shape == (5, 4, 365)  # read unit: the inner chunk
    assert b.storage_shape_of("tmax") == (5, 4, 730)
    np.testing.assert_array_equal(a.read("tmax", slice(None), slice(1, 3), slice(300, 900)),
                                  b.read("tmax", slice(None), slice(1, 3), slice(300, 900)))  # fmt: skip
    assert verify_store(tmp_path / "sharded.zarr").ok


def _without_crs(ds: xr.Dataset) -> xr.Dataset:
    out = ds.drop_vars("crs")
    for v in VARIABLES:
        out[v].attrs.pop("grid_mapping", None)
    return out


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (_without_crs, "dataset has no CRS"),
        (lambda ds: ds.drop_vars(["tmax", "tmin", "prcp"]), "dataset has none of the variables"),
        (lambda ds: ds.isel(time=[0, 1, 3, 4]), r"2000-01-02 is followed by 2000-01-04 \(step 2 days"),
        (lambda ds: ds.isel(time=[0, 1, 1, 2]), r"2000-01-02 is followed by 2000-01-02 \(step 0 days"),
        (lambda ds: ds.isel(x=[0, 2, 1]), "coordinate 'x' is not strictly monotonic"),
        (lambda ds: ds.assign(tmax=ds.tmax.isel(time=0)), r"variable 'tmax' has dims \('y', 'x'\)"),
    ],
)
def test_write_rejects_what_is_not_a_daily_grid(tmp_path: Path, change, message: str) -> None:
    with pytest.raises(StoreFormatError, match=message):
        write_store(change(make_dataset(years=(2000, 2000))), tmp_path / "bad.zarr")
    assert not (tmp_path / "bad.zarr").exists()


def test_open_names_what_is_wrong(tmp_path: Path) -> None:
    with pytest.raises(StoreError, match=r"does not exist; build one with 'wxshock demo PATH'"):
        open_store(tmp_path / "nowhere.zarr")
    (tmp_path / "empty.zarr").mkdir()
    with pytest.raises(StoreFormatError, match="has no zarr.json"):
        open_store(tmp_path / "empty.zarr")
    xr.Dataset({"a": (("t",), np.arange(3))}).to_zarr(tmp_path / "other.zarr", zarr_format=3)
    with pytest.raises(StoreFormatError, match="is not a wxshock store"):
        open_store(tmp_path / "other.zarr")
    path, _ = make_store(tmp_path)
    store = open_store(path)
    with pytest.raises(
        StoreFormatError, match=r"no daily variable 'tmean'; it has \['tmax', 'tmin', 'prcp'\]"
    ):
        store.read("tmean", slice(None), slice(None), slice(None))
    with pytest.raises(StoreFormatError, match=r"no layer 'cropland'; it has \['population', 'elevation'\]"):
        store.read_layer("cropland")


def test_a_store_with_one_variable_and_no_layers(tmp_path: Path) -> None:
    path, ds = make_store(tmp_path, variables=("prcp",), layers=())
    store = open_store(path)
    assert store.variables == ("prcp",) and store.layers == () and not store.has_elevation
    assert store.describe()["elevation"] is False


@pytest.mark.s3
def test_store_on_s3(tmp_path: Path, s3_server) -> None:  # noqa: F811 - fixture from _support_cluster
    ds = make_dataset(years=(2000, 2000))
    url = f"s3://{s3_server.bucket}/stores/remote.zarr"
    options = s3_server.storage_options()
    fingerprint = write_store(ds, url, storage_options=options)
    store = open_store(url, storage_options=options)
    assert store.name == "remote" and store.fingerprint == fingerprint
    assert write_store(ds, tmp_path / "local.zarr") == fingerprint
    again = pickle.loads(pickle.dumps(store))
    want = ds["tmax"].transpose("y", "x", "time").values[:, :, :40]
    assert np.nanmax(np.abs(again.read("tmax", slice(None), slice(None), slice(0, 40)) - want)) <= HALF_STEP
    assert verify_store(url, storage_options=options).ok
    changed = ds.copy(deep=True)
    changed["tmin"][0, 0, 0] += 1.0
    assert write_store(changed, url, storage_options=options) != fingerprint  # replaced in place
    assert open_store(url, storage_options=options).fingerprint != fingerprint
    # appending on an object store rewrites it aside, and gives the store a local write of both years gives
    both = make_dataset(years=(2000, 2001))
    write_store(both.sel(time=slice(None, "2000-12-31")), url, storage_options=options)
    grown = append_store(both.sel(time=slice("2001-01-01", None)).drop_vars(["elevation", "population"]), url,
                         storage_options=options)  # fmt: skip
    assert grown == write_store(both, tmp_path / "both.zarr")


from tests._support_cluster import s3_server  # noqa: E402,F401 - the session's moto S3 fixture


def test_append_writes_new_days_and_leaves_hard_linked_copies_alone(tmp_path: Path) -> None:
    import os
    import shutil

    ds = make_dataset(ny=5, nx=4, years=(2000, 2003))
    once = write_store(ds, tmp_path / "once.zarr")
    first = ds.sel(time=slice("2000-01-01", "2001-12-31"))
    rest = ds.sel(time=slice("2002-01-01", "2003-12-31")).drop_vars(["elevation", "population"])
    write_store(first, tmp_path / "grown.zarr")
    snapshot = tmp_path / "snapshot.zarr"
    shutil.copytree(tmp_path / "grown.zarr", snapshot, copy_function=os.link)  # shares every file's inode
    grown = append_store(rest, tmp_path / "grown.zarr")
    assert grown == once  # same data, same layout: the same store as one written at once
    assert verify_store(snapshot).ok and open_store(snapshot).describe()["time"]["end"] == "2001-12-31"
    store = open_store(tmp_path / "grown.zarr")
    assert len(store.dates) == 1461 and verify_store(tmp_path / "grown.zarr").ok
    assert store.layers == ("population",) and store.has_elevation  # the store keeps its layers
    got = store.read("tmax", slice(None), slice(None), slice(None))
    assert np.nanmax(np.abs(got - ds["tmax"].transpose("y", "x", "time").values)) <= HALF_STEP


def test_append_refuses_days_that_do_not_follow(tmp_path: Path) -> None:
    ds = make_dataset(ny=2, nx=2, years=(2000, 2002))
    write_store(ds.sel(time=slice("2000-01-01", "2000-12-31")), tmp_path / "s.zarr")
    with pytest.raises(StoreFormatError, match=r"the new days of 'tmax' must start the day after its last day "
                                                r"\(2000-12-31, calendar 'standard'\); they start 2002-01-01"):  # fmt: skip
        append_store(ds.sel(time=slice("2002-01-01", None)), tmp_path / "s.zarr")
    write_store(ds[["tmax", "crs"]].sel(time=slice("2000-01-01", "2000-12-31")), tmp_path / "t.zarr")
    with pytest.raises(StoreFormatError, match=r"it has no \['prcp'\]; add new variables with add_variables"):
        append_store(ds[["tmax", "prcp", "crs"]].sel(time=slice("2001-01-01", None)), tmp_path / "t.zarr")
    names = sorted(p.name for p in tmp_path.iterdir())
    assert names == ["s.zarr", "t.zarr"]
