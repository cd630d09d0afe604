"""Durable batch jobs: submit any number of features, follow their progress, fetch or cancel."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated

from fastapi import APIRouter, Depends, Header, Path, Query, Request, Response
from fastapi.responses import FileResponse

from service.encode.formats import SUFFIXES, TableFormat
from service.errors import NotAcceptableError
from service.jobs import Job, check_job_request
from service.routes.body import OffLoopRoute
from service.routes.deps import (
    AppSettings,
    Caller,
    Jobs,
    Registry,
    check_feature_count,
    feature_total,
    require_token,
    table_responses,
)
from service.routes.models import JobList, JobStateName, JobStatus, Problem, problem_responses
from service.schemas import IndicatorRequest, IndicatorResult

router = APIRouter(
    prefix="/v1/jobs", tags=["jobs"], dependencies=[Depends(require_token)], route_class=OffLoopRoute
)

IdempotencyKey = Annotated[
    str | None,
    Header(
        alias="Idempotency-Key", max_length=200, description="Repeat a submission safely: same key, same job."
    ),
]


JobId = Annotated[str, Path(max_length=200, description="The job's id, as given at submission.")]


def _iso(seconds: float | None) -> str | None:
    """Seconds since the epoch as ISO 8601 UTC."""
    if seconds is None:
        return None
    return datetime.fromtimestamp(seconds, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def job_status(job: Job) -> JobStatus:
    """The API's view of a job record."""
    total = max(job.features_total, 0)
    links = {"self": f"/v1/jobs/{job.id}"}
    if job.state == "succeeded":
        links["result"] = f"/v1/jobs/{job.id}/result"
    return JobStatus(
        id=job.id,
        state=job.state,  # type: ignore[arg-type]
        dataset=job.dataset,
        format=job.format,  # type: ignore[arg-type]
        features_total=total,
        features_done=job.features_done,
        progress=round(job.features_done / total, 4) if total else 0.0,
        seconds_left=None if (left := job.seconds_left()) is None else round(left, 1),
        created_at=_iso(job.created_at) or "",
        started_at=_iso(job.started_at),
        finished_at=_iso(job.finished_at),
        attempts=job.attempts,
        error=Problem(**job.error) if job.error else None,
        owner=job.owner,
        features_skipped=len(job.skipped),
        skipped=job.skipped,
        links=links,
    )


@router.post(
    "",
    operation_id="submitJob",
    status_code=202,
    response_model=JobStatus,
    responses={
        202: {
            "description": "Accepted (or, with a repeated Idempotency-Key, the job first accepted)",
            "headers": {"Location": {"schema": {"type": "string"}, "description": "The job's URL."}},
        },
        **problem_responses(400, 401, 404, 413, 422, 503, 507),
    },
)
def submit_job(
    body: IndicatorRequest,
    response: Response,
    registry: Registry,
    jobs: Jobs,
    settings: AppSettings,
    caller: Caller,
    idempotency_key: IdempotencyKey = None,
    format: Annotated[
        TableFormat, Query(description="Format of the result: json, csv, parquet, dta or bundle (a zip).")
    ] = "parquet",
) -> JobStatus:
    """Queue an indicator request with any number of features as a batch job; 202 with its Location."""
    check_feature_count(
        feature_total(body.features), settings.max_features_per_job, "max_features_per_job", on_demand=False
    )
    jobs.check_space()
    prepared = check_job_request(body, registry, settings)
    job, created = jobs.submit(body, format, idempotency_key, owner=caller.owner, prepared=prepared)
    response.headers["Location"] = f"/v1/jobs/{job.id}"
    if not created:
        response.headers["Idempotent-Replayed"] = "true"
    return job_status(job)


@router.get(
    "",
    operation_id="listJobs",
    response_model=JobList,
    responses=problem_responses(401, 422, 503),
)
def list_jobs(
    jobs: Jobs,
    caller: Caller,
    state: Annotated[JobStateName | None, Query(description="Only jobs in this state.")] = None,
    limit: Annotated[int, Query(ge=1, le=1000, description="At most this many, newest first.")] = 100,
) -> JobList:
    """Your jobs, newest first (an admin token sees every owner's jobs)."""
    return JobList(jobs=[job_status(j) for j in jobs.list_jobs(caller, state=state, limit=limit)])


@router.get(
    "/{job_id}",
    operation_id="getJob",
    response_model=JobStatus,
    responses=problem_responses(401, 404, 422, 503),
)
def get_job(job_id: JobId, jobs: Jobs, caller: Caller) -> JobStatus:
    """A job's state, features done and total, and an estimate of the time left."""
    return job_status(jobs.status(job_id, caller))


@router.get(
    "/{job_id}/result",
    operation_id="getJobResult",
    response_model=IndicatorResult,
    responses={
        **table_responses("The finished table, in the format chosen at submission"),
        **problem_responses(401, 404, 406, 409, 422, 503),
    },
)
def get_job_result(job_id: JobId, request: Request, jobs: Jobs, caller: Caller) -> FileResponse:
    """The finished table of a succeeded job (409 while it is queued or running, or when it failed)."""
    job, path = jobs.result_path(job_id, caller)
    accept = request.headers.get("accept")
    if not _accepts(accept, job.media_type or ""):
        raise NotAcceptableError(
            f"the result of job {job_id!r} is {job.format} ({job.media_type}), chosen at submission with "
            f"?format=; Accept {accept!r} does not allow it",
            field="Accept",
        )
    return FileResponse(
        path,
        media_type=job.media_type,
        headers=job.headers,
        filename=f"wxshock-{job.id}.{SUFFIXES[job.format]}",
        content_disposition_type="attachment",
    )


@router.delete(
    "/{job_id}",
    operation_id="cancelJob",
    response_model=JobStatus,
    responses=problem_responses(401, 404, 409, 422, 503),
)
def cancel_job(job_id: JobId, jobs: Jobs, caller: Caller) -> JobStatus:
    """Cancel a queued or running job; its partial work is discarded."""
    return job_status(jobs.cancel(job_id, caller))


def _accepts(accept: str | None, media_type: str) -> bool:
    """Whether an Accept header allows ``media_type`` (no header, */* or type/* allow everything)."""
    if not accept:
        return True
    kind = media_type.split("/", 1)[0]
    for part in accept.split(","):
        media, *params = (p.strip().lower() for p in part.split(";"))
        if any(p.replace(" ", "") in ("q=0", "q=0.0", "q=0.00", "q=0.000") for p in params):
            continue
        if media in ("*/*", f"{kind}/*", media_type):
            return True
    return False
