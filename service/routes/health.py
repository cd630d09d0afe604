"""Liveness and readiness probes (open even when bearer tokens are configured)."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import JSONResponse

from service import __version__
from service.routes.deps import State
from service.routes.models import Health, Readiness

router = APIRouter(tags=["service"])


@router.get("/health", operation_id="getHealth", response_model=Health)
async def health() -> Health:
    """Liveness: the process answers."""
    return Health(status="ok", version=__version__)


@router.get(
    "/ready",
    operation_id="getReadiness",
    response_model=Readiness,
    responses={503: {"model": Readiness, "description": "Datasets not open or job worker stopped"}},
)
def ready(state: State) -> Readiness | JSONResponse:
    """Readiness: the datasets are open and the job worker is alive."""
    jobs = state.jobs
    alive = jobs is not None and jobs.alive
    readiness = Readiness(
        status="ready" if alive and state.registry else "not ready",
        datasets=list(state.registry or []),
        job_worker="alive" if alive else "stopped",
        jobs_queued=jobs.db.count("queued") if jobs else 0,
        jobs_running=jobs.db.count("running") if jobs else 0,
    )
    if readiness.status != "ready":
        return JSONResponse(readiness.model_dump(), status_code=503)
    return readiness
