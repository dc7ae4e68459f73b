"""Liveness and readiness; no key needed."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import JSONResponse
from sqlalchemy import text

from service.api.deps import RuntimeDep
from service.api.schemas import HealthOut

router = APIRouter(tags=["health"])


@router.get("/healthz", response_model=HealthOut)
def healthz() -> HealthOut:
    return HealthOut(status="ok")


@router.get("/readyz", response_model=HealthOut, responses={503: {"model": HealthOut}})
def readyz(runtime: RuntimeDep) -> HealthOut | JSONResponse:
    try:
        with runtime.engine.connect() as connection:
            connection.execute(text("SELECT 1"))
    except Exception:
        return JSONResponse({"status": "database unreachable"}, status_code=503)
    if runtime.embedder.dimensions <= 0:
        return JSONResponse({"status": "embedder not loaded"}, status_code=503)
    return HealthOut(status="ready")
