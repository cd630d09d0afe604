"""What each column of a result is: label, unit, definition, source and the options that shaped it.

Built from the column names and the resolved request in the provenance, with the indicator catalog for
units, definitions and sources. The Stata writer takes its variable labels from here, and the replication
bundle writes it out as codebook.csv. A column this module does not know still gets an entry (its name as
label), so a new column never breaks an encoder; the tests hold every column of a full request to a real
label.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import Any

# Words a cut title should not end on.
_DANGLING = frozenset("a an the of in on at to with within above below than least and or".split())
MONTH_NAMES = ("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec")
# Per-feature columns the pipeline adds after the indicators: (label, unit, definition).
_FEATURE_COLUMNS: dict[str, tuple[str, str, str]] = {
    "coverage": (
        "share of the community's area on grid cells with data",
        "1",
        "Share (0 to 1) of the community's area (or weight) that lies on grid cells with data.",
    ),
    "cells": (
        "number of grid cells the community touches",
        "cells",
        "Number of grid cells with a non-zero weight in the community's average.",
    ),
    "area_km2": (
        "community area",
        "km2",
        "Area of the community's polygon (or buffered point) on the ground.",
    ),
}


# Columns of the event table (issue 13): the event itself, and each window's span and completeness.
_EVENT_COLUMNS: dict[str, tuple[str, str, str]] = {
    "event_id": ("event id", "", "The event's id as sent in the request's events."),
    "date": ("event date", "date", "The event's date (YYYY-MM-DD) in the dataset's calendar."),
    "start": ("first day of the window", "date", "The window's first day for this event."),
    "end": ("last day of the window", "date", "The window's last day for this event."),
    "window_complete": (
        "share of the window's days with data",
        "1",
        "Share (0 to 1) of the window's days with the variables present.",
    ),
}


@dataclass(frozen=True)
class ColumnInfo:
    """One column of a result, described for a codebook and for Stata's variable labels."""

    name: str
    label: str
    unit: str = ""
    definition: str = ""
    source: str = ""
    options: str = ""

    def as_row(self) -> dict[str, str]:
        """The codebook.csv row."""
        return asdict(self)


# --- the resolved request in words ---------------------------------------------------------------------------


def season_text(season: Any) -> str:
    """The season as words: 'the calendar year', 'May-Oct', '11-01 to 04-30', 'each feature's own season'."""
    if season in (None, "year"):
        return "the calendar year"
    if isinstance(season, Mapping):
        months = season.get("months")
        if months:
            first, last = MONTH_NAMES[int(months[0]) - 1], MONTH_NAMES[int(months[-1]) - 1]
            return first if len(months) == 1 else f"{first}-{last}"
        if "start" in season:
            return f"{season['start']} to {season['end']} (MM-DD)"
        if "property" in season:
            return f"each community's own season (feature property {season['property']!r})"
    return str(season)


def baseline_text(baseline: Any) -> str:
    """The baseline as words: '1981-1990' or 'the 10 season-years before each season-year'."""
    if isinstance(baseline, Mapping):
        if "trailing" in baseline:
            return f"the {baseline['trailing']} season-years before each season-year"
        if "start" in baseline:
            return f"{baseline['start']}-{baseline['end']}"
    return "the first 30 season-years of data" if baseline is None else str(baseline)


def weighting_text(weighting: Any) -> str:
    """The weighting as words."""
    if weighting == "area" or weighting is None:
        return "exact area of overlap"
    if weighting == "centers":
        return "cells whose centre lies inside, equally weighted"
    if isinstance(weighting, Mapping) and "layer" in weighting:
        return f"area of overlap times the weight layer {weighting['layer']!r}"
    return str(weighting)


def _number(value: Any) -> str:
    """12.0 -> '12', 0.1 -> '0.1'."""
    return f"{float(value):g}" if isinstance(value, int | float) else str(value)


def _edges_text(request: Mapping[str, Any]) -> str:
    """'edges -2, -1, 1, 2 SD'."""
    edges = (request.get("classes") or {}).get("edges") or [-2, -1, 1, 2]
    return "edges " + ", ".join(_number(e) for e in edges) + " SD"


def short_title(definition: str, limit: int = 56) -> str:
    """The head of a catalog definition: 'Growing degree days: the season's sum...' -> 'Growing degree days'.

    Parenthetical remarks go ('Extreme (harmful) degree days' -> 'Extreme degree days'); the head ends at the
    first colon or ', ' and is cut at a word to at most ``limit`` characters.
    """
    text = re.sub(r"\s*\([^()]*\)", "", definition)
    head = re.split(r":|, ", text, maxsplit=1)[0].strip().rstrip(".")
    if len(head) > limit:
        words = head[: limit + 1].split(" ")[:-1]
        while len(words) > 1 and words[-1].lower() in _DANGLING:
            words.pop()
        head = " ".join(words)
    return head


# --- columns -------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Planned:
    """A requested indicator as the codebook needs it."""

    column: str
    name: str
    unit: str
    definition: str
    source: str
    family: str
    params: dict[str, float]


def _planned(request: Mapping[str, Any]) -> list[_Planned]:
    """The request's indicators with catalog entries and column names (as the table names them)."""
    from service.indicators.table import DEFAULT_INDICATORS, plan_indicators
    from service.schemas import IndicatorSpec

    specs = request.get("indicators")
    specs = list(DEFAULT_INDICATORS) if specs is None else specs
    parsed = [s if isinstance(s, str) else IndicatorSpec.model_validate(s) for s in specs]
    return [
        _Planned(
            column=p.column,
            name=p.indicator.name,
            unit=p.indicator.unit,
            definition=p.indicator.definition,
            source=p.indicator.source,
            family=p.indicator.family,
            params=dict(p.params),
        )
        for p in plan_indicators(parsed)
    ]


def _indicator_options(p: _Planned, request: Mapping[str, Any]) -> str:
    """What shaped an indicator's value: parameters, season, missing days, weighting, aggregation."""
    parts = [f"{k}={_number(v)}" for k, v in p.params.items()]
    parts.append(f"season={season_text(request.get('season'))}")
    if request.get("max_missing_share") is not None:
        parts.append(f"max_missing_share={_number(request['max_missing_share'])}")
    for key in ("partial_seasons", "aggregation"):
        if request.get(key) is not None:
            parts.append(f"{key}={request[key]}")
    parts.append(f"weighting={weighting_text(request.get('weighting'))}")
    return "; ".join(parts)


def _describe_indicator_column(
    suffix: str, p: _Planned, request: Mapping[str, Any], name: str
) -> ColumnInfo | None:
    """The entry of ``<indicator column><suffix>``, or None when the suffix is not one of an indicator's."""
    title = short_title(p.definition)
    base = _indicator_options(p, request)
    baseline = f"baseline={baseline_text(request.get('baseline'))}"
    against = f"{base}; {baseline}"
    z_definition = (
        "The value itself: already a standard-normal deviate."
        if p.family == "drought"
        else "(value - baseline mean) / baseline sample standard deviation (ddof 1), the community's own normal."
    )
    if suffix == "":
        return ColumnInfo(name, title, p.unit, p.definition, p.source, base)
    if suffix == "_z":
        return ColumnInfo(name, f"{title}: z vs. own normal", "SD", z_definition, p.source, against)
    if suffix == "_class":
        return ColumnInfo(
            name,
            f"{title}: class of z",
            "class",
            "Class of the z-score between the class edges; negative below normal, positive above.",
            p.source,
            f"{against}; {_edges_text(request)}",
        )
    if suffix == "_label":
        return ColumnInfo(
            name,
            f"{title}: class in words",
            "",
            "The class as wxshock's plain words (e.g. 'drier', 'near normal', 'much warmer').",
            p.source,
            f"{against}; {_edges_text(request)}",
        )
    if suffix == "_pct_normal":
        return ColumnInfo(
            name,
            f"{title}: % of normal",
            "%",
            "100 x value / baseline mean.",
            p.source,
            against,
        )
    if suffix == "_category":
        return ColumnInfo(
            name,
            f"{title}: WMO SPI category",
            "",
            "WMO SPI category of the value (WMO-No. 1090, 2012): extremely dry ... extremely wet.",
            "WMO SPI User Guide, WMO-No. 1090 (2012)",
            base,
        )
    lag = re.fullmatch(r"_(z|class)_lag(\d+)", suffix)
    if lag:
        what, k = lag.groups()
        word = "z" if what == "z" else "class"
        return ColumnInfo(
            name,
            f"{title}: {word}, lag {k}",
            "SD" if what == "z" else "class",
            f"The {word} of the same community {k} season-year(s) before this row's.",
            p.source,
            f"{against}; lag={k}" + (f"; {_edges_text(request)}" if what == "class" else ""),
        )
    raw_lag = re.fullmatch(r"_lag(\d+)", suffix)
    if raw_lag:
        k = raw_lag.group(1)
        return ColumnInfo(
            name,
            f"{title}, lag {k}",
            p.unit,
            f"The value of the same community {k} season-year(s) before this row's.",
            p.source,
            f"{base}; lag={k}",
        )
    sequence = re.fullmatch(r"_seq(\d+)_(\d+)", suffix)
    if sequence:
        a, b = sequence.groups()
        return ColumnInfo(
            name,
            f"{title}: class t-{a} after t-{b}",
            "",
            f"The class words of season-year t-{a} after those of t-{b}, e.g. 'near normal after much drier'.",
            p.source,
            f"{against}; {_edges_text(request)}; sequence=({a}, {b})",
        )
    return None


def describe_columns(columns: Sequence[str], provenance: Mapping[str, Any]) -> list[ColumnInfo]:
    """One entry per column of a result, in column order, from the resolved request in ``provenance``."""
    request = provenance.get("request") or {}
    try:
        planned = _planned(request) if "features" in request or "indicators" in request else []
    except (ValueError, LookupError):  # a request this version cannot plan: describe by name only
        planned = []
    by_column = {p.column: p for p in planned}
    long_layout = request.get("layout") == "long"
    infos = []
    for name in columns:
        infos.append(_describe(str(name), by_column, request, long_layout))
    return infos


def _describe(
    name: str, by_column: Mapping[str, _Planned], request: Mapping[str, Any], long_layout: bool
) -> ColumnInfo:
    """The entry of one column (prefixes such as '<window>__' are described by what follows them)."""
    prefix, sep, rest = name.partition("__")
    if sep and rest:
        inner = _describe(rest, by_column, request, long_layout)
        return ColumnInfo(
            name,
            f"{prefix}: {inner.label}",
            inner.unit,
            inner.definition,
            inner.source,
            f"{inner.options}; window or variant={prefix}".lstrip("; "),
        )
    if name == "feature_id":
        return ColumnInfo(
            name,
            "community id",
            "",
            "The community's id: the GeoJSON Feature id, or its property named by id_property.",
            "the request's features",
        )
    if name == "year":
        return ColumnInfo(
            name,
            "season-year (the year in which the season ends)",
            "year",
            "The season-year of the row; a season that crosses the new year belongs to the year it ends.",
            "",
            f"season={season_text(request.get('season'))}",
        )
    if name == "notes":
        return ColumnInfo(
            name,
            "warning codes of this row (why a value is null or flagged)",
            "",
            "The codes of the row's warnings, sorted and separated by spaces; empty when none. The full "
            "warnings are in the result's warnings (warnings.csv in a bundle).",
        )
    if name in _EVENT_COLUMNS:
        label, unit, definition = _EVENT_COLUMNS[name]
        return ColumnInfo(name, label, unit, definition, "the request's events")
    if name == "season_complete":
        return ColumnInfo(
            name,
            "share of the season's days with data",
            "1",
            "Share (0 to 1) of the season's calendar days with the variables present.",
            "",
            f"season={season_text(request.get('season'))}",
        )
    for base_name, (label, unit, definition) in _FEATURE_COLUMNS.items():
        if name == base_name or name.startswith(base_name + "_"):
            grid = name[len(base_name) + 1 :]
            suffix = f" (grid {grid})" if grid and base_name != "area_km2" else ""
            if base_name == "area_km2" and name != base_name:
                continue
            return ColumnInfo(
                name,
                label + suffix,
                unit,
                definition,
                "",
                f"weighting={weighting_text(request.get('weighting'))}",
            )
    # Indicator columns: the longest indicator column name that starts the column name.
    for column in sorted(by_column, key=len, reverse=True):
        if name == column or name.startswith(column + "_"):
            info = _describe_indicator_column(name[len(column) :], by_column[column], request, name)
            if info is not None:
                return info
    for a, b in request.get("pairs") or []:
        if name == f"{a}_and_{b}":
            left, right = by_column.get(a), by_column.get(b)
            titles = " and ".join(short_title(p.definition) if p else n for p, n in ((left, a), (right, b)))
            return ColumnInfo(
                name,
                f"classes of {a} and {b} together",
                "",
                f"The class words of {titles} in one phrase, e.g. 'drier and much warmer'.",
                "",
                f"baseline={baseline_text(request.get('baseline'))}; {_edges_text(request)}",
            )
    for spell in request.get("spells") or []:
        spell_name = spell.get("name")
        conditions = "; ".join(_condition_text(c) for c in spell.get("when") or [])
        if name == f"{spell_name}_run":
            return ColumnInfo(
                name,
                f"spell {spell_name}: consecutive seasons it has held",
                "season-years",
                f"Number of consecutive season-years, up to this one, in which all hold: {conditions}.",
                "",
                f"{_edges_text(request)}",
            )
        if name == f"{spell_name}_count":
            window = spell.get("window")
            return ColumnInfo(
                name,
                f"spell {spell_name}: seasons it held in the last {window}",
                "season-years",
                f"Number of the last {window} season-years (this one included) in which all hold: {conditions}.",
                "",
                f"window={window}; {_edges_text(request)}",
            )
    if long_layout:
        long_info = _describe_long(name, request)
        if long_info is not None:
            return long_info
    return ColumnInfo(name, name)


def _condition_text(condition: Mapping[str, Any]) -> str:
    """One spell condition as words: 'prcp_total class <= -1'."""
    parts = []
    for key, word in (
        ("class_min", "class >="),
        ("class_max", "class <="),
        ("z_min", "z >="),
        ("z_max", "z <="),
    ):
        if condition.get(key) is not None:
            parts.append(f"{condition.get('indicator')} {word} {_number(condition[key])}")
    return " and ".join(parts) or str(condition.get("indicator"))


_LONG_COLUMNS: dict[str, tuple[str, str, str]] = {
    "indicator": ("indicator of the row (its column name)", "", "The indicator this row's values belong to."),
    "value": ("value of the row's indicator", "see indicator", "The indicator's value, in its own unit."),
    "z": ("z against the normal", "SD", "(value - baseline mean) / baseline sample standard deviation."),
    "class": ("class of z (0 = near normal)", "class", "Class of the z-score between the class edges."),
    "label": ("class in words", "", "The class as wxshock's plain words."),
    "pct_normal": ("percent of the normal", "%", "100 x value / baseline mean (precipitation amounts)."),
    "category": ("WMO SPI category", "", "WMO SPI category (SPI and SPEI only; WMO-No. 1090, 2012)."),
}


def _describe_long(name: str, request: Mapping[str, Any]) -> ColumnInfo | None:
    """Entries of the long layout's shared value columns."""
    options = f"baseline={baseline_text(request.get('baseline'))}; {_edges_text(request)}"
    if name in _LONG_COLUMNS:
        label, unit, definition = _LONG_COLUMNS[name]
        return ColumnInfo(name, label, unit, definition, "see the indicator catalog", options)
    lag = re.fullmatch(r"(z|class)_lag(\d+)", name)
    if lag:
        what, k = lag.groups()
        return ColumnInfo(
            name,
            f"{what} of the row's indicator, {k} season-year(s) earlier",
            "SD" if what == "z" else "class",
            f"The {what} of the same community and indicator {k} season-year(s) before.",
            "",
            f"{options}; lag={k}",
        )
    sequence = re.fullmatch(r"seq(\d+)_(\d+)", name)
    if sequence:
        a, b = sequence.groups()
        return ColumnInfo(
            name, f"class at t-{a} after class at t-{b}", "", "Class words of two season-years.", "", options
        )
    return None
