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
# The daily variables an indicator may read, in wxshock units (degC, degC, mm/day).
VARIABLES = ("tmax", "tmin", "prcp")
# How an indicator reduces the season's days, which decides what a partial season does to it (see
# service/indicators/seasons.py): "sum" and "count" follow the request's partial_seasons policy; "mean",
# "extreme" (maximum or minimum), "run" (longest run) and "share" (percent of days) use the days present;
# "standardized" indices (SPI, SPEI) apply the policy to the season totals they standardize.
Reduction = Literal["sum", "count", "mean", "extreme", "run", "share", "standardized"]
SCALED_REDUCTIONS = ("sum", "count")
# Daily means are snapped to this many decimal places below the storage step (see snap_daily).
SNAP_EXTRA_DECIMALS = 3


def snap_decimals(scale_factor: float, add_offset: float = 0.0) -> int:
    """Decimal places that daily values are snapped to: those of the storage step and offset, plus 3.

    A store of 0.1-unit integers gives 4 (1e-4 degC or mm/day): far below the storage step, far above the
    1e-15 noise of a weighted sum. A value exact in storage units (25.0, 1.0, 0.0) is then exact after
    snapping, so thresholds compare it as stored.

    >>> snap_decimals(0.1), snap_decimals(0.01), snap_decimals(1.0), snap_decimals(0.1, 0.05)
    (4, 5, 3, 5)
    """
    places = 0
    for number in (scale_factor, add_offset):
        text = f"{abs(float(number)):.12f}".rstrip("0")
        places = max(places, len(text.split(".")[1]) if "." in text else 0)
    return min(places + SNAP_EXTRA_DECIMALS, 12)


# Arrays at least this large are snapped by one compiled pass (a batch's daily means, 140 MB a variable); smaller
# ones by numpy, without loading the compiled code for them.
SNAP_COMPILED_SIZE = 1 << 20


def snap_daily(values: np.ndarray, decimals: int) -> np.ndarray:
    """Daily values (any shape, float64) rounded to ``decimals`` places, in place; NaN stays NaN.

    Computed as rint(x * 10**d) / 10**d: the division of two whole numbers is correctly rounded, so a value
    such as 24.999999999999996 becomes exactly the double nearest 25.0, the same double as the literal a
    threshold is written with. Apply it wherever a DailySeries is built from aggregated means.

    >>> snap_daily(np.array([24.999999999999996, 1.0000000000000002, -0.0]), 4).tolist()
    [25.0, 1.0, -0.0]
    """
    factor = float(10**decimals)
    if values.size >= SNAP_COMPILED_SIZE and values.dtype == np.float64 and values.flags.c_contiguous:
        from service.indicators.compiled import snap_in_one_pass

        snap_in_one_pass(values, factor)  # the same steps, one pass over memory instead of three
        return values
    np.multiply(values, factor, out=values)
    np.rint(values, out=values)
    np.divide(values, factor, out=values)
    return values


@dataclass(frozen=True)
class DailySeries:
    """Daily community series, (feature, time) float64 arrays with NaN where missing.

    ``year``, ``month`` and ``day`` are the calendar date of each time step in the store's calendar;
    ``dayofyear`` is 1-based (1..360, 1..365 or 1..366 depending on calendar and year). A variable the
    dataset does not hold is None (a dataset of precipitation only has tmax and tmin None).
    """

    tmax: np.ndarray | None  # degC
    tmin: np.ndarray | None  # degC
    prcp: np.ndarray | None  # mm/day
    year: np.ndarray  # (time,) int
    month: np.ndarray  # (time,) int
    day: np.ndarray  # (time,) int
    dayofyear: np.ndarray  # (time,) int
    calendar: str
    latitude: np.ndarray  # (feature,) degrees north, for radiation-based PET

    @property
    def variables(self) -> tuple[str, ...]:
        """The variables present (not None), in the order of VARIABLES."""
        return tuple(v for v in VARIABLES if getattr(self, v) is not None)

    @property
    def n_features(self) -> int:
        """Number of features (rows)."""
        return int(self.latitude.shape[0])

    @cached_property
    def tmean(self) -> np.ndarray:
        """Daily mean temperature (degC) as the mean of tmax and tmin (computed once)."""
        if self.tmax is None or self.tmin is None:
            raise ValueError("tmean needs tmax and tmin, and this series lacks one of them")
        return (self.tmax + self.tmin) / 2.0


@dataclass(frozen=True)
class SeasonCube:
    """Daily values cut into season-years: (feature, season_year, day_in_season), NaN-padded.

    ``in_season[y, d]`` is False where season-year ``y`` has fewer days than the cube's width (padding);
    ``dayofyear[y, d]`` is the calendar day (1-based) of that day, 0 on padding; ``time_index[y, d]`` is the
    position of that day in the :class:`DailySeries` (-1 on padding), so an indicator can reach the full
    daily record (e.g. for calendar-day percentile thresholds over whole baseline years).

    The table hands each indicator a cube that holds only the variables the indicator declares (the others
    are None) and in which the seasons incomplete for those variables are blank (NaN).
    """

    years: (
        np.ndarray
    )  # (year,) int season-year labels (a season crossing the new year takes the year it ends)
    tmax: np.ndarray | None  # (feature, year, day) degC; None when not held (or not declared, see below)
    tmin: np.ndarray | None  # (feature, year, day) degC
    prcp: np.ndarray | None  # (feature, year, day) mm/day
    in_season: np.ndarray  # (year, day) bool
    dayofyear: np.ndarray  # (year, day) int
    time_index: np.ndarray  # (year, day) int
    daily: DailySeries
    feature_index: np.ndarray  # (feature,) rows of daily that this cube holds (features share a season)
    # Factor for season totals under the request's partial_seasons policy, (feature, year): expected days /
    # days present ("scale"), NaN on partial seasons ("null"), 1 ("as_is"); None means 1. Indicators of
    # reduction "standardized" multiply the totals they standardize by it; the table does it for the rest.
    total_factor: np.ndarray | None = None
    # per-cube results that several indicators share (days with values, season sums): see :meth:`memo`
    _memo: dict[object, np.ndarray] = field(default_factory=dict, init=False, repr=False, compare=False)

    def memo(self, key: object, make: Callable[[], np.ndarray]) -> np.ndarray:
        """``make()``, computed once per cube and ``key`` (a copy each time: callers may change it)."""
        if key not in self._memo:
            self._memo[key] = make()
        return self._memo[key].copy()

    def days_with(self, names: tuple[str, ...]) -> np.ndarray:
        """Days (int64, (feature, year)) on which every one of the variables ``names`` has a value here."""
        key = ("days", tuple(v for v in VARIABLES if v in names))
        if key not in self._memo:
            missing = None
            for name in key[1]:
                values = getattr(self, name)
                if values is None:
                    raise ValueError(f"this cube holds no {name!r}")
                missing = np.isnan(values) if missing is None else missing | np.isnan(values)
            if missing is None:
                raise ValueError("days_with needs at least one variable")
            self._memo[key] = np.count_nonzero(~missing, axis=-1).astype(np.int64)
        return self._memo[key]

    def seed_days(self, names: tuple[str, ...], days: np.ndarray) -> None:
        """Record :meth:`days_with` of ``names`` when the caller knows it already (the season cut does)."""
        self._memo[("days", tuple(v for v in VARIABLES if v in names))] = days

    @cached_property
    def tmean(self) -> np.ndarray:
        """Daily mean temperature (degC), (feature, year, day), computed once per cube."""
        if self.tmax is None or self.tmin is None:
            raise ValueError("tmean needs tmax and tmin, and this cube lacks one of them")
        return (self.tmax + self.tmin) / 2.0

    def scale_totals(self, totals: np.ndarray) -> np.ndarray:
        """Season totals (feature, year) under the partial_seasons policy (see ``total_factor``)."""
        return totals if self.total_factor is None else totals * self.total_factor

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
    seasons: int = 0  # seasons the request asks for: the fixed span's length or the trailing N (0: unknown)


@dataclass(frozen=True)
class Parameter:
    """One parameter of an indicator: its default, unit, bounds and meaning.

    A numeric parameter has a float default and optional bounds; a method choice has a string default and
    ``choices`` (the allowed words, the default among them) and unit "".
    """

    default: float | str
    unit: str
    description: str
    minimum: float | None = None
    maximum: float | None = None
    choices: tuple[str, ...] = ()


ParameterValue = float | str


@dataclass(frozen=True)
class IndicatorValues:
    """An indicator's (feature, year) values and flags: warning code -> (feature, year) bool mask.

    A compute function returns either a plain array or this, when some values deserve a warning (a zero-rain
    SPI, an upper-bounded SPEI fit, a baseline without a usable fit).
    """

    values: np.ndarray
    flags: Mapping[str, np.ndarray] = field(default_factory=dict)


def values_of(result: np.ndarray | IndicatorValues) -> np.ndarray:
    """The (feature, year) values of a compute function's result, whichever form it took."""
    return result.values if isinstance(result, IndicatorValues) else result


ComputeFn = Callable[[SeasonCube, Baseline, Mapping[str, ParameterValue]], "np.ndarray | IndicatorValues"]


@dataclass(frozen=True)
class Indicator:
    """A catalog entry: what the indicator is, how to compute it, and how to read its classes."""

    name: str
    unit: str
    definition: str
    source: str
    family: Family
    compute: ComputeFn
    # the daily variables it reads (a subset of VARIABLES): the data must hold them, and only these count
    # towards a season's completeness
    variables: tuple[str, ...]
    # how it reduces the season's days (see Reduction): decides what a partial season does to it
    reduction: Reduction
    parameters: Mapping[str, Parameter] = field(default_factory=dict)
    # True when the value is already a standard-normal deviate (SPI, SPEI): its z is the value itself.
    standardized: bool = False
    # True for precipitation amounts, which also get a percent of normal.
    percent_of_normal: bool = False
    # True when the value depends on the baseline itself (percentile thresholds, fitted distributions).
    uses_baseline: bool = False
    # (low, high) the value is clipped to, or None; a value on a bound carries the warning code at_clip
    bounds: tuple[float, float] | None = None
    # what exactly is computed beyond the definition: method choices, conventions, known biases
    details: str = ""

    def __post_init__(self) -> None:
        unknown = [v for v in self.variables if v not in VARIABLES]
        if not self.variables or unknown:
            raise ValueError(
                f"indicator {self.name!r}: variables {self.variables!r} must be some of {VARIABLES}"
            )

    def resolve(self, given: Mapping[str, object]) -> dict[str, ParameterValue]:
        """The full parameter set: defaults updated by ``given``, each checked against its bounds or choices."""
        unknown = sorted(set(given) - set(self.parameters))
        if unknown:
            allowed = sorted(self.parameters) or "none"
            from service.suggest import did_you_mean

            raise UnknownIndicatorError(
                f"indicator {self.name!r} has no parameter {unknown[0]!r}"
                f"{did_you_mean(unknown[0], self.parameters)}; its parameters are: {allowed}",
                field=f"indicators.{self.name}.{unknown[0]}",
            )
        values: dict[str, ParameterValue] = {}
        for pname, spec in self.parameters.items():
            raw = given.get(pname, spec.default)
            if spec.choices:
                if not isinstance(raw, str) or raw not in spec.choices:
                    raise UnknownIndicatorError(
                        f"parameter {pname!r} of {self.name!r} is {raw!r}; choose one of "
                        f"{', '.join(repr(c) for c in spec.choices)} (default {spec.default!r})",
                        field=f"indicators.{self.name}.{pname}",
                    )
                values[pname] = raw
                continue
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
        from service.suggest import did_you_mean

        raise UnknownIndicatorError(
            f"unknown indicator {name!r}{did_you_mean(name, _REGISTRY)}; known indicators: "
            f"{', '.join(sorted(_REGISTRY))}",
            field="indicators",
        ) from None


def catalog() -> list[Indicator]:
    """Every registered indicator, sorted by name."""
    return [_REGISTRY[k] for k in sorted(_REGISTRY)]
