"""The application factory: one router per resource, one error mapping, thin middleware."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI
from fastapi.middleware.cors import CORSMiddleware
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.api.errors import error_response, install_error_handlers
from service.api.query_pool import QueryPool
from service.api.routes import collections, documents, health, retrieval, traces
from service.errors import PayloadTooLarge
from service.usecases.ratelimit import RateLimiter
from service.usecases.runtime import Runtime


class BodySizeLimit:
    """Refuses bodies over the limit with 413, whether or not Content-Length is declared."""

    def __init__(self, app: ASGIApp, limit: int) -> None:
        self.app = app
        self.limit = limit

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        too_large = PayloadTooLarge(f"The request body may hold at most {self.limit} bytes.")
        for name, value in scope.get("headers", []):
            if name == b"content-length" and value.isdigit() and int(value) > self.limit:
                await error_response(too_large)(scope, receive, send)
                return
        received = 0
        chunks: list[Message] = []
        while True:
            message = await receive()
            chunks.append(message)
            if message["type"] != "http.request":
                break
            received += len(message.get("body", b""))
            if received > self.limit:
                await error_response(too_large)(scope, receive, send)
                return
            if not message.get("more_body", False):
                break

        async def replay() -> Message:
            return chunks.pop(0) if chunks else await receive()

        await self.app(scope, replay, send)


def create_app(runtime: Runtime) -> FastAPI:
    settings = runtime.settings

    query_pool = QueryPool()

    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        runtime.indexes.start_background()
        runtime.rebuilds.resume()
        yield
        query_pool.close()
        runtime.close()

    docs: dict[str, Any] = {} if settings.docs_enabled else {"docs_url": None, "redoc_url": None}
    app = FastAPI(
        title="excerpta",
        version="0.1.0",
        description="Retrieval with filters, access control, cited context and traces.",
        lifespan=lifespan,
        **docs,
    )
    app.state.runtime = runtime
    app.state.query_pool = query_pool
    app.state.rate_limiter = RateLimiter(settings.rate_limit_per_second, settings.rate_limit_burst)
    install_error_handlers(app)
    # The retrieval routes come first: they are the busiest, and routes are matched in order.
    for module in (retrieval, health, collections, documents, traces):
        app.include_router(module.router)
    if settings.cors_origins:
        app.add_middleware(
            CORSMiddleware,
            allow_origins=settings.cors_origins,
            allow_methods=["GET", "POST", "PUT", "DELETE"],
            allow_headers=["Authorization", "Content-Type"],
        )
    app.add_middleware(BodySizeLimit, limit=settings.max_body_bytes)
    return app
