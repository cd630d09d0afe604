"""Time axes of input files: calendars, the cadence of the data, product conventions, sub-daily to daily.

Every time stamp is handled as whole seconds since 1970-01-01 00:00 in the file's own CF calendar, so the
standard, noleap, 360_day and other calendars take the same path. A day is ``seconds // 86400``, the store's day
number (days since 1970-01-01 in the calendar).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

import cftime
import numpy as np

from service.errors import IngestError

DAY = 86_400  # seconds
TIME_UNITS_SECONDS = "seconds since 1970-01-01 00:00:00"
STANDARD_CALENDARS = ("standard", "gregorian", "proleptic_gregorian")
_CALENDAR_ALIASES = {"gregorian": "standard", "365_day": "noleap", "366_day": "all_leap"}

# The convention of a widely used 1-km daily product: a 365-day year in which leap years drop 31 December.
LEAP_DROPS_DEC31 = "leap_years_drop_dec31"

Placement = Literal["end", "start", "middle"]


def normalise_calendar(name: str) -> str:
    """One spelling per CF calendar: gregorian -> standard, 365_day -> noleap, 366_day -> all_leap."""
    lower = name.strip().lower() or "standard"
    return _CALENDAR_ALIASES.get(lower, lower)


@dataclass(frozen=True)
class Stamps:
    """The time axis of one variable in one file: stamps and, when the file gives them, cell bounds."""

    seconds: np.ndarray  # (time,) int64 seconds since 1970-01-01 in the calendar
    bounds: np.ndarray | None  # (time, 2) int64 seconds, or None
    calendar: str


def _seconds(values: np.ndarray, calendar: str, where: str) -> np.ndarray:
    """Decoded dates (datetime64 or cftime) as int64 seconds since 1970-01-01 in the calendar."""
    flat = np.asarray(values).ravel()
    if np.issubdtype(flat.dtype, np.datetime64):
        if np.isnat(flat).any():
            raise IngestError(
                f"{where}: the time axis has missing values (NaT); every time step needs a date"
            )
        return flat.astype("datetime64[s]").astype(np.int64).reshape(np.shape(values))
    if flat.size and isinstance(flat[0], cftime.datetime):
        numbers = cftime.date2num(list(flat), TIME_UNITS_SECONDS, calendar=calendar)
        return np.round(np.asarray(numbers, dtype=np.float64)).astype(np.int64).reshape(np.shape(values))
    raise IngestError(
        f"{where}: the time axis was not decoded as dates (dtype {flat.dtype}); give it CF units such as "
        "'days since 1970-01-01' and a calendar"
    )


def read_stamps(ds: Any, time_name: str, where: str) -> Stamps:
    """The stamps (and bounds, when named by the coordinate's ``bounds`` attribute) of a decoded time axis."""
    time = ds[time_name]
    values = np.asarray(time.values)
    calendar = "standard"
    if values.size and not np.issubdtype(values.dtype, np.datetime64):
        first = values.ravel()[0]
        if isinstance(first, cftime.datetime):
            calendar = normalise_calendar(str(first.calendar))
    seconds = _seconds(values, calendar, where)
    bounds = None
    name = time.attrs.get("bounds") or time.encoding.get("bounds")
    if name and name in ds.variables and ds[name].ndim == 2 and ds[name].shape[0] == values.size:
        raw = np.asarray(ds[name].values)
        if np.issubdtype(raw.dtype, np.datetime64) or (
            raw.size and isinstance(raw.ravel()[0], cftime.datetime)
        ):
            bounds = _seconds(raw, calendar, f"{where} (time bounds {name!r})")
    return Stamps(seconds=seconds, bounds=bounds, calendar=calendar)


@dataclass(frozen=True)
class Cadence:
    """How often a variable has a value: "daily" or "sub-daily" (every ``step`` seconds)."""

    kind: Literal["daily", "sub-daily"]
    step: int  # seconds

    @property
    def steps_per_day(self) -> int:
        """Time steps in one day (1 for daily data)."""
        return 1 if self.kind == "daily" else DAY // self.step

    def describe(self) -> str:
        """'daily', 'hourly', '3-hourly', 'every 30 minutes'."""
        if self.kind == "daily":
            return "daily"
        if self.step % 3600 == 0:
            hours = self.step // 3600
            return "hourly" if hours == 1 else f"{hours}-hourly"
        return f"every {self.step // 60} minutes" if self.step % 60 == 0 else f"every {self.step} s"


def cadence(seconds: np.ndarray, bounds: np.ndarray | None, where: str) -> Cadence:
    """The cadence of a time axis (sorted stamps of every file of one variable); refuses coarser than daily."""
    if seconds.size >= 2:
        step = int(np.median(np.diff(seconds)))
    elif bounds is not None:
        step = int(np.median(bounds[:, 1] - bounds[:, 0]))
    else:
        step = DAY  # one time step and no bounds: taken as one day
    if step <= 0:
        raise IngestError(
            f"{where}: time does not increase (median step {step} s); sort or fix the time axis"
        )
    if step >= 28 * DAY:
        raise IngestError(
            f"{where}: the data are monthly or coarser (one value every {step / DAY:.0f} days); wxshock needs daily "
            "or sub-daily values, since its indicators count days, spells and daily extremes"
        )
    if step >= 2 * DAY:
        raise IngestError(
            f"{where}: the data have one value every {step / DAY:g} days, coarser than daily; wxshock needs daily "
            "or sub-daily values"
        )
    if step >= DAY:
        return Cadence("daily", DAY)
    if DAY % step:
        raise IngestError(
            f"{where}: time steps of {step} s do not divide a day evenly; wxshock turns sub-daily data into days "
            "only when each day has the same whole number of steps"
        )
    return Cadence("sub-daily", step)


# --- daily data -----------------------------------------------------------------------------------------------


def daily_numbers(stamps: Stamps) -> np.ndarray:
    """(time,) day numbers of daily data: the day of each cell's midpoint when bounds are given, else of the stamp.

    With bounds, a value stamped at the end of its day (the next midnight) still lands on its own day.
    """
    if stamps.bounds is not None:
        width = stamps.bounds[:, 1] - stamps.bounds[:, 0]
        if np.all(np.abs(width - DAY) <= 1):
            middle = (stamps.bounds[:, 0] + stamps.bounds[:, 1]) // 2
            return middle // DAY
    return stamps.seconds // DAY


@dataclass(frozen=True)
class DailyAxis:
    """Day numbers of a daily series after product conventions: every day from first to last, and which of them
    the product itself left out (to be stored as missing)."""

    days: np.ndarray  # (n,) int64, contiguous
    present: np.ndarray  # (n,) bool: the input has this day
    convention: str | None  # LEAP_DROPS_DEC31 or None
    dropped: tuple[int, ...] = field(default=())  # day numbers the convention left out


def _is_leap(year: int) -> bool:
    """Leap year of the proleptic Gregorian calendar."""
    return year % 4 == 0 and (year % 100 != 0 or year % 400 == 0)


def _ymd(days: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(year, month, day) of standard-calendar day numbers."""
    stamps = days.astype("datetime64[D]")
    years = stamps.astype("datetime64[Y]").astype(np.int64) + 1970
    months = stamps.astype("datetime64[M]").astype(np.int64) % 12 + 1
    dom = (stamps - stamps.astype("datetime64[M]")).astype(np.int64) + 1
    return years, months, dom


def leap_dec31_day(year: int) -> int:
    """The day number of 31 December of a year (standard calendar)."""
    return int(np.datetime64(f"{year:04d}-12-31", "D").astype(np.int64))


def daily_axis(days: np.ndarray, calendar: str) -> DailyAxis:
    """The full daily axis of sorted, unique day numbers, with the leap-year-drops-31-December convention
    detected on the standard calendar.

    The convention holds when the days missing between the first and the last are exactly the 31 Decembers of
    the leap years in between (at least one), or when the data end on 30 December of a leap year that they
    hold 29 February of (a year file of that product) and no leap year in between keeps its 31 December. The
    dropped days are then part of the axis, marked absent, so that they are stored as missing and the next year
    appends. Otherwise the axis is the days themselves and any gap is left for the caller to report.
    """
    days = np.asarray(days, dtype=np.int64)
    plain = DailyAxis(days=days, present=np.ones(days.size, dtype=bool), convention=None)
    if calendar != "standard" or days.size == 0:
        return plain
    full = np.arange(days[0], days[-1] + 1, dtype=np.int64)
    missing = np.setdiff1d(full, days, assume_unique=True)
    first_year = int(_ymd(days[:1])[0][0])
    last_year, last_month, last_day = (int(v[0]) for v in _ymd(days[-1:]))
    leap_dec31 = np.array(
        [leap_dec31_day(y) for y in range(first_year, last_year + 1) if _is_leap(y)], dtype=np.int64
    )
    leap_dec31 = leap_dec31[(leap_dec31 >= days[0]) & (leap_dec31 <= days[-1])]
    ends_on_leap_dec30 = (
        _is_leap(last_year)
        and (last_month, last_day) == (12, 30)
        and bool(np.isin(np.datetime64(f"{last_year:04d}-02-29", "D").astype(np.int64), days))
    )
    if not np.array_equal(missing, leap_dec31) or (missing.size == 0 and not ends_on_leap_dec30):
        return plain
    dropped = missing.tolist()
    if ends_on_leap_dec30:
        dropped.append(leap_dec31_day(last_year))
        full = np.append(full, leap_dec31_day(last_year))
    return DailyAxis(
        days=full,
        present=np.isin(full, days),
        convention=LEAP_DROPS_DEC31,
        dropped=tuple(int(d) for d in dropped),
    )


# --- sub-daily data -------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class DayPlan:
    """How a regular sub-daily series becomes days: steps [start, start + days * steps_per_day) in whole days."""

    start: int  # index of the first step of the first complete day
    n_days: int
    steps_per_day: int
    first_day: int  # day number of the first complete day
    left_out: tuple[str, ...]  # incomplete days at either end, described


def parse_utc_offset(text: str | None) -> int:
    """Seconds east of UTC from '+05:30', '-3', 'UTC+2' or None (0); days then run midnight to midnight there."""
    if text is None or not str(text).strip():
        return 0
    raw = str(text).strip().upper().removeprefix("UTC")
    sign = -1 if raw.startswith("-") else 1
    body = raw.lstrip("+-")
    if not body:
        return 0  # "UTC" itself
    hours, _, minutes = body.partition(":")
    try:
        h, m = int(hours), int(minutes or 0)
    except ValueError:
        raise IngestError(
            f"day boundary offset {text!r} is not an offset from UTC; write it as +05:30, -03:00 or +2",
            field="utc_offset",
        ) from None
    if not (0 <= m < 60) or h > 14 or (h == 14 and m):
        raise IngestError(
            f"day boundary offset {text!r} is outside UTC-14:00 .. UTC+14:00", field="utc_offset"
        )
    return sign * (h * 3600 + m * 60)


def format_utc_offset(seconds: int) -> str:
    """'UTC', 'UTC+05:30', 'UTC-03:00'."""
    if seconds == 0:
        return "UTC"
    sign = "+" if seconds > 0 else "-"
    minutes = abs(seconds) // 60
    return f"UTC{sign}{minutes // 60:02d}:{minutes % 60:02d}"


def day_plan(
    stamps: Stamps,
    step: int,
    *,
    period: bool,
    placement: Placement,
    utc_offset: int,
    calendar: str,
    where: str,
) -> DayPlan:
    """The whole days of a regular sub-daily series, in local days at ``utc_offset`` seconds east of UTC.

    A value that stands for a period (a sum, mean, maximum or minimum over its time step) belongs to the day
    that holds the middle of that period: the middle of its bounds when the file gives them, else the stamp
    moved by half a step as ``placement`` says (``end``: the stamp closes the period, as hourly reanalysis
    accumulations are stamped; ``start``; ``middle``). An instantaneous value belongs to the day of its stamp.
    Incomplete days at the ends are left out (and named); a missing or repeated step inside is an error.
    """
    seconds = stamps.seconds
    steps = np.diff(seconds)
    bad = np.flatnonzero(steps != step)
    if bad.size:
        i = int(bad[0])
        what = "goes back or repeats" if steps[i] <= 0 else f"skips {int(steps[i]) // step - 1} step(s)"
        raise IngestError(
            f"{where}: time {what} after {_stamp(seconds[i], calendar)} (next {_stamp(seconds[i + 1], calendar)}); "
            f"sub-daily data must run every {step} s without gaps or repeats"
        )
    if stamps.bounds is not None and period:
        centre = (stamps.bounds[:, 0] + stamps.bounds[:, 1]) // 2
    elif period:
        shift = {"end": -step // 2, "start": step // 2, "middle": 0}[placement]
        centre = seconds + shift
    else:
        centre = seconds
    local_day = (centre + utc_offset) // DAY
    per_day = DAY // step
    days, first_index, counts = np.unique(local_day, return_index=True, return_counts=True)
    complete = counts == per_day
    if np.any(counts > per_day):
        raise IngestError(f"{where}: a day holds more than {per_day} steps of {step} s; check the time axis")
    left_out: list[str] = []
    if not complete.any():
        raise IngestError(
            f"{where}: no complete day: {seconds.size} steps of {step} s from {_stamp(seconds[0], calendar)} "
            f"never fill the {per_day} steps of one day"
        )
    first = int(np.flatnonzero(complete)[0])
    last = int(np.flatnonzero(complete)[-1])
    if not complete[first : last + 1].all():
        i = first + int(np.flatnonzero(~complete[first : last + 1])[0])
        raise IngestError(
            f"{where}: day {_day(int(days[i]), calendar)} has {int(counts[i])} of {per_day} steps"
        )
    for i in list(range(first)) + list(range(last + 1, days.size)):
        left_out.append(f"{_day(int(days[i]), calendar)} ({int(counts[i])} of {per_day} steps)")
    return DayPlan(
        start=int(first_index[first]),
        n_days=last - first + 1,
        steps_per_day=per_day,
        first_day=int(days[first]),
        left_out=tuple(left_out),
    )


def _stamp(seconds: int | np.integer, calendar: str) -> str:
    """'YYYY-MM-DD HH:MM' of a stamp in a calendar."""
    date = cftime.num2date(int(seconds), TIME_UNITS_SECONDS, calendar=calendar)
    return f"{date.year:04d}-{date.month:02d}-{date.day:02d} {date.hour:02d}:{date.minute:02d}"


def _day(day: int, calendar: str) -> str:
    """'YYYY-MM-DD' of a day number in a calendar."""
    date = cftime.num2date(int(day), "days since 1970-01-01", calendar=calendar)
    return f"{date.year:04d}-{date.month:02d}-{date.day:02d}"


def day_text(day: int, calendar: str) -> str:
    """'YYYY-MM-DD' of a day number in a calendar (for messages and records)."""
    return _day(day, calendar)


def decoded_days(days: np.ndarray, calendar: str) -> Any:
    """Decoded dates of day numbers (datetime64 for the standard calendar, cftime otherwise)."""
    if calendar in STANDARD_CALENDARS:
        return np.asarray(days, dtype=np.int64).astype("datetime64[D]").astype("datetime64[ns]")
    return cftime.num2date(np.asarray(days, dtype=np.int64), "days since 1970-01-01", calendar=calendar)
