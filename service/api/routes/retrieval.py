"""Search, context, answer and explain: parse the body, call one use case, render its result.

They run their use case on the query pool (see ``query_pool``), where the result is also
rendered and encoded, so the event loop only receives finished bytes.
"""

from __future__ import annotations

from collections.abc import Callable

from fastapi import APIRouter
from fastapi.responses import Response

from service.api.deps import CallerDep, QueryPoolDep, RuntimeDep
from service.api.errors import ERROR_RESPONSES
from service.api.render import answer_json, context_json, explanation_json, search_json
from service.api.responses import QueryResponse
from service.api.routing import StrictJsonRoute
from service.api.schemas import (
    AnswerIn,
    AnswerOut,
    ContextIn,
    ContextOut,
    ErrorOut,
    ExplainIn,
    ExplainOut,
    SearchIn,
    SearchOut,
)
from service.usecases import answering, explain
from service.usecases.inference import infer_options
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
        infer_filter=infer_options(
            body.infer_filter
            if isinstance(body.infer_filter, str)
            else body.infer_filter.model_dump(exclude_none=True)
        ),
    )


def _json(make_body: Callable[[], dict[str, object]]) -> Callable[[], Response]:
    return lambda: QueryResponse(make_body())


@router.post("/search", response_model=SearchOut)
async def search(
    name: str, body: SearchIn, runtime: RuntimeDep, caller: CallerDep, pool: QueryPoolDep
) -> Response:
    options = _options(body)
    return await pool.run(
        _json(lambda: search_json(answering.search(runtime, caller, name, options)))
    )


@router.post("/context", response_model=ContextOut)
async def context(
    name: str, body: ContextIn, runtime: RuntimeDep, caller: CallerDep, pool: QueryPoolDep
) -> Response:
    options = _options(body)
    return await pool.run(
        _json(
            lambda: context_json(
                answering.build_context(runtime, caller, name, options, body.token_budget)
            )
        )
    )


@router.post(
    "/answer",
    response_model=AnswerOut,
    responses={502: {"model": ErrorOut, "description": "The generator failed"}},
)
async def answer(
    name: str, body: AnswerIn, runtime: RuntimeDep, caller: CallerDep, pool: QueryPoolDep
) -> Response:
    options = _options(body)
    return await pool.run(
        _json(
            lambda: answer_json(
                answering.answer(runtime, caller, name, options, body.token_budget, body.generator)
            )
        )
    )


@router.post(
    "/explain",
    response_model=ExplainOut,
    responses={502: {"model": ErrorOut, "description": "The generator failed"}},
)
async def explain_chunks(
    name: str, body: ExplainIn, runtime: RuntimeDep, caller: CallerDep, pool: QueryPoolDep
) -> Response:
    request = explain.ExplainRequest(
        options=_options(body),
        route=body.route,
        token_budget=body.token_budget,
        generator=body.generator,
        document_id=body.document_id,
        chunk_id=body.chunk_id,
        as_key=body.as_key,
    )
    return await pool.run(
        _json(lambda: explanation_json(explain.explain(runtime, caller, name, request)))
    )
