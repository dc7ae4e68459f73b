"""Dependencies the routes receive by injection, so tests can swap them."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request

from service.api.query_pool import QueryPool
from service.errors import Unauthenticated
from service.request_context import note_key
from service.usecases.callers import LOCAL_ADMIN, Caller
from service.usecases.keys import authenticate
from service.usecases.ratelimit import RateLimiter
from service.usecases.runtime import Runtime


async def get_runtime(request: Request) -> Runtime:
    # Async because it never blocks: FastAPI would otherwise hop to a worker thread for it.
    runtime: Runtime = request.app.state.runtime
    return runtime


RuntimeDep = Annotated[Runtime, Depends(get_runtime)]


async def get_query_pool(request: Request) -> QueryPool:
    pool: QueryPool = request.app.state.query_pool
    return pool


QueryPoolDep = Annotated[QueryPool, Depends(get_query_pool)]


async def get_caller(request: Request, runtime: RuntimeDep) -> Caller:
    """The caller the ``Authorization`` header names, charged one request against its rate.

    Async so the lookup (one indexed row, well under a millisecond) runs on the event loop
    instead of paying a hop to a worker thread on every request.
    """
    if runtime.settings.auth == "disabled":
        note_key(LOCAL_ADMIN.name)
        return LOCAL_ADMIN
    scheme, _, presented = request.headers.get("authorization", "").partition(" ")
    if scheme.lower() != "bearer":
        raise Unauthenticated("A valid API key is required in the Authorization header.")
    caller = authenticate(runtime.key_reader, presented.strip())
    note_key(caller.name)
    rate_limiter: RateLimiter = request.app.state.rate_limiter
    rate_limiter.check(caller)
    return caller


CallerDep = Annotated[Caller, Depends(get_caller)]
