"""Classes from z, our labels, the WMO SPI category table, joint classes."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.indicators import classes

DEFAULT = [-2.0, -1.0, 1.0, 2.0]


@pytest.mark.parametrize(
    ("z", "expected"),
    [
        (-3.0, -2),
        (-2.0, -2),
        (-1.99, -1),
        (-1.0, -1),
        (-0.99, 0),
        (0.0, 0),
        (0.99, 0),
        (1.0, 1),
        (1.99, 1),
        (2.0, 2),
        (5.0, 2),
    ],
)
def test_default_edges_belong_to_the_outer_class(z, expected):
    assert classes.classify(np.array([z]), DEFAULT)[0] == expected


def test_null_z_has_null_class():
    assert np.isnan(classes.classify(np.array([np.nan, 0.0]), DEFAULT)).tolist() == [True, False]


@pytest.mark.parametrize(
    ("edges", "zs", "expected", "span"),
    [
        ([-1.0, 0.0, 1.0], [-1.5, -1.0, -0.5, 0.0, 0.5, 1.0], [-2, -2, -1, 0, 0, 1], (-2, 1)),
        ([0.5, 1.5], [-9.0, 0.0, 0.5, 2.0], [0, 0, 1, 2], (0, 2)),
        ([-1.5], [-2.0, -1.5, 0.0], [-1, -1, 0], (-1, 0)),
        ([-3.0, -2.0, -1.0, 1.0], [-3.5, -2.5, -1.5, 0.0, 1.0], [-3, -2, -1, 0, 1], (-3, 1)),
    ],
)
def test_any_sorted_edges_centre_class_zero_on_zero(edges, zs, expected, span):
    assert classes.classify(np.array(zs), edges).tolist() == expected
    assert classes.class_range(edges) == span


@settings(max_examples=200, deadline=None)
@given(
    edges=st.lists(st.floats(-5, 5, allow_nan=False), min_size=1, max_size=8, unique=True).map(sorted),
    zs=st.lists(st.floats(-10, 10, allow_nan=False), min_size=2, max_size=30),
)
def test_classes_are_monotone_in_z(edges, zs):
    z = np.sort(np.array(zs))
    cls = classes.classify(z, edges)
    assert (np.diff(cls) >= 0).all()
    low, high = classes.class_range(edges)
    assert cls.min() >= low and cls.max() <= high
    assert classes.classify(np.array([0.0]), edges)[0] == 0


def test_labels_per_family():
    assert classes.class_labels("precipitation", DEFAULT) == {
        -2: "much drier",
        -1: "drier",
        0: "near normal",
        1: "wetter",
        2: "much wetter",
    }
    assert list(classes.class_labels("temperature", DEFAULT).values()) == [
        "much cooler",
        "cooler",
        "near normal",
        "warmer",
        "much warmer",
    ]
    assert list(classes.class_labels("count", DEFAULT).values()) == [
        "far below normal",
        "below normal",
        "near normal",
        "above normal",
        "far above normal",
    ]
    assert classes.class_labels("drought", DEFAULT)[-2] == "much drier"


def test_labels_generalise_to_more_classes():
    labels = classes.class_labels("precipitation", [-3, -2, -1, 1, 2, 3])
    assert list(labels.values()) == [
        "much drier",
        "drier",
        "slightly drier",
        "near normal",
        "slightly wetter",
        "wetter",
        "much wetter",
    ]
    five = classes.class_labels("temperature", [-5, -4, -3, -2, -1, 1])
    assert five[-5] == "extremely cooler" and five[-4] == "very much cooler" and five[1] == "warmer"
    many = classes.class_labels("count", [float(e) for e in range(1, 8)])
    assert many[7] == "above normal, step 7 of 7" and min(many) == 0
    assert len(set(many.values())) == len(many)


# WMO SPI User Guide (WMO-No. 1090, 2012), table 2, as given in shared/CHECK-VALUES.md: >= 2.0 extremely wet;
# 1.5 to 1.99 very wet; 1.0 to 1.49 moderately wet; -0.99 to 0.99 near normal; -1.0 to -1.49 moderately dry;
# -1.5 to -1.99 severely dry; <= -2.0 extremely dry.
@pytest.mark.parametrize(
    ("spi", "category"),
    [
        (3.1, "extremely wet"),
        (2.0, "extremely wet"),
        (1.99, "very wet"),
        (1.5, "very wet"),
        (1.49, "moderately wet"),
        (1.0, "moderately wet"),
        (0.99, "near normal"),
        (0.0, "near normal"),
        (-0.99, "near normal"),
        (-1.0, "moderately dry"),
        (-1.49, "moderately dry"),
        (-1.5, "severely dry"),
        (-1.99, "severely dry"),
        (-2.0, "extremely dry"),
        (-4.0, "extremely dry"),
    ],
)
def test_wmo_spi_category_table(spi, category):
    code = classes.wmo_spi_category(np.array([spi]))[0]
    assert classes.WMO_SPI_CATEGORIES[code] == category


def test_wmo_category_of_null_is_null():
    assert classes.wmo_spi_category(np.array([np.nan])).tolist() == [-1]


def test_joint_class_of_a_pair():
    labels_p = list(classes.class_labels("precipitation", DEFAULT).values())
    labels_t = list(classes.class_labels("temperature", DEFAULT).values())
    terms_p = [classes.pair_term(label, "prcp_total", "precipitation") for label in labels_p]
    terms_t = [classes.pair_term(label, "tmean", "temperature") for label in labels_t]
    cats = classes.joint_categories(terms_p, terms_t, "and")
    assert len(cats) == 25 and len(set(cats)) == 25
    p = classes.category_codes(classes.classify(np.array([-1.2, 0.1, np.nan]), DEFAULT), -2)
    t = classes.category_codes(classes.classify(np.array([2.4, 0.0, 1.0]), DEFAULT), -2)
    codes = classes.joint_codes(p, t, 5)
    assert [cats[c] for c in codes[:2]] == [
        "drier and much warmer",
        "prcp_total near normal and tmean near normal",
    ]
    assert codes[2] == -1
    assert classes.pair_term("above normal", "wet_days", "count") == "wet_days above normal"
