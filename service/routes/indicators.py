"""The indicator catalog, and season indicators on demand for a modest number of communities."""

from __future__ import annotations

import importlib
from typing import Annotated

from fastapi import APIRouter, Depends, Query, Request, Response

from service.encode.formats import TableFormat
from service.routes.body import OffLoopRoute
from service.routes.deps import (
    AppSettings,
    Registry,
    check_on_demand,
    require_token,
    table_responses,
)
from service.routes.models import IndicatorCatalog, IndicatorInfo, ParameterInfo, problem_responses
from service.schemas import IndicatorRequest, IndicatorResult

router = APIRouter(
    prefix="/v1/indicators",
    tags=["indicators"],
    dependencies=[Depends(require_token)],
    route_class=OffLoopRoute,
)

OutputFormat = TableFormat  # json, csv, parquet, dta (Stata), bundle (replication zip)


def indicator_catalog() -> IndicatorCatalog:
    """The catalog of every registered indicator (importing the package registers them all)."""
    importlib.import_module("service.indicators")
    from service.indicators.base import catalog
    from service.indicators.table import catalog_conventions
    from service.indicators.windows.instances import WINDOW_RULE

    return IndicatorCatalog(
        event_windows=WINDOW_RULE,
        conventions=catalog_conventions(),
        indicators=[
            IndicatorInfo(
                name=i.name,
                unit=i.unit,
                definition=i.definition,
                source=i.source,
                family=i.family,
                parameters={
                    name: ParameterInfo(
                        default=p.default,
                        unit=p.unit,
                        description=p.description,
                        minimum=p.minimum,
                        maximum=p.maximum,
                        choices=list(p.choices) or None,
                    )
                    for name, p in i.parameters.items()
                },
                standardized=i.standardized,
                percent_of_normal=i.percent_of_normal,
                uses_baseline=i.uses_baseline,
                variables=list(i.variables),
                reduction=i.reduction,
                bounds=list(i.bounds) if i.bounds is not None else None,
                details=i.details,
            )
            for i in catalog()
        ],
    )


@router.get(
    "", operation_id="listIndicators", response_model=IndicatorCatalog, responses=problem_responses(401)
)
def list_indicators() -> IndicatorCatalog:
    """The catalog: each indicator with its unit, definition, parameters and published source."""
    return indicator_catalog()


@router.post(
    "",
    operation_id="computeIndicators",
    response_model=IndicatorResult,
    responses={
        **table_responses("The indicator table with provenance and warnings"),
        **problem_responses(400, 401, 404, 406, 413, 422, 503),
    },
)
def compute_indicators(
    body: IndicatorRequest,
    request: Request,
    registry: Registry,
    settings: AppSettings,
    format: Annotated[OutputFormat | None, Query(description="Output format; overrides Accept.")] = None,
) -> Response:
    """Season indicators for up to max_features_on_demand communities as JSON, CSV or Parquet."""
    from service import encode, pipeline

    fmt = encode.format_from(request.headers.get("accept"), format)
    check_on_demand(body, settings)
    store = registry.get_dataset(body.dataset)
    result = pipeline.run(body, store, settings, stores=registry)  # variants may name other datasets
    content, media_type, headers = encode.encode(result, fmt)
    return Response(content, media_type=media_type, headers=headers)
