"""Request bodies read off the event loop: JSON parsed feature by feature in a worker thread.

FastAPI parses a JSON body with one ``json.loads`` on the event loop; a 50 MB body held the loop (and /health)
for many seconds. Routes built with :class:`OffLoopRoute` parse it with service.request_text in the thread
pool instead, with positions in every parse error.
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


class OffLoopRequest(Request):
    """A request whose JSON body is parsed in the thread pool."""

    async def json(self) -> Any:
        """The parsed body (parsed once)."""
        if not hasattr(self, "_json"):
            body = await self.body()
            self._json = await run_in_threadpool(parse_body, body)
            self.scope[BODY_SCOPE_KEY] = self._json
        return self._json


class OffLoopRoute(APIRoute):
    """An APIRoute whose handler reads JSON bodies with OffLoopRequest."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        """The route's handler, given an OffLoopRequest."""
        handler = super().get_route_handler()

        async def off_loop(request: Request) -> Response:
            return await handler(OffLoopRequest(request.scope, request.receive))

        return off_loop


def parsed_body(request: Request) -> Any:
    """The parsed body of a request read by an OffLoopRoute, or None."""
    return request.scope.get(BODY_SCOPE_KEY)
