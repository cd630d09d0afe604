"""Baselines (each season-year's normal), anomalies against them and percent of normal.

A fixed baseline is one span of season-years for every season-year; a trailing baseline of N is the N
season-years just before each season-year (a moving normal), and a season-year without N season-years of
record before it has none. For each (feature, season-year) the baseline mean and sample standard deviation
(ddof = 1) are taken over the baseline seasons that have a value; the anomaly is z = (value - mean) / sd,
rounded to 9 decimals. Where fewer than :data:`MIN_BASELINE_SEASONS` baseline seasons have a value, or
their spread is zero (a count that is 0 in every baseline season: every value equal, detected exactly), z
is null and a warning names the indicator, the community and the reason: never an infinite z, never a
failed request for the others.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.indicators.base import Baseline
from service.schemas import FixedBaseline, TrailingBaseline
from service.warning_codes import warning

MIN_BASELINE_SEASONS = 3
# z is rounded to this many decimals before classing: far below any meaningful precision, far above the
# 1e-16 noise of a division, so a z that lies on a class edge in exact arithmetic (-1 from values 0, 2, 4
# against a value of 0) is classed by the edge rule and never by the sign of a rounding error.
Z_DECIMALS = 9
# A spread below this share of the values' scale (|mean| + 1) is rounding, not spread: summing the same
# daily values in another order differs by ~1e-15 of the total.
SPREAD_TOLERANCE = 1e-9

# reason codes of :class:`Anomaly`
OK = 0
NO_VALUE = 1  # the season's own value is null (its warning, if any, comes from the season or the indicator)
FEW_SEASONS = 2
NO_SPREAD = 3


def make_baseline(years: np.ndarray, spec: FixedBaseline | TrailingBaseline) -> Baseline:
    """The (year, year) membership matrix of ``spec`` over the season-years ``years`` (ascending ints).

    A trailing baseline of N gives season-year t the N season-years t - N .. t - 1, and only when all of
    them lie in ``years`` (the record): a season-year closer than N to the first one has no baseline (an
    empty row), so every value, z and spell rests on exactly the requested N seasons or is null.
    """
    years = np.asarray(years)
    if isinstance(spec, FixedBaseline):
        row = (years >= spec.start) & (years <= spec.end)
        members = np.broadcast_to(row, (years.size, years.size)).copy()
        return Baseline(
            members=members, fixed=True, label=f"{spec.start}-{spec.end}", seasons=spec.end - spec.start + 1
        )
    n = spec.trailing
    members = (years[None, :] < years[:, None]) & (years[None, :] >= years[:, None] - n)
    if years.size:
        members &= years[:, None] - n >= years[0]
    return Baseline(members=members, fixed=False, label=f"trailing {n}", seasons=n)


def first_full_year(years: np.ndarray, spec: FixedBaseline | TrailingBaseline) -> int | None:
    """The first season-year of ``years`` whose baseline is the whole requested one (None if none is)."""
    if not len(years):
        return None
    if isinstance(spec, FixedBaseline):
        return int(years[0])
    first = int(years[0]) + spec.trailing
    return first if first <= int(years[-1]) else None


@dataclass(frozen=True)
class BaselineStatistics:
    """Baseline mean, sample sd (ddof = 1), number of seasons with a value, and exact flatness, (feature, year).

    ``flat`` is True where every baseline value is the same number (max == min): no spread, detected
    exactly, whatever the rounding of the sd.
    """

    mean: np.ndarray
    sd: np.ndarray
    count: np.ndarray  # int
    flat: np.ndarray  # bool


def _distinct_rows(members: np.ndarray, fixed: bool) -> tuple[np.ndarray, np.ndarray]:
    """Distinct membership rows and, for each season-year, the row it uses."""
    if fixed or (members.shape[0] and (members == members[:1]).all()):
        return members[:1], np.zeros(members.shape[0], dtype=np.int64)
    rows, inverse = np.unique(members, axis=0, return_inverse=True)
    return rows, inverse.reshape(-1)


def baseline_statistics(values: np.ndarray, baseline: Baseline) -> BaselineStatistics:
    """Mean, sd (ddof = 1), count and flatness of ``values`` (feature, year) over each baseline.

    NaN values drop out. Each distinct baseline (one for a fixed baseline, one per season-year for a
    trailing one) is computed directly from its own seasons: mean, then squared deviations from it (two
    passes). So a season-year's statistics depend only on its baseline seasons' values, never on which
    other years the record or the request holds, and a trailing window equals the same seasons as a fixed
    baseline to the last bit.
    """
    values = np.asarray(values, dtype=np.float64)
    n_feature, n_year = values.shape
    members = np.asarray(baseline.members, dtype=bool)
    rows, row_of_year = _distinct_rows(members, baseline.fixed)
    n_row = rows.shape[0]
    mean = np.full((n_feature, n_row), np.nan)
    sd = np.full((n_feature, n_row), np.nan)
    count = np.zeros((n_feature, n_row), dtype=np.int64)
    flat = np.zeros((n_feature, n_row), dtype=bool)
    for r in range(n_row):
        sample = values[:, rows[r]]
        has = ~np.isnan(sample)
        n = np.count_nonzero(has, axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            m = np.where(has, sample, 0.0).sum(axis=1) / n
            deviation = np.where(has, sample - m[:, None], 0.0)
            variance = (deviation * deviation).sum(axis=1) / (n - 1.0)
        high = np.where(has, sample, -np.inf).max(axis=1, initial=-np.inf)
        low = np.where(has, sample, np.inf).min(axis=1, initial=np.inf)
        count[:, r] = n
        mean[:, r] = np.where(n >= 1, m, np.nan)
        sd[:, r] = np.where(n >= 2, np.sqrt(np.maximum(variance, 0.0)), np.nan)
        flat[:, r] = (n >= 1) & (high == low)
    return BaselineStatistics(
        mean=mean[:, row_of_year],
        sd=sd[:, row_of_year],
        count=count[:, row_of_year],
        flat=flat[:, row_of_year],
    )


@dataclass(frozen=True)
class Anomaly:
    """z (feature, year), NaN where not computable, and why (codes OK, NO_VALUE, FEW_SEASONS, NO_SPREAD)."""

    z: np.ndarray
    reason: np.ndarray  # int8


def round_z(z: np.ndarray) -> np.ndarray:
    """z rounded to Z_DECIMALS places (see there); NaN stays NaN."""
    return np.round(z, Z_DECIMALS)


def anomaly(
    values: np.ndarray, stats: BaselineStatistics, *, min_seasons: int = MIN_BASELINE_SEASONS
) -> Anomaly:
    """z = (value - baseline mean) / baseline sd, rounded to Z_DECIMALS; null without enough seasons or spread.

    No spread: every baseline value equal (exact), or an sd below SPREAD_TOLERANCE x (|mean| + 1).
    """
    values = np.asarray(values, dtype=np.float64)
    scale = np.abs(stats.mean) + 1.0
    few = stats.count < min_seasons
    flat = ~few & (stats.flat | ~(stats.sd > SPREAD_TOLERANCE * scale))
    reason = np.full(values.shape, OK, dtype=np.int8)
    reason[np.isnan(values)] = NO_VALUE
    reason[few] = FEW_SEASONS
    reason[flat] = NO_SPREAD
    with np.errstate(invalid="ignore", divide="ignore"):
        z = (values - stats.mean) / stats.sd
    z = np.where(reason == OK, round_z(z), np.nan)
    return Anomaly(z=z, reason=reason)


def standardized_anomaly(values: np.ndarray) -> Anomaly:
    """For SPI/SPEI the value is already a standard-normal deviate: z is the value (rounded as every z)."""
    values = np.asarray(values, dtype=np.float64)
    z = round_z(np.where(np.isfinite(values), values, np.nan))
    reason = np.where(np.isnan(z), NO_VALUE, OK).astype(np.int8)
    return Anomaly(z=z, reason=reason)


def percent_of_normal(
    values: np.ndarray, stats: BaselineStatistics, *, min_seasons: int = MIN_BASELINE_SEASONS
):
    """100 x value / baseline mean (%), null where the mean is 0 or rests on fewer than ``min_seasons``."""
    values = np.asarray(values, dtype=np.float64)
    usable = (stats.count >= min_seasons) & (stats.mean > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(usable, 100.0 * values / stats.mean, np.nan)


def _year_ranges(years: Sequence[int]) -> str:
    """1990, 1991, 1992, 1995 -> '1990-1992, 1995'."""
    runs: list[list[int]] = []
    for y in years:
        if runs and y == runs[-1][1] + 1:
            runs[-1][1] = y
        else:
            runs.append([y, y])
    return ", ".join(f"{a}" if a == b else f"{a}-{b}" for a, b in runs)


def anomaly_warnings(
    reason: np.ndarray,
    stats: BaselineStatistics,
    *,
    feature_ids: Sequence[str],
    years: np.ndarray,
    indicator: str,
    baseline_label: str,
    min_seasons: int = MIN_BASELINE_SEASONS,
) -> list[dict[str, Any]]:
    """Warnings for the null z of ``reason`` (feature, year over ``years``): one per feature and reason.

    Codes few_baseline_seasons and no_spread; ``year`` is set when the warning concerns one season-year.
    """
    warnings: list[dict[str, Any]] = []
    for code, why in ((FEW_SEASONS, "few"), (NO_SPREAD, "flat")):
        hit = reason == code
        for f in np.flatnonzero(hit.any(axis=1)):
            cols = np.flatnonzero(hit[f])
            when = [int(years[c]) for c in cols]
            if why == "few":
                counts = sorted({int(stats.count[f, c]) for c in cols})
                text = (
                    f"{indicator}: baseline {baseline_label} has {_count_words(counts)} season(s) with a value, "
                    f"fewer than the {min_seasons} a normal needs"
                )
            else:
                mean = float(np.nanmean(stats.mean[f, cols]))
                text = (
                    f"{indicator}: the value is the same ({mean:.6g}) in every season of baseline {baseline_label}, "
                    f"so it has no spread to scale an anomaly"
                )
            warnings.append(
                warning(
                    "few_baseline_seasons" if why == "few" else "no_spread",
                    f"{text}; z and class left null for {_year_ranges(when)}",
                    feature_id=feature_ids[int(f)],
                    indicator=indicator,
                    year=when[0] if len(when) == 1 else None,
                )
            )
    return warnings


def _count_words(counts: list[int]) -> str:
    """[0, 2] -> '0 to 2'; [2] -> '2'."""
    return str(counts[0]) if len(counts) == 1 else f"{counts[0]} to {counts[-1]}"
