"""The one place where a request's work is scheduled and computed.

request -> features -> weights -> chunked aggregation (dask, computed once per feature batch)
-> daily series -> indicator table -> provenance. Routes, the CLI and the job worker all call ``run``.
"""

from __future__ import annotations

import hashlib
import json
import re
import uuid
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

import dask
import numpy as np
import pandas as pd
import pyproj
from scipy import sparse

from service import __version__, cluster, request_text
from service.aggregate import GridWeights, aggregate, lazy_series, weights_on
from service.encode import RunResult
from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.errors import (
    FeatureError,
    LimitExceededError,
    OutOfRangeError,
    RequestError,
    RunCancelledError,
    UnknownDatasetError,
)
from service.geometry import ParsedFeatures, Weights, compute_weights, parse_features
from service.indicators.base import VARIABLES, DailySeries, snap_daily, snap_decimals
from service.indicators.table import (
    IndicatorTable,
    RawValues,
    add_warning_notes,
    cell_groups,
    compute_cell_values,
    compute_table,
    compute_table_from_grid_cells,
    concat_raw,
    methods_statement,
    plan_indicators,
    resolve_request,
)
from service.indicators.windows import ResolvedEvents, compute_event_table, resolve_events
from service.prepared import Prepared, skipped_of, skipped_warnings
from service.schemas import IndicatorRequest, SeriesRequest, validate_request
from service.settings import Settings
from service.store import Store, open_store
from service.warning_codes import warning

Progress = Callable[[int, int], None]
Cancelled = Callable[[], bool]

# Features per aggregation batch: bounds memory (batch x days x 4 variables x 8 bytes; 1,000 features
# over 48 years is about 0.6 GB) while keeping one dask computation large enough to use every core.
DEFAULT_BATCH_FEATURES = 1000


# --- requests, datasets ---------------------------------------------------------------------------------------


def pick_store(stores: Mapping[str, Store], name: str | None) -> Store:
    """The store serving dataset ``name`` (the first one when None), or UnknownDatasetError."""
    if not stores:
        raise UnknownDatasetError("no dataset is served", field="dataset")
    if name is None:
        return next(iter(stores.values()))
    try:
        return stores[name]
    except KeyError:
        raise UnknownDatasetError(
            f"unknown dataset {name!r}; served datasets: {', '.join(sorted(stores))}",
            field="dataset",
            pointer="/dataset",
        ) from None


def request_hash(resolved: IndicatorRequest | SeriesRequest, fingerprint: str) -> str:
    """SHA-256 over the resolved request, the dataset fingerprint and the software version.

    The canonical JSON of {"fingerprint", "request", "software"} (sorted keys, compact), written feature by
    feature so that a large request never holds the interpreter in one call.
    """
    around = {"fingerprint": fingerprint, "software": __version__}
    return "sha256:" + request_text.canonical_sha256(resolved, around, "request")


def provenance(
    resolved: IndicatorRequest | SeriesRequest,
    store: Store,
    parsed: ParsedFeatures,
    skipped: list[dict[str, Any]] | None = None,
) -> dict[str, Any]:
    """Dataset, fingerprint, software, request hash and the resolved request (features by count and hash).

    ``skipped`` lists the features left out under invalid_features 'skip' (their rows hold nulls).
    """
    request = resolved.model_dump(mode="json", exclude={"features"})
    request["features"] = {
        "count": len(parsed.features),
        "sha256": request_text.features_sha256(resolved),
        "repaired": list(parsed.repaired),
        "skipped": list(skipped or []),
    }
    request["dataset"] = store.name
    document = {
        "dataset": store.name,
        "fingerprint": store.fingerprint,
        "software": f"wxshock {__version__}",
        "request_hash": request_hash(resolved, store.fingerprint),
        "request": request,
    }
    if isinstance(resolved, IndicatorRequest) and resolved.baseline is not None and resolved.indicators:
        # what was computed, in words (a resolved request only: an unresolved one has no choices to state)
        document["methods"] = methods_statement(resolved, snap_places(store, needed_variables(resolved)))
    return document


def snap_places(store: Store, variables: tuple[str, ...]) -> dict[str, int]:
    """The decimals each variable's daily means are snapped to (service.indicators.base.snap_decimals)."""
    return {v: snap_decimals(store.encoding(v).scale_factor, store.encoding(v).add_offset) for v in variables}


def _check_years(years: tuple[int, int], settings: Settings) -> None:
    """Refuse a request spanning more season-years than the configured limit."""
    count = years[1] - years[0] + 1
    if count > settings.max_years_per_request:
        raise LimitExceededError(
            f"the request spans {count} years ({years[0]}-{years[1]}); at most {settings.max_years_per_request} "
            "are allowed (setting max_years_per_request); ask for fewer years",
            limit="max_years_per_request",
            allowed=settings.max_years_per_request,
            got=count,
            pointer="/years",
        )


# --- features and weights ------------------------------------------------------------------------------------


def features_and_weights(
    request: IndicatorRequest | SeriesRequest, store: Store, settings: Settings, *, invalid: str = "fail"
) -> tuple[ParsedFeatures, Weights]:
    """Parse and check the request's features, then their weights on the store's grid.

    ``invalid`` 'skip' asks service.geometry to skip, not refuse, features that cannot be computed (their
    weight rows stay empty); the results then list them in ``skipped``.
    """
    parsed = parse_request_features(request, settings, invalid=invalid)
    return parsed, weights_for(parsed, request, store, settings, invalid=invalid)


def parse_request_features(
    request: IndicatorRequest | SeriesRequest, settings: Settings, *, invalid: str = "fail"
) -> ParsedFeatures:
    """The request's features, parsed and checked (service.geometry.parse_features)."""
    return parse_features(
        request_text.features_as_dict(request),
        id_property=request.id_property,
        crs=request.crs,
        repair=request.repair,
        max_vertices=settings.max_vertices_per_feature,
        **_skip_option(invalid),
    )


def weights_for(
    parsed: ParsedFeatures,
    request: IndicatorRequest | SeriesRequest,
    store: Store,
    settings: Settings,
    *,
    invalid: str = "fail",
) -> Weights | GridWeights:
    """The weights of parsed features under the request's weighting: on the store's grid, or, in a dataset
    with several grids, a GridWeights with exact weights on each grid the request reads (each with that grid's
    data mask and copy of the weight layer). A feature skipped on one grid has empty rows on every grid."""
    grids = grids_for(store, request_variables(request, store))
    weighting = request.weighting
    layer_name = None
    if not isinstance(weighting, str):
        layer_name = weighting.layer
        lacking = [g for g in grids if layer_name not in store.layers_on(g)]
        if lacking:
            where = (
                f"dataset {store.name!r}"
                if len(store.grids) == 1
                else f"grid {lacking[0]!r} of dataset {store.name!r}"
            )
            raise UnknownDatasetError(
                f"{where} has no weight layer {layer_name!r}; its layers: "
                f"{', '.join(store.layers_on(lacking[0])) or 'none'}",
                field="weighting.layer",
                pointer="/weighting/layer",
            )
        weighting = "area"
    by_grid = {
        grid: compute_weights(
            parsed,
            store.grids[grid],
            weighting=weighting,
            layer=store.read_layer(layer_name, grid) if layer_name is not None else None,
            data_mask=store.data_mask(grid),
            max_cells=settings.max_cells_per_feature,
            cache_size=settings.weights_cache_size,
            **_skip_option(invalid),
        )
        for grid in grids
    }
    if len(store.grids) == 1:
        return by_grid[grids[0]]
    weights = GridWeights(by_grid)
    skipped = {e["feature_id"] for e in skipped_of(weights)}
    if skipped and len(by_grid) > 1:
        weights = GridWeights({g: _without_rows(w, skipped) for g, w in by_grid.items()})
    return weights


def grids_for(store: Store, variables: Sequence[str]) -> list[str]:
    """The grids that hold ``variables``, in the store's order (the main grid when none does)."""
    wanted = {store.grid_of(v) for v in variables if v in store.variables}
    return [g for g in store.grids if g in wanted] or [store.main_grid]


def request_variables(request: IndicatorRequest | SeriesRequest, store: Store) -> tuple[str, ...]:
    """The stored daily variables a request reads: a series request's (tmean from tmax and tmin), a resolved
    indicator request's indicators'; every variable of the store when its indicators are not resolved yet."""
    if isinstance(request, SeriesRequest):
        return series_variables(request)
    if not request.indicators:
        return tuple(store.variables)
    return needed_variables(request)


def series_variables(request: SeriesRequest) -> tuple[str, ...]:
    """The stored daily variables a series request reads (tmean from tmax and tmin), in the order of VARIABLES."""
    asked = set(request.variables)
    if "tmean" in asked:
        asked |= {"tmax", "tmin"}
    return tuple(v for v in VARIABLES if v in asked)


def _without_rows(weights: Weights, feature_ids: set[str]) -> Weights:
    """The weights with the rows of ``feature_ids`` emptied (no cell, no coverage)."""
    rows = [i for i, fid in enumerate(weights.feature_ids) if fid in feature_ids]
    if not rows:
        return weights
    keep = np.ones(weights.matrix.shape[0])
    keep[rows] = 0.0
    matrix = (sparse.diags(keep) @ weights.matrix).tocsr()
    matrix.eliminate_zeros()
    n_cells = np.asarray(weights.n_cells).copy()
    coverage = np.asarray(weights.coverage, dtype=np.float64).copy()
    n_cells[rows] = 0
    coverage[rows] = 0.0
    return replace(weights, matrix=matrix, n_cells=n_cells, coverage=coverage)


def _skip_option(invalid: str) -> dict[str, str]:
    """The keyword asking service.geometry to skip bad features, where its functions take it."""
    import inspect

    if invalid == "fail" or "invalid" not in inspect.signature(parse_features).parameters:
        return {}
    return {"invalid": invalid}


def take_weights(weights: Weights | GridWeights, rows: np.ndarray) -> Weights | GridWeights:
    """The weights of a subset of features (rows in the given order), on every grid of a GridWeights."""
    if isinstance(weights, GridWeights):
        return GridWeights(
            {g: take_weights(w, rows) for g, w in weights.by_grid.items()}, weights.per_grid_columns
        )
    n = weights.matrix.shape[0]
    changes: dict[str, Any] = {}
    for f in fields(weights):
        value = getattr(weights, f.name)
        if f.name == "matrix":
            changes[f.name] = value[rows]
        elif f.name == "key":
            changes[f.name] = f"{value}:{hashlib.sha256(np.asarray(rows).tobytes()).hexdigest()[:16]}"
        elif isinstance(value, np.ndarray) and value.shape[:1] == (n,):
            changes[f.name] = value[rows]
        elif isinstance(value, list | tuple) and len(value) == n:
            changes[f.name] = type(value)(value[i] for i in rows)
    return replace(weights, **changes)


def feature_batches(weights: Weights, batch_size: int) -> list[np.ndarray]:
    """Feature rows grouped into batches of neighbours, so that a batch touches few chunks."""
    matrix = weights.matrix.tocsr()
    n = matrix.shape[0]
    if n <= batch_size:
        return [np.arange(n)]
    # The first cell a feature touches orders features along the grid's rows; neighbours share chunks.
    starts = matrix.indptr[:-1]
    first_cell = np.where(np.diff(matrix.indptr) > 0, matrix.indices[np.minimum(starts, matrix.nnz - 1)], 0)
    order = np.argsort(first_cell, kind="stable")
    return [order[i : i + batch_size] for i in range(0, n, batch_size)]


def time_span(store: Store, last_year: int) -> slice:
    """Time steps from the first day of data to the last day of calendar year ``last_year``."""
    years = store.dates.year
    stop = int(np.searchsorted(years, last_year, side="right"))
    if stop == 0:
        raise OutOfRangeError(
            f"year {last_year} is before the data of dataset {store.name!r} (from {int(years[0])})",
            pointer="/years",
        )
    return slice(0, stop)


def daily_values(ds: Any, store: Store, var: str) -> np.ndarray | None:
    """One variable of a computed aggregation as float64 (feature, time), snapped; None when not aggregated.

    Snapped to the store's storage step plus three decimals (service.indicators.base.snap_daily), so a
    weighted mean that is exact in storage units (25.0 degC, 1.0 mm) is exact here and thresholds compare
    it as stored.
    """
    if var not in ds:
        return None
    values = np.array(ds[var].values, dtype=np.float64)  # a copy: snapping works in place
    enc = store.encoding(var)
    return snap_daily(values, snap_decimals(enc.scale_factor, enc.add_offset))


def check_cells_grids(request: IndicatorRequest, store: Store) -> None:
    """Under aggregation 'cells' an indicator is computed on the cells of one grid: refuse (422) one whose
    variables lie on different grids of the dataset, naming it and the grids."""
    order = list(store.grids)
    for i, planned in enumerate(plan_indicators(request.indicators or [])):
        present = [v for v in planned.indicator.variables if v in store.variables]
        grids = sorted({store.grid_of(v) for v in present}, key=order.index)
        if len(grids) > 1:
            on = ", ".join(f"{v} on {store.grid_of(v)!r}" for v in present)
            raise RequestError(
                f"indicator {planned.column!r} reads variables on different grids of dataset {store.name!r} "
                f"({on}); under aggregation 'cells' an indicator is computed on the cells of one grid: ask for "
                f"aggregation 'series' (or leave {planned.column!r} out)",
                field=f"indicators[{i}]",
                pointer="/aggregation",
            )


def needed_variables(request: IndicatorRequest) -> tuple[str, ...]:
    """The daily variables a resolved request's indicators read, in the order of VARIABLES."""
    used = {v for p in plan_indicators(request.indicators or []) for v in p.indicator.variables}
    return tuple(v for v in VARIABLES if v in used)


def _daily_series(ds: Any, store: Store, span: slice, latitude: np.ndarray) -> DailySeries:
    """The computed aggregation as the indicators' DailySeries (variables not aggregated are None)."""
    dates = store.dates
    return DailySeries(
        tmax=daily_values(ds, store, "tmax"),
        tmin=daily_values(ds, store, "tmin"),
        prcp=daily_values(ds, store, "prcp"),
        year=np.asarray(dates.year[span]),
        month=np.asarray(dates.month[span]),
        day=np.asarray(dates.day[span]),
        dayofyear=np.asarray(dates.dayofyear[span]),
        calendar=store.calendar,
        latitude=np.asarray(latitude, dtype=np.float64),
    )


def _feature_columns(frame: pd.DataFrame, weights: Weights | GridWeights, rows: np.ndarray) -> pd.DataFrame:
    """Add each feature's coverage, cell count and area to its rows."""
    merged = frame.merge(_feature_frame(weights, rows), on="feature_id", how="left", sort=False)
    return merged


def _feature_frame(weights: Weights | GridWeights, rows: np.ndarray) -> pd.DataFrame:
    """feature_id, coverage, cells and area_km2 of the features ``rows``: ``coverage`` and ``cells`` on its one
    grid, or, in a dataset with several grids, ``coverage_<grid>`` and ``cells_<grid>`` on each grid the
    request read (CONTRACTS.md); ``area_km2`` the feature's area (on the first grid read)."""
    if isinstance(weights, GridWeights):
        by_grid, suffixed = weights.by_grid, weights.per_grid_columns
    else:
        by_grid, suffixed = {"": weights}, False
    first = next(iter(by_grid.values()))
    columns: dict[str, Any] = {"feature_id": [first.feature_ids[i] for i in rows]}
    for grid, grid_weights in by_grid.items():
        suffix = f"_{grid}" if suffixed else ""
        columns[f"coverage{suffix}"] = np.asarray(grid_weights.coverage)[rows]
        columns[f"cells{suffix}"] = np.asarray(grid_weights.n_cells)[rows].astype("int64")
    columns["area_km2"] = np.asarray(first.area_km2)[rows]
    return pd.DataFrame(columns)


# Bytes of daily means (features x days x variables, float64) a feature batch may hold at once: long records
# get smaller batches, so that memory stays flat in years (1,000 features x 48 years x 3 variables is 420 MB).
BATCH_SERIES_BYTES = 448 << 20


def batch_size_for(batch_size: int, span: slice, variables: tuple[str, ...]) -> int:
    """Features per batch: at most ``batch_size``, fewer when their daily means would pass BATCH_SERIES_BYTES."""
    days = max(1, (span.stop or 0) - (span.start or 0))
    per_feature = days * max(1, len(variables)) * 8
    return max(1, min(batch_size, BATCH_SERIES_BYTES // per_feature))


def _without_features(request: IndicatorRequest) -> IndicatorRequest:
    """The request with its first feature alone: what a batch task needs of it (the table reads the features'
    ids and properties from its own arguments), so that no task carries every community's geometry."""
    features = request.features
    first = features.features[0] if hasattr(features, "features") else features
    return request.model_copy(update={"features": first})


def lazy_batch_table(
    store: Store,
    weights: Weights | GridWeights,
    rows: np.ndarray,
    properties: list[dict | None],
    resolved: IndicatorRequest,
    span: slice,
    variables: tuple[str, ...],
) -> Any:
    """One feature batch as a dask graph ending in one task that returns its table: (frame, warnings).

    The chunk tasks and the reduction are the aggregation's (service.aggregate); the last task takes the
    batch's daily means, snaps them, computes the indicator table and adds the feature columns. On a cluster
    that runs on a worker, so the daily series never travel to the server.
    """
    import dask

    batch = take_weights(weights, rows)
    # one task per variable finishes its whole series into one array (no per-block arrays joined by dask)
    arrays = lazy_series(store, batch, variables=variables, time=span)
    by_id = _feature_frame(batch, np.arange(len(rows)))
    # a key of its own: two runs with the same features but other indicators must not share a table
    token = f"wxshock-table-{uuid.uuid4().hex}"
    return dask.delayed(batch_table, pure=False)(
        arrays,
        store,
        span,
        np.asarray(batch.latitude, dtype=np.float64),
        list(batch.feature_ids),
        properties,
        resolved,
        by_id,
        dask_key_name=token,
    )


def batch_table(
    arrays: dict[str, np.ndarray],
    store: Store,
    span: slice,
    latitude: np.ndarray,
    feature_ids: list[str],
    properties: list[dict | None],
    resolved: IndicatorRequest,
    by_id: pd.DataFrame,
) -> tuple[pd.DataFrame, list[dict[str, Any]]]:
    """The last task of a batch: (feature, day) means of each variable -> the batch's rows and warnings.

    The means are snapped in place (they are this task's own arrays), as :func:`daily_values` snaps them.
    """
    daily = batch_daily(arrays, store, span, latitude)
    table = compute_table(daily, feature_ids, properties, resolved)
    return table.frame.merge(by_id, on="feature_id", how="left", sort=False), table.warnings


def batch_daily(
    arrays: dict[str, np.ndarray], store: Store, span: slice, latitude: np.ndarray
) -> DailySeries:
    """A batch task's (feature, day) means of each variable over ``span``, snapped in place, as a DailySeries."""
    values: dict[str, np.ndarray | None] = dict.fromkeys(VARIABLES)
    for var, array in arrays.items():
        array = np.asarray(array, dtype=np.float64)
        if not array.flags.writeable:
            array = array.copy()
        enc = store.encoding(var)
        values[var] = snap_daily(array, snap_decimals(enc.scale_factor, enc.add_offset))
    dates = store.dates
    return DailySeries(
        **values,
        year=np.asarray(dates.year[span]),
        month=np.asarray(dates.month[span]),
        day=np.asarray(dates.day[span]),
        dayofyear=np.asarray(dates.dayofyear[span]),
        calendar=store.calendar,
        latitude=latitude,
    )


@dataclass(frozen=True)
class BatchJob:
    """One table that a batch task computes from the batch's daily means: season rows or event rows.

    ``events`` holds the batch's events alone (:func:`_batch_events`) and ``daily_rows`` the row of each
    one's feature in the batch; a season job has ``resolved`` (its features dropped) instead.
    """

    resolved: IndicatorRequest | None = None
    events: ResolvedEvents | None = None
    daily_rows: np.ndarray | None = None


def lazy_batch_tables(
    store: Store,
    weights: Weights | GridWeights,
    rows: np.ndarray,
    properties: list[dict | None],
    jobs: list[BatchJob],
    span: slice,
    variables: tuple[str, ...],
) -> Any:
    """One feature batch aggregated once, as a dask graph ending in one task that returns every job's table.

    As :func:`lazy_batch_table` (the chunk tasks and the reduction are the aggregation's, the last task runs
    where they ran, only the tables come back), for events and for variants that share one aggregation.
    """
    batch = take_weights(weights, rows)
    arrays = lazy_series(store, batch, variables=variables, time=span)  # as lazy_batch_table
    by_id = _feature_frame(batch, np.arange(len(rows)))
    token = f"wxshock-table-{uuid.uuid4().hex}"  # a key of its own, as in lazy_batch_table
    return dask.delayed(batch_tables, pure=False)(
        arrays,
        store,
        span,
        np.asarray(batch.latitude, dtype=np.float64),
        list(batch.feature_ids),
        properties,
        jobs,
        by_id,
        dask_key_name=token,
    )


def batch_tables(
    arrays: dict[str, np.ndarray],
    store: Store,
    span: slice,
    latitude: np.ndarray,
    feature_ids: list[str],
    properties: list[dict | None],
    jobs: list[BatchJob],
    by_id: pd.DataFrame,
) -> list[tuple[pd.DataFrame, list[dict[str, Any]]]]:
    """The last task of a batch with events or variants: the daily means -> each job's rows and warnings."""
    daily = batch_daily(arrays, store, span, latitude)
    out = []
    for job in jobs:
        if job.events is not None and job.daily_rows is not None:
            events = np.arange(job.daily_rows.size)
            table = compute_event_table(daily, job.daily_rows, events, feature_ids, job.events)
            frame, warnings = table.frame, table.warnings
        elif job.resolved is not None:
            made = compute_table(daily, feature_ids, properties, job.resolved)
            frame, warnings = made.frame, made.warnings
        else:
            raise RuntimeError("a batch job needs a season request or events")
        out.append((frame.merge(by_id, on="feature_id", how="left", sort=False), warnings))
    return out


# --- the runs -------------------------------------------------------------------------------------------------


def run(
    request: IndicatorRequest,
    store: Store,
    settings: Settings,
    *,
    progress: Progress | None = None,
    cancelled: Cancelled | None = None,
    batch_size: int = DEFAULT_BATCH_FEATURES,
    invalid_features: str = "fail",
    prepared: Prepared | None = None,
    stores: Mapping[str, Store] | None = None,
) -> RunResult:
    """Season indicators for every feature of the request, one row per (feature_id, year).

    ``invalid_features`` is what to do with a feature that cannot be computed when the request does not say
    ('fail' on demand, 'skip' for jobs). ``prepared`` reuses the weights of an earlier :func:`prepare`.
    A request with events gives one row per event instead (:func:`run_events`); one with variants computes
    every variant, the datasets they name taken from ``stores`` (:func:`run_variants`).
    """
    if request.variants or request.events is not None:
        runner = run_variants if request.variants else run_events
        return runner(
            request,
            store,
            settings,
            progress=progress,
            cancelled=cancelled,
            batch_size=batch_size,
            invalid_features=invalid_features,
            prepared=prepared,
            stores=stores,
        )
    run_ = _batch_run(request, store, settings, progress, cancelled, batch_size, invalid_features, prepared)
    resolved, prepared, batches = run_.resolved, run_.prepared, run_.batches
    parsed, weights = prepared.parsed, prepared.weights
    parts = dict(run_.computed)
    frames = [parts[k][0] for k in range(len(batches))]
    warnings = [w for k in range(len(batches)) for w in parts[k][1]]
    frame = _in_feature_order(pd.concat(frames, ignore_index=True), weights.feature_ids)
    warnings = _warnings_in_order(warnings, weights.feature_ids)
    frame, warnings = _without_skipped(frame, warnings, prepared.skipped)
    later = [
        warning("repaired_geometry", "invalid geometry was repaired (make_valid)", feature_id=feature_id)
        for feature_id in parsed.repaired
    ] + skipped_warnings(prepared.skipped)
    warnings.extend(later)
    frame = add_warning_notes(frame, later)  # notes last, with the codes of the warnings made here
    return RunResult(
        frame=frame,
        provenance=provenance(resolved, store, parsed, prepared.skipped),
        warnings=warnings,
    )


@dataclass
class _BatchRun:
    """A run's resolved request, weights and feature batches, and its batch tables as they are computed."""

    resolved: IndicatorRequest
    prepared: Prepared
    batches: list[np.ndarray]
    # (batch number, (frame, warnings)) in the order batches finish; raises RunCancelledError at the end when
    # cancelled before every batch was computed
    computed: Iterator[tuple[int, tuple[pd.DataFrame, list[dict[str, Any]]]]]


def _batch_run(
    request: IndicatorRequest,
    store: Store,
    settings: Settings,
    progress: Progress | None,
    cancelled: Cancelled | None,
    batch_size: int,
    invalid_features: str,
    prepared: Prepared | None,
) -> _BatchRun:
    """The common part of :func:`run` and :func:`run_in_pieces`: resolve, weigh, batch, compute lazily."""
    resolved = resolve_request(request, store.dates, store.calendar, store.variables)
    _check_years((resolved.years.start, resolved.years.end), settings)
    if resolved.aggregation == "cells":
        check_cells_grids(resolved, store)
    variables = needed_variables(resolved)
    if prepared is None:
        prepared = _prepare_resolved(resolved, store, settings, invalid_features)
    parsed, weights = prepared.parsed, prepared.weights
    # a fixed baseline may lie after the requested years: read up to whichever ends later
    span = time_span(store, max(resolved.years.end, getattr(resolved.baseline, "end", resolved.years.end)))
    properties = [f.properties for f in parsed.features]
    batches = feature_batches(weights, batch_size_for(batch_size, span, variables))
    light = _without_features(resolved)
    computed: Iterator[tuple[int, tuple[pd.DataFrame, list[dict[str, Any]]]]]
    if resolved.aggregation == "cells":
        computed = _cells_batches(
            batches, store, weights, properties, resolved, span, variables, settings, cancelled
        )
    else:
        lazy = (
            (k, lazy_batch_table(store, weights, rows, [properties[i] for i in rows], light, span, variables))
            for k, rows in enumerate(batches)
        )
        # Each batch's aggregation and its indicator table run where the chunks are read (local threads or the
        # cluster's workers); only the table comes back. Batches finish in any order; rows are put in order later.
        computed = cluster.compute_each(lazy, settings=settings, cancelled=cancelled)
    return _BatchRun(resolved, prepared, batches, _counted(computed, batches, len(parsed.features), progress))


def _counted(
    computed: Iterator[tuple[int, Any]], batches: list[np.ndarray], total: int, progress: Progress | None
) -> Iterator[tuple[int, Any]]:
    """The batches as they finish, progress reported per batch; RunCancelledError when some never came."""
    done = seen = 0
    if progress is not None:
        progress(0, total)
    for k, part in computed:
        seen += 1
        done += len(batches[k])
        if progress is not None:
            progress(done, total)
        yield k, part
    if seen < len(batches):
        raise RunCancelledError(f"cancelled after {done} of {total} features")


# Features per piece of a table written piece by piece (run_in_pieces): 1,000 features x 48 years is 48,000 rows.
PIECE_FEATURES = 1000


def run_in_pieces(
    request: IndicatorRequest,
    store: Store,
    settings: Settings,
    spill: Path,
    *,
    progress: Progress | None = None,
    cancelled: Cancelled | None = None,
    batch_size: int = DEFAULT_BATCH_FEATURES,
    invalid_features: str = "fail",
    prepared: Prepared | None = None,
) -> SeriesTable | None:
    """The table of :func:`run`, row for row, made batch by batch: memory flat in the number of features.

    Each finished batch's rows (in request order within the batch, notes and skipped features as
    :func:`run` makes them) are written to a file in the directory ``spill``, cut at every PIECE_FEATURES-th
    feature of the request; the frames returned read those files back, PIECE_FEATURES features at a time, in
    request order. The caller encodes them (service.encode.stream) and then removes ``spill``. None for a
    request with events or variants (their runs are made whole: use :func:`run`).
    """
    import pickle

    if request.variants or request.events is not None:
        return None
    run_ = _batch_run(request, store, settings, progress, cancelled, batch_size, invalid_features, prepared)
    resolved, prepared = run_.resolved, run_.prepared
    parsed, weights = prepared.parsed, prepared.weights
    later = [
        warning("repaired_geometry", "invalid geometry was repaired (make_valid)", feature_id=feature_id)
        for feature_id in parsed.repaired
    ] + skipped_warnings(prepared.skipped)
    position = {fid: i for i, fid in enumerate(weights.feature_ids)}
    spill.mkdir(parents=True, exist_ok=True)
    columns: list[str] | None = None
    warnings: list[dict[str, Any]] = []
    paths = {}
    for k, (frame, batch_warnings) in run_.computed:
        at = frame["feature_id"].map(position).to_numpy()
        order = np.argsort(at, kind="stable")
        frame, at = frame.iloc[order].reset_index(drop=True), at[order]
        frame, batch_warnings = _without_skipped(frame, batch_warnings, prepared.skipped)
        frame = add_warning_notes(frame, later)
        columns = columns or [str(c) for c in frame.columns]
        warnings.extend(batch_warnings)
        piece = at // PIECE_FEATURES
        cuts = np.flatnonzero(np.diff(piece)) + 1
        paths[k] = spill / f"batch-{k}.pickle"
        with open(paths[k], "wb") as handle:
            for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, len(frame)], strict=True):
                if hi > lo:
                    pickle.dump((int(piece[lo]), at[lo:hi], frame.iloc[lo:hi]), handle, protocol=5)
    warnings = _warnings_in_order(warnings, weights.feature_ids)
    warnings.extend(later)
    n_pieces = -(-len(weights.feature_ids) // PIECE_FEATURES)
    return SeriesTable(
        columns=columns or [],
        provenance=provenance(resolved, store, parsed, prepared.skipped),
        warnings=warnings,
        frames=_pieces_in_order([paths[k] for k in sorted(paths)], n_pieces),
    )


def _pieces_in_order(paths: list[Path], n_pieces: int) -> Iterator[pd.DataFrame]:
    """The spilled rows, PIECE_FEATURES features of the request at a time, in request order."""
    import pickle

    handles = [open(path, "rb") for path in paths]  # noqa: SIM115 - closed below, after the last piece

    def next_of(handle: Any) -> Any:
        try:
            return pickle.load(handle)
        except EOFError:
            return None

    try:
        heads = [next_of(h) for h in handles]
        for piece in range(n_pieces):
            found, at = [], []
            for i, handle in enumerate(handles):
                while heads[i] is not None and heads[i][0] == piece:
                    at.append(heads[i][1])
                    found.append(heads[i][2])
                    heads[i] = next_of(handle)
            if found:
                frame = pd.concat(found, ignore_index=True)
                yield frame.iloc[np.argsort(np.concatenate(at), kind="stable")].reset_index(drop=True)
    finally:
        for handle in handles:
            handle.close()


def _cells_batches(
    batches: list[np.ndarray],
    store: Store,
    weights: Weights,
    properties: list[dict | None],
    resolved: IndicatorRequest,
    span: slice,
    variables: tuple[str, ...],
    settings: Settings,
    cancelled: Cancelled | None,
) -> Iterator[tuple[int, tuple[pd.DataFrame, list[dict[str, Any]]]]]:
    """Aggregation "cells", batch after batch (each batch's cell tasks run on the cluster by themselves)."""
    for k, rows in enumerate(batches):
        if cancelled is not None and cancelled():
            return
        batch = take_weights(weights, rows)
        table = cells_table(store, batch, [properties[i] for i in rows], resolved, span, variables, settings)
        yield k, (_feature_columns(table.frame, weights, rows), table.warnings)


def _without_skipped(
    frame: pd.DataFrame, warnings: list[dict[str, Any]], skipped: list[dict[str, Any]]
) -> tuple[pd.DataFrame, list[dict[str, Any]]]:
    """A skipped feature's rows (all nulls) lose the warnings its missing values made; the caller adds one
    feature_skipped warning for it instead."""
    if not skipped:
        return frame, warnings
    ids = {e["feature_id"] for e in skipped if e["feature_id"] is not None}
    kept = [w for w in warnings if w.get("feature_id") not in ids]
    if "notes" in frame.columns:
        frame = frame.copy()
        frame.loc[frame["feature_id"].isin(ids), "notes"] = ""
    return frame, kept


def prepare(
    request: IndicatorRequest,
    store: Store,
    settings: Settings,
    *,
    invalid_features: str = "fail",
    keep_shapes: bool = False,
    stores: Mapping[str, Store] | None = None,
) -> Prepared:
    """Every check a run makes before reading daily values, and the features' weights: what a job's
    submission runs (so it refuses what the run would refuse) and what its run reuses.

    Request-level faults raise; per-feature faults raise under 'fail' (one error listing every bad feature)
    and are skipped under 'skip'. A request whose every feature is skipped raises FeatureError (422).
    ``keep_shapes`` is kept for callers that draw the features (the shapes are always kept in memory; a
    pickled Prepared leaves them out).
    With events or variants the checks are theirs (:func:`prepare_events`, :func:`prepare_variants`);
    ``stores`` serves the datasets that variants name.
    """
    if request.variants:
        return prepare_variants(request, store, settings, invalid_features=invalid_features, stores=stores)
    if request.events is not None:
        return prepare_events(request, store, settings, invalid_features=invalid_features)[0]
    resolved = resolve_request(request, store.dates, store.calendar, store.variables)
    _check_years((resolved.years.start, resolved.years.end), settings)
    if resolved.aggregation == "cells":
        check_cells_grids(resolved, store)
    prepared = _prepare_resolved(resolved, store, settings, invalid_features, keep_shapes)
    _dry_run(resolved, store, prepared)
    return prepared


def _dry_run(resolved: IndicatorRequest, store: Store, prepared: Prepared) -> None:
    """Compute the table of one feature on missing daily values over the run's own days.

    The run resolves the request again on the days it reads, and some indicators check their parameters
    against each other only when they compute; a dry run on missing values raises the same errors in a few
    milliseconds, so that a job's submission refuses what its run would refuse.
    """
    skipped = {e["feature_id"] for e in prepared.skipped}
    feature = next(f for f in prepared.parsed.features if f.id not in skipped)
    span = time_span(store, max(resolved.years.end, getattr(resolved.baseline, "end", resolved.years.end)))
    days = span.stop - span.start
    needed = needed_variables(resolved)

    def missing(name: str) -> np.ndarray | None:
        return np.full((1, days), np.nan) if name in needed else None

    dates = store.dates
    daily = DailySeries(
        tmax=missing("tmax"),
        tmin=missing("tmin"),
        prcp=missing("prcp"),
        year=np.asarray(dates.year[span]),
        month=np.asarray(dates.month[span]),
        day=np.asarray(dates.day[span]),
        dayofyear=np.asarray(dates.dayofyear[span]),
        calendar=store.calendar,
        latitude=np.zeros(1),
    )
    with np.errstate(all="ignore"):
        compute_table(daily, [feature.id], [feature.properties], resolved)


def _prepare_resolved(
    resolved: IndicatorRequest | SeriesRequest,
    store: Store,
    settings: Settings,
    invalid_features: str,
    keep_shapes: bool = False,
) -> Prepared:
    """The weights of a resolved request's features under the request's (or the caller's) invalid_features."""
    mode = resolved.invalid_features or invalid_features
    parsed, weights = features_and_weights(resolved, store, settings, invalid=mode)
    skipped = skipped_of(parsed, weights)
    skipped_ids = {e["feature_id"] for e in skipped}
    if skipped and all(f.id in skipped_ids for f in parsed.features):
        first = skipped[0]
        raise FeatureError(
            f"no feature of the request can be computed: all {len(skipped)} are invalid or without data "
            f"(first: feature {first['feature_id']!r}: {first['reason']}); see 'errors'",
            pointer=first["pointer"],
            feature_id=first["feature_id"],
            errors=[
                {
                    "pointer": e["pointer"],
                    "feature_id": e["feature_id"],
                    "code": e["code"],
                    "detail": e["reason"],
                }
                for e in skipped
            ],
        )
    return Prepared(parsed, weights, skipped, mode)


# --- events ---------------------------------------------------------------------------------------------------


def resolve_events_for(request: IndicatorRequest, store: Store, feature_ids: list[str]) -> ResolvedEvents:
    """A request with events resolved against ``store``: defaults filled, events planned, baselines made."""
    return resolve_events(request, feature_ids, store.dates, store.calendar, store.variables)


def prepare_events(
    request: IndicatorRequest,
    store: Store,
    settings: Settings,
    *,
    invalid_features: str = "fail",
    prepared: Prepared | None = None,
) -> tuple[Prepared, ResolvedEvents]:
    """The checks of a request with events (features, weights, events, windows, baseline) and a dry run."""
    if prepared is None:
        prepared = _prepare_resolved(request, store, settings, invalid_features)
    resolved = resolve_events_for(request, store, list(prepared.weights.feature_ids))
    years = resolved.plan.years
    _check_years((int(years[0]), int(years[-1])), settings)
    _dry_run_events(resolved, store, prepared)
    return prepared, resolved


def _dry_run_events(resolved: ResolvedEvents, store: Store, prepared: Prepared) -> None:
    """The first computable event's windows on missing daily values: raises what the run would raise."""
    plan = resolved.plan
    skipped = {e["feature_id"] for e in prepared.skipped}
    ids = list(prepared.weights.feature_ids)
    usable = [i for i, row in enumerate(plan.feature_rows.tolist()) if ids[row] not in skipped]
    if not usable:
        return
    event = usable[0]
    needed = needed_variables(resolved.request)
    dates = store.dates
    days = int(dates.year.size)

    def missing(name: str) -> np.ndarray | None:
        return np.full((1, days), np.nan) if name in needed else None

    daily = DailySeries(
        tmax=missing("tmax"),
        tmin=missing("tmin"),
        prcp=missing("prcp"),
        year=np.asarray(dates.year),
        month=np.asarray(dates.month),
        day=np.asarray(dates.day),
        dayofyear=np.asarray(dates.dayofyear),
        calendar=store.calendar,
        latitude=np.zeros(1),
    )
    with np.errstate(all="ignore"):
        compute_event_table(
            daily, np.array([0]), np.array([event]), [ids[plan.feature_rows[event]]], resolved
        )


def _event_summary(request: dict[str, Any], resolved: IndicatorRequest) -> dict[str, Any]:
    """The provenance's request with its events as a count and SHA-256 (as the features are)."""
    if resolved.events is None:
        return request
    digest = hashlib.sha256()
    digest.update(b"[")
    for i, event in enumerate(resolved.events):
        text = json.dumps(
            event.model_dump(mode="json"), sort_keys=True, separators=(",", ":"), ensure_ascii=False
        )
        digest.update((("," if i else "") + text).encode("utf-8"))
    digest.update(b"]")
    request["events"] = {"count": len(resolved.events), "sha256": digest.hexdigest()}
    return request


def _event_batches(plan_rows: np.ndarray, weights: Weights, batch_size: int) -> list[np.ndarray]:
    """Batches of the feature rows that have events, neighbours together (features without events are not read)."""
    with_events = np.unique(plan_rows)
    if not with_events.size:
        return []
    subset = take_weights(weights, with_events)
    return [with_events[rows] for rows in feature_batches(subset, batch_size)]


def _batch_events(resolved: ResolvedEvents, light: IndicatorRequest, events: np.ndarray) -> ResolvedEvents:
    """What a batch task needs of a resolution: the plan of the events ``events`` alone and the request
    ``light`` (without features and events), so that no task carries every event and community."""
    plan = resolved.plan
    own = replace(
        plan,
        event_ids=plan.event_ids[events],
        feature_rows=plan.feature_rows[events],
        date_ordinals=plan.date_ordinals[events],
        range_of=plan.range_of[events],
        window_year=plan.window_year[events],
    )
    return ResolvedEvents(request=light, plan=own, groups=resolved.groups)


def _light_events_request(resolved: ResolvedEvents) -> IndicatorRequest:
    """The resolved request without its features and events (a batch task's copy)."""
    return _without_features(resolved.request).model_copy(update={"events": None})


def _events_job(
    resolved: ResolvedEvents, light: IndicatorRequest, rows: np.ndarray, n_features: int
) -> tuple[BatchJob, np.ndarray]:
    """The job of a feature batch's events and, per event of the batch, its index in the request."""
    plan = resolved.plan
    position = np.full(n_features, -1, dtype=np.int64)
    position[rows] = np.arange(rows.size)
    events = np.flatnonzero(position[plan.feature_rows] >= 0)
    job = BatchJob(
        events=_batch_events(resolved, light, events), daily_rows=position[plan.feature_rows[events]]
    )
    return job, events


def _row_order(frame: pd.DataFrame, events: np.ndarray) -> np.ndarray:
    """The request index of each row of an event table (each event's rows come together)."""
    return np.repeat(events, len(frame) // max(events.size, 1))


def run_events(
    request: IndicatorRequest,
    store: Store,
    settings: Settings,
    *,
    progress: Progress | None = None,
    cancelled: Cancelled | None = None,
    batch_size: int = DEFAULT_BATCH_FEATURES,
    invalid_features: str = "fail",
    prepared: Prepared | None = None,
    stores: Mapping[str, Store] | None = None,
) -> RunResult:
    """Event windows: one row per event (wide) or per (event, window, indicator) (long), in request order.

    Each feature's daily series is aggregated once over the whole record, in feature batches, whatever the
    number of its events; every window of every event is computed from it (service.indicators.windows).
    Features without events are not read.
    """
    if prepared is None:
        prepared, resolved = prepare_events(request, store, settings, invalid_features=invalid_features)
    else:
        resolved = resolve_events_for(request, store, list(prepared.weights.feature_ids))
    parsed, weights = prepared.parsed, prepared.weights
    plan = resolved.plan
    variables = needed_variables(resolved.request)
    span = slice(0, int(store.dates.year.size))  # the plan is made on the whole record
    batches = _event_batches(plan.feature_rows, weights, batch_size_for(batch_size, span, variables))
    total = int(sum(b.size for b in batches))
    light = _light_events_request(resolved)
    events_of: dict[int, np.ndarray] = {}

    def lazy() -> Iterator[tuple[int, Any]]:
        for k, rows in enumerate(batches):
            job, events_of[k] = _events_job(resolved, light, rows, len(weights.feature_ids))
            yield k, lazy_batch_tables(store, weights, rows, [None] * rows.size, [job], span, variables)

    parts: dict[int, tuple[pd.DataFrame, list[dict[str, Any]]]] = {}
    done = 0
    if progress is not None:
        progress(0, total)
    # as run: each batch's aggregation and its event table run where the chunks are read; only the table
    # comes back, batches finish in any order and are put in order below
    for k, (part,) in cluster.compute_each(lazy(), settings=settings, cancelled=cancelled):
        parts[k] = part
        done += batches[k].size
        if progress is not None:
            progress(done, total)
    if len(parts) < len(batches):
        raise RunCancelledError(f"cancelled after {done} of {total} features")
    frames = [parts[k][0] for k in range(len(batches))]
    orders = [_row_order(parts[k][0], events_of[k]) for k in range(len(batches))]
    warnings = [w for k in range(len(batches)) for w in parts[k][1]]
    frame = pd.concat(frames, ignore_index=True)
    frame = frame.iloc[np.argsort(np.concatenate(orders), kind="stable")].reset_index(drop=True)
    warnings = _warnings_in_order(warnings, weights.feature_ids)
    frame, warnings = _without_skipped(frame, warnings, prepared.skipped)
    later = [
        warning("repaired_geometry", "invalid geometry was repaired (make_valid)", feature_id=feature_id)
        for feature_id in parsed.repaired
    ] + skipped_warnings(prepared.skipped)
    warnings.extend(later)
    frame = add_warning_notes(frame, later)
    document = provenance(resolved.request, store, parsed, prepared.skipped)
    document["request"] = _event_summary(document["request"], resolved.request)
    return RunResult(frame=frame, provenance=document, warnings=warnings)


# --- variants -------------------------------------------------------------------------------------------------

# The columns _feature_columns adds (per grid, suffixed '_<grid>', where a dataset has several grids).
FEATURE_COLUMNS = ("coverage", "cells", "area_km2")


@dataclass
class _VariantRun:
    """One variant of a request: its name, request and dataset, its resolution and the parts computed."""

    index: int
    name: str
    request: IndicatorRequest
    store: Store
    given: frozenset[str] = frozenset()  # the fields the variant itself gives (its errors point into it)
    resolved: IndicatorRequest | None = None  # a season request, resolved
    events: ResolvedEvents | None = None  # a request with events, resolved
    skipped: list[dict[str, Any]] = field(default_factory=list)
    frames: list[pd.DataFrame] = field(default_factory=list)
    orders: list[np.ndarray] = field(default_factory=list)
    warnings: list[dict[str, Any]] = field(default_factory=list)

    @property
    def final(self) -> IndicatorRequest:
        """The resolved request."""
        resolved = self.events.request if self.events is not None else self.resolved
        if resolved is None:
            raise RuntimeError(f"variant {self.name!r} was not resolved")
        return resolved

    @property
    def weights_key(self) -> str:
        """Variants with equal keys share their weights: same dataset, weighting and, in a dataset with
        several grids, the same grids read (weights_for weighs on the grids of the request's variables)."""
        weighting = self.request.weighting
        text = weighting if isinstance(weighting, str) else json.dumps(weighting.model_dump(), sort_keys=True)
        grids = ""
        if len(self.store.grids) > 1:
            grids = "|" + ",".join(grids_for(self.store, request_variables(self.request, self.store)))
        return f"{self.store.name}|{text}{grids}"

    @property
    def sharing_key(self) -> str:
        """Variants with equal keys share one aggregation: same weights and aggregation order."""
        return f"{self.weights_key}|{getattr(self.request, 'aggregation', 'series')}"


def variant_requests(request: IndicatorRequest) -> list[tuple[str, IndicatorRequest]]:
    """Each variant as a whole request: the request's fields, those the variant gives replaced."""
    return [
        (v.name, request.model_copy(update={**v.overrides(), "variants": None}))
        for v in request.variants or []
    ]


def _variant_runs(
    request: IndicatorRequest, store: Store, stores: Mapping[str, Store] | None
) -> list[_VariantRun]:
    """The variants of a request, each with the store of its dataset (else the request's)."""
    served = dict(stores) if stores else {store.name: store}
    runs = []
    for index, (name, variant) in enumerate(variant_requests(request)):
        chosen = store
        if "dataset" in (request.variants or [])[index].model_fields_set and variant.dataset is not None:
            try:
                chosen = pick_store(served, variant.dataset)
            except UnknownDatasetError as exc:
                raise UnknownDatasetError(
                    f"variant {name!r}: {exc.detail}",
                    field="variants.dataset",
                    pointer=f"/variants/{index}/dataset",
                ) from None
        given = frozenset((request.variants or [])[index].model_fields_set - {"name"})
        runs.append(_VariantRun(index=index, name=name, request=variant, store=chosen, given=given))
    return runs


def _named(exc: Exception, run_: _VariantRun) -> Exception:
    """A request error of one variant, its message naming the variant and its pointer into the variant where
    the field at fault is one the variant gives (else the request's own field, which the variant inherits)."""
    from service.errors import WxshockError

    if not isinstance(exc, WxshockError):
        return exc
    if not str(exc.detail).startswith("variant "):
        exc.detail = f"variant {run_.name!r} (variants[{run_.index}]): {exc.detail}"
        exc.args = (exc.detail,)
    if exc.pointer is not None:
        if exc.pointer.split("/")[1:2] and exc.pointer.split("/")[1] in run_.given:
            exc.pointer = f"/variants/{run_.index}{exc.pointer}"
    elif exc.field:
        head = re.split(r"[.\[]", exc.field, maxsplit=1)[0]  # 'indicators.gdd.base': the variant's list
        if head in run_.given:
            exc.pointer = f"/variants/{run_.index}/{head}"
    return exc


def _resolve_variants(
    runs: list[_VariantRun],
    parsed: ParsedFeatures,
    settings: Settings,
    mode: str,
    known: dict[str, tuple[Weights, list[dict[str, Any]]]] | None = None,
) -> dict[str, tuple[Weights, list[dict[str, Any]]]]:
    """Resolve every variant and weigh the features once per dataset and weighting (each variant named on error).

    Returns the weights and skipped features per weights key; ``known`` (a job's submission) are reused.
    """
    weights: dict[str, tuple[Weights, list[dict[str, Any]]]] = dict(known or {})
    ids = parsed.ids
    for run_ in runs:
        try:
            if run_.request.events is not None:
                run_.events = resolve_events_for(run_.request, run_.store, ids)
                years = run_.events.plan.years
                _check_years((int(years[0]), int(years[-1])), settings)
            else:
                run_.resolved = resolve_request(
                    run_.request, run_.store.dates, run_.store.calendar, run_.store.variables
                )
                span = run_.resolved.years
                _check_years((span.start, span.end), settings)  # type: ignore[union-attr]
                if run_.resolved.aggregation == "cells":  # a job's submission refuses what its run would
                    check_cells_grids(run_.resolved, run_.store)
            if run_.weights_key not in weights:
                made = weights_for(parsed, run_.request, run_.store, settings, invalid=mode)
                skipped = skipped_of(parsed, made)
                skipped_ids = {e["feature_id"] for e in skipped}
                if skipped and all(i in skipped_ids for i in ids):
                    raise FeatureError(
                        f"no feature can be computed on dataset {run_.store.name!r} with this weighting: all "
                        f"{len(skipped)} are invalid or without data there (first: {skipped[0]['reason']})",
                        pointer=skipped[0]["pointer"],
                        feature_id=skipped[0]["feature_id"],
                    )
                weights[run_.weights_key] = (made, skipped)
            run_.skipped = weights[run_.weights_key][1]
            prepared = Prepared(parsed, weights[run_.weights_key][0], run_.skipped, mode)
            if run_.events is not None:
                _dry_run_events(run_.events, run_.store, prepared)
            elif run_.resolved is not None:
                _dry_run(run_.resolved, run_.store, prepared)
        except Exception as exc:
            raise _named(exc, run_) from None
    return weights


def prepare_variants(
    request: IndicatorRequest,
    store: Store,
    settings: Settings,
    *,
    invalid_features: str = "fail",
    stores: Mapping[str, Store] | None = None,
) -> Prepared:
    """The checks of every variant (a job's submission); the features' and the request's own weights."""
    mode = request.invalid_features or invalid_features
    runs = _variant_runs(request, store, stores)
    parsed = parse_request_features(request, settings, invalid=mode)
    weights = _resolve_variants(runs, parsed, settings, mode)
    skipped = skipped_of(parsed, *(w for w, _ in weights.values()))
    first = weights[runs[0].weights_key][0]
    return Prepared(parsed, first, skipped, mode, variant_weights=weights)


def run_variants(
    request: IndicatorRequest,
    store: Store,
    settings: Settings,
    *,
    progress: Progress | None = None,
    cancelled: Cancelled | None = None,
    batch_size: int = DEFAULT_BATCH_FEATURES,
    invalid_features: str = "fail",
    prepared: Prepared | None = None,
    stores: Mapping[str, Store] | None = None,
) -> RunResult:
    """Every variant of the request in one table, with one provenance listing them all.

    Variants on the same dataset, weighting and aggregation order share one aggregation: each feature batch
    is aggregated once (the union of their variables, over the longest span any of them needs) and every
    variant's table is computed from it. Variants on another dataset or weighting get their own. The long
    layout gets a ``variant`` column (rows variant after variant); the wide one prefixes every column but the
    keys with ``<variant>__``.
    """
    mode = request.invalid_features or invalid_features
    runs = _variant_runs(request, store, stores)
    known = getattr(prepared, "variant_weights", None) or {}  # a job prepared before variants: none
    if prepared is not None and all(r.weights_key in known for r in runs):
        parsed = prepared.parsed  # every weighting is known: the shapes are not needed again
    else:
        parsed = parse_request_features(request, settings, invalid=mode)
    weights = _resolve_variants(runs, parsed, settings, mode, known)
    groups: dict[str, list[_VariantRun]] = {}
    for run_ in runs:
        groups.setdefault(run_.sharing_key, []).append(run_)
    work = []
    for members in groups.values():
        group_weights = weights[members[0].weights_key][0]
        span, variables = _group_span(members)
        size = batch_size_for(batch_size, span, variables)
        work.append((members, group_weights, span, variables, _variant_batches(members, group_weights, size)))
    total = int(sum(rows.size for *_, batches in work for rows in batches))
    count = [0]

    def step(features: int) -> None:
        count[0] += features
        if progress is not None:
            progress(count[0], total)

    if progress is not None:
        progress(0, total)
    properties = [f.properties for f in parsed.features]
    for members, group_weights, span, variables, batches in work:
        if members[0].final.aggregation == "cells":
            _cells_variants(members, group_weights, batches, properties, span, settings, cancelled, step)
        else:
            _shared_variants(
                members, group_weights, batches, properties, span, variables, settings, cancelled, step
            )
        if cancelled is not None and cancelled():
            raise RunCancelledError(f"cancelled after {count[0]} of {total} feature computations")
    return _combine_variants(request, runs, parsed, store)


def _group_span(members: list[_VariantRun]) -> tuple[slice, tuple[str, ...]]:
    """The days and variables that a group of variants sharing one aggregation reads (the union of theirs)."""
    store = members[0].store
    used = {v for m in members for v in needed_variables(m.final)}
    variables = tuple(v for v in VARIABLES if v in used)
    if members[0].events is not None:
        return slice(0, int(store.dates.year.size)), variables
    last_year = max(
        max(m.final.years.end, getattr(m.final.baseline, "end", m.final.years.end))  # type: ignore[union-attr]
        for m in members
    )
    return time_span(store, last_year), variables


def _shared_variants(
    members: list[_VariantRun],
    weights: Weights,
    batches: list[np.ndarray],
    properties: list[dict | None],
    span: slice,
    variables: tuple[str, ...],
    settings: Settings,
    cancelled: Cancelled | None,
    step: Callable[[int], None],
) -> None:
    """Each feature batch aggregated once, every member variant's table computed from it in the batch's
    last task (where the chunks are read: threads or the cluster's workers); only the tables come back."""
    store = members[0].store
    n_features = len(weights.feature_ids)
    lights = [
        _light_events_request(m.events) if m.events is not None else _without_features(m.final)
        for m in members
    ]
    events_of: dict[int, list[np.ndarray | None]] = {}

    def lazy() -> Iterator[tuple[int, Any]]:
        for k, rows in enumerate(batches):
            jobs, events_of[k] = [], []
            for m, light in zip(members, lights, strict=True):
                if m.events is not None:
                    job, events = _events_job(m.events, light, rows, n_features)
                    jobs.append(job)
                    events_of[k].append(events)
                else:
                    jobs.append(BatchJob(resolved=light))
                    events_of[k].append(None)
            batch_properties = [properties[i] for i in rows]
            yield k, lazy_batch_tables(store, weights, rows, batch_properties, jobs, span, variables)

    parts: dict[int, list[tuple[pd.DataFrame, list[dict[str, Any]]]]] = {}
    for k, tables in cluster.compute_each(lazy(), settings=settings, cancelled=cancelled):
        parts[k] = tables
        step(batches[k].size)
    if len(parts) < len(batches):
        return  # cancelled: the caller says so
    for k in range(len(batches)):
        for i, (m, (frame, warnings)) in enumerate(zip(members, parts[k], strict=True)):
            events = events_of[k][i]
            if events is not None:
                m.orders.append(_row_order(frame, events))
            m.frames.append(frame)
            m.warnings.extend(warnings)


def _cells_variants(
    members: list[_VariantRun],
    weights: Weights,
    batches: list[np.ndarray],
    properties: list[dict | None],
    span: slice,
    settings: Settings,
    cancelled: Cancelled | None,
    step: Callable[[int], None],
) -> None:
    """Variants of aggregation "cells" (season requests): each member's cell tables, batch after batch (as
    run's "cells"; the cells' own series are read per member, as a separate request would read them)."""
    store = members[0].store
    for rows in batches:
        batch = take_weights(weights, rows)
        for m in members:
            if cancelled is not None and cancelled():
                return
            resolved = m.final
            table = cells_table(
                store,
                batch,
                [properties[i] for i in rows],
                resolved,
                span,
                needed_variables(resolved),
                settings,
            )
            m.frames.append(_feature_columns(table.frame, weights, rows))
            m.warnings.extend(table.warnings)
        step(rows.size)


def _variant_batches(members: list[_VariantRun], weights: Weights, batch_size: int) -> list[np.ndarray]:
    """The feature batches of a group: all features, or only those with events when the variants have events."""
    if members[0].events is not None:  # variants cannot add or drop events: all of them have events, or none
        return _event_batches(members[0].events.plan.feature_rows, weights, batch_size)
    return feature_batches(weights, batch_size)


def _variant_frame(run_: _VariantRun, parsed: ParsedFeatures) -> tuple[pd.DataFrame, list[dict[str, Any]]]:
    """One variant's rows in request order and its warnings, each reason naming the variant."""
    ids = [f.id for f in parsed.features]
    frame = pd.concat(run_.frames, ignore_index=True)
    if run_.events is not None:
        frame = frame.iloc[np.argsort(np.concatenate(run_.orders), kind="stable")].reset_index(drop=True)
    else:
        frame = _in_feature_order(frame, ids)
    warnings = _warnings_in_order(run_.warnings, ids)
    frame, warnings = _without_skipped(frame, warnings, run_.skipped)
    later = [
        warning("repaired_geometry", "invalid geometry was repaired (make_valid)", feature_id=feature_id)
        for feature_id in parsed.repaired
    ] + skipped_warnings(run_.skipped)
    frame = add_warning_notes(frame, later)
    return frame, [{**w, "reason": f"variant {run_.name!r}: {w['reason']}"} for w in warnings + later]


def _is_feature_column(name: str) -> bool:
    """A column _feature_columns adds (coverage, cells, area_km2, or one of their per-grid forms)."""
    return name in FEATURE_COLUMNS or any(name.startswith(f"{c}_") for c in ("coverage", "cells"))


def _combine_variants(
    request: IndicatorRequest, runs: list[_VariantRun], parsed: ParsedFeatures, store: Store
) -> RunResult:
    """One table and one provenance for every variant."""
    parts = [_variant_frame(r, parsed) for r in runs]
    keys = ["event_id", "feature_id", "date"] if request.events is not None else ["feature_id", "year"]
    warnings = [w for _, part_warnings in parts for w in part_warnings]
    if request.layout == "long":
        frames = []
        names = [r.name for r in runs]
        for run_, (frame, _) in zip(runs, parts, strict=True):
            frame = frame.copy()
            frame.insert(len(keys), "variant", pd.Categorical([run_.name] * len(frame), categories=names))
            frames.append(frame)
        frame = pd.concat(frames, ignore_index=True)
    else:
        frame = _wide_variants(runs, [p[0] for p in parts], keys, parsed, request.events is not None)
    return RunResult(
        frame=frame, provenance=_variants_provenance(request, runs, parsed, store), warnings=warnings
    )


def _wide_variants(
    runs: list[_VariantRun], frames: list[pd.DataFrame], keys: list[str], parsed: ParsedFeatures, events: bool
) -> pd.DataFrame:
    """The wide table: the keys, each variant's columns prefixed '<variant>__', then the row's notes.

    Feature columns (coverage, cells, area_km2) come once, unprefixed, when every variant has the same
    dataset and weighting, else once per variant. Rows: every key any variant has, in request order.
    """
    indexed = [f.set_index(keys) for f in frames]
    index = indexed[0].index
    for other in indexed[1:]:
        index = index.union(other.index, sort=False)
    if not events:
        position = {fid: i for i, fid in enumerate(parsed.ids)}
        order = np.lexsort(
            (
                index.get_level_values("year").to_numpy(),
                index.get_level_values("feature_id").map(position).to_numpy(),
            )
        )
        index = index[order]
    shared = len({r.weights_key for r in runs}) == 1
    pieces = []
    for run_, frame in zip(runs, indexed, strict=True):
        own = [c for c in frame.columns if not (shared and _is_feature_column(c))]
        pieces.append(frame.reindex(index)[own].add_prefix(f"{run_.name}__"))
    if shared:  # the same values in every variant; a row one variant lacks takes another's
        feature_part = None
        for frame in indexed:
            part = frame.reindex(index)[[c for c in frame.columns if _is_feature_column(c)]]
            feature_part = part if feature_part is None else feature_part.combine_first(part)
        pieces.append(feature_part)
    notes = [pieces[i][f"{r.name}__notes"].fillna("").astype(str).tolist() for i, r in enumerate(runs)]
    union = pd.Series(
        pd.array(
            [" ".join(sorted(set(" ".join(t).split()))) for t in zip(*notes, strict=True)], dtype="string"
        ),
        index=index,
        name="notes",
    )
    return pd.concat([*pieces, union], axis=1).reset_index()


def _variants_provenance(
    request: IndicatorRequest, runs: list[_VariantRun], parsed: ParsedFeatures, store: Store
) -> dict[str, Any]:
    """The request's provenance with every variant: its dataset, fingerprint, request hash and request."""
    entries = []
    for run_ in runs:
        document = provenance(run_.final, run_.store, parsed, run_.skipped)
        own = {k: v for k, v in document["request"].items() if k not in ("features", "events")}
        own["features"] = {"skipped": document["request"]["features"]["skipped"]}
        entries.append(
            {
                "name": run_.name,
                "dataset": run_.store.name,
                "fingerprint": run_.store.fingerprint,
                "request_hash": document["request_hash"],
                "request": own,
                "methods": document.get("methods"),
            }
        )
    base = provenance(request, store, parsed, skipped_of(*[_Skipped(r.skipped) for r in runs]))
    base["request"] = _event_summary(base["request"], request)
    combined = json.dumps([[e["name"], e["request_hash"]] for e in entries], separators=(",", ":"))
    base["request_hash"] = "sha256:" + hashlib.sha256(combined.encode("utf-8")).hexdigest()
    base["variants"] = entries
    return base


@dataclass
class _Skipped:
    """A holder of skipped entries, as skipped_of reads them."""

    skipped: list[dict[str, Any]]


def _aggregated_daily(
    store: Store, weights: Weights, span: slice, variables: tuple[str, ...], settings: Settings
) -> DailySeries:
    """The weighted daily means of the rows of ``weights`` over ``span``, computed, snapped, as a DailySeries."""
    # The indicators take tmean from tmax and tmin themselves; not computing the Dataset's tmean saves a
    # quarter of the series moved back from a dask cluster (and the work of making it).
    daily_lazy = aggregate(store, weights, variables=variables, time=span).drop_vars("tmean", errors="ignore")
    (daily_ds,) = cluster.compute(daily_lazy, settings=settings)
    return _daily_series(daily_ds, store, span, np.asarray(weights.latitude))


def cell_centres_lonlat(
    store: Store, cells: np.ndarray, grid_name: str | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Longitude and latitude (degrees, WGS84) of the centres of cells ``cells`` (iy * nx + ix) of a grid
    (the store's first grid when not named)."""
    grid = store.grids[grid_name or store.main_grid]
    iy, ix = np.divmod(np.asarray(cells, dtype=np.int64), grid.shape[1])
    x, y = np.asarray(grid.x)[ix], np.asarray(grid.y)[iy]
    # through PROJ even for a geographic grid: a rotated-pole grid is geographic in its own coordinates
    to_lonlat = pyproj.Transformer.from_crs(grid.crs(), pyproj.CRS.from_epsg(4326), always_xy=True)
    lon, lat = to_lonlat.transform(x, y)
    return np.asarray(lon, dtype=np.float64), np.asarray(lat, dtype=np.float64)


def cell_daily_series(
    store: Store, cells: np.ndarray, span: slice, variables: tuple[str, ...], grid: str | None = None
) -> DailySeries:
    """The stored daily values of grid cells ``cells`` (iy * nx + ix, best all in one read unit) over ``span``.

    Decoded and snapped like every daily mean (daily_values), so a stored 25.0 is exactly 25.0; one window
    read per variable over the cells' bounding box. Latitude is each cell centre's (for SPEI's radiation).
    The cells are those of ``grid`` (the store's first grid when not named), where ``variables`` all lie.
    """
    ny, nx = store.grids[grid or store.main_grid].shape
    iy, ix = np.divmod(np.asarray(cells, dtype=np.int64), nx)
    y, x = slice(int(iy.min()), int(iy.max()) + 1), slice(int(ix.min()), int(ix.max()) + 1)
    arrays: dict[str, np.ndarray | None] = dict.fromkeys(VARIABLES)
    for var in variables:
        # pick the cells from the stored integers, then decode once into one fresh array: fresh memory is
        # the costly part here (page faults), so no full-size temporaries
        raw = store.read_raw(var, y, x, span)[iy - y.start, ix - x.start]  # (cells, days) integers
        enc = store.encoding(var)
        values = raw.astype(np.float64)
        steps = 1.0 / enc.scale_factor
        if enc.add_offset == 0.0 and abs(steps - round(steps)) < 1e-9:
            # raw / 10 is correctly rounded: the double nearest the decimal value, as snapping gives
            values /= round(steps)
        else:
            values *= enc.scale_factor
            values += enc.add_offset
            snap_daily(values, snap_decimals(enc.scale_factor, enc.add_offset))
        values[raw == enc.fill_value] = np.nan
        arrays[var] = values
    dates = store.dates
    _, lat = cell_centres_lonlat(store, cells, grid)
    return DailySeries(
        **arrays,
        year=np.asarray(dates.year[span]),
        month=np.asarray(dates.month[span]),
        day=np.asarray(dates.day[span]),
        dayofyear=np.asarray(dates.dayofyear[span]),
        calendar=store.calendar,
        latitude=lat,
    )


def cell_chunk_values(
    store: Store,
    cells: np.ndarray,
    span: slice,
    variables: tuple[str, ...],
    resolved: IndicatorRequest,
    groups: list[Any],
    grid: str | None = None,
) -> list[RawValues]:
    """One task of aggregation "cells": the raw indicator values of some cells of one read unit, per group."""
    return compute_cell_values(cell_daily_series(store, cells, span, variables, grid), resolved, groups)


def cells_table(
    store: Store,
    batch: Weights | GridWeights,
    properties: list[dict | None],
    resolved: IndicatorRequest,
    span: slice,
    variables: tuple[str, ...],
    settings: Settings,
) -> IndicatorTable:
    """Aggregation "cells": each cell the features touch gets its own stored daily series and indicator
    values, then each feature's values are the weighted means of its cells' values.

    One task per read unit (the store's chunk or shard) that the features touch: it reads the unit's
    touched cells and returns their raw indicator values (small), so the daily series of the cells never
    travel and the tasks run on the cluster like the aggregation's. A cell's series is its stored value
    (snapped as every daily mean); SPEI's radiation uses the cell centre's latitude. The features' weights
    (area, or area times a layer) weigh the cell values: see service.indicators.table.combine_cells for
    cells without a value. In a dataset with several grids each indicator is computed on the cells of the
    grid of its variables (check_cells_grids refuses one across grids), all grids' tasks in one computation.
    """
    check_cells_grids(resolved, store)
    groups = cell_groups(batch.feature_ids, properties, resolved)
    parts = []  # per grid: (its indicators' request, its weights, cells, one task per read unit)
    for grid, request, grid_vars in _cells_requests(store, resolved, variables):
        matrix = weights_on(batch, grid).matrix.tocsr()
        cells = np.unique(matrix.indices[matrix.data > 0]).astype(np.int64)
        if not cells.size:  # no feature of the batch has a cell on this grid (skipped features)
            continue
        ny, nx = store.grids[grid].shape
        cy, cx, _ = store.chunk_shape_of(grid_vars[0])
        iy, ix = np.divmod(cells, nx)
        unit = (iy // cy) * (-(-nx // cx)) + ix // cx
        order = np.argsort(unit, kind="stable")
        cells, unit = cells[order], unit[order]
        starts = np.flatnonzero(np.r_[True, np.diff(unit) != 0])
        light = dask.delayed(request.model_copy(update={"features": _first_feature(resolved)}))
        tasks = [
            dask.delayed(cell_chunk_values, pure=False)(store, piece, span, grid_vars, light, groups, grid)
            for piece in np.split(cells, starts[1:])
        ]
        parts.append((matrix[:, cells], tasks))
    if len(parts) < len(_cells_requests(store, resolved, variables)):
        # some grid has no cell for the batch (only skipped features): their rows stay null
        daily = _aggregated_daily(store, batch, span, variables, settings)
        return compute_table(daily, list(batch.feature_ids), [p or {} for p in properties], resolved)
    results = cluster.compute(*(t for _, tasks in parts for t in tasks), settings=settings)
    joined, at = [], 0
    for matrix, tasks in parts:
        mine = results[at : at + len(tasks)]
        at += len(tasks)
        joined.append(([concat_raw([r[g] for r in mine]) for g in range(len(groups))], matrix))
    return compute_table_from_grid_cells(
        joined, list(batch.feature_ids), [p or {} for p in properties], resolved
    )


def _cells_requests(
    store: Store, resolved: IndicatorRequest, variables: tuple[str, ...]
) -> list[tuple[str, IndicatorRequest, tuple[str, ...]]]:
    """Per grid read under aggregation "cells": the grid, the request of the indicators on it, their variables
    (one entry with the whole request in a single-grid dataset or when every variable lies on one grid)."""
    grids = list(dict.fromkeys(store.grid_of(v) for v in variables))
    if len(grids) <= 1:
        return [(grids[0] if grids else store.main_grid, resolved, variables)]
    specs = list(resolved.indicators or [])
    out = []
    for grid in grids:
        mine = [
            spec
            for spec, planned in zip(specs, plan_indicators(specs), strict=True)
            if any(store.grid_of(v) == grid for v in planned.indicator.variables if v in store.variables)
        ]
        used = {v for p in plan_indicators(mine) for v in p.indicator.variables}
        grid_vars = tuple(v for v in variables if v in used)
        out.append((grid, resolved.model_copy(update={"indicators": mine}), grid_vars))
    return out


def _first_feature(request: IndicatorRequest) -> Any:
    """The request's first feature alone: what a cell task needs of the features (nothing, but the model
    wants one), so that a task sent to a cluster does not carry every community's geometry."""
    features = request.features
    return features.features[0] if hasattr(features, "features") else features


def _in_feature_order(frame: pd.DataFrame, feature_ids: list[str]) -> pd.DataFrame:
    """Rows in request order of features (then as the table gave them), whatever the batching."""
    position = {fid: i for i, fid in enumerate(feature_ids)}
    order = frame["feature_id"].map(position).to_numpy()
    frame = frame.iloc[np.argsort(order, kind="stable")].reset_index(drop=True)
    return frame


def _warnings_in_order(warnings: list[dict[str, Any]], feature_ids: list[str]) -> list[dict[str, Any]]:
    """Warnings sorted by feature in request order, then year, indicator and code, for stable bytes.

    A warning about the whole request (no feature) comes once, however many batches made it.
    """
    position = {fid: i for i, fid in enumerate(feature_ids)}

    def key(w: dict[str, Any]) -> tuple[int, int, str, str, str]:
        return (
            position.get(w.get("feature_id"), -1),
            int(w.get("year") or 0),
            str(w.get("indicator") or ""),
            str(w.get("code") or ""),
            str(w.get("reason") or ""),
        )

    unique = {tuple(sorted((k, str(v)) for k, v in w.items())): w for w in warnings}
    return sorted(unique.values(), key=key)


@dataclass
class SeriesTable:
    """A daily series table made piece by piece: its columns, provenance and warnings, then its frames."""

    columns: list[str]
    provenance: dict[str, Any]
    warnings: list[dict[str, Any]]
    frames: Iterator[pd.DataFrame]


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


# --- the CLI's local run --------------------------------------------------------------------------------------


def load_request(
    request_path: Path, features_path: Path | None, events_path: Path | None = None
) -> IndicatorRequest:
    """The request of a JSON file, its features replaced by a GeoJSON file's and its events by a CSV or
    Parquet file's (columns id, feature_id, date; service.client.events_list) when given."""
    from service.client import events_list
    from service.errors import RequestError

    try:
        data = json.loads(request_path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise RequestError(f"cannot read the request {str(request_path)!r}: {exc}", field="request") from None
    if not isinstance(data, dict):
        raise RequestError(f"the request {str(request_path)!r} is not a JSON object", field="request")
    if features_path is not None:
        try:
            data["features"] = json.loads(features_path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as exc:
            raise RequestError(
                f"cannot read the features {str(features_path)!r}: {exc}", field="features"
            ) from None
    if events_path is not None:
        data["events"] = events_list(events_path)
    return validate_request(IndicatorRequest, data)


def compute_to_file(
    *,
    store_location: str | list[str],
    request_path: Path,
    features_path: Path | None,
    out_path: Path,
    settings: Settings,
    progress: bool = True,
    events_path: Path | None = None,
) -> RunResult:
    """`wxshock compute`: the whole chain locally, written to a .parquet, .csv or .json file.

    With several stores the first is the request's dataset and every one is served by its name (the
    directory stem) to variants that name it.
    """
    from service.encode import encode, format_from_suffix
    from service.registry import dataset_name

    fmt = format_from_suffix(out_path.suffix)
    request = load_request(request_path, features_path, events_path)
    locations = [store_location] if isinstance(store_location, str) else list(store_location)
    stores = {
        dataset_name(location): open_store(
            location, name=dataset_name(location), storage_options=settings.storage_options()
        )
        for location in locations
    }
    store_location = locations[0]
    store = stores[dataset_name(store_location)]
    if request.dataset is not None and request.dataset != store.name:
        raise UnknownDatasetError(
            f"the request names dataset {request.dataset!r} but the store {store_location!r} is dataset "
            f"{store.name!r}; drop 'dataset' or name the right store",
            field="dataset",
        )
    bar = _progress_bar(progress)
    try:
        result = run(request, store, settings, progress=bar.update if bar else None, stores=stores)
    finally:
        if bar:
            bar.close()
    body, _, _ = encode(result, fmt)
    write_atomically(out_path, body)
    if fmt == "csv":
        # CSV has no metadata; keep the provenance beside it.
        sidecar = out_path.with_name(out_path.name + ".provenance.json")
        write_atomically(
            sidecar,
            json.dumps({"provenance": result.provenance, "warnings": result.warnings}, indent=2).encode(
                "utf-8"
            ),
        )
    return result


class _Bar:
    """A tqdm bar fed with (done, total) feature counts."""

    def __init__(self) -> None:
        from tqdm import tqdm

        self._bar = tqdm(total=0, unit="feature", desc="wxshock", leave=True)

    def update(self, done: int, total: int) -> None:
        """Move the bar to ``done`` of ``total`` features."""
        self._bar.total = total
        self._bar.n = done
        self._bar.refresh()

    def close(self) -> None:
        """Finish the bar."""
        self._bar.close()


def _progress_bar(enabled: bool) -> _Bar | None:
    """A progress bar when asked for and the output is a terminal-like stream."""
    return _Bar() if enabled else None
