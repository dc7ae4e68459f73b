"""The query routes' response: the framework's JSON response, encoded by ``json_text``."""

from __future__ import annotations

from typing import Any

from fastapi.responses import JSONResponse

from service.json_text import json_bytes


class QueryResponse(JSONResponse):
    def render(self, content: Any) -> bytes:
        return json_bytes(content)
