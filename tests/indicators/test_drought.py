"""Radiation, Hargreaves PET, SPI and SPEI against FAO-56, Edwards & McKee, WMO-No. 1090 and scipy.stats."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from service.indicators import drought
from service.indicators.base import Baseline, get_indicator, values_of

sys.path.insert(0, str(Path(__file__).parent))  # the folder's own helper module (importlib import mode)
from _support_cube import daily_series, fixed_baseline, season_cube, trailing_baseline  # noqa: E402

# --- FAO-56 (Allen et al. 1998), chapter 3 ---------------------------------------------------------------------


def test_fao56_example_8_radiation():
    # FAO-56 Example 8 [published]: 20 deg S, 3 September (J = 246): dr 0.985, d 0.120 rad, ws 1.527 rad,
    # Ra 32.2 MJ m-2 day-1, 13.1 mm/day
    j = 246
    phi = np.deg2rad(-20.0)
    declination = drought.solar_declination(j)
    assert drought.inverse_relative_distance(j) == pytest.approx(0.985, abs=1e-3)
    assert declination == pytest.approx(0.120, abs=1e-3)
    assert drought.sunset_hour_angle(phi, declination) == pytest.approx(1.527, abs=1e-3)
    # FAO-56 Example 9 [published], same place and day: daylight hours N = 24 ws / pi = 11.7 h (formula from memory)
    assert 24 / np.pi * drought.sunset_hour_angle(phi, declination) == pytest.approx(11.7, abs=0.05)
    ra = drought.extraterrestrial_radiation(-20.0, j)
    assert ra == pytest.approx(32.2, abs=0.05)
    assert ra * drought.MJ_TO_MM == pytest.approx(13.1, abs=0.05)


def test_fao56_example_10_radiation_and_polar_night():
    # FAO-56 Example 10 [published]: 22 deg 54' S, 15 May (J = 135): Ra 25.1 MJ m-2 day-1
    assert drought.extraterrestrial_radiation(-(22 + 54 / 60), 135) == pytest.approx(25.1, abs=0.05)
    # eq. 25 clipped at high latitude: polar night gives 0, polar day a finite positive value (no NaN)
    ra = drought.extraterrestrial_radiation(np.array([80.0, -80.0]), 355)
    assert ra[0] == pytest.approx(0.0, abs=1e-9) and ra[1] > 40


def test_hargreaves_recomputed():
    # FAO-56 eq. 52 [published], value recomputed (CHECK-VALUES.md): Tmax 26.6, Tmin 14.8, Ra 40.6 MJ -> 5.04
    et0 = drought.hargreaves(np.array(26.6), np.array(14.8), np.array(40.6))
    by_hand = 0.0023 * (20.7 + 17.8) * np.sqrt(11.8) * 0.408 * 40.6
    assert et0 == pytest.approx(by_hand) and et0 == pytest.approx(5.04, abs=0.005)
    # cold days never give negative PET; missing temperatures stay missing
    cold = drought.hargreaves(np.array([-20.0, np.nan]), np.array([-30.0, 5.0]), np.array([10.0, 10.0]))
    assert cold[0] == 0.0 and np.isnan(cold[1])


# --- SPI: Edwards & McKee 1997; McKee et al. 1993; WMO-No. 1090 ---------------------------------------------------


def test_thom_values_for_one_to_five():
    # Edwards & McKee 1997 eqs 3.6-3.8 [published], values for x = 1..5 recomputed (CHECK-VALUES.md)
    a, alpha, beta = drought.thom_gamma(np.array([1.0, 2.0, 3.0, 4.0, 5.0]))
    assert a == pytest.approx(0.141114, abs=1e-6)
    assert alpha == pytest.approx(3.702724, abs=1e-6)
    assert beta == pytest.approx(0.810214, abs=1e-6)


def test_gamma_fit_is_the_maximum_likelihood_of_scipy():
    rng = np.random.default_rng(21)
    sample = stats.gamma.rvs(2.4, scale=35.0, size=(4, 40), random_state=rng)
    sample[1, :5] = np.nan
    fit = drought.fit_gamma(sample)
    for i in range(4):
        row = sample[i][~np.isnan(sample[i])]
        shape, _, scale = stats.gamma.fit(row, floc=0)  # scipy.stats maximum likelihood, origin fixed at 0
        assert fit.alpha[i] == pytest.approx(shape, rel=1e-6)
        assert fit.beta[i] == pytest.approx(scale, rel=1e-6)
    # Thom's approximation is close to it (Edwards & McKee 1997 call it a good approximation)
    _, thom_alpha, _ = drought.thom_gamma(sample[0])
    assert thom_alpha == pytest.approx(fit.alpha[0], rel=0.02)


def test_zero_probability_formula():
    # McKee et al. 1993 / WMO-No. 1090 [published]: H(x) = q + (1 - q) G(x), q = share of zero totals
    sample = np.array([[0.0, 0.0, 10.0, 20.0, 35.0, 12.0, 50.0, 8.0, 27.0, 0.0]])
    fit = drought.fit_gamma(sample)
    assert fit.zero_probability[0] == pytest.approx(0.3)
    positive = sample[0][sample[0] > 0]
    shape, _, scale = stats.gamma.fit(positive, floc=0)
    x = np.array([[0.0, 15.0, 40.0]])
    expected = 0.3 + 0.7 * stats.gamma.cdf(x[0], shape, scale=scale)
    expected[0] = 0.3
    np.testing.assert_allclose(drought.gamma_probability(x, fit)[0], expected, rtol=1e-6)


@pytest.mark.parametrize(
    ("probability", "index"), [(0.0228, -2.0), (0.0668, -1.5), (0.1587, -1.0), (0.5, 0.0), (0.9772, 2.0)]
)
def test_wmo_probability_to_spi(probability, index):
    # WMO SPI User Guide, WMO-No. 1090 (2012) [published]: cumulative probability -> SPI
    assert drought.standard_normal_index(np.array(probability)) == pytest.approx(index, abs=0.005)


def _abramowitz_stegun_26_2_23(p: np.ndarray) -> np.ndarray:
    """Normal quantile by Abramowitz & Stegun 26.2.23 (rational approximation, |error| < 4.5e-4)."""
    c0, c1, c2 = 2.515517, 0.802853, 0.010328
    d1, d2, d3 = 1.432788, 0.189269, 0.001308
    tail = np.minimum(p, 1 - p)
    t = np.sqrt(np.log(1.0 / tail**2))
    x = t - (c0 + c1 * t + c2 * t**2) / (1 + d1 * t + d2 * t**2 + d3 * t**3)
    return np.where(p < 0.5, -x, x)


def test_norm_ppf_agrees_with_abramowitz_stegun():
    p = np.linspace(1e-6, 1 - 1e-6, 20_001)
    assert np.abs(drought.standard_normal_index(p) - _abramowitz_stegun_26_2_23(p)).max() < 4.5e-4


# --- SPEI: Vicente-Serrano et al. 2010 -----------------------------------------------------------------------


@pytest.mark.parametrize("unbiased", [False, True])
def test_log_logistic_fit_recovers_scipy_fisk(unbiased):
    # [memory] formulas (CHECK-VALUES.md): checked by recovering a known shifted log-logistic drawn with
    # scipy.stats.fisk (c = beta, scale = alpha, loc = gamma)
    rng = np.random.default_rng(17)
    sample = stats.fisk.rvs(c=5.0, loc=-80.0, scale=150.0, size=(2, 40_000), random_state=rng)
    fit = drought.fit_log_logistic(sample, unbiased=unbiased)
    assert fit.ok.all()
    np.testing.assert_allclose(fit.beta, 5.0, rtol=0.03)
    np.testing.assert_allclose(fit.alpha, 150.0, rtol=0.03)
    np.testing.assert_allclose(fit.gamma, -80.0, atol=5.0)
    x = np.array([[-20.0, 60.0, 200.0]] * 2)
    np.testing.assert_allclose(
        drought.log_logistic_probability(x, fit), stats.fisk.cdf(x, 5.0, loc=-80.0, scale=150.0), atol=0.01
    )


def test_generalized_logistic_is_the_log_logistic_for_positive_skew_and_mirrors_it_for_negative():
    rng = np.random.default_rng(23)
    sample = stats.fisk.rvs(c=4.0, loc=-60.0, scale=140.0, size=(1, 5000), random_state=rng)
    loglogistic = drought.fit_log_logistic(sample)
    glo = drought.fit_generalized_logistic(sample)
    assert glo.shape[0] < 0
    # the same distribution: beta = -1/k, alpha = scale / -k, gamma = xi + scale / k
    assert -1 / glo.shape[0] == pytest.approx(loglogistic.beta[0])
    assert glo.scale[0] / -glo.shape[0] == pytest.approx(loglogistic.alpha[0])
    assert glo.location[0] + glo.scale[0] / glo.shape[0] == pytest.approx(loglogistic.gamma[0])
    x = np.linspace(-50, 600, 14)[None, :]
    np.testing.assert_allclose(
        drought.generalized_logistic_probability(x, glo), drought.log_logistic_probability(x, loglogistic)
    )
    # negative skew (a mirrored log-logistic), where the log-logistic has no fit: F(-x) = 1 - fisk.cdf(x)
    mirrored = -sample
    assert not drought.fit_log_logistic(mirrored).ok[0]
    fit = drought.fit_generalized_logistic(mirrored)
    assert fit.ok[0] and fit.shape[0] > 0
    np.testing.assert_allclose(
        drought.generalized_logistic_probability(-x, fit)[0],
        1 - stats.fisk.cdf(x[0], 4.0, loc=-60.0, scale=140.0),
        atol=0.01,
    )
    # beyond the upper bound the probability is 1 (index bounded at +5), not NaN
    assert drought.generalized_logistic_probability(np.array([[1e9]]), fit)[0, 0] == 1.0
    assert drought.generalized_logistic_probability(np.array([[-1e9]]), glo)[0, 0] == 0.0  # below the origin


def _baseline_only(n_years: int) -> Baseline:
    return Baseline(members=np.ones((n_years, n_years), dtype=bool), fixed=True, label="all")


def test_spi_and_spei_of_the_baseline_seasons_are_standard_normal():
    # the check: index of the baseline seasons themselves has mean near 0 and sd near 1
    rng = np.random.default_rng(5)
    totals = stats.gamma.rvs(3.0, scale=60.0, size=(3, 400), random_state=rng)
    totals[2, rng.random(400) < 0.15] = 0.0  # a dry climate with zero seasons
    spi = drought.standardize_against_baseline(totals, _baseline_only(400), "gamma").values
    balance = stats.fisk.rvs(c=6.0, loc=-300.0, scale=250.0, size=(3, 400), random_state=rng)
    balance[2] = -balance[2]  # negative skew: the generalized logistic extension
    spei = drought.standardize_against_baseline(balance, _baseline_only(400), "water balance").values
    for index in (spi[:2], spei):
        np.testing.assert_allclose(index.mean(axis=1), 0.0, atol=0.05)
        np.testing.assert_allclose(index.std(axis=1, ddof=1), 1.0, atol=0.05)
    # with 15 % zeros every zero season gets Phi^-1(q), and the rest are above it
    zero = totals[2] == 0
    q = zero.mean()
    np.testing.assert_allclose(spi[2, zero], stats.norm.ppf(q))
    assert (spi[2, ~zero] > stats.norm.ppf(q)).all()


@pytest.mark.parametrize("kind", ["gamma", "water balance"])
def test_degenerate_baselines_give_nan_never_inf(kind):
    values = np.array(
        [
            [0.0] * 10,  # all zeros
            [42.0] * 10,  # zero spread
            [np.nan] * 8 + [10.0, 20.0],  # fewer than three seasons with data
            [5.0, 9.0, 14.0, 20.0, 7.0, 11.0, 30.0, 16.0, 12.0, 8.0],  # a usable one
        ]
    )
    index = drought.standardize_against_baseline(values, _baseline_only(10), kind).values
    assert np.isnan(index[:3]).all()
    assert np.isfinite(index[3]).all()
    # a season far below anything in the baseline is bounded, not infinite
    far = values.copy()
    far[3, 0] = 0.0 if kind == "gamma" else -1e6
    bounded = drought.standardize_against_baseline(far, _baseline_only(10), kind).values
    assert np.isfinite(bounded[3]).all() and bounded[3, 0] >= -drought.INDEX_LIMIT


def _rainy_daily(n_years: int = 12, n_features: int = 3):
    rng = np.random.default_rng(9)
    probe = daily_series(1990, n_years)
    n = probe.year.size
    tmax = 30 + 4 * np.sin(2 * np.pi * probe.dayofyear / 365) + rng.normal(0, 2, (n_features, n))
    prcp = np.where(rng.random((n_features, n)) < 0.3, rng.gamma(0.7, 12, (n_features, n)), 0.0)
    return daily_series(
        1990,
        n_years,
        n_features=n_features,
        tmax=tmax,
        tmin=tmax - 11,
        prcp=prcp,
        latitude=[-20.0, 5.0, 35.0],
    )


def test_season_water_balance_by_hand_for_one_season():
    daily = _rainy_daily()
    cube = season_cube(daily, months=[6, 7])
    balance = drought.season_water_balance(cube)
    f, row = 2, 4
    days = cube.time_index[row][cube.in_season[row]]
    ra = drought.extraterrestrial_radiation(35.0, daily.dayofyear[days])
    pet = drought.hargreaves(daily.tmax[f, days], daily.tmin[f, days], ra)
    assert balance[f, row] == pytest.approx((daily.prcp[f, days] - pet).sum())


def test_spi_spei_indicators_fixed_and_trailing():
    daily = _rainy_daily()
    cube = season_cube(daily, months=[5, 6, 7, 8, 9])
    fixed = fixed_baseline(cube, 1990, 1999)
    totals = get_indicator("prcp_total").compute(cube, fixed, {})
    for name in ("spi", "spei"):
        entry = get_indicator(name)
        assert entry.standardized and entry.uses_baseline and entry.family == "drought"
        value = values_of(entry.compute(cube, fixed, entry.resolve({})))
        assert value.shape == (3, 12) and np.isfinite(value).all()
    spi = values_of(get_indicator("spi").compute(cube, fixed, {}))
    # SPI is monotone in the season total within each community (one fitted distribution)
    for f in range(3):
        order = np.argsort(totals[f])
        assert np.all(np.diff(spi[f, order]) >= 0)
    # a trailing normal refits per season-year: the first three seasons have no normal yet
    trailing = trailing_baseline(cube, 5)
    spi_trailing = values_of(get_indicator("spi").compute(cube, trailing, {}))
    assert np.isnan(spi_trailing[:, :3]).all() and np.isfinite(spi_trailing[:, 3:]).all()
    year = 9  # by hand: fit the 5 seasons before it
    fit = drought.fit_gamma(totals[:, year - 5 : year])
    expected = drought.standard_normal_index(drought.gamma_probability(totals[:, year : year + 1], fit))[:, 0]
    np.testing.assert_allclose(spi_trailing[:, year], expected)


def test_spei_fit_does_not_depend_on_the_origin_of_the_water_balance():
    # why spei uses the unbiased PWMs (Begueria et al. 2014): an index must not change when every season's
    # P - PET moves by the same amount; the plotting-position PWMs of 2010 shift l2 by 0.3 c / N
    rng = np.random.default_rng(31)
    balance = stats.fisk.rvs(c=5.0, loc=-100.0, scale=120.0, size=(4, 12), random_state=rng)
    base = _baseline_only(12)
    index = drought.standardize_against_baseline(balance, base, "water balance").values
    shifted = drought.standardize_against_baseline(balance - 800.0, base, "water balance").values
    assert np.isfinite(index).all()
    np.testing.assert_allclose(shifted, index, atol=1e-9)
    w = drought.probability_weighted_moments(balance)
    w_shifted = drought.probability_weighted_moments(balance - 800.0)
    l2, l2_shifted = w[0] - 2 * w[1], w_shifted[0] - 2 * w_shifted[1]
    np.testing.assert_allclose(l2_shifted - l2, 0.3 * -800.0 / 12)


@pytest.mark.parametrize("calendar", ["standard", "noleap", "360_day"])
def test_spei_in_every_calendar(calendar):
    rng = np.random.default_rng(2)
    probe = daily_series(1990, 8, calendar=calendar)
    n = probe.year.size
    tmax = rng.normal(30, 3, (2, n))
    prcp = np.where(rng.random((2, n)) < 0.3, rng.gamma(0.7, 12, (2, n)), 0.0)
    daily = daily_series(
        1990, 8, n_features=2, tmax=tmax, tmin=tmax - 10, prcp=prcp, calendar=calendar, latitude=[12.0, -3.0]
    )
    cube = season_cube(daily, months=[6, 7, 8])
    balance = drought.season_water_balance(cube)
    # by hand for one season: a 360-day year's days are spread over the 365-day orbit
    days = cube.time_index[2][cube.in_season[2]]
    doy = daily.dayofyear[days].astype(float)
    if calendar == "360_day":
        doy = (doy - 0.5) * 365 / 360 + 0.5
    pet = drought.hargreaves(tmax[0, days], tmax[0, days] - 10, drought.extraterrestrial_radiation(12.0, doy))
    assert balance[0, 2] == pytest.approx((prcp[0, days] - pet).sum())
    entry = get_indicator("spei")
    spei = values_of(entry.compute(cube, fixed_baseline(cube, 1990, 1997), entry.resolve({})))
    assert np.isfinite(spei).all()
