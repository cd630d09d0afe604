"""Response models of the routes that are not result tables (those are service.schemas.IndicatorResult)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from service.encode.formats import TableFormat


class ProblemItem(BaseModel):
    """One failing field or feature of a request: where (an RFC 6901 pointer into the body) and why."""

    model_config = ConfigDict(extra="allow")
    pointer: str | None = None
    message: str | None = Field(default=None, description="Why a field failed validation.")
    detail: str | None = Field(default=None, description="Why a feature failed.")
    feature_id: str | None = None
    code: str | None = Field(default=None, description="A feature's fault as a warning code.")


class Problem(BaseModel):
    """An RFC 9457 problem document; request errors add a pointer, a feature id or the limit exceeded."""

    model_config = ConfigDict(extra="allow")
    type: str
    title: str
    status: int
    detail: str
    instance: str | None = None
    pointer: str | None = Field(default=None, description="RFC 6901 pointer to the failing part of the body.")
    feature_id: str | None = None
    field: str | None = None
    limit: str | None = Field(default=None, description="The setting whose limit was exceeded.")
    errors: list[ProblemItem] | None = None


class Health(BaseModel):
    """Liveness: the process answers."""

    status: Literal["ok"]
    version: str


class Readiness(BaseModel):
    """Readiness: the datasets are open and the job worker is alive."""

    status: Literal["ready", "not ready"]
    datasets: list[str]
    job_worker: Literal["alive", "stopped"]
    jobs_queued: int
    jobs_running: int


class Dataset(BaseModel):
    """What a dataset holds: variables and units, grid, time range, calendar, weight layers, fingerprint."""

    model_config = ConfigDict(extra="allow")
    name: str
    title: str = ""
    variables: dict[str, dict[str, Any]] = Field(
        description="Per variable: units, standard_name, cell_methods."
    )
    layout_version: int = Field(default=2, description="Store layout: 1 (one grid), 2 (one group per grid).")
    grids: dict[str, dict[str, Any]] = Field(
        default_factory=dict,
        description=(
            "Every grid by name, the main grid first: crs, coordinates ('longitude-latitude', 'projected' or "
            "'rotated'), shape, resolution, bounds (CRS units), lonlat_bounds (its outline transformed to "
            "longitude-latitude; west > east across the antimeridian), variables, layers, cells_with_data."
        ),
    )
    crs: dict[str, Any] = Field(description="name, epsg, is_geographic and the WKT of the main grid's CRS.")
    resolution: dict[str, Any]
    bounds: dict[str, float] = Field(description="Outer cell edges of the main grid in its CRS units.")
    lonlat_bounds: dict[str, float] | None = Field(
        default=None, description="The main grid's outline as a longitude-latitude box (degrees, WGS 84)."
    )
    time: dict[str, Any] = Field(description="First and last day, number of days, calendar.")
    years: list[int] = Field(description="First and last year with data.")
    calendar: str
    layers: list[str] = Field(
        description="Weight layers for {'weighting': {'layer': NAME}} (those present on every grid)."
    )
    fingerprint: str = Field(
        description=(
            "Hash over the store's decoded values (in a fixed tiling: chunks, shards and codecs do not change "
            "it) and the metadata that changes them, recorded at write time."
        )
    )
    migrated_from: dict[str, Any] | None = Field(
        default=None, description="Layout and fingerprint of the store this one was migrated from."
    )


class DatasetList(BaseModel):
    """Every dataset this server serves; the first is the default."""

    datasets: list[Dataset]


class ParameterInfo(BaseModel):
    """One indicator parameter: its default, unit, meaning and bounds, or for a method choice its choices."""

    default: float | str = Field(description="A number, or for a method choice one of `choices`.")
    unit: str
    description: str
    minimum: float | None = None
    maximum: float | None = None
    choices: list[str] | None = Field(default=None, description="The allowed words of a method choice.")


class IndicatorInfo(BaseModel):
    """A catalog entry: name, unit, definition, published source and parameters."""

    name: str
    unit: str
    definition: str
    source: str
    family: str
    parameters: dict[str, ParameterInfo]
    standardized: bool = Field(
        description="The value is itself a standard-normal deviate (its z is the value)."
    )
    percent_of_normal: bool = Field(description="A percent of normal column is given too.")
    uses_baseline: bool = Field(description="The value itself depends on the baseline period.")
    variables: list[str] = Field(description="The daily variables it reads (tmax, tmin, prcp).")
    reduction: str = Field(
        description="How it reduces the season's days: sum, count, mean, extreme, run, share or standardized. "
        "Sums and counts (and the totals SPI and SPEI standardize) follow partial_seasons."
    )
    bounds: list[float] | None = Field(
        default=None, description="The value is clipped to [low, high]; a value on a bound carries at_clip."
    )
    details: str = Field(
        default="", description="Exactly what is computed: method choices, conventions, biases."
    )


class IndicatorCatalog(BaseModel):
    """Every indicator the service computes."""

    indicators: list[IndicatorInfo]
    event_windows: str = Field(
        default="", description="What 'the same window' of an event means in other years (the baseline rule)."
    )
    conventions: dict[str, str] = Field(
        default_factory=dict,
        description="The rules every indicator follows (daily values, thresholds, aggregation, partial seasons, "
        "baseline, anomalies, classes, fits, spells), each request option with its default.",
    )


JobStateName = Literal["queued", "running", "succeeded", "failed", "cancelled"]


class JobStatus(BaseModel):
    """A batch job's state, progress and, once succeeded, where its result is."""

    id: str
    state: JobStateName
    dataset: str
    format: TableFormat
    features_total: int
    features_done: int
    progress: float = Field(description="Share of features done, 0 to 1.")
    seconds_left: float | None = Field(
        description="Estimated seconds until done; null until the pace is known."
    )
    created_at: str = Field(description="ISO 8601, UTC.")
    started_at: str | None
    finished_at: str | None
    attempts: int = Field(description="How many times the job was started (a server restart re-runs it).")
    error: Problem | None = None
    owner: str = Field(description="Owner of the token that submitted the job.")
    features_skipped: int = Field(
        default=0, description="Features that cannot be computed and are skipped (invalid_features 'skip')."
    )
    skipped: list[ProblemItem] = Field(
        default_factory=list,
        description="Each skipped feature: its position and id, the code and the reason; its rows hold nulls.",
    )
    links: dict[str, str]


class JobList(BaseModel):
    """The caller's jobs, newest first."""

    jobs: list[JobStatus]


def problem_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI response entries for error statuses, each an application/problem+json Problem."""
    reasons = {
        400: "Malformed request",
        401: "Missing or wrong bearer token",
        404: "Not found",
        406: "Format not available",
        409: "Not in that state",
        413: "Limit exceeded (body size or features)",
        422: "The request cannot be served as written",
        503: "Not ready",
        507: "The server's storage is full",
    }
    return {
        status: {
            "description": reasons.get(status, "Error"),
            "content": {"application/problem+json": {"schema": {"$ref": "#/components/schemas/Problem"}}},
        }
        for status in statuses
    }
