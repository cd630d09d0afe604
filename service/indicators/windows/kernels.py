"""Indicator values of many windows at once, from a feature's daily series gathered once.

A window's sum is a difference of two prefix sums, its extreme one look-up in a sparse table of range
maxima, and its longest run the run through its first day plus a range maximum of run lengths. So the
cost is one pass over each feature's daily series (per variable and indicator) plus a constant per
(window, year), whatever the number of events: no loop over events, no copy of each window's days.

:data:`KERNELS` holds the indicators computed this way, each equal (to rounding) to the indicator's own
season function applied to the window's days (tests/indicators/test_windows.py checks every one against
it and against a plain loop). An indicator without a kernel is computed on season cubes of the window
(service.indicators.windows.values), which is exact but costs one cube per distinct calendar window.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from service.indicators.basic import WET_DAY_MM
from service.indicators.degree_days import single_sine


@dataclass
class WindowContext:
    """A block of features' daily series on consecutive calendar days, and the windows asked of them.

    ``prcp``, ``tmax``, ``tmin`` are (feature, day) float64 with NaN where missing (None when not held);
    ``first`` and ``last`` are (window, year) positions into the day axis, already clipped to it (a window
    with ``last < first`` has no day of the record); ``feature`` is each window's row in the block.
    """

    prcp: np.ndarray | None
    tmax: np.ndarray | None
    tmin: np.ndarray | None
    dayofyear: np.ndarray  # (day,) 1-based day of year in the dataset's calendar
    latitude: np.ndarray  # (feature,) degrees north
    calendar: str
    feature: np.ndarray  # (window,) int
    first: np.ndarray  # (window, year) int
    last: np.ndarray  # (window, year) int
    _cache: dict[object, np.ndarray] = field(default_factory=dict, repr=False)

    @property
    def n_days(self) -> int:
        """Length of the day axis."""
        return int(self.dayofyear.size)

    def variable(self, name: str) -> np.ndarray:
        """One daily variable (feature, day); a missing one is a programming error (resolution checks it)."""
        values = getattr(self, name)
        if values is None:
            raise RuntimeError(
                f"the daily series holds no {name!r}; resolve the request against its variables"
            )
        return values

    # --- sums and counts ---

    def _positions(self) -> tuple[np.ndarray, np.ndarray]:
        """Flat indices into a (feature, day + 1) prefix array of each window's end + 1 and start."""
        key = "positions"
        if key not in self._cache:
            width = self.n_days + 1
            high = np.clip(self.last + 1, 0, width - 1)
            low = np.clip(np.minimum(self.first, high), 0, width - 1)
            base = (self.feature * width)[:, None]
            self._cache[key] = np.stack([base + high, base + low])
        positions = self._cache[key]
        return positions[0], positions[1]

    def _window_sums(self, values: np.ndarray) -> np.ndarray:
        """Sum of ``values`` (feature, day; no NaN) over each window: a difference of two running totals."""
        prefix = np.zeros(
            (values.shape[0], values.shape[1] + 1), dtype=np.result_type(values.dtype, np.int64)
        )
        np.cumsum(values, axis=1, out=prefix[:, 1:])
        high, low = self._positions()
        flat = prefix.reshape(-1)
        return flat[high] - flat[low]

    def total(self, name: str, term: Callable[[], np.ndarray], variables: Sequence[str]) -> np.ndarray:
        """Sum of the daily ``term`` over each window's days with every one of ``variables`` (NaN: none).

        ``term()`` gives (feature, day) values, NaN exactly where one of ``variables`` is missing; ``name``
        caches the sums, so indicators sharing a term (prcp_total and spi) compute it once.
        """
        key = ("total", name)
        if key not in self._cache:
            values = term()
            np.nan_to_num(values, copy=False, nan=0.0)
            self._cache[key] = self._window_sums(values)
        return np.where(self.present(variables) > 0, self._cache[key], np.nan)

    def count(self, condition: np.ndarray) -> np.ndarray:
        """Days of each window on which ``condition`` (feature, day) holds (int64)."""
        return self._window_sums(condition.astype(np.int32)).astype(np.int64)

    def present(self, variables: Sequence[str]) -> np.ndarray:
        """Days of each window with every one of ``variables`` present (int64), cached per set."""
        key = ("present", tuple(variables))
        if key not in self._cache:
            valid = None
            for name in variables:
                has = ~np.isnan(self.variable(name))
                valid = has if valid is None else valid & has
            if valid is None:
                raise RuntimeError("present() needs at least one variable")
            self._cache[key] = self.count(valid)
        return self._cache[key]

    # --- extremes and runs ---

    def _range_max(self, values: np.ndarray, first: np.ndarray, last: np.ndarray, empty: float) -> np.ndarray:
        """Maximum of ``values`` (feature, day) over [first, last] of each window; ``empty`` where none.

        A sparse table built level by level (2, 4, 8, ... days), each window answered at its own level by
        the maximum of two overlapping blocks; only two levels are held at once.
        """
        length = last - first + 1
        out = np.full(first.shape, empty, dtype=values.dtype)
        usable = length > 0
        if not usable.any():
            return out
        level = np.zeros(first.shape, dtype=np.int64)
        level[usable] = np.floor(np.log2(length[usable])).astype(np.int64)
        feature = np.broadcast_to(self.feature[:, None], first.shape)
        table = values
        for j in range(int(level[usable].max()) + 1):
            if j:
                step = 1 << (j - 1)
                table = np.maximum(table[:, :-step], table[:, step:])
            chosen = usable & (level == j)
            if chosen.any():
                f = feature[chosen]
                a = first[chosen]
                b = last[chosen] - (1 << j) + 1
                out[chosen] = np.maximum(table[f, a], table[f, b])
        return out

    def maximum(self, values: np.ndarray) -> np.ndarray:
        """Largest non-NaN value of each window (NaN where the window has none)."""
        high = self._range_max(np.where(np.isnan(values), -np.inf, values), self.first, self.last, -np.inf)
        return np.where(np.isneginf(high), np.nan, high)

    def minimum(self, values: np.ndarray) -> np.ndarray:
        """Smallest non-NaN value of each window (NaN where the window has none)."""
        low = self._range_max(np.where(np.isnan(values), -np.inf, -values), self.first, self.last, -np.inf)
        return np.where(np.isneginf(low), np.nan, -low)

    def longest_run(self, condition: np.ndarray) -> np.ndarray:
        """Longest run of consecutive days on which ``condition`` holds inside each window (int64).

        The run through a window's first day counts from that day; every later run lies inside the window,
        so it is the largest run length ending at a day after that first run (a range maximum).
        """
        n = condition.shape[1]
        position = np.arange(n, dtype=np.int64)
        last_break = np.where(condition, -1, position)
        np.maximum.accumulate(last_break, axis=1, out=last_break)
        run = (position - last_break).astype(np.int32)  # length of the run ending at each day (0 if none)
        next_break = np.where(condition, n, position)
        next_break = np.minimum.accumulate(next_break[:, ::-1], axis=1)[:, ::-1]  # first break at or after
        first = np.clip(self.first, 0, n - 1)
        rows = np.broadcast_to(self.feature[:, None], first.shape)
        has_days = self.last >= self.first
        starts_in_run = has_days & condition[rows, first]
        run_end = next_break[rows, first] - 1
        opening = np.where(starts_in_run, np.minimum(run_end, self.last) - self.first + 1, 0)
        rest_first = np.where(starts_in_run, run_end + 1, self.first)
        rest = self._range_max(run, rest_first, self.last, 0).astype(np.int64)
        return np.where(has_days, np.maximum(opening, rest), 0)


# --- the kernels ---------------------------------------------------------------------------------------------

# Values per chunk of an elementwise daily term (8192 float64 = 64 kB per temporary): temporaries of 128 kB
# and more are mmap-ed by glibc and page-faulted on every use (service.indicators.basic.BLOCK_ELEMENTS).
_CHUNK = 1 << 13


def elementwise(function: Callable[..., np.ndarray], *arrays: np.ndarray) -> np.ndarray:
    """``function`` of (feature, day) arrays evaluated in cache-sized chunks, into one float64 array."""
    shape = arrays[0].shape
    flat = [np.ascontiguousarray(a).reshape(-1) for a in arrays]
    out = np.empty(flat[0].size, dtype=np.float64)
    for start in range(0, out.size, _CHUNK):
        out[start : start + _CHUNK] = function(*(a[start : start + _CHUNK] for a in flat))
    return out.reshape(shape)


def _mean(
    ctx: WindowContext, name: str, term: Callable[[], np.ndarray], variables: Sequence[str]
) -> np.ndarray:
    """Mean of the daily ``term`` over the window's days with ``variables``; NaN without such a day."""
    total = ctx.total(name, term, variables)
    days = ctx.present(variables)
    with np.errstate(invalid="ignore", divide="ignore"):
        return total / np.maximum(days, 1)


def _count(ctx: WindowContext, condition: np.ndarray, *variables: str) -> np.ndarray:
    """Days on which ``condition`` holds; NaN for a window without a day of ``variables``."""
    return np.where(ctx.present(variables) > 0, ctx.count(condition).astype(np.float64), np.nan)


def _run(ctx: WindowContext, condition: np.ndarray, *variables: str) -> np.ndarray:
    """Longest run of ``condition``; a missing day ends a run; NaN without a day of ``variables``."""
    return np.where(ctx.present(variables) > 0, ctx.longest_run(condition).astype(np.float64), np.nan)


def _wet_day_intensity(ctx: WindowContext) -> np.ndarray:
    """Wet-day (>= 1 mm) precipitation over the number of wet days (mm/day); NaN without a wet day."""
    prcp = ctx.variable("prcp")
    wet = prcp >= WET_DAY_MM
    amount = ctx.total("wet_amount", lambda: np.where(wet, prcp, 0.0), ("prcp",))
    n_wet = ctx.count(wet)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n_wet > 0, amount / np.maximum(n_wet, 1), np.nan)


def _largest_five_day_total(ctx: WindowContext) -> np.ndarray:
    """Largest sum of five consecutive days inside the window, all with data (mm); NaN without one."""
    prcp = ctx.variable("prcp")
    n = prcp.shape[1]
    missing = np.isnan(prcp)
    total = np.zeros((prcp.shape[0], n + 1))
    np.cumsum(np.where(missing, 0.0, prcp), axis=1, out=total[:, 1:])
    gaps = np.zeros((prcp.shape[0], n + 1), dtype=np.int64)
    np.cumsum(missing, axis=1, out=gaps[:, 1:])
    five = np.full(prcp.shape, -np.inf)  # the five days ending at each day
    if n >= 5:
        sums = total[:, 5:] - total[:, :-5]
        whole = (gaps[:, 5:] - gaps[:, :-5]) == 0
        five[:, 4:] = np.where(whole, sums, -np.inf)
    high = ctx._range_max(five, ctx.first + 4, ctx.last, -np.inf)
    return np.where(np.isneginf(high), np.nan, high)


Kernel = Callable[[WindowContext, Mapping[str, object]], np.ndarray]


def _variable(name: str) -> Callable[[WindowContext], Callable[[], np.ndarray]]:
    """The term 'the daily variable itself' (a copy, which the sum may overwrite)."""
    return lambda ctx: lambda: ctx.variable(name).copy()


def _degree_days(lower_name: str, upper_name: str | None) -> Kernel:
    """Single-sine degree days summed over the window (service.indicators.degree_days.single_sine)."""

    def kernel(ctx: WindowContext, params: Mapping[str, object]) -> np.ndarray:
        lower = float(params[lower_name])  # type: ignore[arg-type]
        upper = None if upper_name is None else float(params[upper_name])  # type: ignore[arg-type]
        tmax, tmin = ctx.variable("tmax"), ctx.variable("tmin")
        return ctx.total(
            f"single_sine {lower} {upper}",
            lambda: elementwise(lambda a, b: single_sine(a, b, lower, upper), tmax, tmin),
            ("tmax", "tmin"),
        )

    return kernel


def _tmean(ctx: WindowContext) -> Callable[[], np.ndarray]:
    return lambda: elementwise(lambda a, b: (a + b) * 0.5, ctx.variable("tmax"), ctx.variable("tmin"))


def _range(ctx: WindowContext) -> Callable[[], np.ndarray]:
    return lambda: elementwise(lambda a, b: a - b, ctx.variable("tmax"), ctx.variable("tmin"))


KERNELS: dict[str, Kernel] = {
    "prcp_total": lambda c, p: c.total("prcp", _variable("prcp")(c), ("prcp",)),
    "wet_days": lambda c, p: _count(c, c.variable("prcp") >= WET_DAY_MM, "prcp"),
    "tmean": lambda c, p: _mean(c, "tmean", _tmean(c), ("tmax", "tmin")),
    "tmax_mean": lambda c, p: _mean(c, "tmax", _variable("tmax")(c), ("tmax",)),
    "tmin_mean": lambda c, p: _mean(c, "tmin", _variable("tmin")(c), ("tmin",)),
    "dtr": lambda c, p: _mean(c, "dtr", _range(c), ("tmax", "tmin")),
    "gdd": _degree_days("base", "cap"),
    "edd": _degree_days("threshold", None),
    "r10mm": lambda c, p: _count(c, c.variable("prcp") >= 10.0, "prcp"),
    "r20mm": lambda c, p: _count(c, c.variable("prcp") >= 20.0, "prcp"),
    "su": lambda c, p: _count(c, c.variable("tmax") > 25.0, "tmax"),
    "tr": lambda c, p: _count(c, c.variable("tmin") > 20.0, "tmin"),
    "fd": lambda c, p: _count(c, c.variable("tmin") < 0.0, "tmin"),
    "id": lambda c, p: _count(c, c.variable("tmax") < 0.0, "tmax"),
    "sdii": lambda c, p: _wet_day_intensity(c),
    "cdd": lambda c, p: _run(c, c.variable("prcp") < WET_DAY_MM, "prcp"),
    "cwd": lambda c, p: _run(c, c.variable("prcp") >= WET_DAY_MM, "prcp"),
    "rx1day": lambda c, p: c.maximum(c.variable("prcp")),
    "rx5day": lambda c, p: _largest_five_day_total(c),
    "txx": lambda c, p: c.maximum(c.variable("tmax")),
    "tnn": lambda c, p: c.minimum(c.variable("tmin")),
}


def water_balance(ctx: WindowContext) -> np.ndarray:
    """Sum of P - ET0 (Hargreaves, FAO-56 eq. 52) over each window's days with prcp, tmax and tmin (mm)."""
    from service.indicators import drought

    n_doy = 360 if ctx.calendar.lower() == "360_day" else 366
    orbit_day = drought._equivalent_day_of_year(np.arange(1, n_doy + 1), ctx.calendar)
    radiation = drought.extraterrestrial_radiation(ctx.latitude[:, None], orbit_day[None, :])

    def balance() -> np.ndarray:
        ra = radiation[:, np.maximum(ctx.dayofyear, 1) - 1]  # (feature, day) MJ m-2 day-1
        return elementwise(
            lambda p, a, b, r: p - drought.hargreaves(a, b, r),
            ctx.variable("prcp"),
            ctx.variable("tmax"),
            ctx.variable("tmin"),
            ra,
        )

    return ctx.total("water balance", balance, ("prcp", "tmax", "tmin"))


# Standardized indices: the window total (or water balance) each is fitted on; the fit itself is the
# indicator's own (service.indicators.drought.standardize_against_baseline), done once the totals of every
# baseline window are known.
TOTALS: dict[str, Callable[[WindowContext], np.ndarray]] = {
    "spi": lambda c: c.total("prcp", _variable("prcp")(c), ("prcp",)),
    "spei": water_balance,
}
