"""Event windows on a calendar: each (event, window)'s own days, and the same window in every other year.

The rule (docs/methods.md, "Event windows", says the same in words):

- An event has a date in the dataset's calendar. A window gives its start and its end relative to that date,
  each a whole number of days (days of the dataset's calendar) or of calendar months (the same day of the
  month k months away; in the 360_day calendar every month has 30 days). Where that month is too short
  (31 March - 1 month, 29 February - 12 months) a start moves to the first day of the next month and an
  end to the month's last day, so a window never takes a day before its start or after its end. Both ends
  are inclusive.
- The event's own window, [date + start, date + end], spans at most one year: its end comes before the
  start's month and day one year later. Its *window-year* is the year in which it ends (as for a season
  that crosses the new year).
- **The same window in another year** runs over the same calendar days: from the start's month-day to the
  end's month-day, shifted by whole years; a window that crosses the new year crosses it in every year.
  Where a month-day does not exist in a year (29 February outside leap years), a window starting on it
  starts on the next day (1 March) and a window ending on it ends on the day before (28 February). So a
  window that holds 29 February holds it in every leap year and is one day shorter in the other years:
  the same calendar days win over the same length, by that one day, exactly as for seasons. In the
  noleap/365_day and 360_day calendars every year has the same days, so every instance has the same length.
- The baseline of an (event, window) is that same window in each baseline year (window-years, fixed
  ``{"start", "end"}`` or the N before the event's own with ``{"trailing": N}``); lag k is the same window
  k years before the event's.
- An instance is *served* when all its days lie within the data's first and last day, the rule of seasons.
  The baseline must consist of served instances; the event's own window and its lags may reach past the
  data, whose missing days then count against completeness like any gap (a window with more than
  max_missing_share of its days outside the data is null).

Everything here is vectorised over events: one pass per window, no loop over events.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from service.errors import OutOfRangeError, RequestError
from service.indicators import seasons
from service.schemas import Event, EventWindow, FixedBaseline, TrailingBaseline, WindowOffset

_DAYS_IN_MONTH = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=np.int64)
# days beyond the events' years that day offsets (at most 3660, schemas.WindowOffset) may reach
_REACH_YEARS = 11
# events named in one error message at most
_LISTED = 5


# The rule in a few sentences, as the catalog (GET /v1/indicators) states it.
WINDOW_RULE = (
    "An event window runs from start to end (both inclusive) relative to the event's date, in days of the "
    "dataset's calendar or calendar months (where the month is too short, a start moves to the first day of "
    "the next month and an end to the month's last day); it spans at most one year, and its window-year is "
    "the year in which it ends. The same window in another year covers the same calendar days: from the "
    "start's month-day to the end's month-day, shifted by whole years, crossing the new year if the event's "
    "window does. A month-day the year lacks (29 February) starts the window on the next day (1 March) or "
    "ends it on the day before (28 February), so a window holding 29 February has one day less in common "
    "years; in noleap and 360_day calendars every instance has the same days. The baseline of an (event, "
    "window) is that same window in each baseline window-year ({start, end}: those years; {trailing: N}: the "
    "N before the event's), for the event's own community; z, classes and percent of normal are taken "
    "against it as for seasons. Lag k is the same window k years earlier. Days outside the data count as "
    "missing (max_missing_share and partial_seasons apply); baseline windows must lie wholly in the data."
)


# --- calendar arithmetic ----------------------------------------------------------------------------------


def leap_years(years: np.ndarray, calendar: str) -> np.ndarray:
    """Whether each year has 29 February in the CF ``calendar`` (bool array)."""
    kind = seasons.calendar_kind(calendar)
    years = np.asarray(years, dtype=np.int64)
    if kind == "gregorian":
        return (years % 4 == 0) & ((years % 100 != 0) | (years % 400 == 0))
    if kind == "julian":
        return years % 4 == 0
    return np.full(years.shape, kind == "all_leap")


def month_lengths(years: np.ndarray, months: np.ndarray, calendar: str) -> np.ndarray:
    """Days in each (year, month) of the CF ``calendar`` (int64; 30 for every month of 360_day)."""
    months = np.asarray(months, dtype=np.int64)
    if seasons.calendar_kind(calendar) == "360_day":
        return np.full(months.shape, 30, dtype=np.int64)
    out = _DAYS_IN_MONTH[months - 1].copy()
    out[(months == 2) & leap_years(years, calendar)] = 29
    return out


def date_keys(year: np.ndarray, month: np.ndarray, day: np.ndarray) -> np.ndarray:
    """Dates as YYYYMMDD integers (chronological in every calendar)."""
    return np.asarray(year, dtype=np.int64) * 10_000 + np.asarray(month) * 100 + np.asarray(day)


def shift_months(keys: np.ndarray, months: int, calendar: str, *, start: bool) -> np.ndarray:
    """The dates ``months`` calendar months from ``keys`` (YYYYMMDD), on the same day of the month.

    Where that month is shorter than the day (31 March - 1 month), a window's start moves to the first day
    of the next month and its end to the month's last day, the rule for days a year lacks (29 February) in
    seasons and windows alike: a window never takes a day before its start or after its end.
    """
    year, rest = np.divmod(np.asarray(keys, dtype=np.int64), 10_000)
    month, day = np.divmod(rest, 100)
    total = year * 12 + (month - 1) + months
    new_year, new_month = np.divmod(total, 12)
    new_month = new_month + 1
    length = month_lengths(new_year, new_month, calendar)
    beyond = day > length
    new_day = np.minimum(day, length)
    if start:
        after_year, after_month = np.divmod(new_year * 12 + new_month, 12)  # the next month
        new_year = np.where(beyond, after_year, new_year)
        new_month = np.where(beyond, after_month + 1, new_month)
        new_day = np.where(beyond, 1, new_day)
    return date_keys(new_year, new_month, new_day)


@dataclass(frozen=True)
class CalendarDays:
    """Every day of a span of whole years in one calendar, numbered 0, 1, ... (the day's *ordinal*)."""

    calendar: str
    keys: np.ndarray  # (day,) YYYYMMDD, ascending
    dayofyear: np.ndarray  # (day,) 1-based

    @classmethod
    def spanning(cls, first_year: int, last_year: int, calendar: str) -> CalendarDays:
        """1 January ``first_year`` to 31 December ``last_year``."""
        year, month, day = seasons.calendar_dates(first_year, last_year, calendar)
        keys = date_keys(year, month, day)
        starts = np.flatnonzero(np.r_[True, year[1:] != year[:-1]])
        dayofyear = np.arange(keys.size) - np.repeat(starts, np.diff(np.r_[starts, keys.size])) + 1
        return cls(calendar=calendar, keys=keys, dayofyear=dayofyear.astype(np.int64))

    @property
    def first_year(self) -> int:
        """The first year of the span."""
        return int(self.keys[0] // 10_000)

    @property
    def last_year(self) -> int:
        """The last year of the span."""
        return int(self.keys[-1] // 10_000)

    def exact(self, keys: np.ndarray) -> np.ndarray:
        """The ordinal of each date, -1 where the date does not exist in the calendar or the span."""
        keys = np.asarray(keys, dtype=np.int64)
        at = np.clip(np.searchsorted(self.keys, keys), 0, self.keys.size - 1)
        return np.where(self.keys[at] == keys, at, -1)

    def on_or_after(self, keys: np.ndarray) -> np.ndarray:
        """The ordinal of the first existing day on or after each date (YYYYMMDD, which may not exist)."""
        return np.searchsorted(self.keys, np.asarray(keys, dtype=np.int64), side="left")

    def on_or_before(self, keys: np.ndarray) -> np.ndarray:
        """The ordinal of the last existing day on or before each date."""
        return np.searchsorted(self.keys, np.asarray(keys, dtype=np.int64), side="right") - 1

    def text(self, ordinals: np.ndarray) -> np.ndarray:
        """'YYYY-MM-DD' of each ordinal (object array)."""
        keys = self.keys[np.asarray(ordinals, dtype=np.int64)]
        return np.asarray(
            [f"{k // 10_000:04d}-{k // 100 % 100:02d}-{k % 100:02d}" for k in keys.tolist()], object
        )


def offset_ordinals(
    days: CalendarDays, date_ordinals: np.ndarray, offset: WindowOffset, *, start: bool
) -> np.ndarray:
    """The ordinal of ``date + offset`` for each event date (days of the calendar, or calendar months)."""
    if offset.days is not None:
        return np.asarray(date_ordinals, dtype=np.int64) + offset.days
    shifted = shift_months(days.keys[date_ordinals], int(offset.months or 0), days.calendar, start=start)
    return days.exact(shifted)  # the day was moved into the month, so it exists


# --- the plan -----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class EventPlan:
    """Events resolved against a dataset's calendar and record: which days every window takes in every year.

    A *range* is one distinct calendar window (start month-day, end month-day); every (event, window) has
    one, and every range has one instance per year of ``years``.
    """

    event_ids: np.ndarray  # (event,) object: the event ids, in request order
    feature_rows: np.ndarray  # (event,) int: the row of each event's feature among the request's features
    date_ordinals: np.ndarray  # (event,) int
    windows: tuple[EventWindow, ...]
    range_of: np.ndarray  # (event, window) int: the range of each (event, window)
    window_year: np.ndarray  # (event, window) int: the year in which the event's own window ends
    range_start: np.ndarray  # (range,) int: start month-day as MMDD
    range_end: np.ndarray  # (range,) int: end month-day as MMDD
    years: np.ndarray  # (year,) int: every window-year the record touches
    first: np.ndarray  # (range, year) int: ordinal of each instance's first day
    last: np.ndarray  # (range, year) int: ordinal of each instance's last day
    days: CalendarDays
    record_first: int  # ordinal of the record's first day
    record_last: int  # ordinal of the record's last day

    @property
    def crosses(self) -> np.ndarray:
        """(range,) whether the range crosses the new year."""
        return self.range_start > self.range_end

    @property
    def served(self) -> np.ndarray:
        """(range, year) whether the instance lies wholly within the record."""
        return (self.first >= self.record_first) & (self.last <= self.record_last)

    @property
    def expected_days(self) -> np.ndarray:
        """(range, year) the calendar days of each instance."""
        return self.last - self.first + 1

    def served_span(self) -> tuple[np.ndarray, np.ndarray]:
        """(range,) first and last served window-year of each range (a range serves one unbroken run)."""
        served = self.served
        has = served.any(axis=1)
        first = np.where(has, self.years[np.argmax(served, axis=1)], 0)
        last = np.where(has, self.years[served.shape[1] - 1 - np.argmax(served[:, ::-1], axis=1)], -1)
        return first, last

    def range_label(self, r: int) -> str:
        """'03-14 to 03-13' (crossing the new year)."""
        s, e = int(self.range_start[r]), int(self.range_end[r])
        text = f"{s // 100:02d}-{s % 100:02d} to {e // 100:02d}-{e % 100:02d}"
        return text + (" (crossing the new year)" if s > e else "")

    def instance_text(self, ranges: np.ndarray, year_index: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """'YYYY-MM-DD' of the first and last day of instances (ranges[i], years[year_index[i]])."""
        return self.days.text(self.first[ranges, year_index]), self.days.text(self.last[ranges, year_index])

    def record_text(self) -> str:
        """'1975-01-01 to 2022-12-31'."""
        first, last = self.days.text(np.array([self.record_first, self.record_last]))
        return f"{first} to {last}"


def _event_columns(events: Sequence[Event]) -> tuple[np.ndarray, list[str], np.ndarray]:
    """Ids (object array), feature ids and date keys (YYYYMMDD) of the events."""
    ids = np.asarray([e.id for e in events], dtype=object)
    features = [e.feature_id for e in events]
    keys = np.asarray([int(e.date[:4] + e.date[5:7] + e.date[8:10]) for e in events], dtype=np.int64)
    return ids, features, keys


def _listed(ids: np.ndarray, where: np.ndarray, extra: Sequence[str] | None = None) -> str:
    """ "'hh-1' (2004-03-14), 'hh-7' (...) and 12 more" for the events at ``where``."""
    shown = [
        f"{ids[i]!r}" + (f" ({extra[k]})" if extra is not None else "") for k, i in enumerate(where[:_LISTED])
    ]
    more = f" and {where.size - _LISTED} more" if where.size > _LISTED else ""
    return ", ".join(shown) + more


def plan_events(
    events: Sequence[Event],
    windows: Sequence[EventWindow],
    feature_ids: Sequence[str],
    record_year: np.ndarray,
    record_month: np.ndarray,
    record_day: np.ndarray,
    calendar: str,
) -> EventPlan:
    """Resolve the events and windows of a request against the record's dates and calendar.

    Raises RequestError (pointer at the event or window) for an event of an unknown feature, a date that
    the calendar does not have, a window that is empty or longer than one year for some event, and
    OutOfRangeError for events whose window lies wholly outside the record.
    """
    ids, features, date_keys_ = _event_columns(events)
    n_event = ids.size
    position = {fid: i for i, fid in enumerate(feature_ids)}
    rows = np.asarray([position.get(f, -1) for f in features], dtype=np.int64)
    unknown = np.flatnonzero(rows < 0)
    if unknown.size:
        i = int(unknown[0])
        known = ", ".join(repr(f) for f in list(feature_ids)[:_LISTED])
        raise RequestError(
            f"{unknown.size} event(s) name a feature the request does not hold: {_listed(ids, unknown)}; event "
            f"{ids[i]!r} names {features[i]!r}; the features' ids are {known}"
            + (" ..." if len(feature_ids) > _LISTED else "")
            + "; give each event the id of one of the request's features (see id_property)",
            field="events.feature_id",
            pointer=f"/events/{i}/feature_id",
        )
    record_keys = date_keys(record_year, record_month, record_day)
    if record_keys.size == 0:
        raise OutOfRangeError("the dataset holds no days", field="events")
    event_years = date_keys_ // 10_000
    first_year = int(min(event_years.min(), record_keys[0] // 10_000)) - _REACH_YEARS
    last_year = int(max(event_years.max(), record_keys[-1] // 10_000)) + _REACH_YEARS
    days = CalendarDays.spanning(max(first_year, 1), last_year, calendar)
    date_ordinals = days.exact(date_keys_)
    bad = np.flatnonzero(date_ordinals < 0)
    if bad.size:
        i = int(bad[0])
        raise RequestError(
            f"{bad.size} event date(s) do not exist in the dataset's calendar ({calendar}): "
            f"{_listed(ids, bad, [events[int(j)].date for j in bad[:_LISTED]])}; give dates of that calendar",
            field="events.date",
            pointer=f"/events/{i}/date",
        )
    record_ordinals = days.exact(record_keys)
    record_first, record_last = int(record_ordinals[0]), int(record_ordinals[-1])
    n_window = len(windows)
    starts = np.empty((n_event, n_window), dtype=np.int64)
    ends = np.empty((n_event, n_window), dtype=np.int64)
    for w, window in enumerate(windows):
        start = offset_ordinals(days, date_ordinals, window.start, start=True)
        end = offset_ordinals(days, date_ordinals, window.end, start=False)
        if np.any(start < 0) or np.any(end >= days.keys.size):
            raise RuntimeError("an event window reaches beyond the calendar span that was built for it")
        _check_window(window, w, ids, days, start, end)
        starts[:, w], ends[:, w] = start, end
    outside = np.flatnonzero(np.any((ends < record_first) | (starts > record_last), axis=1))
    if outside.size:
        i = int(outside[0])
        raise OutOfRangeError(
            f"{outside.size} event(s) have a window wholly outside the data of the dataset "
            f"({days.text(np.array([record_first]))[0]} to {days.text(np.array([record_last]))[0]}): "
            f"{_listed(ids, outside, [events[int(j)].date for j in outside[:_LISTED]])}; drop those events or "
            "check their dates",
            field="events.date",
            pointer=f"/events/{i}/date",
        )
    start_md = days.keys[starts] % 10_000
    end_md = days.keys[ends] % 10_000
    codes, range_of = np.unique(start_md * 10_000 + end_md, return_inverse=True)
    range_start, range_end = codes // 10_000, codes % 10_000
    years = np.arange(int(record_keys[0] // 10_000), int(record_keys[-1] // 10_000) + 2, dtype=np.int64)
    crosses = (range_start > range_end).astype(np.int64)
    first = days.on_or_after((years[None, :] - crosses[:, None]) * 10_000 + range_start[:, None])
    last = days.on_or_before(years[None, :] * 10_000 + range_end[:, None])
    return EventPlan(
        event_ids=ids,
        feature_rows=rows,
        date_ordinals=date_ordinals,
        windows=tuple(windows),
        range_of=range_of.reshape(n_event, n_window).astype(np.int64),
        window_year=(days.keys[ends] // 10_000).astype(np.int64),
        range_start=range_start.astype(np.int64),
        range_end=range_end.astype(np.int64),
        years=years,
        first=first.astype(np.int64),
        last=last.astype(np.int64),
        days=days,
        record_first=record_first,
        record_last=record_last,
    )


def _check_window(
    window: EventWindow, w: int, ids: np.ndarray, days: CalendarDays, start: np.ndarray, end: np.ndarray
) -> None:
    """Refuse a window that is empty, or longer than one year, for some event (mixed units can do either)."""
    empty = np.flatnonzero(end < start)
    if empty.size:
        i = int(empty[0])
        raise RequestError(
            f"window {window.name!r} ({window.start.text()} to {window.end.text()}) is empty for "
            f"{empty.size} event(s), e.g. {ids[i]!r}: it would start on {days.text(start[i : i + 1])[0]} and end "
            f"on {days.text(end[i : i + 1])[0]}; choose bounds whose start comes before the end",
            field="windows",
            pointer=f"/windows/{w}",
        )
    start_keys = days.keys[start]
    a_year_later = days.on_or_after(start_keys + 10_000)
    long = np.flatnonzero(end >= a_year_later)
    if long.size:
        i = int(long[0])
        raise RequestError(
            f"window {window.name!r} ({window.start.text()} to {window.end.text()}) is longer than one year for "
            f"{long.size} event(s), e.g. {ids[i]!r}: {days.text(start[i : i + 1])[0]} to "
            f"{days.text(end[i : i + 1])[0]}; a window spans at most one year, so that the same window exists "
            "once in every year; end it a day earlier",
            field="windows",
            pointer=f"/windows/{w}",
        )


# --- baselines of windows -----------------------------------------------------------------------------------


def event_baseline(
    plan: EventPlan, spec: FixedBaseline | TrailingBaseline | None, default_years: int
) -> FixedBaseline | TrailingBaseline:
    """The request's baseline checked against the served window-years, or the default one.

    The default is the first ``default_years`` window-years that every range serves (all of them when fewer,
    at least 3). A fixed baseline must lie within the window-years every range serves.
    """
    first, last = plan.served_span()
    if np.any(last < first):
        r = int(np.flatnonzero(last < first)[0])
        raise OutOfRangeError(
            f"the data ({plan.record_text()}) hold no whole instance of the window {plan.range_label(r)}; "
            "the data must span more than one year of the window",
            field="windows",
        )
    lo, hi = int(first.max()), int(last.min())
    span = f"{lo}-{hi}"
    if isinstance(spec, TrailingBaseline):
        return spec
    if spec is None:
        end = min(lo + default_years - 1, hi)
        if end - lo + 1 < 3:
            raise OutOfRangeError(
                f"the data ({plan.record_text()}) serve only the window-years {span} of every window; a "
                "baseline needs at least 3",
                field="baseline",
            )
        return FixedBaseline(start=lo, end=end)
    if spec.start < lo or spec.end > hi:
        r = int(np.argmax(first) if spec.start < lo else np.argmin(last))
        raise OutOfRangeError(
            f"baseline {spec.start}-{spec.end}: the window {plan.range_label(r)} has whole instances in the data "
            f"({plan.record_text()}) only for the window-years {int(first[r])}-{int(last[r])} (a window-year is "
            f"the year in which the window ends); choose a baseline within {span}",
            field="baseline",
            pointer="/baseline",
        )
    return spec


@dataclass(frozen=True)
class BaselineGroup:
    """Ranges served over the same window-years, and their baseline membership over the plan's years."""

    ranges: np.ndarray  # (range,) bool: the ranges of this group
    members: np.ndarray  # (year, year) bool: members[t, s] when window-year s is in the baseline of t
    fixed: bool
    label: str
    seasons: int
    first_full: int | None  # the first window-year whose baseline is the whole requested one


def baseline_groups(plan: EventPlan, spec: FixedBaseline | TrailingBaseline) -> list[BaselineGroup]:
    """One baseline per distinct span of served window-years (at most a few: crossing or not).

    Within a span the rule is that of seasons (service.indicators.baselines.make_baseline on the served
    window-years): a fixed baseline is its span; a trailing baseline of N gives window-year t the N before
    it, and none when t - N comes before the first served window-year.
    """
    from service.indicators.baselines import make_baseline

    first, last = plan.served_span()
    groups = []
    for lo, hi in sorted({(int(a), int(b)) for a, b in zip(first, last, strict=True)}):
        inside = (plan.years >= lo) & (plan.years <= hi)
        served_years = plan.years[inside]
        made = make_baseline(served_years, spec)
        members = np.zeros((plan.years.size, plan.years.size), dtype=bool)
        index = np.flatnonzero(inside)
        members[np.ix_(index, index)] = made.members
        if isinstance(spec, FixedBaseline):
            members[:] = (plan.years >= spec.start) & (plan.years <= spec.end)
            first_full: int | None = lo
        else:
            first_full = lo + spec.trailing if lo + spec.trailing <= hi + 1 else None
            # a window-year after the served span (an event's window reaching past the data) still has the N
            # served window-years before it
            for t in np.flatnonzero(plan.years > hi):
                y = plan.years[t]
                members[t] = (plan.years >= y - spec.trailing) & (plan.years < y) & inside
                if y - spec.trailing < lo:
                    members[t] = False
        groups.append(
            BaselineGroup(
                ranges=(first == lo) & (last == hi),
                members=members,
                fixed=made.fixed,
                label=made.label,
                seasons=made.seasons,
                first_full=first_full,
            )
        )
    return groups
