"""Drought indices of the season: SPI (gamma with a probability of zero) and SPEI (log-logistic on P - PET).

* Extraterrestrial radiation Ra from latitude and day of year, FAO-56 (Allen et al. 1998) eqs 21-25, and
  Hargreaves reference evapotranspiration, FAO-56 eq. 52, with Ra converted to mm/day by 0.408.
* ``spi``: the season's precipitation total against a gamma distribution fitted to the baseline seasons'
  totals by maximum likelihood (Thom's approximation, Edwards & McKee 1997, as the starting value, then
  Newton steps on the exact likelihood equation), with the share of zero totals q:
  H(x) = q + (1 - q) G(x), SPI = Phi^-1(H) (McKee et al. 1993; WMO SPI User Guide, WMO-No. 1090, 2012).
* ``spei``: the season's climatic water balance D = sum(P - PET) against a three-parameter log-logistic
  distribution fitted by L-moments to the baseline seasons' D (Vicente-Serrano, Begueria & Lopez-Moreno
  2010, J. Climate 23:1696), with the unbiased probability-weighted moments of the later revision
  (Begueria et al. 2014, Int. J. Climatol. 34:3001). The plotting-position moments of the 2010 paper
  (F_i = (i - 0.35) / N) are available in :func:`fit_log_logistic` but ``spei`` does not use them: they are
  not shift-invariant (adding c to every D moves l2 by 0.3 c / N), so with a short baseline of strongly
  negative D (a dry climate, D ~ -800 mm) the fit depends on the origin of D and often fails.
  The log-logistic needs a positively skewed baseline (L-skewness > 0); a baseline with no or negative
  skew has no log-logistic fit, so ``spei`` fits the generalized logistic distribution by the same
  L-moments: for positive skew it is exactly the three-parameter log-logistic, otherwise its natural
  extension.

Both are vectorised over communities; a trailing baseline is fitted once per distinct baseline row. A
baseline with fewer than three seasons with data, all-zero totals, zero spread or a failed fit gives NaN
for every season-year that uses it, never an infinite value. A fitted baseline that puts a season in the
far tail (a zero total where the baseline had none, a balance below the fitted lower bound) gives the
bound -5 or +5 (probability clipped to Phi(+-5)): finite, and beyond any class edge.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from service.indicators.base import Baseline, Indicator, IndicatorValues, Parameter, SeasonCube, register
from service.indicators.basic import reduce_in_blocks, season_sum, season_total

SOLAR_CONSTANT = 0.0820  # MJ m-2 min-1, FAO-56 eq. 21
MJ_TO_MM = 0.408  # MJ m-2 day-1 to mm/day of evaporation, 1 / 2.45 MJ kg-1 (FAO-56, chapter 3)
MIN_BASELINE_SEASONS = 3  # a baseline needs at least three seasons with data (issue 4)
INDEX_LIMIT = 5.0  # SPI and SPEI are bounded to +-5: a probability of 0 or 1 maps here, never to infinity
_PROBABILITY_FLOOR = float(stats.norm.cdf(-INDEX_LIMIT))


# --- radiation and PET --------------------------------------------------------------------------------------


def inverse_relative_distance(day_of_year: np.ndarray) -> np.ndarray:
    """Inverse relative Earth-Sun distance dr (dimensionless), FAO-56 eq. 23."""
    return 1.0 + 0.033 * np.cos(2.0 * np.pi * np.asarray(day_of_year, dtype=np.float64) / 365.0)


def solar_declination(day_of_year: np.ndarray) -> np.ndarray:
    """Solar declination (rad), FAO-56 eq. 24."""
    return 0.409 * np.sin(2.0 * np.pi * np.asarray(day_of_year, dtype=np.float64) / 365.0 - 1.39)


def sunset_hour_angle(latitude_rad: np.ndarray, declination: np.ndarray) -> np.ndarray:
    """Sunset hour angle ws (rad), FAO-56 eq. 25; clipped for polar day (pi) and polar night (0)."""
    return np.arccos(np.clip(-np.tan(latitude_rad) * np.tan(declination), -1.0, 1.0))


def extraterrestrial_radiation(latitude_deg: np.ndarray, day_of_year: np.ndarray) -> np.ndarray:
    """Daily extraterrestrial radiation Ra (MJ m-2 day-1) from latitude (degrees north), FAO-56 eq. 21.

    Broadcasts ``latitude_deg`` against ``day_of_year`` (1..365 or 366).
    """
    phi = np.deg2rad(np.asarray(latitude_deg, dtype=np.float64))
    dr = inverse_relative_distance(day_of_year)
    delta = solar_declination(day_of_year)
    ws = sunset_hour_angle(phi, delta)
    return (
        (24.0 * 60.0 / np.pi)
        * SOLAR_CONSTANT
        * dr
        * (ws * np.sin(phi) * np.sin(delta) + np.cos(phi) * np.cos(delta) * np.sin(ws))
    )


def hargreaves(tmax: np.ndarray, tmin: np.ndarray, radiation_mj: np.ndarray) -> np.ndarray:
    """Reference evapotranspiration ET0 (mm/day) by Hargreaves, FAO-56 eq. 52, from Ra in MJ m-2 day-1.

    ET0 = 0.0023 (Tmean + 17.8) (Tmax - Tmin)^0.5 (0.408 Ra). A negative range (tmax < tmin after averaging
    cells with different gaps) counts as zero range, and ET0 is not allowed below 0 (Tmean < -17.8 degC).
    NaN temperatures give NaN.
    """
    mean = (tmax + tmin) * 0.5
    spread = np.sqrt(np.maximum(tmax - tmin, 0.0))
    et0 = 0.0023 * (mean + 17.8) * spread * (MJ_TO_MM * radiation_mj)
    return np.where(et0 < 0.0, 0.0, et0)  # NaN stays NaN


def _equivalent_day_of_year(day_of_year: np.ndarray, calendar: str) -> np.ndarray:
    """Day of year on a 365-day orbit: a 360-day calendar's days are spread over the same orbit."""
    doy = np.asarray(day_of_year, dtype=np.float64)
    if calendar.lower() == "360_day":
        return (doy - 0.5) * (365.0 / 360.0) + 0.5
    return doy


def season_water_balance(cube: SeasonCube) -> np.ndarray:
    """Climatic water balance of each season-year, sum of P - ET0 (Hargreaves) over the valid days (mm).

    Days missing any of prcp, tmax, tmin drop out; NaN when no day is valid. Vectorised over days and
    features, in blocks of season-years that keep the daily PET out of a full-size temporary.
    """
    daily = cube.daily
    n_doy = 360 if daily.calendar.lower() == "360_day" else 366
    doy = _equivalent_day_of_year(np.arange(1, n_doy + 1), daily.calendar)
    radiation = extraterrestrial_radiation(cube.latitude[:, None], doy[None, :])  # (feature, doy)
    day_column = np.maximum(cube.dayofyear, 1) - 1  # padding days are NaN in the data anyway
    n_year = day_column.shape[0]

    def balance(rows: np.ndarray, prcp: np.ndarray, tmax: np.ndarray, tmin: np.ndarray) -> np.ndarray:
        feature, year = np.divmod(rows, n_year)
        ra = radiation[feature[:, None], day_column[year]]  # (rows, day) MJ m-2 day-1
        return season_sum(prcp - hargreaves(tmax, tmin, ra))

    return reduce_in_blocks(balance, cube.prcp, cube.tmax, cube.tmin, pass_rows=True)


# --- distributions ------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class GammaFit:
    """Gamma fits per feature: shape alpha, scale beta (mm), probability of zero q, and whether usable."""

    alpha: np.ndarray
    beta: np.ndarray
    zero_probability: np.ndarray
    ok: np.ndarray


def thom_gamma(positive: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Thom's approximate maximum-likelihood gamma fit along the last axis (NaN skipped): (A, alpha, beta).

    A = ln(mean) - mean(ln x); alpha = (1 + sqrt(1 + 4A/3)) / (4A); beta = mean / alpha
    (Edwards & McKee 1997, Colorado State climatology report 97-2, eqs 3.6-3.8). Values must be > 0.
    """
    valid = ~np.isnan(positive)
    n = np.count_nonzero(valid, axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(valid, positive, 0.0).sum(axis=-1) / n
        mean_log = np.where(valid, np.log(np.where(valid, positive, 1.0)), 0.0).sum(axis=-1) / n
        a = np.log(mean) - mean_log
        alpha = (1.0 + np.sqrt(1.0 + 4.0 * a / 3.0)) / (4.0 * a)
        return a, alpha, mean / alpha


def fit_gamma(sample: np.ndarray, newton_steps: int = 8) -> GammaFit:
    """Gamma with a probability of zero fitted to each row of ``sample`` (feature, season); NaN skipped.

    q is the share of zeros among the valid values; the gamma is fitted to the positive ones by maximum
    likelihood: Thom's approximation, then Newton steps on ln(alpha) - digamma(alpha) = A (alpha on a log
    scale). ``ok`` is False with fewer than three valid values, fewer than two positive ones, zero spread
    (A ~ 0, e.g. all totals equal) or a non-finite result.
    """
    sample = np.asarray(sample, dtype=np.float64)
    valid = ~np.isnan(sample)
    n = np.count_nonzero(valid, axis=-1)
    zeros = np.count_nonzero(valid & (sample <= 0.0), axis=-1)
    positive = np.where(valid & (sample > 0.0), sample, np.nan)
    n_positive = n - zeros
    with np.errstate(all="ignore"):
        a, alpha, thom_beta = thom_gamma(positive)
        positive_mean = thom_beta * alpha  # Thom's beta is mean / alpha
        spread = np.isfinite(a) & (a > 1e-10)
        alpha = np.where(spread, alpha, 1.0)
        a_safe = np.where(spread, a, 1.0)
        log_alpha = np.log(alpha)
        for _ in range(newton_steps):
            alpha = np.exp(log_alpha)
            f = np.log(alpha) - special.digamma(alpha) - a_safe
            derivative = 1.0 - alpha * special.polygamma(1, alpha)  # d f / d ln(alpha)
            log_alpha = log_alpha - f / derivative
        alpha = np.exp(log_alpha)
        beta = positive_mean / alpha
        q = np.where(n > 0, zeros / np.maximum(n, 1), np.nan)
    ok = (n >= MIN_BASELINE_SEASONS) & (n_positive >= 2) & spread & np.isfinite(alpha) & np.isfinite(beta)
    ok &= (alpha > 0) & (beta > 0)
    return GammaFit(alpha=alpha, beta=beta, zero_probability=q, ok=ok)


def gamma_probability(x: np.ndarray, fit: GammaFit) -> np.ndarray:
    """Non-exceedance probability H = q + (1 - q) G(x) of totals ``x`` (feature, ...) under ``fit``."""
    shape = (-1,) + (1,) * (np.ndim(x) - 1)
    alpha, beta, q = (v.reshape(shape) for v in (fit.alpha, fit.beta, fit.zero_probability))
    with np.errstate(invalid="ignore"):
        g = special.gammainc(alpha, np.maximum(x, 0.0) / beta)
        h = q + (1.0 - q) * np.where(x > 0, g, 0.0)
    return np.where(fit.ok.reshape(shape) & ~np.isnan(x), h, np.nan)


@dataclass(frozen=True)
class LogLogisticFit:
    """Three-parameter log-logistic fits per feature: scale alpha, shape beta, origin gamma, usable."""

    alpha: np.ndarray
    beta: np.ndarray
    gamma: np.ndarray
    ok: np.ndarray


def probability_weighted_moments(sample: np.ndarray, unbiased: bool = False) -> np.ndarray:
    """w0, w1, w2 of each row (NaN skipped): w_s = mean of (1 - F_i)^s x_(i) over the sorted values.

    ``unbiased=False``: F_i = (i - 0.35) / N (Vicente-Serrano et al. 2010). ``unbiased=True``: the unbiased
    estimators (1/N) sum x_(i) C(N - i, s) / C(N - 1, s) (Begueria et al. 2014). Shape (3, feature).
    """
    ordered = np.sort(np.asarray(sample, dtype=np.float64), axis=-1)  # NaN last
    n = np.count_nonzero(~np.isnan(ordered), axis=-1)[:, None].astype(np.float64)
    i = np.arange(1, ordered.shape[-1] + 1, dtype=np.float64)[None, :]
    used = i <= n
    x = np.where(used, ordered, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        if unbiased:
            w1_weight = (n - i) / (n - 1.0)
            w2_weight = (n - i) * (n - i - 1.0) / ((n - 1.0) * (n - 2.0))
        else:
            survival = 1.0 - (i - 0.35) / n
            w1_weight, w2_weight = survival, survival * survival
        w0 = x.sum(axis=-1) / n[:, 0]
        w1 = (np.where(used, w1_weight, 0.0) * x).sum(axis=-1) / n[:, 0]
        w2 = (np.where(used, w2_weight, 0.0) * x).sum(axis=-1) / n[:, 0]
    return np.stack([w0, w1, w2])


def fit_log_logistic(sample: np.ndarray, unbiased: bool = False) -> LogLogisticFit:
    """Three-parameter log-logistic fitted by L-moments to each row of ``sample`` (feature, season).

    beta = (2 w1 - w0) / (6 w1 - w0 - 6 w2); alpha = (w0 - 2 w1) beta / (G(1 + 1/beta) G(1 - 1/beta));
    gamma = w0 - alpha G(1 + 1/beta) G(1 - 1/beta) (Vicente-Serrano et al. 2010; from memory, checked against
    scipy.stats.fisk in the tests), so that
    F(x) = 1 / (1 + (alpha / (x - gamma))^beta). ``ok`` is False with fewer than three values, zero spread,
    or beta <= 1 (no finite mean) or other non-finite parameters.
    """
    sample = np.asarray(sample, dtype=np.float64)
    n = np.count_nonzero(~np.isnan(sample), axis=-1)
    w0, w1, w2 = probability_weighted_moments(sample, unbiased=unbiased)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        beta = (2.0 * w1 - w0) / (6.0 * w1 - w0 - 6.0 * w2)
        g = special.gamma(1.0 + 1.0 / beta) * special.gamma(1.0 - 1.0 / beta)
        alpha = (w0 - 2.0 * w1) * beta / g
        gamma = w0 - alpha * g
        spread = np.nanmax(sample, axis=-1, initial=-np.inf) - np.nanmin(sample, axis=-1, initial=np.inf)
        scale = np.maximum(np.abs(w0), 1.0)
    ok = (n >= MIN_BASELINE_SEASONS) & (spread > 1e-9 * scale) & (beta > 1.0) & (alpha > 0.0)
    ok &= np.isfinite(alpha) & np.isfinite(beta) & np.isfinite(gamma)
    return LogLogisticFit(alpha=alpha, beta=beta, gamma=gamma, ok=ok)


def log_logistic_probability(x: np.ndarray, fit: LogLogisticFit) -> np.ndarray:
    """Non-exceedance probability F(x) = 1 / (1 + (alpha / (x - gamma))^beta) of ``x`` (feature, ...)."""
    shape = (-1,) + (1,) * (np.ndim(x) - 1)
    alpha, beta, gamma = (v.reshape(shape) for v in (fit.alpha, fit.beta, fit.gamma))
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        above = x - gamma
        f = np.where(above > 0, 1.0 / (1.0 + (alpha / np.where(above > 0, above, 1.0)) ** beta), 0.0)
    return np.where(fit.ok.reshape(shape) & ~np.isnan(x), f, np.nan)


@dataclass(frozen=True)
class GeneralizedLogisticFit:
    """Generalized logistic fits per feature: location xi, scale alpha, shape k (Hosking), usable."""

    location: np.ndarray
    scale: np.ndarray
    shape: np.ndarray
    ok: np.ndarray


def fit_generalized_logistic(sample: np.ndarray, unbiased: bool = False) -> GeneralizedLogisticFit:
    """Generalized logistic fitted by L-moments to each row of ``sample`` (feature, season), NaN skipped.

    From the same PWMs as :func:`fit_log_logistic`: l1 = w0, l2 = w0 - 2 w1, l3 = w0 - 6 w1 + 6 w2,
    k = -l3 / l2, alpha = l2 sin(k pi) / (k pi), xi = l1 - alpha (1/k - pi / sin(k pi)) (Hosking & Wallis
    1997, from memory; checked against :func:`fit_log_logistic` in the tests). With k < 0 (positive skew)
    it is the three-parameter log-logistic of Vicente-Serrano et al. 2010 (beta = -1/k, scale alpha/-k,
    origin xi + alpha/k); with k >= 0 (no or negative skew), where the log-logistic has no solution, it
    extends that family smoothly (logistic at k = 0, an upper bound for k > 0).
    """
    sample = np.asarray(sample, dtype=np.float64)
    n = np.count_nonzero(~np.isnan(sample), axis=-1)
    w0, w1, w2 = probability_weighted_moments(sample, unbiased=unbiased)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        l1, l2, l3 = w0, w0 - 2.0 * w1, w0 - 6.0 * w1 + 6.0 * w2
        k = -l3 / l2
        near_zero = np.abs(k) < 1e-6
        k_safe = np.where(near_zero, 0.5, k)
        ratio = np.where(near_zero, 1.0, np.sin(k_safe * np.pi) / (k_safe * np.pi))
        scale = l2 * ratio
        location = np.where(near_zero, l1, l1 - scale * (1.0 / k_safe - np.pi / np.sin(k_safe * np.pi)))
        spread = np.nanmax(sample, axis=-1, initial=-np.inf) - np.nanmin(sample, axis=-1, initial=np.inf)
        tiny = 1e-9 * np.maximum(np.abs(w0), 1.0)
    ok = (n >= MIN_BASELINE_SEASONS) & (spread > tiny) & (l2 > tiny) & (np.abs(k) < 1.0)
    ok &= np.isfinite(location) & np.isfinite(scale) & np.isfinite(k)
    return GeneralizedLogisticFit(location=location, scale=scale, shape=k, ok=ok)


def generalized_logistic_probability(x: np.ndarray, fit: GeneralizedLogisticFit) -> np.ndarray:
    """Non-exceedance probability F = 1 / (1 + exp(-y)) of ``x`` (feature, ...), y = -log(1 - k z) / k."""
    shape = (-1,) + (1,) * (np.ndim(x) - 1)
    location, scale, k = (v.reshape(shape) for v in (fit.location, fit.scale, fit.shape))
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        z = (x - location) / scale
        near_zero = np.abs(k) < 1e-6
        k_safe = np.where(near_zero, 1.0, k)
        argument = 1.0 - k_safe * z
        # beyond the bound of the distribution: below the lower one (k < 0) F = 0, above the upper F = 1
        y = np.where(argument > 0, -np.log(np.where(argument > 0, argument, 1.0)) / k_safe, np.inf * k_safe)
        y = np.where(near_zero, z, y)
        f = special.expit(y)
    return np.where(fit.ok.reshape(shape) & ~np.isnan(x), f, np.nan)


def standard_normal_index(probability: np.ndarray) -> np.ndarray:
    """Phi^-1 of a probability (scipy.stats.norm.ppf), clipped to exactly +-INDEX_LIMIT; NaN stays NaN.

    A probability at or beyond Phi(+-5) gives exactly -5 or +5, so a clipped value is recognisable (the
    table flags it at_clip).
    """
    p = np.asarray(probability, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        inside = stats.norm.ppf(np.clip(p, _PROBABILITY_FLOOR, 1.0 - _PROBABILITY_FLOOR))
        out = np.where(
            p <= _PROBABILITY_FLOOR,
            -INDEX_LIMIT,
            np.where(p >= 1.0 - _PROBABILITY_FLOOR, INDEX_LIMIT, inside),
        )
    return np.where(np.isnan(p), np.nan, out)


def _baseline_rows(baseline: Baseline) -> tuple[np.ndarray, np.ndarray]:
    """Distinct baseline rows (row, year) and, for each season-year, the row it uses."""
    members = np.asarray(baseline.members, dtype=bool)
    if baseline.fixed:
        return members[:1], np.zeros(members.shape[0], dtype=np.int64)
    rows, inverse = np.unique(members, axis=0, return_inverse=True)
    return rows, inverse.reshape(-1)


SPEI_DISTRIBUTIONS = ("generalized_logistic", "log_logistic")


def standardize_against_baseline(
    values: np.ndarray, baseline: Baseline, kind: str, distribution: str = "generalized_logistic"
) -> IndicatorValues:
    """SPI-type index of ``values`` (feature, year) against each season-year's baseline seasons, with flags.

    ``kind`` "gamma" (SPI) fits a gamma with a probability of zero; "water balance" (SPEI) fits by
    L-moments the ``distribution``: "generalized_logistic" (the log-logistic where the baseline's
    L-skewness is positive, its extension otherwise, bounded above when the skew is negative) or
    "log_logistic" (only where the L-skewness is positive; null elsewhere). One fit per distinct baseline
    row, vectorised over features. Flags: no_fit (a value without a usable fit), zero_rain_spi (SPI of a
    zero total), spei_upper_bound (an SPEI fit bounded above).
    """
    rows, row_of_year = _baseline_rows(baseline)
    out = np.full(values.shape, np.nan)
    no_fit = np.zeros(values.shape, dtype=bool)
    bounded = np.zeros(values.shape, dtype=bool)
    for r, row in enumerate(rows):
        years = np.flatnonzero(row_of_year == r)
        sample = values[:, row]
        current = values[:, years]
        if kind == "gamma":
            fit = fit_gamma(sample)
            ok = fit.ok
            probability = gamma_probability(current, fit)
        else:
            glo = fit_generalized_logistic(sample, unbiased=True)
            ok = glo.ok if distribution == "generalized_logistic" else glo.ok & (glo.shape < 0)
            glo = GeneralizedLogisticFit(glo.location, glo.scale, glo.shape, ok)
            probability = generalized_logistic_probability(current, glo)
            bounded[:, years] = (ok & (glo.shape > 0))[:, None] & ~np.isnan(current)
        out[:, years] = standard_normal_index(probability)
        no_fit[:, years] = ~ok[:, None] & ~np.isnan(current)
    flags = {"no_fit": no_fit}
    if kind == "gamma":
        with np.errstate(invalid="ignore"):
            flags["zero_rain_spi"] = (values <= 0.0) & ~np.isnan(out)
    else:
        flags["spei_upper_bound"] = bounded
    return IndicatorValues(values=out, flags=flags)


# --- the indicators -----------------------------------------------------------------------------------------


def spi(cube: SeasonCube, baseline: Baseline, params: Mapping[str, object]) -> IndicatorValues:
    """Standardized Precipitation Index of the season total (standard-normal units), with flags.

    Totals of partial seasons follow the request's partial_seasons policy (``cube.scale_totals``), in the
    season itself and in the baseline seasons alike.
    """
    totals = cube.scale_totals(season_total(cube, "prcp"))
    return standardize_against_baseline(totals, baseline, "gamma")


def spei(cube: SeasonCube, baseline: Baseline, params: Mapping[str, object]) -> IndicatorValues:
    """Standardized Precipitation-Evapotranspiration Index of the season's P - PET (standard-normal units).

    The water balance of a partial season follows the partial_seasons policy like SPI's totals;
    ``params["distribution"]`` chooses the fitted distribution (see standardize_against_baseline).
    """
    balance = cube.scale_totals(season_water_balance(cube))
    return standardize_against_baseline(balance, baseline, "water balance", str(params["distribution"]))


_STANDARD_NORMAL_NOTE = (
    "The value is a standard-normal deviate, so its z is the value itself (spi_z == spi, spei_z == spei): "
    "the columns stay for a uniform layout. Values are clipped to -5 and +5 (a probability beyond "
    "Phi(+-5), e.g. a zero total against a baseline without one); a clipped value carries the warning "
    "at_clip. A baseline of fewer than 30 seasons gives the warning short_baseline_fit (WMO-No. 1090 asks "
    "for 30 years: shorter fits inflate the tails). A baseline without a usable fit (fewer than three "
    "seasons with data, no spread) leaves the value null with the warning no_fit."
)

register(
    Indicator(
        name="spi",
        unit="1",
        definition="Standardized Precipitation Index: the season's precipitation total as a standard-normal "
        "deviate of a gamma distribution (with the probability of zero) fitted to the baseline seasons.",
        source="McKee, Doesken & Kleist 1993; WMO SPI User Guide, WMO-No. 1090, 2012; gamma fit by maximum "
        "likelihood from Thom's approximation (Edwards & McKee 1997)",
        family="drought",
        compute=spi,
        variables=("prcp",),
        reduction="standardized",
        standardized=True,
        uses_baseline=True,
        bounds=(-INDEX_LIMIT, INDEX_LIMIT),
        details="The gamma is fitted by maximum likelihood to the baseline's positive totals (Thom's "
        "approximation, then Newton steps); q is the baseline's share of zero totals and H(x) = q + (1 - q) G(x). "
        "A season with no precipitation gets the published SPI = Phi^-1(q), which is near normal or positive "
        "when more than half of the baseline seasons were dry; it carries the warning zero_rain_spi. "
        + _STANDARD_NORMAL_NOTE,
    )
)
register(
    Indicator(
        name="spei",
        unit="1",
        definition="Standardized Precipitation-Evapotranspiration Index: the season's climatic water balance "
        "(precipitation minus Hargreaves reference evapotranspiration) as a standard-normal deviate of a "
        "distribution fitted to the baseline seasons by L-moments: by default the generalized logistic, which is "
        "the three-parameter log-logistic where the baseline's L-skewness is positive (parameter distribution).",
        source="Vicente-Serrano, Begueria & Lopez-Moreno 2010, J. Climate 23:1696, with the unbiased PWMs of "
        "Begueria et al. 2014, Int. J. Climatol. 34:3001; "
        "PET by Hargreaves, FAO-56 (Allen et al. 1998) eq. 52 with Ra from eq. 21",
        family="drought",
        compute=spei,
        variables=("prcp", "tmax", "tmin"),
        reduction="standardized",
        standardized=True,
        uses_baseline=True,
        bounds=(-INDEX_LIMIT, INDEX_LIMIT),
        parameters={
            "distribution": Parameter(
                "generalized_logistic",
                "",
                "the distribution fitted by L-moments (unbiased PWMs) to the baseline's water balance: "
                "'generalized_logistic' (default; Hosking & Wallis 1997) equals the three-parameter log-logistic "
                "of Vicente-Serrano et al. 2010 where the baseline's L-skewness is positive and extends it where "
                "it is not (then bounded above: warning spei_upper_bound); 'log_logistic' fits only where the "
                "L-skewness is positive and leaves the value null elsewhere (warning no_fit)",
                choices=SPEI_DISTRIBUTIONS,
            )
        },
        details="PET by Hargreaves (FAO-56 eq. 52) from daily tmax, tmin and extraterrestrial radiation at the "
        "community's latitude; D = sum over the season's days of P - PET. " + _STANDARD_NORMAL_NOTE,
    )
)
