"""A route class whose bodies are JSON, sent as JSON and parsed strictly.

A route that takes a body refuses one declared as any other media type (``Content-Type``
other than ``application/json``, parameters such as ``charset`` aside) with 415, before reading
it: a form-encoded or text body would otherwise reach validation and be refused field by field,
which tells the caller nothing about the real mistake. A body sent without a ``Content-Type``
(or with an empty one) is read as JSON, since nothing says it is anything else; it must then be
JSON.

Python's parser accepts ``NaN`` and ``Infinity``, which are not JSON, and fails with a
``RecursionError`` or ``UnicodeDecodeError`` on deep nesting or bad UTF-8, which the framework
reports as an untyped 400. Raising ``JSONDecodeError`` for all of them lets every such body get
the contract's ``malformed_json``.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Coroutine
from typing import Any

from fastapi import Request, Response
from fastapi.routing import APIRoute

from service.errors import UnsupportedMediaType

JSON_MEDIA_TYPE = "application/json"


def _reject_constant(name: str) -> Any:
    raise json.JSONDecodeError(f"{name} is not a JSON value", name, 0)


def strict_json(body: bytes) -> Any:
    """The body's JSON value; any body that is not strict JSON raises ``JSONDecodeError``."""
    try:
        text = body.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise json.JSONDecodeError("the body is not UTF-8", "", exc.start) from None
    try:
        return json.loads(text, parse_constant=_reject_constant)
    except RecursionError:
        raise json.JSONDecodeError("the body nests too deeply", "", 0) from None


class StrictJsonRequest(Request):
    async def json(self) -> Any:
        if not hasattr(self, "_json"):
            self._json = strict_json(await self.body())
        return self._json


def check_json_media_type(content_type: str | None) -> None:
    """Refuse a body declared as anything but JSON; no declaration (or an empty one) is taken
    as JSON."""
    media_type = (content_type or "").partition(";")[0].strip().lower()
    if media_type and media_type != JSON_MEDIA_TYPE:
        raise UnsupportedMediaType(
            f"The request body must be JSON sent with Content-Type: {JSON_MEDIA_TYPE}, "
            f"not {media_type}."
        )


class StrictJsonRoute(APIRoute):
    def __init__(self, path: str, endpoint: Callable[..., Any], **options: Any) -> None:
        # Without a Content-Type the framework would not read the body as JSON at all.
        super().__init__(path, endpoint, **{**options, "strict_content_type": False})

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()
        takes_body = self.body_field is not None

        async def strict_handler(request: Request) -> Response:
            if takes_body:
                check_json_media_type(request.headers.get("content-type"))
            return await handler(StrictJsonRequest(request.scope, request.receive))

        return strict_handler
