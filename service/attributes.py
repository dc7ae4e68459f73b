"""Typed document attributes: the types a collection schema may declare and their values.

Values are checked and normalised once, at ingest, into the Python forms every other layer
relies on (``str``, ``list[str]``, ``int``, ``float``, ``bool``, ``datetime.date``, and
UTC-aware ``datetime.datetime``). The filter engines compare dates as days and datetimes as
microseconds since the Unix epoch, and strings by code point after optional case folding or
accent stripping; the helpers for those encodings live here so ingest, the store and the
in-memory index agree.
"""

from __future__ import annotations

import datetime as dt
import math
import re
import unicodedata
from enum import StrEnum
from typing import Any

MAX_SAFE_INTEGER = 2**53 - 1
ATTRIBUTE_NAME = re.compile(r"[a-z][a-z0-9_]{0,62}")
EPOCH_DATE = dt.date(1970, 1, 1)
EPOCH_DATETIME = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)


class AttributeType(StrEnum):
    KEYWORD = "keyword"
    KEYWORD_LIST = "keyword[]"
    INTEGER = "integer"
    NUMBER = "number"
    BOOLEAN = "boolean"
    DATE = "date"
    DATETIME = "datetime"


AttributeValue = str | list[str] | int | float | bool | dt.date | dt.datetime
Schema = dict[str, AttributeType]


class AttributeValueError(ValueError):
    """A value that does not fit its declared type; the message is one plain sentence."""


def parse_schema(raw: dict[str, Any]) -> Schema:
    """Read ``{"name": {"type": "..."}}`` into a schema, raising ``AttributeValueError``."""
    schema: Schema = {}
    for name, spec in raw.items():
        if not isinstance(name, str) or not ATTRIBUTE_NAME.fullmatch(name):
            raise AttributeValueError(f"attribute name {name!r} must match [a-z][a-z0-9_]{{0,62}}")
        type_name = spec.get("type") if isinstance(spec, dict) else None
        try:
            schema[name] = AttributeType(str(type_name))
        except ValueError:
            allowed = ", ".join(t.value for t in AttributeType)
            raise AttributeValueError(
                f"attribute {name!r} has type {type_name!r}; allowed types are {allowed}"
            ) from None
    return schema


def normalize_value(name: str, type_: AttributeType, value: Any) -> AttributeValue:
    """Check ``value`` against ``type_`` and return its normalised form."""
    if type_ is AttributeType.KEYWORD:
        if not isinstance(value, str):
            raise AttributeValueError(f"attribute {name!r} must be a string")
        return _check_text(name, value)
    if type_ is AttributeType.KEYWORD_LIST:
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise AttributeValueError(f"attribute {name!r} must be a list of strings")
        return [_check_text(name, v) for v in value]
    if type_ is AttributeType.INTEGER:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise AttributeValueError(f"attribute {name!r} must be an integer")
        if isinstance(value, float):
            if not value.is_integer():
                raise AttributeValueError(f"attribute {name!r} must be an integer")
            value = int(value)
        if abs(value) > MAX_SAFE_INTEGER:
            raise AttributeValueError(f"attribute {name!r} is beyond 2^53 - 1 in magnitude")
        return value
    if type_ is AttributeType.NUMBER:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise AttributeValueError(f"attribute {name!r} must be a number")
        try:
            number = float(value)
        except OverflowError:
            number = math.inf
        if not math.isfinite(number):
            raise AttributeValueError(f"attribute {name!r} must be a finite number")
        return number
    if type_ is AttributeType.BOOLEAN:
        if not isinstance(value, bool):
            raise AttributeValueError(f"attribute {name!r} must be true or false")
        return value
    if type_ is AttributeType.DATE:
        return parse_date(name, value)
    return parse_datetime(name, value)


def _check_text(name: str, value: str) -> str:
    if "\x00" in value:
        raise AttributeValueError(f"attribute {name!r} must not contain NUL characters")
    if len(value) > 1024:
        raise AttributeValueError(f"attribute {name!r} is longer than 1024 characters")
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        raise AttributeValueError(f"attribute {name!r} is not valid Unicode text") from None
    return value


_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")


def parse_date(name: str, value: Any) -> dt.date:
    if isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        return value
    if not isinstance(value, str) or not _DATE.fullmatch(value):
        raise AttributeValueError(f"attribute {name!r} must be a date written YYYY-MM-DD")
    try:
        return dt.date.fromisoformat(value)
    except ValueError:
        raise AttributeValueError(f"attribute {name!r} is not a valid calendar date") from None


_DATETIME = re.compile(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(:\d{2}(\.\d{1,6})?)?(Z|[+-]\d{2}:\d{2})")


def parse_datetime(name: str, value: Any) -> dt.datetime:
    if isinstance(value, dt.datetime):
        if value.tzinfo is None:
            raise AttributeValueError(f"attribute {name!r} needs a UTC offset, such as Z")
        return value.astimezone(dt.UTC)
    if not isinstance(value, str):
        raise AttributeValueError(f"attribute {name!r} must be an ISO 8601 datetime string")
    if not _DATETIME.fullmatch(value):
        if re.fullmatch(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(:\d{2}(\.\d+)?)?", value):
            raise AttributeValueError(
                f"attribute {name!r} needs a UTC offset, such as 2024-05-01T09:30:00Z"
            )
        raise AttributeValueError(
            f"attribute {name!r} must be an ISO 8601 datetime such as 2024-05-01T09:30:00Z"
        )
    try:
        parsed = dt.datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError:
        raise AttributeValueError(f"attribute {name!r} is not a valid datetime") from None
    try:
        return parsed.astimezone(dt.UTC)
    except OverflowError:
        raise AttributeValueError(f"attribute {name!r} is out of range in UTC") from None


def to_json_value(value: AttributeValue) -> Any:
    """The JSON form the API returns: dates as YYYY-MM-DD, datetimes in UTC with ``Z``."""
    if isinstance(value, dt.datetime):
        return value.astimezone(dt.UTC).isoformat().replace("+00:00", "Z")
    if isinstance(value, dt.date):
        return value.isoformat()
    return value


def epoch_days(value: dt.date) -> int:
    return (value - EPOCH_DATE).days


def epoch_micros(value: dt.datetime) -> int:
    delta = value.astimezone(dt.UTC) - EPOCH_DATETIME
    return (delta.days * 86_400 + delta.seconds) * 1_000_000 + delta.microseconds


def fold_case(text: str) -> str:
    """Full Unicode case folding (``'Straße'`` folds to ``'strasse'``), as CASEI requires."""
    return text.casefold()


def strip_accents(text: str) -> str:
    """NFD decomposition with combining marks removed, as ACCENTI requires."""
    decomposed = unicodedata.normalize("NFD", text)
    return "".join(ch for ch in decomposed if not unicodedata.combining(ch))
