"""Logging that never writes a key or secret: a filter scrubs every record on every handler.

Records are plain text lines, or with ``log_format="json"`` one JSON object per line whose
fields a log collector can index without parsing the message.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import re
from typing import Any, Literal

from service.request_context import current_request

_SECRETS = (
    re.compile(r"xk_[0-9a-f]{16}_[A-Za-z0-9_-]{43}"),
    re.compile(r"(?i)(authorization['\"]?\s*[:=]\s*['\"]?)(bearer\s+)?[^\s'\",]+"),
    re.compile(r"(?i)(bearer\s+)[^\s'\",]+"),
)
_extra_secrets: set[str] = set()
# A logger's own filters do not apply to its children's records, so each is named.
_REQUEST_LOGGERS = (
    "uvicorn",
    "uvicorn.access",
    "uvicorn.error",
    "httpx",
    "httpcore",
    "excerpta",
    "excerpta.access",
)


def register_secret(value: str) -> None:
    """Scrub this exact value too (a generator's key from settings)."""
    if value:
        _extra_secrets.add(value)


def redact(text: str) -> str:
    for secret in _extra_secrets:
        text = text.replace(secret, "[redacted]")
    folded = text.lower()
    # Every pattern needs one of these words, so most lines (the access log) skip the regexes.
    if "xk_" not in folded and "bearer" not in folded and "authorization" not in folded:
        return text
    text = _SECRETS[0].sub("[redacted]", text)
    text = _SECRETS[1].sub(lambda m: f"{m.group(1)}[redacted]", text)
    return _SECRETS[2].sub(lambda m: f"{m.group(1)}[redacted]", text)


class RedactingFilter(logging.Filter):
    _traceback_formatter = logging.Formatter()

    def filter(self, record: logging.LogRecord) -> bool:
        message = record.getMessage()
        cleaned = redact(message)
        if cleaned != message:
            record.msg = cleaned
            record.args = None
        # An exception's message can quote a header too; handlers reuse a set exc_text as is.
        if record.exc_info and not record.exc_text:
            record.exc_text = self._traceback_formatter.formatException(record.exc_info)
        if record.exc_text:
            record.exc_text = redact(record.exc_text)
        if record.stack_info:
            record.stack_info = redact(record.stack_info)
        return True


def install_redaction() -> None:
    """Attach the filter to the root handlers and the loggers that see requests."""
    redacting = RedactingFilter()
    root = logging.getLogger()
    for handler in root.handlers:
        handler.addFilter(redacting)
    for name in _REQUEST_LOGGERS:
        logger = logging.getLogger(name)
        if not any(isinstance(f, RedactingFilter) for f in logger.filters):
            logger.addFilter(redacting)


class JsonLineFormatter(logging.Formatter):
    """One JSON object per record: time (ISO 8601, UTC), level, logger, message, the trace and
    key name of the request being served (a record's own ``trace_id`` first), and for an access
    line its route template, status and milliseconds; fields that do not apply are null. Every
    text field is redacted here too, whatever filters the record met on its way."""

    def format(self, record: logging.LogRecord) -> str:
        facts = current_request()
        trace_id = getattr(record, "trace_id", None)
        if trace_id is None and facts is not None:
            trace_id = facts.trace_id
        line: dict[str, Any] = {
            "time": dt.datetime.fromtimestamp(record.created, dt.UTC).isoformat(
                timespec="milliseconds"
            ),
            "level": record.levelname,
            "logger": record.name,
            "message": redact(record.getMessage()),
            "trace_id": trace_id,
            "key_name": redact(facts.key_name) if facts and facts.key_name else None,
            "route": getattr(record, "route", None),
            "status": getattr(record, "status", None),
            "milliseconds": getattr(record, "milliseconds", None),
        }
        if record.exc_info and not record.exc_text:
            record.exc_text = self.formatException(record.exc_info)
        if record.exc_text:
            line["exception"] = redact(record.exc_text)
        if record.stack_info:
            line["stack"] = redact(record.stack_info)
        return json.dumps(line, ensure_ascii=False, default=str)


LogFormat = Literal["text", "json"]


def configure_logging(level: int = logging.INFO, log_format: LogFormat = "text") -> None:
    handler = logging.StreamHandler()
    if log_format == "json":
        handler.setFormatter(JsonLineFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    logging.basicConfig(level=level, handlers=[handler])
    logging.getLogger("httpx").setLevel(logging.WARNING)
    install_redaction()
