"""Small hand-made DailySeries, SeasonCube and Baseline objects for the indicator value tests.

The cutter here is deliberately simple (calendar-year seasons, a months list inside one year, or a window
that may cross the new year); it is the test's own, independent of service/indicators/seasons.py.
"""

from __future__ import annotations

import numpy as np

from service.indicators.base import Baseline, DailySeries, SeasonCube

_LEAP_MONTHS = (31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)


def calendar_dates(start_year: int, n_years: int, calendar: str = "standard") -> dict[str, np.ndarray]:
    """Year, month, day and dayofyear of every day of ``n_years`` whole years in ``calendar``."""
    if calendar == "360_day":
        year = np.repeat(np.arange(start_year, start_year + n_years), 360)
        doy = np.tile(np.arange(1, 361), n_years)
        month = (doy - 1) // 30 + 1
        day = (doy - 1) % 30 + 1
        return {"year": year, "month": month, "day": day, "dayofyear": doy}
    days = np.arange(f"{start_year}-01-01", f"{start_year + n_years}-01-01", dtype="datetime64[D]")
    year = days.astype("datetime64[Y]").astype(int) + 1970
    month = days.astype("datetime64[M]").astype(int) % 12 + 1
    day = (days - days.astype("datetime64[M]")).astype(int) + 1
    doy = (days - days.astype("datetime64[Y]")).astype(int) + 1
    if calendar == "noleap":
        keep = ~((month == 2) & (day == 29))
        year, month, day = year[keep], month[keep], day[keep]
        doy = np.concatenate([np.arange(1, 366)] * n_years)
    return {"year": year, "month": month, "day": day, "dayofyear": doy}


def daily_series(
    start_year: int,
    n_years: int,
    *,
    tmax: np.ndarray | float = 25.0,
    tmin: np.ndarray | float = 15.0,
    prcp: np.ndarray | float = 0.0,
    n_features: int = 1,
    calendar: str = "standard",
    latitude: np.ndarray | float = 0.0,
) -> DailySeries:
    """A DailySeries of whole years; scalars are broadcast to (feature, time)."""
    dates = calendar_dates(start_year, n_years, calendar)
    shape = (n_features, dates["year"].size)

    def full(value: np.ndarray | float) -> np.ndarray:
        return np.broadcast_to(np.asarray(value, dtype=np.float64), shape).copy()

    return DailySeries(
        tmax=full(tmax),
        tmin=full(tmin),
        prcp=full(prcp),
        calendar=calendar,
        latitude=np.broadcast_to(np.asarray(latitude, dtype=np.float64), (n_features,)).copy(),
        **dates,
    )


def _month_day_key(month: np.ndarray, day: np.ndarray) -> np.ndarray:
    """Month and day as MMDD integers (for windows)."""
    return month * 100 + day


def season_cube(
    daily: DailySeries,
    *,
    months: list[int] | None = None,
    window: tuple[str, str] | None = None,
    features: np.ndarray | None = None,
) -> SeasonCube:
    """Cut ``daily`` into season-years: the calendar year, a months list, or an ``("MM-DD", "MM-DD")`` window.

    A window whose start is after its end crosses the new year and belongs to the year it ends in; its
    season-years are those whose start and end both lie in the record.
    """
    key = _month_day_key(daily.month, daily.day)
    label = daily.year.copy()
    if window is not None:
        start = int(window[0].replace("-", ""))
        end = int(window[1].replace("-", ""))
        if start <= end:
            member = (key >= start) & (key <= end)
        else:
            member = (key >= start) | (key <= end)
            label = np.where(key >= start, daily.year + 1, daily.year)
    elif months is not None:
        member = np.isin(daily.month, months)
    else:
        member = np.ones(daily.year.size, dtype=bool)
    years = np.unique(label[member])
    if window is not None and int(window[0].replace("-", "")) > int(window[1].replace("-", "")):
        years = years[(years > daily.year.min()) & (years <= daily.year.max())]
    index_lists = [np.flatnonzero(member & (label == y)) for y in years]
    width = max(len(ix) for ix in index_lists)
    time_index = np.full((years.size, width), -1, dtype=np.int64)
    for row, ix in enumerate(index_lists):
        time_index[row, : ix.size] = ix
    in_season = time_index >= 0
    feature_index = np.arange(daily.tmax.shape[0]) if features is None else np.asarray(features)
    safe = np.where(in_season, time_index, 0)

    def cut(values: np.ndarray) -> np.ndarray:
        out = np.take(values[feature_index], safe, axis=1)  # C-contiguous (feature, year, day), as the core's
        out[:, ~in_season] = np.nan
        return out

    return SeasonCube(
        years=years,
        tmax=cut(daily.tmax),
        tmin=cut(daily.tmin),
        prcp=cut(daily.prcp),
        in_season=in_season,
        dayofyear=np.where(in_season, daily.dayofyear[safe], 0),
        time_index=time_index,
        daily=daily,
        feature_index=feature_index,
    )


def fixed_baseline(cube: SeasonCube, start: int, end: int) -> Baseline:
    """Every season-year's normal is the season-years ``start``..``end``."""
    row = (cube.years >= start) & (cube.years <= end)
    return Baseline(members=np.tile(row, (cube.years.size, 1)), fixed=True, label=f"{start}-{end}")


def trailing_baseline(cube: SeasonCube, n_years: int) -> Baseline:
    """Each season-year's normal is the ``n_years`` season-years before it."""
    y = cube.years
    members = (y[None, :] < y[:, None]) & (y[None, :] >= y[:, None] - n_years)
    return Baseline(members=members, fixed=False, label=f"trailing {n_years}")
