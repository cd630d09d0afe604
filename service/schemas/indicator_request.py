"""IndicatorRequest: the one schema of a request for season indicators (API, CLI, jobs and client)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import (
    Field,
    StrictBool,
    StrictInt,
    ValidationError,
    field_validator,
    model_validator,
)
from pydantic_core import InitErrorDetails

from service.schemas.checks import Number, Text, _field_error, _problem
from service.schemas.events import MAX_EVENTS, Event, EventWindow, Variant
from service.schemas.features import _FeatureRequest
from service.schemas.options import Classes, IndicatorChoice, Spell
from service.schemas.seasons import BaselineSpec, Season, YearSpan


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
