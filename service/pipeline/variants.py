"""Specification sweeps: variants sharing a weighting share one aggregation."""

import hashlib
import json
import re
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from service import cluster
from service.encode import RunResult
from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.errors import (
    FeatureError,
    RunCancelledError,
    UnknownDatasetError,
)
from service.geometry import ParsedFeatures, Weights
from service.indicators.base import VARIABLES
from service.indicators.table import (
    add_warning_notes,
    resolve_request,
)
from service.indicators.windows import ResolvedEvents
from service.pipeline.cells import cells_table
from service.pipeline.checks import _dry_run, _without_skipped
from service.pipeline.core import (
    DEFAULT_BATCH_FEATURES,
    BatchJob,
    Cancelled,
    Progress,
    _check_years,
    _feature_columns,
    _in_feature_order,
    _is_feature_column,
    _Skipped,
    _warnings_in_order,
    _without_features,
    batch_size_for,
    check_cells_grids,
    feature_batches,
    grids_for,
    lazy_batch_tables,
    needed_variables,
    parse_request_features,
    pick_store,
    provenance,
    request_variables,
    take_weights,
    time_span,
    weights_for,
)
from service.pipeline.events import (
    _dry_run_events,
    _event_batches,
    _event_summary,
    _events_job,
    _light_events_request,
    _row_order,
    resolve_events_for,
)
from service.prepared import Prepared, later_warnings, skipped_of
from service.schemas import IndicatorRequest
from service.settings import Settings
from service.store import Store


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
    later = later_warnings(parsed.repaired, run_.skipped)
    frame = add_warning_notes(frame, later)
    return frame, [{**w, "reason": f"variant {run_.name!r}: {w['reason']}"} for w in warnings + later]


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
    # one frame from a dict of columns: inserting the keys into a frame of many (categorical, Int64) columns,
    # as reset_index would, fragments it (pandas PerformanceWarning) and copies it once per key
    keys_frame = index.to_frame(index=False)
    columns: dict[str, Any] = {name: keys_frame[name].array for name in keys_frame.columns}
    for piece in [*pieces, union.to_frame()]:
        for name in piece.columns:
            columns[name] = piece[name].array
    return pd.DataFrame(columns)


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
