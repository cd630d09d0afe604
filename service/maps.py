"""The anomaly field of one season-year over the whole grid, cell by cell, for the map picture.

Each cell is treated like a tiny community: its season value (precipitation total, or a mean temperature)
for every season-year of the baseline and for the mapped season-year, then z = (value - baseline mean) /
baseline sd (sample sd, ddof = 1), the same definition as the indicator table. Reads one season-year of the
grid at a time, so memory is one season of the grid. Nothing here knows about HTTP.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyproj
import shapely

from service.errors import OutOfRangeError, RequestError

# indicator -> (store variables it needs, how a season of days becomes one value, unit, family)
MAP_INDICATORS: dict[str, tuple[tuple[str, ...], str, str, str]] = {
    "prcp_total": (("prcp",), "sum", "mm", "precipitation"),
    "tmean": (("tmax", "tmin"), "mean", "degC", "temperature"),
    "tmax_mean": (("tmax",), "mean", "degC", "temperature"),
    "tmin_mean": (("tmin",), "mean", "degC", "temperature"),
}
MIN_BASELINE_SEASONS = 3
DEFAULT_BASELINE_YEARS = 10


@dataclass(frozen=True)
class AnomalyField:
    """One season-year's anomaly over the grid: z (ny, nx), the value itself, and what it was measured on."""

    z: np.ndarray  # (ny, nx) SD units, NaN where the cell has no value or its baseline no spread
    value: np.ndarray  # (ny, nx) in ``unit``
    indicator: str
    unit: str
    family: str
    year: int
    baseline_years: tuple[int, int]


def season_years(
    month: np.ndarray, day: np.ndarray, year: np.ndarray, season: Any
) -> tuple[np.ndarray, np.ndarray]:
    """For each day: the season-year it belongs to and whether it is in the season.

    ``season`` is "year", an object with ``months`` (one run that may cross the new year) or one with
    ``start``/``end`` as 'MM-DD' (a window that may cross the new year). A season crossing the new year
    belongs to the year in which it ends, so November 2004 of a November-April season is season-year 2005.
    """
    month = np.asarray(month, dtype=int)
    day = np.asarray(day, dtype=int)
    year = np.asarray(year, dtype=int)
    if season == "year" or season is None:
        return year.copy(), np.ones(year.shape, dtype=bool)
    months = getattr(season, "months", None)
    if months is not None:
        months = [int(m) for m in months]
        in_season = np.isin(month, months)
        crosses = months[0] > months[-1]
        late = crosses & (month >= months[0])
        return year + late.astype(int), in_season
    start, end = getattr(season, "start", None), getattr(season, "end", None)
    if isinstance(start, str) and isinstance(end, str):
        month_day = month * 100 + day
        first = int(start[:2]) * 100 + int(start[3:])
        last = int(end[:2]) * 100 + int(end[3:])
        if first <= last:
            return year.copy(), (month_day >= first) & (month_day <= last)
        late = month_day >= first
        return year + late.astype(int), late | (month_day <= last)
    given = (
        f"a per-feature season (property {season.property!r})"
        if isinstance(getattr(season, "property", None), str)
        else repr(season)
    )
    raise RequestError(
        f'the map needs one season for the whole grid, got {given}; give season as "year", '
        '{"months": [...]} or {"start": "MM-DD", "end": "MM-DD"}',
        field="season",
        pointer="/season",
    )


def _spans(label: np.ndarray, in_season: np.ndarray) -> dict[int, tuple[int, int, np.ndarray]]:
    """Each season-year's contiguous time-step span (first, stop) and its in-season mask within the span."""
    spans: dict[int, tuple[int, int, np.ndarray]] = {}
    for season_year in np.unique(label[in_season]):
        steps = np.flatnonzero((label == season_year) & in_season)
        first, stop = int(steps[0]), int(steps[-1]) + 1
        spans[int(season_year)] = (first, stop, in_season[first:stop] & (label[first:stop] == season_year))
    return spans


def resolve_baseline(baseline: Any, year: int, available: Sequence[int]) -> tuple[int, int]:
    """The (first, last) baseline season-years for ``year``: fixed, trailing N, or the first ten of data."""
    available = sorted(available)
    if baseline is None:
        first, last = available[0], available[min(DEFAULT_BASELINE_YEARS, len(available)) - 1]
    elif getattr(baseline, "trailing", None) is not None:
        first, last = year - int(baseline.trailing), year - 1
    else:
        first, last = int(baseline.start), int(baseline.end)
    if first < available[0] or last > available[-1]:
        raise OutOfRangeError(
            f"baseline {first}-{last} is outside the season-years with data ({available[0]}-{available[-1]}); "
            "choose a baseline inside them",
            field="baseline",
            pointer="/baseline",
        )
    return first, last


def mappable(indicator: str) -> tuple[tuple[str, ...], str, str, str]:
    """The variables, reducer, unit and family of a mappable indicator, or a RequestError listing them."""
    if indicator not in MAP_INDICATORS:
        raise RequestError(
            f"indicator {indicator!r} cannot be mapped; mappable indicators: {', '.join(MAP_INDICATORS)}",
            field="indicator",
        )
    return MAP_INDICATORS[indicator]


def map_grid(store: Any, indicator: str) -> Any:
    """The grid the map of ``indicator`` is drawn on: that of its variables (a dataset may have several)."""
    variables = mappable(indicator)[0]
    lacking = [v for v in variables if v not in store.variables]
    if lacking:
        raise RequestError(
            f"indicator {indicator!r} needs variable {lacking[0]!r}, which dataset {store.name!r} does not hold "
            f"(it has {list(store.variables)!r}); map an indicator of its variables",
            field="indicator",
        )
    grids = list(dict.fromkeys(store.grid_of(v) for v in variables))
    if len(grids) > 1:
        raise RequestError(
            f"indicator {indicator!r} reads variables on grids {grids!r} of dataset {store.name!r}; a map is "
            "drawn on one grid",
            field="indicator",
        )
    return store.grids[grids[0]]


def anomaly_field(
    store: Any,
    indicator: str,
    year: int | None,
    *,
    season: Any = "year",
    baseline: Any = None,
    max_missing_share: float = 0.10,
    max_cells: int = 4_000_000,
) -> AnomalyField:
    """z-score field (ny, nx) of ``indicator`` in season-year ``year`` against the baseline, per grid cell.

    Precipitation is the season total (mm), temperatures the season mean (degC), over the days present; a
    cell-season with more than ``max_missing_share`` of its calendar days missing has no value (never a
    short total); a cell whose baseline has fewer than 3 values or no spread has no z. ``year`` None maps
    the last season-year with data.
    """
    variables, reducer, unit, family = mappable(indicator)
    ny, nx = map_grid(store, indicator).shape
    if ny * nx > max_cells:
        raise RequestError(
            f"the grid has {ny * nx} cells; the map draws at most {max_cells}", field="indicator"
        )
    dates = store.dates
    label, in_season = season_years(dates.month, dates.day, dates.year, season)
    spans = _spans(label, in_season)
    if not spans:
        raise OutOfRangeError(
            "no day of the data falls in the requested season", field="season", pointer="/season"
        )
    full_length = max(int(mask.sum()) for _, _, mask in spans.values())
    available = sorted(spans)
    if year is None:
        complete = [y for y in available if spans[y][2].sum() >= (1 - max_missing_share) * full_length]
        year = complete[-1] if complete else available[-1]
    if year not in spans:
        raise OutOfRangeError(
            f"season-year {year!r} is not in the data ({available[0]}-{available[-1]})", field="year"
        )
    first, last = resolve_baseline(baseline, year, available)
    wanted = sorted(set(range(first, last + 1)) | {year})
    values = np.full((len(wanted), ny, nx), np.nan)
    for i, season_year in enumerate(wanted):
        values[i] = _season_value(
            store, variables, reducer, spans[season_year], full_length, max_missing_share
        )
    in_baseline = np.array([first <= y <= last for y in wanted])
    base = values[in_baseline]
    count = np.isfinite(base).sum(axis=0)
    target = values[wanted.index(year)]
    with warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN cells: their z is left NaN below
        mean = np.nanmean(base, axis=0)
        spread = np.nanstd(base, axis=0, ddof=1)
        z = (target - mean) / spread
    z[(count < MIN_BASELINE_SEASONS) | ~(spread > 0) | ~np.isfinite(z)] = np.nan
    return AnomalyField(
        z=z,
        value=target,
        indicator=indicator,
        unit=unit,
        family=family,
        year=int(year),
        baseline_years=(first, last),
    )


def _season_value(
    store: Any,
    variables: tuple[str, ...],
    reducer: str,
    span: tuple[int, int, np.ndarray],
    full_length: int,
    max_missing_share: float,
) -> np.ndarray:
    """One season-year's value per cell (ny, nx): the sum or mean over its days, NaN when too many are missing."""
    first, stop, mask = span
    # The season-year's own length in the calendar: its days in the data, unless it is cut short by the
    # start or end of the data (more than the one leap day shorter than the longest season-year).
    present_days = int(mask.sum())
    expected_days = present_days if present_days >= full_length - 1 else full_length
    blocks = [store.read(v, slice(None), slice(None), slice(first, stop))[:, :, mask] for v in variables]
    daily = np.sum(blocks, axis=0) / len(variables)  # tmean: (tmax + tmin) / 2, NaN where either is
    valid = np.isfinite(daily).sum(axis=2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # cells without a day: NaN, set below anyway
        value = np.nansum(daily, axis=2) if reducer == "sum" else np.nanmean(daily, axis=2)
    value[(valid == 0) | (1.0 - valid / expected_days > max_missing_share + 1e-12)] = np.nan
    return value


def to_grid_crs(geometries: Sequence[Any], crs: str | None, grid_crs: pyproj.CRS) -> list[Any]:
    """Shapely geometries from the request's CRS (default WGS84 lon/lat) into the grid's CRS."""
    source = pyproj.CRS.from_user_input(crs or "OGC:CRS84")
    if source.equals(grid_crs, ignore_axis_order=True):
        return list(geometries)
    transformer = pyproj.Transformer.from_crs(source, grid_crs, always_xy=True)
    return [
        shapely.transform(g, lambda xy: np.column_stack(transformer.transform(xy[:, 0], xy[:, 1])))
        for g in geometries
    ]
