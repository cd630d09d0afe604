"""Every check a request passes before daily values are read (shared by seasons, events, variants)."""

from typing import Any

import numpy as np
import pandas as pd

from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.errors import (
    FeatureError,
)
from service.indicators.base import VARIABLES
from service.indicators.table import (
    compute_table,
)
from service.pipeline.core import features_and_weights, needed_variables, store_daily_series, time_span
from service.prepared import Prepared, skipped_of
from service.schemas import IndicatorRequest, SeriesRequest
from service.settings import Settings
from service.store import Store


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

    daily = store_daily_series(store, span, {var: missing(var) for var in VARIABLES}, np.zeros(1))
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
