"""Tests of per-feature faults (invalid="fail" | "skip"), strict coordinates and request CRS checks."""

from __future__ import annotations

from typing import Any

import numpy as np
import pyproj
import pytest

from service.errors import FeatureError, LimitExceededError, RequestError
from service.geometry import FAULT_CODES, SkippedFeature, compute_weights, parse_features
from service.store import Grid

WGS84 = pyproj.CRS.from_epsg(4326)


def grid() -> Grid:
    """A lat-lon grid of 0.5-degree cells over 10-15 E, 0-5 N, rows north first."""
    x = 10.0 + 0.5 * (np.arange(10) + 0.5)
    y = (0.5 * (np.arange(10) + 0.5))[::-1]
    return Grid(crs_wkt=WGS84.to_wkt(), x=x, y=y, is_geographic=True)


def feature(fid: str, geometry: Any, **properties: Any) -> dict[str, Any]:
    return {"type": "Feature", "id": fid, "geometry": geometry, "properties": properties}


def box(x0: float, y0: float, x1: float, y1: float) -> dict[str, Any]:
    return {"type": "Polygon", "coordinates": [[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]]}


def collection(*features: dict[str, Any]) -> dict[str, Any]:
    return {"type": "FeatureCollection", "features": list(features)}


GOOD = feature("good", box(11.2, 1.2, 12.7, 2.9))
BAD_AT_PARSE = [
    (feature("bowtie", {"type": "Polygon", "coordinates": [[[11, 1], [12, 2], [12, 1], [11, 2], [11, 1]]]}),
     "invalid_geometry", "Self-intersection"),
    (feature("latlon", {"type": "Point", "coordinates": [1.5, 95.0]}, buffer_m=1000), "swapped_coordinates",
     "look swapped"),
    (feature("text", {"type": "Point", "coordinates": ["11.5", "1.5"]}, buffer_m=1000), "invalid_geometry",
     "'11.5' is text"),
    (feature("nobuffer", {"type": "Point", "coordinates": [11.5, 1.5]}), "invalid_geometry", "buffer_m"),
]  # fmt: skip


def test_fault_codes_have_a_meaning_each() -> None:
    assert set(FAULT_CODES) == {
        "invalid_geometry",
        "swapped_coordinates",
        "too_many_vertices",
        "outside_grid",
        "no_data",
        "too_many_cells",
    }


def test_skip_at_parsing_lists_each_bad_feature_and_keeps_its_place() -> None:
    fc = collection(GOOD, *(f for f, _, _ in BAD_AT_PARSE), feature("good2", box(13.1, 3.1, 13.4, 3.3)))
    parsed = parse_features(fc, invalid="skip")
    assert parsed.ids == ["good", "bowtie", "latlon", "text", "nobuffer", "good2"]
    assert [s.index for s in parsed.skipped] == [1, 2, 3, 4]
    for skipped, (_, code, words) in zip(parsed.skipped, BAD_AT_PARSE, strict=True):
        assert isinstance(skipped, SkippedFeature)
        index, feature_id, got_code, reason, pointer = skipped  # a plain tuple too
        assert got_code == code and words in reason
        assert reason.startswith(f"feature {feature_id!r}")
        assert pointer.startswith(f"/features/features/{index}")
    assert [f.skipped for f in parsed.features] == [False, True, True, True, True, False]


def test_fail_at_parsing_raises_one_error_listing_every_bad_feature_with_its_code() -> None:
    fc = collection(GOOD, *(f for f, _, _ in BAD_AT_PARSE))
    with pytest.raises(FeatureError, match=r"'bowtie'.*and 3 more invalid features") as caught:
        parse_features(fc)
    listed = caught.value.extra["errors"]
    assert [e["feature_id"] for e in listed] == ["bowtie", "latlon", "text", "nobuffer"]
    assert [e["code"] for e in listed] == [code for _, code, _ in BAD_AT_PARSE]
    assert caught.value.problem()["code"] == "invalid_geometry"


def test_too_many_vertices_is_a_skippable_fault() -> None:
    ring = [[11, 1], [11.5, 0.9], [12, 1], [12, 2], [11, 2], [11, 1]]  # 6 positions, GOOD has 5
    many = feature("many", {"type": "Polygon", "coordinates": [ring]})
    parsed = parse_features(collection(GOOD, many), invalid="skip", max_vertices=5)
    assert [(s.feature_id, s.code) for s in parsed.skipped] == [("many", "too_many_vertices")]
    with pytest.raises(LimitExceededError, match="max_vertices_per_feature"):
        parse_features(collection(GOOD, many), max_vertices=5)


def test_faults_of_the_request_structure_fail_even_under_skip() -> None:
    twice = collection(GOOD, feature("good", box(11, 1, 12, 2)))
    with pytest.raises(FeatureError, match="ids must be unique"):
        parse_features(twice, invalid="skip")
    without_id = collection(GOOD, {"type": "Feature", "geometry": box(11, 1, 12, 2), "properties": {}})
    with pytest.raises(FeatureError, match="has no id"):
        parse_features(without_id, invalid="skip")


def test_nothing_left_to_compute_fails_under_skip_too() -> None:
    with pytest.raises(FeatureError, match=r"'bowtie'.*and 1 more invalid feature"):
        parse_features(collection(BAD_AT_PARSE[0][0], BAD_AT_PARSE[1][0]), invalid="skip")


def test_an_unknown_invalid_mode_is_refused_naming_the_field() -> None:
    with pytest.raises(RequestError, match="invalid_features 'ignore' is not one of") as caught:
        parse_features(collection(GOOD), invalid="ignore")
    assert caught.value.pointer == "/invalid_features"


# --- faults found on the grid ----------------------------------------------------------------------------------


def on_grid_faults() -> dict[str, Any]:
    """One good feature among features outside the grid, on cells without data, swapped, too large."""
    return collection(
        GOOD,
        feature("far", box(40.0, 1.0, 41.0, 2.0)),
        feature("wet", box(14.6, 4.6, 14.9, 4.9)),  # the top-right cell, without data below
        feature("swapped", box(1.1, 11.2, 1.9, 11.8)),  # [lat, lon] of a place on the grid
        feature("huge", box(10.0, 0.0, 15.0, 5.0)),  # all 100 cells, over a limit of 50
        feature("good2", box(13.1, 3.1, 13.4, 3.3)),
    )


def wet_mask() -> np.ndarray:
    mask = np.ones((10, 10), dtype=bool)
    mask[0, 9] = False
    return mask


def test_skip_on_the_grid_empties_the_rows_of_bad_features_and_leaves_the_others_alone() -> None:
    g = grid()
    parsed = parse_features(on_grid_faults(), invalid="skip")
    w = compute_weights(parsed, g, data_mask=wet_mask(), max_cells=50, cache_size=0)
    assert [(s.index, s.feature_id, s.code) for s in w.skipped] == [
        (1, "far", "outside_grid"),
        (2, "wet", "no_data"),
        (3, "swapped", "swapped_coordinates"),
        (4, "huge", "too_many_cells"),
    ]
    dense = w.matrix.toarray()
    assert not dense[1:5].any()
    assert w.n_cells[1:5].tolist() == [0, 0, 0, 0] and w.coverage[1:5].tolist() == [0.0] * 4
    alone = compute_weights(
        parse_features(collection(GOOD, feature("good2", box(13.1, 3.1, 13.4, 3.3)))),
        g,
        data_mask=wet_mask(),
        cache_size=0,
    )
    np.testing.assert_array_equal(dense[[0, 5]], alone.matrix.toarray())
    np.testing.assert_array_equal(w.area_km2[[0, 5]], alone.area_km2)


def test_fail_on_the_grid_raises_every_fault_with_its_code() -> None:
    parsed = parse_features(on_grid_faults())
    with pytest.raises(RequestError, match=r"'far' lies outside the grid.*and 3 more") as caught:
        compute_weights(parsed, grid(), data_mask=wet_mask(), max_cells=50, cache_size=0)
    assert [e["code"] for e in caught.value.extra["errors"]] == [
        "outside_grid",
        "no_data",
        "swapped_coordinates",
        "too_many_cells",
    ]


def test_features_skipped_at_parsing_come_through_the_weights_with_empty_rows() -> None:
    parsed = parse_features(
        collection(GOOD, BAD_AT_PARSE[0][0], feature("far", box(40, 1, 41, 2))), invalid="skip"
    )
    w = compute_weights(parsed, grid(), cache_size=0)
    assert [(s.feature_id, s.code) for s in w.skipped] == [
        ("bowtie", "invalid_geometry"),
        ("far", "outside_grid"),
    ]
    assert w.feature_ids == ["good", "bowtie", "far"]
    assert np.isnan(w.area_km2[1]) and np.isnan(w.latitude[1])
    assert w.matrix[1].nnz == 0 and w.matrix[2].nnz == 0 and w.matrix[0].nnz > 0


def test_the_mode_is_part_of_the_cache_key() -> None:
    fc = collection(GOOD, feature("far", box(40, 1, 41, 2)))
    skipped = compute_weights(parse_features(fc, invalid="skip"), grid())
    assert len(skipped.skipped) == 1
    with pytest.raises(RequestError, match="outside the grid"):
        compute_weights(parse_features(fc), grid())  # not the cached 'skip' answer


def test_every_feature_faulty_on_the_grid_fails_under_skip_too() -> None:
    parsed = parse_features(collection(BAD_AT_PARSE[0][0], feature("far", box(40, 1, 41, 2))), invalid="skip")
    with pytest.raises(RequestError, match=r"'bowtie'.*and 1 more") as caught:
        compute_weights(parsed, grid(), cache_size=0)
    assert [e["feature_id"] for e in caught.value.extra["errors"]] == ["bowtie", "far"]


# --- strict coordinates ----------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("coordinates", "words"),
    [
        (
            ["11.5", "1.5"],
            r"point \['11.5', '1.5'\]: '11.5' is text \(a JSON string\); coordinates must be JSON numbers",
        ),
        ([True, 1.5], r"True is a boolean"),
        ([11.5, None], r"None is a NoneType"),
    ],
)
def test_point_coordinates_must_be_numbers(coordinates: list[Any], words: str) -> None:
    with pytest.raises(FeatureError, match=words):
        parse_features(feature("p", {"type": "Point", "coordinates": coordinates}, buffer_m=1000))


@pytest.mark.parametrize(
    ("ring", "words"),
    [
        ([[11, 1], ["12", 1], [12, 2], [11, 1]], r"position 1 \['12', 1\]: '12' is text"),
        ([[11, 1], [12, 1], [12, True], [11, 1]], r"position 2 \[12, True\]: True is a boolean"),
        ([[11, 1], [12, 1], [12, 2], [11, 1], [False, 0]], r"position 4 \[False, 0\]: False is a boolean"),
        ([[11, 1], [12], [12, 2], [11, 1]], r"position 1 is \[12\], not a position"),
    ],
)
def test_ring_coordinates_must_be_numbers(ring: list[Any], words: str) -> None:
    with pytest.raises(FeatureError, match=words):
        parse_features(feature("p", {"type": "Polygon", "coordinates": [ring]}))


def test_rings_of_zeros_and_ones_and_numpy_numbers_are_still_numbers() -> None:
    unit = [[0, 0], [1, 0], [1, 1], [0, 1], [0, 0]]
    assert (
        parse_features(feature("u", {"type": "Polygon", "coordinates": [unit]})).features[0].footprint.area
        == 1.0
    )
    point = {"type": "Point", "coordinates": [np.float64(11.5), np.int64(1)]}
    assert not parse_features(feature("n", point, buffer_m=1000)).features[0].skipped


def test_projected_looking_coordinates_without_a_crs_get_the_hint() -> None:
    utm = box(500_000, 4_000_000, 501_000, 4_001_000)
    with pytest.raises(FeatureError, match=r"look projected \(metres or feet\): give the request's crs"):
        parse_features(feature("utm", utm))
    with pytest.raises(FeatureError, match=r"no crs was given"):
        parse_features(
            feature("utm", {"type": "Point", "coordinates": [500_000.0, 4_000_000.0]}, buffer_m=500)
        )
    # with the crs given, they are read as meant
    assert parse_features(feature("utm", utm), crs="EPSG:32633").features[0].footprint.area == pytest.approx(
        1e6
    )


# --- the request's CRS -----------------------------------------------------------------------------------------


ENGINEERING = (
    'ENGCRS["site grid",EDATUM["site"],CS[Cartesian,2],AXIS["easting (x)",east,ORDER[1]],'
    'AXIS["northing (y)",north,ORDER[2]],LENGTHUNIT["metre",1]]'
)


@pytest.mark.parametrize(
    ("crs", "words"),
    [
        (ENGINEERING, "engineering or local CRS"),
        ("EPSG:5703", "vertical CRS"),  # NAVD88 height
        ("EPSG:5498", "compound CRS"),  # NAD83 + NAVD88 height
        ("EPSG:4978", "geocentric CRS"),  # WGS 84 Cartesian x, y, z
        ("IAU_2015:49900", "cannot be carried to longitude/latitude on the Earth"),  # Mars
        ("not a crs", "is not a coordinate reference system pyproj can read"),
    ],
)
def test_a_crs_that_cannot_place_positions_is_a_request_error_naming_crs(crs: str, words: str) -> None:
    with pytest.raises(RequestError, match=words) as caught:
        parse_features(collection(GOOD), crs=crs)
    assert caught.value.pointer == "/crs" and caught.value.status == 422
    assert "give the horizontal CRS of the coordinates" in caught.value.detail


def test_geographic_projected_and_bound_crs_are_accepted() -> None:
    for crs in (
        "EPSG:4326",
        "OGC:CRS84",
        "EPSG:4269",
        "EPSG:32633",
        "+proj=utm +zone=33 +ellps=intl +towgs84=-87,-98,-121",
    ):
        parse_features(
            collection(feature("p", {"type": "Point", "coordinates": [0.5, 0.5]}, buffer_m=10)), crs=crs
        )
