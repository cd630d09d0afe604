"""Baselines (each season-year's normal), anomalies against them and percent of normal.

A fixed baseline is one span of season-years for every season-year; a trailing baseline of N is the N
season-years just before each season-year (a moving normal). For each (feature, season-year) the baseline
mean and sample standard deviation (ddof = 1) are taken over the baseline seasons that have a value; the
anomaly is z = (value - mean) / sd. Where fewer than :data:`MIN_BASELINE_SEASONS` baseline seasons have a
value, or their spread is zero (a count that is 0 in every baseline season), z is null and a warning names
the indicator, the community and the reason: never an infinite z, never a failed request for the others.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.indicators.base import Baseline
from service.schemas import FixedBaseline, TrailingBaseline

MIN_BASELINE_SEASONS = 3

# reason codes of :class:`Anomaly`
OK = 0
NO_VALUE = 1  # the season's own value is null (its warning, if any, comes from the season or the indicator)
FEW_SEASONS = 2
NO_SPREAD = 3


def make_baseline(years: np.ndarray, spec: FixedBaseline | TrailingBaseline) -> Baseline:
    """The (year, year) membership matrix of ``spec`` over the season-years ``years`` (ascending ints)."""
    years = np.asarray(years)
    if isinstance(spec, FixedBaseline):
        row = (years >= spec.start) & (years <= spec.end)
        members = np.broadcast_to(row, (years.size, years.size)).copy()
        return Baseline(members=members, fixed=True, label=f"{spec.start}-{spec.end}")
    n = spec.trailing
    members = (years[None, :] < years[:, None]) & (years[None, :] >= years[:, None] - n)
    return Baseline(members=members, fixed=False, label=f"trailing {n}")


@dataclass(frozen=True)
class BaselineStatistics:
    """Baseline mean, sample sd (ddof = 1) and number of seasons with a value, each (feature, year)."""

    mean: np.ndarray
    sd: np.ndarray
    count: np.ndarray  # int


def baseline_statistics(values: np.ndarray, baseline: Baseline) -> BaselineStatistics:
    """Mean, sd (ddof = 1) and count of ``values`` (feature, year) over each season-year's baseline seasons.

    NaN values drop out. A fixed baseline is computed once (two-pass mean and squared deviations); a moving
    one as sums over the membership matrix of values centred by each feature's mean, to keep precision.
    """
    values = np.asarray(values, dtype=np.float64)
    members = np.asarray(baseline.members, dtype=bool)
    has = ~np.isnan(values)
    n_feature, n_year = values.shape
    if n_year and (members == members[:1]).all():
        # one normal for every season-year: compute it once, directly
        row = members[0]
        sample = values[:, row]
        count = np.count_nonzero(~np.isnan(sample), axis=1).astype(np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.nansum(sample, axis=1) / count
            squares = np.nansum((sample - mean[:, None]) ** 2, axis=1)
            variance = squares / (count - 1.0)
        shape = (n_feature, n_year)
        return BaselineStatistics(
            mean=np.broadcast_to(np.where(count >= 1, mean, np.nan)[:, None], shape).copy(),
            sd=np.broadcast_to(np.where(count >= 2, np.sqrt(variance), np.nan)[:, None], shape).copy(),
            count=np.broadcast_to(count.astype(np.int64)[:, None], shape).copy(),
        )
    # a moving normal: sums over each row's members (einsum loops in C, no BLAS threads), on values centred
    # by each feature's own mean so that the sums of squares keep their precision
    weights = members.astype(np.float64)  # (year, season)
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = np.nansum(values, axis=1, keepdims=True) / np.maximum(has.sum(axis=1, keepdims=True), 1)
    shifted = np.where(has, values - centre, 0.0)
    count = np.einsum("fs,ts->ft", has.astype(np.float64), weights)
    total = np.einsum("fs,ts->ft", shifted, weights)
    squares = np.einsum("fs,ts->ft", shifted * shifted, weights)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_shifted = total / count
        variance = (squares - count * mean_shifted * mean_shifted) / (count - 1.0)
    variance = np.where(count >= 2, np.maximum(variance, 0.0), np.nan)
    mean = np.where(count >= 1, mean_shifted + centre, np.nan)
    return BaselineStatistics(mean=mean, sd=np.sqrt(variance), count=np.rint(count).astype(np.int64))


@dataclass(frozen=True)
class Anomaly:
    """z (feature, year), NaN where not computable, and why (codes OK, NO_VALUE, FEW_SEASONS, NO_SPREAD)."""

    z: np.ndarray
    reason: np.ndarray  # int8


def anomaly(
    values: np.ndarray, stats: BaselineStatistics, *, min_seasons: int = MIN_BASELINE_SEASONS
) -> Anomaly:
    """z = (value - baseline mean) / baseline sd, null without enough baseline seasons or spread."""
    values = np.asarray(values, dtype=np.float64)
    # a spread below 1e-9 of the values' scale is rounding, not spread (a constant series, summed by products)
    scale = np.abs(stats.mean) + 1.0
    few = stats.count < min_seasons
    flat = ~few & ~(stats.sd > 1e-9 * scale)
    reason = np.full(values.shape, OK, dtype=np.int8)
    reason[np.isnan(values)] = NO_VALUE
    reason[few] = FEW_SEASONS
    reason[flat] = NO_SPREAD
    with np.errstate(invalid="ignore", divide="ignore"):
        z = (values - stats.mean) / stats.sd
    z = np.where(reason == OK, z, np.nan)
    return Anomaly(z=z, reason=reason)


def standardized_anomaly(values: np.ndarray) -> Anomaly:
    """For SPI/SPEI the value is already a standard-normal deviate: z is the value itself."""
    values = np.asarray(values, dtype=np.float64)
    z = np.where(np.isfinite(values), values, np.nan)
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
    """Warnings for the null z of ``reason`` (feature, year over ``years``): one per feature and reason."""
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
                {
                    "feature_id": feature_ids[int(f)],
                    "indicator": indicator,
                    "year": when[0] if len(when) == 1 else None,
                    "reason": f"{text}; z and class left null for {_year_ranges(when)}",
                }
            )
    return warnings


def _count_words(counts: list[int]) -> str:
    """[0, 2] -> '0 to 2'; [2] -> '2'."""
    return str(counts[0]) if len(counts) == 1 else f"{counts[0]} to {counts[-1]}"
