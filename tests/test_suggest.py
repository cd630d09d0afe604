"""Near misses get a suggestion: misspelt names, seasons written another way, month names."""

from __future__ import annotations

import pytest

from service.suggest import (
    closest,
    did_you_mean,
    field_names_at,
    month_number,
    season_hint,
    unknown_field_message,
)
from tests import _support_server as server_support

live_server = server_support.live_server


def test_closest_names() -> None:
    assert closest("prcp_totl", ["prcp_total", "tmean"]) == "prcp_total"
    assert closest("xyz", ["prcp_total", "tmean"]) is None
    assert did_you_mean("tmena", ["tmean", "tmax_mean"]) == "; did you mean 'tmean'?"
    assert did_you_mean("tmean", ["tmean"]) == ""


@pytest.mark.parametrize(
    ("season", "months"),
    [
        ("MJJASO", [5, 6, 7, 8, 9, 10]),
        ("NDJF", [11, 12, 1, 2]),
        ("JJA", [6, 7, 8]),
        ("May-October", [5, 6, 7, 8, 9, 10]),
        ("nov to feb", [11, 12, 1, 2]),
        ("March", [3]),
        ([4, 5], [4, 5]),
    ],
)
def test_seasons_written_another_way_get_the_months_form(season: object, months: list[int]) -> None:
    assert season_hint(season) == f'; did you mean {{"months": {months}}}?'


@pytest.mark.parametrize("season", ["winter", "J", "MM", "rainy season"])
def test_unclear_seasons_get_no_guess(season: str) -> None:
    assert season_hint(season) == ""  # J alone is June or July; no run of months spells MM


def test_month_names() -> None:
    assert [month_number(m) for m in ("Jan", "february", "SEPT", "Sep.", "ma", "Junee")] == [
        1,
        2,
        9,
        9,
        None,
        None,
    ]


def test_field_names_follow_the_request_schema() -> None:
    assert "lags" in field_names_at([])
    assert set(field_names_at(["baseline"])) == {"start", "end", "trailing"}
    assert "class_min" in field_names_at(["spells", 0, "when", 0])
    assert unknown_field_message(["lag"]) == "unknown field 'lag'; did you mean 'lags'?"


def test_the_server_suggests_through_its_own_validation(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    features = dict(tiny_communities, features=tiny_communities["features"][:1])
    with live_server.client() as client:
        field = client.post("/v1/indicators", json={"features": features, "indicator": ["tmean"]})
        name = client.post("/v1/indicators", json={"features": features, "indicators": ["prcp_totl"]})
        season = client.post("/v1/indicators", json={"features": features, "season": "MJJASO"})
    assert field.status_code == name.status_code == season.status_code == 422
    assert "did you mean 'indicators'?" in field.json()["errors"][0]["message"]
    assert "did you mean 'prcp_total'?" in name.json()["detail"]
    assert 'did you mean {"months": [5, 6, 7, 8, 9, 10]}?' in season.json()["errors"][0]["message"]
