"""Documents: batch upsert, read, list and delete (one by id, or many by filter)."""

from __future__ import annotations

import json
from typing import Any

from fastapi import APIRouter, Query, Response
from fastapi.responses import JSONResponse

from service.api.deps import CallerDep, RuntimeDep
from service.api.errors import ERROR_RESPONSES
from service.api.routing import StrictJsonRoute
from service.api.schemas import (
    DeletedOut,
    DocumentBatchIn,
    DocumentBatchOut,
    DocumentListOut,
    DocumentOut,
    JobAcceptedOut,
)
from service.errors import InvalidRequest
from service.usecases import documents as usecase
from service.usecases import jobs
from service.usecases.jobs import document_result

router = APIRouter(
    prefix="/v1/collections/{name}/documents",
    tags=["documents"],
    responses=ERROR_RESPONSES,
    route_class=StrictJsonRoute,
)


def _filter_param(value: str | None) -> str | dict[str, Any] | None:
    """A query-string filter is cql2-text, or cql2-json when it is a JSON object."""
    if value is None:
        return None
    stripped = value.strip()
    if stripped.startswith("{"):
        try:
            parsed = json.loads(stripped)
        except ValueError:
            raise InvalidRequest("The filter is not valid cql2-json.", field="filter") from None
        if isinstance(parsed, dict):
            return parsed
    return value


@router.post(
    "",
    response_model=DocumentBatchOut,
    responses={202: {"model": JobAcceptedOut, "description": "The job, sent with wait: false"}},
)
def upsert_documents(
    name: str, body: DocumentBatchIn, runtime: RuntimeDep, caller: CallerDep
) -> Any:
    job = jobs.submit_upsert(runtime, caller, name, body.documents)
    if not body.wait:
        return JSONResponse({"job_id": job.id, "status": job.state}, status_code=202)
    done = jobs.wait_for_job(runtime, caller, job.id)
    return {"results": [document_result(result) for result in done.results]}


@router.get("", response_model=DocumentListOut)
def list_documents(
    name: str,
    runtime: RuntimeDep,
    caller: CallerDep,
    filter: str | None = Query(None, max_length=16_384),
    after: str | None = Query(None, max_length=128),
    limit: int = Query(100, ge=1, le=1000),
) -> dict[str, object]:
    return usecase.list_documents(
        runtime, caller, name, filter_value=_filter_param(filter), after=after, limit=limit
    )


@router.delete(
    "",
    response_model=DeletedOut,
    responses={202: {"model": JobAcceptedOut, "description": "The job, sent with wait=false"}},
)
def delete_by_filter(
    name: str,
    runtime: RuntimeDep,
    caller: CallerDep,
    filter: str | None = Query(None, max_length=16_384),
    wait: bool = Query(True, description="false: answer 202 with the job's id at once"),
) -> Any:
    job = jobs.submit_delete(runtime, caller, name, _filter_param(filter))
    if not wait:
        return JSONResponse({"job_id": job.id, "status": job.state}, status_code=202)
    done = jobs.wait_for_job(runtime, caller, job.id)
    return {"deleted": done.counts.documents_done}


@router.get("/{document_id}", response_model=DocumentOut)
def get_document(
    name: str, document_id: str, runtime: RuntimeDep, caller: CallerDep
) -> dict[str, object]:
    return usecase.get_document(runtime, caller, name, document_id)


@router.delete("/{document_id}", status_code=204, response_class=Response)
def delete_document(
    name: str, document_id: str, runtime: RuntimeDep, caller: CallerDep
) -> Response:
    usecase.delete_document(runtime, caller, name, document_id)
    return Response(status_code=204)
