"""The one mapping from service errors (and the framework's own failures) to HTTP responses."""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from service import errors
from service.api.render import context_json
from service.api.schemas import ErrorOut
from service.usecases.answering import ContextResult
from service.usecases.traces import current_trace_id

STATUS_BY_ERROR: tuple[tuple[type[errors.ServiceError], int], ...] = (
    (errors.MalformedJson, 400),
    (errors.InvalidFilter, 400),
    (errors.Unauthenticated, 401),
    (errors.Forbidden, 403),
    (errors.NotFound, 404),
    (errors.Conflict, 409),
    (errors.PayloadTooLarge, 413),
    (errors.UnsupportedMediaType, 415),
    (errors.InvalidRequest, 422),
    (errors.InvalidDocuments, 422),
    (errors.LimitExceeded, 422),
    (errors.RateLimited, 429),
    (errors.GeneratorUnavailable, 502),
    (errors.Busy, 503),
    (errors.StorageUnavailable, 503),
)


def status_for(error: errors.ServiceError) -> int:
    for cls, status in STATUS_BY_ERROR:
        if isinstance(error, cls):
            return status
    raise TypeError(f"no status for {type(error).__name__}")


def error_response(error: errors.ServiceError) -> JSONResponse:
    """The error's body, with the ``trace_id`` of the trace the request saved, if it saved one."""
    headers = {}
    body = error.body()
    trace_id = current_trace_id()
    if trace_id is not None:
        body["error"]["trace_id"] = trace_id
    if isinstance(error, errors.RateLimited | errors.Busy):
        headers["Retry-After"] = str(error.retry_after)
    if isinstance(error, errors.GeneratorUnavailable):
        context = error.context
        body["error"]["context"] = (
            context_json(context) if isinstance(context, ContextResult) else None
        )
    return JSONResponse(body, status_code=status_for(error), headers=headers)


# Where the framework found a bad value; the rest of a location is the field's path.
_LOCATIONS = ("body", "query", "path", "header", "cookie")


def _field_path(location: tuple[Any, ...]) -> str:
    parts = [str(p) for p in location]
    if parts and parts[0] in _LOCATIONS:
        parts = parts[1:]
    return ".".join(parts) or "body"


def _validation_error(exc: RequestValidationError) -> errors.ServiceError:
    problems = exc.errors()
    for problem in problems:
        if problem.get("type") == "json_invalid":
            return errors.MalformedJson("The request body is not valid JSON.")
        # An empty body reaches validation as a missing one; it is not JSON either.
        if problem.get("type") == "missing" and tuple(problem.get("loc", ())) == ("body",):
            return errors.MalformedJson("The request body is empty; it must be a JSON object.")
    first = problems[0] if problems else {"loc": ("body",), "msg": "invalid request"}
    field = _field_path(tuple(first.get("loc", ("body",))))
    message = str(first.get("msg", "invalid value")).rstrip(".")
    return errors.InvalidRequest(f"Field {field!r} is invalid: {message}.", field=field)


# Every route lists these so the OpenAPI document declares the error shape it can return.
ERROR_RESPONSES: dict[int | str, dict[str, Any]] = {
    status: {"model": ErrorOut, "description": description}
    for status, description in (
        (400, "Malformed JSON or a bad filter"),
        (401, "No, unknown or revoked key"),
        (403, "The key's role does not allow the route"),
        (404, "Missing or hidden"),
        (409, "Conflict"),
        (413, "Body too large"),
        (415, "The body is not sent as application/json"),
        (422, "Invalid request, documents or a limit exceeded"),
        (429, "Rate limited"),
        (503, "Busy with other writes, or the store is unavailable"),
    )
}


def install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(errors.ServiceError)
    async def _service_error(_: Request, exc: errors.ServiceError) -> JSONResponse:
        return error_response(exc)

    @app.exception_handler(RequestValidationError)
    async def _request_invalid(_: Request, exc: RequestValidationError) -> JSONResponse:
        return error_response(_validation_error(exc))

    @app.exception_handler(StarletteHTTPException)
    async def _http_error(_: Request, exc: StarletteHTTPException) -> JSONResponse:
        if exc.status_code == 404:
            body = {"error": {"code": "route_not_found", "message": "No such route."}}
        elif exc.status_code == 405:
            body = {"error": {"code": "method_not_allowed", "message": "Method not allowed."}}
        else:
            body = {"error": {"code": "http_error", "message": str(exc.detail)}}
        return JSONResponse(body, status_code=exc.status_code)
