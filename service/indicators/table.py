"""The indicator table: a resolved request and a daily series in, one row per (feature_id, year) out.

Columns of the wide layout, in this order (the same request gives the same columns, dtypes and bytes):

- ``feature_id`` (string), ``year`` (int64: the season-year, the year in which the season ends);
- for each requested indicator, in request order, named by its column name (below):
  ``<col>`` (float64, the indicator's unit), ``<col>_z`` (float64), ``<col>_class`` (Int64),
  ``<col>_label`` (ordered categorical, our plain words), ``<col>_pct_normal`` (float64 %, precipitation
  amounts only), ``<col>_category`` (ordered categorical, the WMO SPI category; SPI and SPEI only), then for
  each lag k > 0 ``<col>_z_lag<k>`` (float64) and ``<col>_class_lag<k>`` (Int64), then for each sequence
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
value, z, class, label, pct_normal, category, z_lag<k>, class_lag<k>, seq<a>_<b>, then the pair and spell
columns and season_complete of that (feature_id, year), repeated on each of its indicator rows.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from service.errors import OutOfRangeError, RequestError
from service.indicators import baselines, classes, seasons, sequences
from service.indicators.base import Baseline, DailySeries, Indicator, get_indicator
from service.schemas import (
    FixedBaseline,
    IndicatorRequest,
    IndicatorSpec,
    Spell,
    SpellCondition,
    YearSpan,
)

DEFAULT_INDICATORS = ("prcp_total", "wet_days", "tmean", "tmax_mean", "tmin_mean", "cdd", "gdd", "edd", "spi")
DEFAULT_PAIR = ("prcp_total", "tmean")
DEFAULT_BASELINE_SEASONS = 10  # common practice: a normal of about a decade
# Features are cut and computed in blocks of about this many daily values per variable (8 M, 64 MB of
# float64): every feature's row is independent, and blocks keep the cubes and the indicators' temporaries
# small enough to stay fast (measured: 3x faster than one cube of 5,000 features x 48 years).
FEATURE_BLOCK_ELEMENTS = 8_000_000


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
    params: dict[str, float]


# --- names --------------------------------------------------------------------------------------------------


def _number_text(value: float) -> str:
    """8.0 -> '8', 29.5 -> '29p5', -1.5 -> 'm1p5' (safe in a column name)."""
    return f"{value:g}".replace("-", "m").replace(".", "p").replace("+", "")


def column_name(indicator: Indicator, params: Mapping[str, float]) -> str:
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


def resolve_request(request: IndicatorRequest, dates: Any, calendar: str | None = None) -> IndicatorRequest:
    """The request with every default filled from the data and every name checked against the catalog.

    ``dates`` has int arrays ``year``, ``month``, ``day`` (and ``dayofyear``) for every time step; the
    calendar is ``calendar``, else ``dates.calendar``, else inferred from the dates (pass the store's).
    Fills: indicators (the default set), every indicator's parameters, the baseline (the first ten
    season-years served whole, fewer if the data are shorter but at least 3), years (every season-year that
    the baseline and the lags allow), the default pair (prcp_total with tmean when both are requested and
    ``pairs`` was not given) and max_missing_share (0.10).
    Raises OutOfRangeError for a baseline or years outside the data, UnknownIndicatorError and RequestError
    for unknown names or parameters. Resolving a resolved request changes nothing.
    """
    year, month, day, calendar = _date_arrays(dates, calendar)
    ids, props = _request_features(request)
    groups = seasons.season_groups(request.season, ids, props)
    return _resolve(request, groups, year, month, day, calendar)


def _resolve(
    request: IndicatorRequest,
    groups: Sequence[seasons.SeasonGroup],
    year: np.ndarray,
    month: np.ndarray,
    day: np.ndarray,
    calendar: str,
) -> IndicatorRequest:
    """resolve_request once the season groups are known."""
    specs = list(request.indicators) if request.indicators is not None else list(DEFAULT_INDICATORS)
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
    cols.append("season_complete")
    return cols


# --- computing ----------------------------------------------------------------------------------------------


@dataclass
class _Block:
    """Results of one indicator over a season group's cube years."""

    value: np.ndarray
    z: np.ndarray
    cls: np.ndarray  # float class numbers, NaN null
    codes: np.ndarray  # 0-based label codes, -1 null
    pct: np.ndarray | None
    category: np.ndarray | None


def _compute_block(
    p: PlannedIndicator,
    cut: seasons.SeasonCut,
    baseline: Baseline,
    request: IndicatorRequest,
    feature_ids: Sequence[str],
    out_cols: np.ndarray,
    warnings: list[dict[str, Any]],
) -> _Block:
    """Value, z, class and the rest of one indicator on one season group."""
    cube = cut.cube
    raw = p.indicator.compute(cube, baseline, p.params)
    value = np.array(raw, dtype=np.float64)
    expected = (cube.feature_index.size, cube.years.size)
    if value.shape != expected:
        raise RuntimeError(
            f"indicator {p.indicator.name!r} returned shape {value.shape}, expected {expected}"
        )
    value[~np.isfinite(value) | ~cut.complete] = np.nan
    edges = request.classes.edges
    pct = None
    if p.indicator.standardized:
        anomaly = baselines.standardized_anomaly(value)
    else:
        stats = baselines.baseline_statistics(value, baseline)
        anomaly = baselines.anomaly(value, stats)
        group_ids = [feature_ids[int(i)] for i in cube.feature_index]
        warnings += baselines.anomaly_warnings(
            anomaly.reason[:, out_cols],
            _select(stats, out_cols),
            feature_ids=group_ids,
            years=cube.years[out_cols],
            indicator=p.column,
            baseline_label=baseline.label,
        )
        if p.indicator.percent_of_normal:
            pct = baselines.percent_of_normal(value, stats)
    cls = classes.classify(anomaly.z, edges)
    lowest, _ = classes.class_range(edges)
    category = classes.wmo_spi_category(value) if p.indicator.standardized else None
    return _Block(value, anomaly.z, cls, classes.category_codes(cls, lowest), pct, category)


def _select(stats: baselines.BaselineStatistics, cols: np.ndarray) -> baselines.BaselineStatistics:
    """Baseline statistics at the season-year columns ``cols``."""
    return baselines.BaselineStatistics(stats.mean[:, cols], stats.sd[:, cols], stats.count[:, cols])


_FLOAT, _INT, _CATEGORY = "float", "int", "category"


@dataclass(frozen=True)
class _ColumnKind:
    """How a column is stored: float64, nullable Int64, or categorical codes over fixed categories."""

    kind: str
    categories: tuple[str, ...] = ()
    ordered: bool = False


def _column_kinds(planned: Sequence[PlannedIndicator], request: IndicatorRequest) -> dict[str, _ColumnKind]:
    """The storage kind of every computed wide column (all but feature_id and year), in output order."""
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


def _group_columns(
    cut: seasons.SeasonCut,
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    feature_ids: Sequence[str],
    out_cols: np.ndarray,
    warnings: list[dict[str, Any]],
) -> dict[str, np.ndarray]:
    """Every computed column of one season group at the requested season-years, (feature, year) arrays."""
    if request.baseline is None:
        raise RequestError(
            "the request is not resolved (no baseline); call resolve_request first", field="baseline"
        )
    baseline = baselines.make_baseline(cut.cube.years, request.baseline)
    n_class = len(classes.class_labels("count", request.classes.edges))
    out: dict[str, np.ndarray] = {}
    blocks: dict[str, _Block] = {}
    for p in planned:
        block = _compute_block(p, cut, baseline, request, feature_ids, out_cols, warnings)
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
        for a, b in request.sequences:
            codes = classes.joint_codes(
                sequences.lag_codes(block.codes, a), sequences.lag_codes(block.codes, b), n_class
            )
            out[f"{c}_{_sequence_suffix(a, b)}"] = codes[:, out_cols]
    for left, right in request.pairs:
        joint = classes.joint_codes(blocks[left].codes, blocks[right].codes, n_class)
        out[_pair_column(left, right)] = joint[:, out_cols]
    for spell in request.spells:
        condition = _spell_condition(spell.when, blocks)
        out[f"{spell.name}_run"] = sequences.spell_run(condition)[:, out_cols]
        count = sequences.spell_count(condition, spell.window)[:, out_cols]
        out[f"{spell.name}_count"] = count
        warnings += _unknown_spell_warnings(spell, count, out_cols, cut, feature_ids)
    out["season_complete"] = cut.present_share[:, out_cols]
    return out


def _spell_condition(when: Sequence[SpellCondition], blocks: Mapping[str, _Block]) -> np.ndarray:
    """1/0/NaN (met, not met, unknown) of a spell's conditions over the cube years."""
    return sequences.condition_holds(
        [blocks[c.indicator].cls for c in when],
        [blocks[c.indicator].z for c in when],
        [(c.class_min, c.class_max, c.z_min, c.z_max) for c in when],
    )


def _unknown_spell_warnings(
    spell: Spell, count: np.ndarray, out_cols: np.ndarray, cut: seasons.SeasonCut, feature_ids: Sequence[str]
) -> list[dict[str, Any]]:
    """Per feature, the requested years whose spell count is null because a season in its window is unknown.

    Years whose window reaches before the data are left to :func:`_spell_warnings` (one warning for all).
    """
    full_window = out_cols - spell.window + 1 >= 0
    unknown = np.isnan(count) & full_window[None, :]
    warnings = []
    for f in np.flatnonzero(unknown.any(axis=1)):
        when = [int(y) for y in cut.cube.years[out_cols[unknown[f]]]]
        warnings.append(
            {
                "feature_id": feature_ids[int(cut.cube.feature_index[f])],
                "indicator": None,
                "year": when[0] if len(when) == 1 else None,
                "reason": (
                    f"spell {spell.name!r}: {spell.name}_count left null for {baselines._year_ranges(when)}: "
                    f"among the last {spell.window} seasons is one whose class or z is null (see the other "
                    f"warnings of this community)"
                ),
            }
        )
    return warnings


def _spell_warnings(request: IndicatorRequest, first_year: int, years: np.ndarray) -> list[dict[str, Any]]:
    """A warning per spell whose count window reaches before the data for some requested years."""
    warnings = []
    for spell in request.spells:
        short = years[years - spell.window + 1 < first_year]
        if short.size:
            warnings.append(
                {
                    "feature_id": None,
                    "indicator": None,
                    "year": int(short[0]) if short.size == 1 else None,
                    "reason": (
                        f"spell {spell.name!r}: {spell.name}_count needs the {spell.window} seasons up to each "
                        f"season-year; left null for {baselines._year_ranges([int(y) for y in short])}, whose "
                        f"window reaches before the first season-year of the data ({first_year})"
                    ),
                }
            )
    return warnings


def compute_table(
    daily: DailySeries, feature_ids: list[str], properties: list[dict], request: IndicatorRequest
) -> IndicatorTable:
    """One row per (feature_id, year) of the request's years: values, z, classes, lags, pairs, spells.

    ``daily`` is (feature, time) with rows in the order of ``feature_ids``; ``properties`` are the features'
    properties (read only for a property season). The request is resolved against ``daily``'s dates first
    (a resolved request stays as it is). Vectorised over features: loops run over indicators, season groups
    and season-years only. Null values carry a reason in ``warnings`` (list of dicts with feature_id,
    indicator, year, reason). ``layout="long"`` gives one row per (feature_id, year, indicator).
    """
    n_feature = daily.tmax.shape[0]
    if len(feature_ids) != n_feature:
        raise RequestError(f"{len(feature_ids)} feature ids for a daily series of {n_feature} features")
    groups = seasons.season_groups(request.season, feature_ids, properties)
    request = _resolve(request, groups, daily.year, daily.month, daily.day, daily.calendar)
    if request.years is None or request.indicators is None or request.max_missing_share is None:
        raise RuntimeError("resolve_request left a default unfilled")
    planned = plan_indicators(request.indicators)
    kinds = _column_kinds(planned, request)
    years = np.arange(request.years.start, request.years.end + 1, dtype=np.int64)
    full: dict[str, np.ndarray] = {}
    for name, kind in kinds.items():
        if kind.kind == _CATEGORY:
            full[name] = np.full((n_feature, years.size), -1, dtype=np.int64)
        else:
            full[name] = np.full((n_feature, years.size), np.nan)
    warnings: list[dict[str, Any]] = []
    first_year = None
    block_size = max(1, FEATURE_BLOCK_ELEMENTS // max(1, daily.year.size))
    buffers: dict[str, np.ndarray] = {}  # the cube arrays, reused block after block
    for group in groups:
        for start in range(0, group.feature_index.size, block_size):
            rows = group.feature_index[start : start + block_size]
            cut = seasons.cut_season(
                daily, group.season, rows, max_missing_share=request.max_missing_share, buffers=buffers
            )
            out_cols = np.searchsorted(cut.cube.years, years)
            if np.any(out_cols >= cut.cube.years.size) or np.any(cut.cube.years[out_cols] != years):
                raise RuntimeError(
                    "a requested season-year is not in the cube although the request was resolved"
                )
            first_year = (
                int(cut.cube.years[0]) if first_year is None else max(first_year, int(cut.cube.years[0]))
            )
            warnings += seasons.incomplete_season_warnings(cut, feature_ids, years, request.max_missing_share)
            columns = _group_columns(cut, planned, request, feature_ids, out_cols, warnings)
            for name, values in columns.items():
                full[name][rows] = values
    if first_year is not None:
        warnings += _spell_warnings(request, first_year, years)
    if request.layout == "long":
        frame = _long_frame(full, kinds, planned, request, feature_ids, years)
    else:
        frame = _wide_frame(full, kinds, feature_ids, years)
    return IndicatorTable(frame=frame, warnings=warnings)


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
) -> pd.DataFrame:
    """The wide table: one row per (feature_id, year)."""
    data = _id_columns(feature_ids, years)
    for name, kind in kinds.items():
        data[name] = _pandas_column(full[name], kind)
    return pd.DataFrame(data)


def _long_frame(
    full: Mapping[str, np.ndarray],
    kinds: Mapping[str, _ColumnKind],
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    feature_ids: Sequence[str],
    years: np.ndarray,
) -> pd.DataFrame:
    """The long table: one row per (feature_id, year, indicator), shared columns repeated."""
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
    for a, b in request.sequences:
        data[_sequence_suffix(a, b)] = stack_category(f"_{_sequence_suffix(a, b)}")
    shared = [_pair_column(a, b) for a, b in request.pairs]
    shared += [f"{s.name}_{part}" for s in request.spells for part in ("run", "count")]
    shared.append("season_complete")
    for name in shared:
        values = np.repeat(full[name][:, :, None], n_ind, axis=2)
        data[name] = _pandas_column(values, kinds[name])
    return pd.DataFrame(data)
