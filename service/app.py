"""The HTTP service: the FastAPI app (stores opened once in its lifespan), its error handling, and `serve`."""

from __future__ import annotations

import asyncio
import gc
import importlib
import importlib.util
import json
import logging
import math
import re
import threading
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.middleware.cors import CORSMiddleware
from fastapi.openapi.utils import get_openapi
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service import __version__
from service.errors import (
    PROBLEM_MEDIA_TYPE,
    PROBLEM_TYPE_PREFIX,
    AuthError,
    LimitExceededError,
    RequestValidationFailed,
    WxshockError,
    problem_for,
    validation_items,
)
from service.jobs import JobRunner
from service.memory import release_memory
from service.registry import StoreRegistry
from service.routes import ROUTER_MODULES
from service.routes.body import ProblemException, parsed_body
from service.routes.deps import ServiceState, load_tokens
from service.routes.models import Problem
from service.settings import Settings
from service.store.chunks import configure_tile_cache

log = logging.getLogger("wxshock.app")

DESCRIPTION = """\
Community weather-shock indicators from a daily weather grid, on demand.

Post community polygons or survey-cluster points (GeoJSON) with a baseline period, a season and lags, and
get one row per (feature_id, year) as JSON, CSV or Parquet, with the dataset fingerprint and the resolved
request as provenance. Large inputs go to durable batch jobs (`/v1/jobs`). Every error is an RFC 9457
problem document (`application/problem+json`).
"""


# --- problem documents ----------------------------------------------------------------------------------------


# A dotted field name with list positions, e.g. "years.start", "pairs[0][1]", "spells[0].when[1].indicator".
_FIELD_PATH = re.compile(r"^[a-z_]+(?:\[\d+\]|\.[a-z_]+)*$")
# Fields whose dotted names follow the request's own structure (indicators.<name>.<parameter> does not: the
# indicator list is addressed by position, so no pointer is made up for it).
_POINTER_FIELDS = frozenset(
    {"dataset", "years", "season", "baseline", "classes", "lags", "pairs", "sequences", "spells", "weighting",
     "layout", "crs", "id_property", "max_missing_share", "variables"}
)  # fmt: skip


def pointer_from_field(field: str | None, body: Any = None) -> str | None:
    """An RFC 6901 pointer into the request body from a dotted field name ('years.start' -> '/years/start').

    Fields about indicators ('indicators', 'indicators.gdd.base') point into the indicator list; with the
    parsed ``body`` at hand they point at the indicator (and parameter) itself.
    """
    if field is not None and (field == "indicators" or field.startswith(("indicators.", "indicators["))):
        return _indicator_pointer(field, body)
    if (
        not field
        or not _FIELD_PATH.match(field)
        or re.split(r"[.\[]", field, maxsplit=1)[0] not in _POINTER_FIELDS
    ):
        return None
    return "/" + re.sub(r"\[(\d+)\]", r"/\1", field).replace(".", "/")


def _indicator_pointer(field: str, body: Any) -> str:
    """The pointer of an indicator field: '/indicators/<index>[/<parameter>]' where the body tells, else the list."""
    indexed = re.fullmatch(r"indicators\[(\d+)\]", field)
    if indexed:
        return f"/indicators/{indexed.group(1)}"
    given = body.get("indicators") if isinstance(body, dict) else None
    if not isinstance(given, list):
        return "/indicators"
    names = [i if isinstance(i, str) else i.get("name") if isinstance(i, dict) else None for i in given]
    parts = field.split(".")
    if len(parts) == 3 and parts[1] in names:
        index = names.index(parts[1])
        return f"/indicators/{index}/{parts[2]}" if isinstance(given[index], dict) else f"/indicators/{index}"
    if field == "indicators":
        from service.indicators.base import catalog

        known = {i.name for i in catalog()}
        unknown = [k for k, name in enumerate(names) if name not in known]
        if unknown:
            return f"/indicators/{unknown[0]}"
    return "/indicators"


class ProblemResponse(JSONResponse):
    """application/problem+json, written as ASCII JSON so that any echoed value (even a lone surrogate) encodes."""

    media_type = PROBLEM_MEDIA_TYPE

    def render(self, content: Any) -> bytes:
        """The document as compact ASCII JSON bytes."""
        return json.dumps(
            _finite(content), ensure_ascii=True, allow_nan=False, separators=(",", ":")
        ).encode()


def _finite(value: Any) -> Any:
    """``value`` with NaN and infinite floats (which JSON cannot hold) written as their names."""
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)
    if isinstance(value, dict):
        return {str(k): _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    return value


def problem_response(exc: BaseException, request: Request) -> JSONResponse:
    """The problem+json response of an exception (WxshockError or anything else, which becomes a 500)."""
    status, doc = problem_for(exc, instance=request.url.path)
    if 400 <= status < 500 and "pointer" not in doc and "feature_id" not in doc:
        pointer = pointer_from_field(doc.get("field"), parsed_body(request))
        if pointer is not None:
            doc["pointer"] = pointer
    headers = {"WWW-Authenticate": 'Bearer realm="wxshock"'} if isinstance(exc, AuthError) else None
    return ProblemResponse(doc, status_code=status, headers=headers)


def validation_problem(exc: RequestValidationError, content_type: str = "") -> RequestValidationFailed:
    """FastAPI's request validation failure as one RequestValidationFailed listing every field by pointer."""
    errors = list(exc.errors())
    malformed = next((e for e in errors if e.get("type") == "json_invalid"), None)
    if malformed is not None:
        position = malformed.get("loc", ("body", 0))[-1]
        reason = (malformed.get("ctx") or {}).get("error", "invalid JSON")
        failure = RequestValidationFailed(
            f"the request body is not valid JSON: {reason} at character {position}; send one JSON object",
            errors=[{"pointer": "", "message": f"{reason} at character {position}"}],
            pointer="",
        )
        failure.status = 400
        return failure
    body_errors = [e for e in errors if tuple(e.get("loc", ()))[:1] == ("body",)]
    other_errors = [e for e in errors if tuple(e.get("loc", ()))[:1] != ("body",)]
    items = validation_items(body_errors, drop_prefix=("body",))
    for error in other_errors:
        where, *name = error.get("loc", ("request",))
        items.append(
            {
                "pointer": "",
                "message": str(error.get("msg", "")),
                "in": where,
                "name": ".".join(map(str, name)),
            }
        )
    for item, error in zip(items, body_errors, strict=False):
        if tuple(error.get("loc", ())) != ("body",):
            continue
        if error.get("type") == "missing":
            item["message"] = "the request needs a JSON body (Content-Type: application/json)"
        elif error.get("type") not in _NOT_AN_OBJECT:
            continue  # a check of the whole request (no field of its own): its message says what failed
        elif "json" not in content_type:
            item["message"] = f"the body was sent as {content_type or 'no Content-Type'!r}; send JSON with "
            item["message"] += "Content-Type: application/json"
        else:
            item["message"] = (
                f"the body must be one JSON object (the request), not {error.get('input')!r:.40}"
            )
    first = items[0] if items else {"pointer": "", "message": "invalid request"}
    where = first["pointer"] or (
        f"{first.get('in')} parameter {first.get('name')!r}" if "in" in first else "the body"
    )
    return RequestValidationFailed(
        f"{len(items)} field(s) failed validation; first: {where}: {first['message']}",
        errors=items,
        pointer=first["pointer"] if first["pointer"] or "in" not in first else None,
        field=first.get("name") if "in" in first else None,
    )


# Pydantic's error types for a body that is not an object at all.
_NOT_AN_OBJECT = frozenset({"model_type", "model_attributes_type", "dict_type"})


class BodyTooLarge(StarletteHTTPException):
    """Raised while reading a body that outgrows max_body_bytes (FastAPI re-raises HTTPException unchanged)."""

    def __init__(self, allowed: int, got: int, *, exact: bool) -> None:
        super().__init__(status_code=413)
        self.allowed = allowed
        self.got = got
        self.exact = exact

    def error(self) -> LimitExceededError:
        """The limit error this stands for."""
        size = f"{self.got} bytes" if self.exact else f"more than {self.allowed} bytes"
        return LimitExceededError(
            f"the request body is {size}; at most {self.allowed} bytes are allowed (setting max_body_bytes); "
            "send fewer or simpler features per request",
            limit="max_body_bytes",
            allowed=self.allowed,
            got=self.got,
            status=413,
        )


def install_error_handlers(app: FastAPI) -> None:
    """Every error answers with an RFC 9457 problem document; a user's mistake is never a 500."""

    async def wxshock_error(request: Request, exc: Exception) -> JSONResponse:
        return problem_response(exc, request)

    async def request_invalid(request: Request, exc: Exception) -> JSONResponse:
        content_type = request.headers.get("content-type", "").lower()
        return problem_response(validation_problem(exc, content_type), request)  # type: ignore[arg-type]

    async def http_error(request: Request, exc: Exception) -> JSONResponse:
        if isinstance(exc, BodyTooLarge):
            return problem_response(exc.error(), request)
        if isinstance(exc, ProblemException):
            return problem_response(exc.error, request)
        status = getattr(exc, "status_code", 500)
        slug, title = _HTTP_PROBLEMS.get(status, ("http-error", "HTTP error"))
        detail = {
            404: f"no route {request.url.path!r}; see /docs for the routes",
            405: f"{request.method} is not allowed on {request.url.path!r}",
        }.get(status, str(getattr(exc, "detail", "")))
        doc = {
            "type": PROBLEM_TYPE_PREFIX + slug,
            "title": title,
            "status": status,
            "detail": detail,
            "instance": request.url.path,
        }
        return ProblemResponse(doc, status_code=status, headers=getattr(exc, "headers", None))

    app.add_exception_handler(WxshockError, wxshock_error)
    app.add_exception_handler(RequestValidationError, request_invalid)
    app.add_exception_handler(StarletteHTTPException, http_error)
    # Anything else is answered by UnexpectedErrors (below), not by an Exception handler: Starlette re-raises
    # after such a handler, and uvicorn then drops the client's keep-alive connection.


_HTTP_PROBLEMS = {
    400: ("bad-request", "Bad request"),
    404: ("not-found", "Not found"),
    405: ("method-not-allowed", "Method not allowed"),
    413: ("limit-exceeded", "Limit exceeded"),
    415: ("unsupported-media-type", "Unsupported media type"),
}


class UnexpectedErrors:
    """ASGI middleware answering an unexpected failure with a 500 problem document, logged, not re-raised.

    A failure that Starlette's outermost error middleware sees is re-raised to the server, which then closes
    the connection; answered here, the client keeps its keep-alive connection. A failure after the response
    has started (a streamed body) cannot be answered and is re-raised.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def tracking_send(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, receive, tracking_send)
        except Exception as exc:
            log.exception("unexpected failure on %s %s", scope.get("method"), scope.get("path"), exc_info=exc)
            if started:
                raise
            status, doc = problem_for(exc, instance=scope.get("path"))
            await ProblemResponse(doc, status_code=status)(scope, receive, send)


class ReleaseMemory:
    """ASGI middleware giving freed memory back to the system after each HTTP request (service.memory).

    The trim runs in a thread after the response has been sent, so no client waits for it; a request that ends
    while a trim runs does not start another.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        try:
            await self.app(scope, receive, send)
        finally:
            if scope["type"] == "http":
                asyncio.get_running_loop().run_in_executor(None, release_memory)


class BodySizeLimit:
    """ASGI middleware refusing request bodies above ``max_bytes`` with 413, before or while they arrive."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = _content_length(scope)
        if declared is not None and declared > self.max_bytes:
            await _send_problem(scope, send, BodyTooLarge(self.max_bytes, declared, exact=True).error())
            return
        received = 0

        async def limited_receive() -> Message:
            nonlocal received
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > self.max_bytes:
                    raise BodyTooLarge(self.max_bytes, received, exact=False)
            return message

        await self.app(scope, limited_receive, send)


def _content_length(scope: Scope) -> int | None:
    """The request's Content-Length, or None when absent or unreadable."""
    for key, value in scope.get("headers", ()):
        if key == b"content-length":
            try:
                return int(value)
            except ValueError:
                return None
    return None


async def _send_problem(scope: Scope, send: Send, exc: WxshockError) -> None:
    """Answer with the problem document of ``exc`` straight from middleware."""
    status, doc = problem_for(exc, instance=scope.get("path"))
    response = ProblemResponse(doc, status_code=status, headers={"Connection": "close"})

    async def no_body() -> Message:
        return {"type": "http.disconnect"}

    await response(scope, no_body, send)


# --- the app --------------------------------------------------------------------------------------------------


def _openapi_schema(app: FastAPI) -> dict[str, Any]:
    """The OpenAPI document, with the problem document schema that every error response refers to."""
    if app.openapi_schema is None:
        schema = get_openapi(
            title=app.title,
            version=app.version,
            description=app.description,
            routes=app.routes,
            tags=app.openapi_tags,
        )
        for operations in schema.get("paths", {}).values():
            for operation in operations.values():
                # The handler's one-line docstring is the summary (FastAPI would use the function name).
                if operation.get("description"):
                    operation["summary"] = operation["description"].strip().splitlines()[0]
        problem = Problem.model_json_schema(ref_template="#/components/schemas/{model}")
        components = schema.setdefault("components", {}).setdefault("schemas", {})
        components.update(problem.pop("$defs", {}))
        components["Problem"] = problem
        app.openapi_schema = schema
    return app.openapi_schema


def routers() -> list[Any]:
    """The routers of every route module present (the plots and viewer modules may not be installed)."""
    found = []
    for name in ROUTER_MODULES:
        if importlib.util.find_spec(name) is not None:
            found.append(importlib.import_module(name).router)
    return found


def _warm_up_kernels() -> None:
    """Load the aggregation's and the indicator table's compiled kernels (logged, never raised: a request
    compiles what is missing itself)."""
    from service import weighted_sums
    from service.indicators import compiled

    try:
        weighted_sums.warm_up()
        compiled.warm_up()
    except Exception:  # noqa: BLE001 - a warm-up must never take the server down
        log.exception("loading the compiled kernels ahead of the first request failed")


def create_app(settings: Settings, *, open_stores: bool = True) -> FastAPI:
    """The wxshock app; with ``open_stores`` its lifespan opens the datasets and starts the job worker."""
    state = ServiceState(settings=settings, tokens=load_tokens(settings) if open_stores else {})

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        if open_stores:
            configure_tile_cache(settings.tile_cache_mb << 20)  # decoded chunks kept for repeated requests
            # Opening (or building the demo on first start) blocks; keep it off the event loop.
            state.registry = await run_in_threadpool(StoreRegistry.open, settings)
            state.jobs = JobRunner(settings, state.registry)
            await run_in_threadpool(state.jobs.start)
            log.info("wxshock %s ready: datasets %s", __version__, ", ".join(state.registry))
            # The compiled kernels load on a side thread now, not inside the first request (about 1 s of CPU).
            threading.Thread(target=_warm_up_kernels, name="wxshock-warm-up", daemon=True).start()
        try:
            yield
        finally:
            if state.jobs is not None:
                await run_in_threadpool(state.jobs.stop)
            # A distributed client left open would keep the process (and the scheduler's slot) alive.
            from service import cluster

            await run_in_threadpool(cluster.close_clients)

    app = FastAPI(
        title="wxshock",
        version=__version__,
        description=DESCRIPTION,
        lifespan=lifespan,
        docs_url=None,  # /docs and /redoc come from service.routes.docs, with their scripts served locally
        redoc_url=None,
        openapi_tags=[
            {"name": "service", "description": "Liveness and readiness."},
            {"name": "datasets", "description": "The daily weather grids this server serves."},
            {"name": "indicators", "description": "The catalog, and indicators on demand."},
            {"name": "series", "description": "Daily area-weighted series."},
            {"name": "jobs", "description": "Durable batch jobs for any number of features."},
        ],
    )
    app.state.service = state
    install_error_handlers(app)
    for router in routers():
        app.include_router(router)
    app.add_middleware(UnexpectedErrors)
    app.add_middleware(ReleaseMemory)
    app.add_middleware(BodySizeLimit, max_bytes=settings.max_body_bytes)
    if settings.cors_origins:
        app.add_middleware(
            CORSMiddleware,
            allow_origins=settings.cors_origins,
            allow_methods=["GET", "POST", "DELETE"],
            allow_headers=["Authorization", "Content-Type", "Accept", "Idempotency-Key"],
            expose_headers=[
                "Location",
                "X-Wxshock-Dataset",
                "X-Wxshock-Fingerprint",
                "X-Wxshock-Request-Hash",
                "X-Wxshock-Software",
            ],
        )
    app.openapi = lambda: _openapi_schema(app)  # type: ignore[method-assign]
    return app


def openapi_document() -> dict[str, Any]:
    """The app's OpenAPI document, built with default settings and without opening any store."""
    return create_app(Settings(), open_stores=False).openapi()


# Python's cyclic garbage collector, tuned for a server that holds large requests. A full collection walks
# every live container and holds the interpreter meanwhile: while a 100,000-feature request (millions of
# lists and dicts) was read, full collections ran every few hundred thousand allocations and each stopped
# every thread, /health included, for up to 2 s (bench/RESULTS.md). Young collections every 20,000
# allocations instead of 700, and a full one only after 100 of the middle ones (and, as always, once the
# long-lived objects have grown by a quarter); the request's own objects are freed by reference counting.
GC_THRESHOLDS = (20_000, 5, 100)


def tune_garbage_collection() -> None:
    """Collect rarely, and leave the objects made at start (modules, app) out of every later collection."""
    gc.set_threshold(*GC_THRESHOLDS)
    gc.collect()
    gc.freeze()


def serve(settings: Settings) -> None:
    """Run the service with uvicorn on settings.host:settings.port until interrupted."""
    import uvicorn

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    app = create_app(settings)
    tune_garbage_collection()
    uvicorn.run(
        app,
        host=settings.host,
        port=settings.port,
        log_level="info",
        timeout_graceful_shutdown=10,
    )
