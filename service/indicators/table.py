"""The indicator table: a resolved request and a daily series in, one row per (feature_id, year) out.

Columns of the wide layout, in this order (the same request gives the same columns, dtypes and bytes):

- ``feature_id`` (string), ``year`` (int64: the season-year, the year in which the season ends);
- for each requested indicator, in request order, named by its column name (below):
  ``<col>`` (float64, the indicator's unit), ``<col>_z`` (float64), ``<col>_class`` (Int64),
  ``<col>_label`` (ordered categorical, our plain words), ``<col>_pct_normal`` (float64 %, precipitation
  amounts only), ``<col>_category`` (ordered categorical, the WMO SPI category; SPI and SPEI only), then for
  each lag k > 0 ``<col>_z_lag<k>`` (float64), ``<col>_class_lag<k>`` (Int64) and, with ``lag_values``,
  ``<col>_lag<k>`` (float64, the value of season t - k), then for each sequence
  (a, b) ``<col>_seq<a>_<b>`` (categorical "<label at t-a> after <label at t-b>");
- for each pair (a, b): ``<a>_and_<b>`` (categorical, e.g. "drier and much warmer");
- for each spell: ``<name>_run`` and ``<name>_count`` (Int64);
- ``season_complete`` (float64): the share of the season's calendar days with tmax, tmin and prcp present.

Column names: an indicator used with its default parameters is named plainly (``gdd``); with any parameter
changed it carries every parameter in catalog order, ``<name>_<param><value>`` with '-' written 'm' and '.'
written 'p' (``{"name": "gdd", "base": 8}`` -> ``gdd_base8_cap30``; ``threshold: 29.5`` -> ``threshold29p5``).
The same indicator may be requested with different parameters; the same parameters twice is an error.
Pairs and spells name indicators by column name, or by plain name when that indicator is requested once.

The long layout has one row per (feature_id, year, indicator) with columns feature_id, year, indicator,
value, z, class, label, pct_normal, category, z_lag<k>, class_lag<k>, value_lag<k> (with lag_values),
seq<a>_<b>, then the pair and spell
columns and season_complete of that (feature_id, year), repeated on each of its indicator rows.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse

from service.errors import OutOfRangeError, RequestError
from service.indicators import baselines, classes, seasons, sequences
from service.indicators.base import (
    SCALED_REDUCTIONS,
    VARIABLES,
    Baseline,
    DailySeries,
    Indicator,
    IndicatorValues,
    ParameterValue,
    get_indicator,
)
from service.schemas import (
    FixedBaseline,
    IndicatorRequest,
    IndicatorSpec,
    Spell,
    SpellCondition,
    YearSpan,
)
from service.warning_codes import WARNING_CODES, notes_text, warning

DEFAULT_INDICATORS = ("prcp_total", "wet_days", "tmean", "tmax_mean", "tmin_mean", "cdd", "gdd", "edd", "spi")
DEFAULT_PAIR = ("prcp_total", "tmean")
# The default baseline: the first 30 season-years the data serve whole (all of them when fewer). WMO-No. 1090
# (2012) asks for at least 30 years of record to fit SPI, and WMO climate normals span 30 years; with the
# 10 seasons used before, a stationary Monte Carlo gave SPI <= -2 in 5.2 % of seasons instead of 2.3 % (docs/methods.md).
DEFAULT_BASELINE_SEASONS = 30
# Distribution-fitted and percentile indices on fewer baseline seasons get the warning short_baseline_fit.
MIN_FIT_SEASONS = 30
# Rows are cut and computed in blocks of about this many daily values per variable (2 M, 16 MB of float64):
# every feature's row is independent, and blocks keep the cubes and the indicators' temporaries small enough to
# stay fast (measured: 3x faster than one cube of 5,000 features x 48 years). Below glibc's largest mmap
# threshold (32 MB), the blocks' temporaries reuse freed heap memory instead of fresh pages from the kernel: on
# the 5,000-village batch 8 M-value blocks spent 0.4-1.0 CPU-s of kernel time on page faults, 2 M ones almost
# none, in the same user time (bench/RESULTS.md, "Scale").
FEATURE_BLOCK_ELEMENTS = 2_000_000


@dataclass(frozen=True)
class IndicatorTable:
    """The rows of a request (pandas DataFrame, stable column order) and the warnings about null values."""

    frame: pd.DataFrame
    warnings: list[dict[str, Any]] = field(default_factory=list)


@dataclass(frozen=True)
class PlannedIndicator:
    """One requested indicator: its column name, catalog entry and full parameter set."""

    column: str
    indicator: Indicator
    params: dict[str, ParameterValue]


# --- names --------------------------------------------------------------------------------------------------


def _number_text(value: ParameterValue) -> str:
    """8.0 -> '8', 29.5 -> '29p5', -1.5 -> 'm1p5' (safe in a column name); a method word stays as it is."""
    if isinstance(value, str):
        return value
    return f"{value:g}".replace("-", "m").replace(".", "p").replace("+", "")


def column_name(indicator: Indicator, params: Mapping[str, ParameterValue]) -> str:
    """The plain name with default parameters, else the name with every parameter and its value."""
    if all(params[p] == spec.default for p, spec in indicator.parameters.items()):
        return indicator.name
    return indicator.name + "".join(f"_{p}{_number_text(params[p])}" for p in indicator.parameters)


def plan_indicators(specs: Sequence[str | IndicatorSpec]) -> list[PlannedIndicator]:
    """Catalog entries, checked parameters and unique column names of the requested indicators."""
    planned: list[PlannedIndicator] = []
    seen: dict[str, int] = {}
    for i, spec in enumerate(specs):
        name, given = (spec, {}) if isinstance(spec, str) else (spec.name, spec.params())
        indicator = get_indicator(name)
        params = indicator.resolve(given)
        column = column_name(indicator, params)
        if column in seen:
            raise RequestError(
                f"indicators[{i}]: {name!r} with parameters {params!r} is already requested as "
                f"indicators[{seen[column]}]; request each indicator and parameter set once",
                field=f"indicators[{i}]",
            )
        seen[column] = i
        planned.append(PlannedIndicator(column=column, indicator=indicator, params=params))
    return planned


def _reference(name: str, planned: Sequence[PlannedIndicator], where: str) -> str:
    """The column that ``name`` (a column name, or a plain name requested once) refers to."""
    columns = [p.column for p in planned]
    if name in columns:
        return name
    same = [p.column for p in planned if p.indicator.name == name]
    if len(same) == 1:
        return same[0]
    if len(same) > 1:
        raise RequestError(
            f"{where}: {name!r} is requested more than once ({', '.join(same)}); name one of these columns",
            field=where,
        )
    raise RequestError(
        f"{where}: {name!r} is not among the requested indicators ({', '.join(columns)}); add it to "
        f"'indicators' or name a requested one",
        field=where,
    )


# --- resolving the request ----------------------------------------------------------------------------------


def _date_arrays(dates: Any, calendar: str | None) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """year, month, day arrays and the calendar of a DateTable-like object (attributes or mapping)."""

    def get(name: str) -> Any:
        return dates.get(name) if isinstance(dates, Mapping) else getattr(dates, name, None)

    year, month, day = (np.asarray(get(n), dtype=np.int64) for n in ("year", "month", "day"))
    calendar = calendar or get("calendar") or seasons.infer_calendar(month, day, year)
    return year, month, day, str(calendar)


def _request_features(request: IndicatorRequest) -> tuple[list[str], list[dict]]:
    """Ids (for messages) and properties of the request's features."""
    collection = request.features
    items = collection.features if hasattr(collection, "features") else [collection]
    ids: list[str] = []
    props: list[dict] = []
    for i, feature in enumerate(items):
        p = feature.properties or {}
        if request.id_property and request.id_property in p:
            ids.append(str(p[request.id_property]))
        else:
            ids.append(str(feature.id) if feature.id is not None else f"#{i}")
        props.append(p)
    return ids, props


def _served_span(
    groups: Sequence[seasons.SeasonGroup], year: np.ndarray, month: np.ndarray, day: np.ndarray, calendar: str
) -> tuple[int, int, str]:
    """First and last season-year that every season group serves whole, and a description of the seasons."""
    first, last = -(10**9), 10**9
    names = []
    for group in groups:
        served = seasons.servable_season_years(year, month, day, calendar, group.season)
        names.append(group.season.label)
        if served.years.size == 0:
            raise OutOfRangeError(
                f"the data ({_date_text(year, month, day)}) hold no whole season-year of season "
                f"{group.season.label}",
                field="season",
            )
        first, last = max(first, int(served.years[0])), min(last, int(served.years[-1]))
    label = names[0] if len(names) == 1 else "the features' seasons (" + "; ".join(names) + ")"
    if first > last:
        raise OutOfRangeError(f"no season-year is served whole for all of {label}", field="season")
    return first, last, label


def _date_text(year: np.ndarray, month: np.ndarray, day: np.ndarray) -> str:
    """'1980-01-01 to 2027-12-31'."""
    if year.size == 0:
        return "no dates"
    return f"{year[0]:04d}-{month[0]:02d}-{day[0]:02d} to {year[-1]:04d}-{month[-1]:02d}-{day[-1]:02d}"


def resolve_request(
    request: IndicatorRequest,
    dates: Any,
    calendar: str | None = None,
    variables: Sequence[str] | None = None,
) -> IndicatorRequest:
    """The request with every default filled from the data and every name checked against the catalog.

    ``dates`` has int arrays ``year``, ``month``, ``day`` (and ``dayofyear``) for every time step; the
    calendar is ``calendar``, else ``dates.calendar``, else inferred from the dates (pass the store's).
    ``variables`` are the daily variables the dataset holds (default: tmax, tmin and prcp).
    Fills: indicators (those of the default set that the variables allow), every indicator's parameters,
    the baseline (the first 30 season-years served whole, all of them if the data are shorter, at least 3),
    years (every season-year that the baseline and the lags allow), the default pair (prcp_total with
    tmean when both are requested and ``pairs`` was not given) and max_missing_share (0.10).
    Raises OutOfRangeError for a baseline or years outside the data, UnknownIndicatorError and RequestError
    for unknown names or parameters, RequestError for an indicator whose variable the dataset lacks.
    Resolving a resolved request changes nothing.
    """
    year, month, day, calendar = _date_arrays(dates, calendar)
    ids, props = _request_features(request)
    groups = seasons.season_groups(request.season, ids, props)
    return _resolve(request, groups, year, month, day, calendar, variables)


def _indicator_specs(request: IndicatorRequest, variables: Sequence[str] | None) -> list[str | IndicatorSpec]:
    """The requested indicators, or the defaults the variables allow; each checked against the variables."""
    held = tuple(VARIABLES if variables is None else variables)
    if request.indicators is None:
        specs: list[str | IndicatorSpec] = [
            n for n in DEFAULT_INDICATORS if set(get_indicator(n).variables) <= set(held)
        ]
        if not specs:
            raise RequestError(
                f"the dataset holds {', '.join(held) or 'no daily variable'}, and no default indicator can be "
                f"computed from it; name indicators that use only these variables (GET /v1/indicators)",
                field="indicators",
            )
        return specs
    specs = list(request.indicators)
    for i, spec in enumerate(specs):
        name = spec if isinstance(spec, str) else spec.name
        indicator = get_indicator(name)
        lacking = [v for v in indicator.variables if v not in held]
        if lacking:
            raise RequestError(
                f"indicators[{i}]: {name!r} needs daily {' and '.join(lacking)}, which the dataset does not hold "
                f"(it holds {', '.join(held) or 'no daily variable'}); drop {name!r} or choose a dataset with "
                f"{' and '.join(lacking)}",
                field=f"indicators[{i}]",
                pointer=f"/indicators/{i}",
                indicator=name,
                variable=lacking[0],
            )
    return specs


def _resolve(
    request: IndicatorRequest,
    groups: Sequence[seasons.SeasonGroup],
    year: np.ndarray,
    month: np.ndarray,
    day: np.ndarray,
    calendar: str,
    variables: Sequence[str] | None = None,
) -> IndicatorRequest:
    """resolve_request once the season groups are known."""
    specs = _indicator_specs(request, variables)
    if not specs:
        raise RequestError(
            "'indicators' is empty; name at least one indicator or leave it out", field="indicators"
        )
    planned = plan_indicators(specs)
    indicators: list[str | IndicatorSpec] = [
        p.indicator.name if not p.params else IndicatorSpec(name=p.indicator.name, **p.params)
        for p in planned
    ]
    first, last, season_label = _served_span(groups, year, month, day, calendar)
    span = f"{first}-{last}"
    baseline = request.baseline
    if baseline is None:
        end = min(first + DEFAULT_BASELINE_SEASONS - 1, last)
        if end - first + 1 < baselines.MIN_BASELINE_SEASONS:
            raise OutOfRangeError(
                f"the data serve only season-years {span} of season {season_label}; a baseline needs at least "
                f"{baselines.MIN_BASELINE_SEASONS}",
                field="baseline",
            )
        baseline = FixedBaseline(start=first, end=end)
    if isinstance(baseline, FixedBaseline):
        if baseline.start < first or baseline.end > last:
            raise OutOfRangeError(
                f"baseline {baseline.start}-{baseline.end} is outside the season-years the data serve for season "
                f"{season_label} ({span}); choose a baseline within {span}",
                field="baseline",
            )
        reach = 0
    else:
        reach = baseline.trailing
        if first + reach > last:
            raise OutOfRangeError(
                f"a trailing baseline of {reach} season-years leaves no season-year to serve: the data serve "
                f"{span} for season {season_label}; use a shorter trailing window",
                field="baseline.trailing",
            )
    deepest = max([*request.lags, *(b for _, b in request.sequences)])
    first_served = first + reach + deepest
    why = f"lag {deepest}" + (f" and a trailing baseline of {reach}" if reach else "")
    if first_served > last:
        raise OutOfRangeError(
            f"with {why} no season-year can be served: the data serve {span} for season {season_label}",
            field="lags",
        )
    years = request.years
    if years is None:
        years = YearSpan(start=first_served, end=last)
    elif years.start < first_served:
        raise OutOfRangeError(
            f"years {years.start}-{years.end}: season-year {years.start} with {why} needs season-year "
            f"{years.start - deepest - reach}, before the first season-year of the data ({first}); the first year "
            f"that can be served is {first_served}",
            field="years.start",
        )
    elif years.end > last:
        raise OutOfRangeError(
            f"years {years.start}-{years.end}: the last season-year of season {season_label} in the data is {last}",
            field="years.end",
        )
    columns = [p.column for p in planned]
    pairs = list(request.pairs)
    if "pairs" not in request.model_fields_set and not pairs:
        try:
            pairs = [(_reference(DEFAULT_PAIR[0], planned, ""), _reference(DEFAULT_PAIR[1], planned, ""))]
        except RequestError:
            pairs = []
    resolved_pairs: list[tuple[str, str]] = []
    for i, (a, b) in enumerate(pairs):
        ra = _reference(a, planned, f"pairs[{i}][0]")
        rb = _reference(b, planned, f"pairs[{i}][1]")
        if ra == rb:
            raise RequestError(
                f"pairs[{i}] pairs {a!r} with itself; pair two different indicators", field=f"pairs[{i}]"
            )
        resolved_pairs.append((ra, rb))
    spells = [
        Spell(
            name=s.name,
            window=s.window,
            when=[
                c.model_copy(
                    update={"indicator": _reference(c.indicator, planned, f"spells[{i}].when[{j}].indicator")}
                )
                for j, c in enumerate(s.when)
            ],
        )
        for i, s in enumerate(request.spells)
    ]
    resolved = request.model_copy(
        update={
            "indicators": indicators,
            "baseline": baseline,
            "years": years,
            "pairs": resolved_pairs,
            "spells": spells,
            "max_missing_share": (
                seasons.DEFAULT_MAX_MISSING_SHARE
                if request.max_missing_share is None
                else request.max_missing_share
            ),
        }
    )
    _check_columns(output_columns(resolved, planned), columns)
    return resolved


def _check_columns(all_columns: Sequence[str], indicator_columns: Sequence[str]) -> None:
    """Every output column name must be unique (a spell or indicator name could shadow another column)."""
    seen: set[str] = set()
    for c in all_columns:
        if c in seen:
            raise RequestError(
                f"the output would have two columns named {c!r}; rename the spell or indicator that makes it "
                f"(indicator columns: {', '.join(indicator_columns)})",
                field="spells",
            )
        seen.add(c)


# --- the columns --------------------------------------------------------------------------------------------


def _pair_column(a: str, b: str) -> str:
    return f"{a}_and_{b}"


def _sequence_suffix(a: int, b: int) -> str:
    return f"seq{a}_{b}"


def indicator_columns(p: PlannedIndicator, request: IndicatorRequest) -> list[str]:
    """The wide-layout columns of one indicator, in order."""
    c = p.column
    cols = [c, f"{c}_z", f"{c}_class", f"{c}_label"]
    if p.indicator.percent_of_normal:
        cols.append(f"{c}_pct_normal")
    if p.indicator.standardized:
        cols.append(f"{c}_category")
    for k in request.lags:
        if k > 0:
            cols += [f"{c}_z_lag{k}", f"{c}_class_lag{k}"]
            if request.lag_values:
                cols.append(f"{c}_lag{k}")
    cols += [f"{c}_{_sequence_suffix(a, b)}" for a, b in request.sequences]
    return cols


def output_columns(request: IndicatorRequest, planned: Sequence[PlannedIndicator] | None = None) -> list[str]:
    """Every wide-layout column of a resolved request, in order."""
    planned = planned if planned is not None else plan_indicators(request.indicators or DEFAULT_INDICATORS)
    cols = ["feature_id", "year"]
    for p in planned:
        cols += indicator_columns(p, request)
    cols += [_pair_column(a, b) for a, b in request.pairs]
    for s in request.spells:
        cols += [f"{s.name}_run", f"{s.name}_count"]
    cols += ["season_complete", "notes"]
    return cols


# --- computing ----------------------------------------------------------------------------------------------


@dataclass
class RawValues:
    """Indicator values of some rows (features, or grid cells) over a season group's season-years.

    Everything a season decides: values after blanking incomplete seasons, the partial_seasons policy and
    the finite check; the share of days present per indicator (and, under "", for the row's union of
    variables); and per indicator the (row, year) masks of warning codes that concern a value
    (incomplete_season, partial_season, at_clip and those an indicator raises itself).
    """

    years: np.ndarray  # (year,) season-years of the cube
    values: dict[str, np.ndarray]  # column -> (row, year) float64
    present: dict[str, np.ndarray]  # column (or "" for all requested variables) -> (row, year) share of days
    flags: dict[str, dict[str, np.ndarray]]  # column -> code -> (row, year) bool


def _variables_of(planned: Sequence[PlannedIndicator]) -> tuple[str, ...]:
    """The union of the planned indicators' variables, in the order of VARIABLES."""
    return seasons.variable_set({v for p in planned for v in p.indicator.variables})


def raw_values(
    daily: DailySeries,
    rows: np.ndarray,
    season: seasons.SeasonDefinition,
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    buffers: dict[str, np.ndarray] | None = None,
) -> RawValues:
    """Each planned indicator's values for the rows ``rows`` of ``daily`` over the season's season-years.

    Each indicator sees only its own variables; a season incomplete for them is null (incomplete_season);
    a partial one follows request.partial_seasons for sums and counts (partial_season); a value on the
    indicator's bounds is flagged at_clip.
    """
    if request.baseline is None or request.max_missing_share is None:
        raise RequestError("the request is not resolved; call resolve_request first", field="baseline")
    cut = seasons.cut_season(
        daily,
        season,
        rows,
        max_missing_share=request.max_missing_share,
        buffers=buffers,
        variables=_variables_of(planned),
    )
    baseline = baselines.make_baseline(cut.cube.years, request.baseline)
    policy = request.partial_seasons
    values: dict[str, np.ndarray] = {}
    present: dict[str, np.ndarray] = {"": cut.present_share(_variables_of(planned))}
    flags: dict[str, dict[str, np.ndarray]] = {}
    expected = (cut.cube.feature_index.size, cut.cube.years.size)
    for p in planned:
        names = p.indicator.variables
        result = p.indicator.compute(cut.cube_for(names, policy), baseline, p.params)
        own = dict(result.flags) if isinstance(result, IndicatorValues) else {}
        value = np.array(result.values if isinstance(result, IndicatorValues) else result, dtype=np.float64)
        if value.shape != expected:
            raise RuntimeError(
                f"indicator {p.indicator.name!r} returned shape {value.shape}, expected {expected}"
            )
        complete = cut.complete(names)
        value[~np.isfinite(value) | ~complete] = np.nan
        if p.indicator.reduction in SCALED_REDUCTIONS:
            factor = cut.total_factor(names, policy)
            if factor is not None:
                value *= factor
        marks = {code: np.asarray(mask, dtype=bool) & complete for code, mask in own.items()}
        marks["incomplete_season"] = ~complete
        marks["partial_season"] = cut.partial(names)
        if p.indicator.bounds is not None:
            low, high = p.indicator.bounds
            with np.errstate(invalid="ignore"):
                marks["at_clip"] = (value <= low) | (value >= high)
        values[p.column] = value
        present[p.column] = cut.present_share(names)
        flags[p.column] = marks
    return RawValues(years=cut.cube.years, values=values, present=present, flags=flags)


def concat_raw(parts: Sequence[RawValues]) -> RawValues:
    """Raw values of consecutive row blocks of one season group, joined along the rows."""
    if len(parts) == 1:
        return parts[0]
    first = parts[0]
    return RawValues(
        years=first.years,
        values={c: np.concatenate([p.values[c] for p in parts]) for c in first.values},
        present={c: np.concatenate([p.present[c] for p in parts]) for c in first.present},
        flags={
            c: {code: np.concatenate([p.flags[c][code] for p in parts]) for code in first.flags[c]}
            for c in first.flags
        },
    )


class _Notes:
    """Warning codes of every (feature, year) of the output, per row and per indicator column, as bit sets."""

    def __init__(self, n_feature: int, n_year: int, columns: Sequence[str]) -> None:
        self.bit = {code: np.int64(1) << i for i, code in enumerate(WARNING_CODES)}
        self.row = np.zeros((n_feature, n_year), dtype=np.int64)
        self.column = {c: np.zeros((n_feature, n_year), dtype=np.int64) for c in columns}

    def mark(self, code: str, rows: np.ndarray | slice, mask: np.ndarray, column: str | None = None) -> None:
        """Add ``code`` where ``mask`` (rows, year) holds, to the row or to one indicator column."""
        target = self.row if column is None else self.column[column]
        target[rows] |= np.where(mask, self.bit[code], np.int64(0))

    def texts(self, bits: np.ndarray) -> np.ndarray:
        """The notes text (codes sorted, space-joined) of each bit set, as an object array."""
        unique, inverse = np.unique(bits.ravel(), return_inverse=True)
        words = []
        for value in unique.tolist():
            words.append(notes_text([code for code, b in self.bit.items() if value & int(b)]))
        return np.asarray(words, dtype=object)[inverse].reshape(bits.shape)


def _per_feature_warnings(
    code: str,
    mask: np.ndarray,
    feature_ids: Sequence[str],
    years: np.ndarray,
    column: str | None,
    text: str,
    missing: np.ndarray | None = None,
) -> list[dict[str, Any]]:
    """One warning per feature with some True in ``mask`` (feature, year): ``text`` and the years it concerns.

    ``text`` names the years where it says ``{years}`` (else they follow it); with ``missing`` (the share of
    days missing, (feature, year)) each year carries its share.
    """
    out = []
    for f in np.flatnonzero(mask.any(axis=1)):
        cols = np.flatnonzero(mask[f])
        when = [int(y) for y in years[cols]]
        if missing is None:
            listed = baselines._year_ranges(when)
        else:
            listed = ", ".join(f"{y} ({missing[f, c]:.1%} missing)" for y, c in zip(when, cols, strict=True))
        reason = text.format(years=listed) if "{years}" in text else f"{text}: {listed}"
        out.append(
            warning(
                code,
                reason,
                feature_id=feature_ids[int(f)],
                year=when[0] if len(when) == 1 else None,
                indicator=column,
            )
        )
    return out


_FLAG_TEXT = {
    "incomplete_season": "more than {share:.0%} of the season's days are missing; values left null",
    "partial_season": "some of the season's days are missing (at most {share:.0%}); {policy}",
    "at_clip": "the value lies at the index's bound {bounds}; the true value is beyond it",
}
_POLICY_TEXT = {
    "scale": "sums and counts are scaled to the whole season (x expected days / days present)",
    "null": "sums and counts are left null",
    "as_is": "sums and counts are over the days present only, not scaled",
}


def _flag_warnings(
    raw: RawValues,
    out_cols: np.ndarray,
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    season_label: str,
    feature_ids: Sequence[str],
    rows: np.ndarray,
    notes: _Notes,
    suffix: str = "",
) -> list[dict[str, Any]]:
    """Warnings and notes of the raw values' flags at the output years ``out_cols``.

    A season flag (incomplete_season, partial_season) that holds for every requested indicator of a row is
    one warning naming no indicator; otherwise one per indicator. ``suffix`` qualifies the text (cells).
    """
    years = raw.years[out_cols]
    warnings: list[dict[str, Any]] = []
    ids = [feature_ids[int(r)] for r in rows]
    codes = sorted({code for marks in raw.flags.values() for code in marks}, key=list(WARNING_CODES).index)
    for code in codes:
        masks = {c: raw.flags[c][code][:, out_cols] for c in raw.flags if code in raw.flags[c]}
        shared = None
        if code in ("incomplete_season", "partial_season") and len(masks) == len(planned):
            shared = np.logical_and.reduce(list(masks.values()))
        template = _FLAG_TEXT.get(code, WARNING_CODES[code])
        text = template.format(
            share=request.max_missing_share,
            policy=_POLICY_TEXT[request.partial_seasons],
            bounds="",
        )
        shares = code in ("incomplete_season", "partial_season")
        if shared is not None and shared.any():
            notes.mark(code, rows, shared)
            missing = 1.0 - raw.present[""][:, out_cols] if shares else None
            warnings += _per_feature_warnings(
                code, shared, ids, years, None, f"season {season_label}: {text}{suffix}", missing
            )
        for p in planned:
            if p.column not in masks:
                continue
            own = masks[p.column] if shared is None else masks[p.column] & ~shared
            if not own.any():
                continue
            notes.mark(code, rows, own, p.column)
            bounds = p.indicator.bounds
            detail = template.format(
                share=request.max_missing_share,
                policy=_POLICY_TEXT[request.partial_seasons],
                bounds=f"({bounds[0]:g} or {bounds[1]:g})" if bounds else "",
            )
            missing = 1.0 - raw.present[p.column][:, out_cols] if shares else None
            warnings += _per_feature_warnings(
                code,
                own,
                ids,
                years,
                p.column,
                f"{p.column}, season {season_label}: {detail}{suffix}",
                missing,
            )
    return warnings


@dataclass
class _Block:
    """Results of one indicator over a season group's cube years."""

    value: np.ndarray
    z: np.ndarray
    cls: np.ndarray  # float class numbers, NaN null
    codes: np.ndarray  # 0-based label codes, -1 null
    pct: np.ndarray | None
    category: np.ndarray | None


def _derive_block(
    p: PlannedIndicator,
    value: np.ndarray,
    baseline: Baseline,
    request: IndicatorRequest,
    ids: Sequence[str],
    rows: np.ndarray,
    out_cols: np.ndarray,
    years: np.ndarray,
    notes: _Notes,
    warnings: list[dict[str, Any]],
) -> _Block:
    """z, class and the rest of one indicator from its values (feature, cube year)."""
    edges = request.classes.edges
    pct = None
    if p.indicator.standardized:
        value = baselines.round_z(value)  # the value is its own z: both rounded alike, so spi_z == spi
        anomaly = baselines.standardized_anomaly(value)
    else:
        stats = baselines.baseline_statistics(value, baseline)
        anomaly = baselines.anomaly(value, stats)
        reason = anomaly.reason[:, out_cols]
        notes.mark("few_baseline_seasons", rows, reason == baselines.FEW_SEASONS, p.column)
        notes.mark("no_spread", rows, reason == baselines.NO_SPREAD, p.column)
        warnings += baselines.anomaly_warnings(
            reason,
            _select(stats, out_cols),
            feature_ids=ids,
            years=years[out_cols],
            indicator=p.column,
            baseline_label=baseline.label,
        )
        if p.indicator.percent_of_normal:
            pct = baselines.percent_of_normal(value, stats)
    cls = classes.classify(anomaly.z, edges)
    lowest, _ = classes.class_range(edges)
    category = classes.wmo_spi_category(anomaly.z) if p.indicator.standardized else None
    return _Block(value, anomaly.z, cls, classes.category_codes(cls, lowest), pct, category)


def _select(stats: baselines.BaselineStatistics, cols: np.ndarray) -> baselines.BaselineStatistics:
    """Baseline statistics at the season-year columns ``cols``."""
    return baselines.BaselineStatistics(
        stats.mean[:, cols], stats.sd[:, cols], stats.count[:, cols], stats.flat[:, cols]
    )


_FLOAT, _INT, _CATEGORY = "float", "int", "category"


@dataclass(frozen=True)
class _ColumnKind:
    """How a column is stored: float64, nullable Int64, or categorical codes over fixed categories."""

    kind: str
    categories: tuple[str, ...] = ()
    ordered: bool = False


def _column_kinds(planned: Sequence[PlannedIndicator], request: IndicatorRequest) -> dict[str, _ColumnKind]:
    """The storage kind of every computed wide column (all but feature_id, year and notes), in output order."""
    edges = request.classes.edges
    labels = {p.column: list(classes.class_labels(p.indicator.family, edges).values()) for p in planned}
    by_column = {p.column: p for p in planned}
    kinds: dict[str, _ColumnKind] = {}
    for p in planned:
        c = p.column
        kinds[c] = _ColumnKind(_FLOAT)
        kinds[f"{c}_z"] = _ColumnKind(_FLOAT)
        kinds[f"{c}_class"] = _ColumnKind(_INT)
        kinds[f"{c}_label"] = _ColumnKind(_CATEGORY, tuple(labels[c]), ordered=True)
        if p.indicator.percent_of_normal:
            kinds[f"{c}_pct_normal"] = _ColumnKind(_FLOAT)
        if p.indicator.standardized:
            kinds[f"{c}_category"] = _ColumnKind(_CATEGORY, classes.WMO_SPI_CATEGORIES, ordered=True)
        for k in request.lags:
            if k > 0:
                kinds[f"{c}_z_lag{k}"] = _ColumnKind(_FLOAT)
                kinds[f"{c}_class_lag{k}"] = _ColumnKind(_INT)
                if request.lag_values:
                    kinds[f"{c}_lag{k}"] = _ColumnKind(_FLOAT)
        for a, b in request.sequences:
            kinds[f"{c}_{_sequence_suffix(a, b)}"] = _ColumnKind(
                _CATEGORY, tuple(classes.joint_categories(labels[c], labels[c], "after"))
            )
    for left, right in request.pairs:
        terms = []
        for ref in (left, right):
            fam = by_column[ref].indicator.family
            terms.append([classes.pair_term(label, ref, fam) for label in labels[ref]])
        kinds[_pair_column(left, right)] = _ColumnKind(
            _CATEGORY, tuple(classes.joint_categories(terms[0], terms[1], "and"))
        )
    for s in request.spells:
        kinds[f"{s.name}_run"] = _ColumnKind(_INT)
        kinds[f"{s.name}_count"] = _ColumnKind(_INT)
    kinds["season_complete"] = _ColumnKind(_FLOAT)
    return kinds


def derive_columns(
    raw: RawValues,
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    feature_ids: Sequence[str],
    rows: np.ndarray,
    out_cols: np.ndarray,
    notes: _Notes,
    warnings: list[dict[str, Any]],
) -> dict[str, np.ndarray]:
    """Every computed column of the features ``rows`` at the output season-years, (feature, year) arrays.

    ``raw`` holds the features' values over the season group's cube years (rows in the order of ``rows``);
    z, classes, percent of normal, categories, lags, sequences, pairs and spells are computed here.
    """
    if request.baseline is None:
        raise RequestError(
            "the request is not resolved (no baseline); call resolve_request first", field="baseline"
        )
    baseline = baselines.make_baseline(raw.years, request.baseline)
    ids = [feature_ids[int(r)] for r in rows]
    n_class = len(classes.class_labels("count", request.classes.edges))
    out: dict[str, np.ndarray] = {}
    blocks: dict[str, _Block] = {}
    for p in planned:
        block = _derive_block(
            p, raw.values[p.column], baseline, request, ids, rows, out_cols, raw.years, notes, warnings
        )
        blocks[p.column] = block
        c = p.column
        out[c] = block.value[:, out_cols]
        out[f"{c}_z"] = block.z[:, out_cols]
        out[f"{c}_class"] = block.cls[:, out_cols]
        out[f"{c}_label"] = block.codes[:, out_cols]
        if block.pct is not None:
            out[f"{c}_pct_normal"] = block.pct[:, out_cols]
        if block.category is not None:
            out[f"{c}_category"] = block.category[:, out_cols]
        for k in request.lags:
            if k > 0:
                out[f"{c}_z_lag{k}"] = sequences.lag(block.z, k)[:, out_cols]
                out[f"{c}_class_lag{k}"] = sequences.lag(block.cls, k)[:, out_cols]
                if request.lag_values:
                    out[f"{c}_lag{k}"] = sequences.lag(block.value, k)[:, out_cols]
        for a, b in request.sequences:
            codes = classes.joint_codes(
                sequences.lag_codes(block.codes, a), sequences.lag_codes(block.codes, b), n_class
            )
            out[f"{c}_{_sequence_suffix(a, b)}"] = codes[:, out_cols]
    for left, right in request.pairs:
        joint = classes.joint_codes(blocks[left].codes, blocks[right].codes, n_class)
        out[_pair_column(left, right)] = joint[:, out_cols]
    first_full = baselines.first_full_year(raw.years, request.baseline)
    for spell in request.spells:
        condition = _spell_condition(spell.when, blocks)
        out[f"{spell.name}_run"] = sequences.spell_run(condition)[:, out_cols]
        count = sequences.spell_count(condition, spell.window)[:, out_cols]
        out[f"{spell.name}_count"] = count
        known = _spell_window_known(raw.years, out_cols, spell.window, first_full)
        unknown = np.isnan(count) & known[None, :]
        notes.mark("spell_unknown", rows, unknown)
        warnings += _unknown_spell_warnings(spell, unknown, raw.years[out_cols], ids)
    out["season_complete"] = raw.present[""][:, out_cols]
    return out


def _spell_window_known(
    years: np.ndarray, out_cols: np.ndarray, window: int, first_full: int | None
) -> np.ndarray:
    """Per output year: whether the spell's window lies within the season-years with the whole baseline."""
    if first_full is None:
        return np.zeros(out_cols.size, dtype=bool)
    return years[out_cols] - window + 1 >= first_full


def _spell_condition(when: Sequence[SpellCondition], blocks: Mapping[str, _Block]) -> np.ndarray:
    """1/0/NaN (met, not met, unknown) of a spell's conditions over the cube years."""
    return sequences.condition_holds(
        [blocks[c.indicator].cls for c in when],
        [blocks[c.indicator].z for c in when],
        [(c.class_min, c.class_max, c.z_min, c.z_max) for c in when],
    )


def _unknown_spell_warnings(
    spell: Spell, unknown: np.ndarray, years: np.ndarray, ids: Sequence[str]
) -> list[dict[str, Any]]:
    """Per feature, the requested years whose spell count is null because a season in its window is unknown.

    Years whose window reaches before the first season-year with the whole baseline are left to
    :func:`_spell_warnings` (one warning for all communities).
    """
    return _per_feature_warnings(
        "spell_unknown",
        unknown,
        ids,
        years,
        None,
        f"spell {spell.name!r}: {spell.name}_count left null for {{years}}: among the last {spell.window} "
        f"seasons is one whose class or z is null (see the other warnings of this community)",
    )


def _spell_warnings(
    request: IndicatorRequest, first_full: int | None, years: np.ndarray, notes: _Notes
) -> list[dict[str, Any]]:
    """A warning per spell whose count window reaches before the first season-year with the whole baseline.

    With a fixed baseline that is the first season-year of the data; with a trailing baseline of N, the
    N-th after it (the seasons before have no baseline of N seasons, so their z is null).
    """
    warnings = []
    for spell in request.spells:
        if first_full is None:
            short = np.ones(years.size, dtype=bool)
            where = "any season-year with the whole baseline (the data hold none)"
        else:
            short = years - spell.window + 1 < first_full
            where = f"the first season-year with the whole baseline ({first_full})"
        if not short.any():
            continue
        notes.mark("spell_before_baseline", slice(None), np.broadcast_to(short, notes.row.shape))
        when = [int(y) for y in years[short]]
        warnings.append(
            warning(
                "spell_before_baseline",
                f"spell {spell.name!r}: {spell.name}_count needs the {spell.window} seasons up to each "
                f"season-year, each with its whole baseline; left null for {baselines._year_ranges(when)}, "
                f"whose window reaches before {where}",
                year=when[0] if len(when) == 1 else None,
            )
        )
    return warnings


def _fit_warnings(
    planned: Sequence[PlannedIndicator], request: IndicatorRequest, notes: _Notes
) -> list[dict[str, Any]]:
    """short_baseline_fit: one warning per distribution-fitted or percentile indicator on < 30 baseline seasons."""
    spec = request.baseline
    length = spec.end - spec.start + 1 if isinstance(spec, FixedBaseline) else spec.trailing  # type: ignore[union-attr]
    label = f"{spec.start}-{spec.end}" if isinstance(spec, FixedBaseline) else f"trailing {length}"  # type: ignore[union-attr]
    warnings = []
    for p in planned:
        if not p.indicator.uses_baseline or length >= MIN_FIT_SEASONS:
            continue
        notes.mark("short_baseline_fit", slice(None), np.ones(notes.row.shape, dtype=bool), p.column)
        warnings.append(
            warning(
                "short_baseline_fit",
                f"{p.column}: fitted on baseline {label}, {length} seasons, fewer than the {MIN_FIT_SEASONS} that "
                f"WMO-No. 1090 asks for; its tails (values beyond about +-1.5, percentile thresholds) are less "
                f"reliable. Give a baseline of at least {MIN_FIT_SEASONS} seasons where the data allow it",
                indicator=p.column,
            )
        )
    return warnings


def raw_values_in_blocks(
    daily: DailySeries,
    rows: np.ndarray,
    season: seasons.SeasonDefinition,
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
) -> RawValues:
    """:func:`raw_values` of ``rows`` computed in blocks of about FEATURE_BLOCK_ELEMENTS daily values each.

    Every row is independent, and blocks keep the cubes and the indicators' temporaries small enough to
    stay fast; the cube arrays are reused block after block.
    """
    block_size = max(1, FEATURE_BLOCK_ELEMENTS // max(1, daily.year.size))
    buffers: dict[str, np.ndarray] = {}
    starts = range(0, max(rows.size, 1), block_size)
    return concat_raw(
        [raw_values(daily, rows[s : s + block_size], season, planned, request, buffers) for s in starts]
    )


def compute_table(
    daily: DailySeries, feature_ids: list[str], properties: list[dict], request: IndicatorRequest
) -> IndicatorTable:
    """One row per (feature_id, year) of the request's years: values, z, classes, lags, pairs, spells, notes.

    ``daily`` is (feature, time) with rows in the order of ``feature_ids``; ``properties`` are the features'
    properties (read only for a property season). The request is resolved against ``daily``'s dates and
    variables first (a resolved request stays as it is). Vectorised over features: loops run over
    indicators, season groups and season-years only. Warnings (dicts with code, feature_id, year,
    indicator, reason; see service/warning_codes.py) say why a value is null or flagged, and the ``notes``
    column carries each row's codes. ``layout="long"`` gives one row per (feature_id, year, indicator).
    This is aggregation "series": every indicator on each feature's own daily series.
    """
    n_feature = len(feature_ids)
    if n_feature != daily.n_features:
        raise RequestError(f"{n_feature} feature ids for a daily series of {daily.n_features} features")
    groups = seasons.season_groups(request.season, feature_ids, properties)
    request = _resolve(request, groups, daily.year, daily.month, daily.day, daily.calendar, daily.variables)
    planned = plan_indicators(request.indicators or [])
    raws = [raw_values_in_blocks(daily, g.feature_index, g.season, planned, request) for g in groups]
    return _assemble(request, planned, groups, raws, feature_ids, None)


def cell_groups(
    feature_ids: Sequence[str], properties: Sequence[dict], request: IndicatorRequest
) -> list[seasons.SeasonGroup]:
    """The season groups of the features of a resolved request (one unless the season is a property)."""
    return seasons.season_groups(request.season, list(feature_ids), list(properties))


def compute_cell_values(
    daily: DailySeries, request: IndicatorRequest, groups: Sequence[seasons.SeasonGroup]
) -> list[RawValues]:
    """Aggregation "cells", first step: every row (grid cell) of ``daily``'s raw values, per season group.

    ``request`` is resolved; the rows' values under each group's season, in the order of ``groups``.
    """
    planned = plan_indicators(request.indicators or [])
    rows = np.arange(daily.n_features, dtype=np.int64)
    return [raw_values_in_blocks(daily, rows, g.season, planned, request) for g in groups]


def compute_table_from_cells(
    cell_values: Sequence[RawValues],
    weights: sparse.csr_matrix,
    feature_ids: list[str],
    properties: list[dict],
    request: IndicatorRequest,
) -> IndicatorTable:
    """Aggregation "cells", second step: the table of features whose values are means of their cells'.

    ``cell_values`` are :func:`compute_cell_values` of the cells (joined over cell batches), one per season
    group of :func:`cell_groups`; ``weights`` is (feature, cell) over the same cells, in the same order.
    Each feature's raw value is the weighted mean of its cells' (:func:`combine_cells`); z, classes, lags
    and spells are computed on that mean, as for aggregation "series".
    """
    return compute_table_from_grid_cells([(cell_values, weights)], feature_ids, properties, request)


def compute_table_from_grid_cells(
    parts: Sequence[tuple[Sequence[RawValues], sparse.csr_matrix]],
    feature_ids: list[str],
    properties: list[dict],
    request: IndicatorRequest,
) -> IndicatorTable:
    """:func:`compute_table_from_cells` of a dataset with several grids: one part per grid, each the cell
    values of the request's indicators on that grid (per season group) and the features' (feature, cell)
    weights on its cells. Each indicator's feature values are the weighted means of its own grid's cells;
    z, classes, lags, pairs and spells are then computed on the joined values as for one grid.

    ``season_complete`` (the share of days with every variable of the row) becomes the smallest of the
    grids' shares: the days each grid has are not known here, and the smallest is the share of the grid
    with most days missing (an upper bound on the share with every variable present).
    """
    groups = cell_groups(feature_ids, properties, request)
    planned = plan_indicators(request.indicators or [])
    joined: list[RawValues | None] = [None] * len(groups)
    for cell_values, weights in parts:
        if len(cell_values) != len(groups):
            raise RuntimeError(f"{len(cell_values)} sets of cell values for {len(groups)} season groups")
        if weights.shape[0] != len(feature_ids):
            raise RuntimeError(
                f"cell weights for {weights.shape[0]} features, {len(feature_ids)} feature ids"
            )
        cells = CellAggregation(weights=sparse.csr_matrix(weights))
        for g, (group, raw) in enumerate(zip(groups, cell_values, strict=True)):
            used = cells.cells_of(group.feature_index)
            subset = RawValues(
                years=raw.years,
                values={c: v[used] for c, v in raw.values.items()},
                present={c: v[used] for c, v in raw.present.items()},
                flags={c: {code: m[used] for code, m in marks.items()} for c, marks in raw.flags.items()},
            )
            combined = combine_cells(subset, cells, group.feature_index, used, request)
            joined[g] = combined if joined[g] is None else _join_raw(joined[g], combined)
    raws = [r for r in joined if r is not None]
    if len(raws) != len(groups):
        raise RuntimeError("aggregation 'cells' was given no grid")
    missing = [p.column for p in planned if p.column not in raws[0].values] if raws else []
    if missing:
        raise RuntimeError(f"no grid computed the cell values of {missing!r}")
    return _assemble(request, planned, groups, raws, feature_ids, " (in at least one of its cells)")


def _join_raw(a: RawValues, b: RawValues) -> RawValues:
    """Raw values of the same rows and season-years for two disjoint sets of indicators, joined; the shares
    of days with every variable ("") the smaller of the two."""
    if not np.array_equal(a.years, b.years):
        raise RuntimeError("raw values of different season-years cannot be joined")
    present = {**a.present, **b.present}
    present[""] = np.fmin(a.present[""], b.present[""])
    return RawValues(
        years=a.years, values={**a.values, **b.values}, present=present, flags={**a.flags, **b.flags}
    )


def _assemble(
    request: IndicatorRequest,
    planned: Sequence[PlannedIndicator],
    groups: Sequence[seasons.SeasonGroup],
    raws: Sequence[RawValues],
    feature_ids: Sequence[str],
    cell_suffix: str | None,
) -> IndicatorTable:
    """The table from each season group's raw values (one row of raw values per feature of the group)."""
    if request.years is None or request.indicators is None or request.max_missing_share is None:
        raise RuntimeError("resolve_request left a default unfilled")
    n_feature = len(feature_ids)
    kinds = _column_kinds(planned, request)
    years = np.arange(request.years.start, request.years.end + 1, dtype=np.int64)
    full: dict[str, np.ndarray] = {}
    for name, kind in kinds.items():
        if kind.kind == _CATEGORY:
            full[name] = np.full((n_feature, years.size), -1, dtype=np.int64)
        else:
            full[name] = np.full((n_feature, years.size), np.nan)
    presence = {p.column: np.full((n_feature, years.size), np.nan) for p in planned}
    notes = _Notes(n_feature, years.size, [p.column for p in planned])
    warnings: list[dict[str, Any]] = []
    first_full: int | None = None
    for group, raw in zip(groups, raws, strict=True):
        feature_rows = group.feature_index
        if not feature_rows.size:
            continue
        out_cols = np.searchsorted(raw.years, years)
        if np.any(out_cols >= raw.years.size) or np.any(raw.years[out_cols] != years):
            raise RuntimeError("a requested season-year is not in the cube although the request was resolved")
        warnings += _flag_warnings(
            raw,
            out_cols,
            planned,
            request,
            group.season.label,
            feature_ids,
            feature_rows,
            notes,
            cell_suffix or "",
        )
        group_full = baselines.first_full_year(raw.years, request.baseline)
        if group_full is not None:
            first_full = group_full if first_full is None else max(first_full, group_full)
        columns = derive_columns(raw, planned, request, feature_ids, feature_rows, out_cols, notes, warnings)
        for name, values in columns.items():
            full[name][feature_rows] = values
        for p in planned:
            presence[p.column][feature_rows] = raw.present[p.column][:, out_cols]
    warnings += _spell_warnings(request, first_full, years, notes)
    warnings += _fit_warnings(planned, request, notes)
    if request.layout == "long":
        frame = _long_frame(full, kinds, planned, request, feature_ids, years, presence, notes)
    else:
        frame = _wide_frame(full, kinds, feature_ids, years, notes)
    return IndicatorTable(frame=frame, warnings=warnings)


# --- aggregation "cells" ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CellAggregation:
    """Aggregation "cells": each feature's weights over the rows (grid cells) of the daily series.

    ``weights`` is a (feature, cell) sparse matrix of non-negative weights (area overlap, or area times a
    weight layer); a feature's value is the weighted mean of its cells' values.
    """

    weights: sparse.csr_matrix

    def cells_of(self, feature_rows: np.ndarray) -> np.ndarray:
        """The cells (rows of the daily series) that some of ``feature_rows`` weighs, ascending."""
        sub = self.weights[feature_rows]
        return np.unique(sub.indices[sub.data > 0]).astype(np.int64)


# codes whose flag a feature takes when all of its cells have it; the other codes when any cell has it
_ALL_CELLS_CODES = ("incomplete_season",)


def combine_cells(
    raw: RawValues,
    cells: CellAggregation,
    feature_rows: np.ndarray,
    cell_rows: np.ndarray,
    request: IndicatorRequest,
) -> RawValues:
    """Features' raw values as the weighted mean of their cells' raw values (rows of ``raw`` are ``cell_rows``).

    Per (feature, season-year) the mean is over the cells that have a value, their weights renormalised.
    When those cells carry less than 1 - max_missing_share of the feature's weight the value is null
    (too_few_cells); when they carry less than all of it the value is flagged partial_cells. The share of
    days present is the weighted mean of the cells'. Cell flags pass to the feature: incomplete_season when
    every cell has it, the others when any cell has it.
    """
    if request.max_missing_share is None:
        raise RuntimeError("the request is not resolved")
    matrix = cells.weights[feature_rows][:, cell_rows].tocsr().astype(np.float64)
    total = np.asarray(matrix.sum(axis=1)).ravel()
    with np.errstate(invalid="ignore", divide="ignore"):
        inverse_total = np.where(total > 0, 1.0 / np.where(total > 0, total, 1.0), np.nan)
    touches = matrix.copy()
    touches.data = (touches.data > 0).astype(np.float64)
    n_cells = np.asarray(touches.sum(axis=1)).ravel()
    values: dict[str, np.ndarray] = {}
    flags: dict[str, dict[str, np.ndarray]] = {}
    present = {c: (matrix @ share) * inverse_total[:, None] for c, share in raw.present.items()}
    for column, cell_values in raw.values.items():
        has = ~np.isnan(cell_values)
        weight_with_value = matrix @ has.astype(np.float64)
        weighted = matrix @ np.where(has, cell_values, 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = weighted / weight_with_value
            covered = weight_with_value * inverse_total[:, None]
        enough = covered >= 1.0 - request.max_missing_share - 1e-12
        some_missing = covered < 1.0 - 1e-12
        # only where a cell lacks a value that the feature's other cells have: a season null everywhere is
        # flagged by its own code (incomplete_season, no_fit, ...)
        anywhere = weight_with_value > 0
        values[column] = np.where(enough & anywhere, mean, np.nan)
        marks: dict[str, np.ndarray] = {}
        for code, mask in raw.flags[column].items():
            hits = touches @ mask.astype(np.float64)
            marks[code] = hits >= n_cells[:, None] - 0.5 if code in _ALL_CELLS_CODES else hits > 0.5
            if code in _ALL_CELLS_CODES:
                marks[code] &= n_cells[:, None] > 0
        marks["partial_cells"] = some_missing & enough & anywhere
        marks["too_few_cells"] = ~enough & anywhere
        flags[column] = marks
    return RawValues(years=raw.years, values=values, present=present, flags=flags)


def _pandas_column(values: np.ndarray, kind: _ColumnKind) -> Any:
    """A flat pandas array of the stored kind (float64, Int64 or categorical)."""
    flat = values.ravel()
    if kind.kind == _FLOAT:
        return flat.astype(np.float64)
    if kind.kind == _INT:
        mask = np.isnan(flat)
        return pd.arrays.IntegerArray(np.where(mask, 0, flat).astype(np.int64), mask)
    dtype = pd.CategoricalDtype(list(kind.categories), ordered=kind.ordered)
    return pd.Categorical.from_codes(flat, dtype=dtype)


def _id_columns(feature_ids: Sequence[str], years: np.ndarray) -> dict[str, Any]:
    """feature_id (string) and year (int64) of the (feature, year) rows, feature-major."""
    ids = np.repeat(np.asarray(feature_ids, dtype=object), years.size)
    return {
        "feature_id": pd.array(ids, dtype="string"),
        "year": np.tile(years, len(feature_ids)).astype(np.int64),
    }


def _wide_frame(
    full: Mapping[str, np.ndarray],
    kinds: Mapping[str, _ColumnKind],
    feature_ids: Sequence[str],
    years: np.ndarray,
    notes: _Notes,
) -> pd.DataFrame:
    """The wide table: one row per (feature_id, year); its notes hold the codes of all its indicators."""
    data = _id_columns(feature_ids, years)
    for name, kind in kinds.items():
        data[name] = _pandas_column(full[name], kind)
    bits = notes.row.copy()
    for column_bits in notes.column.values():
        bits |= column_bits
    data["notes"] = pd.array(notes.texts(bits).ravel(), dtype="string")
    return pd.DataFrame(data)


def _long_frame(
    full: Mapping[str, np.ndarray],
    kinds: Mapping[str, _ColumnKind],
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    feature_ids: Sequence[str],
    years: np.ndarray,
    presence: Mapping[str, np.ndarray],
    notes: _Notes,
) -> pd.DataFrame:
    """The long table: one row per (feature_id, year, indicator), shared columns repeated.

    season_complete is the share of days with the row's indicator's variables present, and notes the codes
    of the warnings of that indicator and of those naming none.
    """
    n_ind = len(planned)
    shape = (len(feature_ids), years.size, n_ind)

    def stack(suffix: str, fill: float = np.nan) -> np.ndarray:
        """The per-indicator column ``<col><suffix>`` of every indicator, (feature, year, indicator)."""
        out = np.full(shape, fill)
        for i, p in enumerate(planned):
            name = p.column + suffix
            if name in full:
                out[:, :, i] = full[name]
        return out

    def stack_category(suffix: str) -> pd.Categorical:
        """A categorical over the union of the indicators' categories, in first-seen order."""
        union: list[str] = []
        codes = np.full(shape, -1, dtype=np.int64)
        for i, p in enumerate(planned):
            name = p.column + suffix
            if name not in full:
                continue
            cats = kinds[name].categories
            index = {}
            for cat in cats:
                if cat not in union:
                    union.append(cat)
                index[cat] = union.index(cat)
            remap = np.asarray([index[c] for c in cats] + [-1], dtype=np.int64)
            codes[:, :, i] = remap[full[name]]  # -1 maps to the trailing -1
        return pd.Categorical.from_codes(codes.ravel(), categories=union)

    ids = np.repeat(np.asarray(feature_ids, dtype=object), years.size * n_ind)
    data: dict[str, Any] = {
        "feature_id": pd.array(ids, dtype="string"),
        "year": np.tile(np.repeat(years, n_ind), len(feature_ids)).astype(np.int64),
        "indicator": pd.Categorical.from_codes(
            np.tile(np.arange(n_ind), len(feature_ids) * years.size), categories=[p.column for p in planned]
        ),
        "value": stack("").ravel(),
        "z": stack("_z").ravel(),
        "class": _pandas_column(stack("_class"), _ColumnKind(_INT)),
        "label": stack_category("_label"),
        "pct_normal": stack("_pct_normal").ravel(),
        "category": pd.Categorical.from_codes(
            stack("_category", -1).astype(np.int64).ravel(),
            dtype=pd.CategoricalDtype(classes.WMO_SPI_CATEGORIES, True),
        ),
    }
    for k in request.lags:
        if k > 0:
            data[f"z_lag{k}"] = stack(f"_z_lag{k}").ravel()
            data[f"class_lag{k}"] = _pandas_column(stack(f"_class_lag{k}"), _ColumnKind(_INT))
            if request.lag_values:
                data[f"value_lag{k}"] = stack(f"_lag{k}").ravel()
    for a, b in request.sequences:
        data[_sequence_suffix(a, b)] = stack_category(f"_{_sequence_suffix(a, b)}")
    shared = [_pair_column(a, b) for a, b in request.pairs]
    shared += [f"{s.name}_{part}" for s in request.spells for part in ("run", "count")]
    for name in shared:
        values = np.repeat(full[name][:, :, None], n_ind, axis=2)
        data[name] = _pandas_column(values, kinds[name])
    complete = np.full(shape, np.nan)
    bits = np.repeat(notes.row[:, :, None], n_ind, axis=2)
    for i, p in enumerate(planned):
        complete[:, :, i] = presence[p.column]
        bits[:, :, i] |= notes.column[p.column]
    data["season_complete"] = complete.ravel()
    data["notes"] = pd.array(notes.texts(bits).ravel(), dtype="string")
    return pd.DataFrame(data)


def add_warning_notes(frame: pd.DataFrame, warnings: Sequence[Mapping[str, Any]]) -> pd.DataFrame:
    """The table with the codes of ``warnings`` added to the notes of the rows they concern, notes last.

    For warnings made after the table (geometry repairs, skipped features): a warning concerns the rows of
    its feature_id (all when None), of its year (all when None) and, in the long layout, of its indicator
    (all when None). A frame without a notes column gets one.
    """
    frame = frame.copy(deep=False)  # copy-on-write (pandas 3): the caller's frame stays as it is
    notes = (
        frame.pop("notes") if "notes" in frame.columns else pd.Series([""] * len(frame), index=frame.index)
    )
    extra: dict[int, set[str]] = {}
    whole_feature: dict[str, set[str]] = {}
    everywhere: set[str] = set()
    for w in warnings:
        code = w.get("code")
        if not code:
            continue
        if w.get("year") is None and w.get("indicator") is None:
            if w.get("feature_id") is None:
                everywhere.add(code)
            else:
                whole_feature.setdefault(str(w["feature_id"]), set()).add(code)
            continue
        mask = np.ones(len(frame), dtype=bool)
        if w.get("feature_id") is not None:
            mask &= (frame["feature_id"] == w["feature_id"]).to_numpy(dtype=bool, na_value=False)
        if w.get("year") is not None:
            mask &= (frame["year"] == w["year"]).to_numpy(dtype=bool, na_value=False)
        if w.get("indicator") is not None and "indicator" in frame.columns:
            mask &= (frame["indicator"].astype(str) == w["indicator"]).to_numpy(dtype=bool)
        for i in np.flatnonzero(mask):
            extra.setdefault(int(i), set()).add(code)
    if not (extra or whole_feature or everywhere):
        frame["notes"] = notes.astype("string")
        return frame
    texts = notes.astype(object).fillna("").tolist()
    ids = frame["feature_id"].astype(object).tolist()
    for i, text in enumerate(texts):
        codes = set(text.split()) | everywhere | whole_feature.get(str(ids[i]), set()) | extra.get(i, set())
        texts[i] = notes_text(codes)
    frame["notes"] = pd.array(texts, dtype="string")
    return frame


# --- what was computed, for provenance ----------------------------------------------------------------------

_AGGREGATION_TEXT = {
    "series": "every indicator on the community's weighted mean daily series (cells weighted by their area "
    "within the community, or area times the weight layer)",
    "cells": "every indicator on each grid cell's own daily series, then the community's weighted mean of the "
    "cell values (area, or area times the weight layer; cells without a value drop out and the weights "
    "renormalise; null when the cells with a value carry less than 1 - max_missing_share of the weight); "
    "z, classes and lags on that mean",
}


def methods_statement(request: IndicatorRequest, snap: Mapping[str, int]) -> dict[str, Any]:
    """What a resolved request computes, in words, for provenance: every method choice and convention.

    ``snap`` gives the decimals each variable's daily means were snapped to (service.indicators.base).
    """
    planned = plan_indicators(request.indicators or [])
    share = (
        seasons.DEFAULT_MAX_MISSING_SHARE if request.max_missing_share is None else request.max_missing_share
    )
    edges = ", ".join(f"{e:g}" for e in request.classes.edges)
    baseline = request.baseline
    if isinstance(baseline, FixedBaseline):
        baseline_text = (
            f"fixed, season-years {baseline.start}-{baseline.end} ({baseline.end - baseline.start + 1})"
        )
    elif baseline is not None:
        baseline_text = (
            f"trailing, the {baseline.trailing} season-years before each season-year, only where all of them "
            f"lie in the data (else no baseline: null)"
        )
    else:
        baseline_text = "unresolved"
    indicators: dict[str, Any] = {}
    for p in planned:
        entry: dict[str, Any] = {
            "definition": p.indicator.definition,
            "source": p.indicator.source,
            "parameters": dict(p.params),
            "reduction": p.indicator.reduction,
        }
        if p.indicator.details:
            entry["details"] = p.indicator.details
        if p.indicator.bounds is not None:
            entry["bounds"] = list(p.indicator.bounds)
        indicators[p.column] = entry
    statement: dict[str, Any] = {
        "daily_values": "area- or layer-weighted daily means of the cells with data, snapped to "
        + ", ".join(f"{v} {d} decimals" for v, d in snap.items())
        + " (the storage step plus three), so values exact in storage units meet thresholds exactly",
        "aggregation": f"{request.aggregation}: {_AGGREGATION_TEXT[request.aggregation]}",
        "seasons": f"a season with more than {share:.0%} of its days missing (for the "
        f"variables an indicator reads) is null; partial seasons: {request.partial_seasons} "
        f"({_POLICY_TEXT[request.partial_seasons]}); means, extremes, runs and shares use the days present",
        "baseline": baseline_text,
        "anomalies": "z = (value - baseline mean) / baseline sample sd (ddof 1), over the baseline seasons with a "
        f"value (at least {baselines.MIN_BASELINE_SEASONS}); null without spread (all values equal); z rounded "
        f"to {baselines.Z_DECIMALS} decimals; SPI and SPEI are their own z",
        "classes": f"edges {edges} (standard deviations); an edge belongs to the class farther from zero",
        "distribution_fits": f"fits and percentile thresholds on fewer than {MIN_FIT_SEASONS} baseline seasons "
        "carry the warning short_baseline_fit",
        "indicators": indicators,
    }
    if request.spells:
        statement["spells"] = (
            "a count is null when a season of its window has a null class or z (spell_unknown) or lacks its "
            "whole baseline (spell_before_baseline): never a count over fewer seasons than the window"
        )
    return statement


def catalog_conventions() -> dict[str, str]:
    """The conventions every indicator follows, with each request option and its default, for the catalog."""
    share = seasons.DEFAULT_MAX_MISSING_SHARE
    return {
        "daily_values": "a community's daily value is the weighted mean of its cells with data that day (area, or "
        "area times a weight layer), snapped to the storage step plus three decimals (1e-4 degC or mm for a 0.1 "
        "step), so values exact in storage units meet thresholds exactly",
        "thresholds": "inclusive or strict as ETCCDI writes them: wet day RR >= 1 mm, summer day TX > 25 degC, "
        "frost day TN < 0 degC, icing day TX < 0 degC, tropical night TN > 20 degC",
        "aggregation": "request option 'aggregation': 'series' (default) "
        + _AGGREGATION_TEXT["series"]
        + "; 'cells' "
        + _AGGREGATION_TEXT["cells"],
        "partial_seasons": f"a season missing more than max_missing_share (default {share:.0%}) of the days an "
        "indicator reads is null; request option 'partial_seasons' for one missing fewer: 'scale' (default) "
        + _POLICY_TEXT["scale"]
        + "; 'null' "
        + _POLICY_TEXT["null"]
        + "; 'as_is' "
        + _POLICY_TEXT["as_is"]
        + "; the baseline seasons follow the same rule; means, extremes, runs and shares use the days present",
        "baseline": f"default: the first {DEFAULT_BASELINE_SEASONS} season-years the data serve whole (all of "
        f"them when fewer, at least {baselines.MIN_BASELINE_SEASONS}; WMO-No. 1090 asks for 30 to fit SPI); a "
        "trailing baseline of N uses exactly the N season-years before each season-year, or none (null)",
        "anomalies": "z = (value - baseline mean) / baseline sample sd (ddof 1); null when the baseline has no "
        f"spread (no_spread) or fewer than {baselines.MIN_BASELINE_SEASONS} seasons with a value; z rounded to "
        f"{baselines.Z_DECIMALS} decimals before classing; SPI and SPEI are their own z",
        "classes": "edges in standard deviations (default -2, -1, 1, 2); an edge belongs to the class farther "
        "from zero (z = -1 is class -1, as in the WMO SPI table)",
        "distribution_fits": f"a fitted index or percentile threshold on fewer than {MIN_FIT_SEASONS} baseline "
        "seasons carries the warning short_baseline_fit; a value at an index's bound carries at_clip",
        "spells": "a spell count is null when a season of its window has a null class or z (spell_unknown) or "
        "lacks its whole baseline (spell_before_baseline)",
        "notes": "each row's notes column holds the codes of its warnings (sorted, space-separated)",
    }
