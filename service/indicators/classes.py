"""Shock classes from z, their plain-word labels, the WMO SPI category, and joint classes of two indicators.

Edges are in standard deviations and strictly increasing; n edges make n + 1 classes numbered so that the
class holding z = 0 is 0 (the default edges -2, -1, 1, 2 give -2 .. 2; common practice). An edge belongs to
the class farther from zero: with the default edges z = -1 is class -1 and z = 1 is class 1, as in the WMO
SPI table where -1.0 is "moderately dry" and 1.0 "moderately wet". An edge at exactly 0 starts class 0, so
z = 0 is in class 0 and any z < 0 below it. A null z has a null class.

Labels are our own plain words per family: precipitation and drought indices drier/wetter, temperature
cooler/warmer, counts and other amounts below/above normal; the middle class is "near normal". The words
for the steps away from normal depend on how many classes lie on that side (see :func:`class_labels`).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

# words for the classes below and above normal, per indicator family
_SIDE_WORDS = {
    "precipitation": ("drier", "wetter"),
    "drought": ("drier", "wetter"),
    "temperature": ("cooler", "warmer"),
    "count": ("below normal", "above normal"),
}
NEAR_NORMAL = "near normal"
# qualifiers for 1..5 steps on one side, nearest to normal first
_STEP_QUALIFIERS = {
    1: ("",),
    2: ("", "much"),
    3: ("slightly", "", "much"),
    4: ("slightly", "", "much", "extremely"),
    5: ("slightly", "", "much", "very much", "extremely"),
}
# qualifiers that read better before "below normal" / "above normal"
_COUNT_QUALIFIERS = {
    "slightly": "slightly",
    "much": "far",
    "very much": "very far",
    "extremely": "extremely far",
}

# WMO SPI User Guide (WMO-No. 1090, 2012), table 2: the published SPI categories, driest first. The same
# edge rule as the classes gives its boundaries: -1.0 is moderately dry, 2.0 extremely wet.
WMO_SPI_EDGES = (-2.0, -1.5, -1.0, 1.0, 1.5, 2.0)
WMO_SPI_CATEGORIES = (
    "extremely dry",
    "severely dry",
    "moderately dry",
    "near normal",
    "moderately wet",
    "very wet",
    "extremely wet",
)


def class_range(edges: Sequence[float]) -> tuple[int, int]:
    """Lowest and highest class number that ``edges`` make."""
    below = sum(1 for e in edges if e <= 0)
    above = sum(1 for e in edges if e > 0)
    return -below, above


def classify(z: np.ndarray, edges: Sequence[float]) -> np.ndarray:
    """Class number of each z (float64 array of whole numbers, NaN where z is NaN).

    Non-decreasing in z; the edge rule is described in the module docstring.
    """
    z = np.asarray(z, dtype=np.float64)
    negative = np.asarray([e for e in edges if e < 0], dtype=np.float64)
    positive = np.asarray([e for e in edges if e > 0], dtype=np.float64)
    has_zero = any(e == 0 for e in edges)
    up = np.searchsorted(positive, z, side="right")  # positive edges <= z
    down = negative.size - np.searchsorted(negative, z, side="left")  # negative edges >= z
    cls = (up - down).astype(np.float64)
    if has_zero:
        cls -= z < 0
    cls[np.isnan(z)] = np.nan
    return cls


def _side_labels(word: str, steps: int, count_family: bool) -> list[str]:
    """Labels for ``steps`` classes on one side, nearest to normal first."""
    if steps in _STEP_QUALIFIERS:
        qualifiers = _STEP_QUALIFIERS[steps]
        if count_family:
            qualifiers = tuple(_COUNT_QUALIFIERS.get(q, q) for q in qualifiers)
        return [f"{q} {word}".strip() for q in qualifiers]
    return [f"{word}, step {k} of {steps}" for k in range(1, steps + 1)]


def class_labels(family: str, edges: Sequence[float]) -> dict[int, str]:
    """Our plain-word label of each class number, lowest class first.

    >>> class_labels("precipitation", [-2, -1, 1, 2])
    {-2: 'much drier', -1: 'drier', 0: 'near normal', 1: 'wetter', 2: 'much wetter'}
    """
    low_word, high_word = _SIDE_WORDS.get(family, _SIDE_WORDS["count"])
    count_family = family not in ("precipitation", "drought", "temperature")
    lowest, highest = class_range(edges)
    below = _side_labels(low_word, -lowest, count_family)
    above = _side_labels(high_word, highest, count_family)
    labels = {-k: below[k - 1] for k in range(-lowest, 0, -1)}
    labels[0] = NEAR_NORMAL
    labels.update({k: above[k - 1] for k in range(1, highest + 1)})
    return labels


def category_codes(classes: np.ndarray, lowest: int) -> np.ndarray:
    """Class numbers (float, NaN = null) as 0-based category codes (int64, -1 = null)."""
    return np.where(np.isnan(classes), -1, np.nan_to_num(classes) - lowest).astype(np.int64)


def wmo_spi_category(values: np.ndarray) -> np.ndarray:
    """Index into :data:`WMO_SPI_CATEGORIES` of each SPI/SPEI value (int64, -1 where null)."""
    return category_codes(classify(values, WMO_SPI_EDGES), -3)


def pair_term(label: str, column: str, family: str) -> str:
    """How one class reads inside a joint class: directional words alone, other labels after the column."""
    directional = family in ("precipitation", "drought", "temperature") and label != NEAR_NORMAL
    return label if directional else f"{column} {label}"


def joint_categories(terms_a: Sequence[str], terms_b: Sequence[str], joiner: str) -> list[str]:
    """Every combination 'a <joiner> b', a-major, in class order: the categories of a pair or sequence."""
    return [f"{a} {joiner} {b}" for a in terms_a for b in terms_b]


def joint_codes(codes_a: np.ndarray, codes_b: np.ndarray, n_b: int) -> np.ndarray:
    """Category codes of the combination of two coded classes (-1 where either is null)."""
    return np.where((codes_a < 0) | (codes_b < 0), -1, codes_a * n_b + codes_b).astype(np.int64)
