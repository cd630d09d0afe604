"""run, run_in_pieces and prepare: the season table of a request, whole or written batch by batch."""

from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from service import cluster
from service.aggregate import Handover
from service.encode import RunResult
from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.errors import (
    RunCancelledError,
)
from service.geometry import Weights
from service.indicators.table import (
    add_warning_notes,
    resolve_request,
)
from service.pipeline.cells import cells_table
from service.pipeline.checks import _dry_run, _prepare_resolved, _without_skipped
from service.pipeline.core import (
    BATCH_SERIES_BYTES,
    DEFAULT_BATCH_FEATURES,
    Cancelled,
    Progress,
    _check_years,
    _feature_columns,
    _in_feature_order,
    _warnings_in_order,
    _without_features,
    batch_size_for,
    check_cells_grids,
    feature_batches,
    lazy_batch_table,
    needed_variables,
    provenance,
    take_weights,
    time_span,
)
from service.pipeline.events import prepare_events, run_events
from service.pipeline.series import SeriesTable
from service.pipeline.variants import prepare_variants, run_variants
from service.prepared import Prepared, later_warnings
from service.schemas import IndicatorRequest
from service.settings import Settings
from service.store import Store


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
    prepared, batches = run_.prepared, run_.batches
    parsed, weights = prepared.parsed, prepared.weights
    parts = dict(run_.computed)
    frames = [parts[k][0] for k in range(len(batches))]
    warnings = [w for k in range(len(batches)) for w in parts[k][1]]
    frame = _in_feature_order(pd.concat(frames, ignore_index=True), weights.feature_ids)
    warnings = _warnings_in_order(warnings, weights.feature_ids)
    frame, warnings = _without_skipped(frame, warnings, prepared.skipped)
    later = later_warnings(parsed.repaired, prepared.skipped)
    warnings.extend(later)
    frame = add_warning_notes(frame, later)  # notes last, with the codes of the warnings made here
    return RunResult(frame=frame, provenance=run_.provenance, warnings=warnings)


@dataclass
class _BatchRun:
    """A run's resolved request, weights and feature batches, and its batch tables as they are computed."""

    resolved: IndicatorRequest
    prepared: Prepared
    batches: list[np.ndarray]
    # the run's provenance (the features' count and hash), taken before the first batch
    provenance: dict[str, Any]
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
    series_bytes: int | None = None,
    in_flight: int | None = None,
    cached: bool = True,
) -> _BatchRun:
    """The common part of :func:`run` and :func:`run_in_pieces`: resolve, weigh, batch, compute lazily.

    ``series_bytes`` caps a batch's daily means (float64 bytes) below the on-demand budget and ``in_flight``
    the batches computed at once (None: service.cluster's default), for a job's flat memory; ``cached`` False
    reads the chunks around the decoded-tile cache (series batches; a job's one pass would only fill it).
    """
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
    local = in_flight is None and not (settings.scheduler or "").strip()
    if local:
        in_flight = 1  # on local threads: one batch at a time before its table (core.BATCH_SERIES_BYTES)
    cap = BATCH_SERIES_BYTES
    if series_bytes is not None:
        cap = min(cap, series_bytes)
    batches = feature_batches(weights, batch_size_for(batch_size, span, variables, cap))
    light = _without_features(resolved)
    computed: Iterator[tuple[int, tuple[pd.DataFrame, list[dict[str, Any]]]]]
    if resolved.aggregation == "cells":
        computed = _cells_batches(
            batches, store, weights, properties, light, span, variables, settings, cancelled
        )
    else:
        # On local threads the last batch's table is cut in two row parts: no chunk work is left to overlap it,
        # so one core would idle while it runs (the earlier tables overlap the next batch's chunk work instead).
        last_parts = 2 if local else 1
        # ... and consecutive batches read the chunks they share once: there the batches run one after the other
        # (compute_each starts a batch's tasks once the one before has finished its chunk tasks). Each batch's
        # graph is made while the batch before computes (read_ahead), not while a thread waits for it.
        handover = Handover() if local else None
        lazy = (
            (
                k,
                lazy_batch_table(
                    store,
                    weights,
                    rows,
                    [properties[i] for i in rows],
                    light,
                    span,
                    variables,
                    cached,
                    last_parts if k == len(batches) - 1 else 1,
                    handover,
                    batches[k + 1] if k + 1 < len(batches) else None,
                ),
            )
            for k, rows in enumerate(batches)
        )
        # Each batch's aggregation and its indicator table run where the chunks are read (local threads or the
        # cluster's workers); only the table comes back. Batches finish in any order; rows are put in order later.
        computed = cluster.compute_each(
            lazy,
            settings=settings,
            cancelled=cancelled,
            in_flight=in_flight,
            overlap_tails=local,
            read_ahead=local,
        )
    # Taken before the batches, on this thread: on a thread of its own beside the chunk tasks it did not hide
    # behind them (its hashing holds the GIL, which every chunk task needs back after each compiled kernel).
    document = provenance(resolved, store, parsed, prepared.skipped)
    return _BatchRun(
        resolved, prepared, batches, document, _counted(computed, batches, len(parsed.features), progress)
    )


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


@dataclass
class PiecesRun:
    """A run in pieces once its weights are known, before any batch is computed: the batches to come, the
    provenance (with the features' count and hash), and of the features only their ids (in the weights) and
    properties (in the batches' graphs).

    Neither the request's features (about 2 kB a feature as validated models) nor their parsed shapes are held
    here, so a job's run that keeps this for minutes does not keep them (bench/RESULTS.md, "A job's memory").
    """

    provenance: dict[str, Any]
    feature_ids: list[str]
    skipped: list[dict[str, Any]]
    # warnings made once for the whole run (repaired geometry, skipped features): last, and in every row's notes
    later: list[dict[str, Any]]
    computed: Iterator[tuple[int, tuple[pd.DataFrame, list[dict[str, Any]]]]]


def plan_in_pieces(
    request: IndicatorRequest,
    store: Store,
    settings: Settings,
    *,
    progress: Progress | None = None,
    cancelled: Cancelled | None = None,
    batch_size: int = DEFAULT_BATCH_FEATURES,
    invalid_features: str = "fail",
    prepared: Prepared | None = None,
    series_bytes: int | None = None,
    in_flight: int | None = None,
    cached: bool = True,
) -> PiecesRun | None:
    """The first half of :func:`run_in_pieces`: resolve, weigh and batch the request, take its provenance; None
    for a request with events or variants. Nothing is computed until :func:`spill_pieces` reads the batches."""
    if request.variants or request.events is not None:
        return None
    run_ = _batch_run(
        request,
        store,
        settings,
        progress,
        cancelled,
        batch_size,
        invalid_features,
        prepared,
        series_bytes,
        in_flight,
        cached,
    )
    parsed, skipped = run_.prepared.parsed, run_.prepared.skipped
    later = later_warnings(parsed.repaired, skipped)
    return PiecesRun(
        provenance=run_.provenance,
        feature_ids=run_.prepared.weights.feature_ids,
        skipped=skipped,
        later=later,
        computed=run_.computed,
    )


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
    series_bytes: int | None = None,
    in_flight: int | None = None,
    cached: bool = True,
) -> SeriesTable | None:
    """The table of :func:`run`, row for row, made batch by batch: memory flat in the number of features.

    Each finished batch's rows (in request order within the batch, notes and skipped features as
    :func:`run` makes them) are written to a file in the directory ``spill``, cut at every PIECE_FEATURES-th
    feature of the request; the frames returned read those files back, PIECE_FEATURES features at a time, in
    request order, each time they are iterated. The caller encodes them (service.encode.stream, .stata,
    .bundle) and then removes ``spill``. None for a request with events or variants (their runs are made whole:
    use :func:`run`). ``series_bytes`` and ``in_flight`` bound the daily means held at once (a job's smaller
    batches, fewer of them at a time); ``cached`` False reads around the decoded-tile cache (a job's one pass).
    :func:`plan_in_pieces` then :func:`spill_pieces`, for a caller that lets the request go in between (a job).
    """
    planned = plan_in_pieces(
        request,
        store,
        settings,
        progress=progress,
        cancelled=cancelled,
        batch_size=batch_size,
        invalid_features=invalid_features,
        prepared=prepared,
        series_bytes=series_bytes,
        in_flight=in_flight,
        cached=cached,
    )
    return None if planned is None else spill_pieces(planned, spill)


def spill_pieces(planned: PiecesRun, spill: Path) -> SeriesTable:
    """The second half of :func:`run_in_pieces`: compute the planned batches, writing their rows under ``spill``
    batch by batch as they are computed; the table reading them."""
    import pickle

    later, skipped = planned.later, planned.skipped
    position = {fid: i for i, fid in enumerate(planned.feature_ids)}
    spill.mkdir(parents=True, exist_ok=True)
    columns: list[str] | None = None
    warnings: list[dict[str, Any]] = []
    paths = {}
    for k, (frame, batch_warnings) in planned.computed:
        at = frame["feature_id"].map(position).to_numpy()
        order = np.argsort(at, kind="stable")
        frame, at = frame.iloc[order].reset_index(drop=True), at[order]
        frame, batch_warnings = _without_skipped(frame, batch_warnings, skipped)
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
    warnings = _warnings_in_order(warnings, planned.feature_ids)
    warnings.extend(later)
    n_pieces = -(-len(planned.feature_ids) // PIECE_FEATURES)
    return SeriesTable(
        columns=columns or [],
        provenance=planned.provenance,
        warnings=warnings,
        frames=_Spilled([paths[k] for k in sorted(paths)], n_pieces),
    )


@dataclass(frozen=True)
class _Spilled:
    """The spilled rows of a run in request order, read again from the files each time they are iterated
    (the Stata encoder and the bundle read them more than once)."""

    paths: list[Path]
    n_pieces: int

    def __iter__(self) -> Iterator[pd.DataFrame]:
        return _pieces_in_order(self.paths, self.n_pieces)


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
