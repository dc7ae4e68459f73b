"""JSON encoding for the two places every query pays for it: its response and its trace.

The standard library's encoder formats each float with ``repr``, which dominates bodies full of
scores; orjson encodes them several times faster and prints the same shortest round-trip digits.
Dictionary keys that are not strings become strings, as the standard library makes them, so
both encoders give the same JSON value for everything the service encodes (a property test holds
them to that). orjson refuses integers beyond 64 bits, which a caller's JSON may hold and a trace
records; those values take the standard library's encoder, which writes them exactly.
"""

from __future__ import annotations

import json
from typing import Any

import orjson

_OPTIONS = orjson.OPT_NON_STR_KEYS


def json_bytes(value: Any) -> bytes:
    """Compact UTF-8 JSON, non-ASCII characters unescaped."""
    try:
        return orjson.dumps(value, option=_OPTIONS)
    except orjson.JSONEncodeError:
        return json.dumps(value, ensure_ascii=False, separators=(",", ":")).encode("utf-8")


def json_text(value: Any) -> str:
    return json_bytes(value).decode("utf-8")
