"""The event table: events and windows in, one row per event (wide) or per (event, window, indicator) (long).

Columns of the wide layout, in order:

- ``event_id``, ``feature_id``, ``date`` (strings: the event as sent);
- for each window, every column prefixed ``<window>__``: ``start`` and ``end`` (the event's own window, as
  'YYYY-MM-DD'), then each indicator's columns as in the season table (value, ``_z``, ``_class``,
  ``_label``, ``_pct_normal``, ``_category``, ``_z_lag<k>``, ``_class_lag<k>``, ``_lag<k>`` with
  lag_values, ``_seq<a>_<b>``), the pairs, the spells, ``window_complete`` (share of the window's days with
  every requested variable) and ``notes`` (that window's warning codes);
- ``notes``: the codes of all the row's windows.

The long layout has one row per (event, window, indicator): event_id, feature_id, date, window, start, end,
indicator, value, z, class, label, pct_normal, category, z_lag<k>, class_lag<k>, value_lag<k>,
seq<a>_<b>, the pair and spell columns of that (event, window), window_complete (for the indicator's
variables) and notes.

z, classes, percent of normal and categories follow the season table's rules, against the same window in
the baseline window-years (service.indicators.windows.instances); lag k is the same window k years
earlier. Vectorised over events: loops run over windows, indicators and lags only.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from service.errors import OutOfRangeError
from service.indicators import baselines, classes, sequences
from service.indicators.base import DailySeries
from service.indicators.table import (
    DEFAULT_BASELINE_SEASONS,
    MIN_FIT_SEASONS,
    PlannedIndicator,
    RawValues,
    indicator_columns,
    plan_indicators,
    resolve_request,
)
from service.indicators.windows.instances import (
    BaselineGroup,
    EventPlan,
    baseline_groups,
    event_baseline,
    plan_events,
)
from service.indicators.windows.values import window_keys, window_values
from service.schemas import FixedBaseline, IndicatorRequest, TrailingBaseline
from service.warning_codes import WARNING_CODES, notes_text, warning

# events named in one warning at most (the notes column marks every row)
_LISTED_EVENTS = 10


@dataclass(frozen=True)
class EventTable:
    """The rows of a batch of events (pandas DataFrame, stable column order) and their warnings."""

    frame: pd.DataFrame
    warnings: list[dict[str, Any]] = field(default_factory=list)


@dataclass(frozen=True)
class ResolvedEvents:
    """A request with events resolved against a dataset: the filled request, the plan and the baselines."""

    request: IndicatorRequest
    plan: EventPlan
    groups: list[BaselineGroup]


# --- resolving ----------------------------------------------------------------------------------------------


def resolve_events(
    request: IndicatorRequest,
    feature_ids: Sequence[str],
    dates: Any,
    calendar: str,
    variables: Sequence[str] | None = None,
) -> ResolvedEvents:
    """The request with every default filled, its events planned on the record's calendar, and the baselines.

    ``dates`` has int arrays ``year``, ``month``, ``day`` of every time step of the record (the store's
    dates). Fills indicators (those of the default set the variables allow), their parameters, pairs,
    spells, max_missing_share and the baseline (the first 30 window-years every window serves whole).
    Raises RequestError / OutOfRangeError naming the event, window or field at fault.
    """
    if request.events is None or request.windows is None:
        raise RuntimeError("resolve_events needs a request with events and windows")
    year, month, day = (np.asarray(getattr(dates, n), dtype=np.int64) for n in ("year", "month", "day"))
    plan = plan_events(request.events, request.windows, feature_ids, year, month, day, calendar)
    baseline = event_baseline(plan, request.baseline, DEFAULT_BASELINE_SEASONS)
    # the season machinery fills indicators, pairs, spells and max_missing_share; years, season, baseline and
    # lags are the events' own business here, so they are left out of that resolution
    stripped = request.model_copy(
        update={
            "events": None,
            "windows": None,
            "variants": None,
            "baseline": None,
            "lags": [0],
            "sequences": [],
        }
    )
    filled = resolve_request(stripped, dates, calendar, variables)
    resolved = request.model_copy(
        update={
            "indicators": filled.indicators,
            "pairs": filled.pairs,
            "spells": filled.spells,
            "max_missing_share": filled.max_missing_share,
            "baseline": baseline,
        }
    )
    groups = baseline_groups(plan, baseline)
    if isinstance(baseline, TrailingBaseline):
        _check_trailing(plan, groups, baseline)
    return ResolvedEvents(request=resolved, plan=plan, groups=groups)


def _check_trailing(plan: EventPlan, groups: Sequence[BaselineGroup], spec: TrailingBaseline) -> None:
    """Refuse a trailing baseline that no (event, window) can have whole."""
    for group in groups:
        if group.first_full is None:
            continue
        in_group = group.ranges[plan.range_of]
        if np.any(in_group & (plan.window_year >= group.first_full)):
            return
    first, _ = plan.served_span()
    raise OutOfRangeError(
        f"a trailing baseline of {spec.trailing} window-years leaves no event with a whole baseline: the data "
        f"({plan.record_text()}) serve whole windows from window-year {int(first.max())}, and the last event's "
        f"window ends in {int(plan.window_year.max())}; use a shorter trailing baseline or a fixed one",
        field="baseline.trailing",
        pointer="/baseline/trailing",
    )


# --- column kinds --------------------------------------------------------------------------------------------

_FLOAT, _INT, _CATEGORY = "float", "int", "category"


def _labels(planned: Sequence[PlannedIndicator], request: IndicatorRequest) -> dict[str, list[str]]:
    """Each indicator's class labels, lowest class first."""
    edges = request.classes.edges
    return {p.column: list(classes.class_labels(p.indicator.family, edges).values()) for p in planned}


def _pair_categories(
    left: str, right: str, planned: Sequence[PlannedIndicator], labels: Mapping[str, list[str]]
) -> list[str]:
    """The categories of a pair column ('drier and much warmer', ...)."""
    family = {p.column: p.indicator.family for p in planned}
    terms = [[classes.pair_term(label, ref, family[ref]) for label in labels[ref]] for ref in (left, right)]
    return classes.joint_categories(terms[0], terms[1], "and")


def _pandas(values: np.ndarray, kind: str, categories: Sequence[str] = (), ordered: bool = False) -> Any:
    """A pandas array of the kind: float64, nullable Int64 (NaN null) or categorical codes (-1 null)."""
    if kind == _FLOAT:
        return np.asarray(values, dtype=np.float64)
    if kind == _INT:
        values = np.asarray(values, dtype=np.float64)
        mask = np.isnan(values)
        return pd.arrays.IntegerArray(np.where(mask, 0, values).astype(np.int64), mask)
    return pd.Categorical.from_codes(
        np.asarray(values, dtype=np.int64), dtype=pd.CategoricalDtype(list(categories), ordered=ordered)
    )


# --- computing ----------------------------------------------------------------------------------------------


@dataclass
class _Derived:
    """One indicator over (key, year): value, z and why z is null; classes are made where they are read."""

    value: np.ndarray
    z: np.ndarray
    pct: np.ndarray | None
    reason: np.ndarray  # baselines.OK, NO_VALUE, FEW_SEASONS, NO_SPREAD
    standardized: bool
    edges: tuple[float, ...]
    _classes: np.ndarray | None = None

    def classes_of(self, z: np.ndarray) -> np.ndarray:
        """Class numbers (float, NaN null) of z values."""
        return classes.classify(z, self.edges)

    def codes_of(self, z: np.ndarray) -> np.ndarray:
        """0-based label codes (-1 null) of z values."""
        lowest, _ = classes.class_range(self.edges)
        return classes.category_codes(self.classes_of(z), lowest)

    @property
    def cls(self) -> np.ndarray:
        """Class numbers over every (key, year) (for spells), computed once."""
        if self._classes is None:
            self._classes = self.classes_of(self.z)
        return self._classes


def _derive(
    p: PlannedIndicator,
    raw: RawValues,
    range_of_key: np.ndarray,
    groups: Sequence[BaselineGroup],
    request: IndicatorRequest,
) -> _Derived:
    """z against each key's baseline windows (the season table's rules), percent of normal, why z is null."""
    from service.indicators.base import Baseline

    value = raw.values[p.column]
    pct = None
    if p.indicator.standardized:
        value = baselines.round_z(value)  # the value is its own z: both rounded alike, so spi_z == spi
        anomaly = baselines.standardized_anomaly(value)
        z, reason = anomaly.z, anomaly.reason
    else:
        z = np.full(value.shape, np.nan)
        reason = np.full(value.shape, baselines.NO_VALUE, dtype=np.int8)
        if p.indicator.percent_of_normal:
            pct = np.full(value.shape, np.nan)
        for group in groups:
            rows = np.flatnonzero(group.ranges[range_of_key])
            if not rows.size:
                continue
            baseline = Baseline(group.members, group.fixed, group.label, group.seasons)
            stats = baselines.baseline_statistics(value[rows], baseline)
            anomaly = baselines.anomaly(value[rows], stats)
            z[rows], reason[rows] = anomaly.z, anomaly.reason
            if pct is not None:
                pct[rows] = baselines.percent_of_normal(value[rows], stats)
    return _Derived(value, z, pct, reason, p.indicator.standardized, tuple(request.classes.edges))


def _at(array: np.ndarray, key: np.ndarray, year: np.ndarray, fill: float | int = np.nan) -> np.ndarray:
    """array[key, year] per event; ``fill`` where year is before the first window-year (a lag too deep)."""
    inside = year >= 0
    out = np.full(key.shape, fill, dtype=np.result_type(array.dtype, np.asarray(fill).dtype))
    out[inside] = array[key[inside], year[inside]]
    return out


class _EventNotes:
    """Warning codes of every (event, window), for the row and per indicator column, as bit sets."""

    def __init__(self, n_event: int, n_window: int, columns: Sequence[str]) -> None:
        self.bit = {code: np.int64(1) << i for i, code in enumerate(WARNING_CODES)}
        self.row = np.zeros((n_event, n_window), dtype=np.int64)
        self.column = {c: np.zeros((n_event, n_window), dtype=np.int64) for c in columns}

    def mark(self, code: str, window: int, mask: np.ndarray, column: str | None = None) -> None:
        """Add ``code`` to window ``window`` of the events where ``mask`` (event,) holds."""
        target = self.row if column is None else self.column[column]
        target[:, window] |= np.where(mask, self.bit[code], np.int64(0))

    def texts(self, bits: np.ndarray) -> np.ndarray:
        """The notes text of each bit set (object array of the same shape)."""
        unique, inverse = np.unique(bits.ravel(), return_inverse=True)
        words = [notes_text([c for c, b in self.bit.items() if value & int(b)]) for value in unique.tolist()]
        return np.asarray(words, dtype=object)[inverse].reshape(bits.shape)

    def of_rows(self) -> np.ndarray:
        """(event, window) bits of the row and of all its indicators."""
        bits = self.row.copy()
        for column_bits in self.column.values():
            bits |= column_bits
        return bits


@dataclass
class _Window:
    """One window's per-event arrays: shared columns and, per indicator, its value columns."""

    shared: dict[str, np.ndarray] = field(default_factory=dict)  # start, end, pairs, spells, window_complete
    indicators: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)  # column -> part -> (event,)
    presence: dict[str, np.ndarray] = field(default_factory=dict)  # column -> share of its variables' days


def compute_event_table(
    daily: DailySeries,
    daily_rows: np.ndarray,
    events: np.ndarray,
    feature_ids: Sequence[str],
    resolved: ResolvedEvents,
) -> EventTable:
    """The table of the plan's events ``events``, whose features are the rows ``daily_rows`` of ``daily``.

    ``daily`` holds the daily series of some features over the whole record (the store's dates);
    ``feature_ids`` are the ids of daily's rows. Each (event, window) gets every requested indicator on the
    window's days; z, class and percent of normal against the same window in the baseline window-years;
    lags, sequences and spells over the window-years; pairs; notes. Warnings name the events.
    """
    request, plan, groups = resolved.request, resolved.plan, resolved.groups
    if request.indicators is None or request.max_missing_share is None or request.baseline is None:
        raise RuntimeError("the request is not resolved; call resolve_events first")
    events = np.asarray(events, dtype=np.int64)
    rows = np.asarray(daily_rows, dtype=np.int64)
    planned = plan_indicators(request.indicators)
    keys, key_of = window_keys(rows, plan.range_of[events], plan.range_start.size)
    raw = window_values(daily, keys, plan, planned, request, groups)
    derived = {p.column: _derive(p, raw, keys.range, groups, request) for p in planned}
    year_of = np.searchsorted(plan.years, plan.window_year[events])  # (event, window)
    notes = _EventNotes(events.size, len(plan.windows), [p.column for p in planned])
    n_class = len(classes.class_labels("count", request.classes.edges))
    first_full = _first_full(keys.range, groups)
    windows = []
    for w in range(len(plan.windows)):
        key, year = key_of[:, w], year_of[:, w]
        one = _Window()
        one.shared["start"], one.shared["end"] = plan.instance_text(plan.range_of[events, w], year)
        for p in planned:
            one.indicators[p.column] = _indicator_parts(derived[p.column], request, n_class, key, year)
            _mark_indicator(p, raw, derived[p.column], request, key, year, w, notes)
        for left, right in request.pairs:
            one.shared[f"{left}_and_{right}"] = classes.joint_codes(
                one.indicators[left]["label"], one.indicators[right]["label"], n_class
            )
        _spells(request, derived, plan, first_full, key, year, w, one, notes)
        one.shared["window_complete"] = _at(raw.present[""], key, year)
        one.presence = {p.column: _at(raw.present[p.column], key, year) for p in planned}
        windows.append(one)
    ids = plan.event_ids[events]
    fids = np.asarray(feature_ids, dtype=object)[rows]
    warnings = _event_warnings(notes, planned, plan, request, ids, fids)
    dates = plan.days.text(plan.date_ordinals[events])
    kinds = _kinds(planned, request)
    if request.layout == "long":
        frame = _long_frame(planned, request, kinds, plan, ids, fids, dates, windows, notes)
    else:
        frame = _wide_frame(planned, request, kinds, plan, ids, fids, dates, windows, notes)
    return EventTable(frame=frame, warnings=warnings)


def _first_full(range_of_key: np.ndarray, groups: Sequence[BaselineGroup]) -> np.ndarray:
    """Per key: the first window-year whose baseline is the whole requested one (a huge year when none)."""
    out = np.full(range_of_key.size, np.iinfo(np.int64).max, dtype=np.int64)
    for group in groups:
        if group.first_full is not None:
            out[group.ranges[range_of_key]] = group.first_full
    return out


def _indicator_parts(
    d: _Derived, request: IndicatorRequest, n_class: int, key: np.ndarray, year: np.ndarray
) -> dict[str, np.ndarray]:
    """An indicator's long-layout parts for each event: value, z, class, label, ..., lags, sequences."""
    z = _at(d.z, key, year)
    parts: dict[str, np.ndarray] = {
        "value": _at(d.value, key, year),
        "z": z,
        "class": d.classes_of(z),
        "label": d.codes_of(z),
    }
    if d.pct is not None:
        parts["pct_normal"] = _at(d.pct, key, year)
    if d.standardized:
        parts["category"] = classes.wmo_spi_category(z)
    for lag in request.lags:
        if lag > 0:
            lagged = _at(d.z, key, year - lag)
            parts[f"z_lag{lag}"] = lagged
            parts[f"class_lag{lag}"] = d.classes_of(lagged)
            if request.lag_values:
                parts[f"value_lag{lag}"] = _at(d.value, key, year - lag)
    for a, b in request.sequences:
        parts[f"seq{a}_{b}"] = classes.joint_codes(
            d.codes_of(_at(d.z, key, year - a)), d.codes_of(_at(d.z, key, year - b)), n_class
        )
    return parts


def _mark_indicator(
    p: PlannedIndicator,
    raw: RawValues,
    d: _Derived,
    request: IndicatorRequest,
    key: np.ndarray,
    year: np.ndarray,
    w: int,
    notes: _EventNotes,
) -> None:
    """Note one indicator's codes in window ``w``: its value flags, a null z, a short fitted baseline."""
    for code, flags in raw.flags[p.column].items():
        notes.mark(code, w, _at(flags, key, year, False).astype(bool), p.column)
    reason = _at(d.reason, key, year, baselines.OK)
    notes.mark("few_baseline_seasons", w, reason == baselines.FEW_SEASONS, p.column)
    notes.mark("no_spread", w, reason == baselines.NO_SPREAD, p.column)
    spec = request.baseline
    length = spec.end - spec.start + 1 if isinstance(spec, FixedBaseline) else spec.trailing  # type: ignore[union-attr]
    if p.indicator.uses_baseline and length < MIN_FIT_SEASONS:
        notes.mark("short_baseline_fit", w, np.ones(key.size, dtype=bool), p.column)


def _spells(
    request: IndicatorRequest,
    derived: Mapping[str, _Derived],
    plan: EventPlan,
    first_full: np.ndarray,
    key: np.ndarray,
    year: np.ndarray,
    w: int,
    one: _Window,
    notes: _EventNotes,
) -> None:
    """Each spell's run and count over the window-years up to each event's, with their notes."""
    for spell in request.spells:
        condition = sequences.condition_holds(
            [derived[c.indicator].cls for c in spell.when],
            [derived[c.indicator].z for c in spell.when],
            [(c.class_min, c.class_max, c.z_min, c.z_max) for c in spell.when],
        )
        run = _at(sequences.spell_run(condition), key, year)
        count = _at(sequences.spell_count(condition, spell.window), key, year)
        reaches_before = plan.years[year] - spell.window + 1 < first_full[key]
        count = np.where(reaches_before, np.nan, count)
        one.shared[f"{spell.name}_run"] = run
        one.shared[f"{spell.name}_count"] = count
        notes.mark("spell_before_baseline", w, reaches_before)
        notes.mark("spell_unknown", w, np.isnan(count) & ~reaches_before)


_CODE_TEXT = {
    "incomplete_season": "more than {share:.0%} of the window's days are missing (or outside the data): values "
    "left null",
    "partial_season": "some of the window's days are missing (at most {share:.0%}): {policy}",
}
_POLICY_TEXT = {
    "scale": "sums and counts are scaled to the whole window (x expected days / days present)",
    "null": "sums and counts are left null",
    "as_is": "sums and counts are over the days present only, not scaled",
}


def _event_warnings(
    notes: _EventNotes,
    planned: Sequence[PlannedIndicator],
    plan: EventPlan,
    request: IndicatorRequest,
    ids: np.ndarray,
    feature_ids: np.ndarray,
) -> list[dict[str, Any]]:
    """One warning per (code, feature, window, indicator), naming its first few events."""
    out: list[dict[str, Any]] = []
    share = request.max_missing_share or 0.0
    targets: list[tuple[str | None, np.ndarray]] = [(None, notes.row)]
    targets += [(p.column, notes.column[p.column]) for p in planned]
    for column, bits in targets:
        for code, bit in notes.bit.items():
            hits = (bits & bit) != 0
            if not hits.any():
                continue
            meaning = _CODE_TEXT.get(code, WARNING_CODES[code]).format(
                share=share, policy=_POLICY_TEXT[request.partial_seasons]
            )
            for w, window in enumerate(plan.windows):
                rows = np.flatnonzero(hits[:, w])
                if not rows.size:
                    continue
                by_feature = pd.Series(rows).groupby(feature_ids[rows], sort=False)
                for fid, members in by_feature:
                    mine = members.to_numpy()
                    named = ", ".join(repr(str(i)) for i in ids[mine[:_LISTED_EVENTS]])
                    more = f" and {mine.size - _LISTED_EVENTS} more" if mine.size > _LISTED_EVENTS else ""
                    subject = f"{column}, window {window.name!r}" if column else f"window {window.name!r}"
                    out.append(
                        warning(
                            code,
                            f"{subject}: {meaning}; event(s) {named}{more}",
                            feature_id=str(fid),
                            indicator=column,
                        )
                    )
    return out


# --- frames ---------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Kind:
    """How a column is stored: float64, nullable Int64, or categorical codes over fixed categories."""

    kind: str
    categories: tuple[str, ...] = ()
    ordered: bool = False


def _kinds(planned: Sequence[PlannedIndicator], request: IndicatorRequest) -> dict[str, _Kind]:
    """The storage kind of every window column (without prefix) but start, end and notes."""
    labels = _labels(planned, request)
    kinds: dict[str, _Kind] = {}
    for p in planned:
        c = p.column
        kinds[c] = _Kind(_FLOAT)
        kinds[f"{c}_z"] = _Kind(_FLOAT)
        kinds[f"{c}_class"] = _Kind(_INT)
        kinds[f"{c}_label"] = _Kind(_CATEGORY, tuple(labels[c]), True)
        kinds[f"{c}_pct_normal"] = _Kind(_FLOAT)
        kinds[f"{c}_category"] = _Kind(_CATEGORY, tuple(classes.WMO_SPI_CATEGORIES), True)
        for lag in request.lags:
            kinds[f"{c}_z_lag{lag}"] = _Kind(_FLOAT)
            kinds[f"{c}_class_lag{lag}"] = _Kind(_INT)
            kinds[f"{c}_lag{lag}"] = _Kind(_FLOAT)
        for a, b in request.sequences:
            kinds[f"{c}_seq{a}_{b}"] = _Kind(
                _CATEGORY, tuple(classes.joint_categories(labels[c], labels[c], "after"))
            )
    for left, right in request.pairs:
        kinds[f"{left}_and_{right}"] = _Kind(_CATEGORY, tuple(_pair_categories(left, right, planned, labels)))
    for spell in request.spells:
        kinds[f"{spell.name}_run"] = _Kind(_INT)
        kinds[f"{spell.name}_count"] = _Kind(_INT)
    kinds["window_complete"] = _Kind(_FLOAT)
    return kinds


def _column(values: np.ndarray, kind: _Kind) -> Any:
    """A pandas array of the stored kind."""
    return _pandas(values, kind.kind, kind.categories, kind.ordered)


def wide_window_columns(planned: Sequence[PlannedIndicator], request: IndicatorRequest) -> list[str]:
    """The columns of one window in the wide layout (without the '<window>__' prefix), in order."""
    cols = ["start", "end"]
    for p in planned:
        cols += indicator_columns(p, request)
        if request.lag_values:  # the season table places <column>_lag<k> after each lag's z and class
            for lag in request.lags:
                if lag > 0 and f"{p.column}_lag{lag}" not in cols:
                    at = cols.index(f"{p.column}_class_lag{lag}") + 1
                    cols.insert(at, f"{p.column}_lag{lag}")
    cols += [f"{a}_and_{b}" for a, b in request.pairs]
    for s in request.spells:
        cols += [f"{s.name}_run", f"{s.name}_count"]
    cols += ["window_complete", "notes"]
    return cols


def _wide_part(c: str, name: str) -> str:
    """The long-layout part an indicator's wide column holds ('prcp_total_z' -> 'z', 'prcp_total' -> 'value')."""
    if name == c:
        return "value"
    suffix = name[len(c) + 1 :]
    if suffix.startswith("lag"):
        return "value_" + suffix
    return suffix


def _wide_frame(
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    kinds: Mapping[str, _Kind],
    plan: EventPlan,
    ids: np.ndarray,
    feature_ids: np.ndarray,
    dates: np.ndarray,
    windows: Sequence[_Window],
    notes: _EventNotes,
) -> pd.DataFrame:
    """One row per event: the event, each window's prefixed columns, then the notes of the whole row."""
    data: dict[str, Any] = {
        "event_id": pd.array(ids, dtype="string"),
        "feature_id": pd.array(feature_ids, dtype="string"),
        "date": pd.array(dates, dtype="string"),
    }
    owner = {name: p.column for p in planned for name in indicator_columns(p, request)}
    owner.update({f"{p.column}_lag{lag}": p.column for p in planned for lag in request.lags if lag > 0})
    bits = notes.of_rows()
    for w, (window, one) in enumerate(zip(plan.windows, windows, strict=True)):
        for name in wide_window_columns(planned, request):
            label = f"{window.name}__{name}"
            if name in ("start", "end"):
                data[label] = pd.array(one.shared[name], dtype="string")
            elif name == "notes":
                data[label] = pd.array(notes.texts(bits[:, w]), dtype="string")
            elif name in owner:
                data[label] = _column(one.indicators[owner[name]][_wide_part(owner[name], name)], kinds[name])
            else:
                data[label] = _column(one.shared[name], kinds[name])
    whole = np.bitwise_or.reduce(bits, axis=1) if bits.shape[1] else np.zeros(bits.shape[0], dtype=np.int64)
    data["notes"] = pd.array(notes.texts(whole), dtype="string")
    return pd.DataFrame(data)


def _long_frame(
    planned: Sequence[PlannedIndicator],
    request: IndicatorRequest,
    kinds: Mapping[str, _Kind],
    plan: EventPlan,
    ids: np.ndarray,
    feature_ids: np.ndarray,
    dates: np.ndarray,
    windows: Sequence[_Window],
    notes: _EventNotes,
) -> pd.DataFrame:
    """One row per (event, window, indicator), event-major; shared columns repeated on indicator rows."""
    n_event, n_window, n_ind = ids.size, len(windows), len(planned)
    shape = (n_event, n_window, n_ind)

    def stack(part: str, fill: float | int = np.nan) -> np.ndarray:
        """(event, window, indicator) of one part of every indicator."""
        out = np.full(shape, fill, dtype=np.float64 if isinstance(fill, float) else np.int64)
        for w, one in enumerate(windows):
            for i, p in enumerate(planned):
                values = one.indicators[p.column].get(part)
                if values is not None:
                    out[:, w, i] = values
        return out

    def categorical(part: str, suffix: str) -> pd.Categorical:
        """A categorical over the union of the indicators' categories, in first-seen order."""
        union: list[str] = []
        codes = np.full(shape, -1, dtype=np.int64)
        for i, p in enumerate(planned):
            kind = kinds.get(p.column + suffix)
            if kind is None:
                continue
            for cat in kind.categories:
                if cat not in union:
                    union.append(cat)
            remap = np.asarray([union.index(c) for c in kind.categories] + [-1], dtype=np.int64)
            for w, one in enumerate(windows):
                values = one.indicators[p.column].get(part)
                if values is not None:
                    codes[:, w, i] = remap[values]
        return pd.Categorical.from_codes(codes.ravel(), categories=union)

    def repeat(values: np.ndarray) -> np.ndarray:
        """(event,) per window -> (event, window, indicator), flattened."""
        return np.repeat(np.stack(values, axis=1)[:, :, None], n_ind, axis=2).ravel()

    def per_row(values: np.ndarray) -> np.ndarray:
        return np.repeat(values, n_window * n_ind)

    data: dict[str, Any] = {
        "event_id": pd.array(per_row(ids), dtype="string"),
        "feature_id": pd.array(per_row(feature_ids), dtype="string"),
        "date": pd.array(per_row(dates), dtype="string"),
        "window": pd.Categorical.from_codes(
            np.tile(np.repeat(np.arange(n_window), n_ind), n_event), categories=[w.name for w in plan.windows]
        ),
        "start": pd.array(repeat([one.shared["start"] for one in windows]), dtype="string"),
        "end": pd.array(repeat([one.shared["end"] for one in windows]), dtype="string"),
        "indicator": pd.Categorical.from_codes(
            np.tile(np.arange(n_ind), n_event * n_window), categories=[p.column for p in planned]
        ),
        "value": stack("value").ravel(),
        "z": stack("z").ravel(),
        "class": _pandas(stack("class").ravel(), _INT),
        "label": categorical("label", "_label"),
        "pct_normal": stack("pct_normal").ravel(),
        "category": pd.Categorical.from_codes(
            stack("category", -1).ravel(), dtype=pd.CategoricalDtype(classes.WMO_SPI_CATEGORIES, True)
        ),
    }
    for lag in request.lags:
        if lag > 0:
            data[f"z_lag{lag}"] = stack(f"z_lag{lag}").ravel()
            data[f"class_lag{lag}"] = _pandas(stack(f"class_lag{lag}").ravel(), _INT)
            if request.lag_values:
                data[f"value_lag{lag}"] = stack(f"value_lag{lag}").ravel()
    for a, b in request.sequences:
        data[f"seq{a}_{b}"] = categorical(f"seq{a}_{b}", f"_seq{a}_{b}")
    shared = [f"{a}_and_{b}" for a, b in request.pairs]
    shared += [f"{s.name}_{part}" for s in request.spells for part in ("run", "count")]
    for name in shared:
        data[name] = _column(repeat([one.shared[name] for one in windows]), kinds[name])
    complete = np.full(shape, np.nan)
    bits = np.repeat(notes.row[:, :, None], n_ind, axis=2)
    for i, p in enumerate(planned):
        for w, one in enumerate(windows):
            complete[:, w, i] = one.presence[p.column]
        bits[:, :, i] |= notes.column[p.column]
    data["window_complete"] = complete.ravel()
    data["notes"] = pd.array(notes.texts(bits).ravel(), dtype="string")
    return pd.DataFrame(data)
