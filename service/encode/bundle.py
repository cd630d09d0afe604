"""The replication bundle: one zip with the table in three formats and everything needed to cite and redo it.

Entries (sorted by name; every entry dated 1980-01-01 00:00 with mode 0644, so that the same result gives the
same bytes):

- ``table.parquet``, ``table.csv``, ``table.dta``: the table, as the parquet, csv and dta formats write it;
- ``codebook.csv``: per column its name, Stata name, label, unit, definition, source and the options that
  shaped it;
- ``methods.md``: a paragraph for a methods section, generated from the resolved request;
- ``request.json``: the resolved request (every default filled; features by count and SHA-256);
- ``provenance.json``: dataset, fingerprint, software, request hash and the resolved request;
- ``warnings.csv``: every warning (code, feature_id, year, indicator, reason).
"""

from __future__ import annotations

import io
import json
import shutil
import zipfile
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any, BinaryIO

import pandas as pd

from service.encode.codebook import (
    baseline_text,
    describe_columns,
    season_text,
    short_title,
    weighting_text,
)
from service.encode.stata import stata_names, to_stata
from service.encode.tables import to_csv, to_parquet

ZIP_DATE = (1980, 1, 1, 0, 0, 0)  # the earliest date a zip entry can carry
WARNING_COLUMNS = ("code", "feature_id", "year", "indicator", "reason")


def _pretty_json(value: Any) -> bytes:
    """Indented, key-sorted JSON with a final newline."""
    return (json.dumps(value, indent=2, sort_keys=True, ensure_ascii=False) + "\n").encode("utf-8")


def codebook_frame(frame: pd.DataFrame, provenance: Mapping[str, Any]) -> pd.DataFrame:
    """The codebook: one row per column of the table, in column order."""
    columns = [str(c) for c in frame.columns]
    names = stata_names(columns)
    rows = []
    for info in describe_columns(columns, provenance):
        row = info.as_row()
        row["stata_name"] = names[info.name]
        rows.append(row)
    order = ["name", "stata_name", "label", "unit", "definition", "source", "options"]
    return pd.DataFrame(rows, columns=order)


def warnings_frame(warnings: list[dict[str, Any]]) -> pd.DataFrame:
    """The warnings as a table with the five fields of every warning (missing ones empty)."""
    rows = [{key: w.get(key) for key in WARNING_COLUMNS} for w in warnings]
    table = pd.DataFrame(rows, columns=list(WARNING_COLUMNS))
    table["year"] = pd.array(table["year"], dtype="Int64")
    return table


def _indicator_sources(provenance: Mapping[str, Any]) -> list[tuple[str, str, str, str]]:
    """(column, short title, unit, source) of each requested indicator."""
    from service.encode.codebook import _planned

    request = provenance.get("request") or {}
    try:
        planned = _planned(request)
    except (ValueError, LookupError):
        return []
    return [(p.column, short_title(p.definition), p.unit, p.source) for p in planned]


def _aggregation_text(request: Mapping[str, Any]) -> str:
    """How a community's value was made from the grid, in the order the work was done."""
    weights = weighting_text(request.get("weighting"))
    aggregation = request.get("aggregation")
    if aggregation == "cells":
        return (
            "each indicator was computed on every grid cell's own daily series first, and the cell values were "
            f"then averaged over the community with weights by {weights}"
        )
    if aggregation not in (None, "series", "daily", "features", "mean_first"):
        return f"aggregation '{aggregation}' with weights by {weights}"
    return (
        "the grid cells' daily values were first averaged over the community, with weights by "
        f"{weights}, and each indicator was then computed from that daily series"
    )


def _period_text(request: Mapping[str, Any]) -> str:
    """Over which days the values were taken: the season, or the windows around each event."""
    events = request.get("events")
    if events:
        count = events.get("count") if isinstance(events, Mapping) else len(events)
        windows = [w.get("name") for w in request.get("windows") or [] if isinstance(w, Mapping)]
        return (
            f"Values were taken over windows of days relative to each of {count} events "
            f"({', '.join(str(w) for w in windows) or 'the windows of the request'}; see request.json), and "
            "each was compared with the same window in the baseline years."
        )
    return (
        f"The season was {season_text(request.get('season'))}; a season that crosses the new year belongs to "
        "the year in which it ends."
    )


def methods_text(provenance: Mapping[str, Any], warnings: list[dict[str, Any]], rows: int) -> str:
    """methods.md: a paragraph a researcher can paste, then the indicators and their sources."""
    request = provenance.get("request") or {}
    features = request.get("features") or {}
    years = request.get("years") or {}
    edges = (request.get("classes") or {}).get("edges") or [-2, -1, 1, 2]
    lags = [int(k) for k in request.get("lags") or [0]]
    missing = request.get("max_missing_share")
    partial = request.get("partial_seasons")
    indicators = _indicator_sources(provenance)
    names = ", ".join(f"{title.lower()} ({column})" for column, title, _, _ in indicators) or "the indicators"
    span = (
        ""
        if request.get("events")
        else f" and the season-years {years.get('start')}-{years.get('end')}"
        if years
        else " and every season-year the data allow"
    )
    lag_text = (
        f" Lagged z-scores and classes were added for lags {', '.join(str(k) for k in lags if k > 0)} "
        "season-years."
        if any(k > 0 for k in lags)
        else ""
    )
    partial_words = {
        "scale": "; in a season missing fewer, sums and counts were scaled to the whole season (expected days / "
        "days present) and means, extremes and run lengths taken over the days present",
        "null": "; a season missing any day was left null as well",
        "as_is": "; in a season missing fewer, every value was taken over the days present as they are",
    }
    missing_text = (
        f" A season missing more than {float(missing) * 100:g}% of its days was left null"
        + (partial_words.get(str(partial), f" (partial seasons: {partial})") if partial else "")
        + "."
        if missing is not None
        else ""
    )
    paragraph = (
        f"Weather shocks were computed with {provenance.get('software', 'wxshock')} from the gridded daily "
        f"dataset '{provenance.get('dataset')}' (fingerprint {provenance.get('fingerprint')}) for "
        f"{features.get('count', 'the')} communities{span}. For each community, "
        f"{_aggregation_text(request)}. {_period_text(request)} The indicators were "
        f"{names}. Each value was compared with the community's own normal over "
        f"{baseline_text(request.get('baseline'))}: z = (value - baseline mean) / baseline sample standard "
        "deviation (SPI and SPEI are standard-normal deviates already), and z was classed with edges at "
        f"{', '.join(f'{float(e):g}' for e in edges)} standard deviations (class 0 = near normal)."
        f"{lag_text}{missing_text} The request hash {provenance.get('request_hash')} covers the resolved "
        "request, the dataset fingerprint and the software version; the same request on the same data gives "
        "the same table."
    )
    lines = ["# Methods", "", paragraph, "", "## Indicators and their sources", ""]
    for column, title, unit, source in indicators:
        lines.append(f"- `{column}` ({unit}): {title}. Source: {source}")
    codes = sorted({str(w.get("code")) for w in warnings if w.get("code")})
    lines += [
        "",
        "## This result",
        "",
        f"- {rows} rows; {len(warnings)} warnings" + (f" (codes: {', '.join(codes)})" if codes else "") + ".",
        "- Files: table.parquet, table.csv, table.dta (the same table), codebook.csv (every column), "
        "request.json (the resolved request), provenance.json, warnings.csv.",
    ]
    meanings = _code_meanings(codes)
    if meanings:
        lines += ["", "## Warning codes in this result (the `notes` column)", ""]
        lines += [f"- `{code}`: {meaning}" for code, meaning in meanings]
    lines.append("")
    return "\n".join(lines)


def _code_meanings(codes: list[str]) -> list[tuple[str, str]]:
    """Each warning code with its one-line meaning from the registry (unknown codes are left out)."""
    try:
        from service.warning_codes import WARNING_CODES
    except ImportError:  # pragma: no cover - the registry ships with the package
        return []
    return [(code, WARNING_CODES[code]) for code in codes if code in WARNING_CODES]


def _entry(name: str) -> zipfile.ZipInfo:
    """A bundle entry's header: fixed date, deflated, a regular rw-r--r-- file made on Unix."""
    info = zipfile.ZipInfo(name, date_time=ZIP_DATE)
    info.compress_type = zipfile.ZIP_DEFLATED
    info.external_attr = 0o100644 << 16  # a regular file, rw-r--r--
    info.create_system = 3  # Unix, whatever the server runs on
    return info


def to_bundle(frame: pd.DataFrame, provenance: dict[str, Any], warnings: list[dict[str, Any]]) -> bytes:
    """The replication zip of a result (see the module docstring); the same result gives the same bytes."""
    entries = {
        "codebook.csv": to_csv(codebook_frame(frame, provenance)),
        "methods.md": methods_text(provenance, warnings, len(frame)).encode("utf-8"),
        "provenance.json": _pretty_json(provenance),
        "request.json": _pretty_json(provenance.get("request") or {}),
        "table.csv": to_csv(frame),
        "table.dta": to_stata(frame, provenance, warnings),
        "table.parquet": to_parquet(frame, provenance, warnings),
        "warnings.csv": to_csv(warnings_frame(warnings)),
    }
    sink = io.BytesIO()
    with zipfile.ZipFile(sink, "w") as archive:
        for name in sorted(entries):
            archive.writestr(_entry(name), entries[name], compresslevel=ZIP_LEVEL)
    return sink.getvalue()


ZIP_LEVEL = 6


def write_bundle(
    sink: BinaryIO,
    frames: Callable[[], Iterable[pd.DataFrame]],
    columns: list[str],
    provenance: dict[str, Any],
    warnings: list[dict[str, Any]],
    scratch: Path,
) -> None:
    """The bytes of :func:`to_bundle` for the table made of the pieces ``frames()`` gives (byte-stable frames,
    service.encode.stable_frame), written to the seekable ``sink`` with memory for a piece at a time.

    Each table entry is encoded piece by piece into a file in the directory ``scratch`` first, so that its
    size is known before its zip header is written, as ``zipfile.writestr`` knows it (the size decides
    whether an entry needs zip64 fields); the file is then deflated into the zip and removed.
    """
    from service.encode.stata import stata_pieces
    from service.encode.stream import stream

    rows = sum(len(frame) for frame in frames())
    empty = pd.DataFrame(columns=columns)
    entries: dict[str, Callable[[], Iterable[bytes]]] = {
        "codebook.csv": lambda: [to_csv(codebook_frame(empty, provenance))],
        "methods.md": lambda: [methods_text(provenance, warnings, rows).encode("utf-8")],
        "provenance.json": lambda: [_pretty_json(provenance)],
        "request.json": lambda: [_pretty_json(provenance.get("request") or {})],
        "table.csv": lambda: stream(frames(), columns, provenance, warnings, "csv"),
        "table.dta": lambda: stata_pieces(frames, columns, provenance),
        "table.parquet": lambda: stream(frames(), columns, provenance, warnings, "parquet"),
        "warnings.csv": lambda: [to_csv(warnings_frame(warnings))],
    }
    scratch.mkdir(parents=True, exist_ok=True)
    with zipfile.ZipFile(sink, "w") as archive:
        for name in sorted(entries):
            path = scratch / f"entry-{name}"
            try:
                with open(path, "wb") as handle:
                    for data in entries[name]():
                        handle.write(data)
                info = _entry(name)
                # what writestr(info, data, compresslevel=...) sets before it writes the entry
                setattr(
                    info, "compress_level" if hasattr(info, "compress_level") else "_compresslevel", ZIP_LEVEL
                )
                info.file_size = path.stat().st_size
                with open(path, "rb") as handle, archive.open(info, "w") as entry:
                    shutil.copyfileobj(handle, entry, 1 << 20)
            finally:
                path.unlink(missing_ok=True)
