"""Time axes: cadence, the leap-year-drops-31-December convention, sub-daily steps grouped into days."""

from __future__ import annotations

import numpy as np
import pytest

from service.errors import IngestError
from service.ingest import timeaxis
from service.ingest.timeaxis import DAY, LEAP_DROPS_DEC31, Stamps


def day(text: str) -> int:
    """Day number (days since 1970-01-01) of a standard-calendar date."""
    return int(np.datetime64(text, "D").astype(np.int64))


def days_between(first: str, last: str) -> np.ndarray:
    return np.arange(day(first), day(last) + 1, dtype=np.int64)


def without(days: np.ndarray, *dates: str) -> np.ndarray:
    return np.setdiff1d(days, [day(d) for d in dates])


# --- cadence ----------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("step", "kind", "per_day"),
    [(DAY, "daily", 1), (3600, "sub-daily", 24), (3 * 3600, "sub-daily", 8), (1800, "sub-daily", 48)],
)
def test_cadence(step: int, kind: str, per_day: int) -> None:
    seconds = np.arange(10, dtype=np.int64) * step
    rhythm = timeaxis.cadence(seconds, None, "test")
    assert (rhythm.kind, rhythm.steps_per_day) == (kind, per_day)


def test_daily_with_a_dropped_leap_day_is_still_daily() -> None:
    days = without(days_between("2003-12-01", "2005-01-10"), "2004-12-31")
    assert timeaxis.cadence(days * DAY, None, "test").kind == "daily"


def test_monthly_data_are_refused_saying_so() -> None:
    months = np.array([day(f"2001-{m:02d}-16") for m in range(1, 13)], dtype=np.int64) * DAY
    with pytest.raises(
        IngestError, match=r"test: the data are monthly or coarser \(one value every 3\d days\)"
    ):
        timeaxis.cadence(months, None, "test")
    bounds = np.array([[day("2001-01-01"), day("2001-02-01")]], dtype=np.int64) * DAY
    with pytest.raises(IngestError, match="monthly or coarser"):
        timeaxis.cadence(months[:1], bounds, "test")  # one step: its bounds tell


def test_pentads_and_odd_steps_are_refused() -> None:
    with pytest.raises(IngestError, match=r"one value every 5 days, coarser than daily"):
        timeaxis.cadence(np.arange(10, dtype=np.int64) * 5 * DAY, None, "test")
    with pytest.raises(IngestError, match=r"time steps of 25200 s do not divide a day evenly"):
        timeaxis.cadence(np.arange(10, dtype=np.int64) * 7 * 3600, None, "test")


# --- the 365-day product convention -----------------------------------------------------------------------------


def test_leap_years_dropping_31_december_are_detected_and_put_back() -> None:
    days = without(days_between("2003-01-01", "2005-12-31"), "2004-12-31")
    axis = timeaxis.daily_axis(days, "standard")
    assert axis.convention == LEAP_DROPS_DEC31
    np.testing.assert_array_equal(axis.days, days_between("2003-01-01", "2005-12-31"))
    assert axis.dropped == (day("2004-12-31"),) and not axis.present[axis.days == day("2004-12-31")].any()
    assert axis.present.sum() == days.size == 3 * 365


def test_a_leap_year_file_of_the_product_ends_on_30_december() -> None:
    days = days_between("2004-01-01", "2004-12-30")  # 365 days, 29 February kept
    axis = timeaxis.daily_axis(days, "standard")
    assert axis.convention == LEAP_DROPS_DEC31 and axis.days[-1] == day("2004-12-31")
    assert axis.present[:-1].all() and not axis.present[-1]


@pytest.mark.parametrize(
    "days",
    [
        without(days_between("2003-01-01", "2005-12-31"), "2004-12-30"),  # another day is missing
        without(days_between("2003-01-01", "2005-12-31"), "2003-12-31"),  # not a leap year
        without(days_between("2003-01-01", "2009-12-31"), "2004-12-31"),  # 2008 keeps its 31 December
        without(days_between("2004-01-01", "2004-12-30"), "2004-02-29"),  # no 29 February: not that product
    ],
)
def test_other_gaps_are_not_the_convention(days: np.ndarray) -> None:
    axis = timeaxis.daily_axis(days, "standard")
    assert axis.convention is None
    np.testing.assert_array_equal(axis.days, days)


def test_the_convention_is_only_looked_for_on_the_standard_calendar() -> None:
    days = np.arange(0, 365 * 2, dtype=np.int64)
    assert timeaxis.daily_axis(days, "noleap").convention is None


def test_daily_numbers_from_noon_stamps_and_from_bounds() -> None:
    # the 1-km product stamps each day at noon with time_bnds from midnight to midnight (from memory)
    noon = days_between("2004-02-27", "2004-03-01") * DAY + DAY // 2
    bounds = np.stack([noon - DAY // 2, noon + DAY // 2], axis=1)
    expected = days_between("2004-02-27", "2004-03-01")
    np.testing.assert_array_equal(timeaxis.daily_numbers(Stamps(noon, None, "standard")), expected)
    # a value stamped at the end of its day (next midnight) lands on its own day through its bounds
    end = noon + DAY // 2
    np.testing.assert_array_equal(timeaxis.daily_numbers(Stamps(end, bounds, "standard")), expected)


# --- sub-daily to daily -----------------------------------------------------------------------------------------


def hourly(first: str, hours: int, offset: int = 0) -> np.ndarray:
    return day(first) * DAY + offset + 3600 * np.arange(hours, dtype=np.int64)


def plan(seconds: np.ndarray, *, period: bool, placement: str = "end", utc_offset: int = 0, bounds=None):
    return timeaxis.day_plan(
        Stamps(seconds, bounds, "standard"), 3600, period=period, placement=placement, utc_offset=utc_offset,
        calendar="standard", where="test",
    )  # fmt: skip


def test_instants_from_midnight_make_whole_days() -> None:
    result = plan(hourly("2001-01-01", 48), period=False)
    assert (result.start, result.n_days, result.first_day, result.left_out) == (0, 2, day("2001-01-01"), ())


def test_accumulations_stamped_at_the_end_of_their_hour() -> None:
    # An hourly reanalysis accumulation stamped 00:00 on 2 January covers 23:00-24:00 on 1 January (from memory
    # of how such archives stamp accumulations). A file of 1 January 00:00 .. 3 January 00:00 (49 stamps) then
    # holds 1 January 01:00 .. 3 January 00:00 as whole days 1 and 2 January, and one hour of 31 December.
    result = plan(hourly("2001-01-01", 49), period=True, placement="end")
    assert (result.start, result.n_days, result.first_day) == (1, 2, day("2001-01-01"))
    assert result.left_out == ("2000-12-31 (1 of 24 steps)",)


def test_start_stamps_and_bounds_place_periods_the_same_way() -> None:
    seconds = hourly("2001-01-01", 48)
    assert plan(seconds, period=True, placement="start").n_days == 2
    bounds = np.stack([seconds, seconds + 3600], axis=1)
    stamped_at_end = seconds + 3600
    result = plan(stamped_at_end, period=True, placement="middle", bounds=bounds)  # bounds win over placement
    assert (result.start, result.n_days, result.first_day) == (0, 2, day("2001-01-01"))


def test_a_fixed_offset_moves_the_day_boundary() -> None:
    # days from midnight to midnight at UTC+03:00 begin at 21:00 UTC the day before
    result = plan(hourly("2001-01-01", 72), period=False, utc_offset=3 * 3600)
    assert result.start == 21 and result.n_days == 2 and result.first_day == day("2001-01-02")
    assert result.left_out == ("2001-01-01 (21 of 24 steps)", "2001-01-04 (3 of 24 steps)")
    west = plan(hourly("2001-01-01", 72), period=False, utc_offset=-5 * 3600)
    assert west.start == 5 and west.first_day == day("2001-01-01") and west.n_days == 2


def test_gaps_and_repeats_inside_sub_daily_data() -> None:
    seconds = np.delete(hourly("2001-01-01", 48), [30])
    with pytest.raises(
        IngestError, match=r"time skips 1 step\(s\) after 2001-01-02 05:00 \(next 2001-01-02 07:00\)"
    ):
        plan(seconds, period=False)
    with pytest.raises(IngestError, match=r"no complete day: 10 steps"):
        plan(hourly("2001-01-01", 10), period=False)


@pytest.mark.parametrize(
    ("text", "seconds"),
    [(None, 0), ("+05:30", 19800), ("-3", -10800), ("UTC+2", 7200), ("utc-09:30", -34200), ("+14:00", 50400)],
)
def test_utc_offsets(text: str | None, seconds: int) -> None:
    assert timeaxis.parse_utc_offset(text) == seconds
    assert timeaxis.parse_utc_offset(timeaxis.format_utc_offset(seconds)) == seconds


@pytest.mark.parametrize("text", ["noon", "+15", "+05:75", "5h"])
def test_bad_utc_offsets(text: str) -> None:
    with pytest.raises(IngestError, match="day boundary offset"):
        timeaxis.parse_utc_offset(text)
