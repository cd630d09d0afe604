"""Degree days from daily tmax and tmin: single sine with a horizontal cut-off, and simple averaging.

The single-sine method (Baskerville & Emin 1969, Ecology 50:514) takes the day's temperature as a sine
between tmin and tmax, T(t) = M + a sin(t) with M = (tmax + tmin) / 2 and a = (tmax - tmin) / 2, and
integrates the part above a lower threshold TL, cut horizontally at an upper threshold TU (the hours above
TU count as TU). Over the half-cycle t in [-pi/2, pi/2] (the other half is its mirror image) with
theta1 = arcsin((TL - M) / a) and theta2 = arcsin((TU - M) / a), both clipped to [-pi/2, pi/2]:

    DD = [(M - TL)(theta2 - theta1) + a (cos theta1 - cos theta2) + (TU - TL)(pi/2 - theta2)] / pi

which covers every case at once (all below TL gives 0, all above TU gives TU - TL, inside the band M - TL).
With no upper threshold, theta2 = pi/2 and the last term vanishes. This is the form used in crop-yield
economics (``gdd`` 10-30 degC and ``edd`` above 29 degC for corn; Schlenker & Roberts 2009, PNAS 106:15594).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from service.errors import UnknownIndicatorError
from service.indicators.base import Baseline, Indicator, Parameter, SeasonCube, register
from service.indicators.basic import Scratch, null_where_no_days, reduce_rows, valid_sums
from service.indicators.compiled import degree_day_terms

_HALF_PI = np.pi / 2.0


def single_sine(tmax: np.ndarray, tmin: np.ndarray, lower: float, upper: float | None = None) -> np.ndarray:
    """Daily degree days (degC day) by the single-sine method with a horizontal cut-off at ``upper``.

    ``upper=None`` means no cut-off (degree days above ``lower``, e.g. extreme degree days). Elementwise
    over arrays of any shape; NaN in either temperature gives NaN. A day with tmax < tmin (possible after
    averaging cells with different gaps) is treated as the sine between the two values.
    """
    if upper is not None and upper <= lower:
        raise UnknownIndicatorError(
            f"degree days need the upper threshold above the lower one; got lower {lower!r}, upper {upper!r} degC",
            field="indicators.cap",
        )
    tmax = np.asarray(tmax, dtype=np.float64)
    tmin = np.asarray(tmin, dtype=np.float64)
    mean = (tmax + tmin) * 0.5
    amplitude = np.abs(tmax - tmin) * 0.5
    flat = amplitude == 0.0
    # a flat day (amplitude 0) has its mean all day: handled below without dividing by zero
    safe_amplitude = np.where(flat, 1.0, amplitude)
    sin1 = np.clip((lower - mean) / safe_amplitude, -1.0, 1.0)
    theta1 = np.arcsin(sin1)
    cos1 = np.sqrt(1.0 - sin1 * sin1)
    if upper is None:
        value = (mean - lower) * (_HALF_PI - theta1) + amplitude * cos1
        value /= np.pi
        flat_value = np.maximum(mean - lower, 0.0)
    else:
        sin2 = np.clip((upper - mean) / safe_amplitude, -1.0, 1.0)
        theta2 = np.arcsin(sin2)
        cos2 = np.sqrt(1.0 - sin2 * sin2)
        value = (
            (mean - lower) * (theta2 - theta1)
            + amplitude * (cos1 - cos2)
            + (upper - lower) * (_HALF_PI - theta2)
        )
        value /= np.pi
        flat_value = np.clip(mean, lower, upper) - lower
    value = np.where(flat, flat_value, value)
    # rounding can leave -1e-16 on days entirely below the threshold
    return np.maximum(value, 0.0, where=~np.isnan(value), out=value)


def simple_average(
    tmax: np.ndarray, tmin: np.ndarray, lower: float, upper: float | None = None
) -> np.ndarray:
    """Daily degree days (degrees day) by simple averaging with both temperatures held inside the band.

    Each of tmax and tmin is first raised to ``lower`` and capped at ``upper`` (the "86/50" rule for corn in
    degF: max capped at 86, min raised to 50), then DD = (tmax' + tmin') / 2 - lower. Works in any unit.
    Agrees with :func:`single_sine` whenever both temperatures lie inside the band.
    """
    top = np.inf if upper is None else upper
    high = np.clip(np.asarray(tmax, dtype=np.float64), lower, top)
    low = np.clip(np.asarray(tmin, dtype=np.float64), lower, top)
    return (high + low) * 0.5 - lower


def season_degree_days(cube: SeasonCube, lower: float, upper: float | None) -> np.ndarray:
    """The season's sum of single-sine degree days (degC day) over the days with tmax and tmin; NaN when none.

    Equal to summing :func:`single_sine` over each season-year's valid days (np.nansum), computed by the
    compiled day loops of service/indicators/compiled.py in blocks of scratch memory.
    """

    def block(scratch: Scratch, tmax: np.ndarray, tmin: np.ndarray) -> np.ndarray:
        if tmax.dtype != np.float64 or tmin.dtype != np.float64:  # the compiled loops take float64
            return valid_sums(scratch, single_sine(tmax, tmin, lower, upper))
        terms = scratch.get("values", tmax.shape)
        degree_day_terms(tmax, tmin, lower, upper, lambda name: scratch.get(name, (tmax.size,)), terms)
        return np.add.reduce(terms, axis=-1, dtype=np.float64)  # as valid_sums (np.nansum) adds them

    sums = reduce_rows(block, cube.tmax, cube.tmin)
    return null_where_no_days(sums, cube.days_with(("tmax", "tmin")))


def gdd(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Growing degree days of the season (degC day): single sine between ``base`` and ``cap``."""
    if params["cap"] <= params["base"]:
        raise UnknownIndicatorError(
            f"indicator 'gdd': cap ({params['cap']!r} degC) must be above base ({params['base']!r} degC); "
            "raise cap or lower base",
            field="indicators.gdd.cap",
        )
    return season_degree_days(cube, params["base"], params["cap"])


def edd(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Extreme degree days of the season (degC day): single sine above ``threshold``, no cap."""
    return season_degree_days(cube, params["threshold"], None)


register(
    Indicator(
        name="gdd",
        unit="degC day",
        definition="Growing degree days: the season's sum of daily degrees above base and below cap, the day's "
        "temperature taken as a sine between tmin and tmax with a horizontal cut-off at cap.",
        source="Single-sine method with horizontal cut-off, Baskerville & Emin 1969, Ecology 50:514; 10-30 degC "
        "band as in Schlenker & Roberts 2009, PNAS 106:15594",
        family="temperature",
        compute=gdd,
        variables=("tmax", "tmin"),
        reduction="sum",
        parameters={
            "base": Parameter(10.0, "degC", "lower threshold: degrees below it do not count", -30.0, 50.0),
            "cap": Parameter(30.0, "degC", "upper threshold: hours above it count as the cap", -20.0, 60.0),
        },
    )
)
register(
    Indicator(
        name="edd",
        unit="degC day",
        definition="Extreme (harmful) degree days: the season's sum of daily degrees above threshold, the day's "
        "temperature taken as a sine between tmin and tmax, with no upper cut-off.",
        source="Single-sine method, Baskerville & Emin 1969, Ecology 50:514; 29 degC for corn as in Schlenker & "
        "Roberts 2009, PNAS 106:15594",
        family="temperature",
        compute=edd,
        variables=("tmax", "tmin"),
        reduction="sum",
        parameters={
            "threshold": Parameter(29.0, "degC", "degrees above this threshold count", -20.0, 60.0),
        },
    )
)
