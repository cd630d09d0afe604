"""Daily area-weighted series of communities, for users who compute their own indicators."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Query, Request, Response

from service.encode.formats import SeriesFormat
from service.routes.body import OffLoopRoute
from service.routes.deps import (
    AppSettings,
    Registry,
    check_on_demand,
    require_token,
    table_responses,
)
from service.routes.models import problem_responses
from service.schemas import IndicatorResult, SeriesRequest

router = APIRouter(
    prefix="/v1/series", tags=["series"], dependencies=[Depends(require_token)], route_class=OffLoopRoute
)


@router.post(
    "",
    operation_id="computeSeries",
    response_model=IndicatorResult,
    responses={
        **table_responses("The daily series, one row per (feature_id, date)", bundle=False),
        **problem_responses(400, 401, 404, 406, 413, 422, 503),
    },
)
def compute_series(
    body: SeriesRequest,
    request: Request,
    registry: Registry,
    settings: AppSettings,
    format: Annotated[SeriesFormat | None, Query(description="Overrides Accept.")] = None,
) -> Response:
    """Daily area-weighted tmax, tmin, tmean and prcp per community (Parquet unless asked otherwise)."""
    from service import encode, pipeline

    fmt = encode.format_from(
        request.headers.get("accept"), format, default="parquet", offered=encode.SERIES_FORMATS
    )
    check_on_demand(body, settings)
    store = registry.get_dataset(body.dataset)
    content, media_type, headers = encode.encode(pipeline.run_series(body, store, settings), fmt)
    return Response(content, media_type=media_type, headers=headers)
