"""The registry of warning codes: every code a result's warnings (and its ``notes`` column) may carry.

A warning is a dict ``{"code", "feature_id", "year", "indicator", "reason"}``: all five keys are always
present, any value but ``code`` and ``reason`` may be None. ``code`` is one of :data:`WARNING_CODES` (stable,
lower_snake_case, safe to filter on); ``reason`` is the sentence for a person. ``feature_id`` None means
the warning concerns every community of the request, ``year`` None every season-year (or several, named
in the reason), ``indicator`` None every indicator of the row.

Each row of a result carries a ``notes`` column: the codes of the warnings that concern that row, sorted
and joined by one space ("" when none). In the wide layout a row is one (feature_id, year) with all its
indicators, so it carries the codes of its indicators' warnings too; in the long layout a row is one
(feature_id, year, indicator) and carries the codes of that indicator's warnings and of the warnings that
name no indicator. docs/methods.md lists the codes for readers of a paper; keep the two in step.

Other modules add their codes here (one line each: the code and what it means), never elsewhere.
"""

from __future__ import annotations

from typing import Any

# code -> one-line meaning. The order is the order of the docs and of the bits of a row's notes.
WARNING_CODES: dict[str, str] = {
    # seasons
    "incomplete_season": "more of the season's days are missing than max_missing_share allows: its values are null",
    "partial_season": "some (at most max_missing_share) of the season's days are missing: sums and counts "
    "follow partial_seasons (scaled to the whole season, null, or as they are)",
    # baselines and anomalies
    "few_baseline_seasons": "fewer than 3 baseline seasons have a value: z, class and percent of normal are null",
    "no_spread": "the value is the same in every baseline season: z and class are null",
    "short_baseline_fit": "a distribution or percentile fitted on a baseline of fewer than 30 seasons "
    "(WMO-No. 1090 asks for at least 30): tails are less reliable",
    "no_fit": "the baseline gives no usable fit or threshold (too few seasons or wet days, no spread): "
    "the value is null",
    "at_clip": "the value lies at the index's bound (SPI/SPEI clipped to +-5): the true value is beyond it",
    "zero_rain_spi": "a season without precipitation: SPI is the published Phi^-1(q), q the baseline's share "
    "of dry seasons, which is near normal or positive when dry seasons are common",
    "spei_upper_bound": "the SPEI fit has no positive skew, so the generalized logistic used is bounded above",
    # event windows
    "window_outside_data": "part of the event's window lies outside the data, and this indicator (computed on "
    "whole windows: percentile indices, r95ptot) needs all of it: its value is null",
    # sequences and spells
    "spell_unknown": "a season in the spell's window has a null class or z: the spell count is null",
    "spell_before_baseline": "the spell's window reaches seasons before the first one with the whole "
    "requested baseline: the spell count is null",
    # aggregation over cells
    "partial_cells": "aggregation 'cells': some of the community's cells have no value; the mean is over the "
    "cells with one (their weights renormalised)",
    "too_few_cells": "aggregation 'cells': the cells with a value carry less than 1 - max_missing_share of the "
    "community's weight: the value is null",
    # geometry and features
    "repaired_geometry": "the feature's invalid geometry was repaired (make_valid) because 'repair' was set",
    "feature_skipped": "the feature could not be computed (invalid_features 'skip'): its values are null",
}


def warning(
    code: str,
    reason: str,
    *,
    feature_id: str | None = None,
    year: int | None = None,
    indicator: str | None = None,
) -> dict[str, Any]:
    """A warning dict with every key present; ``code`` must be registered in :data:`WARNING_CODES`."""
    if code not in WARNING_CODES:
        raise ValueError(f"warning code {code!r} is not registered in service/warning_codes.py")
    return {"code": code, "feature_id": feature_id, "year": year, "indicator": indicator, "reason": reason}


def notes_text(codes: set[str] | list[str] | tuple[str, ...]) -> str:
    """The notes of one row: its distinct codes, sorted, joined by one space ('' when none)."""
    return " ".join(sorted(set(codes)))
