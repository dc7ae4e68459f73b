"""A route class whose bodies are parsed as strict JSON.

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


class StrictJsonRoute(APIRoute):
    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()

        async def strict_handler(request: Request) -> Response:
            return await handler(StrictJsonRequest(request.scope, request.receive))

        return strict_handler
