"""Liveness and readiness; no key needed."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import JSONResponse

from service.api.deps import RuntimeDep
from service.api.schemas import HealthOut
from service.usecases.health import readiness

router = APIRouter(tags=["health"])


@router.get("/healthz", response_model=HealthOut)
def healthz() -> HealthOut:
    return HealthOut(status="ok")


@router.get(
    "/readyz",
    response_model=HealthOut,
    response_model_exclude_none=True,
    responses={503: {"model": HealthOut}},
)
def readyz(runtime: RuntimeDep) -> HealthOut | JSONResponse:
    reason = readiness(runtime)
    if reason is not None:
        body = HealthOut(status="unavailable", reason=reason)
        return JSONResponse(body.model_dump(exclude_none=True), status_code=503)
    return HealthOut(status="ready")
