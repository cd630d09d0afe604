"""Daily area-weighted series of communities, for users who compute their own indicators."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Query, Request, Response
from fastapi.responses import StreamingResponse

from service.encode.formats import SeriesFormat
from service.encode.stream import STREAMED_FORMATS, stream
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
    # Every check and the aggregation run before the first byte; the rows are then encoded and sent piece
    # by piece (a 200-feature series over decades is millions of rows). A Stata file is written whole.
    table = pipeline.series_table(body, store, settings)
    if fmt not in STREAMED_FORMATS:
        content, media_type, headers = encode.encode(pipeline.series_result(table), fmt)
        return Response(content, media_type=media_type, headers=headers)
    body_bytes = stream(table.frames, table.columns, table.provenance, table.warnings, fmt)
    return StreamingResponse(
        body_bytes, media_type=encode.FORMATS[fmt], headers=encode.provenance_headers(table.provenance)
    )
