"""Event-anchored windows: one row per event, each feature batch aggregated once."""

import hashlib
import json
from collections.abc import Iterator, Mapping
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from service import cluster
from service.encode import RunResult
from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.errors import (
    RunCancelledError,
)
from service.geometry import Weights
from service.indicators.base import VARIABLES
from service.indicators.table import (
    add_warning_notes,
)
from service.indicators.windows import ResolvedEvents, compute_event_table, resolve_events
from service.pipeline.checks import _prepare_resolved, _without_skipped
from service.pipeline.core import (
    DEFAULT_BATCH_FEATURES,
    BatchJob,
    Cancelled,
    Progress,
    _check_years,
    _warnings_in_order,
    _without_features,
    batch_size_for,
    feature_batches,
    lazy_batch_tables,
    needed_variables,
    provenance,
    store_daily_series,
    take_weights,
)
from service.prepared import Prepared, later_warnings
from service.schemas import IndicatorRequest
from service.settings import Settings
from service.store import Store


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
    days = int(store.dates.year.size)

    def missing(name: str) -> np.ndarray | None:
        return np.full((1, days), np.nan) if name in needed else None

    daily = store_daily_series(store, slice(None), {var: missing(var) for var in VARIABLES}, np.zeros(1))
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
    later = later_warnings(parsed.repaired, prepared.skipped)
    warnings.extend(later)
    frame = add_warning_notes(frame, later)
    document = provenance(resolved.request, store, parsed, prepared.skipped)
    document["request"] = _event_summary(document["request"], resolved.request)
    return RunResult(frame=frame, provenance=document, warnings=warnings)
