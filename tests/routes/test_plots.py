"""POST /v1/plots/series and /v1/plots/map on a real server: PNGs of the right size with the right content."""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
import pytest
from matplotlib.colors import to_rgb
from PIL import Image

from service.plots import OUTLINE, SPELL, class_colour
from service.settings import Settings
from tests._support_server import live_server, run_schemathesis, thread_server  # noqa: F401 - fixture

SPELLS = [
    {
        "name": "wet_warm",
        "window": 5,
        "when": [{"indicator": "prcp_total", "z_min": 0.0}, {"indicator": "tmean", "z_min": 0.0}],
    }
]
FAR_AWAY = {
    "type": "Feature",
    "id": "far-away",
    "properties": {},
    "geometry": {"type": "Polygon", "coordinates": [[[10, 10], [10.1, 10], [10.1, 10.1], [10, 10]]]},
}
BODY = {"baseline": {"start": 1981, "end": 1990}, "years": {"start": 1991, "end": 2020}, "lags": [0, 1]}


def _pixels(png: bytes) -> np.ndarray:
    """A PNG as an (height, width, 3) float array in 0..1."""
    image = Image.open(io.BytesIO(png))
    assert image.format == "PNG"
    return np.asarray(image.convert("RGB"), dtype=float) / 255.0


def _near(pixels: np.ndarray, colour: str, tolerance: float = 0.06) -> np.ndarray:
    """Pixels within ``tolerance`` of a colour in each channel."""
    return (np.abs(pixels - np.asarray(to_rgb(colour))) <= tolerance).all(axis=2)


def _one(communities: dict, index: int = 0) -> dict:
    """A FeatureCollection of one demo community."""
    return {"type": "FeatureCollection", "features": [communities["features"][index]]}


def test_series_plot_shows_the_tables_classes_and_spells(live_server, tiny_communities: dict) -> None:  # noqa: F811
    features = _one(tiny_communities)
    with live_server.client() as http:
        picture = http.post("/v1/plots/series", json=BODY | {"features": features, "spells": SPELLS})
        table = http.post(
            "/v1/indicators",
            params={"format": "json"},
            json=BODY | {"features": features, "spells": SPELLS, "indicators": ["prcp_total", "tmean"]},
        ).json()
    assert picture.status_code == 200, picture.text
    assert picture.headers["content-type"] == "image/png"
    assert picture.headers["x-wxshock-dataset"] == "demo"
    pixels = _pixels(picture.content)
    assert pixels.shape == (640, 1000, 3)
    rows = table["rows"]
    assert len(rows) == 30
    # Every class the table gives appears as bars of its colour; a class it never gives does not.
    for column, family in (("prcp_total_class", "precipitation"), ("tmean_class", "temperature")):
        present = {r[column] for r in rows if r[column] is not None}
        for number in (-2, -1, 1, 2):
            drawn = _near(pixels, class_colour(family, number)).sum()
            if number in present:
                assert drawn > 50, (column, number)
            else:
                assert drawn == 0, (column, number)
    running = [r for r in rows if (r["wet_warm_run"] or 0) >= 1]
    assert running, "the demo community should have some wet and warm seasons"
    assert _near(pixels, SPELL).sum() > 40 * len(running)


def test_series_plot_picks_a_feature_and_a_size(live_server, tiny_communities: dict) -> None:  # noqa: F811
    three = {"type": "FeatureCollection", "features": tiny_communities["features"][:3]}
    wanted = three["features"][2]["id"]
    with live_server.client() as http:
        unnamed = http.post("/v1/plots/series", json=BODY | {"features": three})
        named = http.post(
            "/v1/plots/series",
            params={"feature_id": wanted, "width": 640, "height": 400},
            json=BODY | {"features": three},
        )
        unknown = http.post(
            "/v1/plots/series", params={"feature_id": "qu-999"}, json=BODY | {"features": three}
        )
        small = http.post("/v1/plots/series", params={"width": 10}, json=BODY | {"features": three})
    assert unnamed.status_code == 422
    assert unnamed.headers["content-type"] == "application/problem+json"
    assert "name the one to draw with ?feature_id=" in unnamed.json()["detail"]
    assert named.status_code == 200 and _pixels(named.content).shape == (400, 640, 3)
    assert (
        unknown.status_code == 422 and "'qu-999' is not among the features sent" in unknown.json()["detail"]
    )
    assert small.status_code == 422 and small.headers["content-type"] == "application/problem+json"


def test_map_plot_outlines_the_communities_over_the_anomaly(live_server, tiny_communities: dict) -> None:  # noqa: F811
    with live_server.client() as http:
        response = http.post(
            "/v1/plots/map",
            params={"year": 2010, "indicator": "tmean"},
            json=BODY | {"features": tiny_communities},
        )
        dry = http.post(
            "/v1/plots/map", params={"year": 2010}, json=BODY | {"features": _one(tiny_communities, 5)}
        )
    assert response.status_code == 200, response.text
    pixels = _pixels(response.content)
    assert pixels.shape == (700, 900, 3)
    map_area = pixels[70:630, 100:690]
    # Cells of the temperature scale everywhere (not white), community outlines in dark ink on top.
    coloured = (np.abs(map_area - 1.0).max(axis=2) > 0.05).mean()
    assert coloured > 0.8
    ink = _near(pixels, OUTLINE, tolerance=0.15).sum()
    assert ink > 3000
    # One outlined community draws much less ink than all 62 of them.
    single_ink = _near(_pixels(dry.content), OUTLINE, tolerance=0.15)[70:630, 100:690].sum()
    assert 100 < single_ink < ink / 4


@pytest.mark.parametrize(
    ("params", "body", "message"),
    [
        ({"indicator": "cdd"}, {}, "cannot be mapped"),
        ({"year": 1950}, {}, "1950 is not in the data"),
        ({}, {"season": {"property": "growing_season"}}, "has no property 'growing_season'"),
        (
            {},
            {"season": {"property": "growing_season"}, "features": "with its own season"},
            "one season for the whole grid, got a per-feature season (property 'growing_season')",
        ),
        ({}, {"baseline": {"start": 1900, "end": 1910}}, "1900-1910"),
        ({}, {"features": FAR_AWAY}, "feature 'far-away' lies outside the grid"),
    ],
)
def test_map_plot_errors_are_problem_documents(
    live_server,  # noqa: F811
    tiny_communities: dict,
    params: dict,
    body: dict,
    message: str,
) -> None:
    if body.get("features") == "with its own season":
        feature = dict(tiny_communities["features"][0])
        feature["properties"] = {"growing_season": {"months": [5, 6, 7]}}
        body = body | {"features": feature}
    with live_server.client() as http:
        response = http.post(
            "/v1/plots/map", params=params, json=BODY | {"features": _one(tiny_communities)} | body
        )
    assert response.status_code == 422, response.text
    assert response.headers["content-type"] == "application/problem+json"
    assert message in response.json()["detail"]


def test_plots_need_the_token_when_the_server_has_one(
    tiny_demo: Path, tmp_path: Path, tiny_communities: dict
) -> None:
    settings = Settings(stores=[str(tiny_demo)], data_dir=tmp_path, tokens=["plot-token-0123456789"])
    with thread_server(settings) as server:
        with server.client() as anonymous:
            assert (
                anonymous.post(
                    "/v1/plots/series", json=BODY | {"features": _one(tiny_communities)}
                ).status_code
                == 401
            )
        with server.client(token="plot-token-0123456789") as member:
            assert (
                member.post("/v1/plots/series", json=BODY | {"features": _one(tiny_communities)}).status_code
                == 200
            )


def test_map_plot_takes_a_full_indicator_request(live_server, tiny_communities: dict) -> None:  # noqa: F811
    # The body of an indicator request with spells and pairs naming other indicators maps as well.
    body = BODY | {
        "features": _one(tiny_communities),
        "spells": SPELLS,
        "indicators": ["gdd"],
        "pairs": [["prcp_total", "tmean"]],
    }
    with live_server.client() as http:
        response = http.post("/v1/plots/map", params={"year": 2001}, json=body)
    assert response.status_code == 200, response.text
    assert _pixels(response.content).shape == (700, 900, 3)


@pytest.mark.slow
def test_schemathesis_finds_no_server_error_on_the_picture_routes(live_server, tmp_path: Path) -> None:  # noqa: F811
    # The app-wide schemathesis run leaves the picture routes out (PNGs are slow); they are fuzzed here.
    output = run_schemathesis(
        live_server.base_url,
        tmp_path,
        path_option=("--include-path-regex", "^/v1/plots"),
        seed=20261202,
        request_timeout_s=60,
    )
    assert "Tested: 2" in output, output[-3000:]


@pytest.mark.parametrize("route", ["/v1/plots/series", "/v1/plots/map"])
def test_unencodable_text_is_a_422_with_its_pointer(live_server, tiny_communities: dict, route: str) -> None:  # noqa: F811
    # A lone surrogate escape is valid JSON but not valid Unicode: a user's mistake, never a 500.
    feature = dict(tiny_communities["features"][0]) | {"id": "\udcff"}
    body = json.dumps(BODY | {"features": {"type": "FeatureCollection", "features": [feature]}}).encode()
    with live_server.client() as http:
        response = http.post(route, content=body, headers={"Content-Type": "application/json"})
    assert response.status_code == 422, response.text
    assert response.json()["pointer"] == "/features/features/0/id"
