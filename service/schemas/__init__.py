"""The request and response models: the single schema that the API, the CLI and the client share.

One module a concern: ``checks`` (shared field types, value_problems: non-finite numbers and over-long texts
refused in one place, validate_request), ``features`` (GeoJSON input and the fields of every request that sends
communities), ``seasons`` (years, seasons, baselines), ``options`` (indicators, classes, spells, weighting),
``events`` (events, windows, variants), ``indicator_request`` (IndicatorRequest), ``series_request``
(SeriesRequest) and ``answers`` (IndicatorResult, Provenance, ResultWarning). Every public name is importable
from ``service.schemas``.
"""

from __future__ import annotations

from service.schemas.answers import IndicatorResult, Provenance, ResultWarning
from service.schemas.checks import (
    MAX_TEXT,
    MAX_Z,
    Number,
    Text,
    Year,
    ZValue,
    validate_request,
    value_problems,
)
from service.schemas.events import MAX_EVENTS, Event, EventWindow, Variant, WindowOffset
from service.schemas.features import GeoJSONFeature, GeoJSONFeatureCollection
from service.schemas.indicator_request import IndicatorRequest
from service.schemas.options import (
    Classes,
    IndicatorChoice,
    IndicatorSpec,
    LayerWeighting,
    Spell,
    SpellCondition,
    Weighting,
)
from service.schemas.seasons import (
    BaselineSpec,
    FixedBaseline,
    MonthsSeason,
    PropertySeason,
    Season,
    TrailingBaseline,
    WindowSeason,
    YearSpan,
)
from service.schemas.series_request import SeriesRequest

__all__ = [
    "MAX_EVENTS",
    "MAX_TEXT",
    "MAX_Z",
    "BaselineSpec",
    "Classes",
    "Event",
    "EventWindow",
    "FixedBaseline",
    "GeoJSONFeature",
    "GeoJSONFeatureCollection",
    "IndicatorChoice",
    "IndicatorRequest",
    "IndicatorResult",
    "IndicatorSpec",
    "LayerWeighting",
    "MonthsSeason",
    "Number",
    "PropertySeason",
    "Provenance",
    "ResultWarning",
    "Season",
    "SeriesRequest",
    "Spell",
    "SpellCondition",
    "Text",
    "TrailingBaseline",
    "Variant",
    "Weighting",
    "WindowOffset",
    "WindowSeason",
    "Year",
    "YearSpan",
    "ZValue",
    "validate_request",
    "value_problems",
]
