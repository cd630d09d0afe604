"""Degree days: single sine with horizontal cut-off, checked against numerical integration, and averaging."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate

from service.errors import UnknownIndicatorError
from service.indicators import degree_days
from service.indicators.base import get_indicator

sys.path.insert(0, str(Path(__file__).parent))  # the folder's own helper module (importlib import mode)
from _support_cube import daily_series, fixed_baseline, season_cube  # noqa: E402


def _integrated(tmax: float, tmin: float, lower: float, upper: float | None) -> float:
    """Degree days by integrating the clipped sine over one whole day (scipy.integrate.quad)."""
    mean, amplitude = (tmax + tmin) / 2, (tmax - tmin) / 2
    top = np.inf if upper is None else upper

    def above(t: float) -> float:
        return min(max(mean + amplitude * np.sin(t), lower), top) - lower

    # the clipped sine has kinks where it crosses a threshold: tell quad where they are
    kinks = []
    for threshold in (lower, upper):
        if threshold is not None and amplitude > 0 and abs((threshold - mean) / amplitude) < 1:
            t = np.arcsin((threshold - mean) / amplitude)
            kinks += [t % (2 * np.pi), (np.pi - t) % (2 * np.pi)]
    value, _ = integrate.quad(above, 0.0, 2 * np.pi, points=kinks or None, limit=200, epsabs=1e-11)
    return value / (2 * np.pi)


# CHECK-VALUES.md "Degree days" (Baskerville & Emin 1969, Ecology 50:514), values recomputed by integration
SINE_CASES = [
    (14, 7, 12, 30, 0.4681),
    (25, 5, 10, 30, 6.0900),
    (35, 15, 10, 30, 13.9100),
    (35, 5, 10, 30, 10.0000),
    (40, 32, 10, 30, 20.0),
    (8, 2, 10, 30, 0.0),
    (35, 20, 29, None, 1.6852),  # degree days above 29 degC, no cap
    (30, 18, 29, None, 0.1236),
]


@pytest.mark.parametrize(("tmax", "tmin", "lower", "upper", "expected"), SINE_CASES)
def test_single_sine_check_values_and_integration(tmax, tmin, lower, upper, expected):
    value = float(degree_days.single_sine(np.array(tmax), np.array(tmin), lower, upper))
    assert value == pytest.approx(expected, abs=5e-5)
    # [memory] formula, so each case is also held against numerical integration of the sine (scipy.integrate)
    assert value == pytest.approx(_integrated(tmax, tmin, lower, upper), abs=1e-7)


def test_single_sine_random_days_against_integration():
    rng = np.random.default_rng(11)
    tmin = rng.uniform(-5, 35, 40)
    tmax = tmin + rng.uniform(0, 20, 40)
    vectorised = degree_days.single_sine(tmax, tmin, 10.0, 30.0)
    no_cap = degree_days.single_sine(tmax, tmin, 29.0, None)
    for i in range(40):
        assert vectorised[i] == pytest.approx(_integrated(tmax[i], tmin[i], 10.0, 30.0), abs=1e-7)
        assert no_cap[i] == pytest.approx(_integrated(tmax[i], tmin[i], 29.0, None), abs=1e-7)


def test_sine_equals_averaging_inside_the_band():
    # both temperatures inside [TL, TU]: the sine's mean above TL is exactly M - TL, as in simple averaging
    rng = np.random.default_rng(5)
    tmin = rng.uniform(10, 30, 200)
    tmax = rng.uniform(tmin, 30)
    np.testing.assert_allclose(
        degree_days.single_sine(tmax, tmin, 10.0, 30.0), degree_days.simple_average(tmax, tmin, 10.0, 30.0)
    )
    # and they differ once the band is crossed (the sine counts the warm hours of a cool day)
    assert degree_days.single_sine(np.array(14.0), np.array(6.0), 10.0, 30.0) > 0.5
    assert degree_days.simple_average(np.array(14.0), np.array(6.0), 10.0, 30.0) == pytest.approx(2.0)


# University extension notes on corn growing degree days, the 86/50 degF rule (CHECK-VALUES.md [published])
@pytest.mark.parametrize(
    ("tmax", "tmin", "expected"), [(87, 63, 24.5), (90, 65, 25.5), (72, 46, 11.0), (63, 42, 6.5)]
)
def test_averaging_corn_rule_degf(tmax, tmin, expected):
    assert degree_days.simple_average(np.array(tmax), np.array(tmin), 50.0, 86.0) == pytest.approx(expected)


def test_flat_day_missing_day_and_swapped_temperatures():
    tmax = np.array([20.0, 35.0, np.nan, 5.0])
    tmin = np.array([20.0, 35.0, 12.0, 25.0])
    value = degree_days.single_sine(tmax, tmin, 10.0, 30.0)
    assert value[0] == pytest.approx(10.0) and value[1] == pytest.approx(20.0) and np.isnan(value[2])
    assert value[3] == pytest.approx(_integrated(25.0, 5.0, 10.0, 30.0), abs=1e-7)


def test_season_sums_and_parameters():
    # one year of identical days 25/5 degC: gdd = 365 * 6.0900, edd(threshold 20) from the sine above 20
    daily = daily_series(2001, 2, tmax=25.0, tmin=5.0)
    cube = season_cube(daily)
    base = fixed_baseline(cube, 2001, 2002)
    gdd = get_indicator("gdd")
    value = gdd.compute(cube, base, gdd.resolve({}))
    np.testing.assert_allclose(value[0], 365 * 6.09, rtol=1e-5)
    edd = get_indicator("edd")
    hot = edd.compute(cube, base, edd.resolve({"threshold": 20.0}))
    np.testing.assert_allclose(hot[0], 365 * _integrated(25, 5, 20, None), rtol=1e-9)
    assert edd.compute(cube, base, edd.resolve({}))[0, 0] == 0.0  # never above 29 degC
    with pytest.raises(UnknownIndicatorError, match="cap .* must be above base"):
        gdd.compute(cube, base, gdd.resolve({"base": 30, "cap": 20}))
    with pytest.raises(UnknownIndicatorError, match="no parameter 'threshold'"):
        gdd.resolve({"threshold": 3})


@pytest.mark.parametrize("lower, upper", [(10.0, 30.0), (29.0, None), (0.0, 5.0), (-3.5, None), (0.0, None)])
def test_compiled_day_terms_are_single_sine_bit_for_bit(lower, upper):
    # the compiled loops (service/indicators/compiled.py) must give numpy's single_sine exactly, sign of zero
    # included, with flat days (tmax == tmin, -0.0 among them), swapped and missing temperatures, and days
    # exactly on a threshold; missing days are 0 (the terms np.nansum adds)
    from service.indicators.compiled import degree_day_terms

    rng = np.random.default_rng(15)
    shape = (40, 366)
    tmax = np.round(rng.normal(15.0, 12.0, shape), 1)
    tmin = tmax - np.round(rng.exponential(6.0, shape), 1)
    flat = rng.random(shape) < 0.05
    tmin[flat] = tmax[flat]
    tmax[:2, :50] = tmin[:2, :50] = -0.0
    tmax[2, :50], tmin[2, :50] = lower, lower - 3.0
    swap = rng.random(shape) < 0.05
    tmax[swap], tmin[swap] = tmin[swap], tmax[swap]
    tmax[rng.random(shape) < 0.03] = np.nan
    tmin[rng.random(shape) < 0.03] = np.nan
    expected = degree_days.single_sine(tmax, tmin, lower, upper)
    expected = np.where(np.isnan(expected), 0.0, expected)
    terms = np.empty(shape)
    degree_day_terms(tmax, tmin, lower, upper, lambda name: np.empty(tmax.size), terms)
    assert np.array_equal(terms, expected) and np.array_equal(np.signbit(terms), np.signbit(expected))
    assert np.array_equal(
        terms.sum(axis=-1), np.nansum(degree_days.single_sine(tmax, tmin, lower, upper), axis=-1)
    )
