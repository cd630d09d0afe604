"""Pictures as PNG: a community's seasonal z-scores over the years, and one season-year's anomaly map."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query, Response

from service.errors import RequestError
from service.routes.body import OffLoopRoute
from service.routes.deps import AppSettings, Registry, check_on_demand, require_token
from service.routes.models import problem_responses
from service.schemas import IndicatorRequest

router = APIRouter(
    prefix="/v1/plots", tags=["plots"], dependencies=[Depends(require_token)], route_class=OffLoopRoute
)

PNG_RESPONSE: dict[int | str, dict[str, Any]] = {
    200: {
        "description": "A PNG picture",
        "content": {"image/png": {"schema": {"type": "string", "format": "binary"}}},
    }
}
Width = Annotated[int, Query(ge=200, le=4000, description="Picture width in pixels.")]
Height = Annotated[int, Query(ge=150, le=4000, description="Picture height in pixels.")]


def _one_feature(body: IndicatorRequest, feature_id: str | None) -> tuple[IndicatorRequest, str | None]:
    """The request cut down to the one community to draw (by ``feature_id`` when several are sent)."""
    features = getattr(body.features, "features", None)
    if features is None or len(features) == 1:
        return body, feature_id
    if feature_id is None:
        raise RequestError(
            f"the request sends {len(features)} features; name the one to draw with ?feature_id=",
            field="feature_id",
            pointer="/features",
        )
    id_property = body.id_property

    def id_of(feature: object) -> str | None:
        if id_property:
            value = (getattr(feature, "properties", None) or {}).get(id_property)
        else:
            value = getattr(feature, "id", None)
        return None if value is None else str(value)

    chosen = [f for f in features if id_of(f) == feature_id]
    if not chosen:
        known = [i for i in (id_of(f) for f in features) if i is not None][:10]
        raise RequestError(
            f"feature_id {feature_id!r} is not among the features sent ({known!r}...)", field="feature_id"
        )
    collection = body.features.model_copy(update={"features": chosen})
    return body.model_copy(update={"features": collection}), feature_id


def _seasons_only(body: IndicatorRequest) -> None:
    """Pictures draw season-years of one specification: events and variants go to POST /v1/indicators."""
    for field in ("events", "variants"):
        if getattr(body, field):
            raise RequestError(
                f"pictures draw season-years of one specification; a request with '{field}' is not drawn: "
                "drop it here, or send it to POST /v1/indicators for the table",
                field=field,
                pointer=f"/{field}",
            )


def _with_plotted(body: IndicatorRequest, *drawn: str) -> IndicatorRequest:
    """The request in the wide layout, with the drawn indicators added to those it names.

    With no indicators named, only what the picture needs is computed: the drawn indicators and those the
    request's spells and pairs refer to.
    """
    wanted = list(drawn)
    wanted += [c.indicator for s in body.spells for c in s.when] + [n for pair in body.pairs for n in pair]
    given = list(body.indicators) if body.indicators is not None else []
    names = {i if isinstance(i, str) else i.name for i in given}
    extra = [n for n in dict.fromkeys(wanted) if n not in names]
    return body.model_copy(update={"layout": "wide", "indicators": [*given, *extra]})


@router.post(
    "/series",
    operation_id="plotSeries",
    response_class=Response,
    responses={**PNG_RESPONSE, **problem_responses(400, 401, 404, 413, 422, 503)},
)
def plot_series(
    body: IndicatorRequest,
    registry: Registry,
    settings: AppSettings,
    feature_id: Annotated[
        str | None, Query(max_length=200, description="Which community to draw when several are sent.")
    ] = None,
    precipitation: Annotated[
        str, Query(max_length=200, description="Precipitation indicator of the upper panel.")
    ] = "prcp_total",
    temperature: Annotated[
        str, Query(max_length=200, description="Temperature indicator of the lower panel.")
    ] = "tmean",
    width: Width = 1000,
    height: Height = 640,
) -> Response:
    """PNG of one community's seasonal z-scores over the years: class bands shaded, spells marked."""
    from service import pipeline
    from service.encode import provenance_headers
    from service.encode.codebook import season_text
    from service.plots import community_name, series_plot

    check_on_demand(body, settings)
    _seasons_only(body)
    one, wanted = _one_feature(body, feature_id)
    store = registry.get_dataset(one.dataset)
    result = pipeline.run(_with_plotted(one, precipitation, temperature), store, settings)
    drawn = wanted or str(result.frame["feature_id"].iloc[0])
    resolved = result.provenance.get("request") or {}
    baseline = resolved.get("baseline") or {}
    png = series_plot(
        result.frame,
        drawn,
        precipitation=precipitation,
        temperature=temperature,
        edges=one.classes.edges,
        spells=[s.name for s in one.spells],
        community=community_name(_first_properties(one)),
        season=season_text(resolved.get("season")),
        baseline_years=(baseline["start"], baseline["end"]) if "start" in baseline else None,
        baseline_text=_baseline_text(result.provenance),
        size_px=(width, height),
    )
    return Response(png, media_type="image/png", headers=provenance_headers(result.provenance))


def _dumped(value: object) -> object:
    """A request part as plain JSON values (a season model as its dict)."""
    dump = getattr(value, "model_dump", None)
    return dump(mode="json") if dump is not None else value


def _first_properties(body: IndicatorRequest) -> dict | None:
    """The properties of the request's (first) feature."""
    features = getattr(body.features, "features", None)
    feature = features[0] if features else body.features
    properties = getattr(feature, "properties", None)
    return properties if isinstance(properties, dict) else None


def _baseline_text(provenance: dict) -> str:
    """The resolved baseline as words for a title: '1981-1990' or 'the trailing 10 seasons'."""
    baseline = (provenance.get("request") or {}).get("baseline") or {}
    if "trailing" in baseline:
        return f"the trailing {baseline['trailing']} seasons"
    if "start" in baseline:
        return f"{baseline['start']}-{baseline['end']}"
    return "the baseline"


@router.post(
    "/map",
    operation_id="plotMap",
    response_class=Response,
    responses={**PNG_RESPONSE, **problem_responses(400, 401, 404, 413, 422, 503)},
)
def plot_map(
    body: IndicatorRequest,
    registry: Registry,
    settings: AppSettings,
    year: Annotated[
        int | None, Query(ge=1, le=9999, description="Season-year; default the last served.")
    ] = None,
    indicator: Annotated[
        str, Query(max_length=200, description="prcp_total, tmean, tmax_mean or tmin_mean.")
    ] = "prcp_total",
    width: Width = 900,
    height: Height = 700,
) -> Response:
    """PNG of one season-year's anomaly (z) over the grid, with the requested communities outlined."""
    from service import pipeline
    from service.encode.codebook import season_text
    from service.indicators.table import resolve_request
    from service.maps import anomaly_field, map_grid, mappable, to_grid_crs
    from service.plots import map_plot, map_title

    check_on_demand(body, settings)
    _seasons_only(body)
    mappable(indicator)
    store = registry.get_dataset(body.dataset)
    # The table's own checks of the whole request (indicators, parameters, pairs, sequences, spells, years,
    # features: outside the grid, no data, limits), so a map never draws what the table would refuse.
    prepared = pipeline.prepare(_with_plotted(body, indicator), store, settings, keep_shapes=True)
    parsed = prepared.parsed
    # Resolve years and baseline as the table would, for the one mapped indicator only.
    only_mapped = {"indicators": [indicator], "pairs": [], "sequences": [], "spells": []}
    resolved = resolve_request(body.model_copy(update=only_mapped), store.dates)
    field = anomaly_field(
        store,
        indicator,
        year if year is not None else (resolved.years.end if resolved.years is not None else None),
        season=resolved.season,
        baseline=resolved.baseline,
        max_missing_share=(
            body.max_missing_share if body.max_missing_share is not None else settings.max_missing_share
        ),
    )
    grid = map_grid(store, indicator)
    outlines = to_grid_crs([f.geometry for f in parsed.features], parsed.crs, grid.crs())
    first, last = field.baseline_years
    png = map_plot(
        field.z,
        grid.x_edges,
        grid.y_edges,
        outlines,
        labels=parsed.ids,
        family=field.family,
        title=map_title(
            indicator, season_text(_dumped(resolved.season)), field.year, (first, last), store.name
        ),
        geographic=grid.is_geographic,
        size_px=(width, height),
    )
    headers = {"X-Wxshock-Dataset": store.name, "X-Wxshock-Fingerprint": store.fingerprint}
    return Response(png, media_type="image/png", headers=headers)
