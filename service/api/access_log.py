"""One access-log line per request, written once the response has gone out, and its count.

The server's own access log writes its line before the response's first byte, so every query
waited for it. Written after the response, the line costs the caller nothing, and it can say how
long the request took. It ends with the trace the request saved (``trace -`` when it saved
none), the id its response or error body also carries; the record carries it as ``trace_id``
too.

The same place counts the request for ``/metrics``, by the template of the route it matched
(``/v1/collections/{name}/search``, never the path as sent, so the series stay few), and opens
the request's facts (``service.request_context``) that every log record of it may carry.
"""

from __future__ import annotations

import logging
import time

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.request_context import close_request, open_request
from service.usecases.metrics import ServiceMetrics
from service.usecases.traces import request_trace

ACCESS_LOGGER = logging.getLogger("excerpta.access")
# Status when the application fails before it starts a response: the server then sends a 500.
_FAILED_BEFORE_RESPONDING = 500
# The route label of a request no route matched; its path is not a label, or any caller
# could make series without end.
UNMATCHED_ROUTE = "unmatched"


class AccessLog:
    def __init__(self, app: ASGIApp, metrics: ServiceMetrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        status = _FAILED_BEFORE_RESPONDING

        async def send_noting_status(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        request_facts = open_request()
        with request_trace() as trace:
            try:
                await self.app(scope, receive, send_noting_status)
            finally:
                seconds = time.perf_counter() - started
                route = route_template(scope)
                self.metrics.observe_request(route, scope["method"], status, seconds)
                ACCESS_LOGGER.info(
                    '%s - "%s %s HTTP/%s" %d %.1f ms trace %s',
                    _client(scope),
                    scope["method"],
                    _target(scope),
                    scope["http_version"],
                    status,
                    seconds * 1000,
                    trace.trace_id or "-",
                    extra={
                        "trace_id": trace.trace_id,
                        "route": route,
                        "status": status,
                        "milliseconds": round(seconds * 1000, 3),
                    },
                )
                close_request(request_facts)


def route_template(scope: Scope) -> str:
    """The path template of the route the request matched (the router notes it in the
    scope), or ``UNMATCHED_ROUTE``."""
    route = scope.get("route")
    path = getattr(route, "path", None)
    return path if isinstance(path, str) else UNMATCHED_ROUTE


def _client(scope: Scope) -> str:
    client = scope.get("client")
    return f"{client[0]}:{client[1]}" if client else "-"


def _target(scope: Scope) -> str:
    """The request target as sent, with quotes escaped so the line stays parseable."""
    raw_path = scope.get("raw_path")
    target = raw_path.decode("latin-1") if raw_path else scope["path"]
    if scope.get("query_string"):
        target = f"{target}?{scope['query_string'].decode('latin-1')}"
    return target.replace('"', "%22")
