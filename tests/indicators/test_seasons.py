"""The season cutter: season-years, lengths in each calendar, completeness, per-feature seasons.

Day counts are worked out by hand from the month lengths of each calendar (CF conventions, section 4.4.1:
standard/Gregorian, noleap = 365_day, 360_day) and the support module builds dates independently.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from service.errors import FeatureError, StoreFormatError
from service.indicators import seasons
from service.schemas import MonthsSeason, PropertySeason, WindowSeason

sys.path.insert(0, str(Path(__file__).parent))  # the folder's own helper module (importlib import mode)
from _support_daily import make_daily, with_values  # noqa: E402


def _cut(daily, season, **kw):
    return seasons.cut_season(daily, seasons.season_definition(season), **kw)


def test_calendar_year_keeps_feb29_and_counts_days():
    cut = _cut(make_daily("1980-01-01", "1982-12-31"), "year")
    assert cut.cube.years.tolist() == [1980, 1981, 1982]
    assert cut.expected_days.tolist() == [366, 365, 365]  # 1980 is a Gregorian leap year
    assert cut.cube.prcp.shape == (1, 3, 366)
    assert cut.cube.in_season.sum(axis=1).tolist() == [366, 365, 365]
    assert np.isnan(cut.cube.prcp[0, 1, 365])  # padding of a 365-day year
    assert cut.present_share(("tmax", "tmin", "prcp")).tolist() == [[1.0, 1.0, 1.0]]
    # the day index points back into the daily series, and dayofyear follows it
    assert cut.cube.time_index[1, 0] == 366 and cut.cube.dayofyear[1, 0] == 1


def test_season_crossing_new_year_belongs_to_the_year_it_ends():
    # Nov-Apr: Nov 1 - Dec 31 (61 days) + Jan 1 - Apr 30 (120, or 121 in a leap year)
    daily = make_daily("1982-01-01", "1985-12-31")
    cut = _cut(daily, WindowSeason(start="11-01", end="04-30"))
    # 1982's season began in 1981 (not in the data); 1986's season ends after the data
    assert cut.cube.years.tolist() == [1983, 1984, 1985]
    assert cut.expected_days.tolist() == [181, 182, 181]
    first_day = cut.cube.time_index[0, 0]
    assert (daily.year[first_day], daily.month[first_day], daily.day[first_day]) == (1982, 11, 1)
    last = cut.cube.time_index[1, cut.expected_days[1] - 1]
    assert (daily.year[last], daily.month[last], daily.day[last]) == (1984, 4, 30)


def test_months_season_crossing_new_year():
    cut = _cut(make_daily("1990-01-01", "1992-12-31"), MonthsSeason(months=[12, 1, 2]))
    assert cut.cube.years.tolist() == [1991, 1992]
    assert cut.expected_days.tolist() == [31 + 31 + 28, 31 + 31 + 29]


def test_data_starting_mid_year_serves_only_whole_season_years():
    cut = _cut(make_daily("1980-07-01", "1982-06-30"), "year")
    assert cut.cube.years.tolist() == [1981]
    cut = _cut(make_daily("1980-07-01", "1982-06-30"), MonthsSeason(months=[7, 8, 9]))
    assert cut.cube.years.tolist() == [1980, 1981]


@pytest.mark.parametrize(
    ("calendar", "season", "expected"),
    [
        # Feb 29 lies inside 02-01..03-15 in a leap year of the standard calendar only
        ("standard", WindowSeason(start="02-01", end="03-15"), [29 + 15, 28 + 15]),
        ("noleap", WindowSeason(start="02-01", end="03-15"), [28 + 15, 28 + 15]),
        ("360_day", WindowSeason(start="02-01", end="03-15"), [30 + 15, 30 + 15]),
        # '03-31' does not exist in 360_day: the season ends on the last day before, Mar 30
        ("360_day", WindowSeason(start="02-29", end="03-31"), [2 + 30, 2 + 30]),
        # '02-29' as a start outside leap years starts the season on Mar 1
        ("standard", WindowSeason(start="02-29", end="03-10"), [11, 10]),
        ("noleap", WindowSeason(start="02-29", end="03-10"), [10, 10]),
        # a months season runs to each month's last day in every calendar
        ("360_day", MonthsSeason(months=[2]), [30, 30]),
        ("noleap", MonthsSeason(months=[2]), [28, 28]),
        ("360_day", "year", [360, 360]),
        ("noleap", "year", [365, 365]),
    ],
)
def test_season_lengths_per_calendar(calendar, season, expected):
    cut = _cut(make_daily("1984-01-01", "1985-12-31", calendar=calendar), season)
    assert cut.cube.years.tolist() == [1984, 1985]
    assert cut.expected_days.tolist() == expected
    assert cut.cube.in_season.sum(axis=1).tolist() == expected


def test_window_ending_feb28_leaves_out_feb29():
    # the window holds the month-days between start and end: Feb 29 is after Feb 28 (documented)
    cut = _cut(make_daily("1983-01-01", "1985-12-31"), WindowSeason(start="03-01", end="02-28"))
    assert cut.cube.years.tolist() == [1984, 1985]
    assert cut.expected_days.tolist() == [365, 365]


def test_missing_share_at_the_threshold_is_kept_and_above_it_blanked():
    daily = make_daily("2000-01-01", "2001-12-31", n_features=2, prcp=1.0)
    prcp = daily.prcp.copy()
    # January 2000 (31 days): feature 0 misses 3 days (9.7 %), feature 1 misses 4 (12.9 %)
    prcp[0, 0:3] = np.nan
    prcp[1, 0:4] = np.nan
    cut = _cut(with_values(daily, prcp=prcp), MonthsSeason(months=[1]))
    np.testing.assert_allclose(cut.present_share(["prcp"])[:, 0], [28 / 31, 27 / 31])
    assert cut.complete(["prcp"]).tolist() == [[True, True], [False, True]]
    assert cut.partial(["prcp"]).tolist() == [[True, False], [False, False]]
    # a temperature indicator does not see the precipitation gaps
    assert cut.complete(["tmax"]).all() and not cut.partial(["tmax"]).any()
    cube = cut.cube_for(["prcp"])
    assert np.nansum(cube.prcp[0, 0]) == 28.0
    assert np.isnan(cube.prcp[1, 0]).all() and cube.tmax is None  # blank for prcp; tmax not handed over
    assert np.nansum(cube.prcp[1, 1]) == 31.0
    assert not np.isnan(cut.cube_for(["tmax"]).tmax[1, 0, :31]).any()
    # partial seasons: scaled by 31 / 28, or null, or as they are
    np.testing.assert_allclose(cut.total_factor(["prcp"], "scale"), [[31 / 28, 1.0], [1.0, 1.0]])
    assert np.isnan(cut.total_factor(["prcp"], "null")[0, 0]) and cut.total_factor(["prcp"], "as_is") is None


def test_missing_temperature_counts_as_missing_day():
    daily = make_daily("2000-01-01", "2000-12-31")
    tmax = daily.tmax.copy()
    tmax[0, :40] = np.nan
    cut = _cut(with_values(daily, tmax=tmax), "year", max_missing_share=0.5)
    np.testing.assert_allclose(cut.present_share(["tmax", "tmin"]), [[(366 - 40) / 366]])
    np.testing.assert_allclose(cut.present_share(["prcp"]), [[1.0]])  # only the variables asked about count
    assert cut.complete(["tmax"]).all()


def test_gap_in_the_record_counts_as_missing_days():
    daily = make_daily("2000-01-01", "2001-12-31")
    keep = np.ones(daily.year.size, dtype=bool)
    keep[10:60] = False  # 50 days of 2000 absent from the record
    fields = {k: getattr(daily, k) for k in ("year", "month", "day", "dayofyear")}
    gapped = with_values(
        daily,
        **{k: v[keep] for k, v in fields.items()},
        tmax=daily.tmax[:, keep],
        tmin=daily.tmin[:, keep],
        prcp=daily.prcp[:, keep],
    )
    cut = _cut(gapped, "year")
    np.testing.assert_allclose(cut.present_share(["prcp"]), [[316 / 366, 1.0]])
    assert cut.complete(["prcp"]).tolist() == [[False, True]]


@pytest.mark.parametrize("variables", [("tmax", "tmin", "prcp"), ("tmin", "prcp"), ("prcp",)])
def test_days_present_of_every_variable_set_count_the_cube(variables):
    # the compiled count of the days with each combination of values (service/indicators/compiled.py) gives
    # what counting the cube's non-NaN days gives, for every set of the cut variables; float32 counts alike
    rng = np.random.default_rng(7)
    daily = make_daily("1999-01-01", "2002-12-31", n_features=5)
    values = {name: getattr(daily, name).copy() for name in ("tmax", "tmin", "prcp")}
    for array in values.values():
        array[rng.random(array.shape) < 0.3] = np.nan
    values["prcp"][1] = np.nan
    for dtype in (np.float64, np.float32):
        typed = with_values(daily, **{name: a.astype(dtype) for name, a in values.items()})
        cut = _cut(typed, MonthsSeason(months=[11, 12, 1, 2]), variables=variables)
        for k in range(1, 1 << len(variables)):
            subset = tuple(v for i, v in enumerate(variables) if k >> i & 1)
            present = np.logical_and.reduce([~np.isnan(getattr(cut.cube, v)) for v in subset])
            assert np.array_equal(cut.present_days(subset), present.sum(axis=-1)), (dtype, subset)
        if len(variables) < 3:
            with pytest.raises(RuntimeError, match="was not cut"):
                cut.present_days(("tmax", "tmin", "prcp"))


def test_feature_subset_and_float32_input():
    daily = make_daily("2000-01-01", "2001-12-31", n_features=3)
    prcp = (daily.prcp * np.arange(1, 4)[:, None]).astype(np.float32)
    cut = seasons.cut_season(
        with_values(daily, prcp=prcp), seasons.season_definition("year"), np.array([2, 0])
    )
    assert cut.cube.prcp.shape == (2, 2, 366)
    np.testing.assert_allclose(np.nansum(cut.cube.prcp, axis=-1), [[6 * 366, 6 * 365], [2 * 366, 2 * 365]])
    assert cut.cube.latitude.shape == (2,)


def test_unsorted_dates_are_refused():
    daily = make_daily("2000-01-01", "2000-12-31")
    flipped = with_values(
        daily, year=daily.year[::-1].copy(), month=daily.month[::-1].copy(), day=daily.day[::-1].copy()
    )
    with pytest.raises(StoreFormatError, match="not strictly increasing"):
        _cut(flipped, "year")


def test_unknown_calendar_is_refused():
    with pytest.raises(StoreFormatError, match="calendar 'lunar'"):
        seasons.calendar_dates(2000, 2001, "lunar")


@pytest.mark.parametrize(
    ("calendar", "expected"),
    [("standard", "standard"), ("noleap", "noleap"), ("360_day", "360_day")],
)
def test_calendar_inferred_from_dates(calendar, expected):
    d = make_daily("1999-06-01", "2001-03-01", calendar=calendar)
    assert seasons.infer_calendar(d.month, d.day, d.year) == expected


def test_property_seasons_group_features():
    props = [
        {"growing": [5, 6, 7]},
        {"growing": {"start": "11-01", "end": "04-30"}},
        {"growing": {"months": [5, 6, 7]}},
        {"growing": "year"},
    ]
    groups = seasons.season_groups(PropertySeason(property="growing"), ["a", "b", "c", "d"], props)
    assert [g.feature_index.tolist() for g in groups] == [[0, 2], [1], [3]]
    assert groups[1].season.crosses_new_year


@pytest.mark.parametrize(
    ("props", "match"),
    [
        ({}, "feature 'b' has no property 'growing'"),
        ({"growing": [5, 7]}, "feature 'b': property 'growing' = \\[5, 7\\] is not a valid season"),
        ({"growing": {"start": "13-01", "end": "01-01"}}, "feature 'b'.*not a month and day"),
        ({"growing": 7}, "feature 'b': property 'growing' = 7 is not a season"),
    ],
)
def test_property_season_errors_name_the_feature(props, match):
    with pytest.raises(FeatureError, match=match) as info:
        seasons.season_groups(PropertySeason(property="growing"), ["a", "b"], [{"growing": "year"}, props])
    assert info.value.feature_id == "b"


def test_calendar_inferred_all_leap_and_julian():
    lengths = (31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)
    month = np.tile(np.repeat(np.arange(1, 13), lengths), 3)
    day = np.tile(np.concatenate([np.arange(1, n + 1) for n in lengths]), 3)
    assert seasons.infer_calendar(month, day, np.repeat(np.arange(1981, 1984), 366)) == "all_leap"
    # 1900 has Feb 29 in the Julian calendar, not in the Gregorian one
    julian = seasons.calendar_dates(1899, 1901, "julian")
    assert seasons.infer_calendar(julian[1], julian[2], julian[0]) == "julian"
    assert julian[0].size == 365 + 366 + 365
