"""The per-cell anomaly field behind the map: season-years, values, z against the baseline."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely

from service.errors import OutOfRangeError, RequestError
from service.maps import anomaly_field, season_years, to_grid_crs
from service.schemas import FixedBaseline, MonthsSeason, PropertySeason, TrailingBaseline, WindowSeason
from service.store import open_store
from tests._support_store import LAMBERT_CRS, make_store


def _days(*dates: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(month, day, year) arrays of ISO dates."""
    stamps = pd.to_datetime(list(dates))
    return stamps.month.to_numpy(), stamps.day.to_numpy(), stamps.year.to_numpy()


@pytest.mark.parametrize(
    ("season", "expected_year", "expected_in"),
    [
        # A season crossing the new year belongs to the year in which it ends (issue 4).
        (WindowSeason(start="11-01", end="02-28"), [2001, 2001, 2001, 2001], [True, False, True, False]),
        (MonthsSeason(months=[11, 12, 1, 2]), [2001, 2001, 2001, 2001], [True, False, True, False]),
        (MonthsSeason(months=[5, 6, 7]), [2000, 2000, 2001, 2001], [False, False, False, False]),
        (WindowSeason(start="10-20", end="11-20"), [2000, 2000, 2001, 2001], [True, True, False, False]),
        ("year", [2000, 2000, 2001, 2001], [True, True, True, True]),
    ],
)
def test_season_years(season: object, expected_year: list[int], expected_in: list[bool]) -> None:
    month, day, year = _days("2000-11-15", "2000-10-31", "2001-02-10", "2001-03-01")
    label, in_season = season_years(month, day, year, season)
    in_season_expected = np.asarray(expected_in)
    assert in_season.tolist() == in_season_expected.tolist()
    assert label[in_season].tolist() == np.asarray(expected_year)[in_season_expected].tolist()


def test_season_years_refuses_a_per_feature_season() -> None:
    month, day, year = _days("2000-01-01")
    with pytest.raises(RequestError, match="one season for the whole grid"):
        season_years(month, day, year, PropertySeason(property="growing_season"))


@pytest.fixture(scope="module")
def grid_store(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, object]:
    """A 6 x 5 geographic store, 2000-2006, one cell without data and one cell-day missing."""
    path, ds = make_store(
        tmp_path_factory.mktemp("maps"), years=(2000, 2006), missing_cells=[(0, 0)], missing_days=[(40, 2, 2)]
    )
    return path, ds


def _reference_z(
    ds: object, variable: str, months: list[int] | None, year: int, baseline: range
) -> np.ndarray:
    """z of a season value per cell, computed with pandas alone (sample sd, ddof = 1) as the reference."""
    frame = ds[variable].to_dataframe().reset_index() if variable != "tmean" else None
    if variable == "tmean":
        frame = ((ds["tmax"] + ds["tmin"]) / 2).rename("tmean").to_dataframe().reset_index()
    frame["year"] = frame["time"].dt.year
    if months is not None:
        frame = frame[frame["time"].dt.month.isin(months)]
    how = "sum" if variable == "prcp" else "mean"
    values = frame.groupby(["year", "y", "x"], sort=False)[variable].agg(how).unstack("year")
    mean = values[list(baseline)].mean(axis=1)
    spread = values[list(baseline)].std(axis=1, ddof=1)
    z = ((values[year] - mean) / spread).unstack("x")
    return z.loc[ds["y"].values, ds["x"].values].to_numpy().copy()


@pytest.mark.parametrize(
    ("indicator", "variable", "season", "months"),
    [
        ("prcp_total", "prcp", "year", None),
        ("tmean", "tmean", MonthsSeason(months=[6, 7, 8]), [6, 7, 8]),
        ("tmax_mean", "tmax", MonthsSeason(months=[1, 2, 3]), [1, 2, 3]),
    ],
)
def test_anomaly_field_matches_a_pandas_computation(
    grid_store: tuple[Path, object], indicator: str, variable: str, season: object, months: list[int] | None
) -> None:
    path, ds = grid_store
    store = open_store(path)
    field = anomaly_field(store, indicator, 2006, season=season, baseline=FixedBaseline(start=2000, end=2004))
    expected = _reference_z(ds, variable, months, 2006, range(2000, 2005))
    expected[0, 0] = np.nan  # the cell without data: pandas' sum of nothing is 0, ours is no value
    assert field.z.shape == (6, 5)
    assert field.year == 2006 and field.baseline_years == (2000, 2004)
    assert np.isnan(field.z[0, 0])
    np.testing.assert_allclose(field.z, expected, rtol=1e-9, atol=1e-9)


def test_anomaly_field_trailing_and_default_baselines(grid_store: tuple[Path, object]) -> None:
    path, ds = grid_store
    store = open_store(path)
    trailing = anomaly_field(store, "prcp_total", 2006, baseline=TrailingBaseline(trailing=4))
    assert trailing.baseline_years == (2002, 2005)
    np.testing.assert_allclose(
        trailing.z[1:], _reference_z(ds, "prcp", None, 2006, range(2002, 2006))[1:], rtol=1e-9
    )
    latest = anomaly_field(store, "prcp_total", None)
    assert latest.year == 2006 and latest.baseline_years == (2000, 2006)


def test_anomaly_field_leaves_a_short_season_empty(tmp_path: Path) -> None:
    # 20 of the 92 June-August days missing in one cell of 2003: 22 % > 10 %, so no value, no z.
    june = int((pd.Timestamp("2003-06-01") - pd.Timestamp("2000-01-01")).days)
    path, _ = make_store(tmp_path, years=(2000, 2003), missing_days=[(june + d, 1, 1) for d in range(20)])
    field = anomaly_field(
        open_store(path),
        "tmean",
        2003,
        season=MonthsSeason(months=[6, 7, 8]),
        baseline=FixedBaseline(start=2000, end=2002),
    )
    assert np.isnan(field.value[1, 1]) and np.isnan(field.z[1, 1])
    assert np.isfinite(field.z[1, 2])
    relaxed = anomaly_field(
        open_store(path),
        "tmean",
        2003,
        season=MonthsSeason(months=[6, 7, 8]),
        baseline=FixedBaseline(start=2000, end=2002),
        max_missing_share=0.25,
    )
    assert np.isfinite(relaxed.z[1, 1])


@pytest.mark.parametrize(
    ("kwargs", "error", "message"),
    [
        ({"indicator": "cdd"}, RequestError, "cannot be mapped"),
        ({"year": 1999}, OutOfRangeError, "season-year 1999 is not in the data"),
        ({"baseline": FixedBaseline(start=1995, end=2001)}, OutOfRangeError, "baseline 1995-2001 is outside"),
        ({"baseline": TrailingBaseline(trailing=10)}, OutOfRangeError, "baseline 1996-2005 is outside"),
    ],
)
def test_anomaly_field_errors(
    grid_store: tuple[Path, object], kwargs: dict, error: type, message: str
) -> None:
    store = open_store(grid_store[0])
    arguments = {"indicator": "prcp_total", "year": 2006} | kwargs
    with pytest.raises(error, match=message):
        anomaly_field(store, arguments.pop("indicator"), arguments.pop("year"), **arguments)


def test_to_grid_crs_follows_pyproj() -> None:
    square = shapely.box(-121.0, -26.0, -120.0, -25.0)
    (moved,) = to_grid_crs([square], None, LAMBERT_CRS)
    transformer = pyproj.Transformer.from_crs("OGC:CRS84", LAMBERT_CRS, always_xy=True)
    x, y = transformer.transform(-121.0, -26.0)
    assert (round(x, 6), round(y, 6)) in {(round(a, 6), round(b, 6)) for a, b in moved.exterior.coords}
    (same,) = to_grid_crs([square], "EPSG:4326", pyproj.CRS.from_epsg(4326))
    assert same.equals(square)


def test_anomaly_field_refuses_grids_above_its_cell_limit(grid_store: tuple[Path, object]) -> None:
    with pytest.raises(RequestError, match="the grid has 30 cells; the map draws at most 29"):
        anomaly_field(open_store(grid_store[0]), "prcp_total", 2006, max_cells=29)
