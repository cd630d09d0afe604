"""Shared pieces of the pipeline: stores, provenance, weights, feature batches, batch tables."""

import hashlib
import uuid
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, fields, replace
from typing import Any

import dask
import numpy as np
import pandas as pd
from scipy import sparse

from service import __version__, request_text
from service.aggregate import GridWeights, Handover, lazy_series
from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.errors import (
    LimitExceededError,
    OutOfRangeError,
    RequestError,
    UnknownDatasetError,
)
from service.geometry import ParsedFeatures, Weights, compute_weights, parse_features
from service.indicators.base import VARIABLES, DailySeries, snap_daily, snap_decimals
from service.indicators.table import (
    compute_table,
    methods_statement,
    plan_indicators,
)
from service.indicators.windows import ResolvedEvents, compute_event_table
from service.prepared import skipped_of
from service.schemas import IndicatorRequest, SeriesRequest
from service.settings import Settings
from service.store import Store

Progress = Callable[[int, int], None]


Cancelled = Callable[[], bool]


# Features per aggregation batch at most: with BATCH_SERIES_BYTES (long records get fewer) this bounds memory,
# while keeping one dask computation large enough to use every core.
DEFAULT_BATCH_FEATURES = 2000


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
    return "sha256:" + request_text.canonical_sha256(resolved, _hashed_around(fingerprint), "request")


def _hashed_around(fingerprint: str) -> dict[str, str]:
    """What the request hash covers beside the request: the dataset fingerprint and the software version."""
    return {"fingerprint": fingerprint, "software": __version__}


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
    # both digests from one pass over the features (writing each feature's JSON is the cost)
    features_sha256, request_sha256 = request_text.request_digests(
        resolved, _hashed_around(store.fingerprint), "request"
    )
    request["features"] = {
        "count": len(parsed.features),
        "sha256": features_sha256,
        "repaired": list(parsed.repaired),
        "skipped": list(skipped or []),
    }
    request["dataset"] = store.name
    document = {
        "dataset": store.name,
        "fingerprint": store.fingerprint,
        "software": f"wxshock {__version__}",
        "request_hash": "sha256:" + request_sha256,  # request_hash(resolved, store.fingerprint)
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


def store_daily_series(
    store: Store, span: slice, values: Mapping[str, np.ndarray | None], latitude: np.ndarray
) -> DailySeries:
    """A DailySeries of ``values`` ((feature, day) arrays in degC or mm/day; a variable left out is None) on the
    store's days ``span``, in its calendar."""
    dates = store.dates
    return DailySeries(
        **{var: values.get(var) for var in VARIABLES},
        year=np.asarray(dates.year[span]),
        month=np.asarray(dates.month[span]),
        day=np.asarray(dates.day[span]),
        dayofyear=np.asarray(dates.dayofyear[span]),
        calendar=store.calendar,
        latitude=latitude,
    )


def _daily_series(ds: Any, store: Store, span: slice, latitude: np.ndarray) -> DailySeries:
    """The computed aggregation as the indicators' DailySeries (variables not aggregated are None)."""
    values = {var: daily_values(ds, store, var) for var in VARIABLES}
    return store_daily_series(store, span, values, np.asarray(latitude, dtype=np.float64))


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
# The same on local threads and on a cluster, so that both cut a request into the same batches. On local threads
# a season run holds two batches' series at once: the next batch's chunk work starts when a batch's table starts
# (service.cluster.compute_each, overlap_tails); consecutive batches read the chunks they share once
# (aggregate.Handover), and the last batch's table runs in two row parts. Measured on the 5,000 villages of the
# large demo, three runs each way at load 1.3-1.7 (bench/RESULTS.md, "Scale"): batches of 1,000 against 2,000
# (twice this), first run in a process 5.0 against 6.8 s (median), runs after it the same (4.6 s), peak RSS
# 2.2-2.5 GB against 2.7-3.2; 960 chunk reads either way, as many as the chunks touched.
BATCH_SERIES_BYTES = 448 << 20


def batch_size_for(
    batch_size: int, span: slice, variables: tuple[str, ...], series_bytes: int = BATCH_SERIES_BYTES
) -> int:
    """Features per batch: at most ``batch_size``, fewer when their daily means would pass ``series_bytes``."""
    days = max(1, (span.stop or 0) - (span.start or 0))
    per_feature = days * max(1, len(variables)) * 8
    return max(1, min(batch_size, series_bytes // per_feature))


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
    cached: bool = True,
    parts: int = 1,
    handover: Handover | None = None,
    next_rows: np.ndarray | None = None,
) -> Any:
    """One feature batch as a dask graph ending in one task that returns its table: (frame, warnings).

    The chunk tasks and the reduction are the aggregation's (service.aggregate); the last task takes the
    batch's daily means, snaps them, computes the indicator table and adds the feature columns. On a cluster
    that runs on a worker, so the daily series never travel to the server. ``cached`` False reads the chunks
    around the decoded-tile cache (a job's one pass: the same values). ``parts`` > 1 cuts the table into that
    many tasks over disjoint feature rows (each at least TABLE_PART_FEATURES), joined by the last task: the
    same table, on several threads. With a ``handover``, the chunks this batch shares with the next one
    (``next_rows``) are read once for both, and those it shares with the one before are not read again
    (service.aggregate.Handover: the batches' chunk tasks must run one batch after the other).
    """
    return _lazy_batch(
        batch_table,
        store,
        weights,
        rows,
        properties,
        resolved,
        span,
        variables,
        cached,
        parts,
        handover,
        next_rows,
    )


def _lazy_batch(
    last: Callable[..., Any],
    store: Store,
    weights: Weights | GridWeights,
    rows: np.ndarray,
    properties: list[dict | None],
    what: Any,
    span: slice,
    variables: tuple[str, ...],
    cached: bool = True,
    parts: int = 1,
    handover: Handover | None = None,
    next_rows: np.ndarray | None = None,
) -> Any:
    """A feature batch's aggregation as a dask graph ending in one task, ``last``, that computes what the batch
    returns (``what``: the resolved request, or the batch jobs) from its daily means; with ``parts`` > 1,
    ``last`` runs on row parts and the final task joins them."""
    batch = take_weights(weights, rows)
    following = take_weights(weights, next_rows) if handover is not None and next_rows is not None else None
    # one task per variable finishes its whole series into one array (no per-block arrays joined by dask)
    arrays = lazy_series(
        store, batch, variables=variables, time=span, cached=cached, handover=handover, next_weights=following
    )
    by_id = _feature_frame(batch, np.arange(len(rows)))
    # a key of its own: two runs with the same features but other indicators must not share a table
    token = f"wxshock-table-{uuid.uuid4().hex}"
    latitude = np.asarray(batch.latitude, dtype=np.float64)
    feature_ids = list(batch.feature_ids)
    cuts = _row_parts(len(rows), parts)
    if len(cuts) == 1:
        return dask.delayed(last, pure=False)(
            arrays,
            store,
            span,
            latitude,
            _opaque(feature_ids),
            _opaque(properties),
            _opaque(what),
            by_id,
            dask_key_name=token,
        )
    tables = [
        dask.delayed(_rows_table, pure=False)(
            last,
            arrays,
            (lo, hi),
            store,
            span,
            latitude[lo:hi],
            _opaque(feature_ids[lo:hi]),
            _opaque(properties[lo:hi]),
            _opaque(what),
            by_id.iloc[lo:hi],
            dask_key_name=f"{token}-{i}",
        )
        for i, (lo, hi) in enumerate(cuts)
    ]
    return dask.delayed(_joined, pure=False)(tables, dask_key_name=token)


def _opaque(value: Any) -> Any:
    """``value`` as one node of a dask graph, not searched for collections: dask walks a task's list, dict and
    dataclass arguments item by item (2,000 features' properties took about 0.1 s a batch, holding the GIL)."""
    return dask.delayed(value, traverse=False, pure=False)


# A batch's table cut in row parts (lazy_batch_table's ``parts``) gives each part at least this many features:
# below it the part's fixed costs (frames, warnings, the join) outweigh the second thread.
TABLE_PART_FEATURES = 100


def _row_parts(n_rows: int, parts: int) -> list[tuple[int, int]]:
    """[lo, hi) feature rows of each of at most ``parts`` parts of a batch's table, in order."""
    parts = max(1, min(parts, n_rows // TABLE_PART_FEATURES))
    cuts = np.linspace(0, n_rows, parts + 1).round().astype(int)
    return [(int(lo), int(hi)) for lo, hi in zip(cuts[:-1], cuts[1:], strict=True)]


def _rows_table(
    last: Callable[..., Any], arrays: dict[str, np.ndarray], rows: tuple[int, int], *args: Any
) -> Any:
    """``last`` on the feature rows ``rows`` of a batch's daily means: views of the batch's arrays (``last``
    snaps them in place, each part its own rows)."""
    lo, hi = rows
    return last({var: array[lo:hi] for var, array in arrays.items()}, *args)


def _joined(
    tables: list[tuple[pd.DataFrame, list[dict[str, Any]]]],
) -> tuple[pd.DataFrame, list[dict[str, Any]]]:
    """The tables of a batch's consecutive row parts joined, rows in order, and their warnings."""
    frame = pd.concat([frame for frame, _ in tables], ignore_index=True)
    return frame, [w for _, warnings in tables for w in warnings]


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
    jobs = [BatchJob(resolved=resolved)]
    return batch_tables(arrays, store, span, latitude, feature_ids, properties, jobs, by_id)[0]


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
    return store_daily_series(store, span, values, latitude)


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
    return _lazy_batch(batch_tables, store, weights, rows, properties, jobs, span, variables)


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


# The columns _feature_columns adds (per grid, suffixed '_<grid>', where a dataset has several grids).
FEATURE_COLUMNS = ("coverage", "cells", "area_km2")


def _is_feature_column(name: str) -> bool:
    """A column _feature_columns adds (coverage, cells, area_km2, or one of their per-grid forms)."""
    return name in FEATURE_COLUMNS or any(name.startswith(f"{c}_") for c in ("coverage", "cells"))


@dataclass
class _Skipped:
    """A holder of skipped entries, as skipped_of reads them."""

    skipped: list[dict[str, Any]]


def _first_feature(request: IndicatorRequest) -> Any:
    """The request's first feature alone: what a cell task needs of the features (nothing, but the model
    wants one), so that a task sent to a cluster does not carry every community's geometry."""
    features = request.features
    return features.features[0] if hasattr(features, "features") else features


def _in_feature_order(frame: pd.DataFrame, feature_ids: list[str]) -> pd.DataFrame:
    """Rows in request order of features (then as the table gave them), whatever the batching."""
    ids = pd.Index(feature_ids)
    order = ids.get_indexer(frame["feature_id"]) if ids.is_unique else np.array([-1])
    if (order < 0).any():  # not one position per id: the general mapping (an unknown id sorts last)
        position = {fid: i for i, fid in enumerate(feature_ids)}
        order = frame["feature_id"].map(position).to_numpy()
    elif np.all(order[1:] >= order[:-1]):  # batches of consecutive features, joined in order: nothing to move
        return frame.reset_index(drop=True)
    return frame.iloc[np.argsort(order, kind="stable")].reset_index(drop=True)


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
