"""Every requested indicator over every (feature, calendar window) and window-year of a batch of events.

Rows are *keys*: the distinct (feature, range) pairs of the events (events of one community on the same
calendar day share a key, whatever their year). Columns are the plan's window-years. The result is a
:class:`~service.indicators.table.RawValues`, the same shape of values, completeness and warning flags that
the season table builds, so z, classes, lags and notes follow the seasons' rules.

Indicators with a kernel (service.indicators.windows.kernels) are computed from the daily series once per
feature block; the others on season cubes of each distinct calendar window (table.raw_values), which costs
one cube per window and needs the whole window inside the data (a partial one is null, window_outside_data).
"""

from __future__ import annotations

import inspect
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from service.indicators import seasons
from service.indicators.base import SCALED_REDUCTIONS, Baseline, DailySeries, IndicatorValues
from service.indicators.table import PlannedIndicator, RawValues, raw_values
from service.indicators.windows.instances import BaselineGroup, EventPlan, date_keys
from service.indicators.windows.kernels import KERNELS, TOTALS, WindowContext
from service.schemas import IndicatorRequest

# Daily values per variable in one feature block (2 M, 16 MB of float64): the kernels' temporaries of a block
# stay small, and the block's windows are answered from it.
BLOCK_ELEMENTS = 2_000_000


@dataclass(frozen=True)
class WindowKeys:
    """The distinct (feature, range) pairs of a batch's events, sorted by feature then range."""

    feature: np.ndarray  # (key,) row of the daily series
    range: np.ndarray  # (key,) range of the plan

    @property
    def size(self) -> int:
        """Number of keys."""
        return int(self.feature.size)


def window_keys(rows: np.ndarray, range_of: np.ndarray, n_range: int) -> tuple[WindowKeys, np.ndarray]:
    """The keys of events at daily rows ``rows`` (event,) with ranges ``range_of`` (event, window).

    Returns the keys and, for each (event, window), its key.
    """
    code = np.asarray(rows, dtype=np.int64)[:, None] * n_range + range_of
    unique, key_of = np.unique(code, return_inverse=True)
    feature, range_ = np.divmod(unique, n_range)
    return WindowKeys(feature=feature, range=range_), key_of.reshape(range_of.shape)


def has_kernel(planned: PlannedIndicator) -> bool:
    """Whether the indicator is computed from the daily series directly (else on season cubes)."""
    return planned.indicator.name in KERNELS or planned.indicator.name in TOTALS


@dataclass
class _Columns:
    """Per-indicator (key, year) arrays being filled block by block."""

    values: dict[str, np.ndarray]
    totals: dict[str, np.ndarray]
    present: dict[tuple[str, ...], np.ndarray]


def _dense_positions(daily: DailySeries, plan: EventPlan) -> np.ndarray | None:
    """Each record day's position on the plan's consecutive days, or None when they are the same."""
    ordinals = plan.days.exact(date_keys(daily.year, daily.month, daily.day))
    if np.any(ordinals < 0):
        raise RuntimeError("a date of the daily series is not a day of the plan's calendar")
    positions = ordinals - plan.record_first
    n_days = plan.record_last - plan.record_first + 1
    if positions.size == n_days and positions[0] == 0 and positions[-1] == n_days - 1:
        return None
    return positions


def _block_arrays(
    daily: DailySeries, rows: np.ndarray, positions: np.ndarray | None, n_days: int, names: Sequence[str]
) -> dict[str, np.ndarray | None]:
    """The block's variables on every day of the record (NaN on days the series lacks), float64."""
    out: dict[str, np.ndarray | None] = {"prcp": None, "tmax": None, "tmin": None}
    for name in names:
        values = getattr(daily, name)
        if values is None:
            continue
        block = np.asarray(values[rows], dtype=np.float64)
        if positions is not None:
            dense = np.full((rows.size, n_days), np.nan)
            dense[:, positions] = block
            block = dense
        out[name] = block
    return out


def window_values(
    daily: DailySeries,
    keys: WindowKeys,
    plan: EventPlan,
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    groups: Sequence[BaselineGroup],
    *,
    use_kernels: bool = True,
) -> RawValues:
    """Each planned indicator for every key over the plan's window-years, as the season table's RawValues.

    ``use_kernels=False`` computes every indicator on season cubes of the windows (the reference the
    kernels are tested against).

    Values of windows incomplete for the indicator's variables are null (incomplete_season); partial ones
    follow request.partial_seasons for sums, counts and the totals SPI/SPEI standardize (partial_season);
    values on an indicator's bounds are flagged at_clip; fallback indicators of windows not wholly inside
    the data are null (window_outside_data).
    """
    if request.max_missing_share is None:
        raise RuntimeError("the request is not resolved")
    n_key, n_year = keys.size, plan.years.size
    n_days = plan.record_last - plan.record_first + 1
    positions = _dense_positions(daily, plan)
    first = plan.first[keys.range] - plan.record_first  # (key, year) positions on the record's days
    last = plan.last[keys.range] - plan.record_first
    expected = plan.expected_days[keys.range]
    first = np.clip(first, 0, n_days)  # a window without a day of the record gets last < first below
    last = np.clip(last, -1, n_days - 1)
    fast = [p for p in planned if use_kernels and has_kernel(p)]
    slow = [p for p in planned if not (use_kernels and has_kernel(p))]
    variable_sets = {seasons.variable_set(p.indicator.variables) for p in planned}
    union = seasons.variable_set({v for p in planned for v in p.indicator.variables})
    variable_sets.add(union)
    columns = _Columns(
        values={p.column: np.full((n_key, n_year), np.nan) for p in fast if p.indicator.name in KERNELS},
        totals={p.column: np.full((n_key, n_year), np.nan) for p in fast if p.indicator.name in TOTALS},
        present={s: np.zeros((n_key, n_year), dtype=np.int64) for s in variable_sets},
    )
    features = np.unique(keys.feature)
    block = max(1, BLOCK_ELEMENTS // max(n_days, 1))
    for start in range(0, features.size, block):
        rows = features[start : start + block]
        chosen = np.flatnonzero((keys.feature >= rows[0]) & (keys.feature <= rows[-1]))
        arrays = _block_arrays(daily, rows, positions, n_days, union)
        ctx = WindowContext(
            **arrays,
            dayofyear=plan.days.dayofyear[plan.record_first : plan.record_last + 1],
            latitude=np.asarray(daily.latitude, dtype=np.float64)[rows],
            calendar=daily.calendar,
            feature=np.searchsorted(rows, keys.feature[chosen]),
            first=first[chosen],
            last=last[chosen],
        )
        for names, counts in columns.present.items():
            counts[chosen] = ctx.present(names)
        for p in fast:
            if p.indicator.name in KERNELS:
                columns.values[p.column][chosen] = KERNELS[p.indicator.name](ctx, p.params)
            else:
                columns.totals[p.column][chosen] = TOTALS[p.indicator.name](ctx)
    return _assemble(daily, keys, plan, planned, slow, request, groups, columns, expected)


def _assemble(
    daily: DailySeries,
    keys: WindowKeys,
    plan: EventPlan,
    planned: Sequence[PlannedIndicator],
    slow: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    groups: Sequence[BaselineGroup],
    columns: _Columns,
    expected: np.ndarray,
) -> RawValues:
    """Completeness, the partial_seasons policy, standardized fits, fallback indicators and flags."""
    share = request.max_missing_share
    policy = request.partial_seasons
    with np.errstate(invalid="ignore", divide="ignore"):
        shares = {
            s: np.where(expected > 0, c / np.maximum(expected, 1), 0.0) for s, c in columns.present.items()
        }
    served = plan.served[keys.range]
    fallback = _fallback(daily, keys, plan, slow, request) if slow else {}
    values: dict[str, np.ndarray] = {}
    present: dict[str, np.ndarray] = {
        "": shares[seasons.variable_set({v for p in planned for v in p.indicator.variables})]
    }
    flags: dict[str, dict[str, np.ndarray]] = {}
    for p in planned:
        names = seasons.variable_set(p.indicator.variables)
        count = columns.present[names]
        complete = (1.0 - shares[names]) <= share + 1e-12
        partial = complete & (count < expected)
        factor = _total_factor(partial, count, expected, policy)
        own: Mapping[str, np.ndarray] = {}
        if p.column in columns.values:
            value = columns.values[p.column]
        elif p.column in columns.totals:
            totals = np.where(complete, columns.totals[p.column], np.nan)
            if factor is not None:
                totals = totals * factor
            result = _standardize(p, totals, keys, groups)
            value = np.array(result.values, dtype=np.float64)
            own = result.flags
        else:
            value, own = fallback[p.column]
        value = np.array(value, dtype=np.float64)
        value[~np.isfinite(value) | ~complete] = np.nan
        if p.indicator.reduction in SCALED_REDUCTIONS and factor is not None and p.column in columns.values:
            value *= factor
        marks = {code: np.asarray(mask, dtype=bool) & complete for code, mask in own.items()}
        marks["incomplete_season"] = ~complete
        marks["partial_season"] = partial
        if p.column not in columns.values and p.column not in columns.totals:
            marks["window_outside_data"] = complete & ~served
        if p.indicator.bounds is not None:
            low, high = p.indicator.bounds
            with np.errstate(invalid="ignore"):
                marks["at_clip"] = (value <= low) | (value >= high)
        values[p.column] = value
        present[p.column] = shares[names]
        flags[p.column] = marks
    return RawValues(years=plan.years, values=values, present=present, flags=flags)


def _total_factor(
    partial: np.ndarray, present: np.ndarray, expected: np.ndarray, policy: str
) -> np.ndarray | None:
    """The partial_seasons factor for window totals (None where it is 1 everywhere), as for seasons."""
    if policy == "as_is" or not partial.any():
        return None
    if policy == "null":
        return np.where(partial, np.nan, 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(partial, expected / np.maximum(present, 1), 1.0)


def _standardize(
    p: PlannedIndicator, totals: np.ndarray, keys: WindowKeys, groups: Sequence[BaselineGroup]
) -> IndicatorValues:
    """SPI or SPEI of window totals (key, year), fitted per key on its baseline windows (the indicator's fit)."""
    from service.indicators import drought

    out = np.full(totals.shape, np.nan)
    flags: dict[str, np.ndarray] = {}
    takes_distribution = "distribution" in inspect.signature(drought.standardize_against_baseline).parameters
    for group in groups:
        rows = np.flatnonzero(group.ranges[keys.range])
        if not rows.size:
            continue
        baseline = Baseline(
            members=group.members, fixed=group.fixed, label=group.label, seasons=group.seasons
        )
        if takes_distribution:
            kind = "gamma" if p.indicator.name == "spi" else "water balance"
            extra = () if p.indicator.name == "spi" else (str(p.params["distribution"]),)
            result = drought.standardize_against_baseline(totals[rows], baseline, kind, *extra)
        else:
            kind = "gamma" if p.indicator.name == "spi" else "log-logistic"
            result = drought.standardize_against_baseline(totals[rows], baseline, kind)
        if isinstance(result, IndicatorValues):
            out[rows] = result.values
            for code, mask in result.flags.items():
                flags.setdefault(code, np.zeros(totals.shape, dtype=bool))[rows] = mask
        else:
            out[rows] = result
    return IndicatorValues(values=out, flags=flags)


def _fallback(
    daily: DailySeries,
    keys: WindowKeys,
    plan: EventPlan,
    slow: Sequence[PlannedIndicator],
    request: IndicatorRequest,
) -> dict[str, tuple[np.ndarray, dict[str, np.ndarray]]]:
    """Indicators without a kernel: one season cube per distinct calendar window (table.raw_values).

    Returns per column the (key, year) values and the indicator's own flags; window-years not served whole
    stay null.
    """
    shape = (keys.size, plan.years.size)
    out = {p.column: (np.full(shape, np.nan), {}) for p in slow}
    own_codes = {"incomplete_season", "partial_season", "at_clip"}
    for r in np.unique(keys.range):
        chosen = np.flatnonzero(keys.range == r)
        rows = np.unique(keys.feature[chosen])
        start, end = int(plan.range_start[r]), int(plan.range_end[r])
        season = seasons.SeasonDefinition(
            start=(start // 100, start % 100), end=(end // 100, end % 100), label=plan.range_label(int(r))
        )
        raw = raw_values(daily, rows, season, slow, request)
        at_rows = np.searchsorted(rows, keys.feature[chosen])
        at_years = np.searchsorted(plan.years, raw.years)
        if np.any(plan.years[np.minimum(at_years, plan.years.size - 1)] != raw.years):
            raise RuntimeError("a season-year of a window's cube is not a window-year of the plan")
        for p in slow:
            values, flags = out[p.column]
            values[np.ix_(chosen, at_years)] = raw.values[p.column][at_rows]
            for code, mask in raw.flags[p.column].items():
                if code in own_codes:
                    continue
                target = flags.setdefault(code, np.zeros(shape, dtype=bool))
                target[np.ix_(chosen, at_years)] = mask[at_rows]
    return out
