"""Seasons: which days of which year form each season-year, and how complete each season-year is.

A season is the calendar year, a run of whole months, or a window 'MM-DD' to 'MM-DD' (both inclusive) that
may cross the new year; a season that crosses the new year belongs to the year in which it ends (a November to
April rainy season of 1990-91 is season-year 1991). A :class:`~service.schemas.PropertySeason` gives each
feature its own season from one of its properties; features with the same season are cut together.

Calendars: ``standard``/``gregorian``/``proleptic_gregorian`` (Gregorian leap years), ``julian`` (every
fourth year), ``noleap``/``365_day``, ``all_leap``/``366_day`` and ``360_day`` (twelve months of 30 days).
A window holds the days whose month-day lies between its start and its end, compared as MMDD numbers, so:

- Feb 29 (and Feb 30 in ``360_day``) is in a window exactly when it lies between start and end, e.g. in
  '02-01' to '03-15' but not in '03-01' to '02-28' (end at '02-29' to include it where it exists);
- a start that does not exist in a year (Feb 29 outside leap years, '03-31' in ``360_day``) starts the
  season on the next day that does; an end that does not exist ends it on the last day before.

Only season-years whose whole span of calendar days lies inside the data's first and last date are cut
(a November-April season on data starting 1 January begins with the season-year of the next year).

Completeness counts only the variables an indicator reads: for an indicator of tmax and tmin, a day absent
from the data or missing either of them is missing; a gap in precipitation does not count against it. When
the missing share of a (feature, season-year) exceeds ``max_missing_share`` (0.10 by default, common
practice) that season-year is blank for the indicator (all its days NaN), so no indicator reports a short
total. A season-year that misses fewer days is a *partial season*: the request's ``partial_seasons`` policy
decides its sums and counts (indicators of reduction "sum" or "count", and the totals that SPI and SPEI
standardize): "scale" (the default) multiplies them by expected days / days present, "null" leaves them
null, "as_is" keeps the sum over the days present. Means, extremes, run lengths and shares of days always
use the days present. Either way the row's notes say ``partial_season``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from pydantic import ValidationError

from service.errors import FeatureError, RequestError, StoreFormatError
from service.indicators.base import VARIABLES, DailySeries, SeasonCube
from service.indicators.compiled import presence_counts
from service.schemas import MonthsSeason, PropertySeason, Season, WindowSeason

DEFAULT_MAX_MISSING_SHARE = (
    0.10  # common practice: a season with more than ~10 % missing days is not reported
)

_CALENDARS = {
    "standard": "gregorian",
    "gregorian": "gregorian",
    "proleptic_gregorian": "gregorian",
    "julian": "julian",
    "noleap": "noleap",
    "365_day": "noleap",
    "all_leap": "all_leap",
    "366_day": "all_leap",
    "360_day": "360_day",
}


@dataclass(frozen=True)
class SeasonDefinition:
    """A season as an inclusive range of month-days; ``start > end`` means it crosses the new year."""

    start: tuple[int, int]  # (month, day)
    end: tuple[int, int]  # (month, day); day 31 on a months season means "to the month's last day"
    label: str

    @property
    def start_key(self) -> int:
        """The start as an MMDD number."""
        return self.start[0] * 100 + self.start[1]

    @property
    def end_key(self) -> int:
        """The end as an MMDD number."""
        return self.end[0] * 100 + self.end[1]

    @property
    def crosses_new_year(self) -> bool:
        """True when the season runs from one year into the next."""
        return self.start_key > self.end_key


@dataclass(frozen=True)
class SeasonGroup:
    """Features (rows of the daily series) that share one season."""

    season: SeasonDefinition
    feature_index: np.ndarray  # (feature,) int


@dataclass(frozen=True)
class SeasonCut:
    """A season cut from a daily series: the cube and what each (feature, season-year) has of its days.

    Completeness counts only the variables asked about: :meth:`present_days` of ("prcp",) ignores gaps in
    tmax. :meth:`cube_for` gives the cube an indicator sees: only its variables, with the seasons that are
    incomplete for them blank.
    """

    cube: SeasonCube  # every variable cut, nothing blanked
    season: SeasonDefinition
    expected_days: np.ndarray  # (year,) int days of each season-year in the calendar
    max_missing_share: float
    _cache: dict[Any, Any] = field(default_factory=dict, repr=False, compare=False)

    def present_days(self, variables: Sequence[str]) -> np.ndarray:
        """Days with every one of ``variables`` present, per (feature, season-year) (int64)."""
        key = ("present", variable_set(variables))
        if key not in self._cache:
            if not key[1]:
                raise RuntimeError("present_days needs at least one variable")
            counts = self._presence()
            if counts is not None:
                bits = sum(1 << VARIABLES.index(name) for name in key[1])
                if any(getattr(self.cube, name) is None for name in key[1]):
                    self._missing(next(n for n in key[1] if getattr(self.cube, n) is None))  # its error
                self._cache[key] = counts[..., [c for c in range(8) if c & bits == bits]].sum(axis=-1)
                return self._cache[key]
            masks = [self._missing(name) for name in key[1]]
            missing = masks[0] if len(masks) == 1 else np.logical_or.reduce(masks)
            width = missing.shape[-1]
            self._cache[key] = (width - np.count_nonzero(missing, axis=-1)).astype(np.int64)
        return self._cache[key]

    def _presence(self) -> np.ndarray | None:
        """Days per (feature, season-year) with each combination of the cut variables present (bit k: the
        k-th of VARIABLES), counted in one compiled pass; None unless every cut variable is float64."""
        if "presence" not in self._cache:
            arrays = [getattr(self.cube, name) for name in VARIABLES]
            cut = [a for a in arrays if a is not None]
            usable = bool(cut) and all(a.dtype == np.float64 and a.flags.c_contiguous for a in cut)
            self._cache["presence"] = presence_counts(arrays) if usable else None
        return self._cache["presence"]

    def _missing(self, name: str) -> np.ndarray:
        """(feature, season-year, day) bool: the day lacks variable ``name`` (or is padding); kept per cut."""
        key = ("missing", name)
        if key not in self._cache:
            values = getattr(self.cube, name)
            if values is None:
                raise RuntimeError(f"variable {name!r} was not cut for season {self.season.label}")
            self._cache[key] = np.isnan(values)
        return self._cache[key]

    def present_share(self, variables: Sequence[str]) -> np.ndarray:
        """Share of each season-year's calendar days with every one of ``variables`` present (float64)."""
        expected = self.expected_days[None, :]
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(expected > 0, self.present_days(variables) / np.maximum(expected, 1), 0.0)

    def complete(self, variables: Sequence[str]) -> np.ndarray:
        """(feature, season-year) whose missing share for ``variables`` is within max_missing_share."""
        return (1.0 - self.present_share(variables)) <= self.max_missing_share + 1e-12

    def partial(self, variables: Sequence[str]) -> np.ndarray:
        """(feature, season-year) that are complete for ``variables`` but miss some of their days."""
        return self.complete(variables) & (self.present_days(variables) < self.expected_days[None, :])

    def total_factor(self, variables: Sequence[str], policy: str) -> np.ndarray | None:
        """Factor for season totals under a partial_seasons policy (None when it is 1 everywhere).

        "scale": expected days / days present; "null": NaN on partial seasons; "as_is": 1.
        """
        partial = self.partial(variables)
        if policy == "as_is" or not partial.any():
            return None
        if policy == "null":
            return np.where(partial, np.nan, 1.0)
        if policy == "scale":
            present = self.present_days(variables)
            with np.errstate(invalid="ignore", divide="ignore"):
                return np.where(partial, self.expected_days[None, :] / np.maximum(present, 1), 1.0)
        raise RequestError(
            f"partial_seasons {policy!r} is not one of 'scale', 'null', 'as_is'", field="partial_seasons"
        )

    def cube_for(self, variables: Sequence[str], policy: str = "scale") -> SeasonCube:
        """The cube an indicator reading ``variables`` sees (see the class docstring), cached per set."""
        names = variable_set(variables)
        key = ("cube", names, policy)
        if key not in self._cache:
            complete = self.complete(names)
            blank = None if complete.all() else ~complete
            arrays: dict[str, np.ndarray | None] = {}
            for name in VARIABLES:
                values = getattr(self.cube, name) if name in names else None
                if values is not None and blank is not None:
                    values = values.copy()
                    values[blank] = np.nan
                arrays[name] = values
            cube = replace(self.cube, **arrays, total_factor=self.total_factor(names, policy))
            # the days with values of each variable (and of all of them) in this cube: those of the cut where
            # the season is complete, none where it was blanked (so the indicators need not count them)
            for subset in {*((name,) for name in names), names}:
                days = self.present_days(subset)
                cube.seed_days(subset, days if blank is None else np.where(blank, 0, days))
            self._cache[key] = cube
        return self._cache[key]


def variable_set(variables: Sequence[str]) -> tuple[str, ...]:
    """Distinct variables in the order of VARIABLES (a stable key for a set of variables)."""
    return tuple(v for v in VARIABLES if v in variables)


# --- season specifications ----------------------------------------------------------------------------------


def season_definition(season: Season) -> SeasonDefinition:
    """The month-day range of a calendar-year, months or window season (not a property season)."""
    if season == "year":
        return SeasonDefinition(start=(1, 1), end=(12, 31), label="year")
    if isinstance(season, MonthsSeason):
        months = season.months
        if len(months) == 12 and months[0] == 1:
            return SeasonDefinition(start=(1, 1), end=(12, 31), label="year")
        label = "months " + ",".join(str(m) for m in months)
        return SeasonDefinition(start=(months[0], 1), end=(months[-1], 31), label=label)
    if isinstance(season, WindowSeason):
        start = (int(season.start[:2]), int(season.start[3:]))
        end = (int(season.end[:2]), int(season.end[3:]))
        return SeasonDefinition(start=start, end=end, label=f"{season.start} to {season.end}")
    raise RequestError(f"season {season!r} is not 'year', a months list or a window", field="season")


def parse_property_season(value: Any, feature_id: str, property_name: str) -> SeasonDefinition:
    """The season a feature property holds: "year", a months list, {"months": [...]} or {"start", "end"}."""
    try:
        if value == "year":
            return season_definition("year")
        if isinstance(value, list):
            return season_definition(MonthsSeason(months=value))
        if isinstance(value, dict) and "months" in value:
            return season_definition(MonthsSeason(**value))
        if isinstance(value, dict):
            return season_definition(WindowSeason(**value))
    except ValidationError as exc:
        reason = "; ".join(err["msg"] for err in exc.errors())
        raise FeatureError(
            f"feature {feature_id!r}: property {property_name!r} = {value!r} is not a valid season ({reason})",
            feature_id=feature_id,
            field="season.property",
        ) from None
    raise FeatureError(
        f'feature {feature_id!r}: property {property_name!r} = {value!r} is not a season; give "year", a '
        f'months list such as [5, 6, 7] or a window such as {{"start": "11-01", "end": "04-30"}}',
        feature_id=feature_id,
        field="season.property",
    )


def season_groups(
    season: Season, feature_ids: Sequence[str], properties: Sequence[dict | None]
) -> list[SeasonGroup]:
    """Features grouped by season, groups in order of first appearance; one group unless a property season."""
    n = len(feature_ids)
    if not isinstance(season, PropertySeason):
        return [SeasonGroup(season_definition(season), np.arange(n, dtype=np.int64))]
    if len(properties) != n:
        raise RequestError(
            f"{len(properties)} property sets for {n} features; give one per feature", field="season.property"
        )
    members: dict[SeasonDefinition, list[int]] = {}
    for i, (fid, props) in enumerate(zip(feature_ids, properties, strict=True)):
        if not props or season.property not in props:
            raise FeatureError(
                f"feature {fid!r} has no property {season.property!r}, which the request names as the season "
                f"property; add it to every feature or use one season for all",
                feature_id=fid,
                field="season.property",
            )
        definition = parse_property_season(props[season.property], fid, season.property)
        members.setdefault(definition, []).append(i)
    return [SeasonGroup(d, np.asarray(ix, dtype=np.int64)) for d, ix in members.items()]


# --- calendars ----------------------------------------------------------------------------------------------


def calendar_kind(calendar: str) -> str:
    """The leap-year rule of a CF calendar name: gregorian, julian, noleap, all_leap or 360_day."""
    try:
        return _CALENDARS[calendar.lower()]
    except KeyError:
        raise StoreFormatError(
            f"calendar {calendar!r} is not supported; supported: {', '.join(sorted(_CALENDARS))}"
        ) from None


def infer_calendar(month: np.ndarray, day: np.ndarray, year: np.ndarray) -> str:
    """A calendar consistent with the dates (for date tables that do not carry one).

    360_day if Feb 30 occurs; all_leap or julian if Feb 29 occurs outside Gregorian leap years; noleap if a
    Gregorian leap year's Feb 28 is followed by Mar 1; else standard.
    """
    feb = month == 2
    if np.any(feb & (day == 30)):
        return "360_day"
    feb29_years = np.unique(year[feb & (day == 29)])
    if feb29_years.size:
        gregorian = (feb29_years % 4 == 0) & ((feb29_years % 100 != 0) | (feb29_years % 400 == 0))
        if gregorian.all():
            return "standard"
        return "julian" if (feb29_years % 4 == 0).all() else "all_leap"
    leap_years = np.unique(year[feb & (day == 28)])
    leap_years = leap_years[(leap_years % 4 == 0) & ((leap_years % 100 != 0) | (leap_years % 400 == 0))]
    # a Gregorian leap year whose Feb 28 is followed by Mar 1 in the data: noleap
    for y in leap_years:
        if np.any((year == y) & (month == 3) & (day == 1)):
            return "noleap"
    return "standard"


def calendar_dates(
    first_year: int, last_year: int, calendar: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(year, month, day) of every calendar day from 1 Jan ``first_year`` to 31 Dec ``last_year``."""
    kind = calendar_kind(calendar)
    years = np.arange(first_year, last_year + 1)
    if kind == "360_day":
        per_year = 360
        month = np.tile(np.repeat(np.arange(1, 13), 30), years.size)
        day = np.tile(np.tile(np.arange(1, 31), 12), years.size)
        return np.repeat(years, per_year), month, day
    if kind == "gregorian":
        leap = (years % 4 == 0) & ((years % 100 != 0) | (years % 400 == 0))
    elif kind == "julian":
        leap = years % 4 == 0
    elif kind == "all_leap":
        leap = np.ones(years.size, dtype=bool)
    else:
        leap = np.zeros(years.size, dtype=bool)
    month_of_day = np.repeat(np.arange(1, 13), (31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31))
    day_of_month = np.concatenate(
        [np.arange(1, n + 1) for n in (31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)]
    )
    is_feb29 = (month_of_day == 2) & (day_of_month == 29)
    keep = ~is_feb29[None, :] | leap[:, None]  # (year, 366)
    year = np.broadcast_to(years[:, None], keep.shape)[keep]
    month = np.broadcast_to(month_of_day[None, :], keep.shape)[keep]
    day = np.broadcast_to(day_of_month[None, :], keep.shape)[keep]
    return year, month, day


def season_labels(
    year: np.ndarray, month: np.ndarray, day: np.ndarray, season: SeasonDefinition
) -> tuple[np.ndarray, np.ndarray]:
    """For each date: whether it is in the season, and the season-year it belongs to (the year it ends)."""
    key = month * 100 + day
    if not season.crosses_new_year:
        return (key >= season.start_key) & (key <= season.end_key), year
    late = key >= season.start_key
    return late | (key <= season.end_key), np.where(late, year + 1, year)


@dataclass(frozen=True)
class SeasonYears:
    """The season-years a record can serve whole, with their length in calendar days."""

    years: np.ndarray  # (year,) int, ascending
    expected_days: np.ndarray  # (year,) int


def _date_keys(year: np.ndarray, month: np.ndarray, day: np.ndarray) -> np.ndarray:
    """Dates as YYYYMMDD integers (chronological order for every calendar)."""
    return year.astype(np.int64) * 10_000 + month * 100 + day


def servable_season_years(
    year: np.ndarray, month: np.ndarray, day: np.ndarray, calendar: str, season: SeasonDefinition
) -> SeasonYears:
    """Season-years whose every calendar day lies between the record's first and last date."""
    if year.size == 0:
        return SeasonYears(np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64))
    keys = _date_keys(year, month, day)
    first_key, last_key = keys.min(), keys.max()
    cal_year, cal_month, cal_day = calendar_dates(int(year.min()) - 1, int(year.max()) + 1, calendar)
    cal_keys = _date_keys(cal_year, cal_month, cal_day)
    inside, season_year = season_labels(cal_year, cal_month, cal_day, season)
    sy = season_year[inside]
    sk = cal_keys[inside]
    years, start = np.unique(sy, return_index=True)
    counts = np.bincount(np.searchsorted(years, sy), minlength=years.size)
    first_day = sk[start]
    last_day = sk[start + counts - 1]
    whole = (first_day >= first_key) & (last_day <= last_key)
    return SeasonYears(years[whole].astype(np.int64), counts[whole].astype(np.int64))


# --- cutting ------------------------------------------------------------------------------------------------


def cut_season(
    daily: DailySeries,
    season: SeasonDefinition,
    feature_index: np.ndarray | None = None,
    *,
    max_missing_share: float = DEFAULT_MAX_MISSING_SHARE,
    buffers: dict[str, np.ndarray] | None = None,
    variables: Sequence[str] | None = None,
) -> SeasonCut:
    """Cut the rows ``feature_index`` of ``daily`` into season-years (feature, season_year, day).

    Vectorised over features and days: one slice copy per variable and season-year. The cube holds every
    season-year the record serves whole, in the series' dtype (float32 stays float32), for ``variables``
    (default: every variable the series holds; the others are None). Nothing is blanked here: a day absent
    from the record or NaN counts as missing in :meth:`SeasonCut.present_days`, and :meth:`SeasonCut.cube_for`
    blanks the seasons whose missing share for an indicator's variables exceeds ``max_missing_share``.

    ``buffers`` (a dict the caller keeps between calls) lets a loop over feature blocks reuse the cube's
    arrays instead of allocating fresh ones (measured about twice as fast); the cube of the previous call
    with the same dict is then overwritten, so use it only when that cube is no longer needed.
    """
    if feature_index is None:
        feature_index = np.arange(daily.n_features, dtype=np.int64)
    wanted = variable_set(daily.variables if variables is None else variables)
    absent = [v for v in wanted if getattr(daily, v) is None]
    if absent:
        raise RuntimeError(
            f"the daily series holds no {absent[0]!r}; resolve the request against its variables"
        )
    feature_index = np.asarray(feature_index, dtype=np.int64)
    keys = _date_keys(daily.year, daily.month, daily.day)
    if keys.size > 1 and np.any(np.diff(keys) <= 0):
        raise StoreFormatError(
            "the daily series' dates are not strictly increasing; time must be sorted, no repeats"
        )
    served = servable_season_years(daily.year, daily.month, daily.day, daily.calendar, season)
    inside, season_year = season_labels(daily.year, daily.month, daily.day, season)
    keep = inside & np.isin(season_year, served.years)
    steps = np.flatnonzero(keep)
    row = np.searchsorted(served.years, season_year[steps])
    group_start = np.searchsorted(row, np.arange(served.years.size))  # rows ascending because time is sorted
    position = np.arange(steps.size) - group_start[row]
    width = int(position.max()) + 1 if steps.size else 0
    time_index = np.full((served.years.size, width), -1, dtype=np.int64)
    time_index[row, position] = steps
    in_season = time_index >= 0
    safe = np.where(in_season, time_index, 0)

    first = int(feature_index[0]) if feature_index.size else 0
    contiguous = np.array_equal(feature_index, np.arange(first, first + feature_index.size))
    days_per_row = in_season.sum(axis=1)
    row_first_step = steps[np.minimum(group_start, max(steps.size - 1, 0))] if steps.size else group_start
    # a season-year is one stretch of the record (a month-day interval of sorted dates), so each row of the
    # cube is a plain slice of time steps: copy slices (memcpy speed) rather than gather element by element
    sliceable = bool(steps.size) and np.array_equal(steps - row_first_step[row], position)

    if steps.size and not sliceable:
        raise RuntimeError(f"season {season.label}: a season-year is not one stretch of the record")

    def gather(name: str, values: np.ndarray) -> np.ndarray:
        source = values[first : first + feature_index.size] if contiguous else values[feature_index]
        dtype = source.dtype if np.issubdtype(source.dtype, np.floating) else np.float64
        shape = (source.shape[0], *in_season.shape)
        out = None if buffers is None else buffers.get(name)
        if out is None or out.shape != shape or out.dtype != dtype:
            out = np.empty(shape, dtype=dtype)
            if buffers is not None:
                buffers[name] = out
        for y, (start, n) in enumerate(zip(row_first_step.tolist(), days_per_row.tolist(), strict=True)):
            out[:, y, :n] = source[:, start : start + n]
            out[:, y, n:] = np.nan
        return out

    arrays = {name: gather(name, getattr(daily, name)) if name in wanted else None for name in VARIABLES}
    cube = SeasonCube(
        years=served.years,
        **arrays,
        in_season=in_season,
        dayofyear=np.where(in_season, daily.dayofyear[safe], 0),
        time_index=time_index,
        daily=daily,
        feature_index=feature_index,
    )
    return SeasonCut(
        cube=cube,
        season=season,
        expected_days=served.expected_days,
        max_missing_share=float(max_missing_share),
    )
