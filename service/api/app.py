"""The application factory: one router per resource, one error mapping, thin middleware."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from importlib.metadata import version

from fastapi import FastAPI
from fastapi.middleware.cors import CORSMiddleware

from service.api.access_log import AccessLog
from service.api.body import BodySizeLimit
from service.api.errors import install_error_handlers
from service.api.query_pool import QueryPool
from service.api.routes import (
    backups,
    collections,
    documents,
    health,
    jobs,
    metrics,
    retrieval,
    traces,
)
from service.api.routes.console import mount_console
from service.logging_setup import register_secret
from service.usecases.ratelimit import RateLimiter
from service.usecases.runtime import Runtime


def create_app(runtime: Runtime) -> FastAPI:
    settings = runtime.settings

    query_pool = QueryPool()
    if settings.metrics_key is not None:
        register_secret(settings.metrics_key.get_secret_value())

    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        runtime.indexes.start_background()
        if runtime.jobs.runs_here:
            # Else the workers take unfinished re-chunking jobs up from the store.
            runtime.rebuilds.resume()
        runtime.jobs.start()
        yield
        query_pool.close()
        runtime.close()

    app = FastAPI(
        title="excerpta",
        version=version("excerpta"),
        description="Retrieval with filters, access control, cited context and traces.",
        lifespan=lifespan,
        # The interactive docs pages load their scripts from a public CDN, so they would be
        # blank on an offline server and would widen the content policy; /openapi.json stays.
        docs_url=None,
        redoc_url=None,
    )
    app.state.runtime = runtime
    app.state.query_pool = query_pool
    app.state.rate_limiter = RateLimiter(settings.rate_limit_per_second, settings.rate_limit_burst)
    install_error_handlers(app)
    # The retrieval routes come first: they are the busiest, and routes are matched in order.
    for module in (retrieval, health, collections, documents, jobs, traces, backups, metrics):
        app.include_router(module.router)
    mount_console(app)
    # Each added middleware wraps the ones before it. The access log is outermost, so it sees
    # every response; CORS wraps the body limit, so a browser can read even a 413.
    app.add_middleware(BodySizeLimit, limit=settings.max_body_bytes)
    if settings.cors_origins:
        app.add_middleware(
            CORSMiddleware,
            allow_origins=settings.cors_origins,
            allow_methods=["GET", "POST", "PUT", "DELETE"],
            allow_headers=["Authorization", "Content-Type"],
        )
    app.add_middleware(AccessLog, metrics=runtime.metrics)
    return app
