"""Plain season values on hand-made daily series, results worked out by hand."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from service.indicators import basic
from service.indicators.base import get_indicator

sys.path.insert(0, str(Path(__file__).parent))  # the folder's own helper module (importlib import mode)
from _support_cube import daily_series, fixed_baseline, season_cube  # noqa: E402


def _cube_one_week(prcp, tmax, tmin):
    """One feature, a season of the first 7 days of January 2001 (window 01-01..01-07) in 2000-2002."""
    n = 3 * 365 + 1
    p = np.zeros(n)
    tx = np.full(n, 20.0)
    tn = np.full(n, 10.0)
    # 2001-01-01 is day index 366 (2000 is a leap year)
    p[366:373], tx[366:373], tn[366:373] = prcp, tmax, tmin
    daily = daily_series(2000, 3, tmax=tx, tmin=tn, prcp=p)
    return season_cube(daily, window=("01-01", "01-07"))


def test_week_worked_by_hand():
    cube = _cube_one_week(
        prcp=[0.0, 1.0, 0.99, 12.0, np.nan, 3.0, 0.0],
        tmax=[20, 22, 24, 26, 28, np.nan, 30],
        tmin=[10, 10, 12, 12, 14, 14, np.nan],
    )
    base = fixed_baseline(cube, 2000, 2002)
    row = list(cube.years).index(2001)
    # Hand: prcp total skips the missing day: 0 + 1 + 0.99 + 12 + 3 + 0 = 16.99
    assert basic.prcp_total(cube, base, {})[0, row] == pytest.approx(16.99)
    # wet days (>= 1 mm, ETCCDI Zhang et al. 2011): 1.0, 12.0, 3.0 -> 3 (0.99 is dry)
    assert basic.wet_days(cube, base, {})[0, row] == 3
    # tmax mean over 6 valid days: (20+22+24+26+28+30)/6 = 25
    assert basic.tmax_mean(cube, base, {})[0, row] == pytest.approx(25.0)
    # tmin mean over 6 valid days: (10+10+12+12+14+14)/6 = 12
    assert basic.tmin_mean(cube, base, {})[0, row] == pytest.approx(12.0)
    # tmean and dtr over the 5 days with both: means 15,16,18,19,21 -> 17.8; ranges 10,12,12,14,14 -> 12.4
    assert basic.tmean(cube, base, {})[0, row] == pytest.approx(17.8)
    assert basic.dtr(cube, base, {})[0, row] == pytest.approx(12.4)


def test_season_without_data_is_nan_not_zero():
    cube = _cube_one_week(prcp=[np.nan] * 7, tmax=[np.nan] * 7, tmin=[np.nan] * 7)
    base = fixed_baseline(cube, 2000, 2002)
    row = list(cube.years).index(2001)
    for name in ("prcp_total", "wet_days", "tmean", "tmax_mean", "tmin_mean", "dtr"):
        value = get_indicator(name).compute(cube, base, {})
        assert value.shape == (1, cube.years.size)
        assert value.dtype == np.float64
        assert np.isnan(value[0, row]), name
        assert np.isfinite(np.delete(value[0], row)).all(), name


def test_padding_days_do_not_count_in_a_leap_year():
    # calendar-year seasons: 2000 has 366 days, 2001 has 365 and one padding day
    daily = daily_series(2000, 2, prcp=2.0, tmax=30.0, tmin=20.0)
    cube = season_cube(daily)
    base = fixed_baseline(cube, 2000, 2001)
    assert cube.in_season[1].sum() == 365 and cube.prcp.shape[-1] == 366
    np.testing.assert_allclose(basic.prcp_total(cube, base, {})[0], [732.0, 730.0])
    np.testing.assert_allclose(basic.wet_days(cube, base, {})[0], [366, 365])
    np.testing.assert_allclose(basic.tmean(cube, base, {})[0], [25.0, 25.0])


def test_vectorised_over_features_matches_one_by_one():
    rng = np.random.default_rng(3)
    n = 365 * 3 + 1
    daily = daily_series(
        2000,
        3,
        n_features=4,
        prcp=rng.gamma(0.5, 6.0, (4, n)),
        tmax=rng.normal(28, 3, (4, n)),
        tmin=rng.normal(16, 3, (4, n)),
    )
    cube = season_cube(daily, months=[5, 6, 7])
    base = fixed_baseline(cube, 2000, 2002)
    all_features = basic.prcp_total(cube, base, {})
    for f in range(4):
        one = season_cube(daily, months=[5, 6, 7], features=np.array([f]))
        np.testing.assert_allclose(basic.prcp_total(one, base, {})[0], all_features[f])
    # by hand: a May-July total is the sum of that feature's days with month in 5..7
    may_jul = np.isin(daily.month, [5, 6, 7]) & (daily.year == 2001)
    assert all_features[2, 1] == pytest.approx(daily.prcp[2, may_jul].sum())


@pytest.mark.parametrize(
    ("name", "unit", "family", "percent"),
    [
        ("prcp_total", "mm", "precipitation", True),
        ("wet_days", "days", "count", False),
        ("tmean", "degC", "temperature", False),
        ("tmax_mean", "degC", "temperature", False),
        ("tmin_mean", "degC", "temperature", False),
        ("dtr", "degC", "temperature", False),
    ],
)
def test_catalog_entries(name, unit, family, percent):
    entry = get_indicator(name)
    assert (entry.unit, entry.family, entry.percent_of_normal) == (unit, family, percent)
    assert entry.definition and entry.source and not entry.uses_baseline


def test_longest_run_cut_by_false_and_nan():
    x = np.array([[1, 1, 0, 1, 1, 1, np.nan, 1, 1, 1, 1]], dtype=float)
    assert basic.longest_run(x == 1).tolist() == [4]
    assert basic.longest_run(np.zeros((2, 3, 0), dtype=bool)).shape == (2, 3)
