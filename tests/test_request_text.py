"""service.request_text: a request's canonical text and its digests, written feature by feature."""

from __future__ import annotations

import hashlib
import json
from typing import Any

import pytest

from service import request_text
from service.schemas import IndicatorRequest, validate_request


def _square(x: float, y: float, size: float = 0.05) -> list[list[list[float]]]:
    """A closed square ring of ``size`` degrees with its lower left corner at (x, y)."""
    return [[[x, y], [x + size, y], [x + size, y + size], [x, y + size], [x, y]]]


def _collection() -> dict[str, Any]:
    """Three features: non-ASCII text, a MultiPolygon, a member of the collection beside its features."""
    return {
        "type": "FeatureCollection",
        "name": "villages of the plateau",
        "features": [
            {
                "type": "Feature",
                "id": "v-1",
                "geometry": {"type": "Polygon", "coordinates": _square(10.1, 4.2)},
                "properties": {"name": "Kéré-Bà", "households": 41},
            },
            {
                "type": "Feature",
                "id": "v-2",
                "geometry": {
                    "type": "MultiPolygon",
                    "coordinates": [_square(10.3, 4.4), _square(10.5, 4.4, 0.02)],
                },
                "properties": None,
            },
            {
                "type": "Feature",
                "id": "v-3",
                "geometry": {"type": "Polygon", "coordinates": _square(10.7, 4.1)},
                "properties": {"note": "1.0e-5 mm", "w": 1e-05},
            },
        ],
    }


def _canonical(data: Any) -> bytes:
    """Canonical JSON as the module's docstrings define it: sorted keys, no spaces, UTF-8 kept."""
    return json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


@pytest.mark.parametrize(
    "features",
    [_collection(), _collection()["features"][1]],
    ids=["collection", "single-feature"],
)
def test_one_pass_gives_both_digests_of_the_separate_functions(features: dict[str, Any]) -> None:
    request = validate_request(
        IndicatorRequest, {"features": features, "years": {"start": 1991, "end": 2000}}
    )
    around = {"fingerprint": "sha256:" + "ab" * 32, "software": "0.0-test"}

    both = request_text.request_digests(request, around, "request")
    assert both == (
        request_text.features_sha256(request),
        request_text.canonical_sha256(request, around, "request"),
    )
    assert request_text.request_digests(request) == (
        request_text.features_sha256(request),
        request_text.canonical_sha256(request),
    )
    # and against hashlib over the whole dump, written in one call (what the pieces stand for)
    dumped = request.model_dump(mode="json")
    assert both[0] == hashlib.sha256(_canonical(dumped["features"])).hexdigest()
    assert both[1] == hashlib.sha256(_canonical({**around, "request": dumped})).hexdigest()


def test_digests_change_with_one_coordinate() -> None:
    features = _collection()
    before = request_text.request_digests(validate_request(IndicatorRequest, {"features": features}))
    features["features"][2]["geometry"]["coordinates"][0][2][0] += 1e-9
    after = request_text.request_digests(validate_request(IndicatorRequest, {"features": features}))
    assert before[0] != after[0] and before[1] != after[1]
