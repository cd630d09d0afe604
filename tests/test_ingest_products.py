"""Ingest of small files shaped like the products researchers bring (tests/_support_products.py writes them).

Which details of each product come from memory is said beside each writer there and each test here. Values are
checked against the source files within storage precision (0.1 units: half a step plus float noise).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import pytest
import xarray as xr

from service.cli import main as wxshock
from service.errors import IngestError
from service.ingest import ingest_files
from service.store import open_store
from tests._support_products import (
    PRODUCT_LCC,
    ROTATED_POLE,
    hourly_reanalysis,
    lambert_1km_product,
    model_output,
    precipitation_only_product,
    rotated_pole_file,
)

HALF_STEP = 0.05 + 1e-6  # storage precision 0.1 (plus the float error of the unit conversions)


def stored(path: Path, variable: str) -> np.ndarray:
    """A store's values of one variable as (time, y, x)."""
    return np.moveaxis(open_store(path).read(variable, slice(None), slice(None), slice(None)), 2, 0)


def assert_close(got: np.ndarray, want: np.ndarray) -> None:
    np.testing.assert_array_equal(np.isnan(got), np.isnan(want))
    assert np.nanmax(np.abs(got - want)) <= HALF_STEP


# --- the 1-km Lambert conformal daily product ------------------------------------------------------------------


def test_lambert_1km_product_with_its_365_day_leap_years(tmp_path: Path) -> None:
    # Product shape from memory: LCC grid mapping, x/y in km, "degrees C", noon stamps with time_bnds, one file
    # per variable per year, leap years without 31 December.
    written = lambert_1km_product(tmp_path / "in", (2003, 2004))
    notes: list[str] = []
    ingest_files(written.files, tmp_path / "lcc.zarr", progress=False, notes=notes)
    store = open_store(tmp_path / "lcc.zarr")
    assert store.calendar == "standard" and store.n_times == 365 + 366
    assert store.describe()["time"]["end"] == "2004-12-31"
    assert store.describe()["notes"]["wxshock_note_time_convention"] == "leap_years_drop_dec31"
    assert any("31 December dropped in leap years: 1 day(s) stored as missing" in n for n in notes)
    assert store.grid.crs().equals(pyproj.CRS.from_cf(PRODUCT_LCC))
    np.testing.assert_allclose(store.grid.x, 1_200_000.0 + 1000.0 * np.arange(5))  # km -> m
    for variable in ("tmax", "tmin", "prcp"):
        got = stored(tmp_path / "lcc.zarr", variable)
        assert np.isnan(got[-1]).all()  # 31 December 2004: dropped by the product, stored as missing
        assert_close(got[:-1], written.values[variable])
    # the next year appends directly after the dropped day
    later = lambert_1km_product(tmp_path / "in2005", (2005,), seed=9)
    ingest_files(later.files, tmp_path / "lcc.zarr", progress=False)
    store = open_store(tmp_path / "lcc.zarr")
    assert store.describe()["time"]["end"] == "2005-12-31"
    assert_close(stored(tmp_path / "lcc.zarr", "tmax")[-365:], later.values["tmax"])


def test_a_leap_year_alone_then_the_next_year(tmp_path: Path) -> None:
    leap = lambert_1km_product(tmp_path / "a", (2004,))
    ingest_files(leap.files, tmp_path / "s.zarr", progress=False)
    assert open_store(tmp_path / "s.zarr").describe()["time"]["end"] == "2004-12-31"
    ingest_files(lambert_1km_product(tmp_path / "b", (2005,)).files, tmp_path / "s.zarr", progress=False)
    assert open_store(tmp_path / "s.zarr").n_times == 366 + 365


def test_2d_latitude_longitude_that_contradict_the_projection_are_refused(tmp_path: Path) -> None:
    written = lambert_1km_product(tmp_path / "in", (2003,))
    with xr.open_dataset(written.files[0]) as ds:
        changed = ds.load()
    changed["lat"] = changed["lat"] + 0.05  # about 5.5 km north: five cells off
    changed.to_netcdf(written.files[0])
    with pytest.raises(IngestError, match=r"product_tmax_2003.nc': its own 2-D latitude/longitude disagree with its "
                                          r"grid_mapping .* \(\d\.\d+ cells off; at most 0.25 allowed\)"):  # fmt: skip
        ingest_files(written.files, tmp_path / "x.zarr", progress=False)


# --- a 0.05-degree precipitation-only product --------------------------------------------------------------------


def test_precipitation_only_product(tmp_path: Path) -> None:
    # Product shape from memory: "precip" in mm/day, no standard_name, 0.05 degree, one file per year.
    written = precipitation_only_product(tmp_path / "in", (2001, 2002))
    ingest_files(written.files, tmp_path / "rain.zarr", progress=False)
    store = open_store(tmp_path / "rain.zarr")
    assert store.variables == ("prcp",) and store.n_times == 730
    np.testing.assert_allclose(store.grid.resolution, (0.05, 0.05))
    assert_close(stored(tmp_path / "rain.zarr", "prcp"), written.values["prcp"])


# --- an hourly reanalysis ---------------------------------------------------------------------------------------


def daily_reference(stamps: np.ndarray, hourly: np.ndarray, how: str, shift_hours: int) -> pd.DataFrame:
    """Whole days of hourly values by pandas (an independent path): each value on the day of stamp + shift."""
    index = pd.DatetimeIndex(stamps) + pd.Timedelta(hours=shift_hours)
    frame = pd.DataFrame(hourly.reshape(hourly.shape[0], -1), index=index)
    groups = frame.groupby(frame.index.floor("D"))
    counts = groups.size()
    result = getattr(groups, how)()
    return result[counts == 24]


@pytest.mark.parametrize("explicit", [True, False])
def test_hourly_reanalysis_becomes_daily(tmp_path: Path, explicit: bool) -> None:
    # Export shape from memory: t2m in K and tp in m accumulated over the hour ending at the stamp, standard_name
    # "unknown", 0..360 longitudes, descending latitude, a "valid_time" axis.
    files, t2m, tp, stamps = hourly_reanalysis(tmp_path / "in", "2001-01-01", 2, 2)
    notes: list[str] = []
    options = {"variables": ["tmax=t2m", "tmin=t2m", "prcp=tp"]} if explicit else {}
    ingest_files(files, tmp_path / "era.zarr", progress=False, notes=notes, **options)
    store = open_store(tmp_path / "era.zarr")
    # instants: 1-4 January whole; accumulations (hour ending at the stamp): 00:00 on 1 January closes
    # 31 December, 23:00 on 4 January leaves 4 January one hour short; so 1-3 January, and all variables keep those
    assert store.describe()["time"] == {
        "start": "2001-01-01",
        "end": "2001-01-03",
        "days": 3,
        "calendar": "standard",
    }
    assert "prcp: left out incomplete day 2000-12-31 (1 of 24 steps)" in notes
    assert "prcp: left out incomplete day 2001-01-04 (23 of 24 steps)" in notes
    assert "tmax: left out 2001-01-04, which the other variables lack" in notes
    order = [3, 4, 5, 0, 1, 2]  # 0, 60, ..., 300 east -> -180, -120, ..., 120
    np.testing.assert_allclose(store.grid.x, [-180.0, -120.0, -60.0, 0.0, 60.0, 120.0])
    np.testing.assert_allclose(store.grid.y, [60.0, 30.0, 0.0, -30.0])
    ny, nx = t2m.shape[1:]
    tmax = daily_reference(stamps, t2m, "max", 0).to_numpy()[:3].reshape(3, ny, nx) - 273.15
    tmin = daily_reference(stamps, t2m, "min", 0).to_numpy()[:3].reshape(3, ny, nx) - 273.15
    prcp = daily_reference(stamps, tp, "sum", -1).to_numpy().reshape(-1, ny, nx) * 1000.0  # m -> mm
    assert_close(stored(tmp_path / "era.zarr", "tmax"), tmax[:, :, order])
    assert_close(stored(tmp_path / "era.zarr", "tmin"), tmin[:, :, order])
    assert_close(stored(tmp_path / "era.zarr", "prcp"), prcp[:3][:, :, order])
    record = store._array("prcp").attrs["wxshock_ingest"]  # noqa: SLF001
    assert "daily total of 24 hourly values of 'tp' ('m')" in record and "midnight to midnight UTC" in record
    assert "ending at its stamp" in record
    assert "daily maximum of 24 hourly values of 't2m' ('K')" in store._array("tmax").attrs["wxshock_ingest"]  # noqa: SLF001


def test_hourly_days_at_a_fixed_offset_from_utc(tmp_path: Path) -> None:
    files, t2m, _, stamps = hourly_reanalysis(tmp_path / "in", "2001-01-01", 3, 1)
    ingest_files(files, tmp_path / "local.zarr", variables=["tmax=t2m", "tmin=t2m"], utc_offset="+06:00",
                 progress=False)  # fmt: skip
    store = open_store(tmp_path / "local.zarr")
    # local days at UTC+06:00 run 18:00 to 18:00 UTC: 2 January is the first whole one, 3 January the last
    assert (store.describe()["time"]["start"], store.describe()["time"]["end"]) == (
        "2001-01-02",
        "2001-01-03",
    )
    ny, nx = t2m.shape[1:]
    want = daily_reference(stamps, t2m, "max", 6).to_numpy().reshape(-1, ny, nx) - 273.15
    assert_close(stored(tmp_path / "local.zarr", "tmax"), want[:, :, [3, 4, 5, 0, 1, 2]])
    assert "UTC+06:00" in store._array("tmax").attrs["wxshock_ingest"]  # noqa: SLF001


def test_hourly_packed_int16_with_fill_values(tmp_path: Path) -> None:
    # int16 packing (scale_factor, add_offset, _FillValue) as such archives write it (from memory)
    files, *_ = hourly_reanalysis(tmp_path / "in", "2001-01-01", 2, 1, packed=True)
    with xr.open_dataset(files[0]) as ds:
        raw = ds.load()
    assert raw["t2m"].encoding["dtype"] == np.int16
    raw["t2m"][30, 1, 1] = np.nan  # one missing hour on 2 January: that day is missing in that cell
    # CF valid_range, in the packed type: a value beyond it (packed 32500, 350 K) is missing too
    raw["t2m"][40, 2, 2] = 285.0 + 0.002 * 32500
    raw["t2m"].attrs["valid_range"] = np.array([-32000, 32000], dtype=np.int16)
    raw = raw.drop_vars("tp")
    raw.to_netcdf(files[0], encoding={"t2m": {k: raw["t2m"].encoding[k] for k in ("dtype", "scale_factor",
                                                                                 "add_offset", "_FillValue")}})  # fmt: skip
    with xr.open_dataset(files[0]) as ds:
        decoded = ds.load()  # the reference: what CF decoding gives
    assert np.isnan(decoded["t2m"][30, 1, 1])
    ingest_files(files, tmp_path / "packed.zarr", variables=["tmax=t2m", "tmin=t2m"], progress=False)
    got = stored(tmp_path / "packed.zarr", "tmax")
    t2m = decoded["t2m"].values.astype(np.float64)
    want = t2m.reshape(2, 24, *t2m.shape[1:]).max(axis=1) - 273.15  # numpy max: NaN when any hour is NaN
    want[1, 2, 2] = np.nan  # 350 K at 16:00 on 2 January lies beyond valid_range
    assert_close(got, want[:, :, [3, 4, 5, 0, 1, 2]])
    assert np.isnan(got[1, 1, 4]) and not np.isnan(got[0, 1, 4])
    assert np.isnan(got[1, 2, 5]) and not np.isnan(
        got[0, 2, 5]
    )  # the out-of-range hour makes its day missing


def test_hourly_files_with_a_missing_hour_between_them(tmp_path: Path) -> None:
    files, *_ = hourly_reanalysis(tmp_path / "in", "2001-01-01", 2, 2)
    with xr.open_dataset(files[1]) as ds:
        shorter = ds.isel(valid_time=slice(1, None)).load()
    shorter.to_netcdf(files[1])
    with pytest.raises(IngestError, match=r"tmax has a gap between '.*hourly_0.nc' \(ends 2001-01-02 23:00\) and "
                                          r"'.*hourly_1.nc' \(starts 2001-01-03 01:00\): 1 time step\(s\) missing"):  # fmt: skip
        ingest_files(files, tmp_path / "x.zarr", variables=["tmax=t2m", "tmin=t2m"], progress=False)


def test_command_line_on_one_hourly_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    files, *_ = hourly_reanalysis(tmp_path / "in", "2001-01-01", 2, 1)
    out = tmp_path / "cli.zarr"
    argv = ["ingest", str(files[0]), "--out", str(out), "--var", "tmax=t2m", "--var", "tmin=t2m", "--quiet"]
    assert wxshock(argv) == 0
    captured = capsys.readouterr()
    assert f"{out}: fingerprint sha256:" in captured.out
    assert open_store(out).variables == ("tmax", "tmin", "prcp")  # tp recognised by its name
    assert "note: prcp: left out incomplete day 2000-12-31 (1 of 24 steps)" in captured.err
    assert (
        wxshock(
            ["ingest", str(files[0]), "--out", str(tmp_path / "y.zarr"), "--utc-offset", "noon", "--quiet"]
        )
        == 2
    )
    assert "day boundary offset 'noon' is not an offset from UTC" in capsys.readouterr().err


# --- climate-model output ---------------------------------------------------------------------------------------


@pytest.mark.parametrize("calendar", ["360_day", "noleap"])
def test_model_output_calendars(tmp_path: Path, calendar: str) -> None:
    # CMIP-style daily files from memory: tasmax/tasmin K, pr kg m-2 s-1, time at noon with time_bnds, 0..360.
    written = model_output(tmp_path / "in", calendar, (2051, 2052))
    ingest_files(written.files, tmp_path / "model.zarr", progress=False)
    store = open_store(tmp_path / "model.zarr")
    assert store.calendar == calendar and store.n_times == (720 if calendar == "360_day" else 730)
    np.testing.assert_allclose(store.grid.x, [-135.0, -45.0, 45.0, 135.0])
    order = [2, 3, 0, 1]
    for variable in ("tmax", "tmin", "prcp"):
        # float32 in the file: K values near 300 carry about 2e-5 of rounding, far below the storage step
        assert_close(stored(tmp_path / "model.zarr", variable), written.values[variable][:, :, order])


# --- names that collide -----------------------------------------------------------------------------------------


def test_one_variable_name_for_maximum_and_minimum_files(tmp_path: Path) -> None:
    written = lambert_1km_product(tmp_path / "in", (2003,))
    tx, tn = tmp_path / "tx_2003.nc", tmp_path / "tn_2003.nc"
    for source, target in ((written.files[0], tx), (written.files[1], tn)):
        with xr.open_dataset(source) as ds:
            renamed = ds.rename({"tmax" if "tmax" in ds else "tmin": "t"}).load()
        del renamed["t"].attrs["cell_methods"]
        renamed.to_netcdf(target)
    with pytest.raises(IngestError, match=r"holds none of tmax, tmin, prcp"):
        ingest_files([tx, tn], tmp_path / "x.zarr", progress=False)
    ingest_files([tx, tn], tmp_path / "t.zarr", variables=["tmax=t@tx_*", "tmin=t@tn_*"], progress=False)
    assert_close(stored(tmp_path / "t.zarr", "tmax")[:365], written.values["tmax"])
    assert_close(stored(tmp_path / "t.zarr", "tmin")[:365], written.values["tmin"])
    with pytest.raises(IngestError, match=r"--var tmax=t@tq_\*: no input file matches .tq_\*."):
        ingest_files([tx, tn], tmp_path / "y.zarr", variables=["tmax=t@tq_*", "tmin=t@tn_*"], progress=False)
    with pytest.raises(IngestError, match=r"tmax and tmin are the same daily variable of the same files"):
        ingest_files([tx], tmp_path / "z.zarr", variables=["tmax=t", "tmin=t"], progress=False)


# --- rotated pole -----------------------------------------------------------------------------------------------


def test_rotated_pole_grid(tmp_path: Path) -> None:
    # Regional-model shape from memory: rlat/rlon in degrees, rotated_latitude_longitude mapping, 2-D lat/lon.
    written = rotated_pole_file(tmp_path / "in")
    ingest_files(written.files, tmp_path / "rot.zarr", progress=False)
    store = open_store(tmp_path / "rot.zarr")
    crs = store.grid.crs()
    assert crs.is_derived  # a rotated pole: its coordinates are not longitude/latitude
    to_lonlat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    np.testing.assert_allclose(to_lonlat.transform(0.0, 0.0), (18.0, 50.75), atol=1e-9)  # the rotated origin
    np.testing.assert_allclose(store.grid.x, -0.33 + 0.11 * np.arange(6))  # rotated longitudes, as written
    assert_close(stored(tmp_path / "rot.zarr", "tmax"), written.values["tmax"])
    # describe gives the outline in longitude/latitude, never the rotated coordinates: the cell corners carried by
    # the independent rotation bound it
    from tests._support_products import rotate_to_geographic

    edges_x, edges_y = np.meshgrid(-0.385 + 0.11 * np.arange(7), -0.275 + 0.11 * np.arange(6))
    lon, lat = rotate_to_geographic(edges_x, edges_y, -162.0, 39.25)
    box = store.describe()["lonlat_bounds"]
    assert box["west"] == pytest.approx(lon.min(), abs=1e-3) and box["east"] == pytest.approx(
        lon.max(), abs=1e-3
    )
    assert box["south"] == pytest.approx(lat.min(), abs=1e-3) and box["north"] == pytest.approx(
        lat.max(), abs=1e-3
    )


def test_rotated_pole_that_its_own_latitude_longitude_contradict(tmp_path: Path) -> None:
    # the 2-D lat/lon were computed with the pole's longitude 180 degrees off (a sign slip in the attribute)
    written = rotated_pole_file(
        tmp_path / "in", lonlat_pole={**ROTATED_POLE, "grid_north_pole_longitude": 18.0}
    )
    with pytest.raises(IngestError, match=r"rotated.nc': its own 2-D latitude/longitude disagree with its "
                                          r"grid_mapping.*grid_north_pole_latitude and grid_north_pole_longitude"):  # fmt: skip
        ingest_files(written.files, tmp_path / "x.zarr", progress=False)


def test_curvilinear_grid_without_a_grid_mapping_is_refused(tmp_path: Path) -> None:
    written = rotated_pole_file(tmp_path / "in")
    with xr.open_dataset(written.files[0]) as ds:
        bare = ds.drop_vars(["rotated_pole", "rlat", "rlon"]).load()
    for name in ("tasmax", "tasmin", "pr"):
        bare[name].attrs.pop("grid_mapping", None)
    bare.to_netcdf(written.files[0])
    with pytest.raises(IngestError, match=r"locates its cells only by 2-D latitude and longitude \('lat', 'lon'\).*"
                                          r"Regrid the data"):  # fmt: skip
        ingest_files(written.files, tmp_path / "x.zarr", progress=False)


def test_a_community_inside_one_rotated_cell_gets_that_cells_values(tmp_path: Path) -> None:
    # Served, not only stored: a small square around the rotated cell (row 2, column 3), drawn in rotated
    # coordinates and carried to longitude/latitude by the independent rotation, is placed on that cell.
    import shapely

    from service.pipeline import run_series
    from service.schemas import SeriesRequest
    from service.settings import Settings
    from tests._support_products import rotate_to_geographic

    written = rotated_pole_file(tmp_path / "in")
    ingest_files(written.files, tmp_path / "rot.zarr", progress=False)
    ring = shapely.segmentize(shapely.LineString([(-0.04, -0.04), (0.04, -0.04), (0.04, 0.04), (-0.04, 0.04),
                                                  (-0.04, -0.04)]), 0.005)  # fmt: skip
    xy = shapely.get_coordinates(ring)
    lon, lat = rotate_to_geographic(xy[:, 0], xy[:, 1], -162.0, 39.25)
    feature = {"type": "Feature", "id": "inside", "properties": {},
               "geometry": {"type": "Polygon", "coordinates": [np.c_[lon, lat].tolist()]}}  # fmt: skip
    request = SeriesRequest(features=feature, variables=["tmax"])
    result = run_series(request, open_store(tmp_path / "rot.zarr"), Settings(data_dir=str(tmp_path)))
    assert np.max(np.abs(result.frame["tmax"].to_numpy() - written.values["tmax"][:, 2, 3])) <= HALF_STEP


def test_running_totals_through_the_day_are_refused(tmp_path: Path) -> None:
    # Some land reanalyses accumulate precipitation from 00 UTC through the day (from memory); summing such
    # running totals would count each hour many times. Per-step amounts of the same rain pass.
    files, _, tp, _ = hourly_reanalysis(tmp_path / "in", "2001-01-01", 4, 1)
    with xr.open_dataset(files[0]) as ds:
        running = ds.load()
    # the total since 00 UTC: the value stamped h hours after midnight holds hours 1..h (24 at the next midnight)
    day = (np.arange(tp.shape[0]) - 1) // 24
    totals = np.zeros_like(tp)
    for d in np.unique(day):
        totals[day == d] = np.cumsum(tp[day == d], axis=0)
    running["tp"].values[:] = totals
    running.to_netcdf(files[0])
    with pytest.raises(IngestError, match=r"prcp from 'tp': the precipitation amounts look like running totals .* "
                                          r"Difference them into amounts per time step first"):  # fmt: skip
        ingest_files(files, tmp_path / "x.zarr", progress=False)
    # the same under days at another offset from UTC, where the restart falls inside the day
    with pytest.raises(IngestError, match=r"look like running totals"):
        ingest_files(files, tmp_path / "x.zarr", utc_offset="+05:00", progress=False)
    # and the per-step amounts themselves pass
    files2, *_ = hourly_reanalysis(tmp_path / "in2", "2001-01-01", 4, 1)
    ingest_files(files2, tmp_path / "ok.zarr", progress=False)


def test_hourly_batches_append_when_each_repeats_the_last_file_of_the_one_before(tmp_path: Path) -> None:
    # An hour-ending accumulation splits the day between two files; a batch that starts again with the previous
    # batch's last file makes that day whole, and the days the store already holds are left out.
    files, t2m, tp, stamps = hourly_reanalysis(tmp_path / "in", "2001-01-01", 2, 3)
    store_path = tmp_path / "era.zarr"
    ingest_files(files[:2], store_path, progress=False)
    assert open_store(store_path).describe()["time"]["end"] == "2001-01-03"
    notes: list[str] = []
    ingest_files(files[1:], store_path, progress=False, notes=notes)
    # batch 1 (1-4 January) stored 1-3 January; batch 2 (3-6 January) holds 3-5 January whole
    assert "prcp: left out 2001-01-03, which the store already holds" in notes
    store = open_store(store_path)
    assert store.describe()["time"]["end"] == "2001-01-05"
    ny, nx = t2m.shape[1:]
    prcp = daily_reference(stamps, tp, "sum", -1).to_numpy().reshape(-1, ny, nx) * 1000.0
    assert_close(stored(store_path, "prcp"), prcp[:5][:, :, [3, 4, 5, 0, 1, 2]])
    once = tmp_path / "once.zarr"
    ingest_files(files, once, progress=False)
    assert open_store(once).fingerprint == store.fingerprint  # the same store as ingesting all files at once
