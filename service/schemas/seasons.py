"""When: spans of season-years, the forms of a season (months, a day-of-year window, a feature property) and
of a baseline (fixed or trailing)."""

from __future__ import annotations

import re
from typing import Annotated, Any, Literal

from pydantic import (
    Discriminator,
    Field,
    StrictInt,
    Tag,
    field_validator,
    model_validator,
)

from service.schemas.checks import Text, Year, _by_keys, _Model

_MONTH_DAY = re.compile(r"^(0[1-9]|1[0-2])-(0[1-9]|[12][0-9]|3[01])$")


class YearSpan(_Model):
    """Inclusive span of season-years."""

    start: Year
    end: Year

    @model_validator(mode="after")
    def _ordered(self) -> YearSpan:
        """start must not come after end."""
        if self.start > self.end:
            raise ValueError(f"start ({self.start}) is after end ({self.end}); swap them")
        return self


class MonthsSeason(_Model):
    """A season of whole months, one contiguous run that may cross the new year ([11, 12, 1, 2])."""

    months: list[StrictInt] = Field(
        min_length=1, max_length=12, description="Month numbers 1-12 (English month names are read too)."
    )

    @field_validator("months", mode="before")
    @classmethod
    def _month_names(cls, months: Any) -> Any:
        """English month names ('May', 'october', 'Sep') become their numbers; other values pass on."""
        from service.suggest import MONTHS, did_you_mean, month_number

        if not isinstance(months, list):
            return months
        numbers = []
        for month in months:
            if isinstance(month, str) and not month.strip().isdigit():
                number = month_number(month)
                if number is None:
                    raise ValueError(
                        f"month {month!r} is not a month name{did_you_mean(month.lower(), MONTHS)}; give "
                        "numbers 1-12 or English names"
                    )
                numbers.append(number)
            else:
                numbers.append(month)
        return numbers

    @field_validator("months")
    @classmethod
    def _contiguous(cls, months: list[int]) -> list[int]:
        """Months are 1..12, unique, and consecutive in the order given (12 may be followed by 1)."""
        for m in months:
            if not 1 <= m <= 12:
                raise ValueError(f"month {m!r} is not in 1..12")
        if len(set(months)) != len(months):
            raise ValueError(f"months {months!r} repeat a month")
        for a, b in zip(months, months[1:], strict=False):
            if b != a % 12 + 1:
                raise ValueError(
                    f"months {months!r} are not one consecutive run in calendar order (after {a} comes "
                    f"{a % 12 + 1}, not {b}); a season is one run of months, e.g. [11, 12, 1, 2]"
                )
        return months


class WindowSeason(_Model):
    """A season from one day of the year to another, both inclusive, 'MM-DD'; it may cross the new year."""

    start: Text
    end: Text

    @field_validator("start", "end")
    @classmethod
    def _month_day(cls, value: str) -> str:
        """'MM-DD' with a real month and a day that exists in some year."""
        if not _MONTH_DAY.match(value):
            raise ValueError(f"{value!r} is not a month and day written 'MM-DD', e.g. '11-01'")
        month, day = int(value[:2]), int(value[3:])
        if day > (31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)[month - 1]:
            raise ValueError(f"{value!r}: that month has no day {day}")
        return value


class PropertySeason(_Model):
    """Each feature's own season, read from a feature property that holds a months list or a window."""

    property: Text = Field(min_length=1)


# Discriminated unions, so that a mistake in one form is reported for that form only.
Season = Annotated[
    Annotated[Literal["year"], Tag("Name")]
    | Annotated[MonthsSeason, Tag("Months")]
    | Annotated[WindowSeason, Tag("Window")]
    | Annotated[PropertySeason, Tag("Property")],
    Discriminator(
        _by_keys(months="Months", start="Window", end="Window", property="Property"),
        custom_error_type="season",
        custom_error_message='season must be "year", {"months": [...]}, {"start": "MM-DD", '
        '"end": "MM-DD"} or {"property": NAME}',
    ),
]


class FixedBaseline(_Model):
    """The normal is the same span of season-years for every season."""

    start: Year
    end: Year

    @model_validator(mode="after")
    def _span(self) -> FixedBaseline:
        """At least three seasons, in order."""
        if self.start > self.end:
            raise ValueError(f"baseline start ({self.start}) is after its end ({self.end})")
        if self.end - self.start + 1 < 3:
            raise ValueError(
                f"baseline {self.start}-{self.end} has fewer than 3 seasons; a normal needs at least 3"
            )
        return self


class TrailingBaseline(_Model):
    """A moving normal: the N season-years before each season-year."""

    trailing: StrictInt = Field(ge=3, le=100)


# The forms of a baseline and of one requested indicator, shared by the request and its variants.
BaselineSpec = Annotated[
    Annotated[FixedBaseline, Tag("Fixed")] | Annotated[TrailingBaseline, Tag("Trailing")],
    Discriminator(
        _by_keys(trailing="Trailing", start="Fixed", end="Fixed"),
        custom_error_type="baseline",
        custom_error_message='baseline must be {"start": YEAR, "end": YEAR} or {"trailing": N}',
    ),
]
