"""ETCCDI extremes indices over the season, percentile indices with baseline thresholds, and hot-dry days.

Definitions follow the ETCCDI core indices (Zhang et al. 2011, WIREs Climate Change 2:851; Klein Tank et
al. 2009, WMO WCDMP-No. 72): a wet day has RR >= 1 mm; FD, ID, SU and TR use strict inequalities.
Every index is computed over the days of the season only, on (feature, year, day) arrays, and returns a
(feature, year) float64 array; a season-year with no valid day of the variables it needs gives NaN.

Conventions this module chooses (no published definition settles them; they are tested):

* Spells (``cdd``, ``cwd``, ``hotdry_spell``) are counted within the season only: a dry spell that began
  before the season's first day counts only its days inside the season, one running past the last day is
  cut there. A missing day ends a spell (a gap is never guessed to be dry or wet).
* ``rx5day`` uses only windows of five consecutive days that all lie inside the season and all have data;
  a window that would reach before the first or after the last day of the season is not used. A season
  with no such window (shorter than five days, or gaps everywhere) gives NaN.
* Percentile thresholds (``tx90p``, ``tn10p``, ``hotdry_*``) are calendar-day percentiles from the baseline:
  for each calendar day, the pool is every baseline season-year's value on that calendar day and the two
  days either side (a 5-day window centred on the day, taken from the full daily record, so windows reach
  across the season's edges and the new year). 28 and 29 February share one pool and threshold. The
  quantile is Hyndman & Fan type 8 (numpy ``method="median_unbiased"``), the estimator used by ETCCDI
  software (from memory). A calendar day whose pool holds values from fewer than three baseline
  season-years (a short trailing window with gaps, the first years of the record) has no threshold: NaN.
* In-base years use the plain threshold by default. So for a fixed baseline, values of ``tx90p``, ``tn10p``
  and ``hotdry_*`` in the baseline's own years are biased low against those of later years (Zhang et al.
  2005, J. Climate 18:1641). ``tx90p`` and ``tn10p`` offer that paper's bootstrap as the parameter
  ``in_base`` = "bootstrap" (see :func:`bootstrap_in_base_shares`): it costs one threshold per left-out
  and resampled year (n (n - 1) for n baseline seasons), so it is meant for batch use. A trailing baseline
  holds only the season-years before each season-year, so the question does not arise there.
* ``r95ptot`` takes its threshold from the wet days (RR >= 1 mm) of the baseline season-years (the same
  season's days, not whole years), at least 20 of them from at least three baseline season-years (fewer
  make the 95th percentile little more than the largest value); the index is the season's sum of RR on days with
  RR above it (mm), as in Zhang et al. 2011.
"""

from __future__ import annotations

import weakref
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from service.indicators.base import (
    Baseline,
    Family,
    Indicator,
    IndicatorValues,
    Parameter,
    Reduction,
    SeasonCube,
    register,
)
from service.indicators.basic import (
    WET_DAY_MM,
    Scratch,
    count_days,
    longest_run,
    null_where_empty,
    null_where_no_days,
    reduce_in_blocks,
    reduce_rows,
)

WINDOW_HALF_WIDTH = 2  # days either side of the calendar day in a percentile pool (5-day window)
MIN_WET_DAYS = 20  # fewest baseline wet days a wet-day percentile (r95ptot) is taken from
MIN_BASELINE_SEASONS = 3  # a baseline needs at least three season-years (issue 4)
_LEAP_YEAR_MONTHS = np.array([31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31])


# --- helpers ------------------------------------------------------------------------------------------------


def calendar_day_key(month: np.ndarray, day: np.ndarray, calendar: str) -> np.ndarray:
    """0-based calendar-day number shared by all years: 0..359 (360_day) or 0..365 (29 Feb is 59, 1 Mar 60)."""
    month = np.asarray(month)
    day = np.asarray(day)
    if calendar.lower() == "360_day":
        return (month - 1) * 30 + (day - 1)
    start = np.concatenate([[0], np.cumsum(_LEAP_YEAR_MONTHS)[:-1]])
    return start[month - 1] + day - 1


_FEB_28, _FEB_29 = 58, 59  # keys of 28 and 29 February outside the 360-day calendar


def quantile_type8(
    values: np.ndarray, q: float, min_count: int = 1, *, overwrite: bool = False
) -> np.ndarray:
    """The q-quantile along the last axis by Hyndman & Fan type 8, skipping NaN (NaN if < min_count values).

    Vectorised: one sort of the rows (NaN last), then per row the two order statistics around
    h = (n + 1/3) q + 1/3, linearly interpolated (numpy's ``method="median_unbiased"``). With
    ``overwrite`` a C-contiguous ``values`` is sorted in place.
    """
    lead = values.shape[:-1]
    rows = values.reshape(-1, values.shape[-1])  # a 2-D sort is much faster than an n-D one
    if rows.shape[-1] == 0:
        return np.full(lead, np.nan)
    n = np.count_nonzero(~np.isnan(rows), axis=-1)
    if overwrite:  # the caller's scratch array: sort it in place, saving one copy of the pool
        rows.sort(axis=-1)
        ordered = rows
    else:
        ordered = np.sort(rows, axis=-1)
    top = np.maximum(n, 1)
    h = np.clip((n + 1.0 / 3.0) * q + 1.0 / 3.0, 1.0, top.astype(np.float64))
    low = np.floor(h).astype(np.int64)
    frac = h - low
    high = np.minimum(low + 1, top)
    x_low = np.take_along_axis(ordered, (low - 1)[:, None], axis=-1)[:, 0]
    x_high = np.take_along_axis(ordered, (high - 1)[:, None], axis=-1)[:, 0]
    with np.errstate(invalid="ignore"):
        out = np.where(frac > 0, x_low + frac * (x_high - x_low), x_low)
    return np.where(n >= max(min_count, 1), out, np.nan).reshape(lead)


def _baseline_rows(baseline: Baseline) -> tuple[np.ndarray, np.ndarray]:
    """Distinct baseline rows (row, year) and for each season-year the row it uses."""
    members = np.asarray(baseline.members, dtype=bool)
    if baseline.fixed:
        return members[:1], np.zeros(members.shape[0], dtype=np.int64)
    rows, inverse = np.unique(members, axis=0, return_inverse=True)
    return rows, inverse.reshape(-1)


@dataclass(frozen=True)
class CalendarDayThresholds:
    """Calendar-day percentile thresholds: ``values[feature, row, key]`` and each season-year's row."""

    values: np.ndarray  # (feature, row, key) in the variable's unit, NaN where not computable
    row_of_year: np.ndarray  # (year,) index into the row axis

    def on_season_days(self, cube: SeasonCube) -> np.ndarray:
        """The threshold of each (feature, year, day) of ``cube``; NaN on padding days."""
        key = _season_day_keys(cube)
        n_feature, n_row, n_key = self.values.shape
        flat = self.row_of_year[:, None] * n_key + np.maximum(key, 0)
        out = np.take(self.values.reshape(n_feature, n_row * n_key), flat, axis=1)
        out[:, key < 0] = np.nan
        return out

    def on_rows(self, rows: np.ndarray, key: np.ndarray) -> np.ndarray:
        """Thresholds of flat season-year rows (feature * n_year + year), (rows, day); NaN on padding.

        ``key`` is the cube's (year, day) calendar-day keys, -1 on padding (see :func:`_season_day_keys`).
        """
        n_feature, n_row, n_key = self.values.shape
        n_year = key.shape[0]
        feature, year = np.divmod(rows, n_year)
        column = self.row_of_year[year][:, None] * n_key + np.maximum(key[year], 0)
        out = self.values.reshape(n_feature, n_row * n_key)[feature[:, None], column]
        out[key[year] < 0] = np.nan
        return out


def _season_day_keys(cube: SeasonCube) -> np.ndarray:
    """Calendar-day key of every (year, day) of the cube, -1 on padding."""
    daily = cube.daily
    all_keys = calendar_day_key(daily.month, daily.day, daily.calendar)
    safe = np.maximum(cube.time_index, 0)
    return np.where(cube.in_season, all_keys[safe], -1)


# Thresholds of live cuts, so that tx90p, hotdry_days and hotdry_spell on one cut share one pass. Entries
# hold weak references only and disappear with their cut or baseline (no request's data outlives it here).
_THRESHOLD_CACHE: dict[
    tuple[int, int, str, float], tuple[weakref.ref, weakref.ref, CalendarDayThresholds]
] = {}
_POOL_ELEMENTS = 1 << 20  # values per feature block of the percentile pools (8 MB of float64)


def _window_times(cube: SeasonCube, years: np.ndarray, n_keys: int) -> tuple[np.ndarray, np.ndarray]:
    """Daily-record positions of every 5-day window, (key, year, offset), and where a position is unusable."""
    daily = cube.daily
    n_time = daily.year.size
    all_keys = calendar_day_key(daily.month, daily.day, daily.calendar)
    centre = np.full((n_keys, years.size), -1, dtype=np.int64)
    year_pos, day_pos = np.nonzero(cube.in_season[years])
    times = cube.time_index[years][year_pos, day_pos]
    centre[all_keys[times], year_pos] = times
    offsets = np.arange(-WINDOW_HALF_WIDTH, WINDOW_HALF_WIDTH + 1)
    window = centre[..., None] + offsets
    unusable = (centre[..., None] < 0) | (window < 0) | (window >= n_time)
    return np.clip(window, 0, n_time - 1), unusable


def calendar_day_thresholds(
    cube: SeasonCube, baseline: Baseline, variable: str, q: float
) -> CalendarDayThresholds:
    """Calendar-day ``q``-percentile of ``variable`` ("tmax" or "tmin", degC) over each baseline (5-day pool).

    For each distinct baseline row (one for a fixed baseline, one per season-year for a trailing one) the
    pool of a calendar day holds, for every baseline season-year, the daily-record values on that season's
    day with that calendar day and on the two days either side; 28 and 29 February share one pool.
    Vectorised over features (in blocks that bound memory) and days; one sort per baseline row. The last
    results are cached while the cube lives, so ``tx90p``, ``hotdry_days`` and ``hotdry_spell`` on one cube
    share the work.
    """
    # the views of one cut (each indicator's cube, see SeasonCut.cube_for) share their time_index array
    anchor = cube.time_index
    cache_key = (id(anchor), id(baseline), variable, q)
    entry = _THRESHOLD_CACHE.get(cache_key)
    if entry is not None and entry[0]() is anchor and entry[1]() is baseline:
        return entry[2]
    daily = cube.daily
    record = getattr(daily, variable)
    leap_calendar = daily.calendar.lower() != "360_day"
    n_keys = 366 if leap_calendar else 360
    rows, row_of_year = _baseline_rows(baseline)
    used_years = np.flatnonzero(rows.any(axis=0))
    window, unusable = _window_times(cube, used_years, n_keys)
    n_feature = cube.feature_index.size
    values = np.full((n_feature, rows.shape[0], n_keys), np.nan)
    members = [np.searchsorted(used_years, np.flatnonzero(row)) for row in rows]
    block = max(1, _POOL_ELEMENTS // max(window.size, 1))
    scratch: dict[int, np.ndarray] = {}
    for start in range(0, n_feature, block):
        features = cube.feature_index[start : start + block]
        pools = np.take(np.take(record, features, axis=0), window, axis=1)  # (feature, key, year, offset)
        pools[:, unusable] = np.nan
        # seasons contributing at least one value to each calendar day's pool, cumulated over the years
        has_data = (~np.isnan(pools)).any(axis=-1)
        seasons_so_far = np.concatenate(
            [
                np.zeros(has_data.shape[:2] + (1,), dtype=np.int32),
                np.cumsum(has_data, axis=-1, dtype=np.int32),
            ],
            axis=-1,
        )
        for r, member in enumerate(members):
            if member.size < MIN_BASELINE_SEASONS:
                continue
            contiguous = member[-1] - member[0] + 1 == member.size  # always so for fixed and trailing
            if contiguous:
                chosen = pools[:, :, member[0] : member[-1] + 1]
                seasons_with_data = seasons_so_far[..., member[-1] + 1] - seasons_so_far[..., member[0]]
            else:
                chosen = pools[:, :, member]
                seasons_with_data = np.count_nonzero(has_data[:, :, member], axis=-1)
            buffer = scratch.get(member.size)
            if buffer is None or buffer.shape != chosen.shape:  # one scratch pool per size, reused
                buffer = scratch[member.size] = np.empty(chosen.shape, dtype=chosen.dtype)
            np.copyto(buffer, chosen)
            pool = buffer.reshape(features.size, n_keys, -1)
            february = (
                np.concatenate([pool[:, _FEB_28], pool[:, _FEB_29]], axis=-1) if leap_calendar else None
            )
            out = quantile_type8(pool, q, overwrite=True)
            if february is not None:
                out[:, _FEB_28] = out[:, _FEB_29] = quantile_type8(february, q, overwrite=True)
                seasons_with_data[:, _FEB_29] = seasons_with_data[:, _FEB_28]
            out[seasons_with_data < MIN_BASELINE_SEASONS] = np.nan
            values[start : start + features.size, r, :] = out
    result = CalendarDayThresholds(values=values, row_of_year=row_of_year)

    def forget(_: weakref.ref) -> None:
        _THRESHOLD_CACHE.pop(cache_key, None)

    _THRESHOLD_CACHE[cache_key] = (weakref.ref(anchor, forget), weakref.ref(baseline, forget), result)
    return result


def _percent_of_days(condition: np.ndarray, usable: np.ndarray) -> np.ndarray:
    """Share (%) of usable days on which ``condition`` holds, per row; NaN with no usable day."""
    n = np.count_nonzero(usable, axis=-1)
    hits = np.count_nonzero(condition & usable, axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, 100.0 * hits / np.maximum(n, 1), np.nan)


# --- precipitation indices ------------------------------------------------------------------------------------


def _longest_spell(values: np.ndarray, wet: bool) -> np.ndarray:
    """Longest run of dry (wet=False) or wet days along the last axis (days); NaN with no valid day."""
    condition = values >= WET_DAY_MM if wet else values < WET_DAY_MM
    return null_where_empty(longest_run(condition).astype(np.float64), values)


def _season_longest_spell(cube: SeasonCube, wet: bool) -> np.ndarray:
    """:func:`_longest_spell` over the cube's precipitation, in blocks of scratch memory."""

    def block(scratch: Scratch, prcp: np.ndarray) -> np.ndarray:
        condition = scratch.get("condition", prcp.shape, bool)
        (np.greater_equal if wet else np.less)(prcp, WET_DAY_MM, out=condition)
        return longest_run(condition)

    return null_where_no_days(reduce_rows(block, cube.prcp), cube.days_with(("prcp",)))


def cdd(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Longest run of dry days (RR < 1 mm) within the season (days); a missing day ends a run."""
    return _season_longest_spell(cube, wet=False)


def cwd(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Longest run of wet days (RR >= 1 mm) within the season (days); a missing day ends a run."""
    return _season_longest_spell(cube, wet=True)


def r10mm(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Number of days with RR >= 10 mm in the season (days)."""
    return reduce_in_blocks(lambda prcp: count_days(prcp >= 10.0, prcp), cube.prcp)


def r20mm(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Number of days with RR >= 20 mm in the season (days)."""
    return reduce_in_blocks(lambda prcp: count_days(prcp >= 20.0, prcp), cube.prcp)


def rx1day(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Largest one-day precipitation of the season (mm); missing days skipped."""
    return np.fmax.reduce(cube.prcp, axis=-1).astype(np.float64)


def largest_five_day_total(prcp: np.ndarray) -> np.ndarray:
    """Largest sum of five consecutive days along the last axis, windows with a NaN day skipped (mm)."""
    n_day = prcp.shape[-1]
    if n_day < 5:
        return np.full(prcp.shape[:-1], np.nan)
    missing = np.isnan(prcp)
    total = np.cumsum(np.where(missing, 0.0, prcp), axis=-1, dtype=np.float64)
    gaps = np.cumsum(missing, axis=-1, dtype=np.int32)
    window = total[..., 4:].copy()
    window[..., 1:] -= total[..., :-5]
    gap_count = gaps[..., 4:].copy()
    gap_count[..., 1:] -= gaps[..., :-5]
    window[gap_count > 0] = np.nan
    return np.fmax.reduce(window, axis=-1)


def rx5day(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Largest precipitation sum over five consecutive season days, all with data (mm); NaN if no window.

    Windows that reach outside the season (padding is NaN) or contain a missing day are not used.
    """
    return reduce_in_blocks(largest_five_day_total, cube.prcp)


def _wet_day_intensity(prcp: np.ndarray) -> np.ndarray:
    """Wet-day (>= 1 mm) precipitation over the number of wet days, along the last axis (mm/day)."""
    wet = prcp >= WET_DAY_MM
    n_wet = np.count_nonzero(wet, axis=-1)
    amount = np.sum(np.where(wet, prcp, 0.0), axis=-1, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n_wet > 0, amount / np.maximum(n_wet, 1), np.nan)


def sdii(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Simple daily intensity: precipitation of wet days divided by their number (mm/day); NaN if none wet."""
    return reduce_in_blocks(_wet_day_intensity, cube.prcp)


def _top_quantile(pool: np.ndarray, rows: np.ndarray, q: float) -> np.ndarray:
    """The ``q``-quantile (q >= 0.5) of the wet days (RR >= 1 mm) of ``pool`` over each membership row.

    ``pool`` is (feature, period, day) precipitation (mm/day, NaN missing); ``rows`` (row, period) says which
    periods (season-years, or calendar years) each row pools. Type 8 quantile; NaN with fewer than
    MIN_WET_DAYS wet days or fewer than three periods with data. A high quantile needs only the largest few
    values of the pool, and the largest K values of a union of periods are among each period's own largest
    K: so each period's wet days are sorted once, and each row sorts only the union of its periods' top K
    (one small sort per row, vectorised over features). Returns (feature, row).
    """
    n_feature, n_period, n_day = pool.shape
    out = np.full((n_feature, rows.shape[0]), np.nan)
    wet = np.where(pool >= WET_DAY_MM, pool, np.nan)
    wet_count = np.count_nonzero(~np.isnan(wet), axis=-1)  # (feature, period)
    has_data = (~np.isnan(pool)).any(axis=-1)  # (feature, period)
    usable_rows = [(r, np.flatnonzero(row)) for r, row in enumerate(rows)]
    usable_rows = [(r, periods) for r, periods in usable_rows if periods.size >= MIN_BASELINE_SEASONS]
    if not usable_rows or n_day == 0:
        return out
    # how deep from the top each row's quantile reaches: ranks floor(h) and floor(h) + 1 of n values
    pooled = np.stack([wet_count[:, periods].sum(axis=-1) for _, periods in usable_rows], axis=1)
    h = np.clip((pooled + 1.0 / 3.0) * q + 1.0 / 3.0, 1.0, np.maximum(pooled, 1).astype(np.float64))
    # at least 1: with no wet day anywhere (a dry pool, or no data) every value is NaN below, not an error
    depth = min(n_day, max(1, int((pooled - np.floor(h)).max()) + 1))
    # each period's wet days, largest first (NaN last), cut to the deepest rank any row needs
    largest = -np.sort(-wet.reshape(-1, n_day), axis=-1)[:, :depth].reshape(n_feature, n_period, depth)
    for column, (r, periods) in enumerate(usable_rows):
        n = pooled[:, column]
        top = np.maximum(n, 1)
        h_row = h[:, column]
        low = np.floor(h_row).astype(np.int64)
        frac = h_row - low
        high = np.minimum(low + 1, top)
        union = -np.sort(-largest[:, periods].reshape(n_feature, -1), axis=-1)  # largest first, NaN last
        # ascending rank j of n values is rank n - j + 1 from the top, index n - j
        at_low = np.clip(n - low, 0, union.shape[-1] - 1)
        at_high = np.clip(n - high, 0, union.shape[-1] - 1)
        x_low = np.take_along_axis(union, at_low[:, None], axis=-1)[:, 0]
        x_high = np.take_along_axis(union, at_high[:, None], axis=-1)[:, 0]
        with np.errstate(invalid="ignore"):
            value = np.where(frac > 0, x_low + frac * (x_high - x_low), x_low)
        enough = (n >= MIN_WET_DAYS) & (has_data[:, periods].sum(axis=-1) >= MIN_BASELINE_SEASONS)
        out[:, r] = np.where(enough, value, np.nan)
    return out


def calendar_years_pool(cube: SeasonCube) -> tuple[np.ndarray, np.ndarray]:
    """Precipitation of whole calendar years from the daily record: (feature, year, 366) mm/day, and the years."""
    daily = cube.daily
    if daily.prcp is None:
        raise RuntimeError("the daily series holds no precipitation")
    years, year_row = np.unique(daily.year, return_inverse=True)
    pool = np.full((cube.feature_index.size, years.size, 366), np.nan)
    pool[:, year_row, daily.dayofyear - 1] = daily.prcp[cube.feature_index]
    return pool, years


def wet_day_threshold(
    cube: SeasonCube, baseline: Baseline, q: float, pool: str = "season"
) -> tuple[np.ndarray, np.ndarray]:
    """The ``q``-percentile of baseline wet-day RR (mm) per (feature, baseline row), and each year's row.

    ``pool`` "season": the wet days of the baseline season-years' own seasons (the cube's days). "year":
    the wet days of the whole calendar years numbered like the baseline season-years, from the daily record
    (ETCCDI's base-period pool, Zhang et al. 2011). See :func:`_top_quantile` for the estimator.
    """
    rows, row_of_year = _baseline_rows(baseline)
    if cube.prcp is None:
        raise RuntimeError("r95ptot needs precipitation in its cube")
    if pool == "season":
        return _top_quantile(cube.prcp, rows, q), row_of_year
    annual, calendar_years = calendar_years_pool(cube)
    # calendar-year membership of each row: the calendar years that carry a baseline season-year's number
    position = np.searchsorted(cube.years, calendar_years)
    known = (position < cube.years.size) & (
        cube.years[np.minimum(position, cube.years.size - 1)] == calendar_years
    )
    annual_rows = np.zeros((rows.shape[0], calendar_years.size), dtype=bool)
    annual_rows[:, known] = rows[:, position[known]]
    return _top_quantile(annual, annual_rows, q), row_of_year


R95_POOLS = ("year", "season")


def r95ptot(cube: SeasonCube, baseline: Baseline, params: Mapping[str, object]) -> IndicatorValues:
    """Season precipitation on days with RR above the baseline wet-day 95th percentile (mm), with flags.

    ``params["threshold_pool"]``: "year" (ETCCDI: the base period's wet days of whole years) or "season"
    (the baseline seasons' wet days). no_fit flags a season with data but no threshold.
    """
    threshold, row_of_year = wet_day_threshold(cube, baseline, 0.95, str(params["threshold_pool"]))
    per_row = threshold[:, row_of_year].reshape(-1)  # flat (feature * n_year + year)

    def very_wet_total(rows: np.ndarray, prcp: np.ndarray) -> np.ndarray:
        limit = per_row[rows][:, None]
        very_wet = (prcp >= WET_DAY_MM) & (prcp > limit)
        value = np.sum(np.where(very_wet, prcp, 0.0), axis=-1, dtype=np.float64)
        return null_where_empty(np.where(np.isnan(limit[:, 0]), np.nan, value), prcp)

    values = reduce_in_blocks(very_wet_total, cube.prcp, pass_rows=True)
    has_data = (~np.isnan(cube.prcp)).any(axis=-1)
    return IndicatorValues(values, {"no_fit": has_data & np.isnan(threshold[:, row_of_year])})


# --- temperature indices ------------------------------------------------------------------------------------


def su(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Summer days: number of days with TX > 25 degC (days)."""
    return reduce_in_blocks(lambda tmax: count_days(tmax > 25.0, tmax), cube.tmax)


def tr(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Tropical nights: number of days with TN > 20 degC (days)."""
    return reduce_in_blocks(lambda tmin: count_days(tmin > 20.0, tmin), cube.tmin)


def fd(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Frost days: number of days with TN < 0 degC (days)."""
    return reduce_in_blocks(lambda tmin: count_days(tmin < 0.0, tmin), cube.tmin)


def icing_days(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Icing days (ETCCDI ID): number of days with TX < 0 degC (days)."""
    return reduce_in_blocks(lambda tmax: count_days(tmax < 0.0, tmax), cube.tmax)


def txx(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Highest daily maximum temperature of the season (degC)."""
    return np.fmax.reduce(cube.tmax, axis=-1).astype(np.float64)


def tnn(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Lowest daily minimum temperature of the season (degC)."""
    return np.fmin.reduce(cube.tmin, axis=-1).astype(np.float64)


def _exceedance_share(cube: SeasonCube, baseline: Baseline, variable: str, q: float) -> IndicatorValues:
    """Share (%) of season days with ``variable`` beyond its calendar-day ``q`` threshold (above for q > 0.5).

    no_fit flags a season with data on none of whose days a threshold exists.
    """
    thresholds = calendar_day_thresholds(cube, baseline, variable, q)
    key = _season_day_keys(cube)

    def share(rows: np.ndarray, values: np.ndarray) -> np.ndarray:
        threshold = thresholds.on_rows(rows, key)
        usable = ~np.isnan(values) & ~np.isnan(threshold)
        beyond = values > threshold if q > 0.5 else values < threshold
        return _percent_of_days(beyond, usable)

    values = getattr(cube, variable)
    result = reduce_in_blocks(share, values, pass_rows=True)
    has_data = (~np.isnan(values)).any(axis=-1)
    return IndicatorValues(result, {"no_fit": has_data & np.isnan(result)})


IN_BASE_CHOICES = ("plain", "bootstrap")


def _two_order_statistics(x: np.ndarray, y: np.ndarray, k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The k-th and (k + 1)-th smallest (1-based) of the union of the rows of two ascending arrays.

    ``x`` (..., m), ``y`` (..., p) with p small, missing values as +inf; ``k`` (...) int, k >= 1. The r
    smallest of the union take t values from ``y`` and r - t from ``x`` for some t; every such split is a set
    of r values, so its largest is at least the r-th smallest, with equality at the true split: the r-th
    smallest is the least over t = 0..p of max(x[r - t - 1], y[t - 1]). One gather of the p + 2 values of
    ``x`` both ranks need, instead of a sort of the union.
    """
    m, p = x.shape[-1], y.shape[-1]
    at = k[..., None] + np.arange(-1 - p, 1)  # x positions k - 1 - p .. k
    near = np.take_along_axis(x, np.clip(at, 0, m - 1), axis=-1)
    near = np.where(at < 0, -np.inf, np.where(at >= m, np.inf, near))
    from_y = np.concatenate([np.full(k.shape + (1,), -np.inf), y], axis=-1)  # y[t - 1], t = 0..p
    kth = np.min(np.maximum(near[..., p::-1], from_y), axis=-1)  # x[k - 1 - t]
    next_one = np.min(np.maximum(near[..., :0:-1], from_y), axis=-1)  # x[k - t]
    return kth, next_one


def _resampled_thresholds(ordered: np.ndarray, has_data: np.ndarray, left_out: int, q: float) -> np.ndarray:
    """Type 8 ``q``-quantiles of the pools with year ``left_out`` replaced by each other year in turn.

    ``ordered`` (feature, key, year, offset): the baseline years' pool values, each year's sorted, missing
    as +inf; ``has_data`` (feature, key, year). Returns (feature, year - 1, key): for each other year i (in
    order), the quantile of the block whose year ``left_out`` is year i again (Zhang et al. 2005); NaN where
    the block holds values from fewer than three baseline years.
    """
    n_feature, n_key, n_year, _ = ordered.shape
    others = [y for y in range(n_year) if y != left_out]
    rest = np.sort(ordered[:, :, others].reshape(n_feature, n_key, -1), axis=-1)
    rest_count = np.count_nonzero(np.isfinite(rest), axis=-1)
    year_count = np.count_nonzero(np.isfinite(ordered), axis=-1)  # (feature, key, year)
    rest_seasons = np.count_nonzero(has_data[:, :, others], axis=-1)
    out = np.full((n_feature, len(others), n_key), np.nan)
    for column, i in enumerate(others):
        n = rest_count + year_count[:, :, i]
        top = np.maximum(n, 1)
        h = np.clip((n + 1.0 / 3.0) * q + 1.0 / 3.0, 1.0, top.astype(np.float64))
        low = np.floor(h).astype(np.int64)
        frac = h - low
        x_low, x_high = _two_order_statistics(rest, ordered[:, :, i], low)
        with np.errstate(invalid="ignore"):
            value = np.where(frac > 0, x_low + frac * (x_high - x_low), x_low)
        enough = (n > 0) & (rest_seasons + has_data[:, :, i] >= MIN_BASELINE_SEASONS)
        out[:, column] = np.where(enough, value, np.nan)
    return out


def bootstrap_in_base_shares(cube: SeasonCube, baseline: Baseline, variable: str, q: float) -> np.ndarray:
    """Share (%) of days beyond the calendar-day ``q`` threshold in the fixed baseline's own years, bootstrapped.

    The in-base procedure of Zhang et al. (2005, J. Climate 18:1641): for each baseline season-year j, the
    thresholds are taken from the baseline with year j left out and replaced by each other baseline year i
    in turn (n - 1 blocks of n years); year j's share of days beyond each block's thresholds is averaged
    over the n - 1 blocks. Pools, the 5-day window, 28/29 February and the type 8 quantile are those of
    :func:`calendar_day_thresholds`. Returns (feature, year): the share in the baseline's years, NaN in the
    others (which use the plain threshold) and for a trailing baseline (it has no in-base years).
    """
    n_feature, n_year = cube.feature_index.size, cube.years.size
    out = np.full((n_feature, n_year), np.nan)
    members = np.flatnonzero(np.asarray(baseline.members, dtype=bool)[0]) if baseline.fixed else np.array([])
    if members.size < 2:  # no other year to put in the place of the one left out
        return out
    daily = cube.daily
    record = getattr(daily, variable)
    values = getattr(cube, variable)
    leap_calendar = daily.calendar.lower() != "360_day"
    n_keys = 366 if leap_calendar else 360
    keys = _season_day_keys(cube)
    # only the calendar days the baseline's seasons hold (and both of 28/29 February if either)
    used = np.unique(keys[members][keys[members] >= 0])
    february = leap_calendar and bool(np.isin([_FEB_28, _FEB_29], used).any())
    if february:
        used = np.union1d(used, [_FEB_28, _FEB_29])
    column_of = np.full(n_keys, -1, dtype=np.int64)
    column_of[used] = np.arange(used.size)
    window, unusable = _window_times(cube, members, n_keys)
    window, unusable = window[used], unusable[used]
    block = max(1, _POOL_ELEMENTS // max(window.size, 1))
    for start in range(0, n_feature, block):
        features = cube.feature_index[start : start + block]
        pools = np.take(np.take(record, features, axis=0), window, axis=1)  # (feature, key, year, offset)
        pools[:, unusable] = np.nan
        has_data = (~np.isnan(pools)).any(axis=-1)  # (feature, key, year)
        ordered = np.sort(np.where(np.isnan(pools), np.inf, pools), axis=-1)
        if february:  # 28 and 29 February share one pool
            c28, c29 = column_of[_FEB_28], column_of[_FEB_29]
            february_ordered = np.sort(np.concatenate([ordered[:, c28], ordered[:, c29]], axis=-1), axis=-1)
            february_has_data = has_data[:, c28] | has_data[:, c29]
        for position, year in enumerate(members):
            thresholds = _resampled_thresholds(ordered, has_data, position, q)  # (feature, other year, key)
            if february:
                shared = _resampled_thresholds(
                    february_ordered[:, None], february_has_data[:, None], position, q
                )
                thresholds[..., c28] = thresholds[..., c29] = shared[..., 0]
            key = keys[year]
            on_days = thresholds[:, :, column_of[np.maximum(key, 0)]]  # (feature, other year, day)
            on_days[:, :, key < 0] = np.nan
            season = values[start : start + features.size, year][:, None, :]
            usable = ~np.isnan(season) & ~np.isnan(on_days)
            beyond = season > on_days if q > 0.5 else season < on_days
            shares = _percent_of_days(beyond, usable)  # (feature, other year)
            with np.errstate(invalid="ignore"):
                counted = np.count_nonzero(~np.isnan(shares), axis=-1)
                mean = np.nansum(shares, axis=-1) / np.maximum(counted, 1)
            out[start : start + features.size, year] = np.where(counted > 0, mean, np.nan)
    return out


def _with_in_base(
    plain: IndicatorValues, cube: SeasonCube, baseline: Baseline, variable: str, q: float, how: object
) -> IndicatorValues:
    """The plain shares, with the baseline's own years bootstrapped when ``how`` is "bootstrap"."""
    if how != "bootstrap" or not baseline.fixed:
        return plain
    in_base = bootstrap_in_base_shares(cube, baseline, variable, q)
    years = np.flatnonzero(np.asarray(baseline.members, dtype=bool)[0])
    values = plain.values.copy()
    values[:, years] = np.where(np.isnan(plain.values[:, years]), np.nan, in_base[:, years])
    # a season with a plain value but no resampled threshold on any of its days is null, and says so
    flags = dict(plain.flags)
    lost = np.isnan(values) & ~np.isnan(plain.values)
    if lost.any():
        flags["no_fit"] = flags.get("no_fit", np.zeros(values.shape, dtype=bool)) | lost
    return IndicatorValues(values, flags)


def tx90p(cube: SeasonCube, baseline: Baseline, params: Mapping[str, object]) -> IndicatorValues:
    """Share of season days with TX above the baseline calendar-day 90th percentile (% of days with data).

    ``params["in_base"]``: "plain" (the one threshold in every year) or "bootstrap" (Zhang et al. 2005 in the
    fixed baseline's own years).
    """
    plain = _exceedance_share(cube, baseline, "tmax", 0.9)
    return _with_in_base(plain, cube, baseline, "tmax", 0.9, params.get("in_base", "plain"))


def tn10p(cube: SeasonCube, baseline: Baseline, params: Mapping[str, object]) -> IndicatorValues:
    """Share of season days with TN below the baseline calendar-day 10th percentile (% of days with data).

    ``params["in_base"]`` as for :func:`tx90p`.
    """
    plain = _exceedance_share(cube, baseline, "tmin", 0.1)
    return _with_in_base(plain, cube, baseline, "tmin", 0.1, params.get("in_base", "plain"))


# --- compound heat and drought ------------------------------------------------------------------------------


def _hot_dry(cube: SeasonCube, baseline: Baseline, longest: bool) -> IndicatorValues:
    """Count (or longest run) of hot-dry days per season-year; NaN where no day has data and a threshold.

    no_fit flags a season with data but no threshold on any of its days.

    A hot-dry day has TX above the baseline calendar-day 90th percentile and RR < 1 mm.
    """
    thresholds = calendar_day_thresholds(cube, baseline, "tmax", 0.9)
    key = _season_day_keys(cube)

    def reduce(rows: np.ndarray, tmax: np.ndarray, prcp: np.ndarray) -> np.ndarray:
        threshold = thresholds.on_rows(rows, key)
        usable = ~np.isnan(tmax) & ~np.isnan(prcp) & ~np.isnan(threshold)
        hot_dry = (tmax > threshold) & (prcp < WET_DAY_MM)
        value = longest_run(hot_dry) if longest else np.count_nonzero(hot_dry, axis=-1)
        return np.where(np.count_nonzero(usable, axis=-1) > 0, value, np.nan)

    result = reduce_in_blocks(reduce, cube.tmax, cube.prcp, pass_rows=True)
    has_data = ((~np.isnan(cube.tmax)) & (~np.isnan(cube.prcp))).any(axis=-1)
    return IndicatorValues(result, {"no_fit": has_data & np.isnan(result)})


def hotdry_days(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> IndicatorValues:
    """Number of hot-dry days in the season (days); NaN where no day has data and a threshold."""
    return _hot_dry(cube, baseline, longest=False)


def hotdry_spell(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> IndicatorValues:
    """Longest run of consecutive hot-dry days within the season (days); a missing day ends a run."""
    return _hot_dry(cube, baseline, longest=True)


# --- catalog ------------------------------------------------------------------------------------------------

_ZHANG = "Zhang et al. 2011, WIREs Climate Change 2:851; Klein Tank et al. 2009, WMO WCDMP-No. 72"

_ENTRIES: list[tuple[str, str, str, str, Family, object, bool, bool, tuple[str, ...], Reduction]] = [
    # name, ETCCDI spelling, unit, definition, family, compute, percent_of_normal, uses_baseline, variables,
    # reduction
    (
        "cdd",
        "CDD",
        "days",
        "Longest run of consecutive dry days (precipitation < 1 mm) within the season.",
        "count",
        cdd,
        False,
        False,
        ("prcp",),
        "run",
    ),
    (
        "cwd",
        "CWD",
        "days",
        "Longest run of consecutive wet days (precipitation >= 1 mm) within the season.",
        "count",
        cwd,
        False,
        False,
        ("prcp",),
        "run",
    ),
    (
        "r10mm",
        "R10mm",
        "days",
        "Number of days in the season with at least 10 mm of precipitation.",
        "count",
        r10mm,
        False,
        False,
        ("prcp",),
        "count",
    ),
    (
        "r20mm",
        "R20mm",
        "days",
        "Number of days in the season with at least 20 mm of precipitation.",
        "count",
        r20mm,
        False,
        False,
        ("prcp",),
        "count",
    ),
    (
        "rx1day",
        "Rx1day",
        "mm",
        "Largest one-day precipitation of the season.",
        "precipitation",
        rx1day,
        True,
        False,
        ("prcp",),
        "extreme",
    ),
    (
        "rx5day",
        "Rx5day",
        "mm",
        "Largest precipitation total of five consecutive days inside the season.",
        "precipitation",
        rx5day,
        True,
        False,
        ("prcp",),
        "extreme",
    ),
    (
        "sdii",
        "SDII",
        "mm/day",
        "Mean precipitation of the season's wet days (>= 1 mm): wet-day total over wet days.",
        "precipitation",
        sdii,
        False,
        False,
        ("prcp",),
        "mean",
    ),
    (
        "r95ptot",
        "R95pTOT",
        "mm",
        "Season precipitation that fell on days above the baseline's 95th percentile "
        "of wet-day precipitation.",
        "precipitation",
        r95ptot,
        True,
        True,
        ("prcp",),
        "sum",
    ),
    (
        "su",
        "SU",
        "days",
        "Summer days: days in the season with maximum temperature above 25 degC.",
        "count",
        su,
        False,
        False,
        ("tmax",),
        "count",
    ),
    (
        "tr",
        "TR",
        "days",
        "Tropical nights: days in the season with minimum temperature above 20 degC.",
        "count",
        tr,
        False,
        False,
        ("tmin",),
        "count",
    ),
    (
        "fd",
        "FD",
        "days",
        "Frost days: days in the season with minimum temperature below 0 degC.",
        "count",
        fd,
        False,
        False,
        ("tmin",),
        "count",
    ),
    (
        "id",
        "ID",
        "days",
        "Icing days: days in the season with maximum temperature below 0 degC.",
        "count",
        icing_days,
        False,
        False,
        ("tmax",),
        "count",
    ),
    (
        "txx",
        "TXx",
        "degC",
        "Highest daily maximum temperature of the season.",
        "temperature",
        txx,
        False,
        False,
        ("tmax",),
        "extreme",
    ),
    (
        "tnn",
        "TNn",
        "degC",
        "Lowest daily minimum temperature of the season.",
        "temperature",
        tnn,
        False,
        False,
        ("tmin",),
        "extreme",
    ),
    (
        "tx90p",
        "TX90p",
        "%",
        "Share of the season's days with maximum temperature above the baseline's 90th "
        "percentile for that calendar day (5-day window).",
        "count",
        tx90p,
        False,
        True,
        ("tmax",),
        "share",
    ),
    (
        "tn10p",
        "TN10p",
        "%",
        "Share of the season's days with minimum temperature below the baseline's 10th "
        "percentile for that calendar day (5-day window).",
        "count",
        tn10p,
        False,
        True,
        ("tmin",),
        "share",
    ),
]

_SPELL_DETAILS = (
    "Counted within the season only: a run that began before the season's first day counts only its days "
    "inside the season, one running past the last day is cut there; a missing day ends a run. A partial "
    "season's run uses the days present (never scaled)."
)
_PERCENTILE_DETAILS = (
    "Thresholds are calendar-day percentiles of the baseline (type 8 quantile of a 5-day window centred on "
    "the day, over every baseline season-year; 28 and 29 February share one); a calendar day with data from "
    "fewer than three baseline season-years has none. In-base years use the plain threshold (for tx90p and "
    "tn10p unless in_base is 'bootstrap', below): the bootstrap "
    "of Zhang et al. 2005 (J. Climate 18:1641) is not applied, so for a fixed baseline the values of the "
    "baseline's own years are biased low against later years (measured here in stationary synthetic data: "
    "9.7 % in base against 10.1 % out of base for 30 baseline seasons of independent days; 9.5 % against "
    "11.6 % for 10 seasons with a day-to-day correlation of 0.7). A trailing baseline never holds the season "
    "itself, so it has no in-base years."
)
_IN_BASE_DETAILS = (
    " Parameter in_base: 'plain' (default) the one threshold in every year, with the bias above; 'bootstrap' "
    "the in-base procedure of Zhang et al. 2005 for a fixed baseline's own years (each year's share is "
    "averaged over the n - 1 thresholds of the baseline with that year replaced by each other baseline year; "
    "later years keep the plain threshold), which removes the bias (measured here: 10.1 % in base against "
    "10.1 % out of base for 30 seasons of independent days; 11.9 % against 11.6 % for 10 seasons with a "
    "day-to-day correlation of 0.7); n (n - 1) thresholds for n seasons, so meant for batch use. It changes "
    "nothing under a trailing baseline."
)
_DETAILS = {
    "cdd": _SPELL_DETAILS,
    "cwd": _SPELL_DETAILS,
    "rx5day": "Only windows of five consecutive days that all lie inside the season and all have data are used.",
    "r95ptot": "The threshold is the type 8 95th percentile of wet-day (RR >= 1 mm) precipitation pooled over "
    "the baseline, from at least 20 wet days of at least three years (else null, warning no_fit). "
    "threshold_pool 'year' (default) pools the wet days of the whole calendar years numbered like the "
    "baseline season-years: the ETCCDI base-period threshold (Zhang et al. 2011). 'season' pools only the "
    "baseline seasons' own wet days: a seasonal variant, not the ETCCDI index (in a dry season its threshold "
    "is far lower). The index is the season's sum of RR on wet days above the threshold.",
    "tx90p": _PERCENTILE_DETAILS + _IN_BASE_DETAILS + " A partial season's share is over the days present.",
    "tn10p": _PERCENTILE_DETAILS + _IN_BASE_DETAILS + " A partial season's share is over the days present.",
}
_IN_BASE = Parameter(
    "plain",
    "",
    "the baseline's own years: 'plain' (default) the baseline's threshold, biased low there; 'bootstrap' the "
    "in-base resampling of Zhang et al. 2005 (fixed baselines; costly, for batch use)",
    choices=IN_BASE_CHOICES,
)
_PARAMETERS = {
    "tx90p": {"in_base": _IN_BASE},
    "tn10p": {"in_base": _IN_BASE},
    "r95ptot": {
        "threshold_pool": Parameter(
            "year",
            "",
            "the wet days the 95th percentile is taken from: 'year' (default, ETCCDI) the baseline's whole "
            "calendar years; 'season' the baseline seasons only (a seasonal variant)",
            choices=R95_POOLS,
        )
    },
}

for (
    _name,
    _etccdi,
    _unit,
    _definition,
    _family,
    _compute,
    _percent,
    _uses_baseline,
    _variables,
    _reduction,
) in _ENTRIES:
    register(
        Indicator(
            name=_name,
            unit=_unit,
            definition=_definition,
            source=f"ETCCDI index {_etccdi} ({_ZHANG}), computed over the season's days",
            family=_family,
            compute=_compute,  # type: ignore[arg-type]
            variables=_variables,
            reduction=_reduction,
            percent_of_normal=_percent,
            uses_baseline=_uses_baseline,
            parameters=_PARAMETERS.get(_name, {}),
            details=_DETAILS.get(_name, ""),
        )
    )

register(
    Indicator(
        name="hotdry_days",
        unit="days",
        definition="Days in the season with maximum temperature above the community's own baseline 90th "
        "percentile for that calendar day and precipitation below 1 mm.",
        source="Compound hot-dry days: TX90p threshold ("
        + _ZHANG
        + ") combined with the ETCCDI dry day RR < 1 mm",
        family="count",
        compute=hotdry_days,
        variables=("tmax", "prcp"),
        reduction="count",
        details=_PERCENTILE_DETAILS,
        uses_baseline=True,
    )
)
register(
    Indicator(
        name="hotdry_spell",
        unit="days",
        definition="Longest run of consecutive hot-dry days within the season.",
        source="Longest run (as in ETCCDI CDD) of hot-dry days; TX90p threshold of " + _ZHANG,
        family="count",
        compute=hotdry_spell,
        variables=("tmax", "prcp"),
        reduction="run",
        details=_PERCENTILE_DETAILS + " " + _SPELL_DETAILS,
        uses_baseline=True,
    )
)
