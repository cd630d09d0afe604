"""Event windows: the same window in other years, every window's value against a plain loop, kernels against cubes.

The references here are written independently of service/indicators/windows: dates come from Python's
datetime (Gregorian) or are counted by hand (360_day, noleap), and each window's value is a plain loop over
its days.
"""

from __future__ import annotations

import datetime as dt
import math
from typing import Any

import numpy as np
import pytest

from service.errors import RequestError
from service.indicators.degree_days import single_sine
from service.indicators.table import plan_indicators
from service.indicators.windows import compute_event_table, plan_events, resolve_events
from service.indicators.windows.kernels import KERNELS, TOTALS
from service.indicators.windows.values import window_keys, window_values
from service.schemas import Event, EventWindow, IndicatorRequest, validate_request
from tests.indicators._support_daily import dates, make_daily

PRIOR_YEAR = {"name": "prior_year", "start": {"months": -12}, "end": {"days": -1}}
THIRD_TRIMESTER = {"name": "t3", "start": {"days": -91}, "end": {"days": -1}}


class _Dates:
    """The record's dates as resolve_events reads them."""

    def __init__(self, d: dict[str, np.ndarray]) -> None:
        self.year, self.month, self.day = d["year"], d["month"], d["day"]


def _window(spec: dict[str, Any]) -> EventWindow:
    return EventWindow.model_validate(spec)


def _plan(
    events: list[tuple[str, str]], windows: list[dict], start: str, end: str, calendar: str = "standard"
):
    """A plan of events (id, date) of one feature 'f' over a record from ``start`` to ``end``."""
    d = dates(start, end, calendar)
    return plan_events(
        [Event(id=i, feature_id="f", date=when) for i, when in events],
        [_window(w) for w in windows],
        ["f"],
        d["year"],
        d["month"],
        d["day"],
        calendar,
    )


def _instance(plan, event: int, window: int, year: int) -> tuple[str, str]:
    """First and last day ('YYYY-MM-DD') of an event's window in window-year ``year``."""
    r = plan.range_of[event, window]
    y = int(np.searchsorted(plan.years, year))
    first, last = plan.instance_text(np.array([r]), np.array([y]))
    return str(first[0]), str(last[0])


# --- the same window in other years ----------------------------------------------------------------------


def test_prior_year_around_29_february_gregorian() -> None:
    plan = _plan(
        [("mar1", "2004-03-01"), ("feb29", "2004-02-29"), ("jan15", "2004-01-15")],
        [PRIOR_YEAR, {"name": "day", "start": {"days": 0}, "end": {"days": 0}}],
        "1990-01-01",
        "2010-12-31",
    )
    # the event's own window: 12 months back to the day before (366 days, 29 February 2004 included)
    assert _instance(plan, 0, 0, 2004) == ("2003-03-01", "2004-02-29")
    # the same calendar days in other years: 29 February where the year has it, else the window ends on the 28th
    assert _instance(plan, 0, 0, 2005) == ("2004-03-01", "2005-02-28")
    assert _instance(plan, 0, 0, 2008) == ("2007-03-01", "2008-02-29")
    # 29 February - 12 months starts on 1 March (a start never moves before its day)
    assert _instance(plan, 1, 0, 2004) == ("2003-03-01", "2004-02-28")
    assert _instance(plan, 1, 0, 2008) == ("2007-03-01", "2008-02-28")
    # a one-day window on 29 February exists only in leap years
    r = plan.range_of[1, 1]
    expected = plan.expected_days[r]
    leap = (plan.years % 4 == 0) & ((plan.years % 100 != 0) | (plan.years % 400 == 0))
    assert expected[leap].tolist() == [1] * int(leap.sum())
    assert expected[~leap].tolist() == [0] * int((~leap).sum())
    # a window that crosses the new year keeps crossing it; its window-year is the year it ends
    assert _instance(plan, 2, 0, 2004) == ("2003-01-15", "2004-01-14")
    assert _instance(plan, 2, 0, 1995) == ("1994-01-15", "1995-01-14")
    assert plan.window_year[:, 0].tolist() == [2004, 2004, 2004]


def test_window_crossing_the_new_year_and_its_length_in_every_year() -> None:
    plan = _plan(
        [("e", "2004-01-15")],
        [{"name": "late", "start": {"months": -3}, "end": {"days": -1}}],
        "1990-01-01",
        "2010-12-31",
    )
    assert _instance(plan, 0, 0, 2004) == ("2003-10-15", "2004-01-14")
    assert _instance(plan, 0, 0, 1991) == ("1990-10-15", "1991-01-14")
    r = plan.range_of[0, 0]
    served = plan.served[r]
    assert plan.years[served][0] == 1991  # the 1990 window would start in 1989, before the data
    assert set(plan.expected_days[r][served].tolist()) == {92}  # 17 + 30 + 31 + 14 days, every year


def test_360_day_calendar_every_year_alike() -> None:
    plan = _plan(
        [("feb30", "2004-02-30"), ("jan1", "2004-01-01")],
        [PRIOR_YEAR, {"name": "q", "start": {"days": -90}, "end": {"days": -1}}],
        "1990-01-01",
        "2010-12-30",
        "360_day",
    )
    assert _instance(plan, 0, 0, 2004) == ("2003-02-30", "2004-02-29")
    assert _instance(plan, 0, 0, 1996) == ("1995-02-30", "1996-02-29")
    assert set(plan.expected_days[plan.range_of[0, 0]][plan.served[plan.range_of[0, 0]]].tolist()) == {360}
    # 90 days of 30-day months before 1 January: 1 October to 30 December of the year before
    assert _instance(plan, 1, 1, 2003) == ("2003-10-01", "2003-12-30")
    assert plan.window_year[1].tolist() == [2003, 2003]


def test_noleap_calendar_same_length() -> None:
    plan = _plan([("e", "2004-03-01")], [PRIOR_YEAR], "1990-01-01", "2010-12-31", "noleap")
    r = plan.range_of[0, 0]
    assert _instance(plan, 0, 0, 2004) == ("2003-03-01", "2004-02-28")
    assert set(plan.expected_days[r][plan.served[r]].tolist()) == {365}


def test_window_longer_than_a_year_in_its_calendar_is_refused() -> None:
    with pytest.raises(RequestError, match="longer than one year"):
        _plan(
            [("e", "2004-03-01")],
            [{"name": "w", "start": {"days": -365}, "end": {"days": -1}}],
            "1990-01-01",
            "2010-12-30",
            "360_day",
        )
    with pytest.raises(RequestError, match="empty for 1 event"):
        _plan(
            [("e", "2004-03-31")],
            [{"name": "w", "start": {"months": -1}, "end": {"days": -31}}],
            "1990-01-01",
            "2010-12-31",
        )


@pytest.mark.parametrize(
    ("events", "message"),
    [
        ([("e", "2003-02-29")], "do not exist in the dataset's calendar"),
        ([("e", "2031-05-02")], "wholly outside the data"),
    ],
)
def test_bad_events_are_named(events: list[tuple[str, str]], message: str) -> None:
    with pytest.raises(RequestError, match=message) as info:
        _plan(events, [PRIOR_YEAR], "1990-01-01", "2010-12-31")
    assert info.value.pointer == "/events/0/date"


def test_event_of_unknown_feature() -> None:
    d = dates("1990-01-01", "2010-12-31")
    with pytest.raises(RequestError, match="'nowhere'") as info:
        plan_events(
            [Event(id="e", feature_id="nowhere", date="2004-01-01")],
            [_window(PRIOR_YEAR)],
            ["f"],
            d["year"],
            d["month"],
            d["day"],
            "standard",
        )
    assert info.value.pointer == "/events/0/feature_id"


def test_request_with_events_refuses_years_and_season() -> None:
    base = {
        "features": {"type": "Feature", "id": "f", "geometry": None},
        "events": [{"id": "e", "feature_id": "f", "date": "2004-01-01"}],
        "windows": [PRIOR_YEAR],
    }
    for field, value in (("years", {"start": 2000, "end": 2001}), ("season", "year")):
        with pytest.raises(RequestError) as info:
            validate_request(IndicatorRequest, {**base, field: value})
        assert info.value.pointer == f"/{field}"
    with pytest.raises(RequestError, match="12 characters"):
        validate_request(IndicatorRequest, {**base, "windows": [{**PRIOR_YEAR, "name": "a_very_long_name"}]})


# --- values against a plain loop ------------------------------------------------------------------------------


def _series(start: str, end: str, n_features: int, seed: int, calendar: str = "standard", gaps: float = 0.0):
    """Invented daily weather (rounded to 0.1 like a store), with a share ``gaps`` of missing days."""
    rng = np.random.default_rng(seed)
    d = dates(start, end, calendar)
    n = d["year"].size
    prcp = np.where(rng.random((n_features, n)) < 0.4, rng.gamma(0.8, 8.0, (n_features, n)), 0.0).round(1)
    tmax = (24 + 6 * np.sin(2 * np.pi * d["dayofyear"] / 365.0) + rng.normal(0, 2.5, (n_features, n))).round(
        1
    )
    tmin = (tmax - 7 - 4 * rng.random((n_features, n))).round(1)
    if gaps:
        for values in (prcp, tmax, tmin):
            values[rng.random(values.shape) < gaps] = np.nan
    return d, make_daily(
        start, end, n_features=n_features, calendar=calendar, tmax=tmax, tmin=tmin, prcp=prcp
    )


def _gregorian_days(when: dt.date, start: dict, end: dict) -> tuple[dt.date, dt.date]:
    """An event's window by datetime arithmetic (months: same day, a start moved to the 1st of the next month)."""

    def shift(bound: dict, is_start: bool) -> dt.date:
        if "days" in bound:
            return when + dt.timedelta(days=bound["days"])
        total = when.year * 12 + when.month - 1 + bound["months"]
        year, month = divmod(total, 12)
        try:
            return dt.date(year, month + 1, when.day)
        except ValueError:  # the month is shorter than the day
            next_month = (dt.date(year, month + 1, 1) + dt.timedelta(days=32)).replace(day=1)
            return next_month if is_start else next_month - dt.timedelta(days=1)

    return shift(start, True), shift(end, False)


def _same_window(first: dt.date, last: dt.date, year: int) -> tuple[dt.date, dt.date]:
    """The same calendar days ending in ``year``: a missing 29 February starts on 1 March, ends on the 28th."""
    start_year = year - (last.year - first.year)

    def day(y: int, d: dt.date, is_start: bool) -> dt.date:
        try:
            return dt.date(y, d.month, d.day)
        except ValueError:  # 29 February in a common year
            return dt.date(y, 3, 1) if is_start else dt.date(y, 2, 28)

    return day(start_year, first, True), day(year, last, False)


def _reference(
    values: dict[str, np.ndarray], index: dict[dt.date, int], f: int, a: dt.date, b: dt.date
) -> dict[str, float]:
    """Indicators of one window by a plain loop over its days (no gaps in the data here)."""
    days = []
    d = a
    while d <= b:
        days.append(index[d])
        d += dt.timedelta(days=1)
    prcp = [values["prcp"][f, t] for t in days]
    tmax = [values["tmax"][f, t] for t in days]
    tmin = [values["tmin"][f, t] for t in days]
    longest = run = 0
    for p in prcp:
        run = run + 1 if p < 1.0 else 0
        longest = max(longest, run)
    five = max(sum(prcp[i : i + 5]) for i in range(len(prcp) - 4)) if len(prcp) >= 5 else math.nan
    return {
        "prcp_total": sum(prcp),
        "wet_days": float(sum(1 for p in prcp if p >= 1.0)),
        "tmean": sum((x + n) / 2 for x, n in zip(tmax, tmin, strict=True)) / len(days),
        "gdd": float(
            sum(
                single_sine(np.array([x]), np.array([n]), 10.0, 30.0)[0]
                for x, n in zip(tmax, tmin, strict=True)
            )
        ),
        "cdd": float(longest),
        "rx5day": five,
        "txx": max(tmax),
    }


def test_window_values_and_z_against_a_plain_loop() -> None:
    d, daily = _series("1985-01-01", "2012-12-31", 2, seed=3)
    index = {
        dt.date(int(y), int(m), int(dd)): t
        for t, (y, m, dd) in enumerate(zip(d["year"], d["month"], d["day"], strict=True))
    }
    events = [
        ("a", "f0", "2004-03-01"),
        ("b", "f1", "2004-02-29"),
        ("c", "f0", "2009-01-15"),
        ("d", "f1", "2001-07-31"),
        ("e", "f0", "2008-03-01"),
    ]
    windows = [PRIOR_YEAR, THIRD_TRIMESTER]
    names = ["prcp_total", "wet_days", "tmean", "gdd", "cdd", "rx5day", "txx"]
    request = validate_request(
        IndicatorRequest,
        {
            "features": {
                "type": "FeatureCollection",
                "features": [{"type": "Feature", "id": f, "geometry": None} for f in ("f0", "f1")],
            },
            "events": [{"id": i, "feature_id": f, "date": w} for i, f, w in events],
            "windows": windows,
            "indicators": names,
            "baseline": {"start": 1990, "end": 2005},
            "lags": [0, 2],
            "lag_values": True,
        },
    )
    resolved = resolve_events(request, ["f0", "f1"], _Dates(d), "standard")
    table = compute_event_table(
        daily, resolved.plan.feature_rows, np.arange(len(events)), ["f0", "f1"], resolved
    )
    frame = table.frame
    values = {"prcp": daily.prcp, "tmax": daily.tmax, "tmin": daily.tmin}
    for e, (event_id, fid, when) in enumerate(events):
        f = int(fid[1])
        row = frame.iloc[e]
        assert row["event_id"] == event_id
        for window in windows:
            first, last = _gregorian_days(dt.date.fromisoformat(when), window["start"], window["end"])
            assert (row[f"{window['name']}__start"], row[f"{window['name']}__end"]) == (
                first.isoformat(),
                last.isoformat(),
            )
            own = _reference(values, index, f, first, last)
            base = [_reference(values, index, f, *_same_window(first, last, y)) for y in range(1990, 2006)]
            lagged = _reference(values, index, f, *_same_window(first, last, last.year - 2))
            for name in names:
                column = f"{window['name']}__{name}"
                assert row[column] == pytest.approx(own[name], rel=1e-10, abs=1e-9), (event_id, column)
                sample = np.array([b[name] for b in base])
                z = (own[name] - sample.mean()) / sample.std(ddof=1)
                assert row[f"{column}_z"] == pytest.approx(z, abs=1e-8), (event_id, column)
                assert row[f"{column}_lag2"] == pytest.approx(lagged[name], rel=1e-10, abs=1e-9)
    assert (frame["notes"] == "").all()


def test_trailing_baseline_is_the_same_window_in_the_years_before() -> None:
    d, daily = _series("1985-01-01", "2012-12-31", 1, seed=5)
    index = {
        dt.date(int(y), int(m), int(dd)): t
        for t, (y, m, dd) in enumerate(zip(d["year"], d["month"], d["day"], strict=True))
    }
    request = validate_request(
        IndicatorRequest,
        {
            "features": {"type": "Feature", "id": "f0", "geometry": None},
            "events": [{"id": "a", "feature_id": "f0", "date": "2004-02-29"}],
            "windows": [PRIOR_YEAR],
            "indicators": ["prcp_total"],
            "baseline": {"trailing": 7},
        },
    )
    resolved = resolve_events(request, ["f0"], _Dates(d), "standard")
    row = compute_event_table(daily, np.array([0]), np.array([0]), ["f0"], resolved).frame.iloc[0]
    values = {"prcp": daily.prcp, "tmax": daily.tmax, "tmin": daily.tmin}
    first, last = dt.date(2003, 3, 1), dt.date(2004, 2, 28)
    own = _reference(values, index, 0, first, last)["prcp_total"]
    sample = np.array(
        [_reference(values, index, 0, *_same_window(first, last, y))["prcp_total"] for y in range(1997, 2004)]
    )
    assert row["prior_year__prcp_total_z"] == pytest.approx(
        (own - sample.mean()) / sample.std(ddof=1), abs=1e-8
    )


def test_360_day_window_sums_against_a_plain_loop() -> None:
    d, daily = _series("1985-01-01", "2012-12-30", 1, seed=7, calendar="360_day")
    index = {
        (int(y), int(m), int(dd)): t
        for t, (y, m, dd) in enumerate(zip(d["year"], d["month"], d["day"], strict=True))
    }
    request = validate_request(
        IndicatorRequest,
        {
            "features": {"type": "Feature", "id": "f0", "geometry": None},
            "events": [{"id": "a", "feature_id": "f0", "date": "2004-02-30"}],
            "windows": [PRIOR_YEAR],
            "indicators": ["prcp_total"],
            "baseline": {"start": 1990, "end": 2005},
        },
    )
    resolved = resolve_events(request, ["f0"], _Dates(d), "360_day")
    row = compute_event_table(daily, np.array([0]), np.array([0]), ["f0"], resolved).frame.iloc[0]

    def total(year: int) -> float:  # 30 February of the year before to 29 February: 360 days, by hand
        out, y, m, dd = 0.0, year - 1, 2, 30
        for _ in range(360):
            out += daily.prcp[0, index[(y, m, dd)]]
            dd += 1
            if dd > 30:
                dd, m = 1, m + 1
                if m > 12:
                    m, y = 1, y + 1
        return out

    assert row["prior_year__prcp_total"] == pytest.approx(total(2004), rel=1e-12)
    sample = np.array([total(y) for y in range(1990, 2006)])
    assert row["prior_year__prcp_total_z"] == pytest.approx(
        (total(2004) - sample.mean()) / sample.std(ddof=1), abs=1e-8
    )


# --- kernels against season cubes -------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("calendar", "policy"), [("standard", "scale"), ("360_day", "as_is"), ("standard", "null")]
)
def test_every_kernel_equals_the_indicator_on_cubes(calendar: str, policy: str) -> None:
    """Each kernel gives the indicator's own season function on the window's days, gaps and partial windows included."""
    end = "2009-12-30" if calendar == "360_day" else "2009-12-31"
    d, daily = _series("1988-01-01", end, 3, seed=11, calendar=calendar, gaps=0.03)
    daily.prcp[1, 400:470] = np.nan  # one incomplete window
    names = sorted(set(KERNELS) | set(TOTALS))
    specs: list[Any] = [n for n in names if n not in ("gdd", "edd")] + [
        {"name": "gdd", "base": 8, "cap": 31},
        "edd",
    ]
    last_day = "2009-12-20" if calendar == "360_day" else "2009-12-31"
    events = [
        ("a", "f0", "1998-03-01"),
        ("b", "f1", "1996-02-29" if calendar == "standard" else "1996-02-30"),
        ("c", "f2", "2003-01-10"),
        ("d", "f1", "1989-05-20"),  # its prior year reaches before the data: a partial window
        ("e", "f0", last_day),
    ]
    request = validate_request(
        IndicatorRequest,
        {
            "features": {
                "type": "FeatureCollection",
                "features": [{"type": "Feature", "id": f"f{i}", "geometry": None} for i in range(3)],
            },
            "events": [{"id": i, "feature_id": f, "date": w} for i, f, w in events],
            "windows": [
                PRIOR_YEAR,
                THIRD_TRIMESTER,
                {"name": "after", "start": {"days": 0}, "end": {"days": 40}},
            ],
            "indicators": specs,
            "baseline": {"start": 1990, "end": 2004},
            "max_missing_share": 0.3,
            "partial_seasons": policy,
        },
    )
    resolved = resolve_events(request, ["f0", "f1", "f2"], _Dates(d), calendar)
    plan = resolved.plan
    planned = plan_indicators(resolved.request.indicators or [])
    keys, _ = window_keys(plan.feature_rows, plan.range_of, plan.range_start.size)
    fast = window_values(daily, keys, plan, planned, resolved.request, resolved.groups)
    slow = window_values(daily, keys, plan, planned, resolved.request, resolved.groups, use_kernels=False)
    served = plan.served[keys.range]
    # Before issue 10's SPI/SPEI (standardize_against_baseline with a distribution), the cubes' SPI and SPEI
    # did not scale the totals of partial seasons (CONTRACTS.md: they must); the kernels do.
    import inspect

    from service.indicators import drought

    scaled = "distribution" in inspect.signature(drought.standardize_against_baseline).parameters
    for p in planned:
        if p.indicator.standardized and policy != "as_is" and not scaled:
            continue
        a, b = fast.values[p.column], slow.values[p.column]
        # the cubes hold only whole windows; the kernels also serve windows reaching past the data
        np.testing.assert_allclose(a[served], b[served], rtol=1e-9, atol=1e-9, err_msg=p.column)
        assert np.isnan(b[~served]).all()
        for code in ("incomplete_season", "partial_season"):
            np.testing.assert_array_equal(
                fast.flags[p.column][code], slow.flags[p.column][code], err_msg=f"{p.column} {code}"
            )
    assert np.isfinite(fast.values["tmean"][~served]).any()  # the partial window at the record's start


def test_the_methods_page_states_the_window_rule() -> None:
    from pathlib import Path

    text = (Path(__file__).parents[2] / "docs" / "methods.md").read_text(encoding="utf-8")
    section = text.split("## 6. Event windows", 1)[1].split("\n## ", 1)[0]
    for part in (
        "same calendar days",
        "29 February",
        "starts on the next day (1 March)",
        "ends on the day before (28 February)",
        "1 March 2003 to 28 February 2004",
        "`360_day`",
        "`noleap`",
        "crosses it\n  in every year",
        "window-year",
        '`{"trailing": N}`',
        "Lag k is the same window k years earlier",
        "`max_missing_share`",
        '`"aggregation": "cells"` is refused',
    ):
        assert part in section, part
