"""The request model: the issue's example parses, every form of each field parses, mistakes name the field."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from service.errors import RequestValidationFailed
from service.schemas import (
    FixedBaseline,
    IndicatorRequest,
    IndicatorSpec,
    LayerWeighting,
    MonthsSeason,
    SeriesRequest,
    TrailingBaseline,
    WindowSeason,
    validate_request,
)

POINT = {
    "type": "Feature",
    "id": "c-1",
    "geometry": {"type": "Point", "coordinates": [1.0, 2.0]},
    "properties": {"buffer_m": 2000},
}
COLLECTION = {"type": "FeatureCollection", "features": [POINT]}

# The example request of the indicator issue, as shipped in examples/request.json.
EXAMPLE = {
    **json.loads((Path(__file__).parents[1] / "examples" / "request.json").read_text(encoding="utf-8")),
    "features": COLLECTION,
}


def _with(**changes: Any) -> dict[str, Any]:
    return {**EXAMPLE, **changes}


def test_example_request_parses() -> None:
    request = validate_request(IndicatorRequest, EXAMPLE)
    assert isinstance(request.season, MonthsSeason) and request.season.months[0] == 5
    assert isinstance(request.baseline, FixedBaseline)
    gdd = request.indicators[3]
    assert isinstance(gdd, IndicatorSpec) and gdd.params() == {"base": 10, "cap": 30}
    assert request.spells[0].when[1].class_min == 1


def test_defaults_need_only_features() -> None:
    request = validate_request(IndicatorRequest, {"features": POINT})
    assert request.season == "year" and request.lags == [0] and request.layout == "wide"
    assert request.baseline is None and request.years is None and request.weighting == "area"
    assert request.classes.edges == [-2.0, -1.0, 1.0, 2.0]


@pytest.mark.parametrize(
    ("field", "value", "kind"),
    [
        ("season", {"start": "11-01", "end": "04-30"}, WindowSeason),
        ("season", {"months": [11, 12, 1, 2]}, MonthsSeason),
        ("baseline", {"trailing": 10}, TrailingBaseline),
        ("weighting", {"layer": "population"}, LayerWeighting),
    ],
)
def test_alternative_forms(field: str, value: Any, kind: type) -> None:
    assert isinstance(getattr(validate_request(IndicatorRequest, _with(**{field: value})), field), kind)


@pytest.mark.parametrize(
    ("changes", "pointer", "message"),
    [
        ({"season": {"months": [1, 3]}}, "/season/months", "not one consecutive run"),
        ({"season": {"months": [0, 1]}}, "/season/months", "not in 1..12"),
        ({"season": "winter"}, "/season", 'give "year", {"months"'),
        ({"season": "MJJASO"}, "/season", 'did you mean {"months": [5, 6, 7, 8, 9, 10]}?'),
        ({"season": "November-February"}, "/season", 'did you mean {"months": [11, 12, 1, 2]}?'),
        ({"season": [6, 7, 8]}, "/season", 'did you mean {"months": [6, 7, 8]}?'),
        ({"season": {"months": ["May", "Junee"]}}, "/season/months", "did you mean 'june'?"),
        ({"season": {"start": "02-30", "end": "03-01"}}, "/season/start", "no day 30"),
        ({"season": {"start": "2-1", "end": "03-01"}}, "/season/start", "MM-DD"),
        ({"baseline": {"start": 1990, "end": 1980}}, "/baseline", "after its end"),
        ({"baseline": {"start": 1990, "end": 1991}}, "/baseline", "fewer than 3"),
        ({"baseline": {"trailing": 2}}, "/baseline/trailing", "greater than or equal to 3"),
        ({"baseline": {"from": 1980}}, "/baseline", "baseline must be"),
        ({"lags": [0, -1]}, "/lags", "negative"),
        ({"lags": [1, 1]}, "/lags", "repeat"),
        ({"sequences": [[2, 1]]}, "/sequences", "a < b"),
        ({"classes": {"edges": [1, -1]}}, "/classes/edges", "strictly increasing"),
        ({"weighting": "nearest"}, "/weighting", "Input should be 'area' or 'centers'"),
        ({"indicators": [3]}, "/indicators/0", "an indicator is a name"),
        ({"years": {"start": 2000, "end": 1990}}, "/years", "swap them"),
        ({"layout": "tall"}, "/layout", "'wide' or 'long'"),
        (
            {"spells": [{"name": "Dry", "when": [{"indicator": "prcp_total", "z_max": -1}]}]},
            "/spells/0/name",
            "lower-case",
        ),
        (
            {"spells": [{"name": "d", "when": [{"indicator": "prcp_total"}]}]},
            "/spells/0/when/0",
            "gives none of",
        ),
        ({"colour": "red"}, "/colour", "unknown field 'colour'; fields here: dataset, features"),
        ({"indicator": ["tmean"]}, "/indicator", "unknown field 'indicator'; did you mean 'indicators'?"),
        ({"lag": [1]}, "/lag", "unknown field 'lag'; did you mean 'lags'?"),
        ({"baseline": {"strat": 1980, "end": 1990}}, "/baseline/strat", "did you mean 'start'?"),
        ({"features": {"type": "Polygon", "coordinates": []}}, "/features", "FeatureCollection or Feature"),
        ({"features": {"type": "FeatureCollection", "features": []}}, "/features/features", "at least 1"),
    ],
)
def test_mistakes_name_the_field(changes: dict[str, Any], pointer: str, message: str) -> None:
    with pytest.raises(RequestValidationFailed) as caught:
        validate_request(IndicatorRequest, _with(**changes))
    pointers = [item["pointer"] for item in caught.value.errors]
    assert pointer in pointers, pointers
    messages = " | ".join(item["message"] for item in caught.value.errors if item["pointer"] == pointer)
    assert message in messages
    assert caught.value.status == 422


def test_duplicate_spell_names_refused() -> None:
    spell = {"name": "dry", "when": [{"indicator": "prcp_total", "z_max": -1}]}
    with pytest.raises(RequestValidationFailed, match="used more than once"):
        validate_request(IndicatorRequest, _with(spells=[spell, spell]))


def test_lags_are_sorted() -> None:
    assert validate_request(IndicatorRequest, _with(lags=[2, 0, 1])).lags == [0, 1, 2]


def test_series_request_defaults() -> None:
    request = validate_request(SeriesRequest, {"features": COLLECTION})
    assert request.variables == ["tmax", "tmin", "tmean", "prcp"]
    with pytest.raises(RequestValidationFailed, match="variables"):
        validate_request(SeriesRequest, {"features": COLLECTION, "variables": ["wind"]})


def test_month_names_are_read_as_numbers() -> None:
    request = validate_request(IndicatorRequest, _with(season={"months": ["Nov", "december", "Jan"]}))
    assert request.season.months == [11, 12, 1]
