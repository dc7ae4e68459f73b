"""The three query routes, served without the framework's per-request machinery.

Dependency resolution, the body read and parse, validation and the routing layers cost a search
1.2 to 1.7 ms on the 2-core development machine, of the 3 ms the service may add to a query over
HTTP; this layer takes a well-formed query straight to the same use case the route calls, with
the same body model, authentication and rendering, and saved 0.3 to 0.8 ms per search over HTTP
(one client, three runs alternating with the framework's route). Anything it cannot take whole (a
body its parser might read otherwise than the framework's, or that the model refuses) goes on to
the framework's route untouched, so every refusal a caller sees has one source and one wording.
"""

from __future__ import annotations

import re

from pydantic import ValidationError
from starlette.types import ASGIApp, Receive, Scope, Send

from service.api.body import body_of, read_body, replay
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


class QueryFastPath:
    def __init__(
        self, app: ASGIApp, *, runtime: Runtime, pool: QueryPool, rate_limiter: RateLimiter
    ) -> None:
        self.app = app
        self.runtime = runtime
        self.pool = pool
        self.rate_limiter = rate_limiter

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        match = None
        if scope["type"] == "http" and scope["method"] == "POST":
            match = _QUERY_PATH.fullmatch(scope["path"])
        if match is None:
            await self.app(scope, receive, send)
            return
        name, route = match.groups()
        headers = dict(reversed(scope["headers"]))  # the first of repeated headers wins
        messages, _ = await read_body(receive)
        body = body_of(messages)
        parsed = None
        if _media_type(headers.get(b"content-type", b"")) in _JSON_MEDIA_TYPES:
            parsed = parse_query_body(QUERY_ROUTES[route].body_model, body)
        if parsed is None:
            await self.app(scope, replay(messages, receive), send)
            return
        authorization = headers.get(b"authorization", b"").decode("latin-1")
        try:
            caller = caller_for(self.runtime, self.rate_limiter, authorization)
            response = await respond(self.pool, route, self.runtime, caller, name, parsed)
        except ServiceError as error:
            response = error_response(error)
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
