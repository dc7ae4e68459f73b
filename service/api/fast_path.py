"""The three query routes, served ahead of the framework's middleware and per-request machinery.

Dependency resolution, the body read and parse, validation and the routing layers cost a search
1.2 to 1.7 ms on the 2-core development machine, of the 3 ms the service may add to a query over
HTTP; this layer takes a well-formed query straight to the same use case the route calls, with
the same body model, authentication and rendering, and saved 0.3 to 0.8 ms per search over HTTP
(one client, three runs alternating with the framework's route). It sits in front of the
middleware stack, whose layers cost another 0.08 ms at 100,000 chunks (probes at both ends),
so it keeps the stack's promises itself: a body over the limit, a request from a browser (which
the CORS layer answers) and anything it cannot take whole (a body its parser might read
otherwise than the framework's, or that the model refuses) go on to the stack untouched, so
every refusal a caller sees has one source and one wording; an unexpected failure gets the
stack's plain 500 and is raised on to the server, which logs it.
"""

from __future__ import annotations

import re

from pydantic import ValidationError
from starlette.responses import PlainTextResponse
from starlette.types import ASGIApp, Receive, Scope, Send

from service.api.body import body_of, declares_more_than, read_body, replay
from service.api.deps import caller_for
from service.api.errors import error_response
from service.api.query_pool import QueryPool
from service.api.routes.retrieval import QUERY_ROUTES, respond, router
from service.api.schemas import SearchIn
from service.errors import ServiceError
from service.usecases.ratelimit import RateLimiter
from service.usecases.runtime import Runtime

# The query routes' own paths; a path parameter matches one segment, as the framework's does.
_QUERY_PATH = re.compile(
    re.escape(router.prefix).replace(re.escape("{name}"), "([^/]+)")
    + "/("
    + "|".join(QUERY_ROUTES)
    + ")"
)
# The model's JSON parser reads these non-JSON tokens as numbers; the framework's refuses them.
_NON_JSON_NUMBERS = (b"NaN", b"Infinity")
_JSON_MEDIA_TYPES = (b"", b"application/json")
# What the framework's outermost layer answers when a route fails unexpectedly.
_INTERNAL_ERROR = PlainTextResponse("Internal Server Error", status_code=500)


class QueryFastPath:
    def __init__(
        self,
        app: ASGIApp,
        *,
        runtime: Runtime,
        pool: QueryPool,
        rate_limiter: RateLimiter,
        body_limit: int,
    ) -> None:
        self.app = app
        self.runtime = runtime
        self.pool = pool
        self.rate_limiter = rate_limiter
        self.body_limit = body_limit

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        match = None
        if scope["type"] == "http" and scope["method"] == "POST":
            match = _QUERY_PATH.fullmatch(scope["path"])
        if match is None:
            await self.app(scope, receive, send)
            return
        name, route = match.groups()
        headers = dict(reversed(scope["headers"]))  # the first of repeated headers wins
        if b"origin" in headers or declares_more_than(scope["headers"], self.body_limit):
            await self.app(scope, receive, send)
            return
        messages, within_limit = await read_body(receive, self.body_limit)
        parsed = None
        if within_limit and _media_type(headers.get(b"content-type", b"")) in _JSON_MEDIA_TYPES:
            parsed = parse_query_body(QUERY_ROUTES[route].body_model, body_of(messages))
        if parsed is None:
            await self.app(scope, replay(messages, receive), send)
            return
        authorization = headers.get(b"authorization", b"").decode("latin-1")
        try:
            caller = caller_for(self.runtime, self.rate_limiter, authorization)
            response = await respond(self.pool, route, self.runtime, caller, name, parsed)
        except ServiceError as error:
            response = error_response(error)
        except Exception:
            await _INTERNAL_ERROR(scope, receive, send)
            raise
        await response(scope, receive, send)


def _media_type(content_type: bytes) -> bytes:
    return content_type.partition(b";")[0].strip().lower()


def parse_query_body(model: type[SearchIn], body: bytes) -> SearchIn | None:
    """The body as the model, or None where the framework's route must decide."""
    if any(token in body for token in _NON_JSON_NUMBERS):
        return None
    try:
        return model.model_validate_json(body)
    except ValidationError:
        return None
