"""Search, context and answer: parse the body, call one use case, return its result.

These are the hot routes. They run their use case on the query pool (see ``query_pool``), and
their use cases already build JSON-ready bodies in the declared shapes (the schema tests hold
them to ``SearchOut``, ``ContextOut`` and ``AnswerOut``), so they are sent as they are instead
of being validated and re-serialised a second time.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from fastapi import APIRouter
from fastapi.responses import JSONResponse

from service.api.deps import CallerDep, QueryPoolDep, RuntimeDep
from service.api.errors import ERROR_RESPONSES
from service.api.query_pool import QueryPool
from service.api.responses import QueryResponse
from service.api.routing import StrictJsonRoute
from service.api.schemas import (
    AnswerIn,
    AnswerOut,
    ContextIn,
    ContextOut,
    ErrorOut,
    SearchIn,
    SearchOut,
)
from service.usecases import answering
from service.usecases.callers import Caller
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions, TimeWindow

router = APIRouter(
    prefix="/v1/collections/{name}",
    tags=["retrieval"],
    responses=ERROR_RESPONSES,
    route_class=StrictJsonRoute,
)


def _options(body: SearchIn) -> SearchOptions:
    window = body.time_window
    return SearchOptions(
        query=body.query,
        filter=body.filter,
        time_window=(
            None
            if window is None
            else TimeWindow(attribute=window.attribute, last=window.last, now=window.now)
        ),
        top_k=body.top_k,
        mode=body.mode,
        rrf_k=body.rrf_k,
        depth=body.depth,
        query_vector=body.query_vector,
    )


def _search(runtime: Runtime, caller: Caller, name: str, body: SearchIn) -> dict[str, Any]:
    return answering.search(runtime, caller, name, _options(body))


def _context(runtime: Runtime, caller: Caller, name: str, body: ContextIn) -> dict[str, Any]:
    return answering.build_context(runtime, caller, name, _options(body), body.token_budget)


def _answer(runtime: Runtime, caller: Caller, name: str, body: AnswerIn) -> dict[str, Any]:
    return answering.answer(
        runtime, caller, name, _options(body), body.token_budget, body.generator
    )


@dataclass(frozen=True)
class QueryRoute:
    """What one query route takes and which use case makes its body; shared with the fast path."""

    body_model: type[SearchIn]
    make_body: Callable[[Runtime, Caller, str, Any], dict[str, Any]]


QUERY_ROUTES: dict[str, QueryRoute] = {
    "search": QueryRoute(SearchIn, _search),
    "context": QueryRoute(ContextIn, _context),
    "answer": QueryRoute(AnswerIn, _answer),
}


async def respond(
    pool: QueryPool, route: str, runtime: Runtime, caller: Caller, name: str, body: SearchIn
) -> JSONResponse:
    """Build the body and render it on the query pool, off the event loop."""
    make_body = QUERY_ROUTES[route].make_body
    return await pool.run(lambda: QueryResponse(make_body(runtime, caller, name, body)))


@router.post("/search", response_model=SearchOut)
async def search(
    name: str, body: SearchIn, runtime: RuntimeDep, caller: CallerDep, pool: QueryPoolDep
) -> JSONResponse:
    return await respond(pool, "search", runtime, caller, name, body)


@router.post("/context", response_model=ContextOut)
async def context(
    name: str, body: ContextIn, runtime: RuntimeDep, caller: CallerDep, pool: QueryPoolDep
) -> JSONResponse:
    return await respond(pool, "context", runtime, caller, name, body)


@router.post(
    "/answer",
    response_model=AnswerOut,
    responses={502: {"model": ErrorOut, "description": "The generator failed"}},
)
async def answer(
    name: str, body: AnswerIn, runtime: RuntimeDep, caller: CallerDep, pool: QueryPoolDep
) -> JSONResponse:
    return await respond(pool, "answer", runtime, caller, name, body)
