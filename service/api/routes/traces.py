"""Traces: readable by the key that made the request, or an admin."""

from __future__ import annotations

from fastapi import APIRouter

from service.api.deps import CallerDep, RuntimeDep
from service.api.errors import ERROR_RESPONSES
from service.api.schemas import TraceOut
from service.usecases import traces as usecase

router = APIRouter(prefix="/v1/traces", tags=["traces"], responses=ERROR_RESPONSES)


@router.get("/{trace_id}", response_model=TraceOut)
def get_trace(trace_id: str, runtime: RuntimeDep, caller: CallerDep) -> dict[str, object]:
    return usecase.get_trace(runtime, caller, trace_id)
