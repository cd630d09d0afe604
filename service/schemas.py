"""The request and response models: the single schema that the API, the CLI and the client share."""

from __future__ import annotations

import math
import re
from collections.abc import Iterator
from typing import Annotated, Any, Literal, TypeVar

from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    StrictBool,
    StrictInt,
    Tag,
    ValidationError,
    ValidatorFunctionWrapHandler,
    field_validator,
    model_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

# Ids and every other free text of a request are at most this many characters (CONTRACTS.md): an id is
# repeated on every output row, so a 1 MB id made a 1 MB request cost gigabytes.
MAX_TEXT = 200
# Class edges and spell z bounds lie within +-MAX_Z standard deviations. A season 10 sd from its normal has a
# probability below 1e-23 under a normal law, so no edge beyond it can separate seasons; the bound also keeps
# the class axis of the pictures drawable (edges of +-1e308 broke matplotlib).
MAX_Z = 10.0

Text = Annotated[str, Field(max_length=MAX_TEXT)]
Year = Annotated[StrictInt, Field(ge=1, le=9999)]
# Numbers refuse true/false and numbers written as text ("1.5"): leniency there hides a mistake.
Number = Annotated[float, Field(strict=True)]
ZValue = Annotated[float, Field(strict=True, ge=-MAX_Z, le=MAX_Z)]

# --- checks that apply to the whole request ---------------------------------------------------------------


def _problem(kind: str, message: str, loc: tuple[int | str, ...], value: Any) -> InitErrorDetails:
    """One validation problem at ``loc`` (a path into the request), for ValidationError.from_exception_data."""
    return InitErrorDetails(type=PydanticCustomError(kind, message), loc=loc, input=value)


def _preview(text: str) -> str:
    """The start of a long text, for messages that must not echo all of it."""
    return text[:40] + f"... ({len(text)} characters)"


def _walk(value: Any, loc: tuple[int | str, ...]) -> Iterator[InitErrorDetails]:
    """Non-finite numbers and texts longer than MAX_TEXT in a JSON-like value, keys included."""
    if isinstance(value, float):
        if not math.isfinite(value):
            yield _problem(
                "finite_number",
                f"{value!r} is not a finite number; JSON has no NaN or Infinity: send a number, or leave the "
                "field out for its default",
                loc,
                repr(value),
            )
    elif isinstance(value, str):
        if len(value) > MAX_TEXT:
            yield _problem(
                "text_too_long",
                f"this text has {len(value)} characters, more than the {MAX_TEXT} allowed",
                loc,
                _preview(value),
            )
    elif isinstance(value, dict):
        for key, item in value.items():
            if isinstance(key, str) and len(key) > MAX_TEXT:
                yield _problem(
                    "text_too_long",
                    f"this name has {len(key)} characters, more than the {MAX_TEXT} allowed",
                    (*loc, key[:40] + "..."),
                    _preview(key),
                )
                continue
            yield from _walk(item, (*loc, key))
    elif isinstance(value, list | tuple):
        for index, item in enumerate(value):
            yield from _walk(item, (*loc, index))


def _id_problems(features: Any, id_property: Any) -> Iterator[InitErrorDetails]:
    """Feature ids (the Feature id, or the property named by id_property) longer than MAX_TEXT."""
    if not isinstance(features, dict):
        return
    if features.get("type") == "FeatureCollection" and isinstance(features.get("features"), list):
        items = [(("features", "features", i), f) for i, f in enumerate(features["features"])]
    else:
        items = [(("features",), features)]
    for loc, feature in items:
        if not isinstance(feature, dict):
            continue
        if isinstance(id_property, str):
            properties = feature.get("properties")
            value = properties.get(id_property) if isinstance(properties, dict) else None
            where: tuple[int | str, ...] = (*loc, "properties", id_property)
        else:
            value, where = feature.get("id"), (*loc, "id")
        if isinstance(value, float) and not math.isfinite(value):
            yield _problem(
                "finite_number",
                f"feature id {value!r} is not a finite number; give every feature a usable id",
                where,
                repr(value),
            )
            continue
        text = str(value) if isinstance(value, str | int) and not isinstance(value, bool) else ""
        if len(text) > MAX_TEXT:
            yield _problem(
                "id_too_long",
                f"this feature id has {len(text)} characters, more than the {MAX_TEXT} allowed; ids are "
                "repeated on every output row: use a short code and keep names in your own table",
                where,
                _preview(text),
            )


def value_problems(data: dict[str, Any]) -> Iterator[InitErrorDetails]:
    """Every non-finite number and over-long text of a raw request (a JSON object), by location.

    This is the one place where they are refused. Inside ``features`` only the ids are looked at: coordinates
    and buffers are checked per feature by service.geometry (a bad one is a per-feature fault, which a job
    may skip), and other properties are not used.
    """
    for key, value in data.items():
        if key == "features":
            yield from _id_problems(value, data.get("id_property"))
        elif isinstance(key, str) and len(key) > MAX_TEXT:
            yield from _walk({key: value}, ())
        else:
            yield from _walk(value, (key,))


_MONTH_DAY = re.compile(r"^(0[1-9]|1[0-2])-(0[1-9]|[12][0-9]|3[01])$")
_NAME = re.compile(r"^[a-z][a-z0-9_]{0,39}$")
_M = TypeVar("_M", bound=BaseModel)


class _Model(BaseModel):
    """Strict about unknown fields, so a misspelt option is an error rather than silently ignored."""

    model_config = ConfigDict(extra="forbid")


# --- features ---------------------------------------------------------------------------------------------


class GeoJSONFeature(BaseModel):
    """One RFC 7946 Feature; its geometry is checked in service.geometry, which names the feature on failure."""

    model_config = ConfigDict(extra="allow")
    type: Literal["Feature"]
    id: str | int | None = None
    geometry: dict[str, Any] | None
    properties: dict[str, Any] | None = None


# Features validated at a time: a single pydantic call over 100,000 features holds the interpreter for a
# second, and every other thread of the server with it; between slices the others run.
_FEATURE_SLICE = 2000


class GeoJSONFeatureCollection(BaseModel):
    """An RFC 7946 FeatureCollection of communities."""

    model_config = ConfigDict(extra="allow")
    type: Literal["FeatureCollection"]
    features: list[GeoJSONFeature] = Field(min_length=1)

    @field_validator("features", mode="wrap")
    @classmethod
    def _in_slices(cls, value: Any, handler: ValidatorFunctionWrapHandler) -> list[GeoJSONFeature]:
        """Long lists validated a slice at a time, errors kept at their own positions."""
        if not isinstance(value, list) or len(value) <= _FEATURE_SLICE:
            return handler(value)
        validated: list[GeoJSONFeature] = []
        problems: list[InitErrorDetails] = []
        for start in range(0, len(value), _FEATURE_SLICE):
            try:
                validated.extend(handler(value[start : start + _FEATURE_SLICE]))
            except ValidationError as exc:
                for error in exc.errors(include_url=False):
                    loc = tuple(error["loc"])
                    if loc and isinstance(loc[0], int):
                        loc = (loc[0] + start, *loc[1:])
                    message = str(error["msg"]).replace("{", "{{").replace("}", "}}")
                    problems.append(_problem(error["type"], message, loc, error.get("input")))
        if problems:
            raise ValidationError.from_exception_data(cls.__name__, problems)
        return validated


# --- time ---------------------------------------------------------------------------------------------------


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


def _by_keys(**tags: str):  # noqa: ANN202 - a pydantic discriminator callable
    """A discriminator choosing a union member by which key a dict carries (strings are tagged 'name')."""

    def choose(value: object) -> str | None:
        if isinstance(value, str):
            return "Name"
        keys = (
            value.keys()
            if isinstance(value, dict)
            else vars(value).keys()
            if hasattr(value, "__dict__")
            else ()
        )
        for key, tag in tags.items():
            if key in keys:
                return tag
        return None

    return choose


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


# --- what to compute ----------------------------------------------------------------------------------------


class IndicatorSpec(BaseModel):
    """An indicator by name with parameters; parameters are checked against the catalog."""

    model_config = ConfigDict(extra="allow")
    name: Text = Field(min_length=1)

    def params(self) -> dict[str, Any]:
        """The parameters given beside the name."""
        return dict(self.model_extra or {})


class Classes(_Model):
    """Class edges in standard-deviation units; n edges make n + 1 classes numbered around 0."""

    edges: list[ZValue] = Field(
        default_factory=lambda: [-2.0, -1.0, 1.0, 2.0],
        min_length=1,
        max_length=12,
        description=f"Standard deviations, strictly increasing, each within +-{MAX_Z:g}.",
    )

    @field_validator("edges")
    @classmethod
    def _increasing(cls, edges: list[float]) -> list[float]:
        """Edges must be strictly increasing (finite and within +-MAX_Z by their type)."""
        if any(b <= a for a, b in zip(edges, edges[1:], strict=False)):
            raise ValueError(f"edges {edges!r} are not strictly increasing")
        return edges


class SpellCondition(_Model):
    """One condition of a spell: bounds on an indicator's class and/or z (all given bounds must hold)."""

    indicator: Text
    class_min: StrictInt | None = Field(default=None, ge=-12, le=12)
    class_max: StrictInt | None = Field(default=None, ge=-12, le=12)
    z_min: ZValue | None = None
    z_max: ZValue | None = None

    @model_validator(mode="after")
    def _some_bound(self) -> SpellCondition:
        """A condition without a bound would always hold."""
        if all(v is None for v in (self.class_min, self.class_max, self.z_min, self.z_max)):
            raise ValueError(
                f"condition on {self.indicator!r} gives none of class_min, class_max, z_min, z_max"
            )
        return self


class Spell(_Model):
    """A named condition over seasons; yields <name>_run and <name>_count over the last `window` seasons."""

    name: Text
    window: StrictInt = Field(default=5, ge=1, le=100)
    when: list[SpellCondition] = Field(min_length=1)

    @field_validator("name")
    @classmethod
    def _column_name(cls, name: str) -> str:
        """The name becomes a column prefix: lower-case letters, digits and underscores."""
        if not _NAME.match(name):
            raise ValueError(
                f"spell name {name!r} must be lower-case letters, digits and '_', starting with a letter"
            )
        return name


class LayerWeighting(_Model):
    """Area weights times a static weight layer of the store (population, cropland, ...)."""

    layer: Text = Field(min_length=1)


Weighting = Annotated[
    Annotated[Literal["area", "centers"], Tag("Name")] | Annotated[LayerWeighting, Tag("Layer")],
    Discriminator(
        _by_keys(layer="Layer"),
        custom_error_type="weighting",
        custom_error_message='weighting must be "area", "centers" or {"layer": NAME}',
    ),
]


# The forms of a baseline and of one requested indicator, shared by the request and its variants.
BaselineSpec = Annotated[
    Annotated[FixedBaseline, Tag("Fixed")] | Annotated[TrailingBaseline, Tag("Trailing")],
    Discriminator(
        _by_keys(trailing="Trailing", start="Fixed", end="Fixed"),
        custom_error_type="baseline",
        custom_error_message='baseline must be {"start": YEAR, "end": YEAR} or {"trailing": N}',
    ),
]
IndicatorChoice = Annotated[
    Annotated[Text, Tag("Name")] | Annotated[IndicatorSpec, Tag("Spec")],
    Discriminator(
        _by_keys(name="Spec"),
        custom_error_type="indicator",
        custom_error_message='an indicator is a name or {"name": NAME, PARAMETER: VALUE, ...}',
    ),
]


# --- events, windows and variants ----------------------------------------------------------------------------

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


def _field_error(model: str, loc: tuple[str | int, ...], message: str, value: Any = None) -> ValidationError:
    """A validation error located at ``loc`` (so the problem document points at that field)."""
    return ValidationError.from_exception_data(
        model,
        [InitErrorDetails(type=PydanticCustomError("value_error", message), loc=loc, input=value)],
    )


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


class _FeatureRequest(_Model):
    """Fields shared by every request that sends communities."""

    dataset: Text | None = Field(default=None, description="Dataset name; default: the first served dataset.")
    features: Annotated[
        Annotated[GeoJSONFeatureCollection, Tag("FeatureCollection")]
        | Annotated[GeoJSONFeature, Tag("Feature")],
        Discriminator(
            lambda v: (
                (v.get("type") if isinstance(v, dict) else getattr(v, "type", None))
                if (v.get("type") if isinstance(v, dict) else getattr(v, "type", None))
                in ("Feature", "FeatureCollection")
                else None
            ),
            custom_error_type="features",
            custom_error_message="features must be a GeoJSON FeatureCollection or Feature (RFC 7946)",
        ),
    ]
    id_property: Text | None = Field(
        default=None,
        description="Feature property that holds the community id; default: the Feature's own id.",
    )
    crs: Text | None = Field(
        default=None,
        description="CRS of the coordinates (any pyproj-readable string); default: WGS84 lon/lat.",
    )
    weighting: Weighting = "area"
    repair: StrictBool = Field(
        default=False, description="Make invalid polygons valid (and report it) instead of failing."
    )
    invalid_features: Literal["fail", "skip"] | None = Field(
        default=None,
        description="A feature that cannot be computed (invalid geometry, outside the grid or without data, "
        "swapped coordinates): 'fail' refuses the request with one 422 listing every such feature; 'skip' "
        "keeps its rows with null values and a feature_skipped warning. Default: 'fail' on demand, 'skip' "
        "for batch jobs.",
    )

    @model_validator(mode="before")
    @classmethod
    def _finite_and_short(cls, data: Any) -> Any:
        """Refuse, in one place, non-finite numbers and over-long text anywhere in the request (see checks)."""
        if isinstance(data, dict):
            problems = list(value_problems(data))
            if problems:
                raise ValidationError.from_exception_data(cls.__name__, problems)
        return data


class IndicatorRequest(_FeatureRequest):
    """A request for season indicators: POST /v1/indicators, POST /v1/jobs, `wxshock compute`."""

    years: YearSpan | None = Field(
        default=None, description="Default: all years the baseline and lags allow."
    )
    season: Season = "year"

    @field_validator("season", mode="before")
    @classmethod
    def _season_form(cls, season: Any) -> Any:
        """A season written another way ('MJJASO', 'May-October', [5, 6]) gets the accepted forms and a guess."""
        from service.suggest import season_message

        if (isinstance(season, str) and season != "year") or isinstance(season, list):
            raise ValueError(season_message(season))
        return season

    baseline: BaselineSpec | None = Field(
        default=None,
        description="Default: the first 30 season-years of data (all of them when the data hold fewer, at "
        "least 3): the 30 years WMO-No. 1090 asks for to fit SPI, and the length of a WMO climate normal.",
    )
    indicators: list[IndicatorChoice] | None = Field(default=None, description="Default: the default set.")
    classes: Classes = Field(default_factory=Classes)
    lags: list[StrictInt] = Field(default_factory=lambda: [0], min_length=1, max_length=50)
    pairs: list[tuple[Text, Text]] = Field(default_factory=list, max_length=20)
    sequences: list[tuple[StrictInt, StrictInt]] = Field(default_factory=list, max_length=20)
    spells: list[Spell] = Field(default_factory=list, max_length=20)
    layout: Literal["wide", "long"] = "wide"
    max_missing_share: Number | None = Field(
        default=None,
        ge=0.0,
        le=1.0,
        description="Share of missing days above which a season is not reported.",
    )
    aggregation: Literal["series", "cells"] = Field(
        default="series",
        description="'series': every indicator on the community's area-weighted (or layer-weighted) daily "
        "series. 'cells': every indicator on each grid cell's own daily series, then the weighted mean of the "
        "cell values; z, classes and lags on that mean. The two are different estimators (e.g. degree days "
        "or wet days of a mean series differ from the mean of the cells').",
    )
    partial_seasons: Literal["scale", "null", "as_is"] = Field(
        default="scale",
        description="Sums and counts of a season that misses some days (within max_missing_share): "
        "'scale' multiplies them by expected days / days present, 'null' leaves them null, 'as_is' keeps "
        "the sum over the days present. Means, extremes and run lengths always use the days present; "
        "the row's notes say partial_season.",
    )
    events: list[Event] | None = Field(
        default=None,
        min_length=1,
        max_length=MAX_EVENTS,
        description="Dated events (interviews, births) of the communities: with events the result has one row "
        "per event (wide) or per (event, window, indicator) (long) instead of season-years; 'years' and "
        "'season' are then refused. Needs 'windows'.",
    )
    windows: list[EventWindow] | None = Field(
        default=None,
        min_length=1,
        max_length=20,
        description="Exposure windows relative to each event's date; each is compared with the same calendar "
        "window in the baseline years (docs/methods.md, 'Event windows').",
    )
    variants: list[Variant] | None = Field(
        default=None,
        min_length=1,
        max_length=20,
        description="Named specifications computed in one request: each overrides some of dataset, baseline, "
        "season, classes, indicators, weighting, aggregation, partial_seasons, max_missing_share. The result "
        "holds every "
        "variant (a 'variant' column in the long layout, '<variant>__' column prefixes in the wide one).",
    )
    lag_values: StrictBool = Field(
        default=False,
        description="Also give each indicator's value at every lag k > 0, as <column>_lag<k> "
        "(value_lag<k> in the long layout).",
    )

    @field_validator("lags")
    @classmethod
    def _lags(cls, lags: list[int]) -> list[int]:
        """Lags are distinct non-negative whole numbers of seasons."""
        for k in lags:
            if k < 0:
                raise ValueError(f"lag {k!r} is negative; lags count seasons back from the season itself (0)")
        if len(set(lags)) != len(lags):
            raise ValueError(f"lags {lags!r} repeat a lag")
        return sorted(lags)

    @field_validator("sequences")
    @classmethod
    def _sequences(cls, sequences: list[tuple[int, int]]) -> list[tuple[int, int]]:
        """A sequence pairs two different non-negative lags, the more recent first."""
        for a, b in sequences:
            if a < 0 or b < 0 or a >= b:
                raise ValueError(f"sequence {[a, b]!r} must be two lags a < b, both >= 0, e.g. [0, 1]")
        return sequences

    @model_validator(mode="after")
    def _spell_names_unique(self) -> IndicatorRequest:
        """Spell names become column prefixes and must differ; each repeat is named by its pointer."""
        first: dict[str, int] = {}
        problems: list[InitErrorDetails] = []
        for index, spell in enumerate(self.spells):
            if spell.name in first:
                message = (
                    f"spell name {spell.name!r} is used more than once (also by spells[{first[spell.name]}]); "
                    "spell names become column prefixes and must differ"
                )
                problems.append(_problem("duplicate_name", message, ("spells", index, "name"), spell.name))
            first.setdefault(spell.name, index)
        if problems:
            raise ValidationError.from_exception_data(type(self).__name__, problems)
        return self

    @model_validator(mode="after")
    def _events_windows_variants(self) -> IndicatorRequest:
        """Events need windows and exclude years and season; names and event ids are unique."""
        given = self.model_fields_set
        if self.events is not None:
            if self.windows is None:
                raise _field_error(
                    "IndicatorRequest",
                    ("windows",),
                    'events need "windows", e.g. [{"name": "prior_year", "start": {"months": -12}, '
                    '"end": {"days": -1}}]',
                )
            if self.aggregation == "cells":
                raise _field_error(
                    "IndicatorRequest",
                    ("aggregation",),
                    "aggregation 'cells' is not available with 'events': event windows are computed on each "
                    "community's mean daily series; drop 'aggregation' (or give \"series\")",
                    "cells",
                )
            for name in ("years", "season"):
                if name in given:
                    raise _field_error(
                        "IndicatorRequest",
                        (name,),
                        f"'{name}' cannot be given with 'events': each event's windows replace season-years; "
                        f"drop '{name}'",
                        getattr(self, name) if isinstance(getattr(self, name), str) else None,
                    )
            seen: dict[str, int] = {}
            for i, event in enumerate(self.events):
                if event.id in seen:
                    raise _field_error(
                        "IndicatorRequest",
                        ("events", i, "id"),
                        f"event id {event.id!r} is used by events {seen[event.id]} and {i}; event ids must be "
                        f"unique (the result is merged onto records by event id)",
                        event.id,
                    )
                seen[event.id] = i
        elif self.windows is not None:
            raise _field_error(
                "IndicatorRequest", ("windows",), "'windows' need 'events' to anchor them on; add events"
            )
        for field, items in (("windows", self.windows), ("variants", self.variants)):
            names = [item.name for item in items or []]
            dupes = sorted({n for n in names if names.count(n) > 1})
            if dupes:
                raise _field_error(
                    "IndicatorRequest", (field,), f"{field[:-1]} names {dupes!r} are used more than once"
                )
        for i, variant in enumerate(self.variants or []):
            if self.events is not None and variant.aggregation == "cells":
                raise _field_error(
                    "IndicatorRequest",
                    ("variants", i, "aggregation"),
                    f"variant {variant.name!r} gives aggregation 'cells', but the request has events (whose "
                    f"windows are computed on each community's mean daily series); drop its 'aggregation'",
                    "cells",
                )
            if self.events is not None and "season" in variant.model_fields_set:
                raise _field_error(
                    "IndicatorRequest",
                    ("variants", i, "season"),
                    f"variant {variant.name!r} gives a season, but the request has events (whose windows "
                    f"replace seasons); drop its 'season'",
                )
        return self


class SeriesRequest(_FeatureRequest):
    """A request for the daily area-weighted series themselves: POST /v1/series."""

    years: YearSpan | None = Field(default=None, description="Default: all years of the dataset.")
    variables: list[Literal["tmax", "tmin", "tmean", "prcp"]] = Field(
        default_factory=lambda: ["tmax", "tmin", "tmean", "prcp"], min_length=1
    )


# --- answers ------------------------------------------------------------------------------------------------


class Provenance(BaseModel):
    """What produced a result: enough to reproduce it byte for byte."""

    dataset: str
    fingerprint: str
    software: str
    request_hash: str
    request: dict[str, Any]
    variants: list[dict[str, Any]] | None = Field(
        default=None,
        description="With variants: each variant's name, dataset, fingerprint, request hash and resolved "
        "request (features and events as in the request).",
    )
    methods: dict[str, Any] | None = Field(
        default=None,
        description="What was computed, in words: daily values, aggregation, seasons, baseline, anomalies, "
        "classes, and per indicator its definition, source, parameters and method details (biases included).",
    )


class ResultWarning(BaseModel):
    """A value left null or flagged for a stated reason; ``code`` is listed in service/warning_codes.py."""

    code: str = Field(description="Stable lower_snake_case code, e.g. partial_season, no_spread, at_clip.")
    feature_id: str | None = None
    indicator: str | None = None
    year: int | None = None
    reason: str


class IndicatorResult(BaseModel):
    """The JSON form of an indicator table: rows as records, with provenance and warnings."""

    provenance: Provenance
    columns: list[str]
    rows: list[dict[str, Any]]
    warnings: list[ResultWarning] = Field(default_factory=list)


def validate_request(model: type[_M], data: object) -> _M:
    """``data`` as a ``model`` instance, or RequestValidationFailed listing every failing field by pointer."""
    from pydantic import ValidationError

    from service.errors import RequestValidationFailed, validation_items

    try:
        return model.model_validate(data)
    except ValidationError as exc:
        items = validation_items(exc.errors(include_url=False))
        first = items[0]
        where = first["pointer"] or "the request"
        raise RequestValidationFailed(
            f"{len(items)} field(s) failed validation; first: {where}: {first['message']}",
            errors=items,
            pointer=first["pointer"] or None,
        ) from None
