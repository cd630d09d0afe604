"""Daily community series (the /v1/series answer), built a few features at a time."""

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from service import cluster
from service.aggregate import aggregate
from service.encode import RunResult
from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.errors import (
    OutOfRangeError,
    RequestError,
)
from service.pipeline.core import (
    _check_years,
    daily_values,
    features_and_weights,
    provenance,
    series_variables,
)
from service.schemas import SeriesRequest
from service.settings import Settings
from service.store import Store


@dataclass
class SeriesTable:
    """A daily series table made piece by piece: its columns, provenance and warnings, then its frames."""

    columns: list[str]
    provenance: dict[str, Any]
    warnings: list[dict[str, Any]]
    frames: Iterable[pd.DataFrame]  # a job's spilled rows may be read more than once


# Rows of the series made at a time (features x days); the encoders cut them finer.
SERIES_PIECE_ROWS = 200_000


def series_table(request: SeriesRequest, store: Store, settings: Settings) -> SeriesTable:
    """The daily area-weighted series of every feature, one row per (feature_id, date), made lazily.

    Everything that can fail for the request (years, features, weights) and the aggregation itself run
    here, before the first row; the frames then only build rows from the computed (feature, day) arrays,
    a few features at a time, so that memory stays flat in features x days x id length.
    """
    dates = store.dates
    first, last = int(dates.year[0]), int(dates.year[-1])
    years = (request.years.start, request.years.end) if request.years else (first, last)
    if years[0] < first or years[1] > last:
        raise OutOfRangeError(
            f"years {years[0]}-{years[1]} fall outside the data of dataset {store.name!r} ({first}-{last})",
            pointer="/years",
        )
    _check_years(years, settings)
    stored = series_variables(request)
    lacking = [v for v in stored if v not in store.variables]
    if lacking:
        raise RequestError(
            f"dataset {store.name!r} has no variable {lacking[0]!r} (it has {list(store.variables)!r}); ask "
            "for the variables it holds",
            field="variables",
            pointer="/variables",
        )
    parsed, weights = features_and_weights(request, store, settings)
    start = int(np.searchsorted(dates.year, years[0], side="left"))
    stop = int(np.searchsorted(dates.year, years[1], side="right"))
    span = slice(start, stop)
    daily_lazy = aggregate(store, weights, variables=stored, time=span).drop_vars("tmean", errors="ignore")
    (daily_ds,) = cluster.compute(daily_lazy, settings=settings)
    # the same snapped daily means the indicators use (daily_values), so sums of the series match the table
    values = {v: daily_values(daily_ds, store, v) for v in ("tmax", "tmin", "prcp") if v in daily_ds}
    labels = np.asarray(
        [
            f"{y:04d}-{m:02d}-{d:02d}"
            for y, m, d in zip(dates.year[span], dates.month[span], dates.day[span], strict=True)
        ],
        dtype=object,
    )
    feature_ids = list(weights.feature_ids)
    variables = list(request.variables)

    def frames() -> Iterator[pd.DataFrame]:
        step = max(1, SERIES_PIECE_ROWS // max(len(labels), 1))
        for first_row in range(0, len(feature_ids), step):
            rows = slice(first_row, first_row + step)
            ids = np.asarray(feature_ids[rows], dtype=object)
            columns: dict[str, Any] = {
                "feature_id": np.repeat(ids, len(labels)),  # references to one str per feature, not copies
                "date": np.tile(labels, len(ids)),
            }
            for variable in variables:
                block = (
                    (values["tmax"][rows] + values["tmin"][rows]) / 2
                    if variable == "tmean"
                    else values[variable][rows]
                )
                columns[variable] = block.reshape(-1)
            yield pd.DataFrame(columns)

    return SeriesTable(
        columns=["feature_id", "date", *variables],
        provenance=provenance(request, store, parsed),
        warnings=[],
        frames=frames(),
    )


def run_series(request: SeriesRequest, store: Store, settings: Settings) -> RunResult:
    """The daily area-weighted series of every feature as one table (see series_table for large ones)."""
    return series_result(series_table(request, store, settings))


def series_result(table: SeriesTable) -> RunResult:
    """A series table's frames joined into one RunResult."""
    frames = list(table.frames)
    frame = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=table.columns)
    return RunResult(frame=frame, provenance=table.provenance, warnings=table.warnings)
