"""The invented demo world: a stochastic daily weather generator over an imaginary upland region.

The region ("Quennary Uplands", with all its communities) is made up. It is placed over open ocean in the
tropical Atlantic (14-15 N, 40-39 W) so that its coordinates imply no real place. The generator's inputs (terrain
seed and shape, climate parameters, planted episodes, the community layout) are in ``demo_store/*.json``; the
generated store is built into the data directory on first use, never committed.

What the generator does, per day and cell (standard calendar, 1975-2022):

- precipitation occurrence: a first-order two-state Markov chain whose transition probabilities
  P(wet | dry yesterday) and P(wet | wet yesterday) follow a seasonal cycle with one rainy season;
- wet-day amounts: 0.1 mm plus a gamma variate with a seasonal mean and a gain with elevation (orographic),
  so that every wet day stays wet at the store's 0.1 mm precision;
- both are spatially correlated through a Gaussian copula: the uniform variates come from smooth random
  fields (a regional and a local lattice, bilinearly interpolated, plus a little cell noise), so each cell's
  marginal statistics are exactly those asked for while neighbouring cells rain together;
- temperature: daily mean and diurnal range from seasonal harmonics plus AR(1) anomalies (spatially
  correlated), cooler mean and smaller range on wet days, a lapse rate over the terrain, a warming trend and a
  small year-to-year anomaly; tmax = mean + range / 2, tmin = mean - range / 2;
- planted multi-year episodes: a run of dry-hot rainy seasons in one part of the region and a run of wet-cool
  ones in another, fading out with distance from their centres;
- static layers: ``elevation`` (m) and ``population`` (persons per km2, concentrated in the towns); the cells of
  an invented lake have no weather data (NaN), like water in a gridded land product.

Random numbers come only from numpy's PCG64 generator with the seeds in ``demo_store/world.json``, and the
arithmetic avoids BLAS (whose summation order differs between machines), so a build is identical on every
machine with the same numpy: the test suite pins the tiny store's fingerprint.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator
from dataclasses import dataclass
from functools import cached_property, partial
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyproj
import xarray as xr
from scipy import special, stats

from service.errors import RequestError
from service.store import FILL_VALUE, SCALE_FACTOR, write_store

DEMO_INPUTS = Path(__file__).resolve().parent / "demo_store"
SIZES = ("tiny", "small", "large")
DAILY = ("tmax", "tmin", "prcp")
KM_PER_DEGREE = (
    111.32  # length of one degree of latitude (and of longitude at the equator), km; common practice
)


def load_world(inputs: Path = DEMO_INPUTS) -> dict[str, Any]:
    """The generator's inputs (region, seeds, terrain, climate, episodes) from demo_store/world.json."""
    return json.loads((inputs / "world.json").read_text(encoding="utf-8"))


def load_layout(inputs: Path = DEMO_INPUTS) -> list[dict[str, Any]]:
    """The community layout (centres, sizes, shapes, names) from demo_store/communities.json."""
    return json.loads((inputs / "communities.json").read_text(encoding="utf-8"))["communities"]


# --- the grid and the terrain ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class DemoGrid:
    """The demo's latitude-longitude grid: north-up cell centres and their (u, v) positions in the region."""

    lon: np.ndarray  # (nx,) degrees east, west to east
    lat: np.ndarray  # (ny,) degrees north, north to south
    west: float
    south: float
    east: float
    north: float

    @property
    def shape(self) -> tuple[int, int]:
        """(ny, nx)."""
        return (self.lat.size, self.lon.size)

    @cached_property
    def uv(self) -> tuple[np.ndarray, np.ndarray]:
        """(ny, nx) positions of cell centres in the region: u west-east and v south-north, both 0..1."""
        u = (self.lon - self.west) / (self.east - self.west)
        v = (self.lat - self.south) / (self.north - self.south)
        return np.meshgrid(u, v, indexing="xy")

    def km_per_u(self) -> tuple[float, float]:
        """km per unit of u and of v at the region's mid-latitude."""
        mid = math.radians((self.south + self.north) / 2)
        return (
            (self.east - self.west) * KM_PER_DEGREE * math.cos(mid),
            (self.north - self.south) * KM_PER_DEGREE,
        )


def demo_grid(world: dict[str, Any], size: str) -> DemoGrid:
    """The grid of one demo size: the whole region in size-many cells along each axis."""
    if size not in SIZES:
        raise RequestError(f"demo size {size!r} is not one of {list(SIZES)!r}", field="size")
    region = world["region"]
    n = int(world["sizes"][size]["cells"])
    west, east, south, north = region["west"], region["east"], region["south"], region["north"]
    dx, dy = (east - west) / n, (north - south) / n
    lon = west + dx * (np.arange(n) + 0.5)
    lat = north - dy * (np.arange(n) + 0.5)
    return DemoGrid(lon=lon, lat=lat, west=west, south=south, east=east, north=north)


def _distance_to_segment(u: np.ndarray, v: np.ndarray, a: list[float], b: list[float]) -> np.ndarray:
    """Distance (in u, v units) from points to the segment a-b."""
    ax, ay = a
    bx, by = b
    dx, dy = bx - ax, by - ay
    t = np.clip(((u - ax) * dx + (v - ay) * dy) / (dx * dx + dy * dy), 0.0, 1.0)
    return np.hypot(u - (ax + t * dx), v - (ay + t * dy))


def elevation(world: dict[str, Any], u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Invented terrain (m) at region positions (u, v): a plateau, a ridge, a valley, a basin, seeded roughness.

    A smooth function of position, so every demo size samples the same landscape.
    """
    terrain = world["terrain"]
    z = np.full(np.shape(u), float(terrain["plateau_m"]))
    ridge = terrain["ridge"]
    z += ridge["height_m"] * np.exp(
        -0.5 * (_distance_to_segment(u, v, ridge["from"], ridge["to"]) / ridge["width"]) ** 2
    )
    valley = terrain["valley"]
    z -= valley["depth_m"] * np.exp(
        -0.5 * (_distance_to_segment(u, v, valley["from"], valley["to"]) / valley["width"]) ** 2
    )
    basin = terrain["basin"]
    cu, cv = basin["centre"]
    z -= basin["depth_m"] * np.exp(-0.5 * ((u - cu) ** 2 + (v - cv) ** 2) / basin["width"] ** 2)
    rough = terrain["roughness"]
    rng = np.random.default_rng(int(world["seeds"]["terrain"]))
    kmax = int(rough["max_wavenumber"])
    for _ in range(int(rough["modes"])):
        kx, ky = rng.integers(1, kmax + 1, size=2)
        phase_x, phase_y = rng.uniform(0, 2 * np.pi, size=2)
        amplitude = (
            float(rough["amplitude_m"]) * float(rng.uniform(0.4, 1.0)) / math.sqrt(kx * kx + ky * ky) * 2
        )
        z += amplitude * np.sin(2 * np.pi * kx * u + phase_x) * np.cos(2 * np.pi * ky * v + phase_y)
    return np.maximum(z, float(terrain["minimum_m"]))


def lake_mask(world: dict[str, Any], u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """True on the cells of the invented lake (no weather data there)."""
    lake = world["lake"]
    cu, cv = lake["centre"]
    ru, rv = lake["radii"]
    return ((u - cu) / ru) ** 2 + ((v - cv) / rv) ** 2 <= 1.0


# --- the climate that the generator is asked for ---------------------------------------------------------------


def rainy_weight(world: dict[str, Any], dayofyear: np.ndarray) -> np.ndarray:
    """0 (dry season) .. 1 (peak of the rainy season) for each day of the year (1-based)."""
    precip = world["precipitation"]
    angle = 2 * np.pi * (np.asarray(dayofyear, dtype=np.float64) - precip["rainy_peak_day"]) / 365.25
    return ((1.0 + np.cos(angle)) / 2.0) ** float(precip["season_sharpness"])


def _seasonal(pair: dict[str, float], weight: np.ndarray) -> np.ndarray:
    """Blend a dry-season and a rainy-season value by the rainy-season weight."""
    return pair["dry_season"] + (pair["rainy_season"] - pair["dry_season"]) * weight


def transition_probabilities(world: dict[str, Any], dayofyear: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(P(wet | dry yesterday), P(wet | wet yesterday)) asked for on each day of the year, outside episodes."""
    weight = rainy_weight(world, dayofyear)
    precip = world["precipitation"]
    return _seasonal(precip["p_wet_after_dry"], weight), _seasonal(precip["p_wet_after_wet"], weight)


def expected_wet_day_frequency(world: dict[str, Any], dayofyear: np.ndarray) -> np.ndarray:
    """The Markov chain's stationary share of wet days, p01 / (1 - p11 + p01), on each day of the year."""
    p01, p11 = transition_probabilities(world, dayofyear)
    return p01 / (1.0 - p11 + p01)


def orographic_gain(world: dict[str, Any], elevation_m: np.ndarray) -> np.ndarray:
    """Factor on the mean wet-day amount from elevation (wetter uplands), kept within 0.6..1.6."""
    precip = world["precipitation"]
    gain = (
        1.0
        + precip["orographic_gain_per_km"]
        * (np.asarray(elevation_m) - precip["orographic_reference_m"])
        / 1000
    )
    return np.clip(gain, 0.6, 1.6)


def expected_wet_amount(world: dict[str, Any], dayofyear: np.ndarray, elevation_m: float) -> np.ndarray:
    """Mean amount (mm) of a wet day asked for, outside episodes: 0.1 mm + gamma mean x orographic gain."""
    precip = world["precipitation"]
    gamma_mean = _seasonal(precip["mean_wet_amount_mm"], rainy_weight(world, dayofyear))
    return precip["minimum_wet_amount_mm"] + gamma_mean * float(
        orographic_gain(world, np.asarray(elevation_m))
    )


def climatological_mean_temperature(
    world: dict[str, Any], dayofyear: np.ndarray, elevation_m: np.ndarray | float
) -> np.ndarray:
    """Daily mean temperature (degC) of the harmonics and lapse rate, before trend, anomalies and wet-day shift."""
    temp = world["temperature"]
    doy = np.asarray(dayofyear, dtype=np.float64)
    value = temp["sea_level_mean_degC"] - temp["lapse_rate_degC_per_km"] * np.asarray(elevation_m) / 1000.0
    for k, harmonic in enumerate(temp["harmonics"], start=1):
        value = value + harmonic["amplitude"] * np.cos(2 * np.pi * k * (doy - harmonic["peak_day"]) / 365.25)
    return value


def warming(world: dict[str, Any], year: np.ndarray | int) -> np.ndarray:
    """The warming trend (degC) relative to the first year."""
    first = world["years"][0]
    return (
        world["temperature"]["warming_degC_per_decade"] / 10.0 * (np.asarray(year, dtype=np.float64) - first)
    )


def episode_weight(episode: dict[str, Any], u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """0..1 strength of a planted episode at region positions, 1 at its centre (Gaussian fall-off)."""
    cu, cv = episode["centre"]
    return np.exp(-0.5 * ((u - cu) ** 2 + (v - cv) ** 2) / (episode["radius"] / 2.0) ** 2)


# --- spatially correlated random fields ------------------------------------------------------------------------


@dataclass(frozen=True)
class _Lattice:
    """Bilinear interpolation from a coarse lattice of white noise to the grid, normalised to unit variance."""

    j0: np.ndarray  # (ny,) lattice row above each grid row
    i0: np.ndarray  # (nx,)
    wy: np.ndarray  # (ny,) weight of row j0 + 1
    wx: np.ndarray  # (nx,)
    shape: tuple[int, int]  # lattice (rows, cols)
    norm: np.ndarray  # (ny, nx) 1 / standard deviation of the interpolated noise

    @classmethod
    def over(cls, grid: DemoGrid, spacing_degrees: float) -> _Lattice:
        """A lattice of the given spacing (degrees) covering the region with one node beyond each edge."""
        rows = int(math.ceil((grid.north - grid.south) / spacing_degrees)) + 3
        cols = int(math.ceil((grid.east - grid.west) / spacing_degrees)) + 3
        fy = (grid.north - grid.lat) / spacing_degrees + 1.0
        fx = (grid.lon - grid.west) / spacing_degrees + 1.0
        j0, i0 = np.floor(fy).astype(int), np.floor(fx).astype(int)
        wy, wx = fy - j0, fx - i0
        # variance of a bilinear mix of four independent unit normals
        vy = (1 - wy) ** 2 + wy**2
        vx = (1 - wx) ** 2 + wx**2
        norm = 1.0 / np.sqrt(vy[:, None] * vx[None, :])
        return cls(j0=j0, i0=i0, wy=wy, wx=wx, shape=(rows, cols), norm=norm)

    def fields(self, rng: np.random.Generator, days: int) -> np.ndarray:
        """(days, ny, nx) float32 unit-variance Gaussian fields, smooth over about one lattice spacing.

        Plain gathers and element-wise arithmetic (no BLAS), so the result is bit-identical on every machine.
        """
        noise = rng.standard_normal((days, *self.shape), dtype=np.float32)
        wy = self.wy.astype(np.float32)[None, :, None]
        rows = np.take(noise, self.j0, axis=1) * (1 - wy) + np.take(noise, self.j0 + 1, axis=1) * wy
        out = np.take(rows, self.i0, axis=2)
        out *= (1 - self.wx.astype(np.float32))[None, None, :]
        right = np.take(rows, self.i0 + 1, axis=2)
        right *= self.wx.astype(np.float32)[None, None, :]
        out += right
        out *= self.norm.astype(np.float32)[None]
        return out


class _FieldMaker:
    """Mixes regional, local and cell noise into unit-variance fields with the requested weights."""

    def __init__(self, grid: DemoGrid, rng: np.random.Generator) -> None:
        self.rng = rng
        self.grid = grid
        self.regional = _Lattice.over(grid, 0.25)  # about 28 km
        self.local = _Lattice.over(grid, 0.05)  # about 5.5 km

    def make(self, days: int, weights: dict[str, float]) -> np.ndarray:
        """(days, ny, nx) float32 standard normal fields; weights are normalised so the variance is one."""
        w_regional = float(weights.get("regional", 0.0))
        w_local = float(weights.get("local", 0.0))
        w_cell = float(weights.get("cell", 0.0))
        total = math.sqrt(w_regional**2 + w_local**2 + w_cell**2)
        out = self.regional.fields(self.rng, days)
        out *= np.float32(w_regional / total)
        local = self.local.fields(self.rng, days)
        local *= np.float32(w_local / total)
        out += local
        if w_cell:
            cell = self.rng.standard_normal((days, *self.grid.shape), dtype=np.float32)
            cell *= np.float32(w_cell / total)
            out += cell
        return out


# --- the generator --------------------------------------------------------------------------------------------


class _GammaQuantiles:
    """Standard-normal z -> unit-scale gamma quantile of one shape, by linear interpolation in a fine table.

    The table holds scipy.stats.gamma.ppf at z steps of 0.0005 over -8..8 (a uniform step, so the lookup is
    arithmetic rather than a search); the copula's wet-day amounts need millions of quantiles per year.
    """

    def __init__(self, shape: float, low: float = -8.0, high: float = 8.0, step: float = 0.0005) -> None:
        self.low, self.step = low, step
        z = low + step * np.arange(int(round((high - low) / step)) + 1)
        self.table = stats.gamma.ppf(special.ndtr(z), shape)
        self.table[0] = 0.0

    def __call__(self, z: np.ndarray) -> np.ndarray:
        """Gamma quantiles (unit scale) of standard-normal values (clipped to the table's range)."""
        position = np.clip((z - self.low) / self.step, 0.0, self.table.size - 1.000001)
        index = position.astype(np.intp)
        fraction = position - index
        return self.table[index] * (1.0 - fraction) + self.table[index + 1] * fraction


def _encode(values: np.ndarray) -> np.ndarray:
    """float values to the store's int16 at 0.1 units (NaN -> fill)."""
    scaled = np.round(values / SCALE_FACTOR)
    scaled[np.isnan(values)] = FILL_VALUE
    return scaled.astype(np.int16)


def _asked(
    days: slice,
    *,
    rainy: np.ndarray,
    occurrence_year: float,
    amount_year: float,
    base_shift: float,
    active: list[tuple[dict[str, Any], np.ndarray, np.ndarray]],
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Occurrence and amount factors and the temperature shift (degC) asked for on some days of a year, (d, 1, 1)
    or, inside a planted episode, (d, ny, nx); ``active`` holds (episode, weight, (day, 1, 1) months on)."""
    r = rainy[days]
    occ_factor: np.ndarray = occurrence_year * r + (1 - r)
    amt_factor: np.ndarray = amount_year * r + (1 - r)
    shift: np.ndarray = np.full((r.shape[0], 1, 1), base_shift)
    for episode, weight, months_on in active:
        on = months_on[days]
        occ_factor = occ_factor * np.where(on, 1 + (episode["occurrence_factor"] - 1) * weight, 1.0)
        amt_factor = amt_factor * np.where(on, 1 + (episode["amount_factor"] - 1) * weight, 1.0)
        shift = shift + np.where(on, episode["temperature_shift_degC"] * weight, 0.0)
    return occ_factor, amt_factor, shift


def _day_slices(days: int, step: int = 32) -> list[slice]:
    """Slices of ``step`` days covering a year (the generator's element-wise steps run on these)."""
    return [slice(start, min(days, start + step)) for start in range(0, days, step)]


def _ar1(noise: np.ndarray, phi: float, sd: float, previous: np.ndarray) -> np.ndarray:
    """AR(1) anomalies a[t] = phi a[t-1] + sqrt(1 - phi^2) sd e[t] along axis 0, continuing from ``previous``."""
    from scipy.signal import lfilter

    gain = math.sqrt(1.0 - phi * phi) * sd
    out, _ = lfilter([gain], [1.0, -phi], noise, axis=0, zi=(phi * previous)[None])
    return out


def generate(world: dict[str, Any], grid: DemoGrid, progress: bool = False) -> dict[str, np.ndarray]:
    """Run the weather generator: {"tmax", "tmin", "prcp": (ny, nx, time) int16 at 0.1 units, "time", layers}.

    Holds the whole store in memory (6.7 GB for the large size): building a store streams the years instead
    (:func:`stage_demo`); this is for tests and small sizes.
    """
    ny, nx = grid.shape
    first, last = world["years"]
    time = pd.date_range(f"{first}-01-01", f"{last}-12-31", freq="D")
    out = {name: np.empty((ny, nx, time.size), dtype=np.int16) for name in DAILY}
    start = 0
    for year in generate_years(world, grid, progress=progress):
        stop = start + year["tmax"].shape[0]
        for name in DAILY:
            out[name][:, :, start:stop] = year[name].transpose(1, 2, 0)
        start = stop
    u, v = grid.uv
    return {
        **out,
        "time": time.values,
        "elevation": np.round(elevation(world, u, v), 1),
        "water": lake_mask(world, u, v),
    }


def generate_years(
    world: dict[str, Any], grid: DemoGrid, progress: bool = False
) -> Iterator[dict[str, np.ndarray]]:
    """Run the weather generator a year at a time: {"tmax", "tmin", "prcp": (day, ny, nx) int16 at 0.1 units}.

    The random stream and the carried state (yesterday's wet cells, the AR(1) anomalies) run on from year to
    year, so the years together are exactly :func:`generate`'s values; only one year's arrays live at a time.
    """
    ny, nx = grid.shape
    u, v = grid.uv
    elev = elevation(world, u, v)
    water = lake_mask(world, u, v)
    first, last = world["years"]

    precip = world["precipitation"]
    temp = world["temperature"]
    rng = np.random.default_rng(int(world["seeds"]["weather"]))
    fields = _FieldMaker(grid, rng)
    quantiles = _GammaQuantiles(float(precip["gamma_shape"]))
    gain = orographic_gain(world, elev)
    lapse = temp["lapse_rate_degC_per_km"] * elev / 1000.0
    episodes = [(e, episode_weight(e, u, v)) for e in world["episodes"]]
    mean_ar, range_ar = temp["mean_anomaly"], temp["range_anomaly"]
    sd_occ, sd_amt = precip["year_to_year_sd"]["occurrence"], precip["year_to_year_sd"]["amount"]

    wet = np.zeros((ny, nx), dtype=bool)
    mean_anomaly = rng.standard_normal((ny, nx)) * mean_ar["sd"]
    range_anomaly = rng.standard_normal((ny, nx)) * range_ar["sd"]
    bar = None
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=last - first + 1, desc="generating weather", unit="year")
    for year in range(first, last + 1):
        days = pd.date_range(f"{year}-01-01", f"{year}-12-31", freq="D")
        nd = days.size
        doy = np.asarray(days.day_of_year)
        months = np.asarray(days.month)
        # year-to-year variation of the rainy season (lognormal factors with mean one) and of temperature
        year_z = rng.standard_normal(3)
        occurrence_year = math.exp(sd_occ * year_z[0] - sd_occ**2 / 2)
        amount_year = math.exp(sd_amt * (0.6 * year_z[0] + 0.8 * year_z[1]) - sd_amt**2 / 2)
        temperature_year = temp["year_to_year_sd_degC"] * (0.8 * year_z[2] - 0.6 * year_z[0])
        occurrence_z = fields.make(nd, precip["field_weights"])
        amount_z = fields.make(nd, precip["field_weights"])
        mean_noise = fields.make(nd, temp["field_weights"])
        range_noise = fields.make(nd, temp["field_weights"])

        # what is asked for on each day (and, inside a planted episode, each cell) of this year; evaluated a few
        # days at a time (element-wise, so the values are those of the whole year at once) to bound memory
        rainy = rainy_weight(world, doy)[:, None, None]
        p01_day, p11_day = transition_probabilities(world, doy)
        active = [(e, w, np.isin(months, e["months"])[:, None, None]) for e, w in episodes
                  if e["years"][0] <= year <= e["years"][1]]  # fmt: skip
        base_shift = temperature_year + float(warming(world, year))

        factors = partial(_asked, rainy=rainy, occurrence_year=occurrence_year, amount_year=amount_year,
                          base_shift=base_shift, active=active)  # fmt: skip

        # occurrence: the Markov chain, day by day (the copula's uniform variate is Phi(occurrence_z))
        wet_year = np.empty((nd, ny, nx), dtype=bool)
        for d in range(nd):
            occ_factor = factors(slice(d, d + 1))[0]
            after_dry = special.ndtri(np.clip(p01_day[d : d + 1, None, None] * occ_factor, 0, 0.97))[0]
            after_wet = special.ndtri(np.clip(p11_day[d : d + 1, None, None] * occ_factor, 0, 0.97))[0]
            wet = occurrence_z[d] < np.where(wet, after_wet, after_dry)
            wet_year[d] = wet
        del occurrence_z

        prcp = np.empty((nd, ny, nx), dtype=np.int16)
        for days in _day_slices(nd):
            amt_factor = factors(days)[1]
            scale = (
                _seasonal(precip["mean_wet_amount_mm"], rainy[days])
                / precip["gamma_shape"]
                * amt_factor
                * gain[None]
            )
            prcp_days = quantiles(amount_z[days])
            prcp_days *= scale
            prcp_days += precip["minimum_wet_amount_mm"]
            prcp_days[~wet_year[days]] = 0.0
            prcp_days[:, water] = np.nan
            prcp[days] = _encode(prcp_days)
        del amount_z

        mean_anomalies = _ar1(mean_noise, mean_ar["ar1"], mean_ar["sd"], mean_anomaly)
        del mean_noise
        range_anomalies = _ar1(range_noise, range_ar["ar1"], range_ar["sd"], range_anomaly)
        del range_noise
        mean_anomaly, range_anomaly = mean_anomalies[-1].copy(), range_anomalies[-1].copy()
        climate = climatological_mean_temperature(world, doy, 0.0)[:, None, None]
        range_asked = _seasonal(temp["range_degC"], rainy)
        tmax = np.empty((nd, ny, nx), dtype=np.int16)
        tmin = np.empty((nd, ny, nx), dtype=np.int16)
        for days in _day_slices(nd):
            tmean_days = mean_anomalies[days]  # a view: the anomalies become the temperatures in place
            tmean_days += climate[days] + factors(days)[2]
            tmean_days -= lapse[None]
            tmean_days += temp["wet_day_mean_shift_degC"] * wet_year[days]
            trange_days = range_anomalies[days]
            trange_days += range_asked[days]
            trange_days += temp["wet_day_range_shift_degC"] * wet_year[days]
            np.maximum(trange_days, temp["minimum_range_degC"], out=trange_days)
            trange_days *= 0.5
            tmean_days[:, water] = np.nan
            # tmax and tmin rounded from the same mean and range, so tmin < tmax holds after rounding
            tmax[days] = _encode(tmean_days + trange_days)
            tmin[days] = np.minimum(_encode(tmean_days - trange_days), tmax[days] - 1)
        del mean_anomalies, range_anomalies, wet_year
        tmin[tmax == FILL_VALUE] = FILL_VALUE
        if bar is not None:
            bar.update(1)
        yield {"tmax": tmax, "tmin": tmin, "prcp": prcp}
        del tmax, tmin, prcp
    if bar is not None:
        bar.close()


# --- communities --------------------------------------------------------------------------------------------


def _ring(centre_lon: float, centre_lat: float, radius_km: float, lobes: int, rng: np.random.Generator,
          clockwise: bool = False, vertices: int = 36) -> list[list[float]]:  # fmt: skip
    """A closed ring of lon/lat points around a centre: a circle with a few smooth lobes (star-shaped, simple)."""
    angles = np.linspace(0.0, 2 * np.pi, vertices, endpoint=False)
    radius = np.full(vertices, radius_km)
    if lobes:
        radius = radius * (1 + 0.22 * np.sin(lobes * angles + rng.uniform(0, 2 * np.pi)))
        radius = radius * (1 + 0.08 * np.sin((lobes + 2) * angles + rng.uniform(0, 2 * np.pi)))
    km_lon = KM_PER_DEGREE * math.cos(math.radians(centre_lat))
    lon = centre_lon + radius * np.cos(angles) / km_lon
    lat = centre_lat + radius * np.sin(angles) / KM_PER_DEGREE
    points = [[round(float(a), 6), round(float(b), 6)] for a, b in zip(lon, lat, strict=True)]
    if clockwise:
        points = points[::-1]
    return points + [points[0]]


def community_features(world: dict[str, Any], layout: list[dict[str, Any]]) -> dict[str, Any]:
    """The invented communities as an RFC 7946 FeatureCollection (exteriors counter-clockwise, holes clockwise)."""
    region = world["region"]
    width, height = region["east"] - region["west"], region["north"] - region["south"]
    features = []
    for spec in layout:
        lon = region["west"] + spec["centre"][0] * width
        lat = region["south"] + spec["centre"][1] * height
        rng = np.random.default_rng(int(spec["seed"]))
        properties: dict[str, Any] = {"name": spec["name"], "kind": spec["kind"]}
        shape = spec["shape"]
        if shape == "point":
            geometry: dict[str, Any] = {"type": "Point", "coordinates": [round(lon, 6), round(lat, 6)]}
            properties["buffer_m"] = spec["buffer_m"]
        else:
            exterior = _ring(lon, lat, spec["radius_km"], spec["lobes"], rng)
            polygon = [exterior]
            if shape == "polygon_with_hole":
                polygon.append(_ring(lon, lat, spec["hole_radius_km"], 0, rng, clockwise=True))
            if shape == "multipolygon":
                parts = [polygon]
                km_lon = KM_PER_DEGREE * math.cos(math.radians(lat))
                for exclave in spec["exclaves"]:
                    dx, dy = exclave["offset_km"]
                    parts.append(
                        [_ring(lon + dx / km_lon, lat + dy / KM_PER_DEGREE, exclave["radius_km"], 2, rng)]
                    )
                geometry = {"type": "MultiPolygon", "coordinates": parts}
            else:
                geometry = {"type": "Polygon", "coordinates": polygon}
        if spec.get("note"):
            properties["note"] = spec["note"]
        features.append({"type": "Feature", "id": spec["id"], "geometry": geometry, "properties": properties})
    return {
        "type": "FeatureCollection",
        "name": f"communities of the {region['name']} (invented)",
        "features": features,
    }


def population_density(world: dict[str, Any], grid: DemoGrid, layout: list[dict[str, Any]]) -> np.ndarray:
    """(ny, nx) persons per km2: a rural background plus a Gaussian crowd around each community's centre."""
    u, v = grid.uv
    km_u, km_v = grid.km_per_u()
    settings = world["population"]
    density = np.full(grid.shape, float(settings["rural_per_km2"]))
    people = {"village": 900.0, "town": 9_000.0, "municipality": 26_000.0}
    for spec in layout:
        spread = float(settings["town_spread_km"][spec["kind"]])
        cu, cv = spec["centre"]
        distance2 = ((u - cu) * km_u) ** 2 + ((v - cv) * km_v) ** 2
        crowd = people[spec["kind"]] * (0.6 + 0.8 * (int(spec["seed"]) % 1000) / 1000.0)
        density += crowd / (2 * np.pi * spread**2) * np.exp(-0.5 * distance2 / spread**2)
    return np.round(density, 1)


# --- building -------------------------------------------------------------------------------------------------


def demo_dataset(size: str = "small", progress: bool = False, inputs: Path = DEMO_INPUTS) -> xr.Dataset:
    """The demo world as a Dataset ready for write_store (float32 values decoded lazily from the generated int16).

    The whole store is generated in memory first (about 7 GB for the large size); :func:`build_demo` streams.
    """
    import dask.array as da

    world = load_world(inputs)
    grid = demo_grid(world, size)
    generated = generate(world, grid, progress=progress)
    daily = {name: da.from_array(generated[name], chunks=(32, 32, -1)).map_blocks(_decode_block, dtype=np.float32)
             for name in DAILY}  # fmt: skip
    return _dataset(world, load_layout(inputs), grid, size, daily, generated["time"])


def stage_demo(size: str, directory: Path, progress: bool = False, inputs: Path = DEMO_INPUTS) -> xr.Dataset:
    """The demo world as :func:`demo_dataset` gives it, generated a year at a time and staged in ``directory``
    (int16 tiles, about a third of the store's raw size on disk), so that memory holds one year, not the store.

    The values are exactly :func:`demo_dataset`'s: the same generator, the same int16, the same float32 decoding.
    The caller removes ``directory`` once the store is written.
    """
    from service.ingest.blocks import StagedGrid

    world = load_world(inputs)
    grid = demo_grid(world, size)
    first, last = world["years"]
    time = pd.date_range(f"{first}-01-01", f"{last}-12-31", freq="D")
    stage = StagedGrid(directory, grid.shape)
    for year in generate_years(world, grid, progress=progress):
        for name in DAILY:
            stage.add(name, year[name])
        del year
    daily = {name: stage.array(name, np.float32) for name in DAILY}
    return _dataset(world, load_layout(inputs), grid, size, daily, time.values)


def _dataset(
    world: dict[str, Any],
    layout: list[dict[str, Any]],
    grid: DemoGrid,
    size: str,
    daily: dict[str, Any],
    time: np.ndarray,
) -> xr.Dataset:
    """The demo's Dataset for write_store from its lazy (y, x, time) float32 daily values: layers, CRS, attrs."""
    u, v = grid.uv
    data_vars: dict[str, Any] = {
        name: (("y", "x", "time"), values, {"grid_mapping": "crs"}) for name, values in daily.items()
    }
    data_vars["elevation"] = (
        ("y", "x"),
        np.round(elevation(world, u, v), 1),
        {"units": "m", "long_name": "surface elevation"},
    )
    data_vars["population"] = (
        ("y", "x"),
        population_density(world, grid, layout),
        {"units": "km-2", "long_name": "population density (persons per km2, invented)"},
    )
    data_vars["crs"] = ((), np.int32(0), {"crs_wkt": pyproj.CRS.from_epsg(4326).to_wkt()})
    ds = xr.Dataset(data_vars, coords={"time": time, "y": grid.lat, "x": grid.lon})
    ds.attrs.update(
        {
            "title": f"{world['region']['name']}: invented demo weather ({size})",
            "source": "wxshock demo weather generator (service/demo.py); invented, not observations",
            "wxshock_demo_size": size,
        }
    )
    return ds


def _decode_block(block: np.ndarray) -> np.ndarray:
    """int16 at 0.1 units to float32 values (fill -> NaN); re-encoding gives back the same integers."""
    values = block.astype(np.float32) * np.float32(SCALE_FACTOR)
    values[block == FILL_VALUE] = np.nan
    return values


def build_demo(path: Path, size: str = "small", progress: bool = True, *, stream: bool = True) -> Path:
    """Build the demo store at ``path`` and ``communities.geojson`` beside it; returns ``path``.

    With ``stream`` (the default) the years are generated one at a time and staged on disk beside ``path``
    (removed afterwards), so memory stays bounded (well under 2 GB for the large size, bench/RESULTS.md);
    without it the whole store is generated in memory first. Both give the same store (same fingerprint).
    """
    import tempfile

    path = Path(path)
    world, layout = load_world(), load_layout()
    if stream:
        path.parent.mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryDirectory(prefix=f".{path.name}.staging-", dir=path.parent) as staging:
            write_store(stage_demo(size, Path(staging), progress=progress), path, progress=progress)
    else:
        write_store(demo_dataset(size, progress=progress), path, progress=progress)
    features = community_features(world, layout)
    target = path.parent / "communities.geojson"
    partial = target.with_name(f".{target.name}.writing")
    partial.write_text(json.dumps(features, indent=1) + "\n", encoding="utf-8")
    partial.replace(target)
    return path


def ensure_demo(data_dir: Path, size: str) -> Path:
    """``data_dir / "demo.zarr"``, built on first use (with a progress bar); the dataset is named "demo"."""
    path = Path(data_dir) / "demo.zarr"
    if not (path / "zarr.json").is_file() or not (path.parent / "communities.geojson").is_file():
        build_demo(path, size=size, progress=True)
    return path
