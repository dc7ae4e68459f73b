"""Traces: readable and listed for the key that made the request, or an admin."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query

from service.api.deps import CallerDep, RuntimeDep
from service.api.errors import ERROR_RESPONSES
from service.api.render import trace_page_json
from service.api.schemas import TraceListOut, TraceOut
from service.usecases import traces as usecase

router = APIRouter(prefix="/v1/traces", tags=["traces"], responses=ERROR_RESPONSES)


@router.get("", response_model=TraceListOut)
def list_traces(
    runtime: RuntimeDep,
    caller: CallerDep,
    collection: Annotated[str | None, Query(description="Only this collection's")] = None,
    since: Annotated[str | None, Query(description="ISO 8601 with an offset, inclusive")] = None,
    until: Annotated[str | None, Query(description="ISO 8601 with an offset, exclusive")] = None,
    route: Annotated[str | None, Query(description="search, context or answer")] = None,
    limit: Annotated[int, Query(description="At most this many, newest first")] = (
        usecase.DEFAULT_LIST_LIMIT
    ),
    cursor: Annotated[str | None, Query(description="next_cursor of the page before")] = None,
) -> dict[str, object]:
    listing = usecase.TraceListing(
        collection=collection, since=since, until=until, route=route, limit=limit, cursor=cursor
    )
    return trace_page_json(usecase.list_traces(runtime, caller, listing))


@router.get("/{trace_id}", response_model=TraceOut)
def get_trace(trace_id: str, runtime: RuntimeDep, caller: CallerDep) -> dict[str, object]:
    return usecase.get_trace(runtime, caller, trace_id)
