"""Plain season values: precipitation total and wet days, mean temperatures, diurnal range.

Every function here works on (feature, year, day) arrays of a :class:`~service.indicators.base.SeasonCube`
along the last axis and returns a (feature, year) float64 array. Padding days (outside the season) and
missing days are NaN: totals and means skip them, counts do not count them, and a season-year without a
single valid day gives NaN. The core (seasons.py) nulls seasons with too many missing days; these functions
never decide that. The small helpers at the top (valid-day counts, runs) are shared by the other value
modules.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping

import numpy as np

from service.indicators.base import Baseline, Indicator, SeasonCube, register

WET_DAY_MM = 1.0  # a wet day has at least 1 mm (ETCCDI, Zhang et al. 2011)


# --- shared helpers ---------------------------------------------------------------------------------------------


def valid_days(values: np.ndarray) -> np.ndarray:
    """Number of non-NaN days per (feature, year) along the last axis (int64)."""
    return np.count_nonzero(~np.isnan(values), axis=-1)


def null_where_empty(result: np.ndarray | np.floating, *arrays: np.ndarray) -> np.ndarray:
    """``result`` as float64 with NaN where any of ``arrays`` has no valid day in that season-year."""
    out = np.asarray(result, dtype=np.float64)
    empty = np.zeros(out.shape, dtype=bool)
    for values in arrays:
        empty |= valid_days(values) == 0
    if empty.any():
        out = out.copy() if out is result else out
        out[empty] = np.nan
    return out


def season_sum(values: np.ndarray) -> np.ndarray:
    """Sum over the valid days of each season-year (same units as ``values``); NaN when none is valid."""
    return null_where_empty(np.nansum(values, axis=-1, dtype=np.float64), values)


def season_mean(values: np.ndarray) -> np.ndarray:
    """Mean over the valid days of each season-year (same units as ``values``); NaN when none is valid."""
    count = valid_days(values)
    total = np.nansum(values, axis=-1, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan)


def count_days(condition: np.ndarray, *arrays: np.ndarray) -> np.ndarray:
    """Days on which ``condition`` holds per season-year; NaN when ``arrays`` have no valid day."""
    return null_where_empty(np.count_nonzero(condition, axis=-1).astype(np.float64), *arrays)


# Values per block in blocked reductions: 8192 float64 = 64 kB per temporary. Temporaries of 128 kB and
# more are mmap-ed by glibc malloc and page-faulted on every use: blocks above that measured 3-5 times slower
# per value (single-sine degree days: 20 ns per day in 114 kB blocks, 68-95 ns in 137 kB to 1 MB blocks).
BLOCK_ELEMENTS = 1 << 13


def reduce_in_blocks(
    reducer: Callable[..., np.ndarray], *arrays: np.ndarray, pass_rows: bool = False
) -> np.ndarray:
    """``reducer`` applied to blocks of season-year rows of (feature, year, day) arrays, results joined.

    ``reducer`` takes (rows, day) blocks of each array and returns one value per row; with ``pass_rows``
    it first gets the block's flat row numbers (feature * n_year + year) as an int array. Work stays
    vectorised over communities, years and days inside each block; blocking keeps chains of elementwise
    steps in small, cache-resident temporaries instead of one full-size temporary per step (measured 2-4
    times faster for 5,000 communities). A non-contiguous input is made contiguous once.
    """
    if pass_rows:
        return _over_row_blocks(
            arrays,
            BLOCK_ELEMENTS,
            lambda start, blocks: reducer(np.arange(start, start + len(blocks[0])), *blocks),
        )
    return _over_row_blocks(arrays, BLOCK_ELEMENTS, lambda _, blocks: reducer(*blocks))


def _over_row_blocks(
    arrays: tuple[np.ndarray, ...], elements: int, reduce_block: Callable[[int, list[np.ndarray]], np.ndarray]
) -> np.ndarray:
    """``reduce_block(first row, blocks)`` over blocks of about ``elements`` values of the season-year rows of
    (feature, year, day) arrays (each made contiguous once), one float64 per row, joined in the arrays' shape."""
    lead = arrays[0].shape[:-1]
    n_day = arrays[0].shape[-1]
    flat = [np.ascontiguousarray(a).reshape(-1, n_day) for a in arrays]
    n_rows = flat[0].shape[0]
    out = np.empty(n_rows, dtype=np.float64)
    step = max(1, elements // max(n_day, 1))
    for start in range(0, n_rows, step):
        out[start : start + step] = reduce_block(start, [a[start : start + step] for a in flat])
    return out.reshape(lead)


# Values per block in the scratch passes below: 131,072 (1 MB of float64) per scratch array. The arrays are
# allocated once per pass and reused block after block, so no block touches fresh memory. Each block costs a few
# numpy and compiled calls with Python between them, holding the GIL, while a batch's table overlaps the next
# batch's chunk work: measured on 2,000 villages of the large demo, two 1,000-feature tables on two threads took
# 0.51-0.53 s at this size against 0.60-0.75 s at 32,768 values, one table alone 0.78 against 0.85 s (the
# rows' values are the same: every reduction is per row).
PASS_ELEMENTS = 1 << 17


class Scratch:
    """Reusable flat arrays for the blocks of one pass, by name and dtype, each at least one block long."""

    def __init__(self, elements: int) -> None:
        self.elements = elements
        self._arrays: dict[tuple[str, np.dtype], np.ndarray] = {}

    def get(self, name: str, shape: tuple[int, ...], dtype: np.dtype | type = np.float64) -> np.ndarray:
        """The array ``name`` of ``dtype`` viewed with ``shape`` (its contents are whatever was left there)."""
        key = (name, np.dtype(dtype))
        flat = self._arrays.get(key)
        if flat is None:
            flat = self._arrays[key] = np.empty(self.elements, dtype=dtype)
        return flat[: math.prod(shape)].reshape(shape)


def reduce_rows(reducer: Callable[..., np.ndarray], *arrays: np.ndarray) -> np.ndarray:
    """``reducer(scratch, *blocks)`` over blocks of season-year rows of (feature, year, day) arrays, joined.

    As :func:`reduce_in_blocks`, with blocks of about PASS_ELEMENTS values and a :class:`Scratch` that the
    reducer computes its temporaries in (``out=``), the same one for every block.
    """
    scratch = Scratch(max(PASS_ELEMENTS, arrays[0].shape[-1]))
    return _over_row_blocks(arrays, PASS_ELEMENTS, lambda _, blocks: reducer(scratch, *blocks))


def valid_sums(scratch: Scratch, values: np.ndarray) -> np.ndarray:
    """Row sums over the valid days of a (rows, day) block, float64: ``np.nansum(values, axis=-1)``.

    The same operations as numpy's nansum (NaN replaced by 0 in a copy, then one sum per row), so the
    same bits, in scratch memory. ``values`` may be scratch itself ("values"): it is then changed.
    """
    zeroed = scratch.get("values", values.shape, values.dtype)
    if not np.may_share_memory(zeroed, values):
        np.copyto(zeroed, values)
    missing = np.isnan(values, out=scratch.get("missing", values.shape, bool))
    np.copyto(zeroed, 0, where=missing)
    return np.add.reduce(zeroed, axis=-1, dtype=np.float64)


def null_where_no_days(result: np.ndarray, days: np.ndarray) -> np.ndarray:
    """``result`` (float64, changed in place) with NaN where ``days`` (days with a value) is 0."""
    empty = days == 0
    if empty.any():
        result[empty] = np.nan
    return result


def season_total(cube: SeasonCube, name: str) -> np.ndarray:
    """Sum of variable ``name`` over the valid days of each season-year; NaN when none is valid.

    Equal to ``season_sum`` of the cube's values; computed once per cube (SPI and prcp_total share it).
    """

    def make() -> np.ndarray:
        sums = reduce_rows(valid_sums, getattr(cube, name))
        return null_where_no_days(sums, cube.days_with((name,)))

    return cube.memo(("total", name), make)


def season_average(cube: SeasonCube, names: tuple[str, ...], daily: Callable[..., np.ndarray]) -> np.ndarray:
    """Mean over the valid days of ``daily(scratch, *blocks)`` (a daily value of the variables ``names``,
    NaN where one is missing, written to scratch "values"), per season-year; NaN when no day is valid.

    Equal to :func:`season_mean` of that daily value.
    """
    total = reduce_rows(lambda scratch, *blocks: valid_sums(scratch, daily(scratch, *blocks)),
                        *(getattr(cube, n) for n in names))  # fmt: skip
    count = cube.days_with(names)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan)


def season_count(cube: SeasonCube, name: str, condition: Callable[..., np.ndarray]) -> np.ndarray:
    """Days on which ``condition(block, out=...)`` holds per season-year; NaN when no day of ``name`` is
    valid. Equal to :func:`count_days`."""

    def count(scratch: Scratch, values: np.ndarray) -> np.ndarray:
        return np.count_nonzero(condition(values, out=scratch.get("condition", values.shape, bool)), axis=-1)

    return null_where_no_days(reduce_rows(count, getattr(cube, name)), cube.days_with((name,)))


def _own_values(scratch: Scratch, values: np.ndarray) -> np.ndarray:
    """A block's values copied to scratch "values" (so that valid_sums may change them)."""
    out = scratch.get("values", values.shape, values.dtype)
    np.copyto(out, values)
    return out


def longest_run(condition: np.ndarray) -> np.ndarray:
    """Length (days) of the longest run of consecutive True along the last axis, as int.

    False (and so a missing or padding day, whose comparisons are False) ends a run; only days of the array
    count, so a run is cut at both ends of the season. Vectorised: with a False day appended to every row,
    each run is the distance between two consecutive False days less one (the appended day of the row
    before stands at position -1 of a row), and a row's longest run is the largest of those it ends.
    """
    lead = condition.shape[:-1]
    n_day = condition.shape[-1]
    if n_day == 0:
        return np.zeros(lead, dtype=np.int64)
    rows = condition.reshape(-1, n_day)
    breaks = np.ones((rows.shape[0], n_day + 1), dtype=bool)
    np.logical_not(rows, out=breaks[:, :n_day])
    at = np.flatnonzero(breaks)
    runs = np.diff(at, prepend=-1)
    runs -= 1
    # the first False day of each row (every row has one: the appended day)
    row_starts = np.searchsorted(at, np.arange(rows.shape[0], dtype=np.int64) * (n_day + 1))
    return np.maximum.reduceat(runs, row_starts).reshape(lead).astype(np.int64)


# --- the indicators -----------------------------------------------------------------------------------------


def prcp_total(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Season precipitation total (mm): sum of the valid days' precipitation."""
    return season_total(cube, "prcp")


def wet_days(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Number of wet days (prcp >= 1 mm) in the season (days)."""
    return season_count(cube, "prcp", lambda prcp, out: np.greater_equal(prcp, WET_DAY_MM, out=out))


def _daily_mean_temperature(scratch: Scratch, tmax: np.ndarray, tmin: np.ndarray) -> np.ndarray:
    """(tmax + tmin) * 0.5 of a block, in scratch "values"."""
    out = np.add(tmax, tmin, out=scratch.get("values", tmax.shape, np.result_type(tmax, tmin)))
    out *= 0.5
    return out


def _daily_range(scratch: Scratch, tmax: np.ndarray, tmin: np.ndarray) -> np.ndarray:
    """tmax - tmin of a block, in scratch "values"."""
    return np.subtract(tmax, tmin, out=scratch.get("values", tmax.shape, np.result_type(tmax, tmin)))


def tmean(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Season mean of the daily mean temperature (tmax + tmin) / 2 (degC); days missing either are skipped."""
    return season_average(cube, ("tmax", "tmin"), _daily_mean_temperature)


def tmax_mean(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Season mean of the daily maximum temperature (degC)."""
    return season_average(cube, ("tmax",), _own_values)


def tmin_mean(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Season mean of the daily minimum temperature (degC)."""
    return season_average(cube, ("tmin",), _own_values)


def dtr(cube: SeasonCube, baseline: Baseline, params: Mapping[str, float]) -> np.ndarray:
    """Season mean diurnal temperature range tmax - tmin (degC); days missing either are skipped."""
    return season_average(cube, ("tmax", "tmin"), _daily_range)


ETCCDI = (
    "ETCCDI core indices: Zhang et al. 2011, WIREs Climate Change 2:851; Klein Tank et al. 2009, WCDMP-No. 72"
)

register(
    Indicator(
        name="prcp_total",
        unit="mm",
        definition="Total precipitation of the season: the sum of its daily precipitation.",
        source="Season sum of daily precipitation (PRCPTOT-like, but over all days; " + ETCCDI + ")",
        family="precipitation",
        compute=prcp_total,
        variables=("prcp",),
        reduction="sum",
        percent_of_normal=True,
    )
)
register(
    Indicator(
        name="wet_days",
        unit="days",
        definition="Number of days in the season with at least 1 mm of precipitation.",
        source="Wet-day definition RR >= 1 mm of the " + ETCCDI,
        family="count",
        compute=wet_days,
        variables=("prcp",),
        reduction="count",
    )
)
register(
    Indicator(
        name="tmean",
        unit="degC",
        definition="Mean over the season of the daily mean temperature, (tmax + tmin) / 2.",
        source="Daily mean as (TX + TN) / 2, common practice (" + ETCCDI + ")",
        family="temperature",
        compute=tmean,
        variables=("tmax", "tmin"),
        reduction="mean",
    )
)
register(
    Indicator(
        name="tmax_mean",
        unit="degC",
        definition="Mean over the season of the daily maximum temperature.",
        source="Season mean of TX (" + ETCCDI + ")",
        family="temperature",
        compute=tmax_mean,
        variables=("tmax",),
        reduction="mean",
    )
)
register(
    Indicator(
        name="tmin_mean",
        unit="degC",
        definition="Mean over the season of the daily minimum temperature.",
        source="Season mean of TN (" + ETCCDI + ")",
        family="temperature",
        compute=tmin_mean,
        variables=("tmin",),
        reduction="mean",
    )
)
register(
    Indicator(
        name="dtr",
        unit="degC",
        definition="Mean over the season of the daily temperature range, tmax - tmin.",
        source="DTR, mean of TX - TN (" + ETCCDI + ")",
        family="temperature",
        compute=dtr,
        variables=("tmax", "tmin"),
        reduction="mean",
    )
)
