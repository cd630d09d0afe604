"""Ingest of CF NetCDF files that the tests write themselves: round trips, calendars, appending, every failure."""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from service.cli import main as wxshock
from service.errors import IngestError
from service.ingest import ingest_files
from service.store import open_store, verify_store
from tests._support_store import LAMBERT_CRS, make_dataset

HALF_STEP = 0.05 + 1e-6  # storage precision 0.1 units (plus the float error of the unit conversions)

# How each test file spells the variables: (name, standard_name, cell_methods, units, conversion from ours)
KELVIN_FLUX = {
    "tmax": ("tasmax", "air_temperature", "time: maximum", "K", lambda v: v + 273.15),
    "tmin": ("tasmin", "air_temperature", "time: minimum", "K", lambda v: v + 273.15),
    "prcp": ("pr", "precipitation_flux", "time: mean", "kg m-2 s-1", lambda v: v / 86400.0),
}
CELSIUS_METRES = {
    "tmax": ("t_high", "air_temperature", "time: maximum within days", "degC", lambda v: v),
    "tmin": ("t_low", "air_temperature", "time: minimum", "Celsius", lambda v: v),
    "prcp": ("rain", "lwe_thickness_of_precipitation_amount", "time: sum", "m", lambda v: v / 1000.0),
}


def write_cf(
    ds: xr.Dataset,
    directory: Path,
    *,
    spelling: dict = KELVIN_FLUX,
    split: str = "year-variable",
    projected: bool = False,
    coordinate_units: str = "m",
    with_elevation: bool = False,
    prefix: str = "cf",
) -> list[Path]:
    """Write a make_dataset Dataset as CF NetCDF files (one per year and variable, per year, or one file)."""
    directory.mkdir(parents=True, exist_ok=True)
    time = ds["time"]
    years = sorted({int(t.year) for t in time.to_index()}) if split != "one" else [None]
    variables = ("tmax", "tmin", "prcp")
    groups: list[tuple[str, Sequence[str], object]] = []
    for year in years:
        if split == "year-variable":
            groups += [(f"{prefix}_{v}_{year}.nc", [v], year) for v in variables]
        else:
            groups.append((f"{prefix}_{year or 'all'}.nc", variables, year))
    paths = []
    for filename, names, year in groups:
        part = ds if year is None else ds.sel(time=time.dt.year == year)
        if projected:
            scale = 1000.0 if coordinate_units == "km" else 1.0
            coords = {
                "yc": (
                    "yc",
                    part.y.values / scale,
                    {"standard_name": "projection_y_coordinate", "units": coordinate_units},
                ),
                "xc": (
                    "xc",
                    part.x.values / scale,
                    {"standard_name": "projection_x_coordinate", "units": coordinate_units},
                ),
            }
            dims = ("time", "yc", "xc")
        else:
            coords = {
                "lat": ("lat", part.y.values, {"standard_name": "latitude", "units": "degrees_north"}),
                "lon": ("lon", part.x.values, {"standard_name": "longitude", "units": "degrees_east"}),
            }
            dims = ("time", "lat", "lon")
        data_vars = {}
        for v in names:
            name, standard, methods, units, convert = spelling[v]
            attrs = {"units": units}
            if standard:
                attrs["standard_name"] = standard
            if methods:
                attrs["cell_methods"] = methods
            if projected:
                attrs["grid_mapping"] = "lambert"
            data_vars[name] = (dims, convert(part[v].transpose("time", "y", "x").values), attrs)
        if projected:
            data_vars["lambert"] = ((), np.int32(0), {**LAMBERT_CRS.to_cf(), "crs_wkt": LAMBERT_CRS.to_wkt()})
        if with_elevation:
            data_vars["orog"] = (
                dims[1:],
                part["elevation"].values,
                {"standard_name": "surface_altitude", "units": "m"},
            )
        out = xr.Dataset(data_vars, coords={"time": part.time.values, **coords})
        out.attrs["Conventions"] = "CF-1.8"
        path = directory / filename
        out.to_netcdf(path)
        paths.append(path)
    return paths


def assert_same_values(
    store_path: Path, ds: xr.Dataset, variables: Sequence[str] = ("tmax", "tmin", "prcp")
) -> None:
    """The store holds ds's values within the storage precision, NaN where ds is NaN."""
    store = open_store(store_path)
    for v in variables:
        got = store.read(v, slice(None), slice(None), slice(None))
        want = ds[v].transpose("y", "x", "time").values
        np.testing.assert_array_equal(np.isnan(got), np.isnan(want))
        assert np.nanmax(np.abs(got - want)) <= HALF_STEP, v


def test_latitude_longitude_files_per_year_and_variable(tmp_path: Path) -> None:
    ds = make_dataset(ny=4, nx=5, years=(2000, 2002), missing_cells=[(1, 1)], missing_days=[(40, 2, 3)])
    files = write_cf(ds, tmp_path / "in")
    assert len(files) == 9
    fingerprint = ingest_files(files, tmp_path / "grid.zarr", progress=False)
    store = open_store(tmp_path / "grid.zarr")
    assert store.fingerprint == fingerprint and verify_store(tmp_path / "grid.zarr").ok
    assert store.calendar == "standard" and store.grid.is_geographic and store.grid.crs().to_epsg() == 4326
    np.testing.assert_allclose(store.grid.x, ds.x.values)
    np.testing.assert_allclose(store.grid.y, ds.y.values)
    assert_same_values(tmp_path / "grid.zarr", ds)  # K -> degC, kg m-2 s-1 x 86400 -> mm/day
    assert not store.data_mask()[1, 1] and store.data_mask().sum() == 19


def test_projected_noleap_file_in_km_with_degc_and_metres(tmp_path: Path) -> None:
    ds = make_dataset(ny=3, nx=4, years=(2001, 2002), calendar="noleap", projected=True)
    files = write_cf(ds, tmp_path / "in", spelling=CELSIUS_METRES, split="one", projected=True,
                     coordinate_units="km", with_elevation=True)  # fmt: skip
    ingest_files(files, tmp_path / "lcc.zarr", progress=False)
    store = open_store(tmp_path / "lcc.zarr")
    assert store.calendar == "noleap" and len(store.dates) == 730 and not store.grid.is_geographic
    assert store.grid.crs() == LAMBERT_CRS
    np.testing.assert_allclose(store.grid.x, ds.x.values)  # km -> m
    assert_same_values(tmp_path / "lcc.zarr", ds)  # m of water -> mm
    np.testing.assert_allclose(store.read_layer("elevation"), ds["elevation"].values, atol=1e-3)


def test_360_day_files_open_and_index(tmp_path: Path) -> None:
    ds = make_dataset(ny=2, nx=3, years=(2050, 2051), calendar="360_day")
    files = write_cf(ds, tmp_path / "in", split="year")
    ingest_files(files, tmp_path / "model.zarr", progress=False)
    store = open_store(tmp_path / "model.zarr")
    dates = store.dates
    assert store.calendar == "360_day" and len(dates) == 720
    february = (dates.year == 2050) & (dates.month == 2)
    assert dates.day[february].max() == 30 and dates.dayofyear.max() == 360
    assert_same_values(tmp_path / "model.zarr", ds)


def test_explicit_names_without_standard_names(tmp_path: Path) -> None:
    spelling = {
        "tmax": ("HOT", "", "", "degC", lambda v: v),
        "tmin": ("COLD", "", "", "degC", lambda v: v),
        "prcp": ("WET", "", "", "mm", lambda v: v),
    }
    ds = make_dataset(ny=2, nx=2, years=(2000, 2000))
    files = write_cf(ds, tmp_path / "in", spelling=spelling, split="one")
    with pytest.raises(IngestError, match=r"holds none of tmax, tmin, prcp.*\['COLD', 'HOT', 'WET'\]"):
        ingest_files(files, tmp_path / "x.zarr", progress=False)
    ingest_files(
        files, tmp_path / "x.zarr", variables={"tmax": "HOT", "tmin": "COLD", "prcp": "WET"}, progress=False
    )
    assert_same_values(tmp_path / "x.zarr", ds)


def test_appending_years_equals_ingesting_them_at_once(tmp_path: Path) -> None:
    ds = make_dataset(ny=3, nx=3, years=(2000, 2002))
    files = write_cf(ds, tmp_path / "in", split="year")
    all_at_once = ingest_files(files, tmp_path / "once.zarr", progress=False)
    first = ingest_files(files[:2], tmp_path / "grown.zarr", progress=False)
    grown = ingest_files(files[2:], tmp_path / "grown.zarr", progress=False)
    assert first != grown and grown == all_at_once  # the same data in the same layout: the same fingerprint
    assert open_store(tmp_path / "grown.zarr").describe()["time"]["end"] == "2002-12-31"
    assert_same_values(tmp_path / "grown.zarr", ds)


def test_a_regional_grid_across_the_antimeridian_keeps_its_0_to_360_longitudes(tmp_path: Path) -> None:
    # Moved to -180..180 these columns would be -179.75, -179.25, 179.25, 179.75: cells with a 358-degree hole
    # between them, whose edges (midpoints) would span half the globe. Kept as written they run on unbroken.
    ds = make_dataset(ny=2, nx=4, years=(2000, 2000), origin=(179.0, 10.0))  # centres 179.25 .. 180.75
    files = write_cf(ds, tmp_path / "in", split="one")
    ingest_files(files, tmp_path / "dateline.zarr", progress=False)
    store = open_store(tmp_path / "dateline.zarr")
    np.testing.assert_allclose(store.grid.x, [179.25, 179.75, 180.25, 180.75])
    assert_same_values(tmp_path / "dateline.zarr", ds)


def test_a_global_0_to_360_grid_becomes_minus_180_to_180(tmp_path: Path) -> None:
    ds = make_dataset(ny=2, nx=8, years=(2000, 2000), origin=(0.0, 10.0), cell_size=45.0)  # 22.5 .. 337.5
    files = write_cf(ds, tmp_path / "in", split="one")
    ingest_files(files, tmp_path / "global.zarr", progress=False)
    store = open_store(tmp_path / "global.zarr")
    np.testing.assert_allclose(store.grid.x, [-157.5, -112.5, -67.5, -22.5, 22.5, 67.5, 112.5, 157.5])
    got = store.read("tmax", slice(None), slice(None), slice(None))
    want = ds["tmax"].transpose("y", "x", "time").values[:, [4, 5, 6, 7, 0, 1, 2, 3]]
    assert np.nanmax(np.abs(got - want)) <= HALF_STEP


def _rewrite(path: Path, change) -> None:
    """Apply change(ds) -> ds to a NetCDF file in place."""
    with xr.open_dataset(path) as ds:
        changed = change(ds.load())
    changed.to_netcdf(path)


def _files(tmp_path: Path, **kwargs) -> tuple[xr.Dataset, list[Path]]:
    ds = make_dataset(ny=2, nx=3, years=(2000, 2002))
    return ds, write_cf(ds, tmp_path / "in", split=kwargs.pop("split", "year"), **kwargs)


def test_gap_between_files_names_both_files_and_the_missing_days(tmp_path: Path) -> None:
    _, files = _files(tmp_path)
    with pytest.raises(IngestError, match=r"tmax has a gap between '.*cf_2000\.nc' \(ends 2000-12-31\) and "
                                          r"'.*cf_2002\.nc' \(starts 2002-01-01\): 365 day\(s\) missing from "
                                          r"2001-01-01 to 2001-12-31"):  # fmt: skip
        ingest_files([files[0], files[2]], tmp_path / "out.zarr", progress=False)
    assert not (tmp_path / "out.zarr").exists()


def test_overlap_between_files(tmp_path: Path) -> None:
    _, files = _files(tmp_path)
    _rewrite(files[1], lambda ds: xr.concat([ds.isel(time=slice(0, 1)).assign_coords(
        time=[np.datetime64("2000-12-31")]), ds], dim="time"))  # fmt: skip
    with pytest.raises(IngestError, match=r"'.*cf_2000\.nc' and '.*cf_2001\.nc' overlap in tmax: the first ends "
                                          r"2000-12-31, the second starts 2000-12-31"):  # fmt: skip
        ingest_files(files, tmp_path / "out.zarr", progress=False)


def test_gap_inside_a_file(tmp_path: Path) -> None:
    _, files = _files(tmp_path)
    _rewrite(files[1], lambda ds: ds.drop_isel(time=[59, 60]))
    with pytest.raises(
        IngestError, match=r"cf_2001\.nc': tmax time skips 2 day\(s\) after 2001-02-28 \(next 2001-03-03\)"
    ):
        ingest_files(files, tmp_path / "out.zarr", progress=False)


def test_files_on_different_grids(tmp_path: Path) -> None:
    _, files = _files(tmp_path)
    _rewrite(files[2], lambda ds: ds.assign_coords(lon=ds.lon + 0.01))
    with pytest.raises(
        IngestError,
        match=r"'.*cf_2002\.nc' is not on the grid of '.*cf_2000\.nc' \(tmax\): cell centres differ",
    ):
        ingest_files(files, tmp_path / "out.zarr", progress=False)
    _rewrite(files[2], lambda ds: ds.isel(lon=slice(0, 2)))
    with pytest.raises(IngestError, match=r"2 x 2 cells instead of 2 x 3"):
        ingest_files(files, tmp_path / "out.zarr", progress=False)


@pytest.mark.parametrize(
    ("variable", "attrs", "message"),
    [
        (
            "tasmax",
            {"units": "furlongs"},
            r"variable 'tasmax' \(tmax\): units 'furlongs' read as 'furlong', which is not a temperature",
        ),
        (
            "pr",
            {"units": "K"},
            r"variable 'pr' \(prcp\): units 'K' read as 'kelvin' \(\[temperature\]\), which is neither",
        ),
        (
            "pr",
            {"units": "mm/3hr"},
            r"units 'mm/3hr' are not a precipitation unit that UDUNITS/CF spellings allow",
        ),
        (
            "tasmin",
            {"cell_methods": "time: mean"},
            r"cf_all.nc': variable 'tasmin' is an air temperature whose name suggests tmin but whose "
            r"cell_methods \('time: mean'\)",
        ),
    ],
)
def test_unusable_attributes(tmp_path: Path, variable: str, attrs: dict, message: str) -> None:
    _, files = _files(tmp_path, split="one")

    def change(ds: xr.Dataset) -> xr.Dataset:
        ds[variable].attrs.update(attrs)
        return ds

    _rewrite(files[0], change)
    with pytest.raises(IngestError, match=message):
        ingest_files(files, tmp_path / "out.zarr", progress=False)


def test_calendars_and_coverage_must_agree(tmp_path: Path) -> None:
    a = make_dataset(ny=2, nx=2, years=(2000, 2000))
    b = make_dataset(ny=2, nx=2, years=(2001, 2001), calendar="noleap")
    files = write_cf(a, tmp_path / "a", split="one", prefix="a") + write_cf(
        b, tmp_path / "b", split="one", prefix="b"
    )
    with pytest.raises(
        IngestError, match=r"files use different calendars \(.*a_all\.nc': standard, .*b_all\.nc': noleap"
    ):
        ingest_files(files, tmp_path / "out.zarr", progress=False)
    files = write_cf(a, tmp_path / "c", prefix="c")
    _rewrite(files[2], lambda ds: ds.isel(time=slice(0, 300)))  # prcp ends early
    with pytest.raises(IngestError, match=r"tmax covers 366 days from 2000-01-01 but prcp covers 300"):
        ingest_files(files, tmp_path / "out.zarr", progress=False)


def test_unreadable_and_missing_files(tmp_path: Path) -> None:
    junk = tmp_path / "junk.nc"
    junk.write_text("not a netcdf file")
    with pytest.raises(IngestError, match=r"junk\.nc' cannot be read as NetCDF"):
        ingest_files([junk], tmp_path / "out.zarr", progress=False)
    with pytest.raises(IngestError, match=r"nothere\.nc' does not exist"):
        ingest_files([tmp_path / "nothere.nc"], tmp_path / "out.zarr", progress=False)
    with pytest.raises(IngestError, match="no input files given"):
        ingest_files([], tmp_path / "out.zarr", progress=False)
    _, files = _files(tmp_path, split="one")
    with pytest.raises(IngestError, match=r"--var tmax=TXX: no input file has a variable named 'TXX'"):
        ingest_files(files, tmp_path / "out.zarr", variables={"tmax": "TXX"}, progress=False)


def test_appending_must_continue_the_store(tmp_path: Path) -> None:
    _, files = _files(tmp_path)
    ingest_files(files[:2], tmp_path / "s.zarr", progress=False)
    with pytest.raises(
        IngestError,
        match=r"already holds tmax up to 2001-12-31; the files start 2001-01-01; give only the days after",
    ):
        ingest_files(files[1:2], tmp_path / "s.zarr", progress=False)
    other = make_dataset(ny=2, nx=3, years=(2003, 2003))
    later = write_cf(other, tmp_path / "later", split="one")
    with pytest.raises(
        IngestError, match=r"the files start tmax on 2003-01-01 but store .* ends it on 2001-12-31: 365 day"
    ):
        ingest_files(later, tmp_path / "s.zarr", progress=False)
    moved = write_cf(
        make_dataset(ny=2, nx=3, years=(2002, 2002), origin=(0.0, 0.0)), tmp_path / "moved", split="one"
    )
    with pytest.raises(IngestError, match=r"holds tmax on its grid 'grid' \(2 x 3 cells, 'WGS 84'\); these files give "
                                          r"it on another grid .*cell centres differ by up to"):  # fmt: skip
        ingest_files(moved, tmp_path / "s.zarr", progress=False)


def test_a_failed_ingest_leaves_the_old_store_and_its_fingerprint(tmp_path: Path) -> None:
    _, files = _files(tmp_path)
    before = ingest_files(files[:2], tmp_path / "s.zarr", progress=False)

    def wrong_units(ds: xr.Dataset) -> xr.Dataset:
        ds["pr"] = ds["pr"] * 86400.0  # values are now mm/day ...
        ds["pr"].attrs["units"] = "m"  # ... but labelled metres: x 1000 overflows the store's int16 at 0.1 mm
        return ds

    _rewrite(files[2], wrong_units)
    with pytest.raises(IngestError, match=r"failed, the previous store is unchanged: variable 'prcp': value .* "
                                          r"cannot be stored.*check the units"):  # fmt: skip
        ingest_files(files[2:], tmp_path / "s.zarr", progress=False)
    assert open_store(tmp_path / "s.zarr").fingerprint == before and verify_store(tmp_path / "s.zarr").ok
    assert open_store(tmp_path / "s.zarr").describe()["time"]["end"] == "2001-12-31"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in", "s.zarr"]  # nothing left aside


def test_command_line_ingest_describe_verify(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    ds = make_dataset(ny=2, nx=2, years=(2000, 2000))
    files = write_cf(ds, tmp_path / "in", spelling=CELSIUS_METRES, split="one")
    out = tmp_path / "cli.zarr"
    argv = ["ingest", *map(str, files), "--out", str(out), "--var", "tmax=t_high", "--quiet"]
    assert wxshock(argv) == 0
    assert f"{out}: fingerprint sha256:" in capsys.readouterr().out
    assert wxshock(["describe", str(out), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert (
        info["name"] == "cli"
        and info["variables"]["tmax"]["units"] == "degC"
        and info["years"] == [2000, 2000]
    )
    assert wxshock(["verify", str(out)]) == 0
    assert capsys.readouterr().out.strip().endswith("ok")
    assert (
        wxshock(
            ["ingest", str(files[0]), "--out", str(tmp_path / "bad.zarr"), "--var", "tmax=nope", "--quiet"]
        )
        == 2
    )
    assert "no input file has a variable named 'nope'" in capsys.readouterr().err


def test_a_daily_mean_temperature_beside_the_others_is_left_out(tmp_path: Path) -> None:
    ds = make_dataset(ny=2, nx=2, years=(2000, 2000))
    files = write_cf(ds, tmp_path / "in", split="one")

    def add_mean(cf: xr.Dataset) -> xr.Dataset:
        cf["tas"] = (cf["tasmax"] + cf["tasmin"]) / 2
        cf["tas"].attrs = {"standard_name": "air_temperature", "cell_methods": "time: mean", "units": "K"}
        return cf

    _rewrite(files[0], add_mean)
    ingest_files(files, tmp_path / "s.zarr", progress=False)
    assert_same_values(tmp_path / "s.zarr", ds)
