"""Jobs: document writes followed, listed and cancelled by the key that sent them, or an admin."""

from __future__ import annotations

from fastapi import APIRouter, Query

from service.api.deps import CallerDep, RuntimeDep
from service.api.errors import ERROR_RESPONSES
from service.api.render import job_json
from service.api.schemas import JobListOut, JobOut
from service.usecases import jobs as usecase

router = APIRouter(prefix="/v1/jobs", tags=["jobs"], responses=ERROR_RESPONSES)


@router.get("", response_model=JobListOut)
def list_jobs(
    runtime: RuntimeDep,
    caller: CallerDep,
    collection: str | None = Query(None, max_length=63),
    state: str | None = Query(None, max_length=16),
    limit: int = Query(100, ge=1, le=usecase.MAX_LISTED),
) -> dict[str, object]:
    found = usecase.list_jobs(runtime, caller, collection=collection, state=state, limit=limit)
    return {"jobs": [job_json(job) for job in found]}


@router.get("/{job_id}", response_model=JobOut)
def get_job(job_id: str, runtime: RuntimeDep, caller: CallerDep) -> dict[str, object]:
    return job_json(usecase.get_job(runtime, caller, job_id))


@router.delete("/{job_id}", response_model=JobOut)
def cancel_job(job_id: str, runtime: RuntimeDep, caller: CallerDep) -> dict[str, object]:
    return job_json(usecase.cancel_job(runtime, caller, job_id))
