"""The error tree and its one map to RFC 9457 problem documents."""

from __future__ import annotations

import pytest

from service.errors import (
    PROBLEM_TYPE_PREFIX,
    FeatureError,
    LimitExceededError,
    OutOfRangeError,
    RequestError,
    StoreError,
    UnknownDatasetError,
    WxshockError,
    pointer_from_loc,
    problem_for,
    validation_items,
)


@pytest.mark.parametrize(
    ("error", "builtin", "status"),
    [
        (RequestError("x"), ValueError, 422),
        (FeatureError("x", feature_id="v-1"), ValueError, 422),
        (OutOfRangeError("x"), ValueError, 422),
        (UnknownDatasetError("x"), LookupError, 404),
        (StoreError("x"), OSError, 503),
        (
            LimitExceededError("x", limit="max_features_on_demand", allowed=200, got=201, status=413),
            ValueError,
            413,
        ),
    ],
)
def test_errors_subclass_their_builtin_and_carry_a_status(
    error: WxshockError, builtin: type, status: int
) -> None:
    assert isinstance(error, builtin)
    assert problem_for(error)[0] == status


def test_problem_document_members() -> None:
    error = FeatureError(
        "feature 'v-17': ring is not closed", feature_id="v-17", pointer="/features/features/3/geometry"
    )
    status, doc = problem_for(error, instance="/v1/indicators")
    assert status == 422
    assert doc == {
        "type": PROBLEM_TYPE_PREFIX + "invalid-feature",
        "title": "Invalid feature",
        "status": 422,
        "detail": "feature 'v-17': ring is not closed",
        "pointer": "/features/features/3/geometry",
        "feature_id": "v-17",
        "instance": "/v1/indicators",
    }


def test_limit_names_the_limit() -> None:
    _, doc = problem_for(LimitExceededError("too many", limit="max_cells_per_feature", allowed=10, got=11))
    assert (doc["limit"], doc["allowed"], doc["got"]) == ("max_cells_per_feature", 10, 11)


def test_unexpected_errors_are_a_bare_500_without_internals() -> None:
    status, doc = problem_for(RuntimeError("/secret/path/and key=AKIA123"))
    assert status == 500
    assert "secret" not in str(doc) and "AKIA" not in str(doc)


@pytest.mark.parametrize(
    ("loc", "pointer"),
    [(("features", 0, "id"), "/features/0/id"), (("a/b", "c~d"), "/a~1b/c~0d"), ((), "")],
)
def test_pointer_from_loc_follows_rfc_6901(loc: tuple, pointer: str) -> None:
    assert pointer_from_loc(loc) == pointer


def test_validation_items_drop_union_tags_and_the_body_prefix() -> None:
    errors = [
        {"loc": ("body", "season", "Months", "months"), "msg": "Value error, not one run", "input": [1, 3]},
        {"loc": ("body", "lags", 0), "msg": "Input should be a valid integer", "input": "x"},
    ]
    items = validation_items(errors, drop_prefix=("body",))
    assert items[0] == {"pointer": "/season/months", "message": "not one run"}
    assert items[1] == {"pointer": "/lags/0", "message": "Input should be a valid integer", "value": "x"}
