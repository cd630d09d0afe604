"""The store's time axis: day numbers since 1970-01-01 in a CF calendar, and their dates."""

from __future__ import annotations

from dataclasses import dataclass

import cftime
import numpy as np
import pandas as pd
import xarray as xr

from service.errors import StoreFormatError
from service.store.layout import _DEFAULT_CALENDARS, TIME_UNITS


@dataclass(frozen=True)
class DateTable:
    """The calendar date of every time step in the store's calendar (all (time,) int arrays; dayofyear 1-based)."""

    year: np.ndarray
    month: np.ndarray
    day: np.ndarray
    dayofyear: np.ndarray

    def __len__(self) -> int:
        return len(self.year)


def _iso(dates: DateTable, i: int) -> str:
    """'YYYY-MM-DD' of time step i."""
    return f"{int(dates.year[i]):04d}-{int(dates.month[i]):02d}-{int(dates.day[i]):02d}"


def _date_table(numbers: np.ndarray, calendar: str) -> DateTable:
    """Dates of day numbers (days since 1970-01-01) in a CF calendar."""
    if numbers.size == 0:
        empty = np.zeros(0, dtype=np.int64)
        return DateTable(empty, empty, empty, empty)
    if calendar in _DEFAULT_CALENDARS:
        stamps = pd.to_datetime(numbers, unit="D", origin="unix")
        return DateTable(
            year=np.asarray(stamps.year, dtype=np.int64),
            month=np.asarray(stamps.month, dtype=np.int64),
            day=np.asarray(stamps.day, dtype=np.int64),
            dayofyear=np.asarray(stamps.day_of_year, dtype=np.int64),
        )
    objects = cftime.num2date(numbers, TIME_UNITS, calendar=calendar)
    return DateTable(
        year=np.fromiter((d.year for d in objects), dtype=np.int64, count=numbers.size),
        month=np.fromiter((d.month for d in objects), dtype=np.int64, count=numbers.size),
        day=np.fromiter((d.day for d in objects), dtype=np.int64, count=numbers.size),
        dayofyear=np.fromiter((d.dayofyr for d in objects), dtype=np.int64, count=numbers.size),
    )


def _time_index(numbers: np.ndarray, calendar: str) -> pd.Index:
    """Decoded time axis for xarray coordinates."""
    if calendar in _DEFAULT_CALENDARS:
        return pd.DatetimeIndex(pd.to_datetime(numbers, unit="D", origin="unix"), name="time")
    objects = cftime.num2date(numbers, TIME_UNITS, calendar=calendar)
    return xr.CFTimeIndex(objects, name="time")


def _daily_numbers(time: xr.DataArray) -> tuple[np.ndarray, str]:
    """Day numbers (days since 1970-01-01, whole days) and calendar of a decoded daily time coordinate."""
    values = time.values
    if np.issubdtype(values.dtype, np.datetime64):
        # standard, gregorian and proleptic_gregorian agree on every date after 1582; one name keeps stores
        # written from differently labelled files comparable (and appendable)
        calendar = "standard"
        days = values.astype("datetime64[D]").astype(np.int64)
        return days, calendar
    if values.size and isinstance(values.flat[0], cftime.datetime):
        calendar = str(values.flat[0].calendar)
        if calendar == "gregorian":
            calendar = "standard"
        midnight = [
            type(d)(d.year, d.month, d.day, calendar=d.calendar, has_year_zero=d.has_year_zero)
            for d in values
        ]
        days = np.asarray(cftime.date2num(midnight, TIME_UNITS, calendar=calendar), dtype=np.float64)
        return np.round(days).astype(np.int64), calendar
    raise StoreFormatError(
        f"time coordinate has dtype {values.dtype!r}; expected decoded dates (datetime64 or cftime)"
    )
