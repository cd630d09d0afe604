"""Dated events of the communities, the exposure windows anchored on them, and named variants of a request."""

from __future__ import annotations

import re
from typing import Any, Literal

from pydantic import (
    Field,
    StrictInt,
    field_validator,
    model_validator,
)

from service.schemas.checks import MAX_TEXT, Number, Text, _Model
from service.schemas.options import Classes, IndicatorChoice, Weighting
from service.schemas.seasons import BaselineSpec, Season

# Window and variant names prefix output columns (`<name>__<column>`): short, lower case, starting with a
# letter so that every output format (Stata and R names included) can carry the prefixed column.
_PREFIX_NAME = re.compile(r"^[a-z][a-z0-9_]{0,11}$")
_EVENT_DATE = re.compile(r"^([0-9]{4})-([0-9]{2})-([0-9]{2})$")
MAX_EVENTS = 1_000_000


def _prefix_name(kind: str, name: str) -> str:
    """A window or variant name: at most 12 of [a-z0-9_], starting with a letter, no '__' (the separator)."""
    if not _PREFIX_NAME.match(name) or "__" in name:
        raise ValueError(
            f"{kind} name {name!r} must be 1 to 12 characters of a-z, 0-9 and '_', start with a letter and "
            f"hold no '__' (it prefixes columns as {name or 'NAME'}__COLUMN), e.g. 'prior_year'"
        )
    return name


class Event(_Model):
    """One interview, birth or other dated event of a community; its windows are anchored on its date."""

    id: str = Field(min_length=1, max_length=MAX_TEXT, description="The event's id (unique in the request).")
    feature_id: str = Field(
        min_length=1, max_length=MAX_TEXT, description="The id of the community (feature) it belongs to."
    )
    date: str = Field(
        description="'YYYY-MM-DD' in the dataset's calendar (so '2004-02-30' is a date of a 360_day dataset)."
    )

    @field_validator("id", "feature_id", mode="before")
    @classmethod
    def _whole_numbers_as_text(cls, value: object) -> object:
        """Ids read from a table may be whole numbers: they become text (ids are always text)."""
        if isinstance(value, int) and not isinstance(value, bool):
            return str(value)
        return value

    @field_validator("date")
    @classmethod
    def _date(cls, value: str) -> str:
        """'YYYY-MM-DD' with a month 1..12 and a day 1..31 (whether the day exists is the calendar's call)."""
        match = _EVENT_DATE.match(value)
        if not match or not 1 <= int(match[2]) <= 12 or not 1 <= int(match[3]) <= 31 or int(match[1]) < 1:
            raise ValueError(f"{value!r} is not a date written 'YYYY-MM-DD', e.g. '2004-03-14'")
        return value


class WindowOffset(_Model):
    """A day relative to the event's date: whole days, or whole calendar months (give exactly one)."""

    days: StrictInt | None = Field(
        default=None, ge=-3660, le=3660, description="Days after (negative: before)."
    )
    months: StrictInt | None = Field(
        default=None,
        ge=-120,
        le=120,
        description="Calendar months after (negative: before): the same day of that month; where the month "
        "is shorter, a start moves to the first day of the next month and an end to the month's last day "
        "(29 February - 12 months starts on 1 March).",
    )

    @model_validator(mode="after")
    def _one_unit(self) -> WindowOffset:
        """Exactly one of days and months."""
        if (self.days is None) == (self.months is None):
            raise ValueError('give exactly one of "days" and "months", e.g. {"months": -12} or {"days": -1}')
        return self

    def text(self) -> str:
        """'-12 months', '-1 days'."""
        return f"{self.months} months" if self.months is not None else f"{self.days} days"


class EventWindow(_Model):
    """A named exposure window from ``start`` to ``end`` (both inclusive) relative to each event's date."""

    name: str = Field(description="At most 12 of a-z, 0-9, '_'; prefixes the window's columns.")
    start: WindowOffset
    end: WindowOffset

    @field_validator("name")
    @classmethod
    def _name(cls, name: str) -> str:
        """A column prefix."""
        return _prefix_name("window", name)

    @model_validator(mode="after")
    def _order_and_length(self) -> EventWindow:
        """With both bounds in one unit: start not after end, and at most one year from start to end."""
        for unit, most, what in (("days", 365, "366 days"), ("months", 12, "12 months")):
            first, last = getattr(self.start, unit), getattr(self.end, unit)
            if first is None or last is None:
                continue
            if first > last:
                raise ValueError(
                    f"window {self.name!r} starts ({first} {unit}) after it ends ({last} {unit}); swap them"
                )
            if last - first >= most + (unit == "days"):
                raise ValueError(
                    f"window {self.name!r} from {first} to {last} {unit} is longer than one year; a window "
                    f"spans at most one year (e.g. months -12 to days -1), so that the same window exists once "
                    f"in every year; split it into windows of up to {what}"
                )
        return self


class Variant(_Model):
    """A named specification: the fields it gives replace the request's own, the rest are the request's."""

    name: str = Field(description="At most 12 of a-z, 0-9, '_'; the `variant` column or the column prefix.")
    dataset: Text | None = Field(default=None, description="Another served dataset (product).")
    baseline: BaselineSpec | None = None
    season: Season | None = None
    classes: Classes | None = None
    indicators: list[IndicatorChoice] | None = Field(default=None, min_length=1)
    weighting: Weighting | None = None
    aggregation: Literal["series", "cells"] | None = None
    partial_seasons: Literal["scale", "null", "as_is"] | None = None
    max_missing_share: Number | None = Field(default=None, ge=0.0, le=1.0)

    @field_validator("name")
    @classmethod
    def _name(cls, name: str) -> str:
        """A column prefix."""
        return _prefix_name("variant", name)

    def overrides(self) -> dict[str, Any]:
        """The fields this variant gives (name aside), as a request would hold them."""
        return {k: getattr(self, k) for k in self.model_fields_set if k != "name"}
