"""ETCCDI indices over the season, percentile thresholds from the baseline, hot-dry days.

Definitions: Zhang et al. 2011, WIREs Climate Change 2:851, and Klein Tank et al. 2009, WMO WCDMP-No. 72
(CHECK-VALUES.md "ETCCDI core indices", [published]). Each test names the definition it holds.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from service.indicators import extremes
from service.indicators.base import get_indicator, values_of

sys.path.insert(0, str(Path(__file__).parent))  # the folder's own helper module (importlib import mode)
from _support_cube import daily_series, fixed_baseline, season_cube, trailing_baseline  # noqa: E402


def _run(name, cube, baseline, **params):
    entry = get_indicator(name)
    return values_of(entry.compute(cube, baseline, entry.resolve(params)))


def _ten_day_cube(prcp=0.0, tmax=20.0, tmin=10.0, before=None, after=None):
    """Season 03-01..03-10 of 2001 (one feature, 2000-2002); optional values on the days around it."""
    daily = daily_series(2000, 3)
    start = 366 + 59  # 2001-03-01 (2000 is a leap year)
    for field, value in (("prcp", prcp), ("tmax", tmax), ("tmin", tmin)):
        getattr(daily, field)[0, start : start + 10] = value
    if before is not None:
        daily.prcp[0, start - len(before) : start] = before
    if after is not None:
        daily.prcp[0, start + 10 : start + 10 + len(after)] = after
    cube = season_cube(daily, window=("03-01", "03-10"))
    row = list(cube.years).index(2001)
    return cube, fixed_baseline(cube, 2000, 2002), row


# --- spells: ETCCDI CDD (longest run RR < 1 mm) and CWD (longest run RR >= 1 mm), Zhang et al. 2011 -----------


def test_cdd_cwd_by_hand():
    cube, base, row = _ten_day_cube(prcp=[0, 0, 0.5, 1.0, 2.0, 0.9, 0, 3.0, 1.0, 1.0])
    # dry runs (< 1 mm): [0, 0, 0.5] = 3, [0.9, 0] = 2 -> CDD 3; wet runs (>= 1 mm): [1, 2] = 2, [3, 1, 1] = 3
    assert _run("cdd", cube, base)[0, row] == 3
    assert _run("cwd", cube, base)[0, row] == 3


def test_spells_are_cut_at_the_season_boundary():
    # our convention (extremes module docstring): only the season's days count. Twenty dry days before the
    # season and twenty wet days after it do not lengthen the spells that touch the edges.
    prcp = [0, 0, 0, 5, 5, 5, 5, 0, 5, 5]
    cube, base, row = _ten_day_cube(prcp=prcp, before=[0.0] * 20, after=[8.0] * 20)
    assert _run("cdd", cube, base)[0, row] == 3
    assert _run("cwd", cube, base)[0, row] == 4


def test_missing_day_ends_a_spell_and_is_not_counted():
    cube, base, row = _ten_day_cube(prcp=[0, 0, 0, np.nan, 0, 0, 5, 5, np.nan, 5])
    assert _run("cdd", cube, base)[0, row] == 3  # not 6: the gap is not guessed dry
    assert _run("cwd", cube, base)[0, row] == 2


def test_all_missing_season_is_nan():
    cube, base, row = _ten_day_cube(prcp=np.nan, tmax=np.nan, tmin=np.nan)
    for name in ("cdd", "cwd", "r10mm", "rx1day", "rx5day", "sdii", "su", "tr", "fd", "id", "txx", "tnn"):
        assert np.isnan(_run(name, cube, base)[0, row]), name


# --- counts with thresholds: R10mm, R20mm (RR >= 10, >= 20 mm); SU TX > 25, TR TN > 20, FD TN < 0, ID TX < 0 --


def test_heavy_precipitation_day_counts_include_the_threshold():
    cube, base, row = _ten_day_cube(prcp=[9.99, 10.0, 15, 19.99, 20.0, 45, 0, 0, np.nan, 1])
    assert _run("r10mm", cube, base)[0, row] == 5  # Zhang et al. 2011: RR >= 10 mm
    assert _run("r20mm", cube, base)[0, row] == 2  # RR >= 20 mm


def test_temperature_counts_use_strict_inequalities():
    # Zhang et al. 2011 / Klein Tank et al. 2009: SU TX > 25, ID TX < 0, TR TN > 20, FD TN < 0 (strict)
    tmax = [25.0, 25.01, 30, -0.01, 0.0, -5, 10, 10, np.nan, 26]
    tmin = [20.0, 20.01, 22, -0.01, 0.0, -9, 5, 5, 21, np.nan]
    cube, base, row = _ten_day_cube(tmax=tmax, tmin=tmin)
    assert _run("su", cube, base)[0, row] == 3  # 25.01, 30, 26
    assert _run("id", cube, base)[0, row] == 2  # -0.01, -5
    assert _run("tr", cube, base)[0, row] == 3  # 20.01, 22, 21
    assert _run("fd", cube, base)[0, row] == 2  # -0.01, -9
    assert _run("txx", cube, base)[0, row] == 30  # TXx: max TX
    assert _run("tnn", cube, base)[0, row] == -9  # TNn: min TN


# --- amounts: Rx1day, Rx5day, SDII (Zhang et al. 2011) -------------------------------------------------------------


def test_rx1day_rx5day_sdii_by_hand():
    prcp = [0, 2, 30, 0.5, 4, 6, 0, 1, 0, 12]
    cube, base, row = _ten_day_cube(prcp=prcp)
    assert _run("rx1day", cube, base)[0, row] == 30
    # five-day sums: days 1-5 36.5, 2-6 42.5, 3-7 40.5, 4-8 11.5, 5-9 11, 6-10 19 -> 42.5
    assert _run("rx5day", cube, base)[0, row] == pytest.approx(42.5)
    # SDII: wet days (>= 1 mm) 2, 30, 4, 6, 1, 12 -> 55 / 6
    assert _run("sdii", cube, base)[0, row] == pytest.approx(55 / 6)


def test_rx5day_windows_stay_inside_the_season_and_skip_gaps():
    # 100 mm on each of the four days before the season: windows reaching back there are not used
    prcp = [10, 0, 0, 0, 0, 3, 3, np.nan, 3, 3]
    cube, base, row = _ten_day_cube(prcp=prcp, before=[100.0] * 4, after=[100.0] * 4)
    # complete in-season windows: days 1-5 = 10, 2-6 = 3, 3-7 = 6; every later window holds the gap
    assert _run("rx5day", cube, base)[0, row] == pytest.approx(10.0)


def test_rx5day_nan_for_a_season_shorter_than_five_days():
    daily = daily_series(2000, 3, prcp=5.0)
    cube = season_cube(daily, window=("03-01", "03-04"))
    assert np.isnan(_run("rx5day", cube, fixed_baseline(cube, 2000, 2002))).all()


def test_sdii_without_wet_days_is_nan():
    cube, base, row = _ten_day_cube(prcp=0.5)
    assert np.isnan(_run("sdii", cube, base)[0, row])
    assert _run("cdd", cube, base)[0, row] == 10


# --- percentile thresholds -------------------------------------------------------------------------------------


def _reference_thresholds(cube, baseline, variable, q):
    """Thresholds by brute force: loops over features, target years and days, np.quantile type 8 pools."""
    daily = cube.daily
    record = getattr(daily, variable)
    out = np.full(cube.tmax.shape, np.nan)

    def same_day(m1, d1, m2, d2):
        if daily.calendar != "360_day" and m1 == 2 and m2 == 2 and d1 >= 28 and d2 >= 28:
            return True  # 28 and 29 February share one pool
        return m1 == m2 and d1 == d2

    for f, row_f in enumerate(cube.feature_index):
        for t in range(cube.years.size):
            seasons = np.flatnonzero(baseline.members[t])
            for j in np.flatnonzero(cube.in_season[t]):
                ti = cube.time_index[t, j]
                m, d = daily.month[ti], daily.day[ti]
                pool, contributing = [], set()
                for s in seasons:
                    for tc in cube.time_index[s][cube.in_season[s]]:
                        if same_day(daily.month[tc], daily.day[tc], m, d):
                            window = [
                                record[row_f, k] for k in range(tc - 2, tc + 3) if 0 <= k < record.shape[1]
                            ]
                            pool += window
                            if not np.isnan(window).all():
                                contributing.add(s)
                pool = np.array(pool)
                pool = pool[~np.isnan(pool)]
                if len(contributing) >= 3:  # a threshold needs three baseline seasons with data
                    out[f, t, j] = np.quantile(pool, q, method="median_unbiased")  # Hyndman & Fan type 8
    return out


@pytest.mark.parametrize(
    ("calendar", "window", "trailing"),
    [
        ("standard", ("02-20", "03-05"), None),  # crosses 29 February in leap years
        ("standard", ("12-25", "01-06"), 3),  # crosses the new year, moving normal
        ("360_day", ("02-25", "03-05"), None),
        ("noleap", ("05-01", "05-12"), 4),
    ],
)
def test_calendar_day_thresholds_match_brute_force(calendar, window, trailing):
    rng = np.random.default_rng(8)
    probe = daily_series(1990, 8, calendar=calendar)
    tmax = rng.normal(25, 4, (3, probe.year.size))
    tmax[1, rng.random(probe.year.size) < 0.05] = np.nan  # a few gaps in one community
    daily = daily_series(1990, 8, n_features=3, tmax=tmax, tmin=tmax - 10, calendar=calendar)
    cube = season_cube(daily, window=window)
    baseline = (
        trailing_baseline(cube, trailing) if trailing else fixed_baseline(cube, cube.years[0], cube.years[4])
    )
    got = extremes.calendar_day_thresholds(cube, baseline, "tmax", 0.9).on_season_days(cube)
    want = _reference_thresholds(cube, baseline, "tmax", 0.9)
    np.testing.assert_allclose(got, want, equal_nan=True)
    assert np.isfinite(got[:, -1][:, cube.in_season[-1]]).all()
    if trailing:
        assert np.isnan(got[:, :3]).all()  # fewer than three earlier seasons: no threshold


def test_quantile_type8_matches_numpy_median_unbiased():
    rng = np.random.default_rng(2)
    values = rng.normal(size=(50, 23))
    values[values > 1.5] = np.nan
    got = extremes.quantile_type8(values, 0.9)
    for i in range(50):
        row = values[i][~np.isnan(values[i])]
        assert got[i] == pytest.approx(np.quantile(row, 0.9, method="median_unbiased"))


@pytest.mark.parametrize("q", [0.5, 0.9, 0.95, 0.99])
def test_wet_day_threshold_equals_a_full_sort_of_each_baseline(q):
    rng = np.random.default_rng(int(q * 100))
    probe = daily_series(2000, 9)
    n = probe.year.size
    prcp = np.where(rng.random((4, n)) < 0.3, rng.gamma(0.8, 10.0, (4, n)), 0.0)
    prcp[1, rng.random(n) < 0.2] = np.nan
    prcp[2] = np.where(rng.random(n) < 0.02, 5.0, 0.0)  # few wet days, all tied
    cube = season_cube(daily_series(2000, 9, n_features=4, prcp=prcp), months=[6, 7, 8, 9])
    for base in (fixed_baseline(cube, 2000, 2004), trailing_baseline(cube, 4)):
        threshold, row_of_year = extremes.wet_day_threshold(cube, base, q)
        for t in range(cube.years.size):
            seasons = np.flatnonzero(base.members[t])
            for f in range(4):
                pool = cube.prcp[f, seasons].ravel()
                pool = pool[pool >= 1.0]
                got = threshold[f, row_of_year[t]]
                if seasons.size < 3 or pool.size < extremes.MIN_WET_DAYS:
                    assert np.isnan(got)
                else:  # numpy's median_unbiased is Hyndman & Fan type 8
                    assert got == pytest.approx(np.quantile(pool, q, method="median_unbiased"))


def test_tx90p_tn10p_by_hand():
    # Season March-May. Baseline 2000-2009: year k has TX = k and TN = -k on every day, so each calendar-day
    # pool is the values 0..9 (resp. 0..-9), five of each (50 values). Type 8 by hand: h = (50 + 1/3) 0.9 +
    # 1/3 = 45.633; x(45) = 8, x(46) = 9, so the 90th percentile is 8.633; likewise the 10th is -8.633.
    n_years = 12
    probe = daily_series(2000, n_years)
    k = (probe.year - 2000).astype(float)
    tmax, tmin = k.copy(), -k
    y2010, y2011 = probe.year == 2010, probe.year == 2011
    tmax[y2010], tmin[y2010] = 8.6, -8.6  # just inside both thresholds
    tmax[y2011] = np.where(probe.dayofyear[y2011] % 2 == 0, 8.7, 8.0)  # 46 of the 92 days (doy 60..151)
    tmin[y2011] = np.where(probe.dayofyear[y2011] < 80, -8.7, -5.0)  # doy 60..79: 20 days
    daily = daily_series(2000, n_years, tmax=tmax, tmin=tmin)
    cube = season_cube(daily, months=[3, 4, 5])
    base = fixed_baseline(cube, 2000, 2009)
    pool = np.repeat(np.arange(10.0), 5)
    assert np.quantile(pool, 0.9, method="median_unbiased") == pytest.approx(8 + 19 / 30)  # hand value
    threshold = extremes.calendar_day_thresholds(cube, base, "tmax", 0.9).on_season_days(cube)
    np.testing.assert_allclose(threshold[0, 11][cube.in_season[11]], 8 + 19 / 30)
    tx90p = _run("tx90p", cube, base)[0]
    tn10p = _run("tn10p", cube, base)[0]
    assert tx90p[10] == 0.0 and tn10p[10] == 0.0  # ETCCDI: TX > 90th, TN < 10th percentile
    assert tx90p[11] == pytest.approx(100 * 46 / 92)
    assert tn10p[11] == pytest.approx(100 * 20 / 92)
    # in-base years use the plain threshold (no bootstrap): 2009 (TX 9, TN -9) lies beyond it every day
    assert tx90p[9] == 100.0 and tn10p[9] == 100.0 and tx90p[8] == 0.0


def test_trailing_thresholds_follow_the_moving_normal():
    # a warming trend of 1 degC per year with tiny noise: against the 3 years before it, every day of a year
    # is warmer than the normal's 90th percentile; against a fixed early normal likewise, but a cooling
    # year after warm ones falls below a trailing normal and not below the fixed one.
    probe = daily_series(2000, 8)
    tmax = (probe.year - 2000) * 1.0 + np.random.default_rng(1).normal(0, 0.01, probe.year.size)
    tmax[probe.year == 2007] = 3.5
    daily = daily_series(2000, 8, tmax=tmax, tmin=tmax - 10)
    cube = season_cube(daily, months=[6, 7, 8])
    trailing = _run("tx90p", cube, trailing_baseline(cube, 3))[0]
    fixed = _run("tx90p", cube, fixed_baseline(cube, 2000, 2002))[0]
    assert np.isnan(trailing[:3]).all()
    np.testing.assert_allclose(trailing[3:7], 100.0)
    assert trailing[7] == 0.0 and fixed[7] == 100.0


def test_r95ptot_by_hand():
    # baseline 2000-2002: wet days (>= 1 mm) are the values 1..20 once each per year in March, all else dry;
    # pool = 1..20 three times (60 values); type 8 95th percentile of that pool is checked with numpy.
    probe = daily_series(2000, 4)
    prcp = np.zeros(probe.year.size)
    march = probe.month == 3
    for y in range(2000, 2003):
        days = np.flatnonzero(march & (probe.year == y))[:20]
        prcp[days] = np.arange(1.0, 21.0)
    days_2003 = np.flatnonzero(march & (probe.year == 2003))
    prcp[days_2003[:4]] = [19.5, 25.0, 40.0, 5.0]
    prcp[days_2003[4]] = 0.5
    daily = daily_series(2000, 4, prcp=prcp)
    cube = season_cube(daily, months=[3, 4])
    base = fixed_baseline(cube, 2000, 2002)
    pool = np.tile(np.arange(1.0, 21.0), 3)
    threshold = np.quantile(pool, 0.95, method="median_unbiased")  # 19.0 + 2/3 * 1 ... about 19.68
    assert 19.0 < threshold < 20.0
    value = _run("r95ptot", cube, base)[0]
    assert value[3] == pytest.approx(25.0 + 40.0)  # Zhang et al. 2011: sum of RR where RR > 95p
    assert value[0] == pytest.approx(20.0)  # in-base: the 20 mm day of each baseline year


@pytest.mark.parametrize("pool", ["year", "season"])
@pytest.mark.parametrize("prcp", [np.nan, 0.0])
def test_r95ptot_without_any_wet_day_is_null_not_an_error(pool, prcp):
    # a pool without a single wet day (all missing, as in a job's dry run, or all dry) has no threshold:
    # every value null (no_fit), where an IndexError was raised before
    daily = daily_series(2000, 4, prcp=np.full(daily_series(2000, 4).year.size, prcp))
    cube = season_cube(daily, months=[3, 4])
    entry = get_indicator("r95ptot")
    result = entry.compute(cube, fixed_baseline(cube, 2000, 2002), entry.resolve({"threshold_pool": pool}))
    assert np.isnan(values_of(result)).all()


def test_hotdry_days_and_spell_by_hand():
    # baseline 2000-2004 TX 30 with +-1 by day parity (90th percentile 31); in 2005 TX is 35 on days
    # 10-19 and 25-27, and it rains on day 15: hot-dry days 5 + 4 + 3 = 12, longest run days 10-14 = 5
    probe = daily_series(2000, 6)
    tmax = 30.0 + np.where(probe.dayofyear % 2 == 0, 1.0, -1.0)
    prcp = np.zeros(probe.year.size)
    in_2005 = np.flatnonzero(probe.year == 2005)
    tmax[in_2005] = 30.0
    tmax[in_2005[9:19]] = 35.0
    tmax[in_2005[24:27]] = 35.0
    prcp[in_2005[14]] = 3.0
    daily = daily_series(2000, 6, tmax=tmax, tmin=tmax - 12, prcp=prcp)
    cube = season_cube(daily)
    base = fixed_baseline(cube, 2000, 2004)
    threshold = extremes.calendar_day_thresholds(cube, base, "tmax", 0.9).on_season_days(cube)
    np.testing.assert_allclose(threshold[0, 5][cube.in_season[5]], 31.0)
    assert _run("hotdry_days", cube, base)[0, 5] == 12
    assert _run("hotdry_spell", cube, base)[0, 5] == 5  # days 10-14 (day 15 is wet) = 5; 16-19 = 4
    assert _run("hotdry_days", cube, base)[0, 2] == 0  # in-base: 31 is not above 31


def test_vectorised_over_features_equals_each_feature_alone():
    rng = np.random.default_rng(4)
    probe = daily_series(2000, 7)
    n = probe.year.size
    daily = daily_series(
        2000,
        7,
        n_features=5,
        tmax=rng.normal(28, 4, (5, n)),
        tmin=rng.normal(15, 4, (5, n)),
        prcp=np.where(rng.random((5, n)) < 0.4, rng.gamma(0.8, 9, (5, n)), 0.0),
    )
    cube = season_cube(daily, window=("11-01", "02-28"))
    base = trailing_baseline(cube, 3)
    names = ["cdd", "cwd", "rx5day", "sdii", "r95ptot", "tx90p", "tn10p", "hotdry_days", "hotdry_spell"]
    together = {name: _run(name, cube, base) for name in names}
    for f in (0, 3):
        alone = season_cube(daily, window=("11-01", "02-28"), features=np.array([f]))
        for name in names:
            np.testing.assert_allclose(_run(name, alone, base)[0], together[name][f], equal_nan=True)


@pytest.mark.parametrize(
    "name",
    [
        "cdd",
        "cwd",
        "r10mm",
        "r20mm",
        "rx1day",
        "rx5day",
        "sdii",
        "r95ptot",
        "su",
        "tr",
        "fd",
        "id",
        "txx",
        "tnn",
        "tx90p",
        "tn10p",
        "hotdry_days",
        "hotdry_spell",
    ],
)
def test_catalog_entries(name):
    entry = get_indicator(name)
    assert entry.unit and entry.definition and entry.source
    assert entry.family in ("precipitation", "temperature", "count")
    assert entry.uses_baseline == (name in ("r95ptot", "tx90p", "tn10p", "hotdry_days", "hotdry_spell"))


VALUE_INDICATORS = [
    "prcp_total",
    "wet_days",
    "tmean",
    "tmax_mean",
    "tmin_mean",
    "dtr",
    "gdd",
    "edd",
    "cdd",
    "cwd",
    "r10mm",
    "r20mm",
    "rx1day",
    "rx5day",
    "sdii",
    "r95ptot",
    "su",
    "tr",
    "fd",
    "id",
    "txx",
    "tnn",
    "tx90p",
    "tn10p",
    "hotdry_days",
    "hotdry_spell",
    "spi",
    "spei",
]


def test_float32_series_give_float64_values_close_to_float64_ones():
    import service.indicators.degree_days  # noqa: F401  (registers gdd, edd)
    import service.indicators.drought  # noqa: F401  (registers spi, spei)

    rng = np.random.default_rng(12)
    probe = daily_series(2000, 6)
    n = probe.year.size
    arrays = {
        "tmax": rng.normal(27, 5, (2, n)),
        "prcp": np.where(rng.random((2, n)) < 0.4, rng.gamma(0.8, 9, (2, n)), 0.0),
    }
    arrays["tmin"] = arrays["tmax"] - rng.uniform(6, 14, (2, n))
    arrays = {k: v.astype(np.float32).astype(np.float64) for k, v in arrays.items()}  # same values both ways
    wide = daily_series(2000, 6, n_features=2, latitude=[10.0, -25.0], **arrays)
    narrow = daily_series(2000, 6, n_features=2, latitude=[10.0, -25.0], **arrays)
    narrow = type(narrow)(**{**narrow.__dict__, **{k: v.astype(np.float32) for k, v in arrays.items()}})
    for name in VALUE_INDICATORS:
        cube64 = season_cube(wide, months=[4, 5, 6, 7])
        cube32 = season_cube(narrow, months=[4, 5, 6, 7])
        entry = get_indicator(name)
        v64 = values_of(entry.compute(cube64, fixed_baseline(cube64, 2000, 2004), entry.resolve({})))
        v32 = values_of(entry.compute(cube32, fixed_baseline(cube32, 2000, 2004), entry.resolve({})))
        assert v32.dtype == np.float64 and v32.shape == (2, 6), name
        np.testing.assert_allclose(v32, v64, rtol=1e-6, atol=1e-6, err_msg=name)


def test_threshold_cache_shares_one_pass_and_forgets_a_dead_cube():
    import dataclasses
    import gc

    daily = daily_series(2000, 4, tmax=np.arange(4 * 365 + 1, dtype=float) % 7)
    cube = season_cube(daily, months=[1, 2])
    base = fixed_baseline(cube, 2000, 2002)
    first = extremes.calendar_day_thresholds(cube, base, "tmax", 0.9)
    assert extremes.calendar_day_thresholds(cube, base, "tmax", 0.9) is first
    # another indicator's view of the same cut (other variables) shares the pass
    view = dataclasses.replace(cube, prcp=None)
    assert extremes.calendar_day_thresholds(view, base, "tmax", 0.9) is first
    assert extremes.calendar_day_thresholds(cube, base, "tmax", 0.5) is not first
    keys = [k for k in extremes._THRESHOLD_CACHE if k[0] == id(cube.time_index)]
    assert len(keys) == 2
    del cube, first, view
    gc.collect()
    assert not any(k in extremes._THRESHOLD_CACHE for k in keys)


# --- the in-base bootstrap of Zhang et al. (2005) ---------------------------------------------------------------


def _in_base_shares_by_the_papers_loop(daily, years, base_years, months, q):
    """Zhang et al. (2005, J. Climate 18:1641), section 3, written out plainly: for each base year j and each
    other base year i, the base period with year j replaced by year i gives calendar-day thresholds (the
    type 8 q-quantile of the 5-day windows centred on the day in every year of that block; Hyndman & Fan
    1996, numpy's "median_unbiased"); year j's exceedance rate is averaged over the n - 1 blocks. Returns
    {(feature, year): share %}. The season lies inside one year; 28 and 29 February share one pool (the
    windows centred on either day, in every year that has it)."""
    out = {}
    position = {
        (y, m, d): t for t, (y, m, d) in enumerate(zip(daily.year, daily.month, daily.day, strict=True))
    }
    values = daily.tmax if q > 0.5 else daily.tmin
    for f in range(values.shape[0]):
        for j in base_years:
            season_days = [(m, d) for (y, m, d) in position if y == j and m in months]
            shares = []
            for i in base_years:
                if i == j:
                    continue
                block = [b for b in base_years if b != j] + [i]
                hits = usable = 0
                for m, d in season_days:
                    pool = []
                    same = [(2, 28), (2, 29)] if (m, d) in ((2, 28), (2, 29)) else [(m, d)]
                    for b in block:
                        for centre in (position[(b, *md)] for md in same if (b, *md) in position):
                            pool.extend(values[f, centre - 2 : centre + 3])
                    pool = np.array(pool)
                    threshold = np.quantile(pool[~np.isnan(pool)], q, method="median_unbiased")
                    x = values[f, position[(j, m, d)]]
                    if np.isnan(x):
                        continue
                    usable += 1
                    hits += bool(x > threshold) if q > 0.5 else bool(x < threshold)
                shares.append(100.0 * hits / usable)
            out[(f, j)] = float(np.mean(shares))
    return out


@pytest.mark.parametrize(("name", "month"), [("tx90p", 6), ("tn10p", 6), ("tx90p", 2)])
def test_in_base_bootstrap_is_the_papers_procedure(name, month):
    rng = np.random.default_rng(2005)
    probe = daily_series(2000, 7, n_features=2)
    tmax = np.round(rng.normal(25.0, 3.0, probe.tmax.shape), 1)
    tmax[0, rng.choice(tmax.shape[1], 40, replace=False)] = np.nan  # missing days, some in the season
    daily = daily_series(2000, 7, tmax=tmax, tmin=tmax - 10.0, n_features=2)
    cube = season_cube(daily, months=[month])  # February: 2000 and 2004 have a 29th
    base = fixed_baseline(cube, 2000, 2004)
    q = 0.9 if name == "tx90p" else 0.1
    expected = _in_base_shares_by_the_papers_loop(daily, cube.years, range(2000, 2005), [month], q)
    plain = _run(name, cube, base)
    bootstrap = _run(name, cube, base, in_base="bootstrap")
    for (f, year), share in expected.items():
        assert bootstrap[f, year - 2000] == pytest.approx(share, abs=1e-9), (f, year)
    # years after the baseline keep the plain threshold; a trailing baseline has no in-base years
    np.testing.assert_array_equal(bootstrap[:, 5:], plain[:, 5:])
    assert not np.allclose(bootstrap[:, :5], plain[:, :5])
    trailing = trailing_baseline(cube, 3)
    np.testing.assert_array_equal(
        _run(name, cube, trailing, in_base="bootstrap"), _run(name, cube, trailing), strict=True
    )


def test_in_base_bootstrap_brings_the_baseline_years_to_the_nominal_rate():
    # stationary independent days (N(20, 3) degC), a 30-season baseline and 30 seasons after it, June-August:
    # the plain threshold makes the baseline's own years exceed it less often than later years (the
    # inhomogeneity Zhang et al. 2005 describe); the bootstrap brings them to about 10 %, like later years
    rng = np.random.default_rng(7)
    probe = daily_series(1961, 60, n_features=20)
    tmax = rng.normal(20.0, 3.0, probe.tmax.shape)
    daily = daily_series(1961, 60, tmax=tmax, tmin=tmax - 10.0, n_features=20)
    cube = season_cube(daily, months=[6, 7, 8])
    base = fixed_baseline(cube, 1961, 1990)
    plain = _run("tx90p", cube, base)
    bootstrap = _run("tx90p", cube, base, in_base="bootstrap")
    in_plain, in_bootstrap, out = plain[:, :30].mean(), bootstrap[:, :30].mean(), plain[:, 30:].mean()
    assert abs(in_bootstrap - 10.0) < 0.4 and abs(in_bootstrap - out) < 0.3
    assert in_bootstrap > in_plain + 0.1  # paired on the same years: 10.21 against 10.01 with this seed


def test_in_base_bootstrap_on_the_shortest_baseline():
    # three baseline seasons (the fewest a threshold is taken from): each block is two years and one of them
    # again, so every in-base year still gets a value, that of the procedure
    rng = np.random.default_rng(3)
    probe = daily_series(2000, 5)
    tmax = np.round(rng.normal(25.0, 3.0, probe.tmax.shape), 1)
    daily = daily_series(2000, 5, tmax=tmax, tmin=tmax - 10.0)
    cube = season_cube(daily, months=[7])
    expected = _in_base_shares_by_the_papers_loop(daily, cube.years, range(2000, 2003), [7], 0.9)
    bootstrap = _run("tx90p", cube, fixed_baseline(cube, 2000, 2002), in_base="bootstrap")[0]
    np.testing.assert_allclose(bootstrap[:3], [expected[(0, y)] for y in range(2000, 2003)], atol=1e-9)
    assert np.isfinite(bootstrap).all()
