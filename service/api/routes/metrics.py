"""The Prometheus scrape: no API key, but the metrics key when the settings give one (an empty
setting, as a compose file's unset variable gives, is none)."""

from __future__ import annotations

import hmac

from fastapi import APIRouter, Request, Response
from prometheus_client import CONTENT_TYPE_LATEST

from service.api.deps import RuntimeDep
from service.api.schemas import ErrorOut
from service.errors import Unauthenticated

router = APIRouter(tags=["operators"])


@router.get(
    "/metrics",
    response_class=Response,
    responses={
        200: {
            "content": {"text/plain": {"schema": {"type": "string"}}},
            "description": "The Prometheus text format",
        },
        401: {"model": ErrorOut, "description": "The metrics key is required and was not sent"},
    },
)
def metrics(request: Request, runtime: RuntimeDep) -> Response:
    key = runtime.settings.metrics_key
    expected = "" if key is None else key.get_secret_value()
    if expected:
        scheme, _, presented = request.headers.get("authorization", "").partition(" ")
        if scheme.lower() != "bearer" or not hmac.compare_digest(
            presented.strip().encode(), expected.encode()
        ):
            raise Unauthenticated("The metrics key is required in the Authorization header.")
    return Response(runtime.metrics.exposition(), media_type=CONTENT_TYPE_LATEST)
