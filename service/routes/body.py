"""Request bodies read off the event loop: JSON parsed feature by feature and validated in a worker thread.

FastAPI parses a JSON body with one ``json.loads`` and validates it on the event loop; a 50 MB body held the
loop (and /health) for many seconds. Routes built with :class:`OffLoopRoute` parse it with
service.request_text and validate it against the route's body model in the thread pool instead, with positions
in every parse error. FastAPI then receives the validated model, which it passes through without validating
it again; an invalid body is handed over as parsed, and FastAPI reports its errors (after the bearer token
is checked, as for any request). The body of a request without a valid token is not parsed at all.
"""

from __future__ import annotations

from collections.abc import Callable, Coroutine
from typing import Any

from fastapi import Request, Response
from fastapi.routing import APIRoute
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException as StarletteHTTPException

from service import request_text
from service.errors import WxshockError

# Where the parsed body is kept in the request scope, so that problem documents can point into it.
BODY_SCOPE_KEY = "wxshock.body"


class ProblemException(StarletteHTTPException):
    """A WxshockError raised while reading a body (FastAPI passes HTTPException through unchanged)."""

    def __init__(self, error: WxshockError) -> None:
        super().__init__(status_code=error.status)
        self.error = error


def parse_body(raw: bytes) -> Any:
    """The JSON value of a request body; ProblemException with the position of any fault."""
    try:
        return request_text.loads(request_text.decode_body(raw))
    except WxshockError as exc:
        raise ProblemException(exc) from None


def parse_and_validate(raw: bytes, body_field: Any, scope: dict[str, Any]) -> Any:
    """The body validated against the route's model, or as parsed when it fails validation."""
    parsed = parse_body(raw)
    scope[BODY_SCOPE_KEY] = parsed
    if body_field is None:
        return parsed
    validated, errors = body_field.validate(parsed, {}, loc=("body",))
    return parsed if errors else validated


class OffLoopRequest(Request):
    """A request whose JSON body is parsed and validated in the thread pool."""

    body_field: Any = None

    async def json(self) -> Any:
        """The validated body, made once (an empty object, unread, when the bearer token is not valid)."""
        if not hasattr(self, "_json"):
            if not authorized(self):
                self._json = {}  # the route's token check answers 401 before anything looks at the body
                return self._json
            body = await self.body()
            self._json = await run_in_threadpool(parse_and_validate, body, self.body_field, self.scope)
        return self._json


class OffLoopRoute(APIRoute):
    """An APIRoute whose handler reads JSON bodies with OffLoopRequest."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        """The route's handler, given an OffLoopRequest that knows the route's body model."""
        handler = super().get_route_handler()
        body_field = self.body_field

        async def off_loop(request: Request) -> Response:
            own = OffLoopRequest(request.scope, request.receive)
            own.body_field = body_field
            return await handler(own)

        return off_loop


def authorized(request: Request) -> bool:
    """Whether the request may go on to its body: auth is off, or it carries a configured bearer token."""
    from service.routes.deps import principal_of

    state = getattr(request.app.state, "service", None)
    if state is None:
        return True
    return principal_of(state, request.headers.get("authorization")) is not None


def parsed_body(request: Request) -> Any:
    """The parsed body of a request read by an OffLoopRoute, or None."""
    return request.scope.get(BODY_SCOPE_KEY)
