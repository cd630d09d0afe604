"""The shapes every indicator works on, and the catalog (registry) of indicators.

An indicator is a pure function of a :class:`SeasonCube` (daily values of many communities cut into
season-years) and a :class:`Baseline` (which season-years form each season's normal), returning one value
per (feature, season-year). Nothing here knows about HTTP, stores or geometry.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import cached_property
from typing import Literal

import numpy as np

from service.errors import UnknownIndicatorError

Family = Literal["precipitation", "temperature", "drought", "count"]


@dataclass(frozen=True)
class DailySeries:
    """Daily community series, (feature, time) float64 arrays with NaN where missing.

    ``year``, ``month`` and ``day`` are the calendar date of each time step in the store's calendar;
    ``dayofyear`` is 1-based (1..360, 1..365 or 1..366 depending on calendar and year).
    """

    tmax: np.ndarray  # degC
    tmin: np.ndarray  # degC
    prcp: np.ndarray  # mm/day
    year: np.ndarray  # (time,) int
    month: np.ndarray  # (time,) int
    day: np.ndarray  # (time,) int
    dayofyear: np.ndarray  # (time,) int
    calendar: str
    latitude: np.ndarray  # (feature,) degrees north, for radiation-based PET

    @cached_property
    def tmean(self) -> np.ndarray:
        """Daily mean temperature (degC) as the mean of tmax and tmin (computed once)."""
        return (self.tmax + self.tmin) / 2.0


@dataclass(frozen=True)
class SeasonCube:
    """Daily values cut into season-years: (feature, season_year, day_in_season), NaN-padded.

    ``in_season[y, d]`` is False where season-year ``y`` has fewer days than the cube's width (padding);
    ``dayofyear[y, d]`` is the calendar day (1-based) of that day, 0 on padding; ``time_index[y, d]`` is the
    position of that day in the :class:`DailySeries` (-1 on padding), so an indicator can reach the full
    daily record (e.g. for calendar-day percentile thresholds over whole baseline years).
    """

    years: (
        np.ndarray
    )  # (year,) int season-year labels (a season crossing the new year takes the year it ends)
    tmax: np.ndarray  # (feature, year, day) degC
    tmin: np.ndarray  # (feature, year, day) degC
    prcp: np.ndarray  # (feature, year, day) mm/day
    in_season: np.ndarray  # (year, day) bool
    dayofyear: np.ndarray  # (year, day) int
    time_index: np.ndarray  # (year, day) int
    daily: DailySeries
    feature_index: np.ndarray  # (feature,) rows of daily that this cube holds (features share a season)

    @cached_property
    def tmean(self) -> np.ndarray:
        """Daily mean temperature (degC), (feature, year, day), computed once per cube."""
        return (self.tmax + self.tmin) / 2.0

    @property
    def latitude(self) -> np.ndarray:
        """Latitude (degrees north) of each feature of the cube."""
        return self.daily.latitude[self.feature_index]


@dataclass(frozen=True)
class Baseline:
    """Which season-years form the normal of each season-year of a cube.

    ``members[t, s]`` is True when season-year ``s`` belongs to the baseline of season-year ``t``; for a
    fixed baseline every row is the same. ``fixed`` tells indicators that may fit once instead of per year.
    """

    members: np.ndarray  # (year, year) bool
    fixed: bool
    label: str  # "1981-1990" or "trailing 10"


@dataclass(frozen=True)
class Parameter:
    """One parameter of an indicator: its default, unit, bounds and meaning."""

    default: float
    unit: str
    description: str
    minimum: float | None = None
    maximum: float | None = None


ComputeFn = Callable[[SeasonCube, Baseline, Mapping[str, float]], np.ndarray]


@dataclass(frozen=True)
class Indicator:
    """A catalog entry: what the indicator is, how to compute it, and how to read its classes."""

    name: str
    unit: str
    definition: str
    source: str
    family: Family
    compute: ComputeFn
    parameters: Mapping[str, Parameter] = field(default_factory=dict)
    # True when the value is already a standard-normal deviate (SPI, SPEI): its z is the value itself.
    standardized: bool = False
    # True for precipitation amounts, which also get a percent of normal.
    percent_of_normal: bool = False
    # True when the value depends on the baseline itself (percentile thresholds, fitted distributions).
    uses_baseline: bool = False

    def resolve(self, given: Mapping[str, object]) -> dict[str, float]:
        """The full parameter set: defaults updated by ``given``, each checked against its bounds."""
        unknown = sorted(set(given) - set(self.parameters))
        if unknown:
            allowed = sorted(self.parameters) or "none"
            raise UnknownIndicatorError(
                f"indicator {self.name!r} has no parameter {unknown[0]!r}; its parameters are: {allowed}",
                field=f"indicators.{self.name}.{unknown[0]}",
            )
        values: dict[str, float] = {}
        for pname, spec in self.parameters.items():
            raw = given.get(pname, spec.default)
            if isinstance(raw, bool) or not isinstance(raw, int | float) or raw != raw:
                raise UnknownIndicatorError(
                    f"parameter {pname!r} of {self.name!r} must be a number ({spec.unit}), got {raw!r}",
                    field=f"indicators.{self.name}.{pname}",
                )
            value = float(raw)
            if (spec.minimum is not None and value < spec.minimum) or (
                spec.maximum is not None and value > spec.maximum
            ):
                raise UnknownIndicatorError(
                    f"parameter {pname!r} of {self.name!r} is {value!r} {spec.unit}; allowed "
                    f"{spec.minimum} to {spec.maximum}",
                    field=f"indicators.{self.name}.{pname}",
                )
            values[pname] = value
        return values


_REGISTRY: dict[str, Indicator] = {}


def register(indicator: Indicator) -> Indicator:
    """Add an indicator to the catalog (once per name)."""
    if indicator.name in _REGISTRY:
        raise RuntimeError(f"indicator {indicator.name!r} registered twice")
    _REGISTRY[indicator.name] = indicator
    return indicator


def get_indicator(name: str) -> Indicator:
    """The catalog entry for ``name``, or an error listing the names that exist."""
    try:
        return _REGISTRY[name]
    except KeyError:
        raise UnknownIndicatorError(
            f"unknown indicator {name!r}; known indicators: {', '.join(sorted(_REGISTRY))}",
            field="indicators",
        ) from None


def catalog() -> list[Indicator]:
    """Every registered indicator, sorted by name."""
    return [_REGISTRY[k] for k in sorted(_REGISTRY)]
